//! Marginal (standardised) treatment effects for nonlinear models: the mean response each arm
//! would have if every analysed subject had been assigned to it, estimated by averaging the
//! fitted model's predictions (G-computation, as the 2023 US FDA guidance on covariate
//! adjustment in randomised trials describes), the covariance of those arm means, and contrasts
//! between arms (difference, ratio, odds ratio) with Wald intervals. This module owns only that
//! arithmetic: it does not fit the model (the caller passes coefficients and their covariance
//! from a GLM fit), reads no file and formats nothing, and it never returns NaN — every failure
//! is a [`MarginalError`].
//!
//! # Estimand and estimator
//!
//! Subjects i = 1…n are the analysed subjects, one row each, in arms A_i ∈ {0, …, K−1}. The
//! planned model has linear predictor η_i = x_iᵀβ + o_i (o_i the offset, zero when absent) and
//! inverse link h = g⁻¹. Arm k ≠ reference owns a 0/1 indicator column c_k of the design; the
//! reference arm owns none. x_i(a) is row i with every indicator column set to zero and, when
//! arm a has one, column c_a set to one. With the fitted β̂:
//!
//! ```text
//! m_ia = h(x_i(a)ᵀβ̂ + o_i)              prediction for subject i as if assigned arm a
//! μ̂_a  = (1/n) Σ_i m_ia                 standardised mean of arm a
//! ```
//!
//! For a binary endpoint μ̂_a is a risk. For a count with an exposure offset o_i = log(t_i),
//! m_ia is subject i's expected count over the subject's own exposure t_i, so μ̂_a is the mean
//! expected count per subject over the exposures actually observed (not a rate per unit of
//! exposure). With a log link and no treatment-by-covariate terms the ratio μ̂_a / μ̂_b then
//! equals exp(β̂_{c_a} − β̂_{c_b}) exactly, while the difference depends on the exposures.
//!
//! # Variances of (μ̂_0, …, μ̂_{K−1})
//!
//! Four estimators, chosen by [`MarginalVariance`]; all return the K×K matrix V̂ of the arm
//! means (already divided by n). Let D be the K×p Jacobian of the arm means in β,
//! D_aj = (1/n) Σ_i h′(x_i(a)ᵀβ̂ + o_i) x_ij(a), Σ̂_β the caller's covariance of β̂, n_a the
//! number of subjects in arm a and π̂_a = n_a / n.
//!
//! - [`MarginalVariance::ConditionalDelta`] — the delta method conditional on the covariates
//!   (Ge, Durham, Meyer, Xie & Thomas 2011): V̂ = D Σ̂_β Dᵀ. It treats x_1…x_n as fixed and so
//!   ignores that they were sampled; it estimates the variance of a conditional quantity.
//! - [`MarginalVariance::DeltaWithCovariateSampling`] — the influence function of μ̂_a is
//!   (m_a(X) − μ_a) + D_a I⁻¹ s(β) with s the score; when the model is correct the two terms are
//!   uncorrelated, so V̂ = D Σ̂_β Dᵀ + (1/n²) Σ_i (m_ia − μ̂_a)(m_ib − μ̂_b): the conditional term
//!   plus the variability of the predictions across subjects. Valid under a correct model.
//! - [`MarginalVariance::Robust`] — the model-robust estimator of Ye, Shao, Yi & Zhao (2023)
//!   for working models with prediction unbiasedness under simple randomisation, built from
//!   residuals per arm and needing no Σ̂_β:
//!
//! ```text
//! V̂_ab = (1/n) [ 1{a = b} s²_a / π̂_a + c_a(Y, m_b) + c_b(m_a, Y) − c(m_a, m_b) ]
//! s²_a        = (1/n_a) Σ_{A_i = a} (r_ia − r̄_a)²,   r_ia = y_i − m_ia
//! c_a(Y, m_b) = (1/n_a) Σ_{A_i = a} (y_i − ȳ_a)(m_ib − m̄_b^{(a)})   (m̄_b^{(a)}: mean of m_ib in arm a)
//! c(m_a, m_b) = (1/n)   Σ_i (m_ia − μ̂_a)(m_ib − μ̂_b)
//! ```
//!
//!   It rests on Σ_{A_i = a} r_ia = 0 for every arm (prediction unbiasedness), which maximum
//!   likelihood with a canonical link (binomial logit, Poisson log) and an intercept plus arm
//!   indicators guarantees; the estimator checks it and refuses otherwise. It assumes simple
//!   randomisation (covariates independent of the arm): it is the variance of the influence
//!   function 1{A = a}(Y − m_a(X))/π_a + m_a(X) − μ_a, whose form needs that independence. On
//!   data where it fails the estimate is biased (MASS::birthwt with race as the arm: 7–9% below
//!   a bootstrap) or not even positive definite (reported as an error); use
//!   `InfluenceFunction` there. Divisors are n_a and n (not n_a − 1), so that with treatment
//!   indicators alone V̂_aa = p̂_a(1 − p̂_a)/n_a, the usual binomial variance, and V̂_ab = 0 for
//!   a ≠ b.
//!
//! - [`MarginalVariance::InfluenceFunction`] — the sandwich (M-estimation) estimator for the
//!   joint estimator (β̂, μ̂) (Stefanski & Boos 2002; Tsiatis 2006, ch. 3), of which `Robust` is
//!   the simple-randomisation form. With the per-row score and working weight at the row's own
//!   arm,
//!
//! ```text
//! s_i  = x_i (y_i − μ̂_i) h′(η̂_i) / V(μ̂_i)         V the family's variance function
//! B̂    = (1/n) Σ_i x_i x_iᵀ h′(η̂_i)² / V(μ̂_i)      expected information per subject
//! ψ_ia = (m_ia − μ̂_a) + D_a B̂⁻¹ s_i
//! V̂_ab = (1/n²) Σ_i ψ_ia ψ_ib
//! ```
//!
//!   The first part of ψ is the variability of the predictions across subjects, the second the
//!   estimation of β; their cross term is kept, so no correct model is assumed (the dispersion
//!   cancels). It needs neither randomisation nor a canonical link, is positive semi-definite
//!   by construction, and with a canonical link under simple randomisation it is asymptotically
//!   equal to `Robust`. With treatment indicators only it also reduces to p̂_a(1 − p̂_a)/n_a.
//!   Requirements: a full-rank design (no aliased columns); a negative binomial needs θ fixed.
//!
//! # Contrasts (delta method on V̂)
//!
//! For arm a versus arm b, with V̂ restricted to {a, b}:
//!
//! ```text
//! difference  d = μ̂_a − μ̂_b                        Var = V̂_aa + V̂_bb − 2 V̂_ab
//! ratio       log r = log μ̂_a − log μ̂_b            Var = V̂_aa/μ̂_a² + V̂_bb/μ̂_b² − 2 V̂_ab/(μ̂_a μ̂_b)
//! odds ratio  log ψ = logit μ̂_a − logit μ̂_b        Var = V̂_aa/v_a² + V̂_bb/v_b² − 2 V̂_ab/(v_a v_b),
//!                                                    v = μ̂(1 − μ̂)
//! ```
//!
//! The interval is estimate ± z·SE for the difference and exp(log estimate ± z·SE) for the
//! ratios, z the caller's critical value; the statistic is d/SE or log(estimate)/SE and the
//! p-value two-sided from the standard normal distribution.
//!
//! Requirements: one row per subject; finite design, response, offset, coefficients and (for the
//! delta-method variances) covariance; every arm non-empty; the design's indicator columns coded
//! 0/1 consistently with `arm_of_row`; aliased coefficients passed as 0 (their covariance rows
//! zero).
//!
//! References: US FDA (2023), *Adjusting for Covariates in Randomized Clinical Trials for Drugs
//! and Biological Products*, guidance for industry; Ge, Durham, Meyer, Xie & Thomas (2011), Drug
//! Information Journal 45:481–493; Ye, Shao, Yi & Zhao (2023), Journal of the American
//! Statistical Association 118:2370–2382, doi:10.1080/01621459.2022.2049278; Stefanski & Boos
//! (2002), The American Statistician 56:29–38 (the calculus of M-estimation); Tsiatis (2006),
//! *Semiparametric Theory and Missing Data*, ch. 3 (influence functions of M-estimators).

