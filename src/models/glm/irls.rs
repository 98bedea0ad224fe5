//! Iteratively reweighted least squares (Fisher scoring; for non-canonical links Newton steps
//! with the observed information once a first scoring step is made) for one family with a fixed
//! negative-binomial theta, with step-halving, and the divergence check that detects separation
//! in binomial models. It works on a subset of the design's columns (the estimable ones) so the
//! caller never copies the design. It owns no dispersion, covariance or likelihood reporting.
//!
//! References: Green (1984), "Iteratively reweighted least squares for maximum likelihood
//! estimation", JRSS B 46:149–192; McCullagh & Nelder (1989), §2.5; the step-halving rule and
//! the convergence measure |D − D_old| / (|D| + 0.1) follow R's `glm.fit` (common practice).
//! Separation: Albert & Anderson (1984), Biometrika 71:1–10 (maximum likelihood estimates do
//! not exist under complete or quasi-complete separation; the likelihood keeps increasing along
//! a direction of the coefficients, which is what the divergence check measures).

use nalgebra::{DMatrix, DVector};

use super::family::{Distribution, Kernel, compensated_sum};
use super::linalg::{
    ScaledCholesky, SparseRows, linear_predictor_into, transpose_multiply,
    weighted_cross_product_from,
};

/// The number of halvings tried before a step is abandoned.
const MAX_HALVINGS: usize = 30;

/// Extra unguarded Fisher-scoring steps taken from a finished binomial fit to see whether the
/// linear predictor keeps moving (separation) or stays put (a genuine maximum).
const DIVERGENCE_STEPS: usize = 8;

/// A fitted probability closer than this to 0 or 1 triggers the divergence check.
const BOUNDARY_PROBABILITY: f64 = 1e-8;

/// Problem data shared by every IRLS call on one dataset.
pub(crate) struct Problem<'a> {
    pub(crate) design: &'a crate::models::DenseOnDemand<'a>,
    /// The design's non-zeros by row, when it is sparse (built once per fit); must describe
    /// `design` (the cross-product checks the shape and otherwise ignores it).
    pub(crate) sparse_rows: Option<&'a SparseRows>,
    pub(crate) response: &'a [f64],
    pub(crate) weights: &'a [f64],
    pub(crate) offset: &'a [f64],
}

/// How an IRLS run ended.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum IrlsStatus {
    Converged,
    IterationLimit,
    /// Step-halving could not find a valid step, or a solve failed; in words.
    Failed(String),
    /// Binomial only: the deviance stopped changing while the score did not vanish and some
    /// fitted probabilities are at the boundary (decided by the separation check).
    Stalled,
}

/// The result of one IRLS run on the active columns.
pub(crate) struct IrlsOutcome {
    pub(crate) coefficients: DVector<f64>,
    pub(crate) linear_predictor: Vec<f64>,
    pub(crate) means: Vec<f64>,
    pub(crate) deviance: f64,
    pub(crate) iterations: usize,
    pub(crate) status: IrlsStatus,
    /// XᵀWX at the returned coefficients (working weights without dispersion).
    pub(crate) information: DMatrix<f64>,
}

/// Where an IRLS run starts: from the family's starting means, or from a linear predictor
/// (a warm start for profile refits and for the negative-binomial alternation).
pub(crate) enum Start<'a> {
    FamilyDefault,
    LinearPredictor(&'a [f64]),
}

/// Convergence settings.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Tolerances {
    pub(crate) max_iterations: usize,
    pub(crate) deviance: f64,
    pub(crate) score: f64,
}

pub(crate) fn total_deviance(kernel: &Kernel, problem: &Problem, means: &[f64]) -> f64 {
    compensated_sum(problem.response.iter().zip(means).zip(problem.weights).map(
        |((&y, &mu), &w)| {
            if w > 0.0 {
                kernel.deviance_contribution(y, mu, w)
            } else {
                0.0
            }
        },
    ))
}

