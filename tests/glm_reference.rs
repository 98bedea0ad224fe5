//! Validation of the GLM engine against reference-library output stored under
//! tests/reference/glm/ (made by make_reference.R: R 4.2.2 `stats::glm`, MASS 7.3-58.2 `glm.nb`
//! and `confint`, brglm2 0.9 `brglmFit`; the versions are also in each JSON file's "source").
//! Each case has a `<name>_data.csv` (response, prior weight, offset, model-matrix columns) and
//! a `<name>.json` of reference values. Tolerances are stated beside each check.

use cairn::models::StopReason;
use cairn::models::glm::{
    CovarianceKind, Family, GlmData, GlmFit, GlmOptions, Link, Method, fit_glm, profile_interval,
};
use nalgebra::DMatrix;
use serde_json::Value;

struct Case {
    design: DMatrix<f64>,
    response: Vec<f64>,
    weights: Vec<f64>,
    offset: Vec<f64>,
    reference: Value,
}

fn reference_dir() -> std::path::PathBuf {
    std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests")
        .join("reference")
        .join("glm")
}

fn load(name: &str) -> Case {
    let dir = reference_dir();
    let text = std::fs::read_to_string(dir.join(format!("{name}_data.csv"))).expect("data csv");
    let mut lines = text.lines();
    let header: Vec<&str> = lines.next().expect("header").split(',').collect();
    let n_columns = header.len() - 3;
    let mut response = Vec::new();
    let mut weights = Vec::new();
    let mut offset = Vec::new();
    let mut rows: Vec<Vec<f64>> = Vec::new();
    for line in lines.filter(|l| !l.trim().is_empty()) {
        let values: Vec<f64> = line
            .split(',')
            .map(|v| v.trim().parse::<f64>().expect("number"))
            .collect();
        response.push(values[0]);
        weights.push(values[1]);
        offset.push(values[2]);
        rows.push(values[3..].to_vec());
    }
    let design = DMatrix::from_fn(rows.len(), n_columns, |i, j| rows[i][j]);
    let json = std::fs::read_to_string(dir.join(format!("{name}.json"))).expect("json");
    Case {
        design,
        response,
        weights,
        offset,
        reference: serde_json::from_str(&json).expect("valid json"),
    }
}

fn numbers(value: &Value) -> Vec<f64> {
    value
        .as_array()
        .expect("array")
        .iter()
        .map(|v| v.as_f64().expect("number"))
        .collect()
}

fn matrix(value: &Value) -> Vec<Vec<f64>> {
    value
        .as_array()
        .expect("array")
        .iter()
        .map(numbers)
        .collect()
}

fn relative_error(actual: f64, expected: f64) -> f64 {
    (actual - expected).abs() / expected.abs().max(1e-300)
}

fn options_for(reference: &Value) -> GlmOptions {
    let link = match reference["link"].as_str().expect("link") {
        "logit" => Link::Logit,
        "probit" => Link::Probit,
        "cloglog" => Link::CLogLog,
        "log" => Link::Log,
        "inverse" => Link::Inverse,
        other => panic!("unknown link {other}"),
    };
    let family = match reference["family"].as_str().expect("family") {
        "binomial" => Family::Binomial,
        "poisson" => Family::Poisson,
        "negative_binomial" => Family::NegativeBinomial { theta: None },
        "gamma" => Family::Gamma,
        other => panic!("unknown family {other}"),
    };
    let mut options = GlmOptions::new(family, link);
    options.has_intercept = reference["has_intercept"].as_bool().expect("bool");
    options
}

fn data_of(case: &Case) -> GlmData<'_> {
    GlmData::new(&case.design, &case.response)
        .with_offset(&case.offset)
        .with_prior_weights(&case.weights)
}

const MAXIMUM_LIKELIHOOD_CASES: &[&str] = &[
    "birthwt_logit",
    "birthwt_probit",
    "birthwt_cloglog",
    "mtcars_logit",
    "mtcars_probit",
    "mtcars_cloglog",
    "esoph_logit",
    "insurance_poisson",
    "insurance_poisson_no_intercept",
    "warpbreaks_poisson",
    "quine_nb",
    "warpbreaks_nb",
    "clotting_lot1_inverse",
    "clotting_lot1_log",
    "clotting_both_inverse",
    "clotting_both_log",
    "trees_inverse",
    "trees_log",
];

fn coefficients_of(fit: &GlmFit) -> Vec<f64> {
    fit.coefficients
        .iter()
        .map(|c| c.expect("estimable"))
        .collect()
}