use crate::models::DesignInput;
#[allow(unused_imports)]
use crate::models::portable::Portable;
use libm::erfc;
use nalgebra::DMatrix;

use crate::models::glm::{Family, Link};

/// Relative size of a per-arm mean residual, against 1 + the arm's mean |y|, above which the
/// robust variance is refused because prediction unbiasedness does not hold.
const PREDICTION_UNBIASEDNESS_TOLERANCE: f64 = 1e-6;

/// Smallest squared Cholesky pivot of a matrix on its correlation scale (1 − R² of a row on the
/// earlier ones) for the matrix to count as positive definite; smaller pivots are rounding of an
/// exactly singular matrix (duplicated columns, perfectly correlated arm means).
const PIVOT_TOLERANCE: f64 = 1e-12;

/// The Cholesky factor of the correlation form S A S (S = diag(A)^{-1/2}) of a symmetric
/// matrix, with S, or `None` when the matrix is not finite or not positive definite by
/// [`PIVOT_TOLERANCE`]. Judging the correlation form keeps the test free of the scale of the
/// quantities.
fn scaled_cholesky(
    matrix: &DMatrix<f64>,
) -> Option<(nalgebra::Cholesky<f64, nalgebra::Dyn>, Vec<f64>)> {
    let size = matrix.nrows();
    if matrix.ncols() != size || matrix.iter().any(|value| !value.is_finite()) {
        return None;
    }
    let mut scale = Vec::with_capacity(size);
    for k in 0..size {
        let diagonal = matrix[(k, k)];
        if diagonal <= 0.0 {
            return None;
        }
        scale.push(1.0 / diagonal.sqrt());
    }
    let scaled = DMatrix::from_fn(size, size, |row, column| {
        matrix[(row, column)] * scale[row] * scale[column]
    });
    let factor = nalgebra::Cholesky::new(scaled)?;
    let lower = factor.l();
    if (0..size).any(|k| lower[(k, k)] * lower[(k, k)] < PIVOT_TOLERANCE) {
        return None;
    }
    Some((factor, scale))
}

/// Which variance of the arm means to compute; see the module documentation for the formulas.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum MarginalVariance {
    /// D Σ̂_β Dᵀ: delta method conditional on the covariates (Ge et al. 2011).
    ConditionalDelta,
    /// D Σ̂_β Dᵀ plus the across-subject covariance of the predictions (correct model).
    DeltaWithCovariateSampling,
    /// Ye et al. (2023) model-robust estimator from residuals per arm.
    Robust,
    /// (1/n²) Σ_i ψ_i ψ_iᵀ from the influence function of the M-estimator (β̂, μ̂); needs no
    /// randomisation and no canonical link.
    InfluenceFunction,
}