/// Means for a linear predictor; `None` when any mean of a positively weighted row leaves the
/// family's mean space (then the step is halved).
fn means_for(
    kernel: &Kernel,
    problem: &Problem,
    linear_predictor: &[f64],
    means: &mut [f64],
) -> bool {
    for ((mu, &eta), &w) in means.iter_mut().zip(linear_predictor).zip(problem.weights) {
        *mu = kernel.mean(eta);
        if w > 0.0 && !kernel.valid_mean(*mu) {
            return false;
        }
    }
    true
}

/// Working weights wᵢ = mᵢ (dμ/dη)² / V(μ) and working responses zᵢ = (ηᵢ − oᵢ) + (yᵢ − μᵢ)/(dμ/dη)
/// written into the two buffers, and dμ/dη of every positively weighted row into `derivatives`
/// (zero elsewhere) for the score and the observed information at the same point, so that the
/// inverse link's derivative is evaluated once per row and iteration; returns false when any
/// is non-finite.
pub(crate) fn working_quantities(
    kernel: &Kernel,
    problem: &Problem,
    linear_predictor: &[f64],
    means: &[f64],
    working_weights: &mut [f64],
    working_response: &mut [f64],
    derivatives: &mut [f64],
) -> bool {
    let mut all_finite = true;
    for i in 0..means.len() {
        let prior = problem.weights[i];
        if prior <= 0.0 {
            working_weights[i] = 0.0;
            working_response[i] = 0.0;
            derivatives[i] = 0.0;
            continue;
        }
        let derivative = kernel.mean_derivative(linear_predictor[i]);
        derivatives[i] = derivative;
        let variance = kernel.variance(means[i]);
        let weight = prior * derivative * derivative / variance;
        let response =
            linear_predictor[i] - problem.offset[i] + (problem.response[i] - means[i]) / derivative;
        if !weight.is_finite() || !response.is_finite() {
            all_finite = false;
        }
        working_weights[i] = weight;
        working_response[i] = response;
    }
    all_finite
}

