//! Generalised linear models: binomial (logit, probit, complementary log-log), Poisson and
//! negative binomial (NB2, θ fixed or by maximum likelihood) with an offset, and Gamma (inverse,
//! log), fitted by IRLS with step-halving, or by Firth's penalised likelihood for the binomial
//! logit model; plus profile-likelihood intervals for one coefficient. This module owns the
//! public API, input validation and the assembly of a fit (dispersion, covariance, likelihoods,
//! null deviance, stop reason). It does no I/O and no distribution work the caller can do
//! (critical values are passed in), and it never returns NaN: failures are a [`StopReason`]
//! inside the fit, or a [`GlmError`].
//!
//! Method. The first step is a Fisher-scoring (IRLS) step from the family's starting means.
//! Later steps are Fisher scoring for canonical links (logit, Poisson log, Gamma inverse), where
//! it is Newton's method; for non-canonical links they are Newton steps with the observed
//! information whenever it is positive definite (Fisher scoring converges only linearly there,
//! and on some data very slowly), falling back to scoring otherwise. Every step is halved until
//! the deviance does not increase. Convergence needs |D − D_old| / (|D| + 0.1) below
//! `tolerance` and max |Uⱼ| / √Iⱼⱼ below `score_tolerance` (U the score, I the expected
//! information). Standard errors always come from the expected (Fisher) information at the
//! estimate, times the dispersion.
//!
//! Requirements: an n×p design (column-major `DMatrix`, n ≥ 1, p ≥ 1, all finite); a response
//! of length n in the family's range (binomial: proportions in [0, 1], with the number of trials
//! as prior weight when it is not 1; Poisson and negative binomial: y ≥ 0; Gamma: y > 0);
//! optional finite offsets and non-negative prior weights of length n.
//!
//! References: McCullagh & Nelder (1989), *Generalized Linear Models*, 2nd ed.; Green (1984),
//! JRSS B 46:149–192 (IRLS and Newton–Raphson); Venables & Ripley (2002), *Modern Applied
//! Statistics with S*, 4th ed., §7 (negative binomial) and §8.4 (profile intervals); Firth
//! (1993), Biometrika 80:27–38; Heinze & Schemper (2002), Statistics in Medicine 21:2409–2419;
//! White (1980), Econometrica 48:817–838 (HC0 sandwich).

mod family;
mod firth;
mod irls;
pub(crate) mod linalg;
mod negative_binomial;
mod profile;

use nalgebra::DMatrix;

use crate::models::StopReason;
use family::{Distribution, Kernel};
use irls::{IrlsOutcome, IrlsStatus, Problem, Start, Tolerances, run_irls, separation_columns};
use linalg::{ScaledCholesky, SparseRows, aliased_columns, weighted_cross_product_from};

pub use profile::{ProfileInterval, profile_interval};

/// The response distribution.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Family {
    /// Binomial proportions (0/1 outcomes, or successes/trials with trials as prior weights).
    Binomial,
    /// Poisson counts.
    Poisson,
    /// NB2 counts with variance μ + μ²/θ; `theta: None` estimates θ by maximum likelihood.
    NegativeBinomial { theta: Option<f64> },
    /// Gamma with constant coefficient of variation; dispersion by Pearson χ² / (n − p).
    Gamma,
}

/// The link function g with g(μ) = η.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Link {
    Logit,
    Probit,
    CLogLog,
    Log,
    Inverse,
    Identity,
}

/// The estimation method.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Method {
    /// Maximum likelihood by IRLS.
    MaximumLikelihood,
    /// Firth's penalised likelihood l(β) + ½ log|I(β)| (binomial logit only).
    Firth,
}

/// Which covariance matrix the fit reports.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum CovarianceKind {
    /// φ · I(β̂)⁻¹ with I the expected (Fisher) information.
    ModelBased,
    /// White's HC0 sandwich I⁻¹ (Σ sᵢ sᵢᵀ) I⁻¹ from the per-observation scores sᵢ.
    SandwichHc0,
}

