//! Firth's penalised likelihood for the binomial logit model: maximises
//! l*(β) = l(β) + ½ log det I(β) by the modified-score iteration β ← β + I(β)⁻¹ U*(β) with
//! U*ⱼ = Σᵢ xᵢⱼ (mᵢ(yᵢ − μᵢ) + hᵢ(½ − μᵢ)), hᵢ the diagonal of the weighted hat matrix, and
//! step-halving on l*. Estimates exist under separation. This file owns only that iteration; the
//! covariance (the inverse of the unpenalised information at the penalised estimate, as is usual)
//! is formed by `mod.rs` from the information returned here.
//!
//! References: Firth (1993), "Bias reduction of maximum likelihood estimates", Biometrika
//! 80:27–38; Heinze & Schemper (2002), "A solution to the problem of separation in logistic
//! regression", Statistics in Medicine 21:2409–2419 (modified score and step-halving).

use nalgebra::{DMatrix, DVector};

use super::family::{Kernel, log_likelihood};
use super::irls::{
    IrlsOutcome, IrlsStatus, Problem, Tolerances, max_standardised_score, total_deviance,
};
use super::linalg::{ScaledCholesky, linear_predictor_into, weighted_cross_product_from};
use super::{Estimation, ThetaEstimate};

const MAX_HALVINGS: usize = 30;

/// Everything evaluated at one coefficient vector.
struct PenalisedPoint {
    coefficients: DVector<f64>,
    linear_predictor: Vec<f64>,
    means: Vec<f64>,
    binomial_weights: Vec<f64>,
    information: DMatrix<f64>,
    factor: ScaledCholesky,
    penalised_log_likelihood: f64,
}

fn evaluate(
    kernel: &Kernel,
    problem: &Problem,
    active: &[usize],
    coefficients: DVector<f64>,
) -> Option<PenalisedPoint> {
    let n_rows = problem.response.len();
    let mut linear_predictor = vec![0.0; n_rows];
    linear_predictor_into(
        problem.design,
        problem.sparse_rows,
        active,
        &coefficients,
        problem.offset,
        &mut linear_predictor,
    );
    let means: Vec<f64> = linear_predictor
        .iter()
        .map(|&eta| kernel.mean(eta))
        .collect();
    let binomial_weights: Vec<f64> = means
        .iter()
        .zip(problem.weights)
        .map(|(&mu, &m)| if m > 0.0 { m * mu * (1.0 - mu) } else { 0.0 })
        .collect();
    let (information, _) = weighted_cross_product_from(
        problem.design,
        problem.sparse_rows,
        active,
        &binomial_weights,
        None,
    );
    let factor = ScaledCholesky::new(&information)?;
    let deviance = total_deviance(kernel, problem, &means);
    let penalised = log_likelihood(kernel, problem.response, &means, problem.weights, deviance)
        + 0.5 * factor.log_determinant();
    if !penalised.is_finite() {
        return None;
    }
    Some(PenalisedPoint {
        coefficients,
        linear_predictor,
        means,
        binomial_weights,
        information,
        factor,
        penalised_log_likelihood: penalised,
    })
}

/// The modified score U* at a point (one pass over rows; one p-vector of scratch).
fn modified_score(problem: &Problem, active: &[usize], point: &PenalisedPoint) -> DVector<f64> {
    let n_rows = problem.response.len();
    let data = problem.design.dense().as_slice();
    let size = active.len();
    let mut row_values = vec![0.0; size];
    let mut work = vec![0.0; size];
    let mut score = DVector::<f64>::zeros(size);
    for i in 0..n_rows {
        let m = problem.weights[i];
        if m <= 0.0 {
            continue;
        }
        for (a, &column) in active.iter().enumerate() {
            row_values[a] = data[column * n_rows + i];
        }
        let leverage =
            point.binomial_weights[i] * point.factor.quadratic_form_inverse(&row_values, &mut work);
        let mu = point.means[i];
        let residual = m * (problem.response[i] - mu) + leverage * (0.5 - mu);
        for a in 0..size {
            score[a] += row_values[a] * residual;
        }
    }
    score
}

pub(crate) fn run_firth(
    kernel: &Kernel,
    problem: &Problem,
    active: &[usize],
    tolerances: Tolerances,
) -> Estimation {
    let start = DVector::<f64>::zeros(active.len());
    let failure = |detail: &str, point: Option<&PenalisedPoint>| {
        let n_rows = problem.response.len();
        let outcome = match point {
            Some(p) => IrlsOutcome {
                coefficients: p.coefficients.clone(),
                linear_predictor: p.linear_predictor.clone(),
                means: p.means.clone(),
                deviance: total_deviance(kernel, problem, &p.means),
                iterations: 0,
                status: IrlsStatus::Failed(detail.to_string()),
                information: p.information.clone(),
            },
            None => IrlsOutcome {
                coefficients: DVector::zeros(active.len()),
                linear_predictor: vec![0.0; n_rows],
                means: vec![0.5; n_rows],
                deviance: f64::NAN,
                iterations: 0,
                status: IrlsStatus::Failed(detail.to_string()),
                information: DMatrix::zeros(active.len(), active.len()),
            },
        };
        Estimation {
            kernel: *kernel,
            outcome,
            theta: None::<ThetaEstimate>,
            theta_failure: None,
            penalised_log_likelihood: point.map(|p| p.penalised_log_likelihood),
        }
    };
    let Some(mut point) = evaluate(kernel, problem, active, start) else {
        return failure(
            "the information matrix is singular at the starting value",
            None,
        );
    };
    let mut iterations = 0;
    let mut last_relative_change = f64::INFINITY;
    let status = loop {
        let score = modified_score(problem, active, &point);
        if iterations > 0
            && last_relative_change < tolerances.deviance
            && max_standardised_score(&score, &point.information) < tolerances.score
        {
            break IrlsStatus::Converged;
        }
        if iterations >= tolerances.max_iterations {
            break IrlsStatus::IterationLimit;
        }
        iterations += 1;
        let mut step = point.factor.solve(&score);
        let mut accepted = None;
        for _ in 0..=MAX_HALVINGS {
            let candidate = &point.coefficients + &step;
            if let Some(next) = evaluate(kernel, problem, active, candidate) {
                let old = point.penalised_log_likelihood;
                if next.penalised_log_likelihood >= old - 1e-12 * (old.abs() + 0.1) {
                    accepted = Some(next);
                    break;
                }
            }
            step *= 0.5;
        }
        let Some(next) = accepted else {
            if max_standardised_score(&score, &point.information) < tolerances.score {
                break IrlsStatus::Converged;
            }
            break IrlsStatus::Failed(
                "step-halving could not increase the penalised likelihood".to_string(),
            );
        };
        // The convergence measure is the one IRLS uses, on the penalised deviance −2 l*.
        let old_deviance = -2.0 * point.penalised_log_likelihood;
        let new_deviance = -2.0 * next.penalised_log_likelihood;
        last_relative_change = (new_deviance - old_deviance).abs() / (new_deviance.abs() + 0.1);
        point = next;
    };
    let penalised = point.penalised_log_likelihood;
    let outcome = IrlsOutcome {
        deviance: total_deviance(kernel, problem, &point.means),
        coefficients: point.coefficients,
        linear_predictor: point.linear_predictor,
        means: point.means,
        iterations,
        status,
        information: point.information,
    };
    Estimation {
        kernel: *kernel,
        outcome,
        theta: None,
        theta_failure: None,
        penalised_log_likelihood: Some(penalised),
    }
}
