//! Least-squares engine for the linear model (ANCOVA): takes a finished design
//! matrix and a response, returns coefficients, their unscaled covariance,
//! fitted values, residuals and the columns that are aliased. It owns the
//! numerics only — a Householder QR with deferred column pivoting for rank
//! detection, followed by iterative refinement of the augmented least-squares
//! system with residuals accumulated in double-double arithmetic. It must not
//! know about plans, variable names, factor levels, p-values or reports; the
//! caller names the columns and does the inference. No I/O, no panics on user
//! data, and no NaN in any returned value.
//!
//! # Method
//!
//! 1. **Exact equilibration.** Every column is multiplied by a power of two so
//!    that its largest absolute entry is near 1 (in [1, 2) up to the rounding
//!    of a base-2 logarithm). Power-of-two scaling is
//!    exact in binary floating point, so it changes no digit of the problem;
//!    it keeps sums of squares away from overflow and underflow.
//! 2. **Householder QR with deferred pivoting** (Golub & Van Loan, *Matrix
//!    Computations*, 4th ed., §5.2 and §5.4.2; the same strategy as the LINPACK
//!    routine behind R's `lm`). Columns are taken in the caller's order. Before
//!    column `j` is reduced, the norm of its part orthogonal to the columns
//!    already accepted is computed afresh (not downdated). If that norm is at
//!    most `rank_tolerance` times the column's own norm, the column is declared
//!    aliased and moved to the end; otherwise it becomes the next pivot.
//! 3. **Iterative refinement** of the augmented system
//!    `[I A; Aᵀ 0] [r; x] = [b; c]` (Björck 1967, "Iterative refinement of
//!    linear least squares solutions I", *BIT* 7:257–278; Björck, *Numerical
//!    Methods for Least Squares Problems*, SIAM 1996, §2.9). The residuals
//!    `b − r − A x` and `c − Aᵀ r` are accumulated with error-free
//!    transformations (Ogita, Rump & Oishi 2005, "Accurate sum and dot
//!    product", *SIAM J. Sci. Comput.* 26:1955–1988: two-sum, and two-product
//!    via `f64::mul_add`), which is as accurate as computing them in twice the
//!    working precision; the corrections are solved with the same QR factors.
//!    The least-squares solution uses `b = y, c = 0`. Column `j` of the
//!    unscaled covariance `(AᵀA)⁻¹` is the `x` part of the same system with
//!    `b = 0, c = −e_j` (then `r = −A x` and `AᵀA x = e_j`), so the
//!    covariance is refined in the same way rather than taken from a plain
//!    triangular inverse.
//!
//! # Why the rank test is per column and relative
//!
//! The decision "is column `j` numerically in the span of the columns before
//! it" compares the column's distance to that span with its own length. The
//! ratio is invariant to rescaling any column (units of a covariate, or a
//! column of powers that is 10¹³ times larger than the intercept), which is
//! exactly what equilibrating the columns before testing `|R_kk|` against the
//! largest `|R_kk|` tries to achieve; here it holds by construction. An exact
//! duplicate, dummies that add up to the intercept, or any exact linear
//! combination of stored doubles leaves a ratio of zero or a few units of
//! rounding (measured 0 to 1e-15 on the constructed designs in
//! `tests/rank_detection.rs`). The degree-10 polynomial of the NIST StRD
//! Filip data set, which is full rank but badly conditioned, has a smallest
//! ratio of about 5e-8 (measured by bisection on the tolerance). The default
//! tolerance of 1e-11 sits between the two, with between three and four
//! orders of magnitude of room on each side; `tests/nist_strd.rs` checks that
//! Filip stays full rank at 1e-9 and loses a column at 1e-7 (R's `lm` uses
//! 1e-7 by default and drops a Filip term).
//!
//! Deferred pivoting, rather than pivoting on the largest remaining norm, is
//! deliberate: when columns are aliased the later ones in the caller's order
//! are the ones reported (the last dummy of a factor whose dummies add up to
//! the intercept, the second copy of a duplicated covariate), so the choice
//! does not depend on the data values and matches what statisticians expect
//! from common software. Householder QR is backward stable without pivoting,
//! so accuracy is not lost by this choice.

use crate::models::DesignInput;
use crate::models::glm::linalg::SparseRows;
#[allow(unused_imports)]
use crate::models::portable::Portable;
use nalgebra::DMatrix;
use std::fmt;

/// Settings of [`fit_least_squares`]. Build with `Default::default()` unless a
/// plan asks for something else; [`fit_least_squares`] checks them.
#[derive(Debug, Clone, PartialEq)]
pub struct LeastSquaresOptions {
    /// A column is aliased when its distance to the span of the columns
    /// accepted before it is at most this fraction of its own Euclidean norm.
    /// Must be finite and in `[0, 1)`. Default `1e-11`; see the module notes.
    pub rank_tolerance: f64,
    /// Upper bound on refinement steps after the first solve, for the
    /// coefficients and for each column of the covariance. Default 10; in
    /// practice refinement stops after one to three steps (NIST StRD data).
    pub max_refinement_steps: usize,
    /// Refine every column of the covariance even when the design is well
    /// conditioned. Default `false`; the reference tests use `true` to show
    /// that the two routes agree.
    pub always_refine_covariance: bool,
}

impl Default for LeastSquaresOptions {
    fn default() -> Self {
        LeastSquaresOptions {
            rank_tolerance: 1e-11,
            max_refinement_steps: 10,
            always_refine_covariance: false,
        }
    }
}

/// Result of [`fit_least_squares`]. All vectors are in the caller's column and
/// row order; every number is finite.
#[derive(Debug, Clone, PartialEq)]
pub struct LeastSquaresFit {
    /// Number of rows of the design.
    pub n_observations: usize,
    /// Number of columns of the design, aliased ones included.
    pub n_columns: usize,
    /// Numerical rank: the number of columns that were not aliased.
    pub rank: usize,
    /// One entry per design column; `None` for an aliased column. The others
    /// are the least-squares coefficients of the design without the aliased
    /// columns.
    pub coefficients: Vec<Option<f64>>,
    /// Indices (0-based, ascending) of the aliased design columns.
    pub aliased_columns: Vec<usize>,
    /// `(XᵀX)⁻¹` of the non-aliased columns, placed as a `p × p` matrix in the
    /// caller's column order; rows and columns of aliased columns are zero.
    /// Multiply by the residual variance for the covariance of the estimates.
    pub unscaled_covariance: DMatrix<f64>,
    /// Fitted values `X β`, one per row.
    pub fitted: Vec<f64>,
    /// Residuals `y − X β`, one per row, computed in double-double arithmetic.
    pub residuals: Vec<f64>,
    /// Sum of squared residuals.
    pub residual_sum_of_squares: f64,
    /// `n_observations − rank`, always at least 1.
    pub residual_df: usize,
    /// Refinement steps applied to the coefficients after the first solve.
    pub refinement_steps: usize,
    /// Whether the coefficient refinement met its convergence test (a
    /// correction below one unit of rounding of the coefficients). `false`
    /// means it stopped because corrections stopped shrinking, or at the step
    /// limit; the coefficients are then the best iterate reached, and the
    /// problem is close to the limit of what double precision can resolve.
    pub refinement_converged: bool,
}

impl LeastSquaresFit {
    /// Residual standard deviation `sqrt(RSS / residual_df)`. `Some` for
    /// every fit this module returns (the residual df is at least 1); the
    /// `Option` keeps the signature honest should that ever change.
    pub fn residual_standard_deviation(&self) -> Option<f64> {
        if self.residual_df == 0 {
            return None;
        }
        let value = (self.residual_sum_of_squares / self.residual_df as f64).sqrt();
        value.is_finite().then_some(value)
    }

