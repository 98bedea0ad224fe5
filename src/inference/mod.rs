//! Inference: from a fitted model to the numbers a plan asks for.
//!
//! For each model family a module here fits the planned model through the
//! pure engines in `models`, applies the plan's pre-specified fallbacks, and
//! returns one [`AnalysisInference`]: the fit in summary, the coefficient
//! table, the overall tests of treatment, every planned contrast Lβ with its
//! SE from the covariance (on the model's natural scale and, for log and logit
//! links, exponentiated), model-based arm means where they are defined, the
//! assumption checks, and findings (fallbacks used, separation,
//! non-convergence) for the deviation list. Anything that cannot be estimated
//! comes back as a reason in words, never as NaN.
//!
//! Pure: no I/O. Distribution functions live in `distributions`.

pub mod cmh;
pub mod distributions;
pub mod glm;
pub mod linear;
pub mod marginal;
pub mod nominal;
pub mod ordinal;

use crate::design::Design;
use nalgebra::DMatrix;

/// A point estimate with its standard error, test and interval.
#[derive(Debug, Clone, PartialEq)]
pub struct Estimate {
    pub value: f64,
    pub standard_error: f64,
    pub statistic: f64,
    /// Degrees of freedom of the reference t distribution; `None` for a normal reference.
    pub df: Option<f64>,
    pub p_value: f64,
    pub lower: f64,
    pub upper: f64,
}

/// An exponentiated estimate (odds ratio, rate ratio) with its interval.
#[derive(Debug, Clone, PartialEq)]
pub struct RatioEstimate {
    pub estimate: f64,
    pub lower: f64,
    pub upper: f64,
}

/// One row of a coefficient table.
#[derive(Debug, Clone, PartialEq)]
pub struct CoefficientRow {
    pub name: String,
    pub term: String,
    /// The outcome category the row belongs to (baseline-category logit), if any.
    pub category: Option<String>,
    /// `None` when the column is aliased with earlier columns.
    pub estimate: Option<Estimate>,
}

/// A joint test of several coefficients (the overall treatment effect).
#[derive(Debug, Clone, PartialEq)]
pub struct JointTest {
    /// "F", "Wald chi-square" or "likelihood ratio".
    pub statistic_name: &'static str,
    pub statistic: f64,
    pub df1: f64,
    pub df2: Option<f64>,
    pub p_value: f64,
}

/// A planned contrast: its estimate or the reason it could not be estimated.
#[derive(Debug, Clone, PartialEq)]
pub struct ContrastResult {
    pub id: String,
    pub arm: usize,
    pub versus: usize,
    /// The outcome category compared with the reference category (baseline-category logit).
    pub category: Option<String>,
    pub estimate: Result<Estimate, String>,
    /// exp of the estimate and its limits, for log and logit links.
    pub ratio: Option<RatioEstimate>,
    /// "Wald" or "profile likelihood".
    pub interval_method: &'static str,
    /// When a planned contrast has one row per outcome category or cut-point:
    /// the joint Wald test of all its rows (used for the contrast's hypothesis).
    pub joint: Option<JointTest>,
}

/// Standardised treatment effects: each arm's mean prediction over all
/// analysed subjects as if all had received it, and contrasts of those means.
#[derive(Debug, Clone, PartialEq)]
pub struct MarginalSummary {
    /// Which variance estimator was used, in words.
    pub variance: String,
    /// Per arm: (arm, standardised mean, its standard error).
    pub means: Vec<(usize, f64, f64)>,
    pub effects: Vec<MarginalContrast>,
}

/// One standardised contrast.
#[derive(Debug, Clone, PartialEq)]
pub struct MarginalContrast {
    pub id: String,
    pub arm: usize,
    pub versus: usize,
    /// "risk difference", "risk ratio", "odds ratio", "mean difference", "ratio of means".
    pub scale: &'static str,
    pub estimate: f64,
    /// Of the estimate for differences, of its logarithm for ratios.
    pub standard_error: f64,
    pub lower: f64,
    pub upper: f64,
    pub p_value: f64,
}

