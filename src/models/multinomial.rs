//! Baseline-category (multinomial) logit for nominal endpoints:
//! `log(P(Y = k | x) / P(Y = ref | x)) = x'beta_k` for every category `k` other than the
//! reference, which the caller names.
//!
//! This module owns the numerics only: it takes a design matrix WITH its intercept column,
//! category indices `0..n_categories`, optional case weights and returns estimates, covariance and
//! a [`StopReason`]. It must not read files, clocks or the environment, must not print, must not
//! compute p-values, and must never return NaN as a result. Input checks are shared with the
//! ordinal engines (`super::ordinal`), which also own the error type.
//!
//! Parameter order (estimates, gradient, covariance): category-major. The non-reference
//! categories are taken in increasing index order; each contributes its `p` coefficients in
//! design-column order, so parameter `position * p + column` is `beta_{k, column}` where `k` is
//! the `position`-th non-reference category.
//!
//! Method: Newton–Raphson with the analytic gradient and Hessian (for this canonical link the
//! observed and expected information coincide; the Hessian has `(K-1) x (K-1)` blocks of size
//! `p x p`, block `(k, l)` being `-sum_i w_i pi_ik (delta_kl - pi_il) x_i x_i'`), with step-halving
//! that keeps the log-likelihood from decreasing. The log-likelihood is concave, so the Newton
//! step is an ascent direction whenever the information is positive definite.
//!
//! References: Agresti A (2013) Categorical Data Analysis, 3rd ed., Wiley, §8.1 (baseline-category
//! logit models); McCullagh P, Nelder JA (1989) Generalized Linear Models, 2nd ed., ch. 6.

#[allow(unused_imports)]
use crate::models::portable::Portable;
use nalgebra::DMatrix;

use super::glm::linalg::{BlockNonZeros, ROW_BLOCK};
use super::ordinal::{ModelInputError, prepare_common, sweep_for_aliasing};
use super::{DesignColumns, StopReason, every_column, newton};

/// Options for the Newton–Raphson fit. Built with [`Default`] and adjusted field by field.
#[derive(Debug, Clone, PartialEq)]
pub struct MultinomialOptions {
    /// Iteration cap (at least 1).
    pub max_iterations: usize,
    /// Convergence needs `max |gradient| / (total_weight * (1 + rms(x_c)))` below this.
    pub gradient_tolerance: f64,
    /// Convergence also needs the last step's `|Δ log-likelihood| / (|log-likelihood| + 1e-3)`
    /// below this.
    pub log_likelihood_tolerance: f64,
}

impl Default for MultinomialOptions {
    fn default() -> Self {
        MultinomialOptions {
            max_iterations: 100,
            gradient_tolerance: 1e-10,
            log_likelihood_tolerance: 1e-10,
        }
    }
}

/// Result of [`fit_multinomial_logit`].
///
/// When `stop_reason` is `EmptyCategory` or `SingularDesign` the model was not estimated:
/// `coefficients` has no rows and `log_likelihood` and `covariance` are `None`. For
/// `IterationLimit`, `Separation` and `NumericalFailure` the estimates are the last finite
/// iterate and must not be reported as maximum-likelihood estimates.
#[derive(Debug, Clone, PartialEq)]
pub struct MultinomialFit {
    pub n_categories: usize,
    pub reference_category: usize,
    /// The non-reference categories in increasing order; row `r` of `coefficients` belongs to
    /// `non_reference_categories[r]`.
    pub non_reference_categories: Vec<usize>,
    /// `(K-1) x p`.
    pub coefficients: DMatrix<f64>,
    /// Inverse observed information in the category-major order described in the module docs.
    pub covariance: Option<DMatrix<f64>>,
    pub log_likelihood: Option<f64>,
    pub iterations: usize,
    pub stop_reason: StopReason,
    /// Rows with positive weight.
    pub n_observations: usize,
    /// Sum of the weights.
    pub total_weight: f64,
}