    /// Standard errors `s · sqrt([(XᵀX)⁻¹]_jj)` of the coefficients; `None`
    /// for an aliased column.
    pub fn coefficient_standard_errors(&self) -> Vec<Option<f64>> {
        let sigma = self.residual_standard_deviation();
        (0..self.n_columns)
            .map(|column| {
                let variance_factor = self.unscaled_covariance[(column, column)];
                match (sigma, self.coefficients[column]) {
                    (Some(sigma), Some(_)) if variance_factor >= 0.0 => {
                        Some(sigma * variance_factor.sqrt())
                    }
                    _ => None,
                }
            })
            .collect()
    }

    /// Coefficient of determination. With an intercept it is
    /// `1 − RSS / Σ(y − ȳ)²`; without one it is the uncentred
    /// `1 − RSS / Σ y²` (the definition NIST StRD certifies for its
    /// no-intercept data sets, and the one common software reports). The
    /// caller says which applies because the engine cannot know whether some
    /// combination of columns is meant as the intercept. `None` when the
    /// response length differs from the fit's or the total sum of squares is
    /// zero (a constant response), where R² is undefined.
    pub fn r_squared(&self, response: &[f64], has_intercept: bool) -> Option<f64> {
        if response.len() != self.n_observations || response.is_empty() {
            return None;
        }
        let centre = if has_intercept {
            let mut sum = DoubleDouble::zero();
            for &value in response {
                sum.add(value);
            }
            sum.value() / response.len() as f64
        } else {
            0.0
        };
        let mut total = DoubleDouble::zero();
        for &value in response {
            let deviation = value - centre;
            total.add_product(deviation, deviation);
        }
        let total_sum_of_squares = total.value();
        if total_sum_of_squares <= 0.0 || !total_sum_of_squares.is_finite() {
            return None;
        }
        let value = 1.0 - self.residual_sum_of_squares / total_sum_of_squares;
        value.is_finite().then_some(value)
    }
}

/// Why [`fit_least_squares`] could not produce a fit. Each variant carries
/// the values that were wrong.
#[derive(Debug, Clone, PartialEq)]
pub enum LeastSquaresError {
    /// The design has no rows or no columns.
    EmptyDesign {
        n_observations: usize,
        n_columns: usize,
    },
    /// The response length differs from the number of design rows.
    DimensionMismatch {
        design_rows: usize,
        response_length: usize,
    },
    /// A design entry is NaN or infinite (0-based row and column).
    NonFiniteDesign { row: usize, column: usize },
    /// A response value is NaN or infinite (0-based row).
    NonFiniteResponse { row: usize },
    /// An option is outside its allowed range.
    InvalidOption {
        name: &'static str,
        value: f64,
        expected: &'static str,
    },
    /// Every column is zero or otherwise unusable, so nothing can be estimated.
    NoEstimableColumns { n_columns: usize },
    /// The number of observations does not exceed the rank, so the residual
    /// variance cannot be estimated.
    NoResidualDegreesOfFreedom { n_observations: usize, rank: usize },
    /// An intermediate quantity overflowed (data of extreme magnitude).
    NumericalFailure { detail: &'static str },
}

impl fmt::Display for LeastSquaresError {
    fn fmt(&self, formatter: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            LeastSquaresError::EmptyDesign {
                n_observations,
                n_columns,
            } => write!(
                formatter,
                "the design matrix is empty ({n_observations} rows, {n_columns} columns); \
                 expected at least one row and one column"
            ),
            LeastSquaresError::DimensionMismatch {
                design_rows,
                response_length,
            } => write!(
                formatter,
                "the response has {response_length} values but the design has {design_rows} rows"
            ),
            LeastSquaresError::NonFiniteDesign { row, column } => write!(
                formatter,
                "design entry at row {} column {} is not a finite number",
                row + 1,
                column + 1
            ),
            LeastSquaresError::NonFiniteResponse { row } => {
                write!(
                    formatter,
                    "response value at row {} is not a finite number",
                    row + 1
                )
            }
            LeastSquaresError::InvalidOption {
                name,
                value,
                expected,
            } => {
                write!(formatter, "option {name} is {value}; expected {expected}")
            }
            LeastSquaresError::NoEstimableColumns { n_columns } => write!(
                formatter,
                "none of the {n_columns} design columns can be estimated (all are zero or aliased)"
            ),
            LeastSquaresError::NoResidualDegreesOfFreedom {
                n_observations,
                rank,
            } => write!(
                formatter,
                "{n_observations} observations do not exceed the rank {rank} of the design, \
                 so no residual degrees of freedom remain"
            ),
            LeastSquaresError::NumericalFailure { detail } => {
                write!(formatter, "least-squares fit failed numerically: {detail}")
            }
        }
    }
}

impl std::error::Error for LeastSquaresError {}

/// Fits `response ≈ design · β` by least squares.
///
/// Requirements: `design` is `n × p` with `n ≥ 1`, `p ≥ 1`, all entries
/// finite; `response` has `n` finite values; the rank `k` found must satisfy
/// `n > k`. Aliased columns (see the module notes) get `None` coefficients
/// and zero rows/columns in the covariance; the remaining coefficients are
/// those of the design with the aliased columns removed.
///
/// References: Golub & Van Loan (2013) §5.2–5.4 for the QR; Björck (1967,
/// 1996 §2.9) for the refinement; Ogita, Rump & Oishi (2005) for the
/// accumulation. Accuracy is checked against the NIST StRD linear regression
/// data sets in `tests/nist_strd.rs`.
pub fn fit_least_squares(
    design: &DMatrix<f64>,
    response: &[f64],
    options: &LeastSquaresOptions,
) -> Result<LeastSquaresFit, LeastSquaresError> {
    fit(design, response, options, true)
}

/// The residual sum of squares of the least-squares fit of `response` on
/// `design`, with the same requirements and accuracy as [`fit_least_squares`]
/// but without the covariance (a rank or collinearity check needs no more).
pub fn least_squares_residual_sum(
    design: &DMatrix<f64>,
    response: &[f64],
    options: &LeastSquaresOptions,
) -> Result<f64, LeastSquaresError> {
    fit(design, response, options, false).map(|fit| fit.residual_sum_of_squares)
}

/// The checks every entry point makes before any work.
fn validate(
    design: &DMatrix<f64>,
    response: &[f64],
    options: &LeastSquaresOptions,
) -> Result<(), LeastSquaresError> {
    check_options(options)?;
    let (n_observations, n_columns) = design.shape();
    if n_observations == 0 || n_columns == 0 {
        return Err(LeastSquaresError::EmptyDesign {
            n_observations,
            n_columns,
        });
    }
    if response.len() != n_observations {
        return Err(LeastSquaresError::DimensionMismatch {
            design_rows: n_observations,
            response_length: response.len(),
        });
    }
    for column in 0..n_columns {
        if let Some(row) = design
            .column(column)
            .iter()
            .position(|value| !value.is_finite())
        {
            return Err(LeastSquaresError::NonFiniteDesign { row, column });
        }
    }
    if let Some(row) = response.iter().position(|value| !value.is_finite()) {
        return Err(LeastSquaresError::NonFiniteResponse { row });
    }
    Ok(())
}

fn fit(
    design: &DMatrix<f64>,
    response: &[f64],
    options: &LeastSquaresOptions,
    with_covariance: bool,
) -> Result<LeastSquaresFit, LeastSquaresError> {
    validate(design, response, options)?;
    let (n_observations, n_columns) = design.shape();
    let (storage, column_scales) = equilibrate(design);
    let original = Original::Dense(design.as_slice());
    let (outcome, _) = solve(
        storage,
        n_observations,
        n_columns,
        &column_scales,
        original,
        response,
        options,
        with_covariance,
    );
    outcome
}

