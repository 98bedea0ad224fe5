//! Cumulative link models for ordinal endpoints: the proportional-odds (logit), probit and
//! complementary log-log fits, the nominal-effects (partial proportional odds) fit that lets a
//! chosen set of columns vary by cut-point so the caller can form the likelihood-ratio check of
//! proportionality, and the Brant-type Wald check built from separate binary logit fits.
//!
//! This module owns the numerics only. It takes a design matrix without an intercept column
//! (the cut-points play that role), category indices `0..n_categories`, optional case weights,
//! and returns estimates, their covariance and a [`StopReason`]. It must not read files, clocks
//! or the environment, must not print, must not compute p-values (callers do that from the
//! statistics and degrees of freedom returned here), and must never return NaN as a result.
//!
//! Model and sign convention (fixed for every report): for category index `j = 0..J-2`,
//! `g(P(Y <= j | x)) = theta_j - x'beta`, so `beta > 0` moves subjects toward higher
//! categories and, for the logit link, `exp(beta)` is the common odds ratio of being in a higher
//! category. This is the parametrisation of R's MASS and ordinal packages (zeta_j - eta).
//!
//! Parameter order everywhere (estimates, gradient, covariance): the `J-1` cut-points first, then
//! for the nominal-effects fit the per-cut-point effects of the nominal columns (cut-point 0's
//! `k` effects, then cut-point 1's, ...), then the coefficients of the remaining columns in their
//! design order.
//!
//! References: McCullagh P (1980) Regression models for ordinal data, JRSS B 42:109–142;
//! Agresti A (2010) Analysis of Ordinal Categorical Data, 2nd ed., Wiley, ch. 3–5 (cumulative
//! links, partial proportional odds); Pratt JW (1981) Concavity of the log likelihood, JASA
//! 76:103–106 (concavity for log-concave link densities, which makes plain Newton safe here);
//! Peterson B, Harrell FE (1990) Partial proportional odds models, Applied Statistics 39:205–217;
//! Brant R (1990) Assessing proportionality in the proportional odds model for ordinal logistic
//! regression, Biometrics 46:1171–1178.

#[allow(unused_imports)]
use crate::models::portable::Portable;
use std::fmt;

use nalgebra::{DMatrix, DVector};
use statrs::distribution::{ContinuousCDF, Normal};

use super::glm::linalg::{BlockNonZeros, ROW_BLOCK};
use super::{DesignColumns, StopReason, every_column, newton};

/// The link function `g` of a cumulative link model.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum CumulativeLink {
    /// `g(p) = log(p / (1 - p))`: the proportional-odds model.
    Logit,
    /// `g(p) = Φ⁻¹(p)`, the standard normal quantile.
    Probit,
    /// `g(p) = log(-log(1 - p))`, so `F(t) = 1 - exp(-exp(t))`.
    ComplementaryLogLog,
}

impl CumulativeLink {
    /// The inverse link `F(t) = P(Y <= j)` at `t = theta_j - eta`.
    pub fn cdf(self, t: f64) -> f64 {
        match self {
            CumulativeLink::Logit => {
                if t >= 0.0 {
                    1.0 / (1.0 + (-t).pexp())
                } else {
                    let e = t.pexp();
                    e / (1.0 + e)
                }
            }
            CumulativeLink::Probit => 0.5 * libm::erfc(-t / std::f64::consts::SQRT_2),
            CumulativeLink::ComplementaryLogLog => -(-t.pexp()).pexp_m1(),
        }
    }

    /// `1 - F(t)`, computed directly so that upper-tail probabilities keep full precision.
    fn survival(self, t: f64) -> f64 {
        match self {
            CumulativeLink::Logit => self.cdf(-t),
            CumulativeLink::Probit => 0.5 * libm::erfc(t / std::f64::consts::SQRT_2),
            CumulativeLink::ComplementaryLogLog => (-t.pexp()).pexp(),
        }
    }

    /// The density `f = F'` and its derivative `f'` at `t`.
    fn density_and_derivative(self, t: f64) -> (f64, f64) {
        match self {
            CumulativeLink::Logit => {
                let e = (-t.abs()).pexp();
                let density = e / ((1.0 + e) * (1.0 + e));
                // f' = f (1 - 2F); (1 - e)/(1 + e) equals 1 - 2F for t <= 0 and 2F - 1 above.
                let one_minus_two_cdf = if t >= 0.0 {
                    -(1.0 - e) / (1.0 + e)
                } else {
                    (1.0 - e) / (1.0 + e)
                };
                (density, density * one_minus_two_cdf)
            }
            CumulativeLink::Probit => {
                let density = (-0.5 * t * t).pexp() / (2.0 * std::f64::consts::PI).sqrt();
                (density, -t * density)
            }
            CumulativeLink::ComplementaryLogLog => {
                let e = t.pexp();
                let density = (t - e).pexp();
                (density, density * (1.0 - e))
            }
        }
    }

    /// The link itself, `g(p)`, used only for starting values (`0 < p < 1`).
    fn quantile(self, p: f64) -> f64 {
        match self {
            CumulativeLink::Logit => (p / (1.0 - p)).pln(),
            CumulativeLink::Probit => match Normal::new(0.0, 1.0) {
                Ok(normal) => normal.inverse_cdf(p),
                // Unreachable for the fixed parameters; a logit-scaled start is still valid.
                Err(_) => (p / (1.0 - p)).pln() / 1.7,
            },
            CumulativeLink::ComplementaryLogLog => (-(-p).pln_1p()).pln(),
        }
    }

    /// A distance on the latent scale beyond which a coefficient's effect over its column's range
    /// is implausible for real data; used, together with a huge standard error, to flag
    /// separation (the likelihood keeps rising as that coefficient grows without bound).
    fn divergence_scale(self) -> f64 {
        match self {
            CumulativeLink::Logit => 3.0,
            CumulativeLink::Probit => 2.0,
            CumulativeLink::ComplementaryLogLog => 2.0,
        }
    }
}

/// Options for the Newton–Raphson fit. Built with [`Default`] and adjusted field by field.
#[derive(Debug, Clone, PartialEq)]
pub struct CumulativeLinkOptions {
    /// Link function.
    pub link: CumulativeLink,
    /// Iteration cap (at least 1).
    pub max_iterations: usize,
    /// Convergence needs `max_r |gradient_r| / (total_weight * scale_r)` below this, where
    /// `scale_r` is 1 for cut-points and `1 + rms(x_c)` for a column's coefficient.
    pub gradient_tolerance: f64,
    /// Convergence also needs the last step's `|Δ log-likelihood| / (|log-likelihood| + 1e-3)`
    /// below this.
    pub log_likelihood_tolerance: f64,
}

impl Default for CumulativeLinkOptions {
    fn default() -> Self {
        CumulativeLinkOptions {
            link: CumulativeLink::Logit,
            max_iterations: 100,
            gradient_tolerance: 1e-10,
            log_likelihood_tolerance: 1e-10,
        }
    }
}

/// Bad input to an ordinal or nominal engine: the fit was not attempted.
#[derive(Debug, Clone, PartialEq)]
pub enum ModelInputError {
    /// The design has no rows.
    NoRows,
    /// Two inputs disagree in length.
    LengthMismatch {
        what: &'static str,
        expected: usize,
        found: usize,
    },
    /// A design entry is NaN or infinite.
    NonFiniteDesign { row: usize, column: usize },
    /// A weight is NaN, infinite or negative.
    InvalidWeight { row: usize, value: f64 },
    /// All weights are zero.
    NoPositiveWeight,
    /// A response index is not below the number of categories.
    ResponseOutOfRange {
        row: usize,
        category: usize,
        n_categories: usize,
    },
    /// Fewer than the minimum number of outcome categories.
    TooFewCategories { n_categories: usize, minimum: usize },
    /// A design column is constant over the analysed rows; in a cumulative link design this is an
    /// intercept, which the cut-points already provide.
    ConstantColumn { column: usize },
    /// A column index (nominal columns, Brant terms, reference category) is out of range or
    /// repeated.
    InvalidIndex {
        what: &'static str,
        index: usize,
        limit: usize,
    },
    /// The fit options are not usable.
    InvalidOptions { detail: String },
    /// The fit passed in carries no estimates (it stopped before estimating).
    NoEstimates,
}

