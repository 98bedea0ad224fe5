//! Profile-likelihood confidence limits for one coefficient of a maximum-likelihood GLM fit.
//! The coefficient is fixed at b through the offset, the other coefficients are refitted, and
//! the limits solve (D(b) − D̂)/φ = c², where D is the deviance, φ the fit's dispersion (1 for
//! binomial, Poisson and negative binomial; the Pearson estimate for Gamma) and c the caller's
//! critical value. This is the signed-root statistic z(b) = sign(b − β̂) √((D(b) − D̂)/φ) that
//! `MASS:::profile.glm` computes and `MASS:::confint.profile.glm` inverts at normal quantiles
//! (for every family, including those with estimated dispersion); for the negative binomial θ
//! stays fixed at its estimate, as when MASS profiles its negative-binomial fit. MASS interpolates a spline
//! through a grid of z values; this file finds the roots themselves with Brent's bracketed
//! method. It owns no quantile computation and must not change the fit it is given.
//!
//! References: Venables & Ripley (2002), *Modern Applied Statistics with S*, 4th ed., §8.4;
//! Brent (1973), *Algorithms for Minimization without Derivatives*, ch. 4 (zeroin).

use super::family::Kernel;
use super::irls::{IrlsStatus, Problem, Start, run_irls, total_deviance};
use super::{GlmData, GlmError, GlmFit, GlmOptions, Method, kernel_of, prepare, tolerances_of};
use crate::models::StopReason;

/// Profile-likelihood limits of one coefficient.
#[derive(Debug, Clone, PartialEq)]
pub struct ProfileInterval {
    pub lower: f64,
    pub upper: f64,
    /// Constrained refits performed.
    pub evaluations: usize,
}

/// Doublings of the outward step before a side is declared unbounded.
const MAX_DOUBLINGS: usize = 40;

/// Computes the profile-likelihood interval of `coefficient` (a design column index) for a fit
/// made by [`super::fit_glm`] from the same `data` and `options`. `critical_value` is c > 0, e.g.
/// the standard normal 0.975 quantile for a 95% interval (c² is then the χ²₁ 0.95 quantile).
///
/// Requirements: maximum-likelihood fit, converged (`Converged`, or `SingularDesign` whose
/// remaining coefficients converged), coefficient estimable.
pub fn profile_interval(
    data: &GlmData,
    options: &GlmOptions,
    fit: &GlmFit,
    coefficient: usize,
    critical_value: f64,
) -> Result<ProfileInterval, GlmError> {
    if options.method != Method::MaximumLikelihood {
        return Err(GlmError::ProfileFailure {
            detail: "profile intervals need a maximum-likelihood fit".to_string(),
        });
    }
    if !(critical_value > 0.0 && critical_value.is_finite()) {
        return Err(GlmError::ProfileFailure {
            detail: format!("critical value {critical_value} must be finite and > 0"),
        });
    }
    if !matches!(
        fit.stop_reason,
        StopReason::Converged { .. } | StopReason::SingularDesign { .. }
    ) {
        return Err(GlmError::ProfileFailure {
            detail: format!(
                "the fit did not converge ({:?}), so it has no profile",
                fit.stop_reason
            ),
        });
    }
    let prepared = prepare(data, options)?;
    // `coefficient` and the fit's vectors count positions in the model's columns.
    let n_columns = prepared.columns.len();
    if coefficient >= n_columns || fit.coefficients.len() != n_columns {
        return Err(GlmError::ProfileFailure {
            detail: format!("coefficient {coefficient} is not a column of the design"),
        });
    }
    let (Some(estimate), Some(standard_error)) = (
        fit.coefficients[coefficient],
        fit.standard_errors[coefficient],
    ) else {
        return Err(GlmError::ProfileFailure {
            detail: format!("coefficient {coefficient} is aliased"),
        });
    };
    if !standard_error.is_finite() || standard_error <= 0.0 {
        return Err(GlmError::ProfileFailure {
            detail: "the standard error is zero".to_string(),
        });
    }
    let others: Vec<usize> = (0..n_columns)
        .filter(|&j| j != coefficient && fit.coefficients[j].is_some())
        .map(|j| prepared.columns[j])
        .collect();
    let theta = fit.theta.as_ref().map_or(1.0, |t| t.theta);
    let mut profile = Profiler {
        kernel: kernel_of(options, theta),
        options,
        response: prepared.response,
        weights: &prepared.weights,
        base_offset: &prepared.offset,
        design: &prepared.design,
        coefficient: prepared.columns[coefficient],
        others,
        warm_start: fit.linear_predictors.clone(),
        fitted_deviance: fit.deviance,
        dispersion: fit.dispersion,
        critical_squared: critical_value * critical_value,
        evaluations: 0,
    };
    let lower = profile.limit(estimate, -critical_value * standard_error)?;
    profile.warm_start = fit.linear_predictors.clone();
    let upper = profile.limit(estimate, critical_value * standard_error)?;
    Ok(ProfileInterval {
        lower,
        upper,
        evaluations: profile.evaluations,
    })
}

struct Profiler<'a> {
    kernel: Kernel,
    options: &'a GlmOptions,
    response: &'a [f64],
    weights: &'a [f64],
    base_offset: &'a [f64],
    design: &'a crate::models::DenseOnDemand<'a>,
    coefficient: usize,
    others: Vec<usize>,
    warm_start: Vec<f64>,
    fitted_deviance: f64,
    dispersion: f64,
    critical_squared: f64,
    evaluations: usize,
}

