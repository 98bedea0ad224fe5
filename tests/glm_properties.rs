//! Property tests: on arbitrary small datasets (including degenerate ones: constant columns,
//! all-zero or all-one outcomes, extreme covariates) every family and link either returns an
//! error or a fit whose every reported number is finite; nothing panics (common practice:
//! the "no NaN in a table" rule of the design notes).

use cairn::models::glm::{Family, GlmData, GlmFit, GlmOptions, Link, Method, fit_glm};
use nalgebra::DMatrix;
use proptest::prelude::*;

fn finite(fit: &GlmFit) -> bool {
    fit.coefficients.iter().flatten().all(|v| v.is_finite())
        && fit.standard_errors.iter().flatten().all(|v| v.is_finite())
        && fit.covariance.iter().all(|v| v.is_finite())
        && fit.deviance.is_finite()
        && fit.log_likelihood.is_finite()
        && fit.pearson_chi_square.is_finite()
        && fit.dispersion.is_finite()
        && fit.null_deviance.is_none_or(|v| v.is_finite())
        && fit
            .fitted_means
            .iter()
            .chain(&fit.linear_predictors)
            .all(|v| v.is_finite())
        && fit
            .theta
            .as_ref()
            .is_none_or(|t| t.theta.is_finite() && t.standard_error.is_none_or(f64::is_finite))
}

fn dataset() -> impl Strategy<Value = (usize, Vec<f64>, Vec<f64>)> {
    (3usize..25).prop_flat_map(|n| {
        (
            Just(n),
            prop::collection::vec(
                prop_oneof![-3.0..3.0f64, Just(0.0), Just(1.0), -50.0..50.0f64],
                2 * n,
            ),
            prop::collection::vec(0.0..1.0f64, n),
        )
    })
}

fn check(n: usize, covariates: &[f64], uniforms: &[f64]) {
    let design = DMatrix::from_fn(n, 3, |i, j| {
        if j == 0 {
            1.0
        } else {
            covariates[(j - 1) * n + i]
        }
    });
    let binary: Vec<f64> = uniforms
        .iter()
        .map(|u| if *u < 0.4 { 1.0 } else { 0.0 })
        .collect();
    let counts: Vec<f64> = uniforms.iter().map(|u| (u * 8.0).floor()).collect();
    let positive: Vec<f64> = uniforms.iter().map(|u| 0.1 + 5.0 * u).collect();
    let cases: Vec<(Family, Link, &Vec<f64>, Method)> = vec![
        (
            Family::Binomial,
            Link::Logit,
            &binary,
            Method::MaximumLikelihood,
        ),
        (
            Family::Binomial,
            Link::Probit,
            &binary,
            Method::MaximumLikelihood,
        ),
        (
            Family::Binomial,
            Link::CLogLog,
            &binary,
            Method::MaximumLikelihood,
        ),
        (Family::Binomial, Link::Logit, &binary, Method::Firth),
        (
            Family::Poisson,
            Link::Log,
            &counts,
            Method::MaximumLikelihood,
        ),
        (
            Family::NegativeBinomial { theta: None },
            Link::Log,
            &counts,
            Method::MaximumLikelihood,
        ),
        (
            Family::NegativeBinomial { theta: Some(2.0) },
            Link::Log,
            &counts,
            Method::MaximumLikelihood,
        ),
        (
            Family::Gamma,
            Link::Log,
            &positive,
            Method::MaximumLikelihood,
        ),
        (
            Family::Gamma,
            Link::Inverse,
            &positive,
            Method::MaximumLikelihood,
        ),
    ];
    for (family, link, response, method) in cases {
        let mut options = GlmOptions::new(family, link);
        options.method = method;
        if let Ok(fit) = fit_glm(&GlmData::new(&design, response), &options) {
            assert!(
                finite(&fit),
                "{family:?} {link:?} {method:?}: non-finite output {fit:?}"
            );
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 64, ..ProptestConfig::default() })]
    #[test]
    fn fits_are_finite_or_errors((n, covariates, uniforms) in dataset()) {
        check(n, &covariates, &uniforms);
    }
}