impl fmt::Display for ModelInputError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            ModelInputError::NoRows => write!(f, "the design matrix has no rows"),
            ModelInputError::LengthMismatch {
                what,
                expected,
                found,
            } => {
                write!(
                    f,
                    "{what} has length {found}, expected {expected} (one per design row)"
                )
            }
            ModelInputError::NonFiniteDesign { row, column } => {
                write!(
                    f,
                    "design entry at row {row}, column {column} is not a finite number"
                )
            }
            ModelInputError::InvalidWeight { row, value } => {
                write!(
                    f,
                    "weight at row {row} is {value}, expected a finite number >= 0"
                )
            }
            ModelInputError::NoPositiveWeight => write!(f, "every weight is zero; nothing to fit"),
            ModelInputError::ResponseOutOfRange {
                row,
                category,
                n_categories,
            } => write!(
                f,
                "response at row {row} is category {category}, expected an index below {n_categories}"
            ),
            ModelInputError::TooFewCategories {
                n_categories,
                minimum,
            } => {
                write!(
                    f,
                    "{n_categories} outcome categories given, at least {minimum} are needed"
                )
            }
            ModelInputError::ConstantColumn { column } => write!(
                f,
                "design column {column} is constant; a cumulative link design must not contain an \
                 intercept (the cut-points take its place)"
            ),
            ModelInputError::InvalidIndex { what, index, limit } => {
                write!(
                    f,
                    "{what} {index} is out of range or repeated (expected distinct indices below {limit})"
                )
            }
            ModelInputError::InvalidOptions { detail } => {
                write!(f, "invalid fit options: {detail}")
            }
            ModelInputError::NoEstimates => write!(f, "the fit carries no estimates"),
        }
    }
}

impl std::error::Error for ModelInputError {}

/// Result of [`fit_cumulative_link`].
///
/// When `stop_reason` is `EmptyCategory` or `SingularDesign` the model was not estimated:
/// `cut_points` and `coefficients` are empty and `log_likelihood` and `covariance` are `None`.
/// For `IterationLimit`, `Separation` and `NumericalFailure` the estimates are the last finite
/// iterate and must not be reported as maximum-likelihood estimates.
#[derive(Debug, Clone, PartialEq)]
pub struct CumulativeLinkFit {
    pub link: CumulativeLink,
    pub n_categories: usize,
    /// `theta_0 < ... < theta_{J-2}`.
    pub cut_points: Vec<f64>,
    /// One per design column.
    pub coefficients: Vec<f64>,
    /// Inverse of the observed information (negative Hessian) at the estimate, cut-points first
    /// then coefficients; `None` when the information is not positive definite.
    pub covariance: Option<DMatrix<f64>>,
    pub log_likelihood: Option<f64>,
    /// Newton iterations taken.
    pub iterations: usize,
    pub stop_reason: StopReason,
    /// Rows with positive weight.
    pub n_observations: usize,
    /// Sum of the weights (the number of subjects for frequency weights).
    pub total_weight: f64,
}

/// Result of [`fit_nominal_effects`]; same conventions as [`CumulativeLinkFit`].
///
/// `n_rows_with_crossing` counts analysed rows whose fitted cumulative probabilities are not
/// increasing across cut-points at the final estimate; when it is positive the stop reason is
/// `NumericalFailure` saying so, because the fitted model then assigns negative probabilities.
#[derive(Debug, Clone, PartialEq)]
pub struct NominalEffectsFit {
    pub link: CumulativeLink,
    pub n_categories: usize,
    /// Design columns whose effects vary by cut-point, in the order given.
    pub nominal_columns: Vec<usize>,
    /// The remaining design columns, in design order.
    pub common_columns: Vec<usize>,
    pub cut_points: Vec<f64>,
    /// `(J-1) x k`: row `j` holds the nominal columns' effects at cut-point `j`
    /// (`g(P(Y <= j)) = theta_j - x_common'beta - z'gamma_j`).
    pub nominal_coefficients: DMatrix<f64>,
    /// Effects of `common_columns`.
    pub coefficients: Vec<f64>,
    /// Cut-points, then the nominal effects cut-point by cut-point, then `coefficients`.
    pub covariance: Option<DMatrix<f64>>,
    pub log_likelihood: Option<f64>,
    pub iterations: usize,
    pub stop_reason: StopReason,
    pub n_rows_with_crossing: usize,
    pub n_observations: usize,
    pub total_weight: f64,
}

/// Fits a cumulative link model by Newton–Raphson with analytic gradient and Hessian.
///
/// Requirements: `design` is `n x p` without an intercept column (a constant column is rejected
/// with [`ModelInputError::ConstantColumn`]); `response[i] < n_categories`, `n_categories >= 2`;
/// `weights`, if given, are finite and non-negative (frequency or prior weights: each row's
/// log-likelihood contribution is multiplied by its weight; zero-weight rows are ignored).
/// An outcome category with zero total weight stops with `StopReason::EmptyCategory` (merging
/// categories is the caller's decision); collinear columns stop with `SingularDesign`.
///
/// Method: starting values `theta_j = g(cumulative marginal proportion)`, `beta = 0`; each
/// iteration solves the Newton system with the observed information, then halves the step until
/// the cut-points stay strictly ordered and the log-likelihood does not decrease. Standard
/// errors come from the inverse observed information at the estimate, as R's ordinal and MASS
/// packages report them. Convergence needs both criteria of [`CumulativeLinkOptions`].
///
/// Separation (the likelihood's supremum is approached as a coefficient grows without bound) is
/// recognised after the iterations stop: a coefficient is flagged when its effect across its
/// column's observed range exceeds 3 on the logit scale (2 for probit and complementary
/// log-log) and its standard error is more than ten times its size, or the information is no
/// longer invertible. The flagged design columns are reported in `StopReason::Separation`.
pub fn fit_cumulative_link(
    design: &DMatrix<f64>,
    response: &[usize],
    n_categories: usize,
    weights: Option<&[f64]>,
    options: &CumulativeLinkOptions,
) -> Result<CumulativeLinkFit, ModelInputError> {
    let all = every_column(design.ncols());
    let view = DesignColumns::new(design, &all).expect("every column is in range");
    fit_cumulative_link_on(view, response, n_categories, weights, options)
}

/// [`fit_cumulative_link`] on some columns of a design, read in place (no copy); the fit's
/// coefficients and column indices count positions in the view.
pub fn fit_cumulative_link_on(
    design: DesignColumns<'_>,
    response: &[usize],
    n_categories: usize,
    weights: Option<&[f64]>,
    options: &CumulativeLinkOptions,
) -> Result<CumulativeLinkFit, ModelInputError> {
    let outcome = fit_engine(design, response, n_categories, weights, &[], options)?;
    let n_cut_points = n_categories - 1;
    let (cut_points, coefficients) = match &outcome.parameters {
        Some(parameters) => (
            parameters[..n_cut_points].to_vec(),
            parameters[n_cut_points..].to_vec(),
        ),
        None => (Vec::new(), Vec::new()),
    };
    Ok(CumulativeLinkFit {
        link: options.link,
        n_categories,
        cut_points,
        coefficients,
        covariance: outcome.covariance,
        log_likelihood: outcome.log_likelihood,
        iterations: outcome.iterations,
        stop_reason: outcome.stop_reason,
        n_observations: outcome.n_observations,
        total_weight: outcome.total_weight,
    })
}

/// Fits the nominal-effects (partial proportional odds) model
/// `g(P(Y <= j)) = theta_j - x_common'beta - z'gamma_j`, where `z` are the design columns listed
/// in `nominal_columns`. Compared with [`fit_cumulative_link`] on the same data it has
/// `(J-2) * k` more parameters, so `2 (logLik_nominal - logLik_PO)` is the likelihood-ratio
/// statistic for proportionality of those columns on `(J-2) * k` degrees of freedom.
///
/// Same requirements and method as [`fit_cumulative_link`], except that the cut-points need not
/// be ordered (the nominal effects shift them row by row); a step is accepted only if every
/// analysed row keeps a positive probability for its observed category. The fitted cumulative
/// probabilities can still cross for some rows; see [`NominalEffectsFit::n_rows_with_crossing`].
pub fn fit_nominal_effects(
    design: &DMatrix<f64>,
    response: &[usize],
    n_categories: usize,
    weights: Option<&[f64]>,
    nominal_columns: &[usize],
    options: &CumulativeLinkOptions,
) -> Result<NominalEffectsFit, ModelInputError> {
    let all = every_column(design.ncols());
    let view = DesignColumns::new(design, &all).expect("every column is in range");
    fit_nominal_effects_on(
        view,
        response,
        n_categories,
        weights,
        nominal_columns,
        options,
    )
}