/// Everything [`marginal_means`] needs: the analysed data and a fitted GLM.
#[derive(Debug, Clone, Copy)]
pub struct MarginalInput<'a> {
    /// n×p design matrix of the fitted model (treatment indicators and covariates), dense or
    /// as rows of non-zero entries (the results are the same either way).
    pub design: DesignInput<'a>,
    /// Observed response per row (0/1 for binary, counts for counts); used by `Robust` only.
    pub response: &'a [f64],
    /// Offset per row (e.g. log exposure); zero when absent.
    pub offset: Option<&'a [f64]>,
    /// For each arm, its indicator column in the design, or `None` for the (single) reference
    /// arm that has no column. Its length is the number of arms K.
    pub treatment_columns: &'a [Option<usize>],
    /// Arm index (0…K−1) of each row.
    pub arm_of_row: &'a [usize],
    /// β̂, one per design column (aliased ones as 0).
    pub coefficients: &'a [f64],
    /// p×p covariance of β̂; needed by the two delta-method variances, ignored by `Robust`.
    pub coefficient_covariance: Option<&'a DMatrix<f64>>,
    /// The model's family; only `InfluenceFunction` uses it (for the variance function), and
    /// for the negative binomial it needs θ fixed (`theta: Some(θ̂)`).
    pub family: Family,
    /// The model's link.
    pub link: Link,
    pub variance: MarginalVariance,
}

/// One arm's standardised mean.
#[derive(Debug, Clone, PartialEq)]
pub struct ArmMarginalMean {
    pub arm: usize,
    pub n_subjects: usize,
    pub mean: f64,
    pub standard_error: f64,
}

/// The standardised means of all arms with their K×K covariance.
#[derive(Debug, Clone, PartialEq)]
pub struct MarginalMeans {
    pub arms: Vec<ArmMarginalMean>,
    pub covariance: DMatrix<f64>,
    pub variance: MarginalVariance,
}

/// The scale of a contrast between two arm means.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum EffectScale {
    /// μ̂_a − μ̂_b (risk difference, mean-count difference).
    Difference,
    /// μ̂_a / μ̂_b (risk ratio, mean-count ratio); inference on the log scale.
    Ratio,
    /// Odds ratio of the averaged probabilities; inference on the log scale.
    OddsRatio,
}

/// One contrast of arm `arm` versus arm `versus` on one scale.
#[derive(Debug, Clone, PartialEq)]
pub struct MarginalEffect {
    pub arm: usize,
    pub versus: usize,
    pub scale: EffectScale,
    /// The difference, ratio or odds ratio itself (not its logarithm).
    pub estimate: f64,
    /// Standard error of the estimate for `Difference`, of its natural logarithm otherwise.
    pub standard_error: f64,
    pub lower: f64,
    pub upper: f64,
    /// Wald statistic against no effect: estimate/SE, or ln(estimate)/SE for ratios.
    pub statistic: f64,
    /// Two-sided p-value from the standard normal distribution.
    pub p_value: f64,
}

/// Why marginal means or effects could not be computed.
#[derive(Debug, Clone, PartialEq)]
pub enum MarginalError {
    /// No rows, no columns, or fewer than two arms.
    EmptyData,
    DimensionMismatch {
        what: &'static str,
        expected: usize,
        found: usize,
    },
    NonFiniteInput {
        what: &'static str,
        row: usize,
        column: usize,
    },
    /// The treatment columns are invalid (out of range, repeated, more than one reference arm).
    InvalidTreatmentColumns { detail: String },
    /// A row names an arm that does not exist.
    ArmOutOfRange {
        row: usize,
        arm: usize,
        n_arms: usize,
    },
    /// An arm has no subjects.
    EmptyArm { arm: usize },
    /// A row's indicator column is not the 0/1 code its arm implies.
    TreatmentCodingMismatch {
        row: usize,
        column: usize,
        expected: f64,
        found: f64,
    },
    /// A delta-method variance was asked for without the coefficients' covariance.
    MissingCoefficientCovariance,
    /// A prediction or an arm mean is not finite (e.g. overflow of the inverse link).
    NonFiniteMean { arm: usize, row: usize },
    /// The robust variance needs residuals that average to zero in every arm.
    PredictionNotUnbiased { arm: usize, mean_residual: f64 },
    /// The covariance of the arm means is not positive definite (or not finite).
    CovarianceNotPositiveDefinite { variance: MarginalVariance },
    /// A ratio or odds ratio needs the arm mean in its domain (> 0, and < 1 for odds).
    MeanOutsideDomain {
        arm: usize,
        mean: f64,
        scale: EffectScale,
    },
    /// A contrast names a missing arm or compares an arm with itself.
    InvalidContrast { arm: usize, versus: usize },
    /// A contrast's variance is not positive.
    NonPositiveContrastVariance {
        arm: usize,
        versus: usize,
        scale: EffectScale,
    },
    /// The critical value must be finite and positive.
    InvalidCriticalValue { value: f64 },
    /// The influence-function variance needs a variance function it can evaluate.
    UnsupportedFamily { family: Family },
    /// The influence-function variance needs an invertible information matrix (no aliased
    /// columns, no zero working weights everywhere).
    SingularInformation,
}