/// [`fit_least_squares`] with the design's own storage as the factorization's workspace, so
/// that no n × p copy is made: the design is read for the refinement from its non-zero
/// entries, stored row by row beforehand, and is put back exactly before this returns (its
/// values, zero signs included). The result is the same bits as [`fit_least_squares`]'s. A
/// design that is not mostly zeros is fitted through the copy instead.
pub fn fit_least_squares_in_place(
    design: &mut DMatrix<f64>,
    response: &[f64],
    options: &LeastSquaresOptions,
) -> Result<LeastSquaresFit, LeastSquaresError> {
    validate(design, response, options)?;
    let (n_observations, n_columns) = design.shape();
    let every: Vec<usize> = (0..n_columns).collect();
    let Some(rows) = SparseRows::of(design, &every) else {
        return fit(design, response, options, true);
    };
    let negative_zeros: Vec<usize> = design
        .as_slice()
        .iter()
        .enumerate()
        .filter(|(_, value)| **value == 0.0 && value.is_sign_negative())
        .map(|(index, _)| index)
        .collect();
    let taken = std::mem::replace(design, DMatrix::zeros(0, 0));
    let mut storage: Vec<f64> = taken.data.into();
    let column_scales = equilibrate_storage(&mut storage, n_observations, n_columns);
    let (outcome, mut storage) = solve(
        storage,
        n_observations,
        n_columns,
        &column_scales,
        Original::Sparse(&rows),
        response,
        options,
        true,
    );
    storage.iter_mut().for_each(|value| *value = 0.0);
    for row in 0..n_observations {
        let (columns, values) = rows.entries(row);
        for (&column, &value) in columns.iter().zip(values) {
            storage[column as usize * n_observations + row] = value;
        }
    }
    for index in negative_zeros {
        storage[index] = -0.0;
    }
    *design = DMatrix::from_vec(n_observations, n_columns, storage);
    outcome
}

/// Rows per block of [`fit_least_squares_rows`]' factorization: fixed, so that the bits depend
/// on the data alone (never on the machine or the number of threads).
const FACTOR_BLOCK: usize = 128;

/// [`fit_least_squares`] for a design held as rows of non-zero entries, without ever forming
/// the n × p matrix or n × p Householder vectors: the workspace is O(p²) beside the design's
/// own stored entries, so that a design of 10⁶ rows and 50 columns of dummies needs tens, not
/// hundreds, of megabytes.
///
/// # Method
///
/// 1. **Exact equilibration**, as in [`fit_least_squares`] (powers of two, taken from the
///    stored entries), and of the response likewise.
/// 2. **Householder QR in row blocks** (sometimes called a tall-skinny or sequential QR;
///    Golub & Van Loan 2013, §5.2.2 and §5.6 on updating): the triangle `[R z; 0 ρ]` of the
///    augmented matrix `[A y]` is kept, and each block of [`FACTOR_BLOCK`] rows is absorbed by
///    the Householder reflections that zero it beneath the triangle. The result is the
///    triangle of one orthogonal factorization `[A y] = Q [R z; 0 ρ]` and is backward stable
///    like any Householder QR; `Q` is not kept. No column is pivoted at this stage: a column
///    in the span of earlier ones leaves a negligible diagonal entry, and the reflections stay
///    orthogonal whatever it is.
/// 3. **Rank decisions on `R`.** `R` has the same column norms and the same distances of each
///    column to the span of any other columns as `A` (`Q` is orthogonal), so the deferred
///    pivoting of [`fit_least_squares`] applied to `R` takes the same decisions, by the same
///    relative test; it also gives the triangular factor of the accepted columns.
/// 4. **Solution and refinement.** The first solution comes from `z` (the leading part of
///    `Qᵀy`), as in any QR solve. Without `Q`, the refinement is of the semi-normal equations
///    `RᵀR x = Aᵀy` (corrected semi-normal equations; Björck 1987, "Stability analysis of the
///    method of seminormal equations for linear least squares problems", *Linear Algebra
///    Appl.* 88–89:31–48, and Björck 1996 on the semi-normal equations; cited from memory):
///    `h = Aᵀ(y − A x)` is accumulated in double-double, `RᵀR d = h` is solved with the
///    triangle and `x ← x + d`, with the same stopping rule as the augmented refinement. Each
///    step multiplies the error by about κ(A)²·ε, so a well-conditioned design (treatment,
///    site and baseline columns, κ of order 10–100) reaches full precision in one or two steps.
///    The covariance is `R⁻¹R⁻ᵀ`, refined column by column in the same way above the same
///    condition threshold as [`fit_least_squares`].
///
/// The digits agree with [`fit_least_squares`] to the accuracy each achieves (the last bits
/// can differ); `tests/nist_strd.rs` checks this route against the certified values too.
/// `rows` must hold every design column ([`SparseRows::from_dense`] and
/// [`crate::models::SparseRowsBuilder`] do).
pub fn fit_least_squares_rows(
    rows: &SparseRows,
    response: &[f64],
    options: &LeastSquaresOptions,
) -> Result<LeastSquaresFit, LeastSquaresError> {
    check_options(options)?;
    let (n_observations, n_columns) = (rows.nrows(), rows.ncols());
    if n_observations == 0 || n_columns == 0 {
        return Err(LeastSquaresError::EmptyDesign {
            n_observations,
            n_columns,
        });
    }
    if response.len() != n_observations {
        return Err(LeastSquaresError::DimensionMismatch {
            design_rows: n_observations,
            response_length: response.len(),
        });
    }
    debug_assert!(rows.holds_every_column());
    let every: Vec<usize> = (0..n_columns).collect();
    if let Some((column, row)) = DesignInput::Rows(rows).first_non_finite(&every) {
        return Err(LeastSquaresError::NonFiniteDesign { row, column });
    }
    let mut largest = vec![0.0_f64; n_columns];
    for row in 0..n_observations {
        let (columns, values) = rows.entries(row);
        for (&column, &value) in columns.iter().zip(values) {
            let column = column as usize;
            largest[column] = largest[column].max(value.abs());
        }
    }
    if let Some(row) = response.iter().position(|value| !value.is_finite()) {
        return Err(LeastSquaresError::NonFiniteResponse { row });
    }
    let column_scales: Vec<f64> = largest
        .iter()
        .map(|&value| power_of_two_scale(value))
        .collect();
    let response_scale = power_of_two_scale(
        response
            .iter()
            .map(|value| value.abs())
            .fold(0.0_f64, f64::max),
    );
    let size = n_columns + 1;
    let triangle = streamed_triangle(rows, &column_scales, response, response_scale);
    let mut storage = vec![0.0; n_columns * n_columns];
    for column in 0..n_columns {
        storage[column * n_columns..(column + 1) * n_columns]
            .copy_from_slice(&triangle[column * size..column * size + n_columns]);
    }
    // Undoing a power-of-two scale is exact.
    let rotated_response: Vec<f64> = triangle[n_columns * size..n_columns * size + n_columns]
        .iter()
        .map(|value| value / response_scale)
        .collect();
    let factorization = PivotedQr::new(storage, n_columns, n_columns, options.rank_tolerance);
    solve_factored(
        Factors::Triangle {
            qr: &factorization,
            rotated_response: &rotated_response,
        },
        n_observations,
        n_columns,
        &column_scales,
        Original::Sparse(rows),
        response,
        options,
        true,
    )
}

