//! Failure modes of the GLM engine on small constructed datasets: each must come back as a
//! `StopReason` value or a `GlmError`, never a panic and never a NaN. The definitions of
//! complete and quasi-complete separation are those of Albert & Anderson (1984), Biometrika
//! 71:1–10; the datasets are constructed here to satisfy them (common practice).

use cairn::models::StopReason;
use cairn::models::glm::{
    CovarianceKind, Family, GlmData, GlmError, GlmFit, GlmOptions, Link, Method, fit_glm,
    profile_interval,
};
use nalgebra::DMatrix;

/// An n×p design from rows.
fn design(rows: &[&[f64]]) -> DMatrix<f64> {
    DMatrix::from_fn(rows.len(), rows[0].len(), |i, j| rows[i][j])
}

fn assert_all_finite(fit: &GlmFit) {
    assert!(fit.coefficients.iter().flatten().all(|v| v.is_finite()));
    assert!(fit.standard_errors.iter().flatten().all(|v| v.is_finite()));
    assert!(fit.covariance.iter().all(|v| v.is_finite()));
    assert!(
        fit.deviance.is_finite()
            && fit.log_likelihood.is_finite()
            && fit.pearson_chi_square.is_finite()
    );
    assert!(
        fit.fitted_means
            .iter()
            .chain(&fit.linear_predictors)
            .all(|v| v.is_finite())
    );
}

fn logit() -> GlmOptions {
    GlmOptions::new(Family::Binomial, Link::Logit)
}

/// Complete separation: y = 1 exactly when x > 3.5, so the slope (and with it the intercept)
/// runs to infinity.
#[test]
fn complete_separation_is_reported() {
    let x = design(&[
        &[1.0, 1.0],
        &[1.0, 2.0],
        &[1.0, 3.0],
        &[1.0, 4.0],
        &[1.0, 5.0],
        &[1.0, 6.0],
    ]);
    let y = [0.0, 0.0, 0.0, 1.0, 1.0, 1.0];
    for link in [Link::Logit, Link::Probit, Link::CLogLog] {
        let fit = fit_glm(
            &GlmData::new(&x, &y),
            &GlmOptions::new(Family::Binomial, link),
        )
        .expect("fit");
        match &fit.stop_reason {
            StopReason::Separation { columns } => {
                assert!(columns.contains(&1), "{link:?}: {columns:?}")
            }
            other => panic!("{link:?}: expected separation, got {other:?}"),
        }
        assert_all_finite(&fit);
    }
}

/// Quasi-complete separation: y = 1 for x > 3, y = 0 for x < 3, both outcomes at x = 3.
#[test]
fn quasi_complete_separation_is_reported() {
    let x = design(&[
        &[1.0, 1.0],
        &[1.0, 2.0],
        &[1.0, 3.0],
        &[1.0, 3.0],
        &[1.0, 4.0],
        &[1.0, 5.0],
        &[1.0, 6.0],
    ]);
    let y = [0.0, 0.0, 0.0, 1.0, 1.0, 1.0, 1.0];
    let fit = fit_glm(&GlmData::new(&x, &y), &logit()).expect("fit");
    match &fit.stop_reason {
        StopReason::Separation { columns } => assert!(columns.contains(&1), "{columns:?}"),
        other => panic!("expected separation, got {other:?}"),
    }
    assert_all_finite(&fit);
}

