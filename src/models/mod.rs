//! Model fitting: pure numeric engines that take a design matrix and a response
//! and return estimates, their covariance and a stop reason. No I/O, no clock,
//! no environment; nothing here knows about plans, files or reports.

pub mod glm;
pub mod linear;
pub mod multinomial;
mod newton;
pub mod ordinal;
pub mod portable;

pub use glm::linalg::{SparseRows, SparseRowsBuilder};
use nalgebra::DMatrix;

/// Some columns of a column-major design, read in place: column `c` of the view is column
/// `columns[c]` of the matrix. A model fitted to a view is, to the bit, the model fitted to a
/// copy of those columns; the view only saves the copy (an n × p design at 10⁶ rows is
/// hundreds of megabytes).
#[derive(Debug, Clone, Copy)]
pub struct DesignColumns<'a> {
    matrix: &'a DMatrix<f64>,
    columns: &'a [usize],
}

impl<'a> DesignColumns<'a> {
    /// The view of `columns` of `matrix`, or `None` when a column is out of range or listed twice.
    pub fn new(matrix: &'a DMatrix<f64>, columns: &'a [usize]) -> Option<DesignColumns<'a>> {
        let mut seen = vec![false; matrix.ncols()];
        for &column in columns {
            if column >= matrix.ncols() || seen[column] {
                return None;
            }
            seen[column] = true;
        }
        Some(DesignColumns { matrix, columns })
    }

    pub fn nrows(&self) -> usize {
        self.matrix.nrows()
    }

    pub fn ncols(&self) -> usize {
        self.columns.len()
    }

    /// The matrix the view reads and, per view column, its column there.
    pub fn matrix(&self) -> &'a DMatrix<f64> {
        self.matrix
    }

    pub fn matrix_columns(&self) -> &'a [usize] {
        self.columns
    }

    /// Column `column` of the view, contiguous.
    pub fn column(&self, column: usize) -> &'a [f64] {
        let n_rows = self.matrix.nrows();
        let start = self.columns[column] * n_rows;
        &self.matrix.as_slice()[start..start + n_rows]
    }

    /// The entry at `row` of view column `column`.
    pub fn get(&self, row: usize, column: usize) -> f64 {
        self.matrix[(row, self.columns[column])]
    }
}

/// `0, 1, …, n − 1`: the column list of a view of every column.
pub(crate) fn every_column(n: usize) -> Vec<usize> {
    (0..n).collect()
}

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

/// A running sum with Neumaier's compensation (Neumaier 1974, "Rundungsfehleranalyse einiger
/// Verfahren zur Summation endlicher Summen", ZAMM 54:39–51): the error is about one rounding
/// of the total instead of growing with the number of terms. A log-likelihood over 10⁶ rows
/// summed plainly carries noise of order √n·ε·|ℓ| (about 1e-7 at ℓ ≈ 10⁶), larger than the last
/// Newton steps' gains, which then look like losses; compensated, the noise is about ε·|ℓ|.
#[derive(Debug, Clone, Copy, Default)]
pub(crate) struct CompensatedSum {
    sum: f64,
    compensation: f64,
}

impl CompensatedSum {
    pub(crate) fn add(&mut self, value: f64) {
        let total = self.sum + value;
        if self.sum.abs() >= value.abs() {
            self.compensation += (self.sum - total) + value;
        } else {
            self.compensation += (value - total) + self.sum;
        }
        self.sum = total;
    }

    pub(crate) fn value(&self) -> f64 {
        self.sum + self.compensation
    }
}

#[cfg(test)]
mod tests {
    use super::CompensatedSum;

    // Common practice (Neumaier 1974): the compensation recovers what plain summation loses,
    // 1e16 + 1 − 1e16 = 1 (plainly 0), and a million terms of 0.1 sum to 1e5 within one
    // rounding (plainly about 1e-6 off).
    #[test]
    fn compensated_sum_keeps_what_plain_summation_loses() {
        let mut sum = CompensatedSum::default();
        for value in [1e16, 1.0, -1e16] {
            sum.add(value);
        }
        assert_eq!(sum.value(), 1.0);
        let mut many = CompensatedSum::default();
        let mut plain = 0.0;
        for _ in 0..1_000_000 {
            many.add(0.1);
            plain += 0.1;
        }
        assert!((many.value() - 1e5).abs() <= 1e5 * f64::EPSILON);
        assert!(
            (plain - 1e5_f64).abs() > 1e-7,
            "plain summation should drift here"
        );
    }
}