/// A fit on a subset of the design's columns is the fit on a copy of those columns, to the
/// bit (an identity of the engine: the subset only saves the copy). The design is mostly
/// site indicators, so the engine's sparse row store is used too, and the last site column
/// is a copy of an earlier one, so aliasing is reported in the subset's positions.
#[test]
fn fit_on_column_subset_is_fit_on_copied_columns() {
    let n = 600;
    let sites = 8;
    // A fixed linear-congruential sequence stands in for data.
    let mut state = 12345_u64;
    let mut uniform = move || {
        state = state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (state >> 11) as f64 / (1u64 << 53) as f64
    };
    let site: Vec<usize> = (0..n).map(|i| i % sites).collect();
    let x: Vec<f64> = (0..n).map(|_| uniform() * 4.0 - 2.0).collect();
    let arm: Vec<f64> = (0..n).map(|i| ((i / 3) % 2) as f64).collect();
    // Columns: intercept, arm, x, sites 1..7 as indicators, then a copy of site 7.
    let p = 3 + (sites - 1) + 1;
    let design = DMatrix::from_fn(n, p, |i, j| match j {
        0 => 1.0,
        1 => arm[i],
        2 => x[i],
        j if j < p - 1 => f64::from(site[i] == j - 2),
        _ => f64::from(site[i] == sites - 1),
    });
    let eta: Vec<f64> = (0..n)
        .map(|i| -0.3 + 0.5 * arm[i] + 0.4 * x[i] + 0.1 * site[i] as f64)
        .collect();
    let binary: Vec<f64> = eta
        .iter()
        .map(|e| f64::from(uniform() < 1.0 / (1.0 + (-e).exp())))
        .collect();
    let counts: Vec<f64> = eta
        .iter()
        .map(|e| (e.exp() * 2.0 * uniform()).floor())
        .collect();
    let offset: Vec<f64> = (0..n).map(|_| (0.5 + uniform()).ln()).collect();
    let kept: Vec<usize> = (0..p).filter(|&j| j != 1).collect();
    let copy = design.select_columns(&kept);
    let cases: Vec<(Family, Link, &Vec<f64>, Method)> = vec![
        (
            Family::Binomial,
            Link::Logit,
            &binary,
            Method::MaximumLikelihood,
        ),
        (Family::Binomial, Link::Logit, &binary, Method::Firth),
        (
            Family::Poisson,
            Link::Log,
            &counts,
            Method::MaximumLikelihood,
        ),
        (
            Family::NegativeBinomial { theta: None },
            Link::Log,
            &counts,
            Method::MaximumLikelihood,
        ),
    ];
    for (family, link, response, method) in cases {
        let mut options = GlmOptions::new(family, link);
        options.method = method;
        let on_copy = fit_glm(
            &GlmData::new(&copy, response).with_offset(&offset),
            &options,
        );
        let on_subset = fit_glm(
            &GlmData::new(&design, response)
                .with_offset(&offset)
                .with_columns(&kept),
            &options,
        );
        let on_copy = on_copy.expect("the fit on the copy succeeds");
        // The copy of site 7 is the copied design's last column: aliased, position p − 2.
        assert_eq!(
            on_copy.aliased_columns,
            vec![p - 2],
            "{family:?} {method:?}"
        );
        assert_eq!(
            format!("{on_copy:?}"),
            format!("{:?}", on_subset.expect("the fit on the subset succeeds")),
            "{family:?} {link:?} {method:?}: the subset fit differs from the copy's"
        );
    }
}

#[test]
fn column_subsets_out_of_order_or_range_are_refused() {
    let design = DMatrix::from_fn(6, 3, |i, j| if j == 0 { 1.0 } else { (i * j) as f64 });
    let response = [0.0, 1.0, 0.0, 1.0, 1.0, 0.0];
    let options = GlmOptions::new(Family::Binomial, Link::Logit);
    for columns in [&[2usize, 1][..], &[0, 0], &[0, 3], &[]] {
        let outcome = fit_glm(
            &GlmData::new(&design, &response).with_columns(columns),
            &options,
        );
        assert!(outcome.is_err(), "columns {columns:?} were accepted");
    }
}