/// Estimates, SEs, deviance, null deviance, log-likelihood, dispersion, Pearson χ² and θ against
/// R (stats::glm / MASS::glm.nb, see each JSON's "source"): 1e-6 relative (the brief's bound).
#[test]
fn maximum_likelihood_fits_match_r() {
    let tolerance = 1e-6;
    for name in MAXIMUM_LIKELIHOOD_CASES {
        let case = load(name);
        let reference = &case.reference;
        let options = options_for(reference);
        let fit = fit_glm(&data_of(&case), &options).expect("fit");
        assert!(
            matches!(fit.stop_reason, StopReason::Converged { .. }),
            "{name}: {:?}",
            fit.stop_reason
        );
        let mut worst: Vec<(&str, f64)> = Vec::new();
        let coefficients = coefficients_of(&fit);
        let standard_errors: Vec<f64> =
            fit.standard_errors.iter().map(|s| s.expect("se")).collect();
        let compare_vectors = |actual: &[f64], expected: &[f64]| {
            assert_eq!(actual.len(), expected.len());
            actual
                .iter()
                .zip(expected)
                .map(|(a, e)| relative_error(*a, *e))
                .fold(0.0, f64::max)
        };
        worst.push((
            "coefficients",
            compare_vectors(&coefficients, &numbers(&reference["coefficients"])),
        ));
        worst.push((
            "standard errors",
            compare_vectors(&standard_errors, &numbers(&reference["standard_errors"])),
        ));
        worst.push((
            "deviance",
            relative_error(fit.deviance, reference["deviance"].as_f64().unwrap()),
        ));
        worst.push((
            "null deviance",
            relative_error(
                fit.null_deviance.expect("null deviance"),
                reference["null_deviance"].as_f64().unwrap(),
            ),
        ));
        worst.push((
            "log-likelihood",
            relative_error(
                fit.log_likelihood,
                reference["log_likelihood"].as_f64().unwrap(),
            ),
        ));
        worst.push((
            "dispersion",
            relative_error(fit.dispersion, reference["dispersion"].as_f64().unwrap()),
        ));
        worst.push((
            "pearson",
            relative_error(
                fit.pearson_chi_square,
                reference["pearson_chi_square"].as_f64().unwrap(),
            ),
        ));
        assert_eq!(
            fit.residual_df as i64,
            reference["residual_df"].as_i64().unwrap(),
            "{name}: residual df"
        );
        if let Some(theta) = reference.get("theta") {
            let estimate = fit.theta.as_ref().expect("theta");
            worst.push((
                "theta",
                relative_error(estimate.theta, theta.as_f64().unwrap()),
            ));
            // The SE is compared with sqrt(1 / observed information) evaluated by hand in R at
            // the final (theta, mu) ("theta_se"); glm.nb's own SE.theta uses the information one
            // Newton step earlier and agrees only to about 1e-5.
            worst.push((
                "theta SE",
                relative_error(
                    estimate.standard_error.expect("se"),
                    reference["theta_se"].as_f64().unwrap(),
                ),
            ));
        }
        for (what, error) in &worst {
            println!("{name:24} {what:16} max relative error {error:.2e}");
            assert!(
                *error <= tolerance,
                "{name}: {what} relative error {error:e} > {tolerance:e}"
            );
        }
    }
}

/// HC0 sandwich covariance against the by-hand computation in make_reference.R
/// ((X'WX)^-1 X' diag(score_i^2) X (X'WX)^-1, no package): SEs to 1e-8 relative, and every
/// entry to 1e-8 on the correlation scale, |ΔCᵃᵇ| / √(Cᵃᵃ Cᵇᵇ) (an entry near zero has no
/// meaningful relative error of its own).
#[test]
fn sandwich_covariance_matches_hand_computation_in_r() {
    let tolerance = 1e-8;
    for name in MAXIMUM_LIKELIHOOD_CASES {
        let case = load(name);
        let mut options = options_for(&case.reference);
        options.covariance = CovarianceKind::SandwichHc0;
        let fit = fit_glm(&data_of(&case), &options).expect("fit");
        let expected = matrix(&case.reference["hc0_covariance"]);
        let mut worst: f64 = 0.0;
        for (a, row) in expected.iter().enumerate() {
            for (b, value) in row.iter().enumerate() {
                let scale = (expected[a][a] * expected[b][b]).sqrt();
                worst = worst.max((fit.covariance[(a, b)] - value).abs() / scale);
            }
        }
        let expected_se = numbers(&case.reference["hc0_standard_errors"]);
        for (j, se) in expected_se.iter().enumerate() {
            worst = worst.max(relative_error(fit.standard_errors[j].expect("se"), *se));
        }
        println!("{name:24} HC0 covariance   max relative error {worst:.2e}");
        assert!(worst <= tolerance, "{name}: HC0 relative error {worst:e}");
    }
}