/// The upper triangle `[R z; 0 ρ]` (column-major, (p + 1)², p = `column_scales.len()`) of the
/// equilibrated `[A y]`, absorbing [`FACTOR_BLOCK`] rows at a time.
fn streamed_triangle(
    rows: &SparseRows,
    column_scales: &[f64],
    response: &[f64],
    response_scale: f64,
) -> Vec<f64> {
    let n_columns = column_scales.len();
    let size = n_columns + 1;
    let n_rows = rows.nrows();
    let mut triangle = vec![0.0; size * size];
    let mut workspace = vec![0.0; FACTOR_BLOCK * size];
    let mut start = 0;
    while start < n_rows {
        let end = (start + FACTOR_BLOCK).min(n_rows);
        let height = end - start;
        let block = &mut workspace[..height * size];
        block.iter_mut().for_each(|value| *value = 0.0);
        for (offset, row) in (start..end).enumerate() {
            let (columns, values) = rows.entries(row);
            for (&column, &value) in columns.iter().zip(values) {
                let column = column as usize;
                block[column * height + offset] = value * column_scales[column];
            }
            block[n_columns * height + offset] = response[row] * response_scale;
        }
        absorb_block(&mut triangle, size, block, height);
        start = end;
    }
    triangle
}

/// Reflects the `height` rows of `block` (column-major, `size` columns) into the upper triangle
/// `triangle` (column-major, `size × size`): for each column `j`, the reflection of
/// `[triangle[j][j]; block[·][j]]` onto its first entry, applied to the later columns.
fn absorb_block(triangle: &mut [f64], size: usize, block: &mut [f64], height: usize) {
    const GROUP: usize = 4;
    for j in 0..size {
        let (before, after) = block.split_at_mut((j + 1) * height);
        let pivot = &before[j * height..];
        let below: f64 = pivot.iter().map(|value| value * value).sum();
        if below == 0.0 {
            // Nothing beneath the triangle in this column: the reflection is the identity.
            continue;
        }
        let leading = triangle[j * size + j];
        let norm = (leading * leading + below).sqrt();
        // The sign choice avoids cancellation in v_0 = x_0 − α.
        let alpha = if leading >= 0.0 { -norm } else { norm };
        let head = leading - alpha;
        let beta = 2.0 / (head * head + below);
        // Later columns in groups, so that several projections accumulate side by side.
        let later = size - j - 1;
        let mut k = 0;
        while k < later {
            let members = GROUP.min(later - k);
            let mut projections = [0.0_f64; GROUP];
            for (member, projection) in projections.iter_mut().enumerate().take(members) {
                *projection = head * triangle[(j + 1 + k + member) * size + j];
            }
            {
                let targets = &after[k * height..(k + members) * height];
                if members == GROUP {
                    let columns: [&[f64]; GROUP] =
                        std::array::from_fn(|m| &targets[m * height..(m + 1) * height]);
                    for (i, &v) in pivot.iter().enumerate() {
                        for m in 0..GROUP {
                            projections[m] += v * columns[m][i];
                        }
                    }
                } else {
                    for (member, projection) in projections.iter_mut().enumerate().take(members) {
                        let column = &targets[member * height..(member + 1) * height];
                        for (v, t) in pivot.iter().zip(column) {
                            *projection += v * t;
                        }
                    }
                }
            }
            for (member, projection) in projections.iter().enumerate().take(members) {
                let factor = beta * projection;
                let index = (j + 1 + k + member) * size + j;
                triangle[index] -= factor * head;
                let column = &mut after[(k + member) * height..(k + member + 1) * height];
                for (t, v) in column.iter_mut().zip(pivot) {
                    *t -= factor * v;
                }
            }
            k += members;
        }
        triangle[j * size + j] = alpha;
    }
}

/// Solves the semi-normal equations `RᵀR x = Aᵀb − c` for the accepted columns, starting from
/// the QR solution with `rotated_b` (the leading part of `Qᵀb`), and refines `x` with
/// `h = Aᵀ(b − A x) − c` in double-double, stopping by [`Refinement`]'s rule.
fn refined_seminormal_solve(
    factorization: &PivotedQr,
    kept_columns: &KeptColumns,
    b: &[f64],
    rotated_b: &[f64],
    c: &[f64],
    max_refinement_steps: usize,
) -> AugmentedSolution {
    let (_, mut x) = factorization.solve_augmented(rotated_b, c);
    let zeros = vec![0.0; factorization.n_observations];
    let mut progress = Refinement::starting_from(&x);
    for _ in 0..max_refinement_steps {
        if !x.iter().all(|value| value.is_finite()) {
            break;
        }
        let negated_residual: Vec<f64> = normal_equations_residual(kept_columns, b, c, &x)
            .iter()
            .map(|value| -value)
            .collect();
        // [I R; Rᵀ 0] [r; d] = [0; −h] gives RᵀR d = h.
        let (_, x_correction) = factorization.solve_augmented(&zeros, &negated_residual);
        let correction = max_abs(&x_correction);
        if !progress.admits(correction) {
            break;
        }
        for (value, delta) in x.iter_mut().zip(&x_correction) {
            *value += delta;
        }
        if progress.accepted(correction, &x) {
            break;
        }
    }
    progress.solution(x)
}

/// `Aᵀ(b − A x) − c` over the accepted (equilibrated) columns, each row's residual and each
/// sum accumulated in double-double; zero entries add exact zeros and are skipped (`x` is
/// finite here).
fn normal_equations_residual(
    kept_columns: &KeptColumns,
    b: &[f64],
    c: &[f64],
    x: &[f64],
) -> Vec<f64> {
    let mut sums: Vec<DoubleDouble> = c
        .iter()
        .map(|&value| {
            let mut sum = DoubleDouble::zero();
            sum.add(-value);
            sum
        })
        .collect();
    let mut entries: Vec<(usize, f64)> = Vec::with_capacity(kept_columns.columns.len());
    for (row, &b_row) in b.iter().enumerate() {
        entries.clear();
        kept_columns.scaled_entries_into(row, &mut entries);
        let mut residual = DoubleDouble::zero();
        residual.add(b_row);
        for &(position, value) in &entries {
            residual.add_product(-value, x[position]);
        }
        // The residual is kept to about twice the working precision (its rounding to one
        // double would leave an error of ε·|A|ᵀ|r| in h, which a large-residual problem such as
        // NIST's Wampler 4 and 5 turns into lost digits).
        let (high, low) = residual.split();
        for &(position, value) in &entries {
            sums[position].add_product(value, high);
            sums[position].add_product(value, low);
        }
    }
    sums.iter().map(DoubleDouble::value).collect()
}

/// The design as the refinement and the fitted values read it: its column-major values, or
/// its non-zero entries row by row while its storage serves as the factorization's workspace.
#[derive(Clone, Copy)]
enum Original<'a> {
    Dense(&'a [f64]),
    Sparse(&'a SparseRows),
}

/// Everything after equilibration: factorization, refined coefficients, covariance, fitted
/// values. Returns the outcome and the workspace (the equilibrated storage, now holding the
/// Householder vectors).
#[allow(clippy::too_many_arguments)]
fn solve(
    storage: Vec<f64>,
    n_observations: usize,
    n_columns: usize,
    column_scales: &[f64],
    original: Original<'_>,
    response: &[f64],
    options: &LeastSquaresOptions,
    with_covariance: bool,
) -> (Result<LeastSquaresFit, LeastSquaresError>, Vec<f64>) {
    let factorization = PivotedQr::new(storage, n_observations, n_columns, options.rank_tolerance);
    let outcome = solve_factored(
        Factors::Design(&factorization),
        n_observations,
        n_columns,
        column_scales,
        original,
        response,
        options,
        with_covariance,
    );
    (outcome, factorization.work)
}

/// The factorization a fit refines with.
#[derive(Clone, Copy)]
enum Factors<'a> {
    /// The Householder QR of the design itself: the augmented system is refined.
    Design(&'a PivotedQr),
    /// The pivoted QR of the triangular factor `R` of a design factored in row blocks
    /// (`A = Q R`, `Q` not kept), with the leading part of `Qᵀy`: the semi-normal equations
    /// are refined (see [`fit_least_squares_rows`]).
    Triangle {
        qr: &'a PivotedQr,
        rotated_response: &'a [f64],
    },
}

impl<'a> Factors<'a> {
    /// The pivoted factorization whose accepted columns and triangle the fit uses.
    fn qr(&self) -> &'a PivotedQr {
        match *self {
            Factors::Design(qr) | Factors::Triangle { qr, .. } => qr,
        }
    }

    /// Solves and refines for right-hand side `(b, c)`; `b_is_response` says whether `b` is
    /// the response (whose rotation a triangle factorization holds) or zero.
    fn refined_solve(
        &self,
        kept_columns: &KeptColumns,
        b: &[f64],
        b_is_response: bool,
        c: &[f64],
        max_refinement_steps: usize,
    ) -> AugmentedSolution {
        match *self {
            Factors::Design(qr) => {
                refined_augmented_solve(qr, kept_columns, b, c, max_refinement_steps)
            }
            Factors::Triangle {
                qr,
                rotated_response,
            } => {
                let zeros;
                let rotated = if b_is_response {
                    rotated_response
                } else {
                    zeros = vec![0.0; rotated_response.len()];
                    &zeros
                };
                refined_seminormal_solve(qr, kept_columns, b, rotated, c, max_refinement_steps)
            }
        }
    }
}

