//! Failure modes of the ordinal and multinomial engines on constructed tiny datasets: each must
//! come back as a typed error or a StopReason, never a panic and never a NaN. The expected
//! behaviour follows from the data's construction (common practice: an empty category cannot be
//! estimated, complete separation makes the likelihood's supremum unattained, a constant column
//! duplicates the cut-points).

use cairn::models::StopReason;
use cairn::models::multinomial::{MultinomialOptions, fit_multinomial_logit};
use cairn::models::ordinal::{
    CumulativeLink, CumulativeLinkOptions, ModelInputError, brant_test, fit_cumulative_link,
    fit_nominal_effects,
};
use nalgebra::DMatrix;

const LINKS: [CumulativeLink; 3] = [
    CumulativeLink::Logit,
    CumulativeLink::Probit,
    CumulativeLink::ComplementaryLogLog,
];

fn options(link: CumulativeLink) -> CumulativeLinkOptions {
    CumulativeLinkOptions {
        link,
        ..CumulativeLinkOptions::default()
    }
}

fn column(values: &[f64]) -> DMatrix<f64> {
    DMatrix::from_column_slice(values.len(), 1, values)
}

fn all_finite(values: &[f64]) -> bool {
    values.iter().all(|v| v.is_finite())
}

/// Treatment and a covariate with every category present in both arms: converges (control case
/// for the separation tests below).
fn overlapping() -> (DMatrix<f64>, Vec<usize>) {
    let treatment = [0.0, 0.0, 0.0, 0.0, 0.0, 0.0, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0];
    let covariate = [
        0.3, -1.2, 0.8, 0.1, -0.4, 1.5, -0.7, 0.2, 1.1, -0.3, 0.6, -1.0,
    ];
    let mut design = DMatrix::zeros(12, 2);
    for r in 0..12 {
        design[(r, 0)] = treatment[r];
        design[(r, 1)] = covariate[r];
    }
    (design, vec![0, 1, 0, 2, 1, 0, 1, 2, 2, 0, 2, 1])
}

#[test]
fn overlapping_data_converge_for_every_link() {
    let (design, response) = overlapping();
    for link in LINKS {
        let fit = fit_cumulative_link(&design, &response, 3, None, &options(link)).expect("valid");
        assert!(
            matches!(fit.stop_reason, StopReason::Converged { .. }),
            "{link:?}: {:?}",
            fit.stop_reason
        );
        assert!(fit.cut_points[0] < fit.cut_points[1]);
    }
}

#[test]
fn empty_category_is_a_stop_reason() {
    let design = column(&[0.0, 1.0, 0.0, 1.0, 0.0, 1.0]);
    let response = [0, 0, 2, 2, 3, 3];
    for link in LINKS {
        let fit =
            fit_cumulative_link(&design, &response, 4, None, &options(link)).expect("valid input");
        assert_eq!(fit.stop_reason, StopReason::EmptyCategory { category: 1 });
        assert!(fit.cut_points.is_empty() && fit.coefficients.is_empty());
        assert!(fit.log_likelihood.is_none() && fit.covariance.is_none());
    }
    // A category present only in zero-weight rows is empty too.
    let weights = [1.0, 1.0, 0.0, 1.0, 1.0, 1.0];
    let fit = fit_cumulative_link(
        &design,
        &[0, 0, 1, 2, 2, 0],
        3,
        Some(&weights),
        &options(CumulativeLink::Logit),
    )
    .expect("valid");
    assert_eq!(fit.stop_reason, StopReason::EmptyCategory { category: 1 });
    let multinomial = fit_multinomial_logit(
        &DMatrix::from_fn(6, 2, |r, c| if c == 0 { 1.0 } else { design[(r, 0)] }),
        &response,
        4,
        0,
        None,
        &MultinomialOptions::default(),
    )
    .expect("valid");
    assert_eq!(
        multinomial.stop_reason,
        StopReason::EmptyCategory { category: 1 }
    );
}

#[test]
fn complete_separation_is_reported_with_its_column() {
    // Every untreated subject is in category 0, every treated one above it, while the covariate
    // (column 1) overlaps: treatment's coefficient diverges.
    // (Within the treated the covariate must not separate categories 1 and 2 as well.)
    let (design, _) = overlapping();
    let response = vec![0, 0, 0, 0, 0, 0, 1, 2, 1, 2, 2, 1];
    for link in LINKS {
        let fit = fit_cumulative_link(&design, &response, 3, None, &options(link)).expect("valid");
        assert_eq!(
            fit.stop_reason,
            StopReason::Separation { columns: vec![0] },
            "{link:?}"
        );
        assert!(
            all_finite(&fit.cut_points) && all_finite(&fit.coefficients),
            "{link:?}"
        );
        assert!(fit.log_likelihood.is_some_and(f64::is_finite));
        if let Some(covariance) = &fit.covariance {
            assert!(all_finite(covariance.as_slice()));
        }
    }
    // Quasi-complete: one treated subject joins category 0 (the boundary), still divergent.
    let quasi = vec![0, 0, 0, 0, 0, 0, 0, 2, 1, 2, 2, 1];
    for link in LINKS {
        let fit = fit_cumulative_link(&design, &quasi, 3, None, &options(link)).expect("valid");
        assert_eq!(
            fit.stop_reason,
            StopReason::Separation { columns: vec![0] },
            "{link:?} quasi"
        );
    }
}