/// The model-based mean of one arm.
#[derive(Debug, Clone, PartialEq)]
pub struct ArmMean {
    pub arm: usize,
    pub estimate: Result<Estimate, String>,
}

/// How the fit went, family-agnostic; fields that do not apply are `None`.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct FitStatistics {
    pub n_analysed: usize,
    pub n_parameters: usize,
    pub rank: usize,
    /// "converged", "iteration limit", "separation", … in words.
    pub stop_reason: String,
    pub converged: bool,
    pub iterations: Option<usize>,
    pub refinement_steps: Option<usize>,
    pub residual_df: Option<usize>,
    pub residual_sd: Option<f64>,
    pub r_squared: Option<f64>,
    pub adjusted_r_squared: Option<f64>,
    pub deviance: Option<f64>,
    pub null_deviance: Option<f64>,
    pub log_likelihood: Option<f64>,
    pub dispersion: Option<f64>,
    pub pearson_chi_square: Option<f64>,
    pub theta: Option<f64>,
    pub theta_standard_error: Option<f64>,
    pub aliased_columns: Vec<String>,
}

/// Something that happened in an analysis and belongs in the deviation list.
#[derive(Debug, Clone, PartialEq)]
pub struct Finding {
    pub code: &'static str,
    pub severity: &'static str,
    pub message: String,
}

/// One statistic of an assumption check.
#[derive(Debug, Clone, PartialEq)]
pub struct CheckRow {
    pub term: String,
    pub statistic_name: &'static str,
    pub statistic: f64,
    pub df: f64,
    pub p_value: f64,
}

/// An assumption check or supportive test, with a verdict in words.
#[derive(Debug, Clone, PartialEq)]
pub struct CheckOutcome {
    pub name: String,
    pub rows: Vec<CheckRow>,
    /// True when the check fails at the plan's check level.
    pub failed: bool,
    pub verdict: String,
    /// Extra lines to show with the check (e.g. odds ratios per cut-point).
    pub details: Vec<String>,
}

/// Everything inferred from one planned analysis.
#[derive(Debug, Clone, PartialEq)]
pub struct AnalysisInference {
    /// The model and method in words, for the methods text: a clause such as
    /// "A Poisson generalised linear model with log link was fitted by maximum likelihood".
    pub model_words: String,
    /// Further sentences about the model (parameterisation, standard errors).
    pub model_details: String,
    pub fit: FitStatistics,
    pub coefficients: Vec<CoefficientRow>,
    pub treatment_tests: Vec<JointTest>,
    /// Failure of the overall test, in words, when it could not be computed.
    pub treatment_test_failure: Option<String>,
    pub contrasts: Vec<ContrastResult>,
    /// The scale of contrast estimates ("difference", "log odds ratio", …).
    pub effect_scale: &'static str,
    /// The name of the exponentiated scale ("odds ratio", "rate ratio"), if any.
    pub ratio_name: Option<&'static str>,
    pub adjusted_means: Vec<ArmMean>,
    /// Standardised (marginal) treatment effects for nonlinear models, or why they are missing.
    pub marginal: Option<Result<MarginalSummary, String>>,
    pub checks: Vec<CheckOutcome>,
    pub findings: Vec<Finding>,
    /// The fallback that was used, in words, if one was triggered.
    pub fallback_used: Option<String>,
}

/// Quadratic form aᵀVb.
pub(crate) fn bilinear(a: &[f64], covariance: &DMatrix<f64>, b: &[f64]) -> f64 {
    let mut total = 0.0;
    for (i, &left) in a.iter().enumerate() {
        if left == 0.0 {
            continue;
        }
        for (j, &right) in b.iter().enumerate() {
            if right != 0.0 {
                total += left * covariance[(i, j)] * right;
            }
        }
    }
    total
}