#[allow(clippy::too_many_arguments)]
fn solve_factored(
    factors: Factors<'_>,
    n_observations: usize,
    n_columns: usize,
    column_scales: &[f64],
    original: Original<'_>,
    response: &[f64],
    options: &LeastSquaresOptions,
    with_covariance: bool,
) -> Result<LeastSquaresFit, LeastSquaresError> {
    let factorization = factors.qr();
    let rank = factorization.kept.len();
    if rank == 0 {
        return Err(LeastSquaresError::NoEstimableColumns { n_columns });
    }
    if n_observations <= rank {
        return Err(LeastSquaresError::NoResidualDegreesOfFreedom {
            n_observations,
            rank,
        });
    }
    let mut position_of = vec![usize::MAX; n_columns];
    for (position, &column) in factorization.kept.iter().enumerate() {
        position_of[column] = position;
    }
    let kept_columns = KeptColumns {
        original,
        n_rows: n_observations,
        n_columns,
        columns: factorization
            .kept
            .iter()
            .map(|&column| (column, column_scales[column]))
            .collect(),
        position_of,
    };

    // Coefficients of the scaled, reduced problem: b = y, c = 0.
    let solution = factors.refined_solve(
        &kept_columns,
        response,
        true,
        &vec![0.0; rank],
        options.max_refinement_steps,
    );

    let mut coefficients = vec![None; n_columns];
    for (position, &column) in factorization.kept.iter().enumerate() {
        coefficients[column] = Some(solution.x[position] * column_scales[column]);
    }

    // Unscaled covariance of the scaled problem. From the triangular factor,
    // (AᵀA)⁻¹ = R⁻¹R⁻ᵀ, whose relative error is bounded by a small multiple of
    // κ(R)²·ε. When κ₁(R) = ‖R‖₁‖R⁻¹‖₁ exceeds `REFINE_COVARIANCE_ABOVE`
    // that bound is no longer far below the digits a report shows, and each
    // column is refined instead: b = 0, c = −e_t.
    let scaled_inverse = if with_covariance {
        scaled_covariance(factors, &kept_columns, n_observations, options)
    } else {
        DMatrix::<f64>::zeros(rank, rank)
    };
    let mut unscaled_covariance = DMatrix::<f64>::zeros(n_columns, n_columns);
    for (first, &column_a) in factorization.kept.iter().enumerate() {
        for (second, &column_b) in factorization.kept.iter().enumerate() {
            // Each column was solved separately; averaging the two mirror
            // entries makes the matrix exactly symmetric.
            let symmetric =
                0.5 * (scaled_inverse[(first, second)] + scaled_inverse[(second, first)]);
            unscaled_covariance[(column_a, column_b)] =
                symmetric * column_scales[column_a] * column_scales[column_b];
        }
    }

    // Fitted values and residuals from the final coefficients, in the
    // original units and in double-double, so that they agree with the
    // coefficients to the last digit.
    let mut fitted = vec![0.0; n_observations];
    let mut residuals = vec![0.0; n_observations];
    let mut residual_squares = DoubleDouble::zero();
    // A zero entry adds an exact zero product, which changes no double-double sum, so the
    // stored non-zeros suffice while every coefficient is finite.
    let coefficients_finite = coefficients.iter().flatten().all(|value| value.is_finite());
    let mut row_values = vec![0.0; n_columns];
    for row in 0..n_observations {
        let mut prediction = DoubleDouble::zero();
        match original {
            Original::Sparse(rows) if coefficients_finite => {
                let (columns, values) = rows.entries(row);
                for (&column, &value) in columns.iter().zip(values) {
                    if let Some(coefficient) = coefficients[column as usize] {
                        prediction.add_product(value, coefficient);
                    }
                }
            }
            _ => {
                kept_columns.row_into(row, &mut row_values);
                for (column, coefficient) in coefficients.iter().enumerate() {
                    if let Some(coefficient) = coefficient {
                        prediction.add_product(row_values[column], *coefficient);
                    }
                }
            }
        }
        fitted[row] = prediction.value();
        let mut residual = DoubleDouble::zero();
        residual.add(response[row]);
        residual.subtract(&prediction);
        residuals[row] = residual.value();
        residual_squares.add_product(residuals[row], residuals[row]);
    }
    let residual_sum_of_squares = residual_squares.value();

    let all_finite = coefficients.iter().flatten().all(|value| value.is_finite())
        && unscaled_covariance.iter().all(|value| value.is_finite())
        && fitted
            .iter()
            .chain(residuals.iter())
            .all(|value| value.is_finite())
        && residual_sum_of_squares.is_finite();
    if !all_finite {
        return Err(LeastSquaresError::NumericalFailure {
            detail: "an intermediate value overflowed; rescale the data",
        });
    }
    let covariance_diagonal_valid = factorization
        .kept
        .iter()
        .all(|&column| unscaled_covariance[(column, column)] > 0.0);
    if with_covariance && !covariance_diagonal_valid {
        return Err(LeastSquaresError::NumericalFailure {
            detail: "a diagonal element of the inverse cross-product matrix is not positive",
        });
    }

    Ok(LeastSquaresFit {
        n_observations,
        n_columns,
        rank,
        coefficients,
        aliased_columns: factorization.aliased.clone(),
        unscaled_covariance,
        fitted,
        residuals,
        residual_sum_of_squares,
        residual_df: n_observations - rank,
        refinement_steps: solution.refinement_steps,
        refinement_converged: solution.converged,
    })
}

/// `(AᵀA)⁻¹` of the equilibrated accepted columns, in pivot order (see [`fit`]).
fn scaled_covariance(
    factors: Factors<'_>,
    kept_columns: &KeptColumns,
    n_observations: usize,
    options: &LeastSquaresOptions,
) -> DMatrix<f64> {
    let factorization = factors.qr();
    let rank = factorization.kept.len();
    let inverse_triangular = upper_triangular_inverse(&factorization.triangular);
    let condition = one_norm_upper(&factorization.triangular) * one_norm_upper(&inverse_triangular);
    let mut scaled_inverse = DMatrix::<f64>::zeros(rank, rank);
    if condition.is_finite()
        && condition <= REFINE_COVARIANCE_ABOVE
        && !options.always_refine_covariance
    {
        for first in 0..rank {
            for second in first..rank {
                // Row `first` of R⁻¹ times row `second`; both are zero left of
                // their own index.
                let mut sum = 0.0;
                for k in second..rank {
                    sum += inverse_triangular[first][k] * inverse_triangular[second][k];
                }
                scaled_inverse[(first, second)] = sum;
                scaled_inverse[(second, first)] = sum;
            }
        }
    } else {
        let zero_response = vec![0.0; n_observations];
        for target in 0..rank {
            let mut unit = vec![0.0; rank];
            unit[target] = -1.0;
            let column_solution = factors.refined_solve(
                kept_columns,
                &zero_response,
                false,
                &unit,
                options.max_refinement_steps,
            );
            for position in 0..rank {
                scaled_inverse[(position, target)] = column_solution.x[position];
            }
        }
    }
    scaled_inverse
}