/// [`fit_nominal_effects`] on some columns of a design, read in place (no copy);
/// `nominal_columns` and the fit's column indices count positions in the view.
pub fn fit_nominal_effects_on(
    design: DesignColumns<'_>,
    response: &[usize],
    n_categories: usize,
    weights: Option<&[f64]>,
    nominal_columns: &[usize],
    options: &CumulativeLinkOptions,
) -> Result<NominalEffectsFit, ModelInputError> {
    let n_columns = design.ncols();
    for (position, &column) in nominal_columns.iter().enumerate() {
        if column >= n_columns || nominal_columns[..position].contains(&column) {
            return Err(ModelInputError::InvalidIndex {
                what: "nominal column",
                index: column,
                limit: n_columns,
            });
        }
    }
    let outcome = fit_engine(
        design,
        response,
        n_categories,
        weights,
        nominal_columns,
        options,
    )?;
    let n_cut_points = n_categories - 1;
    let n_nominal = nominal_columns.len();
    let common_columns: Vec<usize> = (0..n_columns)
        .filter(|c| !nominal_columns.contains(c))
        .collect();
    let (cut_points, nominal_coefficients, coefficients) = match &outcome.parameters {
        Some(parameters) => {
            let gamma_end = n_cut_points * (1 + n_nominal);
            (
                parameters[..n_cut_points].to_vec(),
                DMatrix::from_row_slice(
                    n_cut_points,
                    n_nominal,
                    &parameters[n_cut_points..gamma_end],
                ),
                parameters[gamma_end..].to_vec(),
            )
        }
        None => (Vec::new(), DMatrix::zeros(0, n_nominal), Vec::new()),
    };
    Ok(NominalEffectsFit {
        link: options.link,
        n_categories,
        nominal_columns: nominal_columns.to_vec(),
        common_columns,
        cut_points,
        nominal_coefficients,
        coefficients,
        covariance: outcome.covariance,
        log_likelihood: outcome.log_likelihood,
        iterations: outcome.iterations,
        stop_reason: outcome.stop_reason,
        n_rows_with_crossing: outcome.n_rows_with_crossing,
        n_observations: outcome.n_observations,
        total_weight: outcome.total_weight,
    })
}

/// Per-row fitted category probabilities `P(Y = j | x_i)` of a cumulative link fit, as an
/// `n x J` matrix (rows of `design`, which must have the fit's columns).
pub fn cumulative_link_probabilities(
    fit: &CumulativeLinkFit,
    design: &DMatrix<f64>,
) -> Result<DMatrix<f64>, ModelInputError> {
    if fit.cut_points.len() + 1 != fit.n_categories {
        return Err(ModelInputError::NoEstimates);
    }
    if design.ncols() != fit.coefficients.len() {
        return Err(ModelInputError::LengthMismatch {
            what: "design columns",
            expected: fit.coefficients.len(),
            found: design.ncols(),
        });
    }
    check_finite_design(design)?;
    let n_rows = design.nrows();
    let n_categories = fit.n_categories;
    let mut probabilities = DMatrix::zeros(n_rows, n_categories);
    for row in 0..n_rows {
        let eta: f64 = (0..design.ncols())
            .map(|c| design[(row, c)] * fit.coefficients[c])
            .sum();
        for category in 0..n_categories {
            let upper = (category + 1 < n_categories).then(|| fit.cut_points[category] - eta);
            let lower = (category > 0).then(|| fit.cut_points[category - 1] - eta);
            probabilities[(row, category)] = interval_probability(fit.link, upper, lower).max(0.0);
        }
    }
    Ok(probabilities)
}

/// A Wald statistic and its degrees of freedom (the caller computes the p-value).
#[derive(Debug, Clone, PartialEq)]
pub struct WaldStatistic {
    pub statistic: f64,
    pub df: usize,
}

/// Result of [`brant_test`].
#[derive(Debug, Clone, PartialEq)]
pub struct BrantTest {
    /// `Converged` when every binary split converged and the statistics exist; otherwise the
    /// first split's problem (e.g. `Separation`, with the implicated design columns).
    pub stop_reason: StopReason,
    /// Index `j` of the split `Y > j` that stopped the test, if one did.
    pub failed_split: Option<usize>,
    /// `(J-1) x p`: row `j` holds the slopes of the binary logit fit for `Y > j`.
    pub split_coefficients: DMatrix<f64>,
    /// Equality of all slopes across splits: `df = (J-2) p`.
    pub overall: Option<WaldStatistic>,
    /// One per term given, `df = (J-2) * columns in the term`.
    pub terms: Vec<WaldStatistic>,
}

/// Brant's (1990) Wald check of the proportional-odds assumption for the logit link.
///
/// For each split `Y > j` (`j = 0..J-2`) a binary logit with intercept is fitted to the design;
/// the stacked estimates get Brant's joint covariance
/// `Var(b_j) = (X'W_jj X)^-1`, `Cov(b_j, b_l) = (X'W_jj X)^-1 (X'W_jl X) (X'W_ll X)^-1`,
/// `W_jl = diag(w_i (pi_il - pi_ij pi_il))` for `j < l`, `W_jj = diag(w_i pi_ij (1 - pi_ij))`,
/// where `pi_ij` is the fitted `P(Y > j | x_i)` of split `j` and `X` includes the intercept.
/// The statistic for a set of columns is `(D b)'(D V D')^-1 (D b)` with `D` contrasting split 0's
/// slopes with every other split's. `terms` lists groups of design columns (e.g. the indicator
/// columns of one factor); the overall test uses all columns.
///
/// Requirements as for [`fit_cumulative_link`], with `n_categories >= 3`. A separated split
/// stops the test (`stop_reason`, no statistics).
pub fn brant_test(
    design: &DMatrix<f64>,
    response: &[usize],
    n_categories: usize,
    weights: Option<&[f64]>,
    terms: &[Vec<usize>],
) -> Result<BrantTest, ModelInputError> {
    let n_columns = design.ncols();
    if n_categories < 3 {
        return Err(ModelInputError::TooFewCategories {
            n_categories,
            minimum: 3,
        });
    }
    let all = every_column(n_columns);
    let view = DesignColumns::new(design, &all).expect("every column is in range");
    let prepared = prepare(view, response, n_categories, weights)?;
    for term in terms {
        for (position, &column) in term.iter().enumerate() {
            if column >= n_columns || term[..position].contains(&column) {
                return Err(ModelInputError::InvalidIndex {
                    what: "term column",
                    index: column,
                    limit: n_columns,
                });
            }
        }
    }
    let n_splits = n_categories - 1;
    let mut split_coefficients = DMatrix::zeros(n_splits, n_columns);
    let not_run =
        |stop_reason: StopReason, failed_split: Option<usize>, split_coefficients| BrantTest {
            stop_reason,
            failed_split,
            split_coefficients,
            overall: None,
            terms: Vec::new(),
        };
    if let Some(category) = prepared.empty_category {
        return Ok(not_run(
            StopReason::EmptyCategory { category },
            None,
            split_coefficients,
        ));
    }
    if !prepared.aliased_columns.is_empty() {
        return Ok(not_run(
            StopReason::SingularDesign {
                columns: prepared.aliased_columns,
            },
            None,
            split_coefficients,
        ));
    }

    // Binary fits and their fitted probabilities, one column of `fitted` per split.
    let n_rows = design.nrows();
    let mut fitted = DMatrix::zeros(n_rows, n_splits);
    for split in 0..n_splits {
        let binary_response: Vec<bool> =
            response.iter().map(|&category| category > split).collect();
        let binary = binary_logit(design, &binary_response, &prepared.weights);
        for c in 0..n_columns {
            split_coefficients[(split, c)] = binary.coefficients[c + 1];
        }
        if !matches!(binary.stop_reason, StopReason::Converged { .. }) {
            return Ok(not_run(binary.stop_reason, Some(split), split_coefficients));
        }
        for row in 0..n_rows {
            fitted[(row, split)] = binary.fitted[row];
        }
    }

    // Brant's joint covariance of the stacked (intercept, slopes) vectors.
    let block = n_columns + 1;
    let weighted_cross_product = |row_weight: &dyn Fn(usize) -> f64| {
        let mut cross = DMatrix::<f64>::zeros(block, block);
        let mut x_row = vec![0.0; block];
        for row in 0..n_rows {
            let w = row_weight(row);
            if w == 0.0 {
                continue;
            }
            x_row[0] = 1.0;
            for c in 0..n_columns {
                x_row[c + 1] = design[(row, c)];
            }
            for r in 0..block {
                for s in r..block {
                    cross[(r, s)] += w * x_row[r] * x_row[s];
                }
            }
        }
        cross.fill_lower_triangle_with_upper_triangle();
        cross
    };
    let mut information_inverses = Vec::with_capacity(n_splits);
    for split in 0..n_splits {
        let information = weighted_cross_product(&|row| {
            let p = fitted[(row, split)];
            prepared.weights[row] * p * (1.0 - p)
        });
        match information.cholesky() {
            Some(cholesky) => information_inverses.push(cholesky.inverse()),
            None => {
                return Ok(not_run(
                    StopReason::NumericalFailure {
                        detail: format!(
                            "the information matrix of binary split {split} is not positive definite"
                        ),
                    },
                    Some(split),
                    split_coefficients,
                ));
            }
        }
    }
    let mut joint = DMatrix::zeros(n_splits * block, n_splits * block);
    for first in 0..n_splits {
        for second in first..n_splits {
            let covariance_block = if first == second {
                information_inverses[first].clone()
            } else {
                let cross = weighted_cross_product(&|row| {
                    let p_first = fitted[(row, first)];
                    let p_second = fitted[(row, second)];
                    prepared.weights[row] * (p_second - p_first * p_second)
                });
                &information_inverses[first] * cross * &information_inverses[second]
            };
            joint
                .view_mut((first * block, second * block), (block, block))
                .copy_from(&covariance_block);
            if first != second {
                joint
                    .view_mut((second * block, first * block), (block, block))
                    .copy_from(&covariance_block.transpose());
            }
        }
    }

    let wald_for = |columns: &[usize]| -> Option<WaldStatistic> {
        let n_contrasts = (n_splits - 1) * columns.len();
        if n_contrasts == 0 {
            return Some(WaldStatistic {
                statistic: 0.0,
                df: 0,
            });
        }
        // Each contrast is slope(split 0, c) - slope(split j, c); index into `joint` skips the
        // intercept of each block.
        let index = |split: usize, column: usize| split * block + 1 + column;
        let mut difference = DVector::zeros(n_contrasts);
        let mut pairs = Vec::with_capacity(n_contrasts);
        for split in 1..n_splits {
            for &column in columns {
                difference[pairs.len()] =
                    split_coefficients[(0, column)] - split_coefficients[(split, column)];
                pairs.push((index(0, column), index(split, column)));
            }
        }
        let mut contrast_covariance = DMatrix::zeros(n_contrasts, n_contrasts);
        for (r, &(r_first, r_second)) in pairs.iter().enumerate() {
            for (s, &(s_first, s_second)) in pairs.iter().enumerate() {
                contrast_covariance[(r, s)] = joint[(r_first, s_first)]
                    - joint[(r_first, s_second)]
                    - joint[(r_second, s_first)]
                    + joint[(r_second, s_second)];
            }
        }
        let cholesky = contrast_covariance.cholesky()?;
        let solved = cholesky.solve(&difference);
        let statistic = difference.dot(&solved);
        statistic.is_finite().then_some(WaldStatistic {
            statistic,
            df: n_contrasts,
        })
    };
    let all_columns: Vec<usize> = (0..n_columns).collect();
    let overall = wald_for(&all_columns);
    let mut term_statistics = Vec::with_capacity(terms.len());
    for term in terms {
        match wald_for(term) {
            Some(statistic) => term_statistics.push(statistic),
            None => {
                return Ok(not_run(
                    StopReason::NumericalFailure {
                        detail:
                            "the covariance of the split-slope contrasts is not positive definite"
                                .to_string(),
                    },
                    None,
                    split_coefficients,
                ));
            }
        }
    }
    match overall {
        Some(overall) => Ok(BrantTest {
            stop_reason: StopReason::Converged { iterations: 0 },
            failed_split: None,
            split_coefficients,
            overall: Some(overall),
            terms: term_statistics,
        }),
        None => Ok(not_run(
            StopReason::NumericalFailure {
                detail: "the covariance of the split-slope contrasts is not positive definite"
                    .to_string(),
            },
            None,
            split_coefficients,
        )),
    }
}