/// Profile-likelihood limits: against the exact roots of MASS's profile statistic found in R by
/// uniroot (tol 1e-13, refits by glm.fit) at 1e-6 relative. MASS::confint itself interpolates a
/// spline through a coarse grid of the same statistic, and its limits differ from the exact
/// roots by up to a few 1e-4 relative; the check against it is that our limits are no further
/// from MASS::confint than R's own exact roots are (plus 1e-6 relative), and within 1e-3.
#[test]
fn profile_intervals_match_mass() {
    for name in MAXIMUM_LIKELIHOOD_CASES {
        let case = load(name);
        let reference = &case.reference;
        let Some(columns) = reference.get("profile_columns") else {
            continue;
        };
        let options = options_for(reference);
        let data = data_of(&case);
        let fit = fit_glm(&data, &options).expect("fit");
        let critical = reference["profile_critical_value"].as_f64().unwrap();
        let exact = matrix(&reference["profile_exact_uniroot"]);
        let mass = matrix(&reference["profile_mass_confint"]);
        let mut worst_exact: f64 = 0.0;
        let mut worst_mass: f64 = 0.0;
        let mut worst_excess: f64 = 0.0;
        for (k, column) in columns.as_array().unwrap().iter().enumerate() {
            let column = column.as_u64().unwrap() as usize;
            let interval =
                profile_interval(&data, &options, &fit, column, critical).expect("profile");
            worst_exact = worst_exact
                .max(relative_error(interval.lower, exact[k][0]))
                .max(relative_error(interval.upper, exact[k][1]));
            for (ours, side) in [(interval.lower, 0), (interval.upper, 1)] {
                let ours_vs_mass = relative_error(ours, mass[k][side]);
                let r_exact_vs_mass = relative_error(exact[k][side], mass[k][side]);
                worst_mass = worst_mass.max(ours_vs_mass);
                worst_excess = worst_excess.max(ours_vs_mass - r_exact_vs_mass);
            }
        }
        println!(
            "{name:24} profile limits   vs exact root {worst_exact:.2e}, vs MASS confint {worst_mass:.2e} \
             (excess over R's exact root vs MASS {worst_excess:.2e})"
        );
        assert!(
            worst_exact <= 1e-6,
            "{name}: profile vs exact root {worst_exact:e}"
        );
        assert!(
            worst_excess <= 1e-6,
            "{name}: profile vs MASS confint beyond its interpolation error"
        );
        assert!(
            worst_mass <= 1e-3,
            "{name}: profile vs MASS confint {worst_mass:e}"
        );
    }
}

/// Firth's penalised likelihood against brglm2 0.9 brglmFit(type = "AS_mean") (equal to Firth's
/// method for the logit link): estimates, SEs (inverse Fisher information at the estimate) and
/// the penalised log-likelihood l + ½ log det I computed in R from brglm2's estimate: 1e-6
/// relative. Data: endometrial (Heinze & Schemper 2002, shipped with brglm2; NV separates) and
/// MASS::birthwt, and the constructed two-arm data with no events in one arm (defined in
/// make_reference.R and glm_failure_modes.rs).
#[test]
fn firth_matches_brglm2() {
    let tolerance = 1e-6;
    for name in ["endometrial_firth", "birthwt_firth", "arm_no_events_firth"] {
        let case = load(name);
        let reference = &case.reference;
        let mut options = GlmOptions::new(Family::Binomial, Link::Logit);
        options.method = Method::Firth;
        let fit = fit_glm(&data_of(&case), &options).expect("fit");
        assert!(
            matches!(fit.stop_reason, StopReason::Converged { .. }),
            "{name}: {:?}",
            fit.stop_reason
        );
        let coefficients = coefficients_of(&fit);
        let mut worst: f64 = 0.0;
        for (a, e) in coefficients.iter().zip(numbers(&reference["coefficients"])) {
            worst = worst.max(relative_error(*a, e));
        }
        let mut worst_se: f64 = 0.0;
        for (j, e) in numbers(&reference["standard_errors_brglm2"])
            .iter()
            .enumerate()
        {
            worst_se = worst_se.max(relative_error(fit.standard_errors[j].unwrap(), *e));
        }
        let penalised = relative_error(
            fit.penalised_log_likelihood.expect("penalised"),
            reference["penalised_log_likelihood"].as_f64().unwrap(),
        );
        let log_likelihood = relative_error(
            fit.log_likelihood,
            reference["log_likelihood"].as_f64().unwrap(),
        );
        println!(
            "{name:24} Firth coefficients {worst:.2e}, SEs {worst_se:.2e}, penalised logLik {penalised:.2e}, logLik {log_likelihood:.2e}"
        );
        assert!(
            worst <= tolerance
                && worst_se <= tolerance
                && penalised <= tolerance
                && log_likelihood <= tolerance
        );
    }
}

