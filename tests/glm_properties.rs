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