/// A treatment arm with no events: the arm's coefficient runs to −∞ while the intercept and the
/// covariate stay finite, so exactly the arm's column is implicated.
#[test]
fn arm_without_events_is_separation_on_that_arm() {
    let mut rows: Vec<Vec<f64>> = Vec::new();
    let mut y = Vec::new();
    for i in 0..40 {
        let arm = if i % 2 == 0 { 0.0 } else { 1.0 };
        let covariate = ((i * 7) % 11) as f64 / 10.0;
        rows.push(vec![1.0, arm, covariate]);
        // Events only in the reference arm, not monotone in the covariate.
        y.push(if arm == 0.0 && (i % 3 == 0 || i % 5 == 0) {
            1.0
        } else {
            0.0
        });
    }
    let row_refs: Vec<&[f64]> = rows.iter().map(|r| r.as_slice()).collect();
    let x = design(&row_refs);
    let fit = fit_glm(&GlmData::new(&x, &y), &logit()).expect("fit");
    assert_eq!(fit.stop_reason, StopReason::Separation { columns: vec![1] });
    assert_all_finite(&fit);

    // Firth's method gives finite estimates for the same data (Heinze & Schemper 2002) and
    // converges.
    let mut firth = logit();
    firth.method = Method::Firth;
    let penalised = fit_glm(&GlmData::new(&x, &y), &firth).expect("firth fit");
    assert!(
        matches!(penalised.stop_reason, StopReason::Converged { .. }),
        "{:?}",
        penalised.stop_reason
    );
    assert_all_finite(&penalised);
    // The arm effect is large and negative but finite; brglm2 gives −3.4865 for these data
    // (arm_no_events_firth.json; the 1e-6 check is in glm_reference.rs).
    let arm_effect = penalised.coefficients[1].expect("estimable");
    assert!(arm_effect < -3.0 && arm_effect > -4.0, "{arm_effect}");
}

/// No separation in a well-behaved dataset: the same design with events in both arms.
#[test]
fn overlapping_data_converge_without_separation() {
    let mut rows: Vec<Vec<f64>> = Vec::new();
    let mut y = Vec::new();
    for i in 0..40 {
        let arm = if i % 2 == 0 { 0.0 } else { 1.0 };
        let covariate = ((i * 7) % 11) as f64 / 10.0;
        rows.push(vec![1.0, arm, covariate]);
        y.push(if i % 3 == 0 || i % 5 == 0 { 1.0 } else { 0.0 });
    }
    let row_refs: Vec<&[f64]> = rows.iter().map(|r| r.as_slice()).collect();
    let x = design(&row_refs);
    let fit = fit_glm(&GlmData::new(&x, &y), &logit()).expect("fit");
    assert!(
        matches!(fit.stop_reason, StopReason::Converged { .. }),
        "{:?}",
        fit.stop_reason
    );
}

/// An aliased column (2 × an earlier column) is dropped and reported; the other coefficients
/// equal those of the fit without it (to 1e-10 relative: the same problem).
#[test]
fn aliased_column_is_reported_and_dropped() {
    let base: Vec<[f64; 2]> = (0..12).map(|i| [1.0, (i as f64 * 0.37).sin()]).collect();
    let y: Vec<f64> = (0..12).map(|i| ((i * 5) % 7) as f64).collect();
    let full = DMatrix::from_fn(
        12,
        3,
        |i, j| if j < 2 { base[i][j] } else { 2.0 * base[i][1] },
    );
    let reduced = DMatrix::from_fn(12, 2, |i, j| base[i][j]);
    let options = GlmOptions::new(Family::Poisson, Link::Log);
    let fit = fit_glm(&GlmData::new(&full, &y), &options).expect("fit");
    assert_eq!(
        fit.stop_reason,
        StopReason::SingularDesign { columns: vec![2] }
    );
    assert_eq!(fit.aliased_columns, vec![2]);
    assert_eq!(fit.coefficients[2], None);
    assert_eq!(fit.rank, 2);
    let reference = fit_glm(&GlmData::new(&reduced, &y), &options).expect("fit");
    for j in 0..2 {
        let (a, b) = (
            fit.coefficients[j].unwrap(),
            reference.coefficients[j].unwrap(),
        );
        assert!((a - b).abs() <= 1e-10 * b.abs().max(1e-300), "{a} vs {b}");
    }
    assert_all_finite(&fit);
    // A column of zeros is aliased too.
    let with_zero = DMatrix::from_fn(12, 3, |i, j| if j < 2 { base[i][j] } else { 0.0 });
    let fit = fit_glm(&GlmData::new(&with_zero, &y), &options).expect("fit");
    assert_eq!(
        fit.stop_reason,
        StopReason::SingularDesign { columns: vec![2] }
    );
}

