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

/// `f(shift + y)` for responses `y`, remembered per whole count below [`CountMemo::LIMIT`]: a
/// count seen again gets the very value computed the first time, so a sum over the rows in
/// their order is the same bits as evaluating `f` row by row, with `f` (a digamma, trigamma or
/// log-gamma) evaluated once per distinct count instead of once per row.
pub(crate) struct CountMemo<F: Fn(f64) -> f64> {
    function: F,
    shift: f64,
    values: Vec<Option<f64>>,
}

impl<F: Fn(f64) -> f64> CountMemo<F> {
    const LIMIT: usize = 4096;

    pub(crate) fn new(function: F, shift: f64) -> CountMemo<F> {
        CountMemo {
            function,
            shift,
            values: Vec::new(),
        }
    }

    pub(crate) fn at(&mut self, y: f64) -> f64 {
        if !(y >= 0.0 && y < Self::LIMIT as f64 && y.fract() == 0.0) {
            return (self.function)(self.shift + y);
        }
        let index = y as usize;
        if index >= self.values.len() {
            self.values.resize(index + 1, None);
        }
        match self.values[index] {
            Some(value) => value,
            None => {
                let value = (self.function)(self.shift + y);
                self.values[index] = Some(value);
                value
            }
        }
    }
}

/// Score of the NB2 log-likelihood in θ at fixed means.
fn theta_score(theta: f64, response: &[f64], means: &[f64], weights: &[f64]) -> f64 {
    let digamma_theta = digamma(theta);
    let mut digamma_at = CountMemo::new(digamma, theta);
    let mut total = 0.0;
    for ((&y, &mu), &w) in response.iter().zip(means).zip(weights) {
        if w > 0.0 {
            total += w
                * (digamma_at.at(y) - digamma_theta + theta.pln() + 1.0
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
    let mut trigamma_at = CountMemo::new(trigamma, theta);
    let mut total = 0.0;
    for ((&y, &mu), &w) in response.iter().zip(means).zip(weights) {
        if w > 0.0 {
            total += w
                * (-trigamma_at.at(y) + trigamma_theta - 1.0 / theta + 2.0 / (mu + theta)
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
    use super::{CountMemo, trigamma};

    // Common practice for a memo: a remembered value is the value computed directly, to the
    // bit, for whole counts; other responses are computed directly every time.
    #[test]
    fn count_memo_gives_the_directly_computed_bits() {
        let theta = 1.7;
        let mut memo = CountMemo::new(trigamma, theta);
        for y in [0.0, 3.0, 3.0, 17.0, 0.0, 2.5, -1.0, 5000.0, 17.0] {
            assert_eq!(
                memo.at(y).to_bits(),
                trigamma(theta + y).to_bits(),
                "y = {y}"
            );
        }
        let calls = std::cell::Cell::new(0);
        let mut counted = CountMemo::new(
            |x: f64| {
                calls.set(calls.get() + 1);
                x * 2.0
            },
            0.5,
        );
        for y in [4.0, 4.0, 4.0, 1.0, 1.0, 0.25, 0.25] {
            counted.at(y);
        }
        assert_eq!(
            calls.get(),
            4,
            "two whole counts once each, the fraction every time"
        );
    }

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