/// Runs Fisher scoring on the `active` columns. Convergence needs both the relative change in
/// deviance below `tolerances.deviance` and every standardised score |Uⱼ| / √Iⱼⱼ below
/// `tolerances.score`; the check is made at the start of an iteration, with the weights of the
/// current coefficients, so the information returned is the one at the estimate.
pub(crate) fn run_irls(
    kernel: &Kernel,
    problem: &Problem,
    active: &[usize],
    start: Start,
    tolerances: Tolerances,
) -> IrlsOutcome {
    let n_rows = problem.response.len();
    let mut linear_predictor = vec![0.0; n_rows];
    let mut means = vec![0.0; n_rows];
    match start {
        Start::FamilyDefault => {
            for i in 0..n_rows {
                let mu = kernel.starting_mean(problem.response[i], problem.weights[i]);
                means[i] = mu;
                linear_predictor[i] = kernel.link_function(mu);
            }
        }
        Start::LinearPredictor(eta) => {
            linear_predictor.copy_from_slice(eta);
            for i in 0..n_rows {
                means[i] = kernel.mean(eta[i]);
            }
        }
    }
    let mut deviance = total_deviance(kernel, problem, &means);
    let mut coefficients: Option<DVector<f64>> = None;
    let mut working_weights = vec![0.0; n_rows];
    let mut working_response = vec![0.0; n_rows];
    let mut candidate_eta = vec![0.0; n_rows];
    let mut candidate_means = vec![0.0; n_rows];
    // Per-row scratch for the score and for the observed weights of a Newton step is
    // `candidate_means`: each is written and summed before the step's candidates are formed (and
    // the score of a rejected step is taken after its candidates are dead), so no other n-vector
    // is needed (at 10⁶ rows each is 8 MB).
    let mut derivatives = vec![0.0; n_rows];
    let mut last_relative_change = f64::INFINITY;
    let mut iterations = 0;
    let mut information = DMatrix::<f64>::zeros(active.len(), active.len());

    let status = loop {
        if !working_quantities(
            kernel,
            problem,
            &linear_predictor,
            &means,
            &mut working_weights,
            &mut working_response,
            &mut derivatives,
        ) {
            break IrlsStatus::Failed(
                "working weights or working responses became non-finite".to_string(),
            );
        }
        let (cross, right) = weighted_cross_product_from(
            problem.design,
            problem.sparse_rows,
            active,
            &working_weights,
            Some(&working_response),
        );
        information = cross;
        let mut score = None;
        if coefficients.is_some() {
            let current_score = score_from_derivatives(
                kernel,
                problem,
                active,
                &means,
                &derivatives,
                &mut candidate_means,
            );
            let standardised = max_standardised_score(&current_score, &information);
            if last_relative_change < tolerances.deviance && standardised < tolerances.score {
                break IrlsStatus::Converged;
            }
            // A binomial deviance that has stopped changing while the score has not vanished,
            // with probabilities at the boundary, is the signature of separation: stop here and
            // let the divergence check decide rather than creep on to the iteration cap.
            if last_relative_change < tolerances.deviance
                && touches_boundary(kernel, problem, &means)
            {
                break IrlsStatus::Stalled;
            }
            score = Some(current_score);
        }
        if iterations >= tolerances.max_iterations {
            break IrlsStatus::IterationLimit;
        }
        let Some(factor) = ScaledCholesky::new(&information) else {
            break IrlsStatus::Failed(
                "the weighted cross-product matrix is not positive definite".to_string(),
            );
        };
        // Fisher scoring converges only linearly for non-canonical links, and very slowly when
        // some means sit where the inverse link is clamped; after the first step a Newton step
        // with the observed information is used whenever that information is positive
        // definite (for canonical links the two coincide).
        let mut any_clamped = false;
        let newton_step = match (&coefficients, &score) {
            (Some(current), Some(current_score)) if !kernel.is_canonical() => {
                for i in 0..n_rows {
                    any_clamped |=
                        problem.weights[i] > 0.0 && kernel.is_clamped(linear_predictor[i]);
                    let prior = problem.weights[i];
                    candidate_means[i] = if prior > 0.0 {
                        kernel.observed_weight_given_derivative(
                            problem.response[i],
                            linear_predictor[i],
                            means[i],
                            derivatives[i],
                            prior,
                        )
                    } else {
                        0.0
                    };
                }
                let (observed, _) = weighted_cross_product_from(
                    problem.design,
                    problem.sparse_rows,
                    active,
                    &candidate_means,
                    None,
                );
                ScaledCholesky::new(&observed)
                    .map(|observed_factor| current + observed_factor.solve(current_score))
            }
            _ => None,
        };
        let fisher_step = factor.solve(&right);
        // Where the inverse link is clamped the likelihood is flat and Newton steps can be huge,
        // so with clamped rows the Newton step is taken only when it is strictly better than the
        // scoring step.
        let mut proposal = match newton_step {
            Some(newton) if newton.iter().all(|v| v.is_finite()) && !any_clamped => newton,
            Some(newton) if newton.iter().all(|v| v.is_finite()) => {
                let newton_deviance = deviance_at(
                    kernel,
                    problem,
                    active,
                    &newton,
                    &mut candidate_eta,
                    &mut candidate_means,
                );
                let fisher_deviance = deviance_at(
                    kernel,
                    problem,
                    active,
                    &fisher_step,
                    &mut candidate_eta,
                    &mut candidate_means,
                );
                match (newton_deviance, fisher_deviance) {
                    (Some(n), Some(f)) if n < f => newton,
                    (Some(_), None) => newton,
                    _ => fisher_step,
                }
            }
            _ => fisher_step,
        };
        if proposal.iter().any(|v| !v.is_finite()) {
            proposal = factor.solve(&right);
        }
        iterations += 1;
        let mut accepted = false;
        for _ in 0..=MAX_HALVINGS {
            linear_predictor_into(
                problem.design,
                problem.sparse_rows,
                active,
                &proposal,
                problem.offset,
                &mut candidate_eta,
            );
            if means_for(kernel, problem, &candidate_eta, &mut candidate_means) {
                let candidate_deviance = total_deviance(kernel, problem, &candidate_means);
                let not_worse = match &coefficients {
                    None => true,
                    Some(_) => candidate_deviance <= deviance + 1e-12 * (deviance.abs() + 0.1),
                };
                if candidate_deviance.is_finite() && not_worse {
                    last_relative_change =
                        (candidate_deviance - deviance).abs() / (candidate_deviance.abs() + 0.1);
                    deviance = candidate_deviance;
                    accepted = true;
                    break;
                }
            }
            // Halve towards the previous coefficients; the first step has none to return to.
            match &coefficients {
                Some(previous) => proposal = (&proposal + previous) * 0.5,
                None => break,
            }
        }
        if !accepted {
            match &coefficients {
                None => {
                    break IrlsStatus::Failed(
                        "the first scoring step gave means outside the family's range".to_string(),
                    );
                }
                Some(_) => {
                    // No step improves the deviance: the current point is a maximum to working
                    // precision if its score is small.
                    let score = score_at(
                        kernel,
                        problem,
                        active,
                        &linear_predictor,
                        &means,
                        &mut candidate_means,
                    );
                    if max_standardised_score(&score, &information) < tolerances.score {
                        break IrlsStatus::Converged;
                    }
                    break IrlsStatus::Failed(
                        "step-halving could not reduce the deviance".to_string(),
                    );
                }
            }
        }
        std::mem::swap(&mut linear_predictor, &mut candidate_eta);
        std::mem::swap(&mut means, &mut candidate_means);
        coefficients = Some(proposal);
    };
    IrlsOutcome {
        coefficients: coefficients.unwrap_or_else(|| DVector::zeros(active.len())),
        linear_predictor,
        means,
        deviance,
        iterations,
        status,
        information,
    }
}