/// A Wald estimate with a normal reference (GLMs with fixed dispersion,
/// ordinal and nominal models) or a t reference with `df`.
pub(crate) fn wald_estimate(
    value: f64,
    standard_error: f64,
    df: Option<f64>,
    confidence_level: f64,
) -> Result<Estimate, String> {
    use distributions::{normal_quantile, normal_two_sided_p, t_quantile, t_two_sided_p};
    if !(standard_error > 0.0 && standard_error.is_finite() && value.is_finite()) {
        return Err("its standard error is zero or undefined".to_string());
    }
    let statistic = value / standard_error;
    let (critical, p_value) = match df {
        Some(df) => (
            t_quantile(0.5 + confidence_level / 2.0, df),
            t_two_sided_p(statistic, df),
        ),
        None => (
            normal_quantile(0.5 + confidence_level / 2.0),
            normal_two_sided_p(statistic),
        ),
    };
    let (Some(critical), Some(p_value)) = (critical, p_value) else {
        return Err("its p-value or interval could not be computed".to_string());
    };
    Ok(Estimate {
        value,
        standard_error,
        statistic,
        df,
        p_value,
        lower: value - critical * standard_error,
        upper: value + critical * standard_error,
    })
}

/// exp of an estimate and its limits.
pub(crate) fn exponentiate(estimate: &Estimate) -> Option<RatioEstimate> {
    let ratio = RatioEstimate {
        estimate: libm::exp(estimate.value),
        lower: libm::exp(estimate.lower),
        upper: libm::exp(estimate.upper),
    };
    (ratio.estimate.is_finite() && ratio.lower.is_finite() && ratio.upper.is_finite())
        .then_some(ratio)
}

/// L for "arm minus versus" over `n_columns` coefficients: +1 on the arm's
/// indicator, −1 on the other's (the reference arm has no indicator).
/// `aliased` tells which columns were not estimated.
pub(crate) fn contrast_vector(
    design: &Design,
    aliased: &[bool],
    arm: usize,
    versus: usize,
) -> Result<Vec<f64>, String> {
    let mut weights = vec![0.0; design.column_names.len()];
    for (index, sign) in [(arm, 1.0), (versus, -1.0)] {
        if let Some(column) = design.treatment_columns[index] {
            if aliased[column] {
                return Err(format!(
                    "the indicator of \"{}\" is aliased with other terms",
                    design.column_names[column]
                ));
            }
            weights[column] += sign;
        }
    }
    Ok(weights)
}

/// The joint Wald χ² test that the coefficients in `columns` are all zero.
pub(crate) fn wald_chi_square(
    beta: &[f64],
    covariance: &DMatrix<f64>,
    columns: &[usize],
) -> Result<JointTest, String> {
    if columns.is_empty() {
        return Err("every treatment indicator is aliased".to_string());
    }
    let q = columns.len();
    let block = DMatrix::from_fn(q, q, |i, j| covariance[(columns[i], columns[j])]);
    let values = nalgebra::DVector::from_iterator(q, columns.iter().map(|&column| beta[column]));
    let cholesky = block
        .cholesky()
        .ok_or_else(|| "the covariance of the treatment coefficients is singular".to_string())?;
    let statistic = values.dot(&cholesky.solve(&values));
    let p_value = distributions::chi_square_upper_p(statistic, q as f64)
        .ok_or_else(|| "the chi-square p-value could not be computed".to_string())?;
    Ok(JointTest {
        statistic_name: "Wald chi-square",
        statistic,
        df1: q as f64,
        df2: None,
        p_value,
    })
}

/// The likelihood-ratio test from the log-likelihoods of the full and reduced models.
pub(crate) fn likelihood_ratio(full: f64, reduced: f64, df: usize) -> Result<JointTest, String> {
    let statistic = (2.0 * (full - reduced)).max(0.0);
    if !statistic.is_finite() || df == 0 {
        return Err("the likelihood-ratio statistic could not be computed".to_string());
    }
    let p_value = distributions::chi_square_upper_p(statistic, df as f64)
        .ok_or_else(|| "the chi-square p-value could not be computed".to_string())?;
    Ok(JointTest {
        statistic_name: "likelihood ratio",
        statistic,
        df1: df as f64,
        df2: None,
        p_value,
    })
}

