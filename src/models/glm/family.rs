//! Families and links of the GLM engine: inverse links and their derivatives, variance
//! functions, unit deviances, starting means and full log-likelihoods. Everything here is a pure
//! function of one observation (or of slices); this file owns no iteration and no matrix
//! algebra, and it must never return NaN for a valid mean (means are clamped the way the
//! reference implementation in R's `stats` package clamps them, so that fits of separated data
//! stay finite).
//!
//! References: McCullagh & Nelder (1989), *Generalized Linear Models*, 2nd ed., ch. 2 and 8
//! (variance functions, deviances); Hilbe (2011), *Negative Binomial Regression*, 2nd ed., §8
//! (NB2 log-likelihood); R's `family.R` for the numerical clamps (common practice).

#[allow(unused_imports)]
use crate::models::portable::Portable;
use libm::erfc;
use libm::lgamma as ln_gamma;
use statrs::function::erf::erfc_inv;

use super::negative_binomial::CountMemo;
use super::{Family, Link};

/// Smallest probability or mean the inverse links return; R's `binomial()` and `poisson()` use
/// the same machine-epsilon clamp (common practice), which keeps separated fits finite.
const MEAN_FLOOR: f64 = f64::EPSILON;

/// Linear-predictor magnitude beyond which the logistic function is clamped (R's `thresh = 30`).
const LOGIT_CLAMP: f64 = 30.0;

/// |eta| beyond which the probit inverse link is clamped: -qnorm(machine epsilon).
const PROBIT_CLAMP: f64 = 8.125_890_664_701_906;

/// A family with its link and, for the negative binomial, a fixed shape theta: everything the
/// iteration needs to turn a linear predictor into means, weights and deviances.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Kernel {
    pub(crate) distribution: Distribution,
    pub(crate) link: Link,
}

/// The distribution part of a family once a negative-binomial theta has been fixed.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) enum Distribution {
    Binomial,
    Poisson,
    NegativeBinomial { theta: f64 },
    Gamma,
}

impl Distribution {
    /// The distribution of a family; an estimated negative-binomial theta starts as `theta`.
    pub(crate) fn from_family(family: &Family, theta: f64) -> Distribution {
        match family {
            Family::Binomial => Distribution::Binomial,
            Family::Poisson => Distribution::Poisson,
            Family::NegativeBinomial { .. } => Distribution::NegativeBinomial { theta },
            Family::Gamma => Distribution::Gamma,
        }
    }
}

fn standard_normal_cdf(x: f64) -> f64 {
    0.5 * erfc(-x / std::f64::consts::SQRT_2)
}

fn standard_normal_density(x: f64) -> f64 {
    (-0.5 * x * x).pexp() / (2.0 * std::f64::consts::PI).sqrt()
}

impl Kernel {
    /// The link function g(mu); used only for starting values.
    pub(crate) fn link_function(&self, mean: f64) -> f64 {
        match self.link {
            Link::Logit => (mean / (1.0 - mean)).pln(),
            Link::Probit => -std::f64::consts::SQRT_2 * erfc_inv(2.0 * mean),
            Link::CLogLog => (-(-mean).pln_1p()).pln(),
            Link::Log => mean.pln(),
            Link::Inverse => 1.0 / mean,
            Link::Identity => mean,
        }
    }

    /// The inverse link mu = g^{-1}(eta), clamped as R clamps it for the binomial links and the
    /// log link so that means never reach the boundary of their space.
    pub(crate) fn mean(&self, eta: f64) -> f64 {
        match self.link {
            Link::Logit => {
                if eta < -LOGIT_CLAMP {
                    MEAN_FLOOR
                } else if eta > LOGIT_CLAMP {
                    1.0 - MEAN_FLOOR
                } else {
                    1.0 / (1.0 + (-eta).pexp())
                }
            }
            Link::Probit => standard_normal_cdf(eta.clamp(-PROBIT_CLAMP, PROBIT_CLAMP)),
            Link::CLogLog => (-(-eta.pexp()).pexp_m1()).clamp(MEAN_FLOOR, 1.0 - MEAN_FLOOR),
            Link::Log => eta.pexp().max(MEAN_FLOOR),
            Link::Inverse => 1.0 / eta,
            Link::Identity => eta,
        }
    }

    /// d mu / d eta at eta, floored at machine epsilon for the binomial and log links (R does the
    /// same) so that working weights never become exactly zero.
    pub(crate) fn mean_derivative(&self, eta: f64) -> f64 {
        match self.link {
            Link::Logit => {
                if eta.abs() > LOGIT_CLAMP {
                    MEAN_FLOOR
                } else {
                    let e = (-eta.abs()).pexp();
                    e / ((1.0 + e) * (1.0 + e))
                }
            }
            Link::Probit => standard_normal_density(eta).max(MEAN_FLOOR),
            Link::CLogLog => {
                let capped = eta.min(700.0);
                (capped - capped.pexp()).pexp().max(MEAN_FLOOR)
            }
            Link::Log => eta.pexp().max(MEAN_FLOOR),
            Link::Inverse => -1.0 / (eta * eta),
            Link::Identity => 1.0,
        }
    }