/// The score U = Σᵢ xᵢ mᵢ (yᵢ − μᵢ) (dμ/dη)ᵢ / V(μᵢ), computed from the residuals directly (not
/// as XᵀWz − XᵀWXβ, which cancels badly when the coefficients are large).
pub(crate) fn score_at(
    kernel: &Kernel,
    problem: &Problem,
    active: &[usize],
    linear_predictor: &[f64],
    means: &[f64],
    buffer: &mut [f64],
) -> DVector<f64> {
    for i in 0..means.len() {
        let prior = problem.weights[i];
        buffer[i] = if prior > 0.0 {
            prior * (problem.response[i] - means[i]) * kernel.mean_derivative(linear_predictor[i])
                / kernel.variance(means[i])
        } else {
            0.0
        };
    }
    transpose_multiply(problem.design, problem.sparse_rows, active, buffer)
}

/// [`score_at`] from the derivatives dμ/dη that [`working_quantities`] left for the same point:
/// the same products in the same order, so the same bits, without evaluating the inverse
/// link's derivative again.
fn score_from_derivatives(
    kernel: &Kernel,
    problem: &Problem,
    active: &[usize],
    means: &[f64],
    derivatives: &[f64],
    buffer: &mut [f64],
) -> DVector<f64> {
    for i in 0..means.len() {
        let prior = problem.weights[i];
        buffer[i] = if prior > 0.0 {
            prior * (problem.response[i] - means[i]) * derivatives[i] / kernel.variance(means[i])
        } else {
            0.0
        };
    }
    transpose_multiply(problem.design, problem.sparse_rows, active, buffer)
}

/// The deviance at `coefficients`, or `None` when a mean leaves the family's range; uses the
/// two buffers as scratch.
fn deviance_at(
    kernel: &Kernel,
    problem: &Problem,
    active: &[usize],
    coefficients: &DVector<f64>,
    linear_predictor: &mut [f64],
    means: &mut [f64],
) -> Option<f64> {
    linear_predictor_into(
        problem.design,
        problem.sparse_rows,
        active,
        coefficients,
        problem.offset,
        linear_predictor,
    );
    if !means_for(kernel, problem, linear_predictor, means) {
        return None;
    }
    let deviance = total_deviance(kernel, problem, means);
    deviance.is_finite().then_some(deviance)
}