fn check_options(options: &LeastSquaresOptions) -> Result<(), LeastSquaresError> {
    let tolerance = options.rank_tolerance;
    if !(tolerance.is_finite() && (0.0..1.0).contains(&tolerance)) {
        return Err(LeastSquaresError::InvalidOption {
            name: "rank_tolerance",
            value: tolerance,
            expected: "a finite number in [0, 1)",
        });
    }
    Ok(())
}

/// Scales every column by a power of two so that its largest absolute entry
/// lies in [1, 2). Returns the scaled columns and, per column, the factor by
/// which a scaled-problem coefficient must be multiplied to give the original
/// one (which is the same factor that was applied to the column). A zero
/// column keeps factor 1.
fn equilibrate(design: &DMatrix<f64>) -> (Vec<f64>, Vec<f64>) {
    let (n_observations, n_columns) = design.shape();
    let mut storage = design.as_slice().to_vec();
    let column_scales = equilibrate_storage(&mut storage, n_observations, n_columns);
    (storage, column_scales)
}

/// [`equilibrate`] of a column-major `n_observations × n_columns` array, in place.
fn equilibrate_storage(storage: &mut [f64], n_observations: usize, n_columns: usize) -> Vec<f64> {
    let mut column_scales = Vec::with_capacity(n_columns);
    for column in storage.chunks_mut(n_observations.max(1)).take(n_columns) {
        let largest = column
            .iter()
            .map(|value| value.abs())
            .fold(0.0_f64, f64::max);
        let scale = power_of_two_scale(largest);
        for value in column.iter_mut() {
            *value *= scale;
        }
        column_scales.push(scale);
    }
    column_scales
}

/// The power of two that brings `largest` (a column's largest absolute entry) into [1, 2);
/// 1 for a zero column.
fn power_of_two_scale(largest: f64) -> f64 {
    if largest > 0.0 {
        // Clamping keeps 2^exponent a normal number, so the scaling stays exact
        // except for entries that would become subnormal anyway.
        let exponent = (largest.log2().floor() as i32).clamp(-1000, 1000);
        2.0_f64.ppowi(-exponent)
    } else {
        1.0
    }
}

/// Euclidean norm without overflow for entries of moderate size (the columns
/// are equilibrated, so plain summation of squares is safe).
fn euclidean_norm(values: &[f64]) -> f64 {
    values.iter().map(|value| value * value).sum::<f64>().sqrt()
}

/// Householder QR of the accepted columns, in pivot order. Reflector `t` is
/// `H_t = I − β_t v_t v_tᵀ` acting on rows `t..n`.
struct PivotedQr {
    n_observations: usize,
    /// Original column indices of the accepted columns, in pivot order.
    kept: Vec<usize>,
    /// Original column indices of the aliased columns, ascending.
    aliased: Vec<usize>,
    /// Upper-triangular factor, `rank × rank`, row-major by `[row][column]`.
    triangular: Vec<Vec<f64>>,
    /// The reduced columns, column-major `n × p`: for the accepted column in pivot position
    /// `t`, rows `t..n` hold the Householder vector `v_t`; aliased columns are left unused.
    work: Vec<f64>,
    reflector_betas: Vec<f64>,
}

impl PivotedQr {
    fn new(
        storage: Vec<f64>,
        n_observations: usize,
        n_columns: usize,
        rank_tolerance: f64,
    ) -> PivotedQr {
        let mut work = storage;
        let n = n_observations;
        let mut kept = Vec::new();
        let mut aliased = Vec::new();
        let mut upper_columns: Vec<Vec<f64>> = Vec::new();
        let mut reflector_betas = Vec::new();

        for column in 0..n_columns {
            let step = kept.len();
            let (done, rest) = work.split_at_mut((column + 1) * n);
            let current = &mut done[column * n..];
            let own_norm = euclidean_norm(current);
            // Reflections are orthogonal, so the norm of rows step..n of the
            // transformed column is the column's distance to the span of the
            // columns already accepted.
            let remaining_norm = if step < n_observations {
                euclidean_norm(&current[step..])
            } else {
                0.0
            };
            if own_norm == 0.0 || remaining_norm <= rank_tolerance * own_norm {
                aliased.push(column);
                continue;
            }
            let pivot_part = &current[step..];
            let leading = pivot_part[0];
            // The sign choice avoids cancellation in v_0 = x_0 − α.
            let alpha = if leading >= 0.0 {
                -remaining_norm
            } else {
                remaining_norm
            };
            let mut vector = pivot_part.to_vec();
            vector[0] = leading - alpha;
            let vector_norm_squared: f64 = vector.iter().map(|value| value * value).sum();
            let beta = 2.0 / vector_norm_squared;

            let mut upper = current[..step].to_vec();
            upper.push(alpha);
            upper_columns.push(upper);

            let later = rest.len() / n.max(1);
            apply_reflector_to_columns(&vector, beta, &mut rest[..later * n], n, step);
            kept.push(column);
            current[step..].copy_from_slice(&vector);
            reflector_betas.push(beta);
        }

        let rank = kept.len();
        let mut triangular = vec![vec![0.0; rank]; rank];
        for (column_position, upper) in upper_columns.iter().enumerate() {
            for (row_position, value) in upper.iter().enumerate() {
                triangular[row_position][column_position] = *value;
            }
        }
        PivotedQr {
            n_observations,
            kept,
            aliased,
            triangular,
            work,
            reflector_betas,
        }
    }

    /// Householder vector of pivot position `step` (rows `step..n`).
    fn reflector(&self, step: usize) -> &[f64] {
        let start = self.kept[step] * self.n_observations;
        &self.work[start + step..start + self.n_observations]
    }

    /// Solves `[I A; Aᵀ 0] [r; x] = [f; g]` for the accepted columns `A`,
    /// with `A = Q [R; 0]`: `Rᵀ e₁ = g`, `d = Qᵀ f`, `R x = d₁ − e₁`,
    /// `r = Q [e₁; d₂]` (Björck 1996, §2.9.2).
    fn solve_augmented(&self, f: &[f64], g: &[f64]) -> (Vec<f64>, Vec<f64>) {
        let rank = self.kept.len();
        let mut rotated = f.to_vec();
        for step in 0..rank {
            apply_reflector(
                self.reflector(step),
                self.reflector_betas[step],
                &mut rotated[step..],
            );
        }
        // Forward substitution with Rᵀ.
        let mut e_top = vec![0.0; rank];
        for row in 0..rank {
            let mut value = g[row];
            for (earlier, solved) in e_top.iter().enumerate().take(row) {
                value -= self.triangular[earlier][row] * solved;
            }
            e_top[row] = value / self.triangular[row][row];
        }
        // Back substitution with R.
        let mut x = vec![0.0; rank];
        for row in (0..rank).rev() {
            let mut value = rotated[row] - e_top[row];
            for (later, solved) in x.iter().enumerate().skip(row + 1) {
                value -= self.triangular[row][later] * solved;
            }
            x[row] = value / self.triangular[row][row];
        }
        let mut r = rotated;
        r[..rank].copy_from_slice(&e_top);
        for step in (0..rank).rev() {
            apply_reflector(
                self.reflector(step),
                self.reflector_betas[step],
                &mut r[step..],
            );
        }
        debug_assert_eq!(r.len(), self.n_observations);
        (r, x)
    }
}