#[test]
fn constant_column_is_rejected_as_intercept() {
    let (design, response) = overlapping();
    let with_constant = DMatrix::from_fn(
        12,
        3,
        |r, c| if c == 1 { 1.0 } else { design[(r, c.min(1))] },
    );
    let error = fit_cumulative_link(
        &with_constant,
        &response,
        3,
        None,
        &options(CumulativeLink::Logit),
    )
    .unwrap_err();
    assert_eq!(error, ModelInputError::ConstantColumn { column: 1 });
    assert!(error.to_string().contains("intercept"), "{error}");
    let error = brant_test(&with_constant, &response, 3, None, &[]).unwrap_err();
    assert_eq!(error, ModelInputError::ConstantColumn { column: 1 });
}

#[test]
fn collinear_columns_are_a_singular_design() {
    let (design, response) = overlapping();
    // Column 2 = 2 * column 0 - column 1 + 3: aliased with the others and the cut-points.
    let collinear = DMatrix::from_fn(12, 3, |r, c| match c {
        2 => 2.0 * design[(r, 0)] - design[(r, 1)] + 3.0,
        _ => design[(r, c)],
    });
    let fit = fit_cumulative_link(
        &collinear,
        &response,
        3,
        None,
        &options(CumulativeLink::Probit),
    )
    .expect("valid");
    assert_eq!(
        fit.stop_reason,
        StopReason::SingularDesign { columns: vec![2] }
    );
    let with_intercept = DMatrix::from_fn(
        12,
        4,
        |r, c| if c == 0 { 1.0 } else { collinear[(r, c - 1)] },
    );
    let multinomial = fit_multinomial_logit(
        &with_intercept,
        &response,
        3,
        0,
        None,
        &MultinomialOptions::default(),
    )
    .expect("valid");
    assert_eq!(
        multinomial.stop_reason,
        StopReason::SingularDesign { columns: vec![3] }
    );
}

#[test]
fn non_finite_and_malformed_input_are_errors() {
    let (design, response) = overlapping();
    let mut bad = design.clone();
    bad[(4, 1)] = f64::NAN;
    assert_eq!(
        fit_cumulative_link(&bad, &response, 3, None, &options(CumulativeLink::Logit)).unwrap_err(),
        ModelInputError::NonFiniteDesign { row: 4, column: 1 }
    );
    bad[(4, 1)] = f64::INFINITY;
    assert_eq!(
        fit_nominal_effects(
            &bad,
            &response,
            3,
            None,
            &[0],
            &options(CumulativeLink::Logit)
        )
        .unwrap_err(),
        ModelInputError::NonFiniteDesign { row: 4, column: 1 }
    );
    let intercept_bad = DMatrix::from_fn(12, 3, |r, c| if c == 0 { 1.0 } else { bad[(r, c - 1)] });
    assert_eq!(
        fit_multinomial_logit(
            &intercept_bad,
            &response,
            3,
            0,
            None,
            &MultinomialOptions::default()
        )
        .unwrap_err(),
        ModelInputError::NonFiniteDesign { row: 4, column: 2 }
    );
    let mut weights = vec![1.0; 12];
    weights[3] = f64::NAN;
    assert!(matches!(
        fit_cumulative_link(
            &design,
            &response,
            3,
            Some(&weights),
            &options(CumulativeLink::Logit)
        )
        .unwrap_err(),
        ModelInputError::InvalidWeight { row: 3, .. }
    ));
    weights[3] = -1.0;
    assert!(matches!(
        fit_cumulative_link(
            &design,
            &response,
            3,
            Some(&weights),
            &options(CumulativeLink::Logit)
        )
        .unwrap_err(),
        ModelInputError::InvalidWeight { row: 3, .. }
    ));
    let mut out_of_range = response.clone();
    out_of_range[5] = 3;
    assert_eq!(
        fit_cumulative_link(
            &design,
            &out_of_range,
            3,
            None,
            &options(CumulativeLink::Logit)
        )
        .unwrap_err(),
        ModelInputError::ResponseOutOfRange {
            row: 5,
            category: 3,
            n_categories: 3
        }
    );
    assert!(matches!(
        fit_cumulative_link(
            &design,
            &response[..11],
            3,
            None,
            &options(CumulativeLink::Logit)
        )
        .unwrap_err(),
        ModelInputError::LengthMismatch { .. }
    ));
    assert!(matches!(
        fit_cumulative_link(&design, &[0; 12], 1, None, &options(CumulativeLink::Logit))
            .unwrap_err(),
        ModelInputError::TooFewCategories { .. }
    ));
    assert!(matches!(
        fit_nominal_effects(
            &design,
            &response,
            3,
            None,
            &[2],
            &options(CumulativeLink::Logit)
        )
        .unwrap_err(),
        ModelInputError::InvalidIndex { .. }
    ));
    assert_eq!(
        fit_cumulative_link(
            &DMatrix::zeros(0, 1),
            &[],
            3,
            None,
            &options(CumulativeLink::Logit)
        )
        .unwrap_err(),
        ModelInputError::NoRows
    );
}