// ---------------------------------------------------------------------------------------------
// Input checks shared by the engines of this module (and the multinomial module).

/// Validated inputs: weights resolved, category totals, aliasing found.
pub(crate) struct PreparedInput {
    pub(crate) weights: Vec<f64>,
    pub(crate) total_weight: f64,
    pub(crate) n_observations: usize,
    pub(crate) category_weight: Vec<f64>,
    pub(crate) empty_category: Option<usize>,
    pub(crate) aliased_columns: Vec<usize>,
    /// Weighted root-mean-square of each column (scales the gradient criterion).
    pub(crate) column_rms: Vec<f64>,
    /// Range (max - min) of each column over analysed rows.
    pub(crate) column_range: Vec<f64>,
}

pub(crate) fn check_finite_design(design: &DMatrix<f64>) -> Result<(), ModelInputError> {
    let all = every_column(design.ncols());
    check_finite_columns(DesignColumns::new(design, &all).expect("every column is in range"))
}

pub(crate) fn check_finite_columns(design: DesignColumns<'_>) -> Result<(), ModelInputError> {
    let first = design.design().first_non_finite(design.design_columns());
    match first {
        Some((column, row)) => Err(ModelInputError::NonFiniteDesign { row, column }),
        None => Ok(()),
    }
}

/// Checks shapes, finiteness, weights and response range; finds empty categories and aliased
/// columns. Constant columns are an error here (no intercept allowed); the multinomial engine
/// calls [`prepare_with_intercept`] instead.
fn prepare(
    design: DesignColumns<'_>,
    response: &[usize],
    n_categories: usize,
    weights: Option<&[f64]>,
) -> Result<PreparedInput, ModelInputError> {
    let prepared = prepare_common(design, response, n_categories, weights)?;
    for column in 0..design.ncols() {
        if prepared.column_range[column] == 0.0 {
            return Err(ModelInputError::ConstantColumn { column });
        }
    }
    let aliased_columns =
        aliased_columns_with_implicit_intercept(design, &prepared.weights, prepared.total_weight);
    Ok(PreparedInput {
        aliased_columns,
        ..prepared
    })
}

pub(crate) fn prepare_common(
    design: DesignColumns<'_>,
    response: &[usize],
    n_categories: usize,
    weights: Option<&[f64]>,
) -> Result<PreparedInput, ModelInputError> {
    let n_rows = design.nrows();
    if n_rows == 0 {
        return Err(ModelInputError::NoRows);
    }
    if n_categories < 2 {
        return Err(ModelInputError::TooFewCategories {
            n_categories,
            minimum: 2,
        });
    }
    if response.len() != n_rows {
        return Err(ModelInputError::LengthMismatch {
            what: "response",
            expected: n_rows,
            found: response.len(),
        });
    }
    check_finite_columns(design)?;
    let weights: Vec<f64> = match weights {
        Some(given) => {
            if given.len() != n_rows {
                return Err(ModelInputError::LengthMismatch {
                    what: "weights",
                    expected: n_rows,
                    found: given.len(),
                });
            }
            for (row, &value) in given.iter().enumerate() {
                if !value.is_finite() || value < 0.0 {
                    return Err(ModelInputError::InvalidWeight { row, value });
                }
            }
            given.to_vec()
        }
        None => vec![1.0; n_rows],
    };
    let mut category_weight = vec![0.0; n_categories];
    for (row, &category) in response.iter().enumerate() {
        if category >= n_categories {
            return Err(ModelInputError::ResponseOutOfRange {
                row,
                category,
                n_categories,
            });
        }
        category_weight[category] += weights[row];
    }
    let total_weight: f64 = weights.iter().sum();
    if total_weight <= 0.0 {
        return Err(ModelInputError::NoPositiveWeight);
    }
    let n_observations = weights.iter().filter(|&&w| w > 0.0).count();
    let empty_category = category_weight.iter().position(|&w| w <= 0.0);
    let n_columns = design.ncols();
    // Per column, over the rows of positive weight in order: range and weighted mean square.
    // Blocks of rows are read for every column at once (one pass over a block's stored
    // entries when the design is held as rows).
    let mut minimum = vec![f64::INFINITY; n_columns];
    let mut maximum = vec![f64::NEG_INFINITY; n_columns];
    let mut sum_squares = vec![0.0; n_columns];
    let block_rows = crate::models::glm::linalg::ROW_BLOCK;
    let mut block = vec![0.0; block_rows * n_columns];
    let mut start = 0;
    while start < n_rows {
        let end = (start + block_rows).min(n_rows);
        design.block_columns_into(start..end, &mut block, block_rows);
        for column in 0..n_columns {
            let values = &block[column * block_rows..column * block_rows + (end - start)];
            for (row, &value) in (start..end).zip(values) {
                if weights[row] > 0.0 {
                    minimum[column] = minimum[column].min(value);
                    maximum[column] = maximum[column].max(value);
                    sum_squares[column] += weights[row] * value * value;
                }
            }
        }
        start = end;
    }
    let column_rms: Vec<f64> = sum_squares
        .iter()
        .map(|&sum| (sum / total_weight).sqrt())
        .collect();
    let column_range: Vec<f64> = maximum
        .iter()
        .zip(&minimum)
        .map(|(&high, &low)| high - low)
        .collect();
    Ok(PreparedInput {
        weights,
        total_weight,
        n_observations,
        category_weight,
        empty_category,
        aliased_columns: Vec::new(),
        column_rms,
        column_range,
    })
}