    /// d²μ/dη² at eta (zero where the inverse link is clamped, since μ is constant there).
    pub(crate) fn mean_second_derivative(&self, eta: f64) -> f64 {
        match self.link {
            Link::Logit => {
                if eta.abs() > LOGIT_CLAMP {
                    0.0
                } else {
                    let mu = 1.0 / (1.0 + (-eta).pexp());
                    mu * (1.0 - mu) * (1.0 - 2.0 * mu)
                }
            }
            Link::Probit => {
                if eta.abs() > PROBIT_CLAMP {
                    0.0
                } else {
                    -eta * standard_normal_density(eta)
                }
            }
            Link::CLogLog => {
                let capped = eta.min(700.0);
                (capped - capped.pexp()).pexp() * (1.0 - capped.pexp())
            }
            Link::Log => eta.pexp(),
            Link::Inverse => 2.0 / (eta * eta * eta),
            Link::Identity => 0.0,
        }
    }

    /// Whether `eta` lies where the inverse link is clamped (μ constant in η), so that the
    /// likelihood is flat there and Newton steps are unreliable.
    pub(crate) fn is_clamped(&self, eta: f64) -> bool {
        match self.link {
            Link::Logit => eta.abs() > LOGIT_CLAMP,
            Link::Probit => eta.abs() > PROBIT_CLAMP,
            Link::CLogLog => {
                let mean = -(-eta.pexp()).pexp_m1();
                !(mean > MEAN_FLOOR && mean < 1.0 - MEAN_FLOOR)
            }
            Link::Log => eta.pexp() < MEAN_FLOOR,
            Link::Inverse | Link::Identity => false,
        }
    }

    /// Whether the link is the canonical one, for which observed and expected information
    /// coincide and Newton's method is Fisher scoring.
    pub(crate) fn is_canonical(&self) -> bool {
        matches!(
            (self.distribution, self.link),
            (Distribution::Binomial, Link::Logit)
                | (Distribution::Poisson, Link::Log)
                | (Distribution::Gamma, Link::Inverse)
        )
    }

    /// The observed-information weight of one row, −∂²lᵢ/∂ηᵢ² (up to the dispersion):
    /// m (dμ/dη)²/V − m (y − μ) d/dη[(dμ/dη)/V]. It may be negative far from the maximum.
    /// `first` is dμ/dη at `eta`, already evaluated by the caller.
    pub(crate) fn observed_weight_given_derivative(
        &self,
        response: f64,
        eta: f64,
        mean: f64,
        first: f64,
        weight: f64,
    ) -> f64 {
        let second = self.mean_second_derivative(eta);
        let variance = self.variance(mean);
        let variance_slope = match self.distribution {
            Distribution::Binomial => 1.0 - 2.0 * mean,
            Distribution::Poisson => 1.0,
            Distribution::NegativeBinomial { theta } => 1.0 + 2.0 * mean / theta,
            Distribution::Gamma => 2.0 * mean,
        };
        let ratio_slope =
            second / variance - first * first * variance_slope / (variance * variance);
        weight * (first * first / variance - (response - mean) * ratio_slope)
    }

    /// The variance function V(mu).
    pub(crate) fn variance(&self, mean: f64) -> f64 {
        match self.distribution {
            Distribution::Binomial => mean * (1.0 - mean),
            Distribution::Poisson => mean,
            Distribution::NegativeBinomial { theta } => mean + mean * mean / theta,
            Distribution::Gamma => mean * mean,
        }
    }

    /// Whether a mean lies inside the family's mean space (checked before a step is accepted).
    pub(crate) fn valid_mean(&self, mean: f64) -> bool {
        if !mean.is_finite() {
            return false;
        }
        match self.distribution {
            Distribution::Binomial => mean > 0.0 && mean < 1.0,
            _ => mean > 0.0,
        }
    }

    /// The unit deviance of one observation times its prior weight.
    pub(crate) fn deviance_contribution(&self, response: f64, mean: f64, weight: f64) -> f64 {
        let y = response;
        let mu = mean;
        let unit = match self.distribution {
            Distribution::Binomial => 2.0 * (x_log_x_over(y, mu) + x_log_x_over(1.0 - y, 1.0 - mu)),
            Distribution::Poisson => 2.0 * (x_log_x_over(y, mu) - (y - mu)),
            Distribution::NegativeBinomial { theta } => {
                2.0 * (x_log_x_over(y, mu) - (y + theta) * ((y + theta) / (mu + theta)).pln())
            }
            Distribution::Gamma => -2.0 * ((y / mu).pln() - (y - mu) / mu),
        };
        weight * unit
    }

