//! The Newton–Raphson driver shared by the cumulative link and multinomial engines: each
//! iteration solves the Newton system with the observed information (Cholesky), then halves the
//! step until the candidate is admissible and the log-likelihood does not decrease beyond the
//! rounding noise of a long sum. Convergence needs the engine's gradient criterion and a
//! relative change of the log-likelihood within tolerance. The engines own their likelihood
//! passes, starting values, criteria and what they report; this file owns only the iteration.

use super::StopReason;
use nalgebra::{DMatrix, DVector};

/// A log-likelihood with the buffers one pass over the rows fills.
pub(crate) trait Likelihood {
    /// Whether `parameters` may be evaluated at all (finite, and whatever the model requires).
    fn admissible(&self, parameters: &[f64]) -> bool;
    /// The log-likelihood at `parameters`, leaving its gradient and the upper triangle of its
    /// Hessian (row-major) in the buffers; `None` where it is not finite.
    fn evaluate(&mut self, parameters: &[f64]) -> Option<f64>;
    fn gradient(&self) -> &[f64];
    fn hessian_upper(&self) -> &[f64];
}

/// How long to iterate and when to stop.
pub(crate) struct Settings<'a> {
    pub(crate) max_iterations: usize,
    pub(crate) log_likelihood_tolerance: f64,
    /// Whether a gradient is small enough, by the engine's scales.
    pub(crate) gradient_converged: &'a dyn Fn(&[f64]) -> bool,
    /// The words for a step that no halving could make acceptable.
    pub(crate) halving_failure: &'static str,
}

/// Where the iteration stopped: the last accepted parameters, their log-likelihood, and why.
/// The likelihood's buffers hold the derivatives at these parameters.
pub(crate) struct Run {
    pub(crate) parameters: Vec<f64>,
    pub(crate) log_likelihood: f64,
    pub(crate) iterations: usize,
    pub(crate) stop_reason: StopReason,
}

/// Maximises from `parameters`, already evaluated: `log_likelihood` is their value and the
/// likelihood's buffers hold their derivatives.
pub(crate) fn maximise(
    likelihood: &mut impl Likelihood,
    mut parameters: Vec<f64>,
    mut log_likelihood: f64,
    settings: &Settings,
) -> Run {
    let n_parameters = parameters.len();
    let mut iterations = 0;
    let mut stop_reason = None;
    if (settings.gradient_converged)(likelihood.gradient()) {
        stop_reason = Some(StopReason::Converged { iterations: 0 });
    }
    let mut candidate = vec![0.0; n_parameters];
    while stop_reason.is_none() {
        if iterations >= settings.max_iterations {
            stop_reason = Some(StopReason::IterationLimit { iterations });
            break;
        }
        iterations += 1;
        let Some(cholesky) =
            information_matrix(likelihood.hessian_upper(), n_parameters).cholesky()
        else {
            stop_reason = Some(StopReason::NumericalFailure {
                detail: "the observed information is not positive definite".to_string(),
            });
            break;
        };
        let step = cholesky.solve(&DVector::from_column_slice(likelihood.gradient()));
        let mut step_size = 1.0;
        let mut accepted = None;
        for _ in 0..60 {
            for r in 0..n_parameters {
                candidate[r] = parameters[r] + step_size * step[r];
            }
            // The trial pass also accumulates derivatives: the full step is nearly always
            // accepted, and then they serve the next iteration without another pass.
            if likelihood.admissible(&candidate)
                && let Some(candidate_log_likelihood) = likelihood.evaluate(&candidate)
            {
                // Rounding in a sum over many rows can make an exact optimum look a hair
                // worse; a decrease within that noise is not a decrease.
                let noise = 64.0 * f64::EPSILON * log_likelihood.abs().max(1.0);
                if candidate_log_likelihood >= log_likelihood - noise {
                    accepted = Some(candidate_log_likelihood);
                    break;
                }
            }
            step_size *= 0.5;
        }
        let Some(accepted_log_likelihood) = accepted else {
            // Restore the derivatives at the current iterate, which the trials overwrote.
            let _ = likelihood.evaluate(&parameters);
            stop_reason = Some(StopReason::NumericalFailure {
                detail: settings.halving_failure.to_string(),
            });
            break;
        };
        parameters.copy_from_slice(&candidate);
        let previous = log_likelihood;
        log_likelihood = accepted_log_likelihood;
        let relative_change = (log_likelihood - previous).abs() / (log_likelihood.abs() + 1e-3);
        if (settings.gradient_converged)(likelihood.gradient())
            && relative_change <= settings.log_likelihood_tolerance
        {
            stop_reason = Some(StopReason::Converged { iterations });
        }
    }
    Run {
        parameters,
        log_likelihood,
        iterations,
        stop_reason: stop_reason.unwrap_or(StopReason::IterationLimit { iterations }),
    }
}

/// The information (negative Hessian) from the accumulated upper triangle.
pub(crate) fn information_matrix(upper: &[f64], n: usize) -> DMatrix<f64> {
    DMatrix::from_fn(n, n, |r, s| {
        let (first, second) = if r <= s { (r, s) } else { (s, r) };
        -upper[first * n + second]
    })
}

/// The inverse of the information at the estimate (the covariance of the estimates), or `None`
/// when the information is not positive definite or its inverse is not finite.
pub(crate) fn inverse_information(upper: &[f64], n: usize) -> Option<DMatrix<f64>> {
    information_matrix(upper, n)
        .cholesky()
        .map(|cholesky| cholesky.inverse())
        .filter(|inverse| inverse.iter().all(|v| v.is_finite()))
}