/// Columns that are (numerically) linear combinations of earlier columns and a constant: a
/// Cholesky-like sweep of the weighted, centred cross-product matrix in column order, flagging a
/// column whose residual sum of squares falls below 1e-9 of its centred sum of squares.
pub(crate) fn aliased_columns_with_implicit_intercept(
    design: DesignColumns<'_>,
    weights: &[f64],
    total_weight: f64,
) -> Vec<usize> {
    let n_columns = design.ncols();
    let n_rows = design.nrows();
    // Blocks of rows of every column at once (one pass over a block's stored entries when the
    // design is held as rows).
    let block_rows = crate::models::glm::linalg::ROW_BLOCK;
    let mut block_values = vec![0.0; block_rows * n_columns];
    // Weighted column sums over the rows in order, from −0.0 as an iterator's sum starts.
    let mut sums = vec![-0.0_f64; n_columns];
    let mut start = 0;
    while start < n_rows {
        let end = (start + block_rows).min(n_rows);
        design.block_columns_into(start..end, &mut block_values, block_rows);
        for (c, sum) in sums.iter_mut().enumerate() {
            let values = &block_values[c * block_rows..c * block_rows + (end - start)];
            for (x, w) in values.iter().zip(&weights[start..end]) {
                *sum += w * x;
            }
        }
        start = end;
    }
    let means: Vec<f64> = sums.iter().map(|sum| sum / total_weight).collect();
    // Blocks of rows, centred column by column into contiguous buffers (one of them
    // weighted), so that every product below reads two contiguous slices.
    let mut centred = vec![0.0; block_rows * n_columns];
    let mut weighted = vec![0.0; block_rows * n_columns];
    let mut cross = DMatrix::<f64>::zeros(n_columns, n_columns);
    let mut start = 0;
    while start < n_rows {
        let end = (start + block_rows).min(n_rows);
        let length = end - start;
        design.block_columns_into(start..end, &mut block_values, block_rows);
        for c in 0..n_columns {
            let values = &block_values[c * block_rows..c * block_rows + length];
            let slot = c * block_rows;
            for (i, (&x, &w)) in values.iter().zip(&weights[start..end]).enumerate() {
                let value = x - means[c];
                centred[slot + i] = value;
                weighted[slot + i] = w * value;
            }
        }
        for r in 0..n_columns {
            let a = &weighted[r * block_rows..r * block_rows + length];
            for s in r..n_columns {
                let b = &centred[s * block_rows..s * block_rows + length];
                cross[(r, s)] += dot(a, b);
            }
        }
        start = end;
    }
    sweep_for_aliasing(cross)
}

/// Σ aᵢbᵢ with four independent partial sums, so the additions overlap.
fn dot(a: &[f64], b: &[f64]) -> f64 {
    let length = a.len().min(b.len());
    let (a, b) = (&a[..length], &b[..length]);
    let mut sums = [0.0_f64; 4];
    let mut i = 0;
    while i + 4 <= length {
        for k in 0..4 {
            sums[k] += a[i + k] * b[i + k];
        }
        i += 4;
    }
    let mut total = (sums[0] + sums[1]) + (sums[2] + sums[3]);
    while i < length {
        total += a[i] * b[i];
        i += 1;
    }
    total
}

/// Given an upper-triangle-filled symmetric positive semi-definite matrix, returns the indices
/// whose pivots vanish relative to their original diagonal in an in-order elimination.
pub(crate) fn sweep_for_aliasing(mut cross: DMatrix<f64>) -> Vec<usize> {
    let n = cross.nrows();
    let original_diagonal: Vec<f64> = (0..n).map(|c| cross[(c, c)]).collect();
    let mut aliased = Vec::new();
    for pivot in 0..n {
        let pivot_value = cross[(pivot, pivot)];
        // Written so that a NaN pivot also counts as aliased.
        if pivot_value.is_nan()
            || pivot_value <= 1e-9 * original_diagonal[pivot]
            || original_diagonal[pivot] <= 0.0
        {
            aliased.push(pivot);
            continue;
        }
        for r in pivot + 1..n {
            let factor = cross[(pivot, r)] / pivot_value;
            for s in r..n {
                cross[(r, s)] -= factor * cross[(pivot, s)];
            }
        }
    }
    aliased
}

/// `F(upper) - F(lower)` with `None` standing for +∞ / -∞, computed from whichever tail keeps
/// precision. Returns a non-positive value when `upper <= lower`.
fn interval_probability(link: CumulativeLink, upper: Option<f64>, lower: Option<f64>) -> f64 {
    match (upper, lower) {
        (Some(u), None) => link.cdf(u),
        (None, Some(l)) => link.survival(l),
        (None, None) => 1.0,
        (Some(u), Some(l)) => {
            if u <= l {
                return 0.0;
            }
            let cdf_lower = link.cdf(l);
            if cdf_lower > 0.5 {
                link.survival(l) - link.survival(u)
            } else {
                link.cdf(u) - cdf_lower
            }
        }
    }
}

// ---------------------------------------------------------------------------------------------
// The Newton–Raphson engine shared by the proportional and nominal-effects fits.

struct EngineOutcome {
    parameters: Option<Vec<f64>>,
    covariance: Option<DMatrix<f64>>,
    log_likelihood: Option<f64>,
    iterations: usize,
    stop_reason: StopReason,
    n_rows_with_crossing: usize,
    n_observations: usize,
    total_weight: f64,
}

/// Layout of the parameter vector and everything one pass over the rows needs.
struct Problem<'a> {
    link: CumulativeLink,
    design: DesignColumns<'a>,
    n_rows: usize,
    response: &'a [usize],
    weights: &'a [f64],
    n_categories: usize,
    nominal_columns: &'a [usize],
    common_columns: Vec<usize>,
    n_parameters: usize,
}

/// Reusable buffers so that a pass over the rows allocates nothing.
struct Workspace {
    gradient: Vec<f64>,
    /// Row-major `n_parameters^2`; only entries `(r, s)` with `r <= s` are accumulated.
    hessian: Vec<f64>,
    local_index: Vec<usize>,
    upper_derivative: Vec<f64>,
    lower_derivative: Vec<f64>,
    combined: Vec<f64>,
    nominal_values: Vec<f64>,
    /// Local positions that contribute in the current row: the cut-point and nominal
    /// positions of the blocks present and the common columns whose value is not zero.
    contributing: Vec<usize>,
    /// The non-zero common-column entries of a block of rows, gathered column by column.
    non_zeros: BlockNonZeros,
}

/// One pass of the cumulative link likelihood over the rows, for the shared Newton driver.
struct Pass<'p, 'a> {
    problem: &'p Problem<'a>,
    workspace: &'p mut Workspace,
}

impl newton::Likelihood for Pass<'_, '_> {
    fn admissible(&self, parameters: &[f64]) -> bool {
        self.problem.admissible(parameters)
    }

    fn evaluate(&mut self, parameters: &[f64]) -> Option<f64> {
        match self.problem.evaluate(parameters, true, self.workspace) {
            Evaluation::Feasible { log_likelihood } => Some(log_likelihood),
            Evaluation::Infeasible => None,
        }
    }

    fn gradient(&self) -> &[f64] {
        &self.workspace.gradient
    }

    fn hessian_upper(&self) -> &[f64] {
        &self.workspace.hessian
    }
}

enum Evaluation {
    /// Some analysed row has a non-positive (or non-finite) probability for its category.
    Infeasible,
    Feasible {
        log_likelihood: f64,
    },
}