/// [`apply_reflector`] to rows `step..` of every column of `targets`. The projections of eight
/// columns are accumulated in one pass over the rows (eight independent chains the processor
/// overlaps, and the reflector read once for all of them); each is still summed over the rows
/// in order from −0.0, as an iterator's sum is, so the bits are those of one column at a time.
fn apply_reflector_to_columns(
    vector: &[f64],
    beta: f64,
    targets: &mut [f64],
    n_rows: usize,
    step: usize,
) {
    const GROUP: usize = 8;
    let length = vector.len();
    if n_rows == 0 {
        return;
    }
    for group in targets.chunks_mut(GROUP * n_rows) {
        let members = group.len() / n_rows;
        let mut projections = [-0.0_f64; GROUP];
        if members == GROUP {
            let columns: [&[f64]; GROUP] =
                std::array::from_fn(|k| &group[k * n_rows + step..k * n_rows + step + length]);
            for (i, &v) in vector.iter().enumerate() {
                for k in 0..GROUP {
                    projections[k] += v * columns[k][i];
                }
            }
        } else {
            for (k, projection) in projections.iter_mut().enumerate().take(members) {
                let column = &group[k * n_rows + step..(k + 1) * n_rows];
                *projection = vector.iter().zip(column).map(|(v, t)| v * t).sum();
            }
        }
        for (column, projection) in group.chunks_mut(n_rows).zip(projections) {
            let factor = beta * projection;
            for (value, v) in column[step..].iter_mut().zip(vector) {
                *value -= factor * v;
            }
        }
    }
}

fn apply_reflector(vector: &[f64], beta: f64, target: &mut [f64]) {
    let projection: f64 = vector.iter().zip(target.iter()).map(|(v, t)| v * t).sum();
    let factor = beta * projection;
    for (value, v) in target.iter_mut().zip(vector) {
        *value -= factor * v;
    }
}

/// The accepted columns of the equilibrated design, read from the caller's design (its
/// column-major values, or its stored non-zero entries) and scaled on the fly (a power of two,
/// so exactly the values the factorization started from) instead of being kept as a copy.
struct KeptColumns<'a> {
    original: Original<'a>,
    n_rows: usize,
    n_columns: usize,
    /// (design column, its power-of-two scale), in pivot order.
    columns: Vec<(usize, f64)>,
    /// Per design column, its pivot position; `usize::MAX` for an aliased column.
    position_of: Vec<usize>,
}

impl KeptColumns<'_> {
    /// The non-zero entries of `row` in the accepted columns, equilibrated, as (pivot
    /// position, value), in design-column order.
    fn scaled_entries_into(&self, row: usize, entries: &mut Vec<(usize, f64)>) {
        match self.original {
            Original::Dense(data) => {
                for (position, &(column, scale)) in self.columns.iter().enumerate() {
                    let value = data[column * self.n_rows + row];
                    if value != 0.0 {
                        entries.push((position, value * scale));
                    }
                }
            }
            Original::Sparse(rows) => {
                let (columns, values) = rows.entries(row);
                for (&column, &value) in columns.iter().zip(values) {
                    let position = self.position_of[column as usize];
                    if position != usize::MAX {
                        entries.push((position, value * self.columns[position].1));
                    }
                }
            }
        }
    }

    /// Every design entry of `row`, zeros included, into `values` (one per design column).
    fn row_into(&self, row: usize, values: &mut [f64]) {
        match self.original {
            Original::Dense(data) => {
                for (column, value) in values.iter_mut().enumerate().take(self.n_columns) {
                    *value = data[column * self.n_rows + row];
                }
            }
            Original::Sparse(rows) => {
                values.iter_mut().for_each(|value| *value = 0.0);
                let (columns, entries) = rows.entries(row);
                for (&column, &entry) in columns.iter().zip(entries) {
                    values[column as usize] = entry;
                }
            }
        }
    }
}

struct AugmentedSolution {
    x: Vec<f64>,
    refinement_steps: usize,
    converged: bool,
}

/// Solves the augmented system for right-hand side `(b, c)` and refines it, stopping by
/// [`Refinement`]'s rule.
fn refined_augmented_solve(
    factorization: &PivotedQr,
    kept_columns: &KeptColumns,
    b: &[f64],
    c: &[f64],
    max_refinement_steps: usize,
) -> AugmentedSolution {
    let (mut r, mut x) = factorization.solve_augmented(b, c);
    let mut progress = Refinement::starting_from(&x);
    for _ in 0..max_refinement_steps {
        // f = b − r − A x and g = c − Aᵀ r, each in double-double. A zero entry of A adds an
        // exact ±0 product with no rounding error, which leaves a double-double sum's value
        // unchanged, so zero entries are skipped (designs of dummies are mostly zeros) — unless
        // x or r holds a non-finite value, which 0 · ∞ must carry into the sums.
        let skip_zeros = x.iter().chain(&r).all(|v| v.is_finite());
        let (f, g) = match kept_columns.original {
            Original::Sparse(rows) => {
                stored_row_residuals(rows, kept_columns, b, c, &r, &x, skip_zeros)
            }
            Original::Dense(data) => dense_residuals(data, kept_columns, b, c, &r, &x, skip_zeros),
        };
        let (r_correction, x_correction) = factorization.solve_augmented(&f, &g);
        let correction = max_abs(&x_correction);
        if !progress.admits(correction) {
            break;
        }
        for (value, delta) in x.iter_mut().zip(&x_correction) {
            *value += delta;
        }
        for (value, delta) in r.iter_mut().zip(&r_correction) {
            *value += delta;
        }
        if progress.accepted(correction, &x) {
            break;
        }
    }
    progress.solution(x)
}

/// The stopping rule both refinements share: a correction is taken only while corrections
/// shrink by at least half per step (the classical rule for mixed-precision refinement, which
/// also guards against a problem too ill-conditioned to refine; a NaN correction stops too), and
/// the refinement has converged when a correction is zero or below one unit of rounding of `x`.
struct Refinement {
    previous_correction: f64,
    steps: usize,
    converged: bool,
}

impl Refinement {
    fn starting_from(x: &[f64]) -> Refinement {
        Refinement {
            previous_correction: max_abs(x),
            steps: 0,
            converged: false,
        }
    }

    /// Whether a correction of this size is to be applied (false ends the refinement).
    fn admits(&mut self, correction: f64) -> bool {
        if correction == 0.0 {
            self.converged = true;
            return false;
        }
        // Every comparison with NaN is false.
        correction <= 0.5 * self.previous_correction
    }

    /// Records an applied correction; true when `x` has converged.
    fn accepted(&mut self, correction: f64, x: &[f64]) -> bool {
        self.steps += 1;
        self.previous_correction = correction;
        self.converged = correction <= f64::EPSILON * max_abs(x);
        self.converged
    }

    fn solution(self, x: Vec<f64>) -> AugmentedSolution {
        AugmentedSolution {
            x,
            refinement_steps: self.steps,
            converged: self.converged,
        }
    }
}

/// The refinement's residuals f = b − r − A x and g = c − Aᵀ r in double-double, reading
/// every entry of A (zeros are skipped when `skip_zeros`).
fn dense_residuals(
    data: &[f64],
    kept_columns: &KeptColumns,
    b: &[f64],
    c: &[f64],
    r: &[f64],
    x: &[f64],
    skip_zeros: bool,
) -> (Vec<f64>, Vec<f64>) {
    let n_observations = b.len();
    let mut f = vec![0.0; n_observations];
    for row in 0..n_observations {
        let mut accumulator = DoubleDouble::zero();
        accumulator.add(b[row]);
        accumulator.add(-r[row]);
        for (position, &(column, scale)) in kept_columns.columns.iter().enumerate() {
            let entry = data[column * kept_columns.n_rows + row];
            if skip_zeros && entry == 0.0 {
                continue;
            }
            let value = entry * scale;
            accumulator.add_product(-value, x[position]);
        }
        f[row] = accumulator.value();
    }
    let g: Vec<f64> = kept_columns
        .columns
        .iter()
        .enumerate()
        .map(|(position, &(column, scale))| {
            let values = &data[column * kept_columns.n_rows..(column + 1) * kept_columns.n_rows];
            let mut accumulator = DoubleDouble::zero();
            accumulator.add(c[position]);
            for row in 0..n_observations {
                if skip_zeros && values[row] == 0.0 {
                    continue;
                }
                accumulator.add_product(-(values[row] * scale), r[row]);
            }
            accumulator.value()
        })
        .collect();
    (f, g)
}