/// Options of a fit; [`GlmOptions::new`] gives the defaults.
#[derive(Debug, Clone, PartialEq)]
pub struct GlmOptions {
    pub family: Family,
    pub link: Link,
    pub method: Method,
    pub covariance: CovarianceKind,
    /// Cap on scoring iterations (for the negative binomial with estimated θ: on each IRLS run
    /// and on the number of θ/β alternations).
    pub max_iterations: usize,
    /// Convergence threshold on |D − D_old| / (|D| + 0.1).
    pub tolerance: f64,
    /// Convergence threshold on max |Uⱼ| / √Iⱼⱼ, the score in standard-error units.
    pub score_tolerance: f64,
    /// Whether the design's columns span a constant; decides the null model (intercept plus
    /// offset when true, offset only when false).
    pub has_intercept: bool,
}

impl GlmOptions {
    /// Maximum likelihood, model-based covariance, at most 100 iterations, deviance tolerance
    /// 1e-10, score tolerance 1e-9, with an intercept.
    pub fn new(family: Family, link: Link) -> GlmOptions {
        GlmOptions {
            family,
            link,
            method: Method::MaximumLikelihood,
            covariance: CovarianceKind::ModelBased,
            max_iterations: 100,
            tolerance: 1e-10,
            score_tolerance: 1e-9,
            has_intercept: true,
        }
    }
}

/// The data of a fit: design, response and the optional offset and prior weights.
#[derive(Debug, Clone, Copy)]
pub struct GlmData<'a> {
    pub design: crate::models::DesignInput<'a>,
    pub response: &'a [f64],
    /// Added to the linear predictor (e.g. log exposure); zero when absent.
    pub offset: Option<&'a [f64]>,
    /// Prior weights (binomial: number of trials); one when absent. Rows of weight zero are
    /// ignored by the fit.
    pub prior_weights: Option<&'a [f64]>,
    /// The design columns the model uses, strictly ascending; every column when absent. A fit
    /// on a subset is the fit on a copy of those columns, to the bit, without the copy; its
    /// coefficient vectors and column indices then count positions in this list.
    pub columns: Option<&'a [usize]>,
}