impl Problem<'_> {
    fn n_cut_points(&self) -> usize {
        self.n_categories - 1
    }

    fn gamma_offset(&self, cut_point: usize) -> usize {
        self.n_cut_points() + cut_point * self.nominal_columns.len()
    }

    fn beta_offset(&self) -> usize {
        self.n_cut_points() * (1 + self.nominal_columns.len())
    }

    fn value(&self, row: usize, column: usize) -> f64 {
        self.design.get(row, column)
    }

    /// One pass over the rows: log-likelihood and, when asked, gradient and Hessian of the
    /// log-likelihood accumulated into `workspace`.
    ///
    /// For a row in category j with `u = theta_j - eta_j`, `l = theta_{j-1} - eta_{j-1}` and
    /// `P = F(u) - F(l)`, write `a = f(u)/P`, `b = f(l)/P`, `a' = f'(u)/P`, `b' = f'(l)/P` and
    /// `du`, `dl` for the derivatives of `u`, `l` with respect to the parameters. Then
    /// `d log P = a du - b dl` and `d² log P = a' du du' - b' dl dl' - (a du - b dl)(a du - b dl)'`.
    fn evaluate(
        &self,
        parameters: &[f64],
        with_derivatives: bool,
        workspace: &mut Workspace,
    ) -> Evaluation {
        let n_cut_points = self.n_cut_points();
        let n_nominal = self.nominal_columns.len();
        let n_parameters = self.n_parameters;
        let beta_offset = self.beta_offset();
        let block = 1 + n_nominal;
        if with_derivatives {
            workspace.gradient.iter_mut().for_each(|v| *v = 0.0);
            workspace.hessian.iter_mut().for_each(|v| *v = 0.0);
        }
        let mut log_likelihood = crate::models::CompensatedSum::default();
        // Local layout: [upper block (theta_j, gamma_j)] [lower block] [the row's non-zero
        // common coefficients, in column order].
        let mut block_start = 0;
        while block_start < self.n_rows {
            let block_end = (block_start + ROW_BLOCK).min(self.n_rows);
            self.design.gather(
                &mut workspace.non_zeros,
                &self.common_columns,
                block_start..block_end,
            );
            for row in block_start..block_end {
                let weight = self.weights[row];
                if weight == 0.0 {
                    continue;
                }
                let category = self.response[row];
                // A zero entry would add ±0 to the linear predictor and its derivatives are ±0,
                // which leaves every sum below unchanged bit for bit; only the non-zeros are kept.
                let (positions, values) = workspace.non_zeros.row(row - block_start);
                let local_size = 2 * block + positions.len();
                let mut eta_common = 0.0;
                for (k, (&position, &value)) in positions.iter().zip(values).enumerate() {
                    eta_common += value * parameters[beta_offset + position];
                    workspace.local_index[2 * block + k] = beta_offset + position;
                    workspace.upper_derivative[2 * block + k] = -value;
                    workspace.lower_derivative[2 * block + k] = -value;
                }
                for (position, &column) in self.nominal_columns.iter().enumerate() {
                    workspace.nominal_values[position] = self.value(row, column);
                }
                let cut_value = |cut_point: usize, values: &[f64]| {
                    let gamma = self.gamma_offset(cut_point);
                    let mut shift = 0.0;
                    for m in 0..n_nominal {
                        shift += values[m] * parameters[gamma + m];
                    }
                    parameters[cut_point] - eta_common - shift
                };
                let upper = (category < n_cut_points)
                    .then(|| cut_value(category, &workspace.nominal_values));
                let lower =
                    (category > 0).then(|| cut_value(category - 1, &workspace.nominal_values));
                let probability = interval_probability(self.link, upper, lower);
                if probability.is_nan() || probability <= 0.0 || !probability.is_finite() {
                    return Evaluation::Infeasible;
                }
                log_likelihood.add(weight * probability.pln());
                if !with_derivatives {
                    continue;
                }
                let (a, a_prime) = match upper {
                    Some(u) => {
                        let (density, derivative) = self.link.density_and_derivative(u);
                        (density / probability, derivative / probability)
                    }
                    None => (0.0, 0.0),
                };
                let (b, b_prime) = match lower {
                    Some(l) => {
                        let (density, derivative) = self.link.density_and_derivative(l);
                        (density / probability, derivative / probability)
                    }
                    None => (0.0, 0.0),
                };
                // Fill the local derivative vectors; an absent block gets index usize::MAX.
                for m in 0..block {
                    workspace.upper_derivative[m] = 0.0;
                    workspace.lower_derivative[m] = 0.0;
                    workspace.upper_derivative[block + m] = 0.0;
                    workspace.lower_derivative[block + m] = 0.0;
                }
                if upper.is_some() {
                    workspace.local_index[0] = category;
                    workspace.upper_derivative[0] = 1.0;
                    let gamma = self.gamma_offset(category);
                    for m in 0..n_nominal {
                        workspace.local_index[1 + m] = gamma + m;
                        workspace.upper_derivative[1 + m] = -workspace.nominal_values[m];
                    }
                } else {
                    for m in 0..block {
                        workspace.local_index[m] = usize::MAX;
                    }
                }
                if lower.is_some() {
                    workspace.local_index[block] = category - 1;
                    workspace.lower_derivative[block] = 1.0;
                    let gamma = self.gamma_offset(category - 1);
                    for m in 0..n_nominal {
                        workspace.local_index[block + 1 + m] = gamma + m;
                        workspace.lower_derivative[block + 1 + m] = -workspace.nominal_values[m];
                    }
                } else {
                    for m in 0..block {
                        workspace.local_index[block + m] = usize::MAX;
                    }
                }
                for r in 0..local_size {
                    workspace.combined[r] =
                        a * workspace.upper_derivative[r] - b * workspace.lower_derivative[r];
                }
                // Only the row's non-zero common columns are in the local layout: a zero one adds
                // ±0 to every gradient and Hessian entry it touches (its derivatives are ±0 and all
                // factors are finite), which leaves each sum unchanged bit for bit, so the pass
                // costs the square of the row's non-zeros (one site dummy of many), not of p.
                workspace.contributing.clear();
                for r in 0..local_size {
                    if workspace.local_index[r] != usize::MAX {
                        workspace.contributing.push(r);
                    }
                }
                for (position_r, &r) in workspace.contributing.iter().enumerate() {
                    let global_r = workspace.local_index[r];
                    let combined_r = workspace.combined[r];
                    workspace.gradient[global_r] += weight * combined_r;
                    let upper_r = a_prime * workspace.upper_derivative[r];
                    let lower_r = b_prime * workspace.lower_derivative[r];
                    for &s in &workspace.contributing[position_r..] {
                        let global_s = workspace.local_index[s];
                        let term = upper_r * workspace.upper_derivative[s]
                            - lower_r * workspace.lower_derivative[s]
                            - combined_r * workspace.combined[s];
                        let (first, second) = if global_r <= global_s {
                            (global_r, global_s)
                        } else {
                            (global_s, global_r)
                        };
                        // A diagonal pair reached from two local positions cannot occur: each global
                        // index appears once per row, so (r, s) and (s, r) are never both visited.
                        workspace.hessian[first * n_parameters + second] += weight * term;
                    }
                }
            }
            block_start = block_end;
        }
        let log_likelihood = log_likelihood.value();
        if !log_likelihood.is_finite() {
            return Evaluation::Infeasible;
        }
        Evaluation::Feasible { log_likelihood }
    }

    /// Whether a candidate is admissible before the likelihood is evaluated: with no nominal
    /// columns the cut-points must be strictly increasing and every value finite.
    fn admissible(&self, parameters: &[f64]) -> bool {
        if parameters.iter().any(|v| !v.is_finite()) {
            return false;
        }
        if self.nominal_columns.is_empty() {
            return parameters[..self.n_cut_points()]
                .windows(2)
                .all(|pair| pair[0] < pair[1]);
        }
        true
    }

    /// Analysed rows whose cumulative linear predictors are not strictly increasing in `j`.
    fn rows_with_crossing(&self, parameters: &[f64]) -> usize {
        if self.nominal_columns.is_empty() {
            return 0;
        }
        let n_nominal = self.nominal_columns.len();
        let mut count = 0;
        for row in 0..self.n_rows {
            if self.weights[row] == 0.0 {
                continue;
            }
            let mut previous = f64::NEG_INFINITY;
            for cut_point in 0..self.n_cut_points() {
                let gamma = self.gamma_offset(cut_point);
                let mut value = parameters[cut_point];
                for m in 0..n_nominal {
                    value -= self.value(row, self.nominal_columns[m]) * parameters[gamma + m];
                }
                if value <= previous {
                    count += 1;
                    break;
                }
                previous = value;
            }
        }
        count
    }
}

fn validate_options(options: &CumulativeLinkOptions) -> Result<(), ModelInputError> {
    if options.max_iterations == 0 {
        return Err(ModelInputError::InvalidOptions {
            detail: "max_iterations must be at least 1".to_string(),
        });
    }
    for (name, value) in [
        ("gradient_tolerance", options.gradient_tolerance),
        ("log_likelihood_tolerance", options.log_likelihood_tolerance),
    ] {
        if !(value.is_finite() && value > 0.0) {
            return Err(ModelInputError::InvalidOptions {
                detail: format!("{name} is {value}, expected a finite number > 0"),
            });
        }
    }
    Ok(())
}