impl std::fmt::Display for MarginalError {
    fn fmt(&self, formatter: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            MarginalError::EmptyData => write!(
                formatter,
                "marginal means need at least one row, one column and two arms"
            ),
            MarginalError::DimensionMismatch {
                what,
                expected,
                found,
            } => write!(formatter, "{what} has length {found}, expected {expected}"),
            MarginalError::NonFiniteInput { what, row, column } => write!(
                formatter,
                "{what} is not finite at row {row}, column {column}"
            ),
            MarginalError::InvalidTreatmentColumns { detail } => {
                write!(formatter, "invalid treatment columns: {detail}")
            }
            MarginalError::ArmOutOfRange { row, arm, n_arms } => write!(
                formatter,
                "row {row} is in arm {arm}, expected an arm below {n_arms}"
            ),
            MarginalError::EmptyArm { arm } => write!(formatter, "arm {arm} has no subjects"),
            MarginalError::TreatmentCodingMismatch {
                row,
                column,
                expected,
                found,
            } => write!(
                formatter,
                "design column {column} at row {row} is {found}, expected {expected} for the row's arm"
            ),
            MarginalError::MissingCoefficientCovariance => write!(
                formatter,
                "the delta-method variance needs the covariance of the coefficients"
            ),
            MarginalError::NonFiniteMean { arm, row } => write!(
                formatter,
                "the prediction for row {row} under arm {arm} is not finite"
            ),
            MarginalError::PredictionNotUnbiased { arm, mean_residual } => write!(
                formatter,
                "residuals in arm {arm} average {mean_residual:e}, not zero: the robust variance \
                 needs a canonical link with an intercept and arm indicators"
            ),
            MarginalError::CovarianceNotPositiveDefinite { variance } => write!(
                formatter,
                "the {variance:?} covariance of the arm means is not positive definite"
            ),
            MarginalError::MeanOutsideDomain { arm, mean, scale } => write!(
                formatter,
                "the mean {mean} of arm {arm} is outside the domain of the {scale:?} scale"
            ),
            MarginalError::InvalidContrast { arm, versus } => {
                write!(formatter, "contrast {arm} versus {versus} is invalid")
            }
            MarginalError::NonPositiveContrastVariance { arm, versus, scale } => write!(
                formatter,
                "the {scale:?} contrast {arm} versus {versus} has a variance that is not positive"
            ),
            MarginalError::InvalidCriticalValue { value } => write!(
                formatter,
                "critical value {value} is invalid: expected a finite value > 0"
            ),
            MarginalError::UnsupportedFamily { family } => write!(
                formatter,
                "the influence-function variance cannot use family {family:?}: a negative \
                 binomial needs its theta fixed"
            ),
            MarginalError::SingularInformation => write!(
                formatter,
                "the information matrix is singular (aliased columns?): the influence-function \
                 variance needs a full-rank design"
            ),
        }
    }
}

impl std::error::Error for MarginalError {}

/// The inverse link h(η) and its derivative h′(η), without the clamps the fitting engine uses
/// (the predictions here are never fed back into an iteration; a non-finite result is caught by
/// the caller).
fn inverse_link(link: Link, eta: f64) -> (f64, f64) {
    match link {
        Link::Logit => {
            let mean = 1.0 / (1.0 + (-eta).pexp());
            // exp(−|η|)/(1 + exp(−|η|))² is the same derivative without overflow for large |η|.
            let e = (-eta.abs()).pexp();
            (mean, e / ((1.0 + e) * (1.0 + e)))
        }
        Link::Probit => (
            0.5 * erfc(-eta / std::f64::consts::SQRT_2),
            (-0.5 * eta * eta).pexp() / (2.0 * std::f64::consts::PI).sqrt(),
        ),
        Link::CLogLog => (-(-eta.pexp()).pexp_m1(), (eta - eta.pexp()).pexp()),
        Link::Log => {
            let mean = eta.pexp();
            (mean, mean)
        }
        Link::Inverse => (1.0 / eta, -1.0 / (eta * eta)),
        Link::Identity => (eta, 1.0),
    }
}

/// Checks the input and returns the number of arms and the subjects per arm.
fn validate(input: &MarginalInput) -> Result<(usize, Vec<usize>), MarginalError> {
    let design = input.design;
    let (n_rows, n_columns) = (design.nrows(), design.ncols());
    let n_arms = input.treatment_columns.len();
    if n_rows == 0 || n_columns == 0 || n_arms < 2 {
        return Err(MarginalError::EmptyData);
    }
    let lengths = [
        ("response", input.response.len()),
        ("arm_of_row", input.arm_of_row.len()),
        ("offset", input.offset.map_or(n_rows, <[f64]>::len)),
    ];
    for (what, found) in lengths {
        if found != n_rows {
            return Err(MarginalError::DimensionMismatch {
                what,
                expected: n_rows,
                found,
            });
        }
    }
    if input.coefficients.len() != n_columns {
        return Err(MarginalError::DimensionMismatch {
            what: "coefficients",
            expected: n_columns,
            found: input.coefficients.len(),
        });
    }
    let non_finite = design.first_non_finite(&(0..n_columns).collect::<Vec<_>>());
    if let Some((column, row)) = non_finite {
        return Err(MarginalError::NonFiniteInput {
            what: "design",
            row,
            column,
        });
    }
    let finite_slices = [
        ("response", Some(input.response)),
        ("offset", input.offset),
        ("coefficients", Some(input.coefficients)),
    ];
    for (what, values) in finite_slices {
        if let Some(row) = values.and_then(|v| v.iter().position(|x| !x.is_finite())) {
            return Err(MarginalError::NonFiniteInput {
                what,
                row,
                column: 0,
            });
        }
    }
    if matches!(
        input.variance,
        MarginalVariance::ConditionalDelta | MarginalVariance::DeltaWithCovariateSampling
    ) {
        let covariance = input
            .coefficient_covariance
            .ok_or(MarginalError::MissingCoefficientCovariance)?;
        if covariance.shape() != (n_columns, n_columns) {
            return Err(MarginalError::DimensionMismatch {
                what: "coefficient covariance",
                expected: n_columns,
                found: covariance.nrows().max(covariance.ncols()),
            });
        }
        for column in 0..n_columns {
            for row in 0..n_columns {
                if !covariance[(row, column)].is_finite() {
                    return Err(MarginalError::NonFiniteInput {
                        what: "coefficient covariance",
                        row,
                        column,
                    });
                }
            }
        }
    }
    let mut seen = vec![false; n_columns];
    let mut n_reference = 0;
    for (arm, column) in input.treatment_columns.iter().enumerate() {
        match *column {
            None => n_reference += 1,
            Some(column) if column >= n_columns => {
                return Err(MarginalError::InvalidTreatmentColumns {
                    detail: format!(
                        "arm {arm} names column {column}, but the design has {n_columns}"
                    ),
                });
            }
            Some(column) if seen[column] => {
                return Err(MarginalError::InvalidTreatmentColumns {
                    detail: format!("column {column} is named by more than one arm"),
                });
            }
            Some(column) => seen[column] = true,
        }
    }
    if n_reference > 1 {
        return Err(MarginalError::InvalidTreatmentColumns {
            detail: format!("{n_reference} arms have no column; at most one reference arm may"),
        });
    }
    let mut n_per_arm = vec![0usize; n_arms];
    for (row, &arm) in input.arm_of_row.iter().enumerate() {
        if arm >= n_arms {
            return Err(MarginalError::ArmOutOfRange { row, arm, n_arms });
        }
        n_per_arm[arm] += 1;
        // The design must say what arm_of_row says: a mismatch means the caller's coding and
        // the model disagree, and the standardisation would silently mix arms.
        for (other_arm, column) in input.treatment_columns.iter().enumerate() {
            if let Some(column) = *column {
                let expected = if other_arm == arm { 1.0 } else { 0.0 };
                let found = entry(design, row, column);
                if found != expected {
                    return Err(MarginalError::TreatmentCodingMismatch {
                        row,
                        column,
                        expected,
                        found,
                    });
                }
            }
        }
    }
    if let Some(arm) = n_per_arm.iter().position(|&count| count == 0) {
        return Err(MarginalError::EmptyArm { arm });
    }
    Ok((n_arms, n_per_arm))
}