/// The endometrial data are quasi-completely separated by NV (column 1): Heinze & Schemper
/// (2002) report that the ML estimate for NV does not exist. The ML fit must say so.
#[test]
fn endometrial_maximum_likelihood_reports_separation_on_nv() {
    let case = load("endometrial_firth");
    let fit = fit_glm(
        &data_of(&case),
        &GlmOptions::new(Family::Binomial, Link::Logit),
    )
    .expect("fit");
    assert_eq!(fit.stop_reason, StopReason::Separation { columns: vec![1] });
}

/// Cross-check against statsmodels 0.15.0 (make_reference.py; versions in each JSON's
/// "source") on one dataset per family: GLM IRLS for binomial, Poisson with offset and Gamma
/// (scale = Pearson χ²/df), and statsmodels' discrete NB2 model (joint ML of β and α = 1/θ) for
/// the negative binomial: 1e-6 relative, the same bound as against R.
#[test]
fn fits_match_statsmodels() {
    let tolerance = 1e-6;
    for name in [
        "birthwt_logit",
        "insurance_poisson",
        "quine_nb",
        "clotting_both_inverse",
    ] {
        let case = load(name);
        let options = options_for(&case.reference);
        let fit = fit_glm(&data_of(&case), &options).expect("fit");
        let path = reference_dir().join(format!("statsmodels_{name}.json"));
        let expected: Value =
            serde_json::from_str(&std::fs::read_to_string(path).expect("json")).expect("valid");
        let mut worst: f64 = 0.0;
        for (a, e) in coefficients_of(&fit)
            .iter()
            .zip(numbers(&expected["coefficients"]))
        {
            worst = worst.max(relative_error(*a, e));
        }
        if let Some(se) = expected.get("standard_errors") {
            for (j, e) in numbers(se).iter().enumerate() {
                worst = worst.max(relative_error(fit.standard_errors[j].unwrap(), *e));
            }
        }
        let scalars = [
            ("deviance", fit.deviance),
            ("pearson_chi_square", fit.pearson_chi_square),
            ("dispersion", fit.dispersion),
            ("log_likelihood", fit.log_likelihood),
            ("theta", fit.theta.as_ref().map_or(f64::NAN, |t| t.theta)),
        ];
        let mut compared = 0;
        for (key, actual) in scalars {
            if let Some(value) = expected.get(key) {
                worst = worst.max(relative_error(actual, value.as_f64().unwrap()));
                compared += 1;
            }
        }
        assert!(compared >= 2, "{name}: too few scalar references");
        println!("{name:24} vs statsmodels    max relative error {worst:.2e}");
        assert!(
            worst <= tolerance,
            "{name}: statsmodels relative error {worst:e}"
        );
    }
}

/// The negative binomial with θ fixed by the caller at the ML value reproduces the same
/// estimates, SEs, deviance and log-likelihood as the estimated-θ fit in R (MASS::glm.nb,
/// polished; see make_reference.R) to 1e-6 relative, and reports no SE for θ.
#[test]
fn negative_binomial_with_fixed_theta_matches_r() {
    for name in ["quine_nb", "warpbreaks_nb"] {
        let case = load(name);
        let theta = case.reference["theta"].as_f64().unwrap();
        let mut options = options_for(&case.reference);
        options.family = Family::NegativeBinomial { theta: Some(theta) };
        let fit = fit_glm(&data_of(&case), &options).expect("fit");
        assert!(matches!(fit.stop_reason, StopReason::Converged { .. }));
        assert_eq!(fit.theta.as_ref().map(|t| t.standard_error), Some(None));
        let mut worst: f64 = 0.0;
        for (a, e) in coefficients_of(&fit)
            .iter()
            .zip(numbers(&case.reference["coefficients"]))
        {
            worst = worst.max(relative_error(*a, e));
        }
        for (j, e) in numbers(&case.reference["standard_errors"])
            .iter()
            .enumerate()
        {
            worst = worst.max(relative_error(fit.standard_errors[j].unwrap(), *e));
        }
        worst = worst
            .max(relative_error(
                fit.deviance,
                case.reference["deviance"].as_f64().unwrap(),
            ))
            .max(relative_error(
                fit.log_likelihood,
                case.reference["log_likelihood"].as_f64().unwrap(),
            ));
        println!("{name:24} fixed theta       max relative error {worst:.2e}");
        assert!(
            worst <= 1e-6,
            "{name}: fixed-theta relative error {worst:e}"
        );
    }
}
