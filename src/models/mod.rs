//! Model fitting: pure numeric engines that take a design matrix and a response
//! and return estimates, their covariance and a stop reason. No I/O, no clock,
//! no environment; nothing here knows about plans, files or reports.

pub mod glm;
pub mod linear;
pub mod multinomial;
pub mod ordinal;
pub mod portable;

/// Why an iterative (or direct) fit stopped. Carried into results and the
/// report; a fit never panics and never reports NaN in place of a reason.
#[derive(Debug, Clone, PartialEq)]
pub enum StopReason {
    /// Converged within tolerance after this many iterations.
    Converged { iterations: usize },
    /// Hit the iteration cap without meeting the convergence criteria.
    IterationLimit { iterations: usize },
    /// Complete or quasi-complete separation; the design columns implicated.
    Separation { columns: Vec<usize> },
    /// Design is singular in a way the engine cannot resolve; the columns implicated.
    SingularDesign { columns: Vec<usize> },
    /// An outcome category has no observations (ordinal / nominal models).
    EmptyCategory { category: usize },
    /// The likelihood or a working quantity became non-finite; said in words.
    NumericalFailure { detail: String },
}