#[test]
fn iteration_cap_one_is_an_iteration_limit() {
    let (design, response) = overlapping();
    let capped = CumulativeLinkOptions {
        max_iterations: 1,
        ..CumulativeLinkOptions::default()
    };
    let fit = fit_cumulative_link(&design, &response, 3, None, &capped).expect("valid");
    assert_eq!(
        fit.stop_reason,
        StopReason::IterationLimit { iterations: 1 }
    );
    assert_eq!(fit.iterations, 1);
    assert!(all_finite(&fit.cut_points) && all_finite(&fit.coefficients));
    let with_intercept =
        DMatrix::from_fn(12, 3, |r, c| if c == 0 { 1.0 } else { design[(r, c - 1)] });
    let multinomial = fit_multinomial_logit(
        &with_intercept,
        &response,
        3,
        0,
        None,
        &MultinomialOptions {
            max_iterations: 1,
            ..MultinomialOptions::default()
        },
    )
    .expect("valid");
    assert_eq!(
        multinomial.stop_reason,
        StopReason::IterationLimit { iterations: 1 }
    );
    let zero_cap = CumulativeLinkOptions {
        max_iterations: 0,
        ..CumulativeLinkOptions::default()
    };
    assert!(matches!(
        fit_cumulative_link(&design, &response, 3, None, &zero_cap).unwrap_err(),
        ModelInputError::InvalidOptions { .. }
    ));
}

#[test]
fn multinomial_separation_is_reported_with_its_column() {
    // Category 2 occurs exactly when x > 0.5; x also overlaps categories 0 and 1.
    let x = [
        0.1, 0.2, 0.3, 0.15, 0.25, 0.35, 0.4, 0.45, 0.9, 1.0, 0.8, 0.7,
    ];
    let response = [0, 1, 0, 1, 0, 1, 1, 0, 2, 2, 2, 2];
    let design = DMatrix::from_fn(12, 2, |r, c| if c == 0 { 1.0 } else { x[r] });
    let fit = fit_multinomial_logit(
        &design,
        &response,
        3,
        0,
        None,
        &MultinomialOptions::default(),
    )
    .expect("valid");
    assert_eq!(fit.stop_reason, StopReason::Separation { columns: vec![1] });
    assert!(all_finite(fit.coefficients.as_slice()));
}

#[test]
fn crossing_cumulative_probabilities_in_nominal_fit_are_reported() {
    // At low z most subjects are in the middle category; at high z only the outer categories
    // occur, so the cut-point-specific slopes pull the cumulative probabilities across each
    // other for high z.
    let mut z = Vec::new();
    let mut response = Vec::new();
    for level in 0..10 {
        let categories: &[usize] = if level < 5 {
            &[1, 1, 1, 0, 2]
        } else {
            &[0, 2, 0, 2, 0]
        };
        for &category in categories {
            z.push(level as f64);
            response.push(category);
        }
    }
    let design = column(&z);
    let fit = fit_nominal_effects(
        &design,
        &response,
        3,
        None,
        &[0],
        &options(CumulativeLink::Logit),
    )
    .expect("valid");
    assert!(fit.n_rows_with_crossing > 0, "{fit:?}");
    assert!(
        matches!(&fit.stop_reason, StopReason::NumericalFailure { detail } if detail.contains("cross")),
        "{:?}",
        fit.stop_reason
    );
    assert!(all_finite(&fit.cut_points) && all_finite(fit.nominal_coefficients.as_slice()));
    assert!(fit.log_likelihood.is_some_and(f64::is_finite));
}

/// With no design columns the maximum-likelihood cut-points are the link applied to the
/// cumulative sample proportions (closed form; common practice).
#[test]
fn thresholds_only_model_has_closed_form_cut_points() {
    let response = [0, 0, 1, 2, 2, 2, 1, 0, 2, 2];
    let design = DMatrix::<f64>::zeros(10, 0);
    let fit = fit_cumulative_link(&design, &response, 3, None, &options(CumulativeLink::Logit))
        .expect("valid");
    assert!(
        matches!(fit.stop_reason, StopReason::Converged { .. }),
        "{:?}",
        fit.stop_reason
    );
    let expected = [(0.3f64 / 0.7).ln(), (0.5f64 / 0.5).ln()];
    for (got, want) in fit.cut_points.iter().zip(expected) {
        assert!((got - want).abs() <= 1e-12, "{got} vs {want}");
    }
}