fn fit_engine(
    design: DesignColumns<'_>,
    response: &[usize],
    n_categories: usize,
    weights: Option<&[f64]>,
    nominal_columns: &[usize],
    options: &CumulativeLinkOptions,
) -> Result<EngineOutcome, ModelInputError> {
    validate_options(options)?;
    let prepared = prepare(design, response, n_categories, weights)?;
    let not_estimated = |stop_reason: StopReason| EngineOutcome {
        parameters: None,
        covariance: None,
        log_likelihood: None,
        iterations: 0,
        stop_reason,
        n_rows_with_crossing: 0,
        n_observations: prepared.n_observations,
        total_weight: prepared.total_weight,
    };
    if let Some(category) = prepared.empty_category {
        return Ok(not_estimated(StopReason::EmptyCategory { category }));
    }
    if !prepared.aliased_columns.is_empty() {
        return Ok(not_estimated(StopReason::SingularDesign {
            columns: prepared.aliased_columns.clone(),
        }));
    }

    let n_columns = design.ncols();
    let n_cut_points = n_categories - 1;
    let n_nominal = nominal_columns.len();
    let common_columns: Vec<usize> = (0..n_columns)
        .filter(|c| !nominal_columns.contains(c))
        .collect();
    let n_parameters = n_cut_points * (1 + n_nominal) + common_columns.len();
    let problem = Problem {
        link: options.link,
        design,
        n_rows: design.nrows(),
        response,
        weights: &prepared.weights,
        n_categories,
        nominal_columns,
        common_columns,
        n_parameters,
    };
    let local_size = 2 * (1 + n_nominal) + problem.common_columns.len();
    let mut workspace = Workspace {
        gradient: vec![0.0; n_parameters],
        hessian: vec![0.0; n_parameters * n_parameters],
        local_index: vec![usize::MAX; local_size],
        upper_derivative: vec![0.0; local_size],
        lower_derivative: vec![0.0; local_size],
        combined: vec![0.0; local_size],
        nominal_values: vec![0.0; n_nominal],
        contributing: Vec::new(),
        non_zeros: BlockNonZeros::new(problem.common_columns.len()),
    };

    // The scale of each parameter's gradient: a coefficient's score grows with its column.
    let mut gradient_scale = vec![1.0; n_parameters];
    for cut_point in 0..n_cut_points {
        for m in 0..n_nominal {
            gradient_scale[problem.gamma_offset(cut_point) + m] =
                1.0 + prepared.column_rms[nominal_columns[m]];
        }
    }
    for (position, &column) in problem.common_columns.iter().enumerate() {
        gradient_scale[problem.beta_offset() + position] = 1.0 + prepared.column_rms[column];
    }
    let gradient_converged = |gradient: &[f64]| {
        gradient.iter().zip(&gradient_scale).all(|(g, scale)| {
            g.abs() <= options.gradient_tolerance * prepared.total_weight.max(1.0) * scale
        })
    };

    // Starting values: cut-points from the cumulative marginal proportions, effects zero.
    let mut parameters = vec![0.0; n_parameters];
    let mut cumulative = 0.0;
    for (cut_point, category_weight) in prepared.category_weight[..n_cut_points].iter().enumerate()
    {
        cumulative += category_weight;
        let proportion = (cumulative / prepared.total_weight).clamp(1e-12, 1.0 - 1e-12);
        parameters[cut_point] = options.link.quantile(proportion);
    }
    if !problem.admissible(&parameters) {
        return Ok(not_estimated(StopReason::NumericalFailure {
            detail: "starting cut-points are not strictly ordered".to_string(),
        }));
    }
    let log_likelihood = match problem.evaluate(&parameters, true, &mut workspace) {
        Evaluation::Feasible { log_likelihood } => log_likelihood,
        Evaluation::Infeasible => {
            return Ok(not_estimated(StopReason::NumericalFailure {
                detail: "the log-likelihood is not finite at the starting values".to_string(),
            }));
        }
    };

    let settings = newton::Settings {
        max_iterations: options.max_iterations,
        log_likelihood_tolerance: options.log_likelihood_tolerance,
        gradient_converged: &gradient_converged,
        halving_failure: "step-halving found no step that keeps the cut-points ordered and the \
                          log-likelihood from decreasing",
    };
    let mut pass = Pass {
        problem: &problem,
        workspace: &mut workspace,
    };
    let run = newton::maximise(&mut pass, parameters, log_likelihood, &settings);
    let covariance = newton::inverse_information(&workspace.hessian, n_parameters);
    let (parameters, log_likelihood, iterations) =
        (run.parameters, run.log_likelihood, run.iterations);
    let mut stop_reason = run.stop_reason;

    // Separation: a coefficient whose effect across its column's range is implausibly large and
    // whose standard error dwarfs it (or whose information vanished) is diverging.
    // A numerical failure is checked too: a vanishing information is often separation.
    {
        let mut separated = Vec::new();
        let mut check = |index: usize, column: usize| {
            let magnitude = parameters[index].abs();
            let standard_error = covariance
                .as_ref()
                .map(|c| c[(index, index)].max(0.0).sqrt());
            let huge_error = standard_error.is_none_or(|se| se > 10.0 * magnitude);
            if magnitude * prepared.column_range[column] > options.link.divergence_scale()
                && huge_error
                && !separated.contains(&column)
            {
                separated.push(column);
            }
        };
        for cut_point in 0..n_cut_points {
            for (m, &column) in nominal_columns.iter().enumerate() {
                check(problem.gamma_offset(cut_point) + m, column);
            }
        }
        for (position, &column) in problem.common_columns.iter().enumerate() {
            check(problem.beta_offset() + position, column);
        }
        separated.sort_unstable();
        if !separated.is_empty() {
            stop_reason = StopReason::Separation { columns: separated };
        }
    }

    let n_rows_with_crossing = problem.rows_with_crossing(&parameters);
    if n_rows_with_crossing > 0 && !matches!(stop_reason, StopReason::Separation { .. }) {
        stop_reason = StopReason::NumericalFailure {
            detail: format!(
                "the fitted cumulative probabilities cross (decrease across cut-points) for \
                 {n_rows_with_crossing} of {} rows, so the nominal-effects model gives negative \
                 category probabilities there",
                prepared.n_observations
            ),
        };
    }

    Ok(EngineOutcome {
        parameters: Some(parameters),
        covariance,
        log_likelihood: Some(log_likelihood),
        iterations,
        stop_reason,
        n_rows_with_crossing,
        n_observations: prepared.n_observations,
        total_weight: prepared.total_weight,
    })
}

// ---------------------------------------------------------------------------------------------
// Binary logit by Newton–Raphson (which is IRLS for the canonical link), private to the Brant
// check so that this module does not depend on the general GLM engine.

struct BinaryLogitFit {
    /// Intercept first, then one per design column.
    coefficients: Vec<f64>,
    fitted: Vec<f64>,
    stop_reason: StopReason,
}

fn binary_logit(design: &DMatrix<f64>, response: &[bool], weights: &[f64]) -> BinaryLogitFit {
    let n_rows = design.nrows();
    let n_columns = design.ncols();
    let n_parameters = n_columns + 1;
    let total_weight: f64 = weights.iter().sum();
    let events: f64 = response
        .iter()
        .zip(weights)
        .filter(|(y, _)| **y)
        .map(|(_, w)| w)
        .sum();
    let mut coefficients = vec![0.0; n_parameters];
    let mut fitted = vec![0.0; n_rows];
    let proportion = events / total_weight;
    if !(proportion > 0.0 && proportion < 1.0) {
        return BinaryLogitFit {
            coefficients,
            fitted,
            stop_reason: StopReason::Separation {
                columns: Vec::new(),
            },
        };
    }
    coefficients[0] = (proportion / (1.0 - proportion)).pln();
    let mut x_row = vec![0.0; n_parameters];
    let evaluate =
        |coefficients: &[f64],
         fitted: &mut [f64],
         x_row: &mut [f64],
         derivatives: Option<(&mut DVector<f64>, &mut DMatrix<f64>)>| {
            let mut log_likelihood = 0.0;
            let (mut gradient, mut information) = match derivatives {
                Some((g, h)) => {
                    g.fill(0.0);
                    h.fill(0.0);
                    (Some(g), Some(h))
                }
                None => (None, None),
            };
            for row in 0..n_rows {
                x_row[0] = 1.0;
                for c in 0..n_columns {
                    x_row[c + 1] = design[(row, c)];
                }
                let eta: f64 = x_row.iter().zip(coefficients).map(|(x, b)| x * b).sum();
                let p = CumulativeLink::Logit.cdf(eta);
                fitted[row] = p;
                let w = weights[row];
                if w == 0.0 {
                    continue;
                }
                // log p = -log(1 + e^-eta), log(1 - p) = -log(1 + e^eta), computed stably.
                let log_term = if response[row] {
                    -softplus(-eta)
                } else {
                    -softplus(eta)
                };
                log_likelihood += w * log_term;
                if let (Some(g), Some(h)) = (gradient.as_deref_mut(), information.as_deref_mut()) {
                    let residual = if response[row] { 1.0 - p } else { -p };
                    let variance = p * (1.0 - p);
                    for r in 0..n_parameters {
                        g[r] += w * residual * x_row[r];
                        for s in r..n_parameters {
                            h[(r, s)] += w * variance * x_row[r] * x_row[s];
                        }
                    }
                }
            }
            if let Some(h) = information {
                h.fill_lower_triangle_with_upper_triangle();
            }
            log_likelihood
        };
    let mut gradient_scale = vec![1.0; n_parameters];
    for c in 0..n_columns {
        let sum_squares: f64 = (0..n_rows)
            .map(|r| weights[r] * design[(r, c)] * design[(r, c)])
            .sum();
        gradient_scale[c + 1] = 1.0 + (sum_squares / total_weight).sqrt();
    }
    let mut gradient = DVector::zeros(n_parameters);
    let mut information = DMatrix::zeros(n_parameters, n_parameters);
    let mut log_likelihood = evaluate(
        &coefficients,
        &mut fitted,
        &mut x_row,
        Some((&mut gradient, &mut information)),
    );
    let max_iterations = 100;
    let mut iterations = 0;
    let mut candidate = vec![0.0; n_parameters];
    let stop_reason = loop {
        if iterations >= max_iterations {
            break StopReason::IterationLimit { iterations };
        }
        iterations += 1;
        let Some(cholesky) = information.clone().cholesky() else {
            break StopReason::NumericalFailure {
                detail: "binary logit information is not positive definite".to_string(),
            };
        };
        let step = cholesky.solve(&gradient);
        let mut step_size = 1.0;
        let mut accepted = false;
        for _ in 0..60 {
            for r in 0..n_parameters {
                candidate[r] = coefficients[r] + step_size * step[r];
            }
            let candidate_log_likelihood = evaluate(&candidate, &mut fitted, &mut x_row, None);
            if candidate_log_likelihood.is_finite()
                && candidate_log_likelihood
                    >= log_likelihood - 64.0 * f64::EPSILON * log_likelihood.abs().max(1.0)
            {
                accepted = true;
                break;
            }
            step_size *= 0.5;
        }
        if !accepted {
            break StopReason::NumericalFailure {
                detail: "binary logit step-halving failed".to_string(),
            };
        }
        coefficients.copy_from_slice(&candidate);
        let previous = log_likelihood;
        log_likelihood = evaluate(
            &coefficients,
            &mut fitted,
            &mut x_row,
            Some((&mut gradient, &mut information)),
        );
        // Same scaled criterion as the cumulative link engine: a coefficient's score grows
        // with its column's size.
        let gradient_small = gradient
            .iter()
            .zip(&gradient_scale)
            .all(|(g, scale)| g.abs() <= 1e-10 * total_weight.max(1.0) * scale);
        let change_small =
            (log_likelihood - previous).abs() <= 1e-12 * (log_likelihood.abs() + 1e-3);
        if gradient_small && change_small {
            break StopReason::Converged { iterations };
        }
    };
    // Separation in a split shows as fitted probabilities pinned at 0 or 1 with a diverging slope.
    let mut stop_reason = stop_reason;
    if let Some(inverse) = information.clone().cholesky().map(|c| c.inverse()) {
        let mut separated = Vec::new();
        for c in 0..n_columns {
            let magnitude = coefficients[c + 1].abs();
            let se = inverse[(c + 1, c + 1)].max(0.0).sqrt();
            let (minimum, maximum) = (0..n_rows)
                .filter(|&r| weights[r] > 0.0)
                .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), r| {
                    (lo.min(design[(r, c)]), hi.max(design[(r, c)]))
                });
            if magnitude * (maximum - minimum) > 3.0 && se > 10.0 * magnitude {
                separated.push(c);
            }
        }
        if !separated.is_empty() {
            stop_reason = StopReason::Separation { columns: separated };
        }
    } else if matches!(stop_reason, StopReason::Converged { .. }) {
        stop_reason = StopReason::Separation {
            columns: Vec::new(),
        };
    }
    BinaryLogitFit {
        coefficients,
        fitted,
        stop_reason,
    }
}