impl<'a> GlmData<'a> {
    pub fn new(design: &'a DMatrix<f64>, response: &'a [f64]) -> GlmData<'a> {
        GlmData {
            design: crate::models::DesignInput::Dense(design),
            response,
            offset: None,
            prior_weights: None,
            columns: None,
        }
    }
    /// The data of a design held either way; held as rows (which must hold every column), the
    /// fit is, to the bit, the fit of the same design held dense.
    pub fn from_input(design: crate::models::DesignInput<'a>, response: &'a [f64]) -> GlmData<'a> {
        GlmData {
            design,
            response,
            offset: None,
            prior_weights: None,
            columns: None,
        }
    }
    pub fn with_offset(self, offset: &'a [f64]) -> GlmData<'a> {
        GlmData {
            offset: Some(offset),
            ..self
        }
    }
    pub fn with_prior_weights(self, prior_weights: &'a [f64]) -> GlmData<'a> {
        GlmData {
            prior_weights: Some(prior_weights),
            ..self
        }
    }
    /// The same data with the model restricted to `columns` of the design (strictly ascending).
    pub fn with_columns(self, columns: &'a [usize]) -> GlmData<'a> {
        GlmData {
            columns: Some(columns),
            ..self
        }
    }
}

/// The negative-binomial shape parameter of a fit.
#[derive(Debug, Clone, PartialEq)]
pub struct ThetaEstimate {
    pub theta: f64,
    /// 1/√(observed information for θ at the final means), as the MASS package's negative-binomial fit reports it; `None`
    /// when θ was fixed by the caller.
    pub standard_error: Option<f64>,
}

/// A fitted GLM. Coefficient vectors have one entry per design column; aliased columns hold
/// `None` and have zero rows and columns in `covariance`.
#[derive(Debug, Clone, PartialEq)]
pub struct GlmFit {
    pub coefficients: Vec<Option<f64>>,
    pub standard_errors: Vec<Option<f64>>,
    /// p×p covariance of the kind requested (zero for aliased columns).
    pub covariance: DMatrix<f64>,
    pub covariance_kind: CovarianceKind,
    /// Columns found to be linear combinations of earlier columns.
    pub aliased_columns: Vec<usize>,
    pub rank: usize,
    /// Pearson χ²/(n − rank) for Gamma, 1 otherwise.
    pub dispersion: f64,
    pub dispersion_estimated: bool,
    /// Deviance of the fit (for Firth, of the unpenalised likelihood at the penalised estimate).
    pub deviance: f64,
    /// Deviance of the null model (intercept plus offset when `has_intercept`, offset only
    /// otherwise), by maximum likelihood with the same family (for the negative binomial at the
    /// final θ; for Firth fits the unpenalised null model); `None` when that model could not be
    /// fitted to convergence.
    pub null_deviance: Option<f64>,
    pub pearson_chi_square: f64,
    /// Full log-likelihood with constants, as R's `logLik` reports it (see `family.rs`; for Gamma
    /// it uses the dispersion deviance / Σw).
    pub log_likelihood: f64,
    /// Firth only: l(β̂) + ½ log det I(β̂).
    pub penalised_log_likelihood: Option<f64>,
    /// Number of positively weighted rows minus the rank.
    pub residual_df: usize,
    /// Residual degrees of freedom of the null model.
    pub null_residual_df: usize,
    /// Iterations used (IRLS steps; for estimated θ summed over the Poisson start and every IRLS
    /// run of the θ/β alternation; for Firth, modified-score steps). Informational.
    pub iterations: usize,
    pub stop_reason: StopReason,
    pub theta: Option<ThetaEstimate>,
    /// μ̂ per row.
    pub fitted_means: Vec<f64>,
    /// η̂ = Xβ̂ + offset per row.
    pub linear_predictors: Vec<f64>,
}

/// Why a fit could not be produced at all.
#[derive(Debug, Clone, PartialEq)]
pub enum GlmError {
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
    ResponseOutOfRange {
        row: usize,
        value: f64,
        expected: &'static str,
    },
    InvalidWeight {
        row: usize,
        value: f64,
    },
    InvalidOption {
        detail: String,
    },
    /// Every column is aliased (or every weight is zero).
    NoEstimableCoefficients,
    /// Gamma needs n − rank > 0 to estimate its dispersion.
    NoResidualDegreesOfFreedom,
    /// No finite estimate could be computed; in words.
    NumericalFailure {
        detail: String,
    },
    /// A profile interval could not be computed; in words.
    ProfileFailure {
        detail: String,
    },
}

impl std::fmt::Display for GlmError {
    fn fmt(&self, formatter: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            GlmError::EmptyData => write!(formatter, "the design has no rows or no columns"),
            GlmError::DimensionMismatch {
                what,
                expected,
                found,
            } => {
                write!(formatter, "{what} has length {found}, expected {expected}")
            }
            GlmError::NonFiniteInput { what, row, column } => {
                write!(
                    formatter,
                    "{what} is not finite at row {row}, column {column}"
                )
            }
            GlmError::ResponseOutOfRange {
                row,
                value,
                expected,
            } => {
                write!(
                    formatter,
                    "response {value} at row {row} is out of range: expected {expected}"
                )
            }
            GlmError::InvalidWeight { row, value } => {
                write!(
                    formatter,
                    "prior weight {value} at row {row} is invalid: expected a finite value >= 0"
                )
            }
            GlmError::InvalidOption { detail } => write!(formatter, "invalid option: {detail}"),
            GlmError::NoEstimableCoefficients => write!(formatter, "no coefficient is estimable"),
            GlmError::NoResidualDegreesOfFreedom => {
                write!(
                    formatter,
                    "no residual degrees of freedom to estimate the dispersion"
                )
            }
            GlmError::NumericalFailure { detail } => {
                write!(formatter, "numerical failure: {detail}")
            }
            GlmError::ProfileFailure { detail } => {
                write!(formatter, "profile interval failed: {detail}")
            }
        }
    }
}

impl std::error::Error for GlmError {}

/// Tolerance on the scaled residual pivot (1 − R² of a column on the earlier ones) below which a
/// column is declared aliased.
const ALIASING_TOLERANCE: f64 = 1e-11;

/// Checked inputs with defaults filled in.
pub(crate) struct PreparedData<'a> {
    pub(crate) design: crate::models::DenseOnDemand<'a>,
    /// The design columns of the model, ascending (all of them unless the data named a subset).
    pub(crate) columns: Vec<usize>,
    /// The design's non-zeros by row: the caller's rows, or built here when a dense design is
    /// sparse enough to gain from them.
    pub(crate) sparse_rows: Option<std::borrow::Cow<'a, SparseRows>>,
    pub(crate) response: &'a [f64],
    /// The caller's offset, or zeros.
    pub(crate) offset: std::borrow::Cow<'a, [f64]>,
    /// The caller's prior weights, or ones.
    pub(crate) weights: std::borrow::Cow<'a, [f64]>,
}