impl Profiler<'_> {
    /// (D(b) − D̂)/φ − c² with the coefficient fixed at b.
    fn objective(&mut self, value: f64) -> Result<f64, GlmError> {
        self.evaluations += 1;
        let n_rows = self.response.len();
        let column = &self.design.dense().as_slice()
            [self.coefficient * n_rows..(self.coefficient + 1) * n_rows];
        let offset: Vec<f64> = self
            .base_offset
            .iter()
            .zip(column)
            .map(|(o, x)| o + x * value)
            .collect();
        let problem = Problem {
            design: self.design,
            sparse_rows: None,
            response: self.response,
            weights: self.weights,
            offset: &offset,
        };
        let deviance = if self.others.is_empty() {
            let means: Vec<f64> = offset.iter().map(|&eta| self.kernel.mean(eta)).collect();
            if !means
                .iter()
                .zip(self.weights)
                .all(|(&mu, &w)| w == 0.0 || self.kernel.valid_mean(mu))
            {
                return Err(GlmError::ProfileFailure {
                    detail: format!("no valid means with the coefficient at {value}"),
                });
            }
            total_deviance(&self.kernel, &problem, &means)
        } else {
            let outcome = run_irls(
                &self.kernel,
                &problem,
                &self.others,
                Start::LinearPredictor(&self.warm_start),
                tolerances_of(self.options),
            );
            if outcome.status != IrlsStatus::Converged {
                return Err(GlmError::ProfileFailure {
                    detail: format!(
                        "the constrained refit with the coefficient at {value} did not converge ({:?})",
                        outcome.status
                    ),
                });
            }
            self.warm_start = outcome.linear_predictor;
            outcome.deviance
        };
        let statistic = (deviance - self.fitted_deviance) / self.dispersion;
        if !statistic.is_finite() {
            return Err(GlmError::ProfileFailure {
                detail: format!("non-finite deviance with the coefficient at {value}"),
            });
        }
        if statistic < -1e-3 {
            return Err(GlmError::ProfileFailure {
                detail: "profiling found a better fit than the estimate, so the original fit had not converged".to_string(),
            });
        }
        Ok(statistic - self.critical_squared)
    }

    /// The limit on the side of `first_step`: step outwards (doubling) until the objective is
    /// non-negative, then Brent's method on the bracket.
    fn limit(&mut self, estimate: f64, first_step: f64) -> Result<f64, GlmError> {
        let mut inner = estimate;
        let mut inner_value = -self.critical_squared;
        let mut step = first_step;
        for _ in 0..MAX_DOUBLINGS {
            let outer = estimate + step;
            let outer_value = self.objective(outer)?;
            if outer_value >= 0.0 {
                let tolerance = 1e-10 * (estimate.abs() + first_step.abs());
                return self.brent(inner, inner_value, outer, outer_value, tolerance);
            }
            inner = outer;
            inner_value = outer_value;
            step *= 2.0;
        }
        Err(GlmError::ProfileFailure {
            detail: "the profile deviance never reaches the critical value: the interval is unbounded on one side".to_string(),
        })
    }

    /// Brent's zeroin on [a, b] with f(a) < 0 ≤ f(b).
    fn brent(&mut self, a: f64, fa: f64, b: f64, fb: f64, tolerance: f64) -> Result<f64, GlmError> {
        let (mut a, mut fa, mut b, mut fb) = (a, fa, b, fb);
        let mut c = a;
        let mut fc = fa;
        let mut d = b - a;
        let mut e = d;
        for _ in 0..200 {
            if (fb > 0.0 && fc > 0.0) || (fb < 0.0 && fc < 0.0) {
                c = a;
                fc = fa;
                d = b - a;
                e = d;
            }
            if fc.abs() < fb.abs() {
                a = b;
                b = c;
                c = a;
                fa = fb;
                fb = fc;
                fc = fa;
            }
            let tol1 = 2.0 * f64::EPSILON * b.abs() + 0.5 * tolerance;
            let middle = 0.5 * (c - b);
            if middle.abs() <= tol1 || fb == 0.0 {
                return Ok(b);
            }
            if e.abs() >= tol1 && fa.abs() > fb.abs() {
                let s = fb / fa;
                let (mut p, mut q);
                if a == c {
                    p = 2.0 * middle * s;
                    q = 1.0 - s;
                } else {
                    let q0 = fa / fc;
                    let r = fb / fc;
                    p = s * (2.0 * middle * q0 * (q0 - r) - (b - a) * (r - 1.0));
                    q = (q0 - 1.0) * (r - 1.0) * (s - 1.0);
                }
                if p > 0.0 {
                    q = -q;
                } else {
                    p = -p;
                }
                if 2.0 * p < (3.0 * middle * q - (tol1 * q).abs()).min((e * q).abs()) {
                    e = d;
                    d = p / q;
                } else {
                    d = middle;
                    e = d;
                }
            } else {
                d = middle;
                e = d;
            }
            a = b;
            fa = fb;
            b += if d.abs() > tol1 {
                d
            } else {
                tol1 * middle.signum()
            };
            fb = self.objective(b)?;
        }
        Err(GlmError::ProfileFailure {
            detail: "Brent's method did not converge in 200 evaluations".to_string(),
        })
    }
}