/// `log(1 + e^t)` without overflow.
fn softplus(t: f64) -> f64 {
    if t > 0.0 {
        t + (-t).pexp().pln_1p()
    } else {
        t.pexp().pln_1p()
    }
}

#[cfg(test)]
mod tests {
    //! The analytic gradient and Hessian against central finite differences of the
    //! log-likelihood (common practice), for every link, with and without nominal columns, at a
    //! point away from the optimum.
    use super::*;

    fn small_problem_data() -> (DMatrix<f64>, Vec<usize>, Vec<f64>) {
        let x0 = [0.2, -1.1, 0.7, 1.9, -0.4, 0.0, 1.2, -0.8, 0.5, -1.6];
        let x1 = [1.0, 0.0, 1.0, 0.0, 1.0, 1.0, 0.0, 0.0, 1.0, 0.0];
        let design = DMatrix::from_fn(10, 2, |r, c| if c == 0 { x0[r] } else { x1[r] });
        let response = vec![0, 1, 2, 3, 1, 2, 0, 3, 2, 1];
        let weights = vec![1.0, 2.0, 1.0, 0.5, 1.0, 3.0, 1.0, 1.0, 0.0, 2.0];
        (design, response, weights)
    }

    fn check_derivatives(link: CumulativeLink, nominal_columns: &[usize]) {
        let (design, response, weights) = small_problem_data();
        let n_nominal = nominal_columns.len();
        let common_columns: Vec<usize> = (0..2).filter(|c| !nominal_columns.contains(c)).collect();
        let n_parameters = 3 * (1 + n_nominal) + common_columns.len();
        let all = every_column(design.ncols());
        let problem = Problem {
            link,
            design: DesignColumns::new(&design, &all).expect("in range"),
            n_rows: 10,
            response: &response,
            weights: &weights,
            n_categories: 4,
            nominal_columns,
            common_columns: common_columns.clone(),
            n_parameters,
        };
        let local_size = 2 * (1 + n_nominal) + common_columns.len();
        let mut workspace = Workspace {
            gradient: vec![0.0; n_parameters],
            hessian: vec![0.0; n_parameters * n_parameters],
            local_index: vec![usize::MAX; local_size],
            upper_derivative: vec![0.0; local_size],
            lower_derivative: vec![0.0; local_size],
            combined: vec![0.0; local_size],
            nominal_values: vec![0.0; n_nominal],
            contributing: Vec::new(),
            non_zeros: BlockNonZeros::new(problem.common_columns.len()),
        };
        // Cut-points well apart, small effects: every row has a comfortably positive probability.
        let mut point = vec![0.0; n_parameters];
        point[0] = -1.0;
        point[1] = 0.1;
        point[2] = 1.3;
        for (i, value) in point.iter_mut().enumerate().skip(3) {
            *value = 0.15 * (i as f64 - 4.0);
        }
        let log_likelihood =
            |p: &[f64], workspace: &mut Workspace| match problem.evaluate(p, false, workspace) {
                Evaluation::Feasible { log_likelihood } => log_likelihood,
                Evaluation::Infeasible => panic!("test point must be feasible"),
            };
        assert!(matches!(
            problem.evaluate(&point, true, &mut workspace),
            Evaluation::Feasible { .. }
        ));
        let gradient = workspace.gradient.clone();
        let hessian = newton::information_matrix(&workspace.hessian, n_parameters);
        let h = 1e-5;
        for r in 0..n_parameters {
            let mut plus = point.clone();
            let mut minus = point.clone();
            plus[r] += h;
            minus[r] -= h;
            let numeric = (log_likelihood(&plus, &mut workspace)
                - log_likelihood(&minus, &mut workspace))
                / (2.0 * h);
            assert!(
                (numeric - gradient[r]).abs() <= 1e-7 * (1.0 + gradient[r].abs()),
                "{link:?} gradient {r}: {numeric} vs {}",
                gradient[r]
            );
            // Second derivatives from differences of the analytic gradient.
            assert!(matches!(
                problem.evaluate(&plus, true, &mut workspace),
                Evaluation::Feasible { .. }
            ));
            let gradient_plus = workspace.gradient.clone();
            assert!(matches!(
                problem.evaluate(&minus, true, &mut workspace),
                Evaluation::Feasible { .. }
            ));
            let gradient_minus = workspace.gradient.clone();
            for s in 0..n_parameters {
                let numeric = (gradient_plus[s] - gradient_minus[s]) / (2.0 * h);
                let analytic = -hessian[(r, s)];
                assert!(
                    (numeric - analytic).abs() <= 1e-6 * (1.0 + analytic.abs()),
                    "{link:?} {nominal_columns:?} hessian ({r},{s}): {numeric} vs {analytic}"
                );
            }
        }
    }

    #[test]
    fn analytic_derivatives_match_finite_differences() {
        for link in [
            CumulativeLink::Logit,
            CumulativeLink::Probit,
            CumulativeLink::ComplementaryLogLog,
        ] {
            check_derivatives(link, &[]);
            check_derivatives(link, &[1]);
            check_derivatives(link, &[1, 0]);
        }
    }

    #[test]
    fn aliasing_sweep_flags_later_dependent_columns() {
        // Column 2 = column 0 + column 1 (common practice: the later column is the aliased one).
        let design = DMatrix::from_fn(6, 3, |r, c| {
            let a = [1.0, 2.0, 0.5, 3.0, -1.0, 0.0][r];
            let b = [0.0, 1.0, 1.0, 0.0, 1.0, 0.0][r];
            [a, b, a + b][c]
        });
        assert_eq!(
            aliased_columns_with_implicit_intercept(
                DesignColumns::new(&design, &every_column(3)).expect("in range"),
                &[1.0; 6],
                6.0
            ),
            vec![2]
        );
    }
}