impl PreparedData<'_> {
    pub(crate) fn problem(&self) -> Problem<'_> {
        Problem {
            design: &self.design,
            sparse_rows: self.sparse_rows.as_deref(),
            response: self.response,
            weights: &self.weights,
            offset: &self.offset,
        }
    }
}

fn check_options(options: &GlmOptions) -> Result<(), GlmError> {
    let link_allowed = match options.family {
        Family::Binomial => matches!(options.link, Link::Logit | Link::Probit | Link::CLogLog),
        Family::Poisson | Family::NegativeBinomial { .. } => {
            matches!(options.link, Link::Log | Link::Identity)
        }
        Family::Gamma => matches!(options.link, Link::Inverse | Link::Log | Link::Identity),
    };
    if !link_allowed {
        return Err(GlmError::InvalidOption {
            detail: format!(
                "link {:?} is not supported for family {:?}",
                options.link, options.family
            ),
        });
    }
    if let Family::NegativeBinomial { theta: Some(theta) } = options.family
        && !(theta > 0.0 && theta.is_finite())
    {
        return Err(GlmError::InvalidOption {
            detail: format!("theta {theta} must be finite and > 0"),
        });
    }
    if options.method == Method::Firth {
        if options.family != Family::Binomial || options.link != Link::Logit {
            return Err(GlmError::InvalidOption {
                detail: "Firth's method is implemented for the binomial logit model only"
                    .to_string(),
            });
        }
        if options.covariance != CovarianceKind::ModelBased {
            return Err(GlmError::InvalidOption {
                detail: "Firth's method reports the model-based covariance only".to_string(),
            });
        }
    }
    let positive_finite = |value: f64| value > 0.0 && value.is_finite();
    if !(positive_finite(options.tolerance) && positive_finite(options.score_tolerance)) {
        return Err(GlmError::InvalidOption {
            detail: "tolerances must be finite and > 0".to_string(),
        });
    }
    Ok(())
}

pub(crate) fn prepare<'a>(
    data: &GlmData<'a>,
    options: &GlmOptions,
) -> Result<PreparedData<'a>, GlmError> {
    check_options(options)?;
    let design = data.design;
    let (n_rows, n_columns) = (design.nrows(), design.ncols());
    if n_rows == 0 || n_columns == 0 {
        return Err(GlmError::EmptyData);
    }
    if data.response.len() != n_rows {
        return Err(GlmError::DimensionMismatch {
            what: "response",
            expected: n_rows,
            found: data.response.len(),
        });
    }
    let columns: Vec<usize> = match data.columns {
        Some(columns) => {
            if columns.is_empty() {
                return Err(GlmError::EmptyData);
            }
            if let Some(&column) = columns.iter().find(|&&column| column >= n_columns) {
                return Err(GlmError::InvalidOption {
                    detail: format!(
                        "column {column} is not a column of the design ({n_columns} columns)"
                    ),
                });
            }
            if columns.windows(2).any(|pair| pair[0] >= pair[1]) {
                return Err(GlmError::InvalidOption {
                    detail: "the model's columns must be listed in strictly ascending order"
                        .to_string(),
                });
            }
            columns.to_vec()
        }
        None => (0..n_columns).collect(),
    };
    let non_finite = design
        .first_non_finite(&columns)
        .map(|(position, row)| (columns[position], row));
    if let Some((column, row)) = non_finite {
        return Err(GlmError::NonFiniteInput {
            what: "design",
            row,
            column,
        });
    }
    let offset = match data.offset {
        Some(values) => {
            if values.len() != n_rows {
                return Err(GlmError::DimensionMismatch {
                    what: "offset",
                    expected: n_rows,
                    found: values.len(),
                });
            }
            if let Some(row) = values.iter().position(|v| !v.is_finite()) {
                return Err(GlmError::NonFiniteInput {
                    what: "offset",
                    row,
                    column: 0,
                });
            }
            std::borrow::Cow::Borrowed(values)
        }
        None => std::borrow::Cow::Owned(vec![0.0; n_rows]),
    };
    let weights = match data.prior_weights {
        Some(values) => {
            if values.len() != n_rows {
                return Err(GlmError::DimensionMismatch {
                    what: "prior weights",
                    expected: n_rows,
                    found: values.len(),
                });
            }
            if let Some(row) = values.iter().position(|v| !(v.is_finite() && *v >= 0.0)) {
                return Err(GlmError::InvalidWeight {
                    row,
                    value: values[row],
                });
            }
            std::borrow::Cow::Borrowed(values)
        }
        None => std::borrow::Cow::Owned(vec![1.0; n_rows]),
    };
    for (row, &y) in data.response.iter().enumerate() {
        if !y.is_finite() {
            return Err(GlmError::NonFiniteInput {
                what: "response",
                row,
                column: 0,
            });
        }
        let (valid, expected) = match options.family {
            Family::Binomial => ((0.0..=1.0).contains(&y), "a proportion in [0, 1]"),
            Family::Poisson | Family::NegativeBinomial { .. } => (y >= 0.0, "a count >= 0"),
            Family::Gamma => (y > 0.0, "a value > 0"),
        };
        if !valid && weights[row] > 0.0 {
            return Err(GlmError::ResponseOutOfRange {
                row,
                value: y,
                expected,
            });
        }
    }
    let sparse_rows = match design {
        crate::models::DesignInput::Dense(matrix) => {
            SparseRows::of(matrix, &columns).map(std::borrow::Cow::Owned)
        }
        crate::models::DesignInput::Rows(rows) => Some(std::borrow::Cow::Borrowed(rows)),
    };
    Ok(PreparedData {
        design: crate::models::DenseOnDemand::new(design),
        sparse_rows,
        columns,
        response: data.response,
        offset,
        weights,
    })
}