/// Fits the baseline-category logit model.
///
/// Requirements: `design` is `n x p` and includes the intercept column (not checked: a design
/// without one is a valid, if unusual, model); `response[i] < n_categories`, `n_categories >= 2`,
/// `reference_category < n_categories`; `weights`, if given, are finite and non-negative
/// (frequency or prior weights; zero-weight rows are ignored). A category with zero total weight
/// stops with `EmptyCategory`; collinear or all-zero columns stop with `SingularDesign`.
pub fn fit_multinomial_logit(
    design: &DMatrix<f64>,
    response: &[usize],
    n_categories: usize,
    reference_category: usize,
    weights: Option<&[f64]>,
    options: &MultinomialOptions,
) -> Result<MultinomialFit, ModelInputError> {
    let all = every_column(design.ncols());
    let view = DesignColumns::new(design, &all).expect("every column is in range");
    fit_multinomial_logit_on(
        view,
        response,
        n_categories,
        reference_category,
        weights,
        options,
    )
}

/// [`fit_multinomial_logit`] on some columns of a design, read in place (no copy); the fit's
/// coefficient columns and column indices count positions in the view.
pub fn fit_multinomial_logit_on(
    design: DesignColumns<'_>,
    response: &[usize],
    n_categories: usize,
    reference_category: usize,
    weights: Option<&[f64]>,
    options: &MultinomialOptions,
) -> Result<MultinomialFit, ModelInputError> {
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
    let prepared = prepare_common(design, response, n_categories, weights)?;
    if reference_category >= n_categories {
        return Err(ModelInputError::InvalidIndex {
            what: "reference category",
            index: reference_category,
            limit: n_categories,
        });
    }
    let n_rows = design.nrows();
    let n_columns = design.ncols();
    let non_reference_categories: Vec<usize> = (0..n_categories)
        .filter(|&k| k != reference_category)
        .collect();
    let n_free = non_reference_categories.len();
    let not_estimated = |stop_reason: StopReason| MultinomialFit {
        n_categories,
        reference_category,
        non_reference_categories: non_reference_categories.clone(),
        coefficients: DMatrix::zeros(0, n_columns),
        covariance: None,
        log_likelihood: None,
        iterations: 0,
        stop_reason,
        n_observations: prepared.n_observations,
        total_weight: prepared.total_weight,
    };
    if let Some(category) = prepared.empty_category {
        return Ok(not_estimated(StopReason::EmptyCategory { category }));
    }
    // Aliasing on the uncentred weighted cross-product: the design carries its own intercept.
    // One blocked pass over the rows, visiting only each row's non-zeros when the design is
    // mostly indicators.
    let (cross, _) = match design.design() {
        super::DesignInput::Dense(matrix) => crate::models::glm::linalg::weighted_cross_product(
            matrix,
            design.design_columns(),
            &prepared.weights,
            None,
        ),
        rows => crate::models::glm::linalg::weighted_cross_product_from(
            &super::DenseOnDemand::new(rows),
            rows_of(rows),
            design.design_columns(),
            &prepared.weights,
            None,
        ),
    };
    let aliased = sweep_for_aliasing(cross);
    if !aliased.is_empty() {
        return Ok(not_estimated(StopReason::SingularDesign {
            columns: aliased,
        }));
    }

    let n_parameters = n_free * n_columns;
    let problem = Problem {
        design,
        n_rows,
        n_columns,
        response,
        weights: &prepared.weights,
        reference_category,
        non_reference_categories: &non_reference_categories,
    };
    let mut workspace = Workspace {
        gradient: vec![0.0; n_parameters],
        hessian: vec![0.0; n_parameters * n_parameters],
        linear_predictor: vec![0.0; n_free],
        probability: vec![0.0; n_free],
        non_zeros: BlockNonZeros::new(n_columns),
    };

    // Starting values: a constant column carries the log marginal odds against the reference.
    let mut parameters = vec![0.0; n_parameters];
    if let Some(intercept) =
        (0..n_columns).find(|&c| prepared.column_range[c] == 0.0 && prepared.column_rms[c] > 0.0)
    {
        let value = (0..n_rows)
            .find(|&r| prepared.weights[r] > 0.0)
            .map(|r| design.get(r, intercept))
            .unwrap_or(1.0);
        for (position, &category) in non_reference_categories.iter().enumerate() {
            parameters[position * n_columns + intercept] = (prepared.category_weight[category]
                / prepared.category_weight[reference_category])
                .pln()
                / value;
        }
    }
    let gradient_converged = |gradient: &[f64]| {
        gradient.iter().enumerate().all(|(index, g)| {
            let column = index % n_columns;
            g.abs()
                <= options.gradient_tolerance
                    * prepared.total_weight.max(1.0)
                    * (1.0 + prepared.column_rms[column])
        })
    };

    let Some(log_likelihood) = problem.evaluate(&parameters, true, &mut workspace) else {
        return Ok(not_estimated(StopReason::NumericalFailure {
            detail: "the log-likelihood is not finite at the starting values".to_string(),
        }));
    };
    let settings = newton::Settings {
        max_iterations: options.max_iterations,
        log_likelihood_tolerance: options.log_likelihood_tolerance,
        gradient_converged: &gradient_converged,
        halving_failure: "step-halving found no step that keeps the log-likelihood from decreasing",
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

    // Separation: a coefficient whose effect across its column's range is implausibly large
    // (more than 3 on the log-odds scale) and whose standard error is over ten times its size
    // (or whose information vanished) is diverging rather than estimated.
    let mut separated = Vec::new();
    for index in 0..n_parameters {
        let column = index % n_columns;
        let magnitude = parameters[index].abs();
        let huge_error = covariance
            .as_ref()
            .is_none_or(|c| c[(index, index)].max(0.0).sqrt() > 10.0 * magnitude);
        if magnitude * prepared.column_range[column] > 3.0
            && huge_error
            && !separated.contains(&column)
        {
            separated.push(column);
        }
    }
    separated.sort_unstable();
    if !separated.is_empty() {
        stop_reason = StopReason::Separation { columns: separated };
    }

    Ok(MultinomialFit {
        n_categories,
        reference_category,
        non_reference_categories,
        coefficients: DMatrix::from_row_slice(n_free, n_columns, &parameters),
        covariance,
        log_likelihood: Some(log_likelihood),
        iterations,
        stop_reason,
        n_observations: prepared.n_observations,
        total_weight: prepared.total_weight,
    })
}

/// Per-row fitted category probabilities `P(Y = k | x_i)`, as an `n x K` matrix.
pub fn multinomial_probabilities(
    fit: &MultinomialFit,
    design: &DMatrix<f64>,
) -> Result<DMatrix<f64>, ModelInputError> {
    if fit.coefficients.nrows() + 1 != fit.n_categories {
        return Err(ModelInputError::NoEstimates);
    }
    if design.ncols() != fit.coefficients.ncols() {
        return Err(ModelInputError::LengthMismatch {
            what: "design columns",
            expected: fit.coefficients.ncols(),
            found: design.ncols(),
        });
    }
    super::ordinal::check_finite_design(design)?;
    let mut probabilities = DMatrix::zeros(design.nrows(), fit.n_categories);
    let mut linear_predictor = vec![0.0; fit.n_categories];
    for row in 0..design.nrows() {
        linear_predictor.iter_mut().for_each(|v| *v = 0.0);
        for (position, &category) in fit.non_reference_categories.iter().enumerate() {
            linear_predictor[category] = (0..design.ncols())
                .map(|c| design[(row, c)] * fit.coefficients[(position, c)])
                .sum();
        }
        let maximum = linear_predictor
            .iter()
            .cloned()
            .fold(f64::NEG_INFINITY, f64::max);
        let total: f64 = linear_predictor.iter().map(|v| (v - maximum).pexp()).sum();
        for category in 0..fit.n_categories {
            probabilities[(row, category)] = (linear_predictor[category] - maximum).pexp() / total;
        }
    }
    Ok(probabilities)
}

/// One pass of the multinomial likelihood over the rows, for the shared Newton driver.
struct Pass<'p, 'a> {
    problem: &'p Problem<'a>,
    workspace: &'p mut Workspace,
}

impl newton::Likelihood for Pass<'_, '_> {
    fn admissible(&self, parameters: &[f64]) -> bool {
        parameters.iter().all(|v| v.is_finite())
    }

    fn evaluate(&mut self, parameters: &[f64]) -> Option<f64> {
        self.problem.evaluate(parameters, true, self.workspace)
    }

    fn gradient(&self) -> &[f64] {
        &self.workspace.gradient
    }

    fn hessian_upper(&self) -> &[f64] {
        &self.workspace.hessian
    }
}

struct Problem<'a> {
    design: DesignColumns<'a>,
    n_rows: usize,
    n_columns: usize,
    response: &'a [usize],
    weights: &'a [f64],
    reference_category: usize,
    non_reference_categories: &'a [usize],
}