/// A stop reason in words, for reports.
pub(crate) fn describe_stop(reason: &crate::models::StopReason, column_names: &[String]) -> String {
    use crate::models::StopReason;
    let names = |columns: &[usize]| {
        columns
            .iter()
            .map(|&column| {
                column_names
                    .get(column)
                    .cloned()
                    .unwrap_or_else(|| format!("column {column}"))
            })
            .collect::<Vec<_>>()
            .join(", ")
    };
    match reason {
        StopReason::Converged { iterations } => format!("converged after {iterations} iterations"),
        StopReason::IterationLimit { iterations } => {
            format!("did not converge within {iterations} iterations")
        }
        StopReason::Separation { columns } => format!(
            "complete or quasi-complete separation on {}",
            names(columns)
        ),
        StopReason::SingularDesign { columns } => {
            format!("singular design ({} aliased)", names(columns))
        }
        StopReason::EmptyCategory { category } => {
            format!("outcome category {} is empty", category + 1)
        }
        StopReason::NumericalFailure { detail } => format!("numerical failure: {detail}"),
    }
}

/// The design with treatment × stratum interaction columns appended (every
/// non-reference arm indicator times every non-reference stratum indicator).
/// Returns the extended matrix and the number of columns added.
pub(crate) fn with_interactions(design: &Design) -> (DMatrix<f64>, usize) {
    let treatment: Vec<usize> = design.treatment_columns.iter().flatten().copied().collect();
    let strata: Vec<usize> = design
        .terms
        .iter()
        .filter(|term| term.kind == crate::design::TermKind::Stratum)
        .flat_map(|term| term.first_column..term.first_column + term.column_count)
        .collect();
    let n = design.n_rows();
    let dense = design.matrix.dense();
    let base = dense.ncols();
    let added = treatment.len() * strata.len();
    let mut extended = dense
        .as_ref()
        .clone()
        .resize_horizontally(base + added, 0.0);
    let mut next = base;
    for &arm_column in &treatment {
        for &stratum_column in &strata {
            for row in 0..n {
                extended[(row, next)] = dense[(row, arm_column)] * dense[(row, stratum_column)];
            }
            next += 1;
        }
    }
    (extended, added)
}

/// The verdict of the treatment-by-stratum check.
pub(crate) fn heterogeneity_outcome(
    name: String,
    outcome: Result<JointTest, String>,
    level: f64,
) -> CheckOutcome {
    match outcome {
        Ok(test) => {
            let failed = test.p_value < level;
            let verdict = if failed {
                format!(
                    "the treatment effect appears to differ between strata (p = {:.4} < {level}); the planned model is still the primary result",
                    test.p_value
                )
            } else {
                format!(
                    "no evidence that the treatment effect differs between strata at level {level} (p = {:.4})",
                    test.p_value
                )
            };
            CheckOutcome {
                name,
                rows: vec![CheckRow {
                    term: "treatment × stratum".to_string(),
                    statistic_name: test.statistic_name,
                    statistic: test.statistic,
                    df: test.df1,
                    p_value: test.p_value,
                }],
                failed,
                verdict,
                details: test
                    .df2
                    .map(|df2| vec![format!("denominator degrees of freedom {df2}")])
                    .unwrap_or_default(),
            }
        }
        Err(reason) => CheckOutcome {
            name,
            rows: Vec::new(),
            failed: false,
            verdict: format!("could not be computed: {reason}"),
            details: Vec::new(),
        },
    }
}

/// The joint Wald χ² test that every row of `weights` · θ is zero.
pub(crate) fn joint_wald(
    weights: &[Vec<f64>],
    parameters: &[f64],
    covariance: &DMatrix<f64>,
) -> Option<JointTest> {
    let q = weights.len();
    if q == 0 {
        return None;
    }
    let values = nalgebra::DVector::from_iterator(
        q,
        weights
            .iter()
            .map(|row| row.iter().zip(parameters).map(|(w, b)| w * b).sum::<f64>()),
    );
    let middle = DMatrix::from_fn(q, q, |i, j| bilinear(&weights[i], covariance, &weights[j]));
    let statistic = values.dot(&middle.cholesky()?.solve(&values));
    let p_value = distributions::chi_square_upper_p(statistic, q as f64)?;
    Some(JointTest {
        statistic_name: "Wald chi-square",
        statistic,
        df1: q as f64,
        df2: None,
        p_value,
    })
}