/// The estimable columns: all columns minus those aliased on the prior-weighted cross-product.
pub(crate) fn estimable_columns(prepared: &PreparedData) -> (Vec<usize>, Vec<usize>) {
    let all = &prepared.columns;
    let (cross, _) = weighted_cross_product_from(
        &prepared.design,
        prepared.sparse_rows.as_deref(),
        all,
        &prepared.weights,
        None,
    );
    // Positions in `all`, turned back into design columns.
    let aliased: Vec<usize> = aliased_columns(&cross, ALIASING_TOLERANCE)
        .into_iter()
        .map(|position| all[position])
        .collect();
    let active = all
        .iter()
        .copied()
        .filter(|j| !aliased.contains(j))
        .collect();
    (active, aliased)
}

pub(crate) fn tolerances_of(options: &GlmOptions) -> Tolerances {
    Tolerances {
        max_iterations: options.max_iterations,
        deviance: options.tolerance,
        score: options.score_tolerance,
    }
}

/// The kernel of a family at a given θ (ignored unless negative binomial).
pub(crate) fn kernel_of(options: &GlmOptions, theta: f64) -> Kernel {
    Kernel {
        distribution: Distribution::from_family(&options.family, theta),
        link: options.link,
    }
}

/// Fits a GLM. See the module documentation for the requirements on `data`.
///
/// The stop reason, in order of precedence: `Separation` (binomial maximum-likelihood fits
/// whose fitted probabilities reach 0 or 1 while further steps keep moving the coefficients;
/// the columns whose coefficients move are named), `NumericalFailure` (a step could not be
/// taken, θ ran away, or the deviance stalled without separation; the last finite iterate is
/// reported), `IterationLimit`, `SingularDesign` (aliased columns were dropped and the remaining
/// coefficients converged), `Converged`. Under `Separation` the coefficients and standard errors
/// are finite but meaningless (they grow with the iteration count); Firth's method is the
/// plannable remedy.
pub fn fit_glm(data: &GlmData, options: &GlmOptions) -> Result<GlmFit, GlmError> {
    let prepared = prepare(data, options)?;
    let (active, aliased) = estimable_columns(&prepared);
    if active.is_empty() || prepared.weights.iter().all(|w| *w == 0.0) {
        return Err(GlmError::NoEstimableCoefficients);
    }
    let problem = prepared.problem();
    let tolerances = tolerances_of(options);

    let estimation = match (options.method, options.family) {
        (Method::Firth, _) => {
            firth::run_firth(&kernel_of(options, 1.0), &problem, &active, tolerances)
        }
        (Method::MaximumLikelihood, Family::NegativeBinomial { theta: None }) => {
            fit_negative_binomial(options, &problem, &active, tolerances)
        }
        (Method::MaximumLikelihood, Family::NegativeBinomial { theta: Some(theta) }) => {
            let kernel = kernel_of(options, theta);
            let outcome = run_irls(&kernel, &problem, &active, Start::FamilyDefault, tolerances);
            Estimation {
                kernel,
                outcome,
                theta: Some(ThetaEstimate {
                    theta,
                    standard_error: None,
                }),
                theta_failure: None,
                penalised_log_likelihood: None,
            }
        }
        (Method::MaximumLikelihood, _) => {
            let kernel = kernel_of(options, 1.0);
            let outcome = run_irls(&kernel, &problem, &active, Start::FamilyDefault, tolerances);
            Estimation {
                kernel,
                outcome,
                theta: None,
                theta_failure: None,
                penalised_log_likelihood: None,
            }
        }
    };
    assemble(&prepared, options, &active, aliased, estimation)
}