/// Whether a symmetric matrix is positive definite (see [`scaled_cholesky`]).
fn is_positive_definite(matrix: &DMatrix<f64>) -> bool {
    scaled_cholesky(matrix).is_some()
}

/// Standardised means of every arm and their covariance (see the module documentation for the
/// estimator and the three variances). One pass over the rows per arm for the predictions; the
/// delta-method Jacobian takes one more pass over the design per arm.
pub fn marginal_means(input: &MarginalInput) -> Result<MarginalMeans, MarginalError> {
    let (n_arms, n_per_arm) = validate(input)?;
    let design = input.design;
    let (n_rows, n_columns) = (design.nrows(), design.ncols());
    let n = n_rows as f64;
    let is_treatment_column: Vec<bool> = (0..n_columns)
        .map(|column| input.treatment_columns.contains(&Some(column)))
        .collect();

    // The linear predictor without the treatment columns; each arm adds its own coefficient.
    let mut base_predictor: Vec<f64> = match input.offset {
        Some(offset) => offset.to_vec(),
        None => vec![0.0; n_rows],
    };
    match design {
        DesignInput::Dense(matrix) => {
            for column in (0..n_columns).filter(|&column| !is_treatment_column[column]) {
                let coefficient = input.coefficients[column];
                for (value, x) in base_predictor.iter_mut().zip(matrix.column(column).iter()) {
                    *value += x * coefficient;
                }
            }
        }
        // Each row's terms in the same column order, zero entries (which add ±0) skipped.
        DesignInput::Rows(rows) => {
            for (row, value) in base_predictor.iter_mut().enumerate() {
                let (columns, entries) = rows.entries(row);
                for (&column, &x) in columns.iter().zip(entries) {
                    let column = column as usize;
                    if !is_treatment_column[column] {
                        *value += x * input.coefficients[column];
                    }
                }
            }
        }
    }

    let needs_jacobian = input.variance != MarginalVariance::Robust;
    let mut predictions = DMatrix::<f64>::zeros(n_rows, n_arms);
    let mut jacobian = DMatrix::<f64>::zeros(n_arms, n_columns);
    let mut derivatives = vec![0.0; n_rows];
    let mut means = vec![0.0; n_arms];
    for arm in 0..n_arms {
        let shift = input.treatment_columns[arm].map_or(0.0, |column| input.coefficients[column]);
        let mut sum = 0.0;
        let mut derivative_sum = 0.0;
        for row in 0..n_rows {
            let (mean, derivative) = inverse_link(input.link, base_predictor[row] + shift);
            if !(mean.is_finite() && derivative.is_finite()) {
                return Err(MarginalError::NonFiniteMean { arm, row });
            }
            predictions[(row, arm)] = mean;
            derivatives[row] = derivative;
            sum += mean;
            derivative_sum += derivative;
        }
        means[arm] = sum / n;
        if needs_jacobian {
            // Σ_rows h′ x per column, each over the rows in order (a design held as rows
            // skips its zero entries, which add ±0).
            let totals: Vec<f64> = match design {
                DesignInput::Dense(matrix) => (0..n_columns)
                    .map(|column| {
                        let mut total = 0.0;
                        for (derivative, x) in derivatives.iter().zip(matrix.column(column).iter())
                        {
                            total += derivative * x;
                        }
                        total
                    })
                    .collect(),
                DesignInput::Rows(rows) => {
                    let mut totals = vec![0.0; n_columns];
                    for (row, derivative) in derivatives.iter().enumerate() {
                        let (columns, entries) = rows.entries(row);
                        for (&column, &x) in columns.iter().zip(entries) {
                            totals[column as usize] += derivative * x;
                        }
                    }
                    totals
                }
            };
            for column in 0..n_columns {
                jacobian[(arm, column)] = if is_treatment_column[column] {
                    if input.treatment_columns[arm] == Some(column) {
                        derivative_sum / n
                    } else {
                        0.0
                    }
                } else {
                    totals[column] / n
                };
            }
        }
    }
    if let Some(arm) = means.iter().position(|mean| !mean.is_finite()) {
        return Err(MarginalError::NonFiniteMean { arm, row: 0 });
    }

    // (1/n) Σ_i (m_ia − μ̂_a)(m_ib − μ̂_b), used by two of the three variances.
    let prediction_covariance = |first: usize, second: usize| -> f64 {
        let mut total = 0.0;
        for row in 0..n_rows {
            total += (predictions[(row, first)] - means[first])
                * (predictions[(row, second)] - means[second]);
        }
        total / n
    };

    let mut covariance = match input.variance {
        MarginalVariance::ConditionalDelta | MarginalVariance::DeltaWithCovariateSampling => {
            let coefficient_covariance = input
                .coefficient_covariance
                .ok_or(MarginalError::MissingCoefficientCovariance)?;
            let mut covariance = &jacobian * coefficient_covariance * jacobian.transpose();
            if input.variance == MarginalVariance::DeltaWithCovariateSampling {
                for first in 0..n_arms {
                    for second in first..n_arms {
                        let extra = prediction_covariance(first, second) / n;
                        covariance[(first, second)] += extra;
                        if second != first {
                            covariance[(second, first)] += extra;
                        }
                    }
                }
            }
            covariance
        }
        MarginalVariance::Robust => robust_covariance(
            input,
            &predictions,
            &means,
            &n_per_arm,
            prediction_covariance,
        )?,
        MarginalVariance::InfluenceFunction => {
            influence_function_covariance(input, &base_predictor, &predictions, &means, &jacobian)?
        }
    };
    // The matrix product leaves rounding-level asymmetry; the estimand is symmetric.
    for first in 0..n_arms {
        for second in (first + 1)..n_arms {
            let average = 0.5 * (covariance[(first, second)] + covariance[(second, first)]);
            covariance[(first, second)] = average;
            covariance[(second, first)] = average;
        }
    }
    if !is_positive_definite(&covariance) {
        return Err(MarginalError::CovarianceNotPositiveDefinite {
            variance: input.variance,
        });
    }
    let arms = (0..n_arms)
        .map(|arm| ArmMarginalMean {
            arm,
            n_subjects: n_per_arm[arm],
            mean: means[arm],
            standard_error: covariance[(arm, arm)].sqrt(),
        })
        .collect();
    Ok(MarginalMeans {
        arms,
        covariance,
        variance: input.variance,
    })
}

