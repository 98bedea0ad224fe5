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

/// A design as a model engine receives it: a dense column-major matrix, or rows of non-zero
/// entries (how [`crate::design`] holds a large design, never forming the dense matrix).
#[derive(Debug, Clone, Copy)]
pub enum DesignInput<'a> {
    Dense(&'a DMatrix<f64>),
    Rows(&'a SparseRows),
}

impl DesignInput<'_> {
    pub fn nrows(&self) -> usize {
        match self {
            DesignInput::Dense(matrix) => matrix.nrows(),
            DesignInput::Rows(rows) => rows.nrows(),
        }
    }

    pub fn ncols(&self) -> usize {
        match self {
            DesignInput::Dense(matrix) => matrix.ncols(),
            DesignInput::Rows(rows) => rows.ncols(),
        }
    }

    /// The first non-finite entry over `columns` (design columns, each once), in the order of
    /// `columns` and then of the rows, as (position in `columns`, row): what a dense check
    /// column by column reports, for either layout.
    pub fn first_non_finite(&self, columns: &[usize]) -> Option<(usize, usize)> {
        match self {
            DesignInput::Dense(matrix) => {
                columns.iter().enumerate().find_map(|(position, &column)| {
                    matrix
                        .column(column)
                        .iter()
                        .position(|value| !value.is_finite())
                        .map(|row| (position, row))
                })
            }
            DesignInput::Rows(rows) => {
                let mut position_of = vec![usize::MAX; rows.ncols()];
                for (position, &column) in columns.iter().enumerate() {
                    position_of[column] = position;
                }
                let mut first: Option<(usize, usize)> = None;
                for row in 0..rows.nrows() {
                    let (stored, values) = rows.entries(row);
                    for (&column, value) in stored.iter().zip(values) {
                        let position = position_of[column as usize];
                        if position != usize::MAX
                            && !value.is_finite()
                            && first.is_none_or(|(p, _)| position < p)
                        {
                            first = Some((position, row));
                        }
                    }
                }
                first
            }
        }
    }

    /// A dense copy of `columns` (for the supportive fits that take one).
    pub fn select_columns(&self, columns: &[usize]) -> DMatrix<f64> {
        match self {
            DesignInput::Dense(matrix) => matrix.select_columns(columns),
            DesignInput::Rows(rows) => {
                let mut selected = DMatrix::<f64>::zeros(rows.nrows(), columns.len());
                for (position, &column) in columns.iter().enumerate() {
                    for row in 0..rows.nrows() {
                        selected[(row, position)] = rows.get(row, column);
                    }
                }
                selected
            }
        }
    }
}

/// A design inside one fit. The main routes read the rows of non-zeros; the few rarely taken
/// routes that read the dense matrix (a non-finite operand, Firth's correction, profile limits,
/// the separation check) get it from [`DenseOnDemand::dense`], which forms it from the rows at
/// most once per fit.
pub(crate) struct DenseOnDemand<'a> {
    input: DesignInput<'a>,
    made: std::cell::OnceCell<DMatrix<f64>>,
}

impl<'a> DenseOnDemand<'a> {
    pub(crate) fn new(input: DesignInput<'a>) -> DenseOnDemand<'a> {
        DenseOnDemand {
            input,
            made: std::cell::OnceCell::new(),
        }
    }

    pub(crate) fn nrows(&self) -> usize {
        self.input.nrows()
    }

    pub(crate) fn input(&self) -> DesignInput<'a> {
        self.input
    }

    pub(crate) fn ncols(&self) -> usize {
        self.input.ncols()
    }

    /// The largest absolute entry of `column`.
    pub(crate) fn column_largest_abs(&self, column: usize) -> f64 {
        match self.input {
            DesignInput::Dense(matrix) => matrix
                .column(column)
                .iter()
                .fold(0.0_f64, |largest, x| largest.max(x.abs())),
            DesignInput::Rows(rows) => rows.column_largest_abs(column),
        }
    }

    /// The dense matrix: the caller's, or formed from the rows on first use.
    pub(crate) fn dense(&self) -> &DMatrix<f64> {
        match self.input {
            DesignInput::Dense(matrix) => matrix,
            DesignInput::Rows(rows) => self.made.get_or_init(|| rows.to_dense()),
        }
    }
}

/// Some columns of a design, read in place: column `c` of the view is column `columns[c]` of
/// the design, which is dense (column-major) or held as rows of non-zero entries. A model fitted
/// to a view is, to the bit, the model fitted to a dense copy of those columns; the view only
/// saves the copy (an n × p design at 10⁶ rows is hundreds of megabytes).
#[derive(Debug, Clone, Copy)]
pub struct DesignColumns<'a> {
    design: DesignInput<'a>,
    columns: &'a [usize],
    /// Whether `columns` ascend (then a row's stored entries come in view order).
    ascending: bool,
}