/// What an estimation routine hands to `assemble`.
pub(crate) struct Estimation {
    pub(crate) kernel: Kernel,
    pub(crate) outcome: IrlsOutcome,
    pub(crate) theta: Option<ThetaEstimate>,
    pub(crate) theta_failure: Option<String>,
    pub(crate) penalised_log_likelihood: Option<f64>,
}

/// NB2 with θ by maximum likelihood: a Poisson fit, then alternation of θ by Newton at fixed
/// means and IRLS for β at fixed θ (warm-started), until θ changes by less than 1e-8 relative and
/// the log-likelihood by less than the deviance tolerance relative (Venables & Ripley 2002, §7.4).
fn fit_negative_binomial(
    options: &GlmOptions,
    problem: &Problem,
    active: &[usize],
    tolerances: Tolerances,
) -> Estimation {
    let poisson = Kernel {
        distribution: Distribution::Poisson,
        link: options.link,
    };
    let mut outcome = run_irls(&poisson, problem, active, Start::FamilyDefault, tolerances);
    let mut total_iterations = outcome.iterations;
    let mut theta =
        negative_binomial::moment_theta(problem.response, &outcome.means, problem.weights);
    let mut kernel = Kernel {
        distribution: Distribution::NegativeBinomial { theta },
        link: options.link,
    };
    let mut previous_log_likelihood = f64::NEG_INFINITY;
    let mut failure: Option<String> = None;
    let mut alternations_converged = false;
    for _ in 0..options.max_iterations.max(1) {
        if outcome.status != IrlsStatus::Converged {
            break;
        }
        let new_theta = match negative_binomial::theta_maximum_likelihood(
            theta,
            problem.response,
            &outcome.means,
            problem.weights,
        ) {
            negative_binomial::ThetaOutcome::Converged(value) => value,
            // The fit reported is the last one made, so θ stays the one it was made with
            // (the runaway value is only named in the failure's words).
            negative_binomial::ThetaOutcome::Failed(detail, value) => {
                failure = Some(format!("{detail} (last value {value:.6e})"));
                break;
            }
        };
        let theta_change = (new_theta - theta).abs() / new_theta;
        theta = new_theta;
        kernel = Kernel {
            distribution: Distribution::NegativeBinomial { theta },
            link: options.link,
        };
        // The previous run's vectors are freed before the next one allocates its own (at 10⁶
        // rows each is 8 MB); its linear predictor is the warm start.
        let warm_start = std::mem::take(&mut outcome.linear_predictor);
        outcome.means = Vec::new();
        outcome = run_irls(
            &kernel,
            problem,
            active,
            Start::LinearPredictor(&warm_start),
            tolerances,
        );
        total_iterations += outcome.iterations;
        let log_likelihood = family::log_likelihood(
            &kernel,
            problem.response,
            &outcome.means,
            problem.weights,
            outcome.deviance,
        );
        let log_likelihood_change =
            (log_likelihood - previous_log_likelihood).abs() / (log_likelihood.abs() + 0.1);
        previous_log_likelihood = log_likelihood;
        if theta_change < 1e-8 && log_likelihood_change < tolerances.deviance {
            alternations_converged = true;
            break;
        }
    }
    if failure.is_none() && !alternations_converged && outcome.status == IrlsStatus::Converged {
        outcome.status = IrlsStatus::IterationLimit;
    }
    outcome.iterations = total_iterations;
    let information = negative_binomial::theta_information(
        theta,
        problem.response,
        &outcome.means,
        problem.weights,
    );
    let standard_error = if information > 0.0 {
        Some(1.0 / information.sqrt())
    } else {
        None
    };
    Estimation {
        kernel,
        outcome,
        theta: Some(ThetaEstimate {
            theta,
            standard_error,
        }),
        theta_failure: failure,
        penalised_log_likelihood: None,
    }
}

