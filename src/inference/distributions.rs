//! Reference distributions: tail probabilities and quantiles.
//!
//! Thin wrappers over statrs that fix the conventions used everywhere in
//! cairn: p-values come from survival functions (never `1 − cdf`, which loses
//! every digit of a small p), and quantiles are polished by Newton steps on
//! the cumulative distribution so that confidence limits agree with
//! reference libraries to about 1e-12 relative.

use statrs::distribution::{
    ChiSquared, Continuous, ContinuousCDF, FisherSnedecor, Normal, StudentsT,
};
use statrs::function::gamma::gamma_ur;

/// Two-sided p-value of a t statistic with `df` degrees of freedom.
pub fn t_two_sided_p(statistic: f64, df: f64) -> Option<f64> {
    let distribution = StudentsT::new(0.0, 1.0, df).ok()?;
    finite((2.0 * distribution.sf(statistic.abs())).min(1.0))
}

/// Upper-tail p-value P(T > t) of Student's t with `df` degrees of freedom.
pub fn t_upper_p(statistic: f64, df: f64) -> Option<f64> {
    let distribution = StudentsT::new(0.0, 1.0, df).ok()?;
    finite(distribution.sf(statistic))
}

/// Upper-tail p-value of an F statistic.
pub fn f_upper_p(statistic: f64, df1: f64, df2: f64) -> Option<f64> {
    let distribution = FisherSnedecor::new(df1, df2).ok()?;
    finite(distribution.sf(statistic.max(0.0)))
}

/// Upper-tail p-value of a chi-square statistic.
pub fn chi_square_upper_p(statistic: f64, df: f64) -> Option<f64> {
    let distribution = ChiSquared::new(df).ok()?;
    finite(distribution.sf(statistic.max(0.0)))
}

/// The `probability` quantile of Student's t with `df` degrees of freedom.
pub fn t_quantile(probability: f64, df: f64) -> Option<f64> {
    let distribution = StudentsT::new(0.0, 1.0, df).ok()?;
    polish(
        |x| distribution.cdf(x),
        |x| distribution.pdf(x),
        distribution.inverse_cdf(probability),
        probability,
    )
}

/// Upper tail of the standard normal, P(Z > x). Computed through the
/// regularised incomplete gamma function, Φ(−|x|) = Q(1/2, x²/2) / 2, because
/// statrs' erfc-based normal cdf is only good to about 1e-11 relative.
pub fn normal_upper(x: f64) -> f64 {
    let tail = 0.5 * gamma_ur(0.5, 0.5 * x * x);
    if x >= 0.0 { tail } else { 1.0 - tail }
}

/// The standard normal cumulative distribution function, to about 1e-15 relative.
pub fn normal_cdf(x: f64) -> f64 {
    normal_upper(-x)
}

/// Two-sided p-value of a standard normal statistic.
pub fn normal_two_sided_p(statistic: f64) -> Option<f64> {
    finite((2.0 * normal_upper(statistic.abs())).min(1.0))
}

/// The `probability` quantile of the standard normal distribution.
pub fn normal_quantile(probability: f64) -> Option<f64> {
    let distribution = Normal::new(0.0, 1.0).ok()?;
    polish(
        normal_cdf,
        |x| distribution.pdf(x),
        distribution.inverse_cdf(probability),
        probability,
    )
}

/// A few Newton steps on cdf(x) = p from the library's starting quantile.
fn polish(
    cdf: impl Fn(f64) -> f64,
    pdf: impl Fn(f64) -> f64,
    start: f64,
    probability: f64,
) -> Option<f64> {
    let mut x = start;
    if !x.is_finite() {
        return None;
    }
    for _ in 0..4 {
        let density = pdf(x);
        if density <= 0.0 || !density.is_finite() {
            break;
        }
        let step = (cdf(x) - probability) / density;
        if !step.is_finite() {
            break;
        }
        x -= step;
        if step.abs() <= 1e-15 * x.abs().max(1.0) {
            break;
        }
    }
    finite(x)
}

fn finite(value: f64) -> Option<f64> {
    value.is_finite().then_some(value)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn relative(a: f64, b: f64) -> f64 {
        ((a - b) / b).abs()
    }

    #[test]
    fn quantiles_match_printed_tables() {
        // Values printed by R 4.2.2 (Debian r-base) with sprintf("%.17g"): qt(0.975, c(10, 29, 300)), qnorm(0.975).
        assert!(relative(t_quantile(0.975, 10.0).unwrap(), 2.2281388519862739) < 1e-12);
        assert!(relative(t_quantile(0.975, 29.0).unwrap(), 2.0452296421327034) < 1e-12);
        assert!(relative(t_quantile(0.975, 300.0).unwrap(), 1.967903011261086) < 1e-12);
        assert!(relative(normal_quantile(0.975).unwrap(), 1.9599639845400536) < 1e-13);
    }

    #[test]
    fn tail_probabilities_match_reference_values() {
        // Values printed by R 4.2.2 (Debian r-base) with sprintf("%.17g"): 2*pt(-2.5, 20), pf(4.2, 2, 50, lower.tail=FALSE), pchisq(30, 3, lower.tail=FALSE).
        assert!(relative(t_two_sided_p(2.5, 20.0).unwrap(), 0.021233545439132393) < 1e-10);
        assert!(relative(f_upper_p(4.2, 2.0, 50.0).unwrap(), 0.020602927324507081) < 1e-10);
        assert!(
            relative(
                chi_square_upper_p(30.0, 3.0).unwrap(),
                1.3800570312932547e-06
            ) < 1e-10
        );
    }

    #[test]
    fn normal_tails_are_accurate_far_out() {
        // Values printed by R 4.2.2 (Debian r-base): pnorm(c(1.959963984540054, 5, 10, 30), lower.tail=FALSE).
        assert!(relative(normal_upper(1.959963984540054), 0.025000000000000012) < 1e-14);
        assert!(relative(normal_upper(5.0), 2.8665157187919391e-07) < 1e-14);
        assert!(relative(normal_upper(10.0), 7.6198530241605269e-24) < 1e-14);
        assert!(relative(normal_upper(30.0), 4.9067139271481872e-198) < 1e-13);
        assert!(relative(normal_cdf(-5.0), 2.8665157187919391e-07) < 1e-14);
    }
}
