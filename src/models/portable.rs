//! Transcendental functions that give the same bits on every platform.
//!
//! The standard library's `exp`, `ln` and friends call the platform's C math
//! library, whose last bit can differ between operating systems and
//! processors; a reviewer re-running a plan elsewhere would then see
//! results.json differ in the 16th digit. The numeric core calls these
//! methods instead, which use the pure-Rust `libm` port (musl's algorithms,
//! accurate to about 1 ulp) everywhere. Square roots and the basic arithmetic
//! operations are exactly rounded by IEEE 754 and need no replacement.

/// Platform-independent versions of the f64 methods the engines use.
pub trait Portable {
    fn pexp(self) -> f64;
    fn pln(self) -> f64;
    fn pln_1p(self) -> f64;
    fn pexp_m1(self) -> f64;
    fn ppowf(self, exponent: f64) -> f64;
    fn ppowi(self, exponent: i32) -> f64;
    fn plog10(self) -> f64;
}

impl Portable for f64 {
    fn pexp(self) -> f64 {
        libm::exp(self)
    }
    fn pln(self) -> f64 {
        libm::log(self)
    }
    fn pln_1p(self) -> f64 {
        libm::log1p(self)
    }
    fn pexp_m1(self) -> f64 {
        libm::expm1(self)
    }
    fn ppowf(self, exponent: f64) -> f64 {
        libm::pow(self, exponent)
    }
    fn ppowi(self, exponent: i32) -> f64 {
        libm::pow(self, f64::from(exponent))
    }
    fn plog10(self) -> f64 {
        libm::log10(self)
    }
}

#[cfg(test)]
mod tests {
    use super::Portable;

    #[test]
    fn portable_functions_agree_with_the_platform_to_an_ulp() {
        // Common practice: both are faithful to about 1 ulp, so they agree to a few ulps.
        for x in [-30.0, -1.5, -1e-8, 0.0, 1e-8, 0.3, 1.0, 2.5, 40.0] {
            let close = |a: f64, b: f64| {
                (a - b).abs() <= 4.0 * f64::EPSILON * a.abs().max(b.abs()).max(f64::MIN_POSITIVE)
            };
            assert!(close(x.pexp(), x.exp()));
            assert!(close(x.pexp_m1(), x.exp_m1()));
            if x > 0.0 {
                assert!(close(x.pln(), x.ln()));
                assert!(close(x.plog10(), x.log10()));
                assert!(close(x.ppowf(1.7), x.powf(1.7)));
            }
            if x > -1.0 {
                assert!(close(x.pln_1p(), x.ln_1p()));
            }
            assert!(close(x.ppowi(3), x.powi(3)));
        }
    }
}