/// The Ye et al. (2023) robust covariance of the arm means (module documentation, `Robust`).
fn robust_covariance(
    input: &MarginalInput,
    predictions: &DMatrix<f64>,
    means: &[f64],
    n_per_arm: &[usize],
    prediction_covariance: impl Fn(usize, usize) -> f64,
) -> Result<DMatrix<f64>, MarginalError> {
    let n_arms = means.len();
    let n_rows = predictions.nrows();
    let n = n_rows as f64;
    // Per-arm means of y, |y| and of every arm's predictions (m̄_b^{(a)} in row a, column b).
    let mut response_mean = vec![0.0; n_arms];
    let mut absolute_response_mean = vec![0.0; n_arms];
    let mut arm_prediction_mean = DMatrix::<f64>::zeros(n_arms, n_arms);
    for row in 0..n_rows {
        let arm = input.arm_of_row[row];
        response_mean[arm] += input.response[row];
        absolute_response_mean[arm] += input.response[row].abs();
        for other in 0..n_arms {
            arm_prediction_mean[(arm, other)] += predictions[(row, other)];
        }
    }
    for arm in 0..n_arms {
        let count = n_per_arm[arm] as f64;
        response_mean[arm] /= count;
        absolute_response_mean[arm] /= count;
        for other in 0..n_arms {
            arm_prediction_mean[(arm, other)] /= count;
        }
        let mean_residual = response_mean[arm] - arm_prediction_mean[(arm, arm)];
        if mean_residual.abs()
            > PREDICTION_UNBIASEDNESS_TOLERANCE * (1.0 + absolute_response_mean[arm])
        {
            return Err(MarginalError::PredictionNotUnbiased { arm, mean_residual });
        }
    }
    // Second pass: within-arm covariances c_a(Y, m_b) and residual variances s²_a.
    let mut response_prediction = DMatrix::<f64>::zeros(n_arms, n_arms);
    let mut residual_variance = vec![0.0; n_arms];
    for row in 0..n_rows {
        let arm = input.arm_of_row[row];
        let centred_response = input.response[row] - response_mean[arm];
        for other in 0..n_arms {
            response_prediction[(arm, other)] +=
                centred_response * (predictions[(row, other)] - arm_prediction_mean[(arm, other)]);
        }
        let centred_residual = (input.response[row] - predictions[(row, arm)])
            - (response_mean[arm] - arm_prediction_mean[(arm, arm)]);
        residual_variance[arm] += centred_residual * centred_residual;
    }
    for arm in 0..n_arms {
        let count = n_per_arm[arm] as f64;
        residual_variance[arm] /= count;
        for other in 0..n_arms {
            response_prediction[(arm, other)] /= count;
        }
    }
    let mut covariance = DMatrix::<f64>::zeros(n_arms, n_arms);
    for first in 0..n_arms {
        for second in first..n_arms {
            let mut value = response_prediction[(first, second)]
                + response_prediction[(second, first)]
                - prediction_covariance(first, second);
            if first == second {
                value += residual_variance[first] * n / n_per_arm[first] as f64;
            }
            covariance[(first, second)] = value / n;
            covariance[(second, first)] = value / n;
        }
    }
    Ok(covariance)
}