/// Deviance of the null model: intercept plus offset when the design has an intercept,
/// offset only otherwise.
fn null_deviance(kernel: &Kernel, prepared: &PreparedData, options: &GlmOptions) -> Option<f64> {
    let problem = prepared.problem();
    if options.has_intercept {
        // A design held as rows whose first column is the intercept serves as it is (the same
        // sums as a column of ones, without another n-vector); otherwise a column of ones.
        let ones;
        let ones_design;
        let intercept_problem = match (prepared.design.input(), prepared.sparse_rows.as_deref()) {
            (crate::models::DesignInput::Rows(rows), Some(stored))
                if prepared.columns.first() == Some(&0) && rows.column_is_ones(0) =>
            {
                Problem {
                    sparse_rows: Some(stored),
                    ..problem
                }
            }
            _ => {
                ones = DMatrix::<f64>::from_element(prepared.design.nrows(), 1, 1.0);
                ones_design =
                    crate::models::DenseOnDemand::new(crate::models::DesignInput::Dense(&ones));
                Problem {
                    design: &ones_design,
                    sparse_rows: None,
                    ..problem
                }
            }
        };
        let outcome = run_irls(
            kernel,
            &intercept_problem,
            &[0],
            Start::FamilyDefault,
            tolerances_of(options),
        );
        (outcome.status == IrlsStatus::Converged).then_some(outcome.deviance)
    } else {
        let means: Vec<f64> = prepared
            .offset
            .iter()
            .map(|&eta| kernel.mean(eta))
            .collect();
        let valid = means
            .iter()
            .zip(prepared.weights.iter())
            .all(|(&mu, &w)| w == 0.0 || kernel.valid_mean(mu));
        valid.then(|| irls::total_deviance(kernel, &problem, &means))
    }
}