/// Reusable buffers so that a pass over the rows allocates nothing.
struct Workspace {
    gradient: Vec<f64>,
    /// Row-major; only entries `(r, s)` with `r <= s` are accumulated (of the log-likelihood's
    /// Hessian, so they are non-positive on the diagonal).
    hessian: Vec<f64>,
    linear_predictor: Vec<f64>,
    probability: Vec<f64>,
    /// The non-zero entries of a block of rows, each row's in ascending column order.
    non_zeros: BlockNonZeros,
}

impl Problem<'_> {
    /// One pass over the rows: the log-likelihood (None if it is not finite) and, when asked,
    /// its gradient `sum w (y_k - pi_k) x` and Hessian `-sum w pi_k (delta_kl - pi_l) x x'`.
    fn evaluate(
        &self,
        parameters: &[f64],
        with_derivatives: bool,
        workspace: &mut Workspace,
    ) -> Option<f64> {
        let n_free = self.non_reference_categories.len();
        let p = self.n_columns;
        let n_parameters = n_free * p;
        if with_derivatives {
            workspace.gradient.iter_mut().for_each(|v| *v = 0.0);
            workspace.hessian.iter_mut().for_each(|v| *v = 0.0);
        }
        let mut log_likelihood = crate::models::CompensatedSum::default();
        let every = super::every_column(self.n_columns);
        let mut block_start = 0;
        while block_start < self.n_rows {
            let block_end = (block_start + ROW_BLOCK).min(self.n_rows);
            // Only each row's non-zero entries are visited: a zero entry would add ±0 to the
            // linear predictor, the gradient and the Hessian, which leaves every sum unchanged
            // bit for bit, and a row of treatment and site dummies has few non-zeros. They are
            // gathered a block of rows at a time, column by column.
            self.design
                .gather(&mut workspace.non_zeros, &every, block_start..block_end);
            for row in block_start..block_end {
                let weight = self.weights[row];
                if weight == 0.0 {
                    continue;
                }
                let (positions, values) = workspace.non_zeros.row(row - block_start);
                // Softmax with the reference's linear predictor 0, shifted by the maximum.
                let mut maximum: f64 = 0.0;
                for k in 0..n_free {
                    let offset = k * p;
                    let mut eta = 0.0;
                    for (&c, &x) in positions.iter().zip(values) {
                        eta += x * parameters[offset + c];
                    }
                    workspace.linear_predictor[k] = eta;
                    maximum = maximum.max(eta);
                }
                let mut total = (-maximum).pexp();
                for k in 0..n_free {
                    let e = (workspace.linear_predictor[k] - maximum).pexp();
                    workspace.probability[k] = e;
                    total += e;
                }
                let log_normaliser = maximum + total.pln();
                let category = self.response[row];
                let observed_position = if category == self.reference_category {
                    None
                } else {
                    self.non_reference_categories
                        .iter()
                        .position(|&k| k == category)
                };
                let observed_eta = observed_position.map_or(0.0, |k| workspace.linear_predictor[k]);
                log_likelihood.add(weight * (observed_eta - log_normaliser));
                if !with_derivatives {
                    continue;
                }
                for k in 0..n_free {
                    workspace.probability[k] /= total;
                }
                for k in 0..n_free {
                    let residual = if observed_position == Some(k) {
                        1.0
                    } else {
                        0.0
                    } - workspace.probability[k];
                    let offset = k * p;
                    for (&c, &x) in positions.iter().zip(values) {
                        workspace.gradient[offset + c] += weight * residual * x;
                    }
                    let pi_k = workspace.probability[k];
                    for l in k..n_free {
                        let pi_l = workspace.probability[l];
                        let block_weight = -weight * pi_k * (if k == l { 1.0 } else { 0.0 } - pi_l);
                        let row_start = offset;
                        let column_start = l * p;
                        for (position, (&c, &x_c)) in positions.iter().zip(values).enumerate() {
                            let scaled = block_weight * x_c;
                            let base = (row_start + c) * n_parameters + column_start;
                            let first = if k == l { position } else { 0 };
                            for (&d, &x_d) in positions[first..].iter().zip(&values[first..]) {
                                workspace.hessian[base + d] += scaled * x_d;
                            }
                        }
                    }
                }
            }
            block_start = block_end;
        }
        let log_likelihood = log_likelihood.value();
        log_likelihood.is_finite().then_some(log_likelihood)
    }
}