/// The variance function V(μ) of a family (up to the dispersion, which cancels in the
/// influence function), or `None` when it cannot be evaluated.
fn variance_function(family: Family, mean: f64) -> Option<f64> {
    match family {
        Family::Binomial => Some(mean * (1.0 - mean)),
        Family::Poisson => Some(mean),
        Family::NegativeBinomial { theta: Some(theta) } => Some(mean + mean * mean / theta),
        Family::NegativeBinomial { theta: None } => None,
        Family::Gamma => Some(mean * mean),
    }
}

/// The M-estimation (influence-function) covariance of the arm means: with the per-row score
/// s_i = x_i (y_i − μ_i) h′(η_i)/V(μ_i) and B = (1/n) Σ_i x_i x_iᵀ h′(η_i)²/V(μ_i),
/// ψ_ia = (m_ia − μ̂_a) + D_a B⁻¹ s_i and V̂ = (1/n²) Σ_i ψ_i ψ_iᵀ (module documentation).
/// Σᵢ wᵢ xᵢₐ xᵢᵦ for a ≤ b (row-major upper triangle), each entry summed over the rows in
/// order as (wᵢ · xᵢₐ) · xᵢᵦ starting from zero, visiting only each row's non-zero entries: a
/// skipped term would add ±0, so the result is bit for bit the plain triple loop's, at the
/// cost of the squared non-zeros of a row (one site dummy of many) rather than of p.
fn weighted_cross_totals(design: DesignInput, weights: &[f64]) -> Vec<f64> {
    use crate::models::glm::linalg::{BlockNonZeros, ROW_BLOCK};
    let (n_rows, n_columns) = (design.nrows(), design.ncols());
    let all: Vec<usize> = (0..n_columns).collect();
    let mut totals = vec![0.0; n_columns * n_columns];
    let mut non_zeros = BlockNonZeros::new(n_columns);
    let mut block_start = 0;
    while block_start < n_rows {
        let block_end = (block_start + ROW_BLOCK).min(n_rows);
        match design {
            DesignInput::Dense(matrix) => {
                non_zeros.gather(matrix.as_slice(), n_rows, &all, block_start..block_end)
            }
            DesignInput::Rows(rows) => non_zeros.gather_stored(rows, &all, block_start..block_end),
        }
        for row in block_start..block_end {
            let w = weights[row];
            let (positions, values) = non_zeros.row(row - block_start);
            for (i, (&a, &x_a)) in positions.iter().zip(values).enumerate() {
                for (&b, &x_b) in positions[i..].iter().zip(&values[i..]) {
                    totals[a * n_columns + b] += w * x_a * x_b;
                }
            }
        }
        block_start = block_end;
    }
    totals
}

fn entry(design: DesignInput<'_>, row: usize, column: usize) -> f64 {
    match design {
        DesignInput::Dense(matrix) => matrix[(row, column)],
        DesignInput::Rows(rows) => rows.get(row, column),
    }
}

fn influence_function_covariance(
    input: &MarginalInput,
    base_predictor: &[f64],
    predictions: &DMatrix<f64>,
    means: &[f64],
    jacobian: &DMatrix<f64>,
) -> Result<DMatrix<f64>, MarginalError> {
    if let Family::NegativeBinomial { theta } = input.family
        && !theta.is_some_and(|value| value.is_finite() && value > 0.0)
    {
        return Err(MarginalError::UnsupportedFamily {
            family: input.family,
        });
    }
    let design = input.design;
    let (n_rows, n_columns) = (design.nrows(), design.ncols());
    let n_arms = means.len();
    let n = n_rows as f64;
    let shift_of_arm: Vec<f64> = input
        .treatment_columns
        .iter()
        .map(|column| column.map_or(0.0, |c| input.coefficients[c]))
        .collect();
    // Per row: the working weight h′²/V and the score multiplier (y − μ) h′/V at the row's own
    // arm, where the prediction is the fitted mean.
    let mut working_weights = vec![0.0; n_rows];
    let mut score_multipliers = vec![0.0; n_rows];
    for row in 0..n_rows {
        let arm = input.arm_of_row[row];
        let (mean, derivative) = inverse_link(input.link, base_predictor[row] + shift_of_arm[arm]);
        let variance = variance_function(input.family, mean)
            .filter(|value| value.is_finite() && *value > 0.0)
            .ok_or(MarginalError::SingularInformation)?;
        working_weights[row] = derivative * derivative / variance;
        score_multipliers[row] = (input.response[row] - mean) * derivative / variance;
    }
    let totals = weighted_cross_totals(design, &working_weights);
    let mut information = DMatrix::<f64>::zeros(n_columns, n_columns);
    for first in 0..n_columns {
        for second in first..n_columns {
            let total = totals[first * n_columns + second];
            information[(first, second)] = total / n;
            information[(second, first)] = total / n;
        }
    }
    // Solve on the correlation scale so that columns of very different sizes do not decide
    // whether the factorisation succeeds; a near-zero pivot means aliased columns.
    let (factor, scale) =
        scaled_cholesky(&information).ok_or(MarginalError::SingularInformation)?;
    // G = B⁻¹ Dᵀ (p × K), through the scaled factor: B⁻¹ = S (S B S)⁻¹ S.
    let mut right_hand_side = jacobian.transpose();
    for i in 0..n_columns {
        for a in 0..n_arms {
            right_hand_side[(i, a)] *= scale[i];
        }
    }
    let mut solved = factor.solve(&right_hand_side);
    for i in 0..n_columns {
        for a in 0..n_arms {
            solved[(i, a)] *= scale[i];
        }
    }
    if solved.iter().any(|value| !value.is_finite()) {
        return Err(MarginalError::SingularInformation);
    }
    // n × K: x_iᵀ G.
    let projected = match design {
        DesignInput::Dense(matrix) => matrix * &solved,
        DesignInput::Rows(rows) => {
            let mut projected = DMatrix::<f64>::zeros(n_rows, n_arms);
            for row in 0..n_rows {
                let (columns, values) = rows.entries(row);
                for arm in 0..n_arms {
                    projected[(row, arm)] = columns
                        .iter()
                        .zip(values)
                        .map(|(&column, &x)| x * solved[(column as usize, arm)])
                        .sum();
                }
            }
            projected
        }
    };
    let mut influence = vec![0.0; n_arms];
    let mut covariance = DMatrix::<f64>::zeros(n_arms, n_arms);
    for row in 0..n_rows {
        for arm in 0..n_arms {
            influence[arm] = predictions[(row, arm)] - means[arm]
                + score_multipliers[row] * projected[(row, arm)];
        }
        for first in 0..n_arms {
            for second in first..n_arms {
                covariance[(first, second)] += influence[first] * influence[second];
            }
        }
    }
    for first in 0..n_arms {
        for second in first..n_arms {
            let value = covariance[(first, second)] / (n * n);
            covariance[(first, second)] = value;
            covariance[(second, first)] = value;
        }
    }
    Ok(covariance)
}