    /// Starting mean for one observation, as R's family `initialize` expressions choose it
    /// (common practice): binomial (m y + 1/2)/(m + 1), counts y + 1/10 (the negative binomial
    /// starts from a Poisson fit, see `negative_binomial.rs`), Gamma y.
    pub(crate) fn starting_mean(&self, response: f64, weight: f64) -> f64 {
        match self.distribution {
            Distribution::Binomial => (weight * response + 0.5) / (weight + 1.0),
            Distribution::Poisson | Distribution::NegativeBinomial { .. } => response + 0.1,
            Distribution::Gamma => response,
        }
    }
}

/// Neumaier's compensated sum (Higham 2002, §4.3): with 10⁶ rows a plain running sum loses
/// about 1e-12 of a deviance, enough to make step-halving reject good steps near the optimum.
pub(crate) fn compensated_sum(values: impl Iterator<Item = f64>) -> f64 {
    let mut sum = 0.0_f64;
    let mut compensation = 0.0_f64;
    for value in values {
        let total = sum + value;
        if sum.abs() >= value.abs() {
            compensation += (sum - total) + value;
        } else {
            compensation += (value - total) + sum;
        }
        sum = total;
    }
    sum + compensation
}

/// y log(y / mu) with the convention 0 log 0 = 0.
fn x_log_x_over(y: f64, mu: f64) -> f64 {
    if y > 0.0 { y * (y / mu).pln() } else { 0.0 }
}

/// The full log-likelihood with all constants, matching R's `logLik` for `glm` and
/// fits by the MASS package's negative-binomial routine:
/// - binomial: sum of log dbinom(round(m y), round(m), mu), m the prior weight (trials);
/// - Poisson: sum of w (y log mu - mu - lgamma(y + 1));
/// - negative binomial: sum of w (lgamma(theta + y) - lgamma(theta) - lgamma(y + 1)
///   + theta log theta + y log mu - (theta + y) log(theta + mu));
/// - Gamma: sum of w log dgamma(y; shape 1/phi, scale mu phi) with phi = deviance / sum(w), the
///   deviance-based dispersion estimate R's `Gamma()$aic` uses (not the Pearson dispersion used
///   for standard errors).
pub(crate) fn log_likelihood(
    kernel: &Kernel,
    response: &[f64],
    means: &[f64],
    weights: &[f64],
    deviance: f64,
) -> f64 {
    match kernel.distribution {
        Distribution::Binomial => compensated_sum(
            response
                .iter()
                .zip(means)
                .zip(weights)
                .filter(|(_, weight)| **weight > 0.0)
                .map(|((&y, &mu), &weight)| {
                    let trials = weight.round();
                    let successes = (weight * y).round();
                    let mut value = ln_gamma(trials + 1.0)
                        - ln_gamma(successes + 1.0)
                        - ln_gamma(trials - successes + 1.0);
                    if successes > 0.0 {
                        value += successes * mu.pln();
                    }
                    if trials - successes > 0.0 {
                        value += (trials - successes) * (-mu).pln_1p();
                    }
                    value
                }),
        ),
        Distribution::Poisson => {
            let mut log_factorial = CountMemo::new(ln_gamma, 1.0);
            compensated_sum(
                response
                    .iter()
                    .zip(means)
                    .zip(weights)
                    .map(|((&y, &mu), &weight)| {
                        let y_log_mu = if y > 0.0 { y * mu.pln() } else { 0.0 };
                        weight * (y_log_mu - mu - log_factorial.at(y))
                    }),
            )
        }
        Distribution::NegativeBinomial { theta } => {
            let mut log_factorial = CountMemo::new(ln_gamma, 1.0);
            let mut log_gamma_shifted = CountMemo::new(ln_gamma, theta);
            compensated_sum(
                response
                    .iter()
                    .zip(means)
                    .zip(weights)
                    .map(|((&y, &mu), &weight)| {
                        let y_log_mu = if y > 0.0 { y * mu.pln() } else { 0.0 };
                        weight
                            * (log_gamma_shifted.at(y) - ln_gamma(theta) - log_factorial.at(y)
                                + theta * theta.pln()
                                + y_log_mu
                                - (theta + y) * (theta + mu).pln())
                    }),
            )
        }
        Distribution::Gamma => {
            let total_weight = compensated_sum(weights.iter().copied());
            let dispersion = deviance / total_weight;
            let shape = 1.0 / dispersion;
            compensated_sum(
                response
                    .iter()
                    .zip(means)
                    .zip(weights)
                    .map(|((&y, &mu), &weight)| {
                        let scale = mu * dispersion;
                        weight
                            * ((shape - 1.0) * y.pln()
                                - y / scale
                                - shape * scale.pln()
                                - ln_gamma(shape))
                    }),
            )
        }
    }
}