impl<'a> DesignColumns<'a> {
    /// The view of `columns` of `matrix`, or `None` when a column is out of range or listed twice.
    pub fn new(matrix: &'a DMatrix<f64>, columns: &'a [usize]) -> Option<DesignColumns<'a>> {
        DesignColumns::of(DesignInput::Dense(matrix), columns)
    }

    /// [`DesignColumns::new`] for a design held either way.
    pub fn of(design: DesignInput<'a>, columns: &'a [usize]) -> Option<DesignColumns<'a>> {
        let mut seen = vec![false; design.ncols()];
        for &column in columns {
            if column >= design.ncols() || seen[column] {
                return None;
            }
            seen[column] = true;
        }
        Some(DesignColumns {
            design,
            columns,
            ascending: columns.windows(2).all(|pair| pair[0] < pair[1]),
        })
    }

    pub fn nrows(&self) -> usize {
        self.design.nrows()
    }

    pub fn ncols(&self) -> usize {
        self.columns.len()
    }

    /// The design the view reads.
    pub fn design(&self) -> DesignInput<'a> {
        self.design
    }

    /// Per view column, its column in the design.
    pub fn design_columns(&self) -> &'a [usize] {
        self.columns
    }

    /// Column `column` of the view, contiguous: in place when the design is dense, otherwise
    /// scattered from the rows.
    pub fn column(&self, column: usize) -> std::borrow::Cow<'a, [f64]> {
        match self.design {
            DesignInput::Dense(matrix) => {
                let n_rows = matrix.nrows();
                let start = self.columns[column] * n_rows;
                std::borrow::Cow::Borrowed(&matrix.as_slice()[start..start + n_rows])
            }
            DesignInput::Rows(_) => {
                let mut values = vec![0.0; self.nrows()];
                self.block_into(column, 0..self.nrows(), &mut values);
                std::borrow::Cow::Owned(values)
            }
        }
    }

    /// Rows `rows` of view column `column` into `values` (of the same length), zeros included.
    pub fn block_into(&self, column: usize, rows: std::ops::Range<usize>, values: &mut [f64]) {
        let design_column = self.columns[column];
        match self.design {
            DesignInput::Dense(matrix) => {
                let n_rows = matrix.nrows();
                let start = design_column * n_rows;
                values.copy_from_slice(&matrix.as_slice()[start + rows.start..start + rows.end]);
            }
            DesignInput::Rows(stored) => stored.column_into(design_column, rows, values),
        }
    }

    /// Rows `rows` of every view column into `block`, column-major with `stride` rows a
    /// column (at least `rows.len()`), zeros included: for a design held as rows, one pass
    /// over the block's stored entries rather than a search per column.
    pub fn block_columns_into(
        &self,
        rows: std::ops::Range<usize>,
        block: &mut [f64],
        stride: usize,
    ) {
        match self.design {
            DesignInput::Dense(_) => {
                let length = rows.len();
                for column in 0..self.ncols() {
                    let slot = column * stride;
                    self.block_into(column, rows.clone(), &mut block[slot..slot + length]);
                }
            }
            DesignInput::Rows(stored) => {
                let length = rows.len();
                for column in 0..self.ncols() {
                    block[column * stride..column * stride + length]
                        .iter_mut()
                        .for_each(|value| *value = 0.0);
                }
                let mut position_of = vec![usize::MAX; stored.ncols()];
                for (position, &column) in self.columns.iter().enumerate() {
                    position_of[column] = position;
                }
                for (offset, row) in rows.enumerate() {
                    let (columns, values) = stored.entries(row);
                    for (&column, &value) in columns.iter().zip(values) {
                        let position = position_of[column as usize];
                        if position != usize::MAX {
                            block[position * stride + offset] = value;
                        }
                    }
                }
            }
        }
    }

    /// The entry at `row` of view column `column`.
    pub fn get(&self, row: usize, column: usize) -> f64 {
        match self.design {
            DesignInput::Dense(matrix) => matrix[(row, self.columns[column])],
            DesignInput::Rows(stored) => stored.get(row, self.columns[column]),
        }
    }

    /// The non-zero entries of rows `block` over the view columns `selected` (positions index
    /// `selected`), each row's in the order of `selected`, as
    /// [`glm::linalg::BlockNonZeros::gather`] finds them in a dense design.
    pub(crate) fn gather(
        &self,
        non_zeros: &mut glm::linalg::BlockNonZeros,
        selected: &[usize],
        block: std::ops::Range<usize>,
    ) {
        match self.design {
            DesignInput::Dense(matrix) => {
                let in_matrix: Vec<usize> = selected
                    .iter()
                    .map(|&column| self.columns[column])
                    .collect();
                non_zeros.gather(matrix.as_slice(), matrix.nrows(), &in_matrix, block);
            }
            DesignInput::Rows(stored) => {
                let mut position_of = vec![usize::MAX; stored.ncols()];
                for (position, &column) in selected.iter().enumerate() {
                    position_of[self.columns[column]] = position;
                }
                let length = block.len();
                non_zeros.gather_stored(stored, &position_of, block);
                // A dense gather lists a row's entries in the order of `selected`.
                if !(self.ascending && selected.windows(2).all(|pair| pair[0] < pair[1])) {
                    non_zeros.sort_rows(length);
                }
            }
        }
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