/// Whether a binomial fit has a positively weighted fitted probability within
/// `BOUNDARY_PROBABILITY` of 0 or 1.
fn touches_boundary(kernel: &Kernel, problem: &Problem, means: &[f64]) -> bool {
    kernel.distribution == Distribution::Binomial
        && means.iter().zip(problem.weights).any(|(&mu, &w)| {
            w > 0.0 && !(BOUNDARY_PROBABILITY..=1.0 - BOUNDARY_PROBABILITY).contains(&mu)
        })
}

/// max over j of |Uⱼ| / √Iⱼⱼ, the score in standard-error units.
pub(crate) fn max_standardised_score(score: &DVector<f64>, information: &DMatrix<f64>) -> f64 {
    let mut largest: f64 = 0.0;
    for j in 0..score.len() {
        let scale = information[(j, j)].sqrt();
        let value = if scale > 0.0 {
            score[j].abs() / scale
        } else {
            score[j].abs()
        };
        if !value.is_finite() {
            return f64::INFINITY;
        }
        largest = largest.max(value);
    }
    largest
}

/// For a binomial fit whose fitted probabilities touch 0 or 1, takes a few more unguarded
/// scoring steps and returns the design columns (indices into the full design) whose
/// coefficients keep moving, or `None` when the fit is a genuine maximum. A coefficient is
/// implicated when its change times the largest |x| in its column is at least a tenth of the
/// largest change in any linear predictor, and that largest change exceeds one unit: at a true
/// maximum further steps move the linear predictor by round-off only, while along a separating
/// direction every step moves it by roughly one unit.
pub(crate) fn separation_columns(
    kernel: &Kernel,
    problem: &Problem,
    active: &[usize],
    outcome: &IrlsOutcome,
) -> Option<Vec<usize>> {
    if !touches_boundary(kernel, problem, &outcome.means) {
        return None;
    }
    let n_rows = problem.response.len();
    let mut coefficients = outcome.coefficients.clone();
    let mut linear_predictor = outcome.linear_predictor.clone();
    let mut means = outcome.means.clone();
    let mut working_weights = vec![0.0; n_rows];
    let mut working_response = vec![0.0; n_rows];
    let mut derivatives = vec![0.0; n_rows];
    for _ in 0..DIVERGENCE_STEPS {
        if !working_quantities(
            kernel,
            problem,
            &linear_predictor,
            &means,
            &mut working_weights,
            &mut working_response,
            &mut derivatives,
        ) {
            break;
        }
        let (cross, right) = weighted_cross_product_from(
            problem.design,
            problem.sparse_rows,
            active,
            &working_weights,
            Some(&working_response),
        );
        let Some(factor) = ScaledCholesky::new(&cross) else {
            break;
        };
        let proposal = factor.solve(&right);
        if proposal.iter().any(|v| !v.is_finite()) {
            break;
        }
        coefficients = proposal;
        linear_predictor_into(
            problem.design,
            problem.sparse_rows,
            active,
            &coefficients,
            problem.offset,
            &mut linear_predictor,
        );
        for i in 0..n_rows {
            means[i] = kernel.mean(linear_predictor[i]);
        }
    }
    let change = &coefficients - &outcome.coefficients;
    let mut largest_eta_change: f64 = 0.0;
    for ((eta_after, eta_before), &weight) in linear_predictor
        .iter()
        .zip(&outcome.linear_predictor)
        .zip(problem.weights)
    {
        if weight > 0.0 {
            largest_eta_change = largest_eta_change.max((eta_after - eta_before).abs());
        }
    }
    if largest_eta_change.is_nan() || largest_eta_change <= 1.0 {
        return None;
    }
    let mut columns = Vec::new();
    for (a, &column) in active.iter().enumerate() {
        let largest_x = problem.design.column_largest_abs(column);
        if change[a].abs() * largest_x >= 0.1 * largest_eta_change {
            columns.push(column);
        }
    }
    Some(columns)
}