/// An iteration cap of 1 stops a fit that needs more.
#[test]
fn iteration_cap_is_reported() {
    let x = design(&[
        &[1.0, 0.1],
        &[1.0, 0.9],
        &[1.0, 1.7],
        &[1.0, 2.2],
        &[1.0, 3.1],
        &[1.0, 3.3],
    ]);
    let y = [0.0, 1.0, 0.0, 1.0, 1.0, 0.0];
    let mut options = logit();
    options.max_iterations = 1;
    let fit = fit_glm(&GlmData::new(&x, &y), &options).expect("fit");
    assert_eq!(
        fit.stop_reason,
        StopReason::IterationLimit { iterations: 1 }
    );
    assert_eq!(fit.iterations, 1);
    assert_all_finite(&fit);
    // And the same data converge with the default cap.
    let fit = fit_glm(&GlmData::new(&x, &y), &logit()).expect("fit");
    assert!(matches!(fit.stop_reason, StopReason::Converged { .. }));
}

/// Non-finite or out-of-range input is an error naming the row, never a fit.
#[test]
fn invalid_input_is_an_error() {
    let good = design(&[&[1.0, 0.5], &[1.0, 1.5], &[1.0, 2.5]]);
    let y = [0.0, 1.0, 0.0];
    let nan_design = design(&[&[1.0, 0.5], &[1.0, f64::NAN], &[1.0, 2.5]]);
    assert_eq!(
        fit_glm(&GlmData::new(&nan_design, &y), &logit()),
        Err(GlmError::NonFiniteInput {
            what: "design",
            row: 1,
            column: 1
        })
    );
    let infinite_response = [0.0, f64::INFINITY, 0.0];
    assert_eq!(
        fit_glm(
            &GlmData::new(&good, &infinite_response),
            &GlmOptions::new(Family::Poisson, Link::Log)
        ),
        Err(GlmError::NonFiniteInput {
            what: "response",
            row: 1,
            column: 0
        })
    );
    let nan_offset = [0.0, 0.0, f64::NAN];
    assert_eq!(
        fit_glm(&GlmData::new(&good, &y).with_offset(&nan_offset), &logit()),
        Err(GlmError::NonFiniteInput {
            what: "offset",
            row: 2,
            column: 0
        })
    );
    assert!(matches!(
        fit_glm(&GlmData::new(&good, &[0.0, 2.0, 0.0]), &logit()),
        Err(GlmError::ResponseOutOfRange { row: 1, .. })
    ));
    assert!(matches!(
        fit_glm(
            &GlmData::new(&good, &[1.0, -1.0, 2.0]),
            &GlmOptions::new(Family::Poisson, Link::Log)
        ),
        Err(GlmError::ResponseOutOfRange { row: 1, .. })
    ));
    assert!(matches!(
        fit_glm(
            &GlmData::new(&good, &[1.0, 0.0, 2.0]),
            &GlmOptions::new(Family::Gamma, Link::Log)
        ),
        Err(GlmError::ResponseOutOfRange { row: 1, .. })
    ));
    assert!(matches!(
        fit_glm(
            &GlmData::new(&good, &y).with_prior_weights(&[1.0, -1.0, 1.0]),
            &logit()
        ),
        Err(GlmError::InvalidWeight { row: 1, .. })
    ));
    assert!(matches!(
        fit_glm(&GlmData::new(&good, &[0.0, 1.0]), &logit()),
        Err(GlmError::DimensionMismatch {
            what: "response",
            expected: 3,
            found: 2
        })
    ));
    let empty = DMatrix::<f64>::zeros(0, 2);
    assert_eq!(
        fit_glm(&GlmData::new(&empty, &[]), &logit()),
        Err(GlmError::EmptyData)
    );
    // Option checks: an unsupported link, Firth outside the logit model, a bad theta.
    assert!(matches!(
        fit_glm(
            &GlmData::new(&good, &y),
            &GlmOptions::new(Family::Binomial, Link::Log)
        ),
        Err(GlmError::InvalidOption { .. })
    ));
    let mut firth_probit = GlmOptions::new(Family::Binomial, Link::Probit);
    firth_probit.method = Method::Firth;
    assert!(matches!(
        fit_glm(&GlmData::new(&good, &y), &firth_probit),
        Err(GlmError::InvalidOption { .. })
    ));
    let bad_theta = GlmOptions::new(Family::NegativeBinomial { theta: Some(-1.0) }, Link::Log);
    assert!(matches!(
        fit_glm(&GlmData::new(&good, &[1.0, 2.0, 3.0]), &bad_theta),
        Err(GlmError::InvalidOption { .. })
    ));
    // Gamma with as many coefficients as rows has no residual degrees of freedom.
    let square = design(&[&[1.0, 0.5], &[1.0, 1.5]]);
    assert_eq!(
        fit_glm(
            &GlmData::new(&square, &[1.0, 2.0]),
            &GlmOptions::new(Family::Gamma, Link::Log)
        ),
        Err(GlmError::NoResidualDegreesOfFreedom)
    );
}

