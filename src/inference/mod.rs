//! Inference: from a fitted model to the numbers a plan asks for.
//!
//! Given a design (with named terms and the treatment columns) and a fit,
//! this stage computes the coefficient table (estimate, SE, statistic,
//! p-value, Wald confidence interval), the overall test of treatment, every
//! planned contrast Lβ with its SE from the covariance, and adjusted means per
//! arm (the model's prediction averaged over the analysed subjects as if all
//! had received that arm). Anything that cannot be estimated (an aliased
//! column, a singular covariance block) comes back as a reason in words,
//! never as NaN.
//!
//! Pure: no I/O. Distribution functions live in `distributions`.

pub mod distributions;
pub mod linear;

/// One row of a coefficient table.
#[derive(Debug, Clone, PartialEq)]
pub struct CoefficientRow {
    pub name: String,
    pub term: String,
    /// `None` when the column is aliased with earlier columns.
    pub estimate: Option<Estimate>,
}

/// A point estimate with its standard error, test and interval.
#[derive(Debug, Clone, PartialEq)]
pub struct Estimate {
    pub value: f64,
    pub standard_error: f64,
    pub statistic: f64,
    /// Degrees of freedom of the reference t distribution; `None` for a normal reference.
    pub df: Option<f64>,
    pub p_value: f64,
    pub lower: f64,
    pub upper: f64,
}

/// A joint test of several coefficients (the overall treatment effect).
#[derive(Debug, Clone, PartialEq)]
pub struct JointTest {
    /// "F" for linear models, "Wald chi-square" or "likelihood ratio" elsewhere.
    pub statistic_name: &'static str,
    pub statistic: f64,
    pub df1: f64,
    pub df2: Option<f64>,
    pub p_value: f64,
}

/// A planned contrast: its estimate or the reason it could not be estimated.
#[derive(Debug, Clone, PartialEq)]
pub struct ContrastResult {
    pub id: String,
    pub arm: usize,
    pub versus: usize,
    pub estimate: Result<Estimate, String>,
}

/// The model-based mean of one arm.
#[derive(Debug, Clone, PartialEq)]
pub struct ArmMean {
    pub arm: usize,
    pub estimate: Result<Estimate, String>,
}

/// Quadratic form aᵀVb.
pub(crate) fn bilinear(a: &[f64], covariance: &nalgebra::DMatrix<f64>, b: &[f64]) -> f64 {
    let mut total = 0.0;
    for (i, &left) in a.iter().enumerate() {
        if left == 0.0 {
            continue;
        }
        for (j, &right) in b.iter().enumerate() {
            if right != 0.0 {
                total += left * covariance[(i, j)] * right;
            }
        }
    }
    total
}