/// Two-sided p-value of a standard normal statistic, 2Φ(−|z|) = erfc(|z|/√2), accurate in the
/// tails.
fn two_sided_normal_p_value(statistic: f64) -> f64 {
    erfc(statistic.abs() / std::f64::consts::SQRT_2)
}

/// Contrasts between arm means: for every `(arm, versus)` pair in `contrasts`, one effect per
/// scale in `scales`, in that order (contrast-major). `critical_value` is the normal quantile of
/// the interval (1.959963984540054 for 95%). See the module documentation for the formulas.
pub fn marginal_effects(
    means: &MarginalMeans,
    contrasts: &[(usize, usize)],
    scales: &[EffectScale],
    critical_value: f64,
) -> Result<Vec<MarginalEffect>, MarginalError> {
    if !(critical_value.is_finite() && critical_value > 0.0) {
        return Err(MarginalError::InvalidCriticalValue {
            value: critical_value,
        });
    }
    let n_arms = means.arms.len();
    if means.covariance.shape() != (n_arms, n_arms) {
        return Err(MarginalError::DimensionMismatch {
            what: "covariance of the arm means",
            expected: n_arms,
            found: means.covariance.nrows().max(means.covariance.ncols()),
        });
    }
    if let Some(arm) = means.arms.iter().position(|a| !a.mean.is_finite()) {
        return Err(MarginalError::NonFiniteInput {
            what: "arm mean",
            row: arm,
            column: 0,
        });
    }
    if !is_positive_definite(&means.covariance) {
        return Err(MarginalError::CovarianceNotPositiveDefinite {
            variance: means.variance,
        });
    }
    let mut effects = Vec::with_capacity(contrasts.len() * scales.len());
    for &(arm, versus) in contrasts {
        if arm >= n_arms || versus >= n_arms || arm == versus {
            return Err(MarginalError::InvalidContrast { arm, versus });
        }
        let (mean_a, mean_b) = (means.arms[arm].mean, means.arms[versus].mean);
        let v = &means.covariance;
        let (v_aa, v_bb, v_ab) = (v[(arm, arm)], v[(versus, versus)], v[(arm, versus)]);
        for &scale in scales {
            let in_domain = |mean: f64| match scale {
                EffectScale::Difference => true,
                EffectScale::Ratio => mean > 0.0,
                EffectScale::OddsRatio => mean > 0.0 && mean < 1.0,
            };
            for (which, mean) in [(arm, mean_a), (versus, mean_b)] {
                if !in_domain(mean) {
                    return Err(MarginalError::MeanOutsideDomain {
                        arm: which,
                        mean,
                        scale,
                    });
                }
            }
            // The gradient (g_a, g_b) of the contrast's working scale in (μ_a, μ_b), and the
            // contrast on that scale: the difference itself, or the log of the ratio.
            let (centre, gradient_a, gradient_b) = match scale {
                EffectScale::Difference => (mean_a - mean_b, 1.0, -1.0),
                EffectScale::Ratio => (mean_a.pln() - mean_b.pln(), 1.0 / mean_a, -1.0 / mean_b),
                EffectScale::OddsRatio => {
                    let logit = |mean: f64| mean.pln() - (-mean).pln_1p();
                    (
                        logit(mean_a) - logit(mean_b),
                        1.0 / (mean_a * (1.0 - mean_a)),
                        -1.0 / (mean_b * (1.0 - mean_b)),
                    )
                }
            };
            let variance = gradient_a * gradient_a * v_aa
                + gradient_b * gradient_b * v_bb
                + 2.0 * gradient_a * gradient_b * v_ab;
            if !(variance.is_finite() && variance > 0.0 && centre.is_finite()) {
                return Err(MarginalError::NonPositiveContrastVariance { arm, versus, scale });
            }
            let standard_error = variance.sqrt();
            let (lower, upper) = (
                centre - critical_value * standard_error,
                centre + critical_value * standard_error,
            );
            let statistic = centre / standard_error;
            let (estimate, lower, upper) = match scale {
                EffectScale::Difference => (centre, lower, upper),
                EffectScale::Ratio => (mean_a / mean_b, lower.pexp(), upper.pexp()),
                EffectScale::OddsRatio => (centre.pexp(), lower.pexp(), upper.pexp()),
            };
            effects.push(MarginalEffect {
                arm,
                versus,
                scale,
                estimate,
                standard_error,
                lower,
                upper,
                statistic,
                p_value: two_sided_normal_p_value(statistic),
            });
        }
    }
    Ok(effects)
}