/// Counts without overdispersion: θ runs to infinity, which is reported in words rather than
/// as a huge or non-finite θ passed off as an estimate. The data are Poisson-like by
/// construction (counts equal to their means, rounded).
#[test]
fn negative_binomial_without_overdispersion_is_reported() {
    let n = 30;
    let x = DMatrix::from_fn(n, 2, |i, j| if j == 0 { 1.0 } else { i as f64 / n as f64 });
    let y: Vec<f64> = (0..n)
        .map(|i| (5.0 * (1.0 + i as f64 / n as f64)).round())
        .collect();
    let fit = fit_glm(
        &GlmData::new(&x, &y),
        &GlmOptions::new(Family::NegativeBinomial { theta: None }, Link::Log),
    )
    .expect("fit");
    match &fit.stop_reason {
        StopReason::NumericalFailure { detail } => assert!(detail.contains("theta"), "{detail}"),
        other => panic!("expected a theta failure, got {other:?}"),
    }
    assert_all_finite(&fit);
}

/// A profile interval needs a converged fit, and is unbounded under separation.
#[test]
fn profile_interval_refuses_separated_fit() {
    let x = design(&[
        &[1.0, 1.0],
        &[1.0, 2.0],
        &[1.0, 3.0],
        &[1.0, 4.0],
        &[1.0, 5.0],
        &[1.0, 6.0],
    ]);
    let y = [0.0, 0.0, 0.0, 1.0, 1.0, 1.0];
    let data = GlmData::new(&x, &y);
    let fit = fit_glm(&data, &logit()).expect("fit");
    assert!(matches!(
        profile_interval(&data, &logit(), &fit, 1, 1.96),
        Err(GlmError::ProfileFailure { .. })
    ));
}

/// Sandwich and model-based fits share their estimates (only the covariance differs).
#[test]
fn sandwich_changes_only_the_covariance() {
    let x = design(&[
        &[1.0, 0.1],
        &[1.0, 0.9],
        &[1.0, 1.7],
        &[1.0, 2.2],
        &[1.0, 3.1],
        &[1.0, 3.3],
        &[1.0, 4.0],
    ]);
    let y = [1.0, 3.0, 2.0, 6.0, 4.0, 9.0, 8.0];
    let mut options = GlmOptions::new(Family::Poisson, Link::Log);
    let model = fit_glm(&GlmData::new(&x, &y), &options).expect("fit");
    options.covariance = CovarianceKind::SandwichHc0;
    let sandwich = fit_glm(&GlmData::new(&x, &y), &options).expect("fit");
    assert_eq!(model.coefficients, sandwich.coefficients);
    assert_ne!(model.covariance, sandwich.covariance);
}