/// The stored rows of a design held as rows.
fn rows_of(design: super::DesignInput<'_>) -> Option<&crate::models::SparseRows> {
    match design {
        super::DesignInput::Rows(rows) => Some(rows),
        super::DesignInput::Dense(_) => None,
    }
}

#[cfg(test)]
mod tests {
    //! The analytic gradient and Hessian against central finite differences of the
    //! log-likelihood (common practice), with a non-default reference category.
    use super::*;

    #[test]
    fn analytic_derivatives_match_finite_differences() {
        let x1 = [0.2, -1.1, 0.7, 1.9, -0.4, 0.0, 1.2, -0.8, 0.5, -1.6];
        let x2 = [1.0, 0.0, 1.0, 0.0, 1.0, 1.0, 0.0, 0.0, 1.0, 0.0];
        let design = DMatrix::from_fn(10, 3, |r, c| [1.0, x1[r], x2[r]][c]);
        let response = [0, 1, 2, 3, 1, 2, 0, 3, 2, 1];
        let weights = [1.0, 2.0, 1.0, 0.5, 1.0, 3.0, 1.0, 1.0, 0.0, 2.0];
        let non_reference = [0, 1, 3];
        let all = every_column(3);
        let problem = Problem {
            design: DesignColumns::new(&design, &all).expect("in range"),
            n_rows: 10,
            n_columns: 3,
            response: &response,
            weights: &weights,
            reference_category: 2,
            non_reference_categories: &non_reference,
        };
        let n_parameters = 9;
        let mut workspace = Workspace {
            gradient: vec![0.0; n_parameters],
            hessian: vec![0.0; n_parameters * n_parameters],
            linear_predictor: vec![0.0; 3],
            probability: vec![0.0; 3],
            non_zeros: BlockNonZeros::new(3),
        };
        let point: Vec<f64> = (0..n_parameters).map(|i| 0.2 * (i as f64) - 0.7).collect();
        problem
            .evaluate(&point, true, &mut workspace)
            .expect("finite");
        let gradient = workspace.gradient.clone();
        let information = newton::information_matrix(&workspace.hessian, n_parameters);
        let h = 1e-5;
        for r in 0..n_parameters {
            let mut plus = point.clone();
            let mut minus = point.clone();
            plus[r] += h;
            minus[r] -= h;
            let numeric = (problem
                .evaluate(&plus, false, &mut workspace)
                .expect("finite")
                - problem
                    .evaluate(&minus, false, &mut workspace)
                    .expect("finite"))
                / (2.0 * h);
            assert!(
                (numeric - gradient[r]).abs() <= 1e-7 * (1.0 + gradient[r].abs()),
                "gradient {r}"
            );
            problem
                .evaluate(&plus, true, &mut workspace)
                .expect("finite");
            let gradient_plus = workspace.gradient.clone();
            problem
                .evaluate(&minus, true, &mut workspace)
                .expect("finite");
            let gradient_minus = workspace.gradient.clone();
            for s in 0..n_parameters {
                let numeric = (gradient_plus[s] - gradient_minus[s]) / (2.0 * h);
                let analytic = -information[(r, s)];
                assert!(
                    (numeric - analytic).abs() <= 1e-6 * (1.0 + analytic.abs()),
                    "hessian ({r},{s}): {numeric} vs {analytic}"
                );
            }
        }
    }
}