fn assemble(
    prepared: &PreparedData,
    options: &GlmOptions,
    active: &[usize],
    aliased: Vec<usize>,
    estimation: Estimation,
) -> Result<GlmFit, GlmError> {
    let Estimation {
        kernel,
        outcome,
        theta,
        theta_failure,
        penalised_log_likelihood,
    } = estimation;
    let problem = prepared.problem();
    // Results count positions in the model's columns; `position_of` maps a design column there.
    let n_columns = prepared.columns.len();
    let position_of = |column: usize| {
        prepared
            .columns
            .binary_search(&column)
            .unwrap_or(usize::MAX)
    };
    let aliased: Vec<usize> = aliased.iter().map(|&column| position_of(column)).collect();
    let n_used = prepared.weights.iter().filter(|w| **w > 0.0).count();
    let rank = active.len();
    let residual_df = n_used.saturating_sub(rank);
    let null_residual_df = n_used.saturating_sub(usize::from(options.has_intercept));

    let mut stop_reason = match (&outcome.status, &theta_failure) {
        (IrlsStatus::Failed(detail), _) => StopReason::NumericalFailure {
            detail: detail.clone(),
        },
        (_, Some(detail)) => StopReason::NumericalFailure {
            detail: detail.clone(),
        },
        (IrlsStatus::IterationLimit, None) => StopReason::IterationLimit {
            iterations: outcome.iterations,
        },
        (IrlsStatus::Stalled, None) => StopReason::NumericalFailure {
            detail: "the deviance stopped changing before the score vanished, with fitted \
                     probabilities numerically 0 or 1"
                .to_string(),
        },
        (IrlsStatus::Converged, None) if !aliased.is_empty() => StopReason::SingularDesign {
            columns: aliased.clone(),
        },
        (IrlsStatus::Converged, None) => StopReason::Converged {
            iterations: outcome.iterations,
        },
    };
    if options.method == Method::MaximumLikelihood
        && let Some(columns) = separation_columns(&kernel, &problem, active, &outcome)
    {
        stop_reason = StopReason::Separation {
            columns: columns.into_iter().map(position_of).collect(),
        };
    }

    let mut pearson_chi_square = 0.0;
    for i in 0..prepared.response.len() {
        let w = prepared.weights[i];
        if w > 0.0 {
            let residual = prepared.response[i] - outcome.means[i];
            pearson_chi_square += w * residual * residual / kernel.variance(outcome.means[i]);
        }
    }
    let dispersion_estimated = kernel.distribution == Distribution::Gamma;
    let dispersion = if dispersion_estimated {
        if residual_df == 0 {
            return Err(GlmError::NoResidualDegreesOfFreedom);
        }
        pearson_chi_square / residual_df as f64
    } else {
        1.0
    };

    let Some(factor) = ScaledCholesky::new(&outcome.information) else {
        return Err(GlmError::NumericalFailure {
            detail: "the information matrix is not invertible at the estimate".to_string(),
        });
    };
    let inverse_information = factor.inverse();
    let active_covariance = match options.covariance {
        CovarianceKind::ModelBased => &inverse_information * dispersion,
        CovarianceKind::SandwichHc0 => {
            let squared_scores: Vec<f64> = (0..prepared.response.len())
                .map(|i| {
                    let w = prepared.weights[i];
                    if w <= 0.0 {
                        return 0.0;
                    }
                    let eta = outcome.linear_predictor[i];
                    let mu = outcome.means[i];
                    let contribution =
                        w * (prepared.response[i] - mu) * kernel.mean_derivative(eta)
                            / kernel.variance(mu);
                    contribution * contribution
                })
                .collect();
            let (meat, _) = weighted_cross_product_from(
                &prepared.design,
                prepared.sparse_rows.as_deref(),
                active,
                &squared_scores,
                None,
            );
            &inverse_information * meat * &inverse_information
        }
    };

    let mut coefficients = vec![None; n_columns];
    let mut standard_errors = vec![None; n_columns];
    let mut covariance = DMatrix::<f64>::zeros(n_columns, n_columns);
    for (a, &column_a) in active.iter().enumerate() {
        let position_a = position_of(column_a);
        coefficients[position_a] = Some(outcome.coefficients[a]);
        standard_errors[position_a] = Some(active_covariance[(a, a)].max(0.0).sqrt());
        for (b, &column_b) in active.iter().enumerate() {
            covariance[(position_a, position_of(column_b))] = active_covariance[(a, b)];
        }
    }
    let log_likelihood = family::log_likelihood(
        &kernel,
        prepared.response,
        &outcome.means,
        &prepared.weights,
        outcome.deviance,
    );
    let null_deviance = null_deviance(&kernel, prepared, options);

    let finite = coefficients.iter().flatten().all(|v| v.is_finite())
        && covariance.iter().all(|v| v.is_finite())
        && outcome.deviance.is_finite()
        && log_likelihood.is_finite()
        && pearson_chi_square.is_finite()
        && outcome.means.iter().all(|v| v.is_finite())
        && outcome.linear_predictor.iter().all(|v| v.is_finite())
        && penalised_log_likelihood.is_none_or(|v| v.is_finite());
    if !finite {
        return Err(GlmError::NumericalFailure {
            detail: "the estimate, its covariance or its likelihood is not finite".to_string(),
        });
    }
    Ok(GlmFit {
        coefficients,
        standard_errors,
        covariance,
        covariance_kind: options.covariance,
        aliased_columns: aliased,
        rank,
        dispersion,
        dispersion_estimated,
        deviance: outcome.deviance,
        null_deviance: null_deviance.filter(|v| v.is_finite()),
        pearson_chi_square,
        log_likelihood,
        penalised_log_likelihood,
        residual_df,
        null_residual_df,
        iterations: outcome.iterations,
        stop_reason,
        theta,
        fitted_means: outcome.means,
        linear_predictors: outcome.linear_predictor,
    })
}
