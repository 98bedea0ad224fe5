//! Maximum-likelihood estimation of the negative-binomial (NB2) shape θ for fixed means, its
//! observed information, and the trigamma function it needs. The alternation between IRLS for
//! β and Newton for θ lives in `mod.rs`; this file owns only the one-dimensional problem and must
//! not touch the design matrix.
//!
//! References: Lawless (1987), "Negative binomial and mixed Poisson regression", Canadian
//! Journal of Statistics 15:209–225 (score and information for θ); Venables & Ripley (2002),
//! *Modern Applied Statistics with S*, 4th ed., §7.4 (the moment start n / Σ w (y/μ − 1)² and the
//! alternation used by the MASS package's negative-binomial fit); Abramowitz & Stegun (1964), 6.4.6 and 6.4.12 (trigamma
//! recurrence and asymptotic series).

#[allow(unused_imports)]
use crate::models::portable::Portable;
use statrs::function::gamma::digamma;

/// Trigamma ψ'(x) for x > 0: the recurrence ψ'(x) = ψ'(x + 1) + 1/x² lifts x to at least 10,
/// where the asymptotic series (A&S 6.4.12) truncated after the x⁻¹¹ term is accurate to about
/// 1e-14 relative.
pub(crate) fn trigamma(x: f64) -> f64 {
    let mut value = 0.0;
    let mut z = x;
    while z < 10.0 {
        value += 1.0 / (z * z);
        z += 1.0;
    }
    let inverse = 1.0 / z;
    let inverse_squared = inverse * inverse;
    // 1/z + 1/(2z²) + 1/(6z³) − 1/(30z⁵) + 1/(42z⁷) − 1/(30z⁹) + 5/(66z¹¹)
    let series = inverse_squared
        * (1.0 / 6.0
            + inverse_squared
                * (-1.0 / 30.0
                    + inverse_squared
                        * (1.0 / 42.0
                            + inverse_squared * (-1.0 / 30.0 + inverse_squared * 5.0 / 66.0))));
    value + inverse + 0.5 * inverse_squared + inverse * series
}

/// Score of the NB2 log-likelihood in θ at fixed means.
fn theta_score(theta: f64, response: &[f64], means: &[f64], weights: &[f64]) -> f64 {
    let digamma_theta = digamma(theta);
    let mut total = 0.0;
    for ((&y, &mu), &w) in response.iter().zip(means).zip(weights) {
        if w > 0.0 {
            total += w
                * (digamma(theta + y) - digamma_theta + theta.pln() + 1.0
                    - (theta + mu).pln()
                    - (y + theta) / (mu + theta));
        }
    }
    total
}

/// Observed information (minus the second derivative of the log-likelihood) in θ at fixed means.
pub(crate) fn theta_information(
    theta: f64,
    response: &[f64],
    means: &[f64],
    weights: &[f64],
) -> f64 {
    let trigamma_theta = trigamma(theta);
    let mut total = 0.0;
    for ((&y, &mu), &w) in response.iter().zip(means).zip(weights) {
        if w > 0.0 {
            total += w
                * (-trigamma(theta + y) + trigamma_theta - 1.0 / theta + 2.0 / (mu + theta)
                    - (y + theta) / ((mu + theta) * (mu + theta)));
        }
    }
    total
}

/// The moment estimate Σw / Σ w (y/μ − 1)² used to start θ (as `MASS::theta.ml` does).
pub(crate) fn moment_theta(response: &[f64], means: &[f64], weights: &[f64]) -> f64 {
    let mut weight_total = 0.0;
    let mut denominator = 0.0;
    for ((&y, &mu), &w) in response.iter().zip(means).zip(weights) {
        if w > 0.0 {
            weight_total += w;
            denominator += w * (y / mu - 1.0) * (y / mu - 1.0);
        }
    }
    weight_total / denominator
}

/// How the θ search ended.
pub(crate) enum ThetaOutcome {
    Converged(f64),
    /// θ ran away to +∞ (no overdispersion) or Newton failed; in words, with the last value.
    Failed(String, f64),
}

/// Newton's method on the score in θ, from `start`, with the step halved whenever it would make
/// θ non-positive or non-finite. Stops when the step is below 1e-11 relative.
pub(crate) fn theta_maximum_likelihood(
    start: f64,
    response: &[f64],
    means: &[f64],
    weights: &[f64],
) -> ThetaOutcome {
    let mut theta = if start.is_finite() && start > 0.0 {
        start
    } else {
        1.0
    };
    for _ in 0..200 {
        let score = theta_score(theta, response, means, weights);
        let information = theta_information(theta, response, means, weights);
        if !score.is_finite() || !information.is_finite() {
            return ThetaOutcome::Failed(
                "the score or information for theta became non-finite".to_string(),
                theta,
            );
        }
        // A non-positive information means Newton would head the wrong way; a multiplicative
        // move in the direction of the score keeps the search going.
        let mut step = if information > 0.0 {
            score / information
        } else {
            score.signum() * theta
        };
        let mut candidate = theta + step;
        let mut halvings = 0;
        while !(candidate > 0.0 && candidate.is_finite()) && halvings < 60 {
            step *= 0.5;
            candidate = theta + step;
            halvings += 1;
        }
        if !(candidate > 0.0 && candidate.is_finite()) {
            return ThetaOutcome::Failed(
                "Newton steps for theta left the positive half-line".to_string(),
                theta,
            );
        }
        let converged = (candidate - theta).abs() <= 1e-11 * candidate;
        theta = candidate;
        if theta > 1e10 {
            return ThetaOutcome::Failed(
                "the estimate of theta diverges to infinity: the counts show no overdispersion \
                 relative to a Poisson model"
                    .to_string(),
                theta,
            );
        }
        if converged {
            return ThetaOutcome::Converged(theta);
        }
    }
    ThetaOutcome::Failed(
        "Newton iterations for theta reached their limit of 200".to_string(),
        theta,
    )
}

#[cfg(test)]
mod tests {
    use super::trigamma;

    #[test]
    fn trigamma_matches_closed_forms() {
        // ψ'(1) = π²/6 and ψ'(1/2) = π²/2 (Abramowitz & Stegun 6.4.2, 6.4.4); relative 1e-13.
        let pi_squared = std::f64::consts::PI * std::f64::consts::PI;
        assert!((trigamma(1.0) / (pi_squared / 6.0) - 1.0).abs() < 1e-13);
        assert!((trigamma(0.5) / (pi_squared / 2.0) - 1.0).abs() < 1e-13);
        // ψ'(x) ~ 1/x + 1/(2x²) for large x (A&S 6.4.12); relative 1e-12.
        let x = 1e6;
        assert!((trigamma(x) / (1.0 / x + 0.5 / (x * x)) - 1.0).abs() < 1e-12);
    }
}