/// [`dense_residuals`] for a design held as stored rows, a row at a time: with `skip_zeros`
/// only the stored non-zeros, otherwise the whole row scattered first (zeros included, so that
/// a non-finite operand meets them as in the dense pass). Each sum receives the dense pass's
/// terms in the dense order, so the same bits.
fn stored_row_residuals(
    rows: &SparseRows,
    kept_columns: &KeptColumns,
    b: &[f64],
    c: &[f64],
    r: &[f64],
    x: &[f64],
    skip_zeros: bool,
) -> (Vec<f64>, Vec<f64>) {
    let n_observations = b.len();
    let mut row_values = vec![0.0; kept_columns.n_columns];
    let mut f = vec![0.0; n_observations];
    let mut g_accumulators: Vec<DoubleDouble> = c
        .iter()
        .map(|&value| {
            let mut accumulator = DoubleDouble::zero();
            accumulator.add(value);
            accumulator
        })
        .collect();
    for row in 0..n_observations {
        let mut accumulator = DoubleDouble::zero();
        accumulator.add(b[row]);
        accumulator.add(-r[row]);
        let mut add = |position: usize, entry: f64| {
            let value = entry * kept_columns.columns[position].1;
            accumulator.add_product(-value, x[position]);
            g_accumulators[position].add_product(-value, r[row]);
        };
        if skip_zeros {
            let (columns, entries) = rows.entries(row);
            for (&column, &entry) in columns.iter().zip(entries) {
                let position = kept_columns.position_of[column as usize];
                if position != usize::MAX {
                    add(position, entry);
                }
            }
        } else {
            kept_columns.row_into(row, &mut row_values);
            for (position, &(column, _)) in kept_columns.columns.iter().enumerate() {
                add(position, row_values[column]);
            }
        }
        f[row] = accumulator.value();
    }
    (f, g_accumulators.iter().map(DoubleDouble::value).collect())
}

/// Above this 1-norm condition number of the equilibrated triangular factor
/// the covariance columns are refined (see [`fit_least_squares`]). At 1e3 the
/// worst-case relative error of the plain inverse, a few times κ²·ε, is about
/// 1e-10; well-conditioned designs (treatment, site and a baseline covariate,
/// κ₁ of order 10) lose nothing a report can show, and the NIST StRD
/// polynomial and Longley designs, far above it, are still refined.
const REFINE_COVARIANCE_ABOVE: f64 = 1e3;

/// Inverse of an upper-triangular matrix stored row-major, by back
/// substitution one column at a time; the result is upper triangular.
fn upper_triangular_inverse(upper: &[Vec<f64>]) -> Vec<Vec<f64>> {
    let size = upper.len();
    let mut inverse = vec![vec![0.0; size]; size];
    for column in 0..size {
        inverse[column][column] = 1.0 / upper[column][column];
        for row in (0..column).rev() {
            let mut sum = 0.0;
            for k in row + 1..=column {
                sum += upper[row][k] * inverse[k][column];
            }
            inverse[row][column] = -sum / upper[row][row];
        }
    }
    inverse
}

/// Largest absolute column sum of an upper-triangular matrix stored row-major.
fn one_norm_upper(upper: &[Vec<f64>]) -> f64 {
    let size = upper.len();
    (0..size)
        .map(|column| {
            (0..=column)
                .map(|row| upper[row][column].abs())
                .sum::<f64>()
        })
        .fold(0.0_f64, f64::max)
}

fn max_abs(values: &[f64]) -> f64 {
    values
        .iter()
        .fold(0.0_f64, |largest, value| largest.max(value.abs()))
}

/// Unevaluated sum `high + low` used to accumulate sums and dot products as
/// accurately as in twice the working precision (Ogita, Rump & Oishi 2005,
/// algorithms Sum2 and Dot2).
#[derive(Debug, Clone, Copy)]
struct DoubleDouble {
    high: f64,
    low: f64,
}

impl DoubleDouble {
    fn zero() -> DoubleDouble {
        DoubleDouble {
            high: 0.0,
            low: 0.0,
        }
    }

    /// Adds `value`, keeping the rounding error of the addition (Knuth's
    /// two-sum, exact for any ordering of magnitudes).
    fn add(&mut self, value: f64) {
        let sum = self.high + value;
        let value_part = sum - self.high;
        let error = (self.high - (sum - value_part)) + (value - value_part);
        self.high = sum;
        self.low += error;
    }

    /// Adds `a · b`, keeping the rounding error of the product, obtained
    /// exactly with one fused multiply-add.
    fn add_product(&mut self, a: f64, b: f64) {
        let product = a * b;
        let product_error = a.mul_add(b, -product);
        self.add(product);
        self.low += product_error;
    }

    fn subtract(&mut self, other: &DoubleDouble) {
        self.add(-other.high);
        self.low -= other.low;
    }

    fn value(&self) -> f64 {
        self.high + self.low
    }

    /// The value as a rounded double and the remainder (Dekker's fast two-sum; `high`
    /// dominates `low`).
    fn split(&self) -> (f64, f64) {
        let high = self.high + self.low;
        (high, self.low - (high - self.high))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Common practice: an orthogonal design has (XᵀX)⁻¹ = diag(1/‖x_j‖²)
    // and coefficients xⱼᵀy/‖x_j‖²; values here are exact in binary.
    #[test]
    fn orthogonal_design_gives_textbook_values() {
        let design = DMatrix::from_column_slice(4, 2, &[1.0, 1.0, 1.0, 1.0, 1.0, -1.0, 1.0, -1.0]);
        let response = [3.0, 1.0, 4.0, 2.0];
        let fit = fit_least_squares(&design, &response, &LeastSquaresOptions::default())
            .expect("orthogonal design fits");
        let relative = |a: f64, b: f64| ((a - b) / b).abs();
        // Tolerance 1e-15 relative: exact problem, only final rounding.
        assert!(relative(fit.coefficients[0].unwrap(), 2.5) < 1e-15);
        assert!(relative(fit.coefficients[1].unwrap(), 1.0) < 1e-15);
        assert!(relative(fit.unscaled_covariance[(0, 0)], 0.25) < 1e-15);
        assert!(fit.unscaled_covariance[(0, 1)].abs() < 1e-15);
        // RSS = Σ(y − ŷ)² with ŷ = (3.5, 1.5, 3.5, 1.5): 0.25·4 = 1.
        assert!(relative(fit.residual_sum_of_squares, 1.0) < 1e-15);
        assert_eq!(fit.residual_df, 2);
    }

    // Common practice: two-sum and two-product are error-free, so
    // (1e16 + 1) − 1e16 is recovered exactly.
    #[test]
    fn double_double_keeps_low_order_digits() {
        let mut sum = DoubleDouble::zero();
        sum.add(1e16);
        sum.add(1.0);
        sum.add(-1e16);
        assert_eq!(sum.value(), 1.0);
        let mut product = DoubleDouble::zero();
        let a = 1.0 + f64::EPSILON;
        product.add_product(a, a);
        product.add(-1.0);
        product.add(-2.0 * f64::EPSILON);
        // (1 + ε)² − 1 − 2ε = ε², exact.
        assert_eq!(product.value(), f64::EPSILON * f64::EPSILON);
    }
}
