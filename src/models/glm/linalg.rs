//! Small dense linear algebra for the GLM engine: weighted cross-products XᵀWX and XᵀWz built
//! in one blocked pass over the rows of a column-major design (no per-row allocation), a
//! sequential rank check that finds aliased columns, and solves/inverses of the symmetric
//! positive-definite information matrix after Jacobi (diagonal) scaling. It owns no statistics
//! and must not allocate anything proportional to the number of rows.
//!
//! References: Golub & Van Loan (2013), *Matrix Computations*, 4th ed., §4.2 (Cholesky) and
//! §5.4 (rank-revealing factorisations); Higham (2002), *Accuracy and Stability of Numerical
//! Algorithms*, §7.3 (diagonal scaling of symmetric positive-definite systems).

#[allow(unused_imports)]
use crate::models::portable::Portable;
use crate::models::{DenseOnDemand, DesignInput};
use nalgebra::{DMatrix, DVector};

/// Rows per block in the cross-product pass: long enough for contiguous inner loops over a
/// column, short enough that the block of every active column stays in cache.
pub(crate) const ROW_BLOCK: usize = 256;

/// Σᵢ wᵢ xᵢ xᵢᵀ over the `active` columns of `design`, and, when `right_hand_side` is given,
/// Σᵢ wᵢ xᵢ zᵢ. One pass over the rows in blocks; each block reads contiguous column slices.
pub(crate) fn weighted_cross_product(
    design: &DMatrix<f64>,
    active: &[usize],
    weights: &[f64],
    right_hand_side: Option<&[f64]>,
) -> (DMatrix<f64>, DVector<f64>) {
    let n_rows = design.nrows();
    let data = design.as_slice();
    if is_sparse(data, n_rows, active) {
        let design = DenseOnDemand::new(DesignInput::Dense(design));
        sparse_weighted_cross_product(&design, None, active, weights, right_hand_side)
    } else {
        dense_weighted_cross_product(design, active, weights, right_hand_side)
    }
}

/// The dense pass of [`weighted_cross_product`]: blocks of rows, contiguous column slices.
fn dense_weighted_cross_product(
    design: &DMatrix<f64>,
    active: &[usize],
    weights: &[f64],
    right_hand_side: Option<&[f64]>,
) -> (DMatrix<f64>, DVector<f64>) {
    let n_rows = design.nrows();
    let n_active = active.len();
    let data = design.as_slice();
    let mut cross = DMatrix::<f64>::zeros(n_active, n_active);
    let mut vector = DVector::<f64>::zeros(n_active);
    let mut block_start = 0;
    while block_start < n_rows {
        let block_end = (block_start + ROW_BLOCK).min(n_rows);
        let block_weights = &weights[block_start..block_end];
        let column_values =
            |column: usize| &data[column * n_rows + block_start..column * n_rows + block_end];
        for (a, &column_a) in active.iter().enumerate() {
            let column_a_values = column_values(column_a);
            // Eight entries of row a at once: their sums are independent chains, so the
            // processor overlaps them instead of waiting on one addition at a time. Each
            // entry is still summed over the rows in order, with the same (x_a · x_b) · w
            // products, so the result is bit for bit that of one entry at a time.
            let length = column_a_values.len();
            // Slicing every operand to one length lets the compiler drop bounds checks.
            let weights_here = &block_weights[..length];
            let mut b = a;
            while b + 8 <= n_active {
                let x: [&[f64]; 8] =
                    std::array::from_fn(|k| &column_values(active[b + k])[..length]);
                let mut sums = [0.0_f64; 8];
                for i in 0..length {
                    let x_a = column_a_values[i];
                    let w = weights_here[i];
                    for k in 0..8 {
                        sums[k] += x_a * x[k][i] * w;
                    }
                }
                for (k, sum) in sums.iter().enumerate() {
                    cross[(a, b + k)] += sum;
                }
                b += 8;
            }
            for (b, &column_b) in active.iter().enumerate().skip(b) {
                let column_b_values = column_values(column_b);
                let mut sum = 0.0;
                for ((&x_a, &x_b), &w) in column_a_values
                    .iter()
                    .zip(column_b_values)
                    .zip(block_weights)
                {
                    sum += x_a * x_b * w;
                }
                cross[(a, b)] += sum;
            }
            if let Some(rhs) = right_hand_side {
                let block_rhs = &rhs[block_start..block_end];
                let mut sum = 0.0;
                for ((&x_a, &z), &w) in column_a_values.iter().zip(block_rhs).zip(block_weights) {
                    sum += x_a * z * w;
                }
                vector[a] += sum;
            }
        }
        block_start = block_end;
    }
    for a in 0..n_active {
        for b in 0..a {
            cross[(a, b)] = cross[(b, a)];
        }
    }
    (cross, vector)
}

/// The non-zero entries of each row of one block of rows (at most [`ROW_BLOCK`]), each row's
/// list in the order of the columns it was gathered from. Workspace O(block × columns), reused
/// from block to block.
pub(crate) struct BlockNonZeros {
    width: usize,
    counts: Vec<usize>,
    positions: Vec<usize>,
    values: Vec<f64>,
}

impl BlockNonZeros {
    /// Workspace for rows of at most `width` columns.
    pub(crate) fn new(width: usize) -> BlockNonZeros {
        BlockNonZeros {
            width,
            counts: vec![0; ROW_BLOCK],
            positions: vec![0; ROW_BLOCK * width],
            values: vec![0.0; ROW_BLOCK * width],
        }
    }

    /// Gathers rows `block` of the column-major `data` (`n_rows` rows) over `columns`, column by
    /// column so that each column's slice is read contiguously; positions index `columns`.
    pub(crate) fn gather(
        &mut self,
        data: &[f64],
        n_rows: usize,
        columns: &[usize],
        block: std::ops::Range<usize>,
    ) {
        self.counts.iter_mut().for_each(|count| *count = 0);
        for (position, &column) in columns.iter().enumerate() {
            let slice = &data[column * n_rows + block.start..column * n_rows + block.end];
            for (offset, &x) in slice.iter().enumerate() {
                if x != 0.0 {
                    self.push(offset, position, x);
                }
            }
        }
    }

    /// Gathers rows `block` from stored sparse rows; `position_of` maps a design column to
    /// its position (`usize::MAX` for a column left out).
    pub(crate) fn gather_stored(
        &mut self,
        rows: &SparseRows,
        position_of: &[usize],
        block: std::ops::Range<usize>,
    ) {
        self.counts.iter_mut().for_each(|count| *count = 0);
        for (offset, row) in block.enumerate() {
            for entry in rows.row_starts[row]..rows.row_starts[row + 1] {
                let position = position_of[rows.columns[entry] as usize];
                if position != usize::MAX {
                    self.push(offset, position, rows.values[entry]);
                }
            }
        }
    }

    /// Orders each of the first `rows` rows' entries by position (a gather from stored rows
    /// lists them in design-column order, which differs when the columns do not ascend).
    pub(crate) fn sort_rows(&mut self, rows: usize) {
        for offset in 0..rows {
            let start = offset * self.width;
            let count = self.counts[offset];
            if count > 1 {
                let mut entries: Vec<(usize, f64)> = (start..start + count)
                    .map(|index| (self.positions[index], self.values[index]))
                    .collect();
                entries.sort_by_key(|entry| entry.0);
                for (k, (position, value)) in entries.into_iter().enumerate() {
                    self.positions[start + k] = position;
                    self.values[start + k] = value;
                }
            }
        }
    }

    fn push(&mut self, offset: usize, position: usize, value: f64) {
        let slot = offset * self.width + self.counts[offset];
        self.positions[slot] = position;
        self.values[slot] = value;
        self.counts[offset] += 1;
    }

    /// The positions and values of row `offset` of the block.
    pub(crate) fn row(&self, offset: usize) -> (&[usize], &[f64]) {
        let start = offset * self.width;
        let end = start + self.counts[offset];
        (&self.positions[start..end], &self.values[start..end])
    }
}

/// The non-zero entries of a design, row by row (compressed sparse rows), built once per
/// fit when the design is sparse, so that every cross-product of the fit reads the few
/// non-zeros of a row instead of scanning all p columns for them. A large design is built in
/// this form from the start and never held dense (see [`crate::design`]).
///
/// A zero entry (of either sign) is not stored.
#[derive(Debug, Clone, PartialEq)]
pub struct SparseRows {
    n_rows: usize,
    n_columns: usize,
    /// Per design column: whether its non-zeros are stored (the columns of the fit).
    held: Vec<bool>,
    row_starts: Vec<usize>,
    columns: Vec<u32>,
    values: Vec<f64>,
}

impl SparseRows {
    /// The rows of `design` over the `fitted` columns (ascending), or `None` when they are not sparse
    /// enough to be worth it.
    pub(crate) fn of(design: &DMatrix<f64>, fitted: &[usize]) -> Option<SparseRows> {
        let (n_rows, n_columns) = design.shape();
        let data = design.as_slice();
        if n_rows == 0
            || n_columns > u32::MAX as usize
            || fitted.windows(2).any(|pair| pair[0] >= pair[1])
            || fitted.last().is_some_and(|&last| last >= n_columns)
            || !is_sparse(data, n_rows, fitted)
        {
            return None;
        }
        let mut held = vec![false; n_columns];
        for &column in fitted {
            held[column] = true;
        }
        let mut row_starts = vec![0usize; n_rows + 1];
        for &column in fitted {
            let values = &data[column * n_rows..(column + 1) * n_rows];
            for (count, &x) in row_starts[1..].iter_mut().zip(values) {
                *count += usize::from(x != 0.0);
            }
        }
        for row in 0..n_rows {
            row_starts[row + 1] += row_starts[row];
        }
        let n_entries = row_starts[n_rows];
        let mut columns = vec![0u32; n_entries];
        let mut values = vec![0.0; n_entries];
        let mut next = row_starts[..n_rows].to_vec();
        for &column in fitted {
            let column_values = &data[column * n_rows..(column + 1) * n_rows];
            for (row, &x) in column_values.iter().enumerate() {
                if x != 0.0 {
                    columns[next[row]] = column as u32;
                    values[next[row]] = x;
                    next[row] += 1;
                }
            }
        }
        Some(SparseRows {
            n_rows,
            n_columns,
            held,
            row_starts,
            columns,
            values,
        })
    }
}

impl SparseRows {
    /// Every column of `design`, however dense, storing each entry that is not zero.
    pub fn from_dense(design: &DMatrix<f64>) -> Option<SparseRows> {
        let (n_rows, n_columns) = design.shape();
        if n_columns > u32::MAX as usize {
            return None;
        }
        let mut builder = SparseRowsBuilder::new(n_columns);
        let data = design.as_slice();
        for row in 0..n_rows {
            for column in 0..n_columns {
                let value = data[column * n_rows + row];
                if value != 0.0 {
                    builder.push(column, value);
                }
            }
            builder.end_row();
        }
        Some(builder.finish())
    }

    /// Rows from their parts: `row_starts` (n + 1 offsets, from 0, non-decreasing) into
    /// `columns` (ascending within each row, each below `n_columns`) and `values`.
    pub(crate) fn from_parts(
        n_columns: usize,
        row_starts: Vec<usize>,
        columns: Vec<u32>,
        values: Vec<f64>,
    ) -> SparseRows {
        debug_assert_eq!(row_starts.first(), Some(&0));
        debug_assert_eq!(row_starts.last(), Some(&columns.len()));
        debug_assert_eq!(columns.len(), values.len());
        SparseRows {
            n_rows: row_starts.len() - 1,
            n_columns,
            held: vec![true; n_columns],
            row_starts,
            columns,
            values,
        }
    }

    pub fn nrows(&self) -> usize {
        self.n_rows
    }

    pub fn ncols(&self) -> usize {
        self.n_columns
    }

    /// Number of stored entries.
    pub fn stored(&self) -> usize {
        self.values.len()
    }

    /// Whether every design column's entries are stored (a fit's own rows may hold fewer).
    pub fn holds_every_column(&self) -> bool {
        self.held.iter().all(|&held| held)
    }

    /// The dense n × p matrix these rows describe (for the rare routes that need one).
    pub fn to_dense(&self) -> DMatrix<f64> {
        let mut dense = DMatrix::<f64>::zeros(self.n_rows, self.n_columns);
        for row in 0..self.n_rows {
            let (columns, values) = self.entries(row);
            for (&column, &value) in columns.iter().zip(values) {
                dense[(row, column as usize)] = value;
            }
        }
        dense
    }

    /// Whether `column` is 1 in every row.
    pub fn column_is_ones(&self, column: usize) -> bool {
        (0..self.n_rows).all(|row| self.find(row, column as u32) == Some(1.0))
    }

    /// The largest absolute stored entry of `column` (0 when none is stored).
    pub fn column_largest_abs(&self, column: usize) -> f64 {
        let mut largest = 0.0_f64;
        for row in 0..self.n_rows {
            if let Some(value) = self.find(row, column as u32) {
                largest = largest.max(value.abs());
            }
        }
        largest
    }

    /// Rows `rows` of `column` into `values` (of the same length), zeros included.
    pub fn column_into(&self, column: usize, rows: std::ops::Range<usize>, values: &mut [f64]) {
        for (value, row) in values.iter_mut().zip(rows) {
            *value = self.find(row, column as u32).unwrap_or(0.0);
        }
    }

    /// The entry at (`row`, `column`); 0 when it is not stored.
    pub fn get(&self, row: usize, column: usize) -> f64 {
        self.find(row, column as u32).unwrap_or(0.0)
    }

    /// The stored entry at (`row`, `column`): a short row (a design of dummies has a few
    /// entries a row) is scanned, a long one searched.
    #[inline]
    fn find(&self, row: usize, column: u32) -> Option<f64> {
        let start = self.row_starts[row];
        let columns = &self.columns[start..self.row_starts[row + 1]];
        if columns.len() <= 16 {
            for (offset, &stored) in columns.iter().enumerate() {
                if stored >= column {
                    return (stored == column).then(|| self.values[start + offset]);
                }
            }
            None
        } else {
            columns
                .binary_search(&column)
                .ok()
                .map(|offset| self.values[start + offset])
        }
    }

    /// The stored entries of `row`: design columns (ascending) and values.
    pub fn entries(&self, row: usize) -> (&[u32], &[f64]) {
        let range = self.row_starts[row]..self.row_starts[row + 1];
        (&self.columns[range.clone()], &self.values[range])
    }

    /// Whether these are the rows of `design` and hold every one of the `active` columns.
    fn covers(&self, design: &DenseOnDemand, active: &[usize]) -> bool {
        self.n_rows == design.nrows()
            && self.n_columns == design.ncols()
            && active.iter().all(|&column| self.held[column])
    }
}

/// Builds [`SparseRows`] a row at a time, holding every column.
pub struct SparseRowsBuilder {
    n_columns: usize,
    row_starts: Vec<usize>,
    columns: Vec<u32>,
    values: Vec<f64>,
}

impl SparseRowsBuilder {
    pub fn new(n_columns: usize) -> SparseRowsBuilder {
        SparseRowsBuilder {
            n_columns,
            row_starts: vec![0],
            columns: Vec::new(),
            values: Vec::new(),
        }
    }

    /// Room for `rows` rows of `entries` stored entries in all.
    pub fn reserve(&mut self, rows: usize, entries: usize) {
        self.row_starts.reserve_exact(rows);
        self.columns.reserve_exact(entries);
        self.values.reserve_exact(entries);
    }

    /// Adds an entry to the current row; columns must come in ascending order.
    pub fn push(&mut self, column: usize, value: f64) {
        debug_assert!(column < self.n_columns);
        debug_assert!(
            self.columns.len() == *self.row_starts.last().unwrap_or(&0)
                || self
                    .columns
                    .last()
                    .is_some_and(|&last| (last as usize) < column)
        );
        self.columns.push(column as u32);
        self.values.push(value);
    }

    /// Ends the current row.
    pub fn end_row(&mut self) {
        self.row_starts.push(self.columns.len());
    }

    pub fn finish(self) -> SparseRows {
        SparseRows {
            n_rows: self.row_starts.len() - 1,
            n_columns: self.n_columns,
            held: vec![true; self.n_columns],
            row_starts: self.row_starts,
            columns: self.columns,
            values: self.values,
        }
    }
}

/// Per design column (of `n_columns`), its position in `active`; `usize::MAX` when absent.
fn positions_in(active: &[usize], n_columns: usize) -> Vec<usize> {
    let mut position_of = vec![usize::MAX; n_columns];
    for (a, &column) in active.iter().enumerate() {
        position_of[column] = a;
    }
    position_of
}

/// [`weighted_cross_product`], reading the non-zeros from `rows` when the fit built them.
pub(crate) fn weighted_cross_product_from(
    design: &DenseOnDemand,
    rows: Option<&SparseRows>,
    active: &[usize],
    weights: &[f64],
    right_hand_side: Option<&[f64]>,
) -> (DMatrix<f64>, DVector<f64>) {
    match rows {
        Some(rows) => {
            sparse_weighted_cross_product(design, Some(rows), active, weights, right_hand_side)
        }
        None => weighted_cross_product(design.dense(), active, weights, right_hand_side),
    }
}

/// Whether at most a third of the active entries of the first rows are non-zero (a design
/// of treatment, site and stratum dummies beside a few covariates), in which case the
/// row-wise pass of [`sparse_weighted_cross_product`] does far less work than the dense one.
/// Both passes give the same bits, so a sample of rows decides only the speed.
fn is_sparse(data: &[f64], n_rows: usize, active: &[usize]) -> bool {
    let sample = n_rows.min(4 * ROW_BLOCK);
    let non_zero: usize = active
        .iter()
        .map(|&column| {
            data[column * n_rows..column * n_rows + sample]
                .iter()
                .filter(|&&x| x != 0.0)
                .count()
        })
        .sum();
    3 * non_zero <= sample * active.len()
}

/// The same sums as the dense pass of [`weighted_cross_product`], bit for bit: rows are
/// taken in the same blocks and order, each block's partial sums start from zero and are
/// added to the totals in the same order, and each product is formed as (x_a · x_b) · w.
/// A pair with a zero entry would add ±0, which leaves a sum unchanged, so only the
/// non-zero entries of each row are visited: the cost per row is the square of its
/// non-zeros, not of p. Workspace is O(p²), independent of the number of rows.
fn sparse_weighted_cross_product(
    design: &DenseOnDemand,
    rows: Option<&SparseRows>,
    active: &[usize],
    weights: &[f64],
    right_hand_side: Option<&[f64]>,
) -> (DMatrix<f64>, DVector<f64>) {
    // The stored rows list columns in ascending order; they give the gathered order only
    // when the active columns are ascending too, and every non-zero only when they hold
    // every active column.
    let rows =
        rows.filter(|rows| rows.covers(design, active) && active.windows(2).all(|p| p[0] < p[1]));
    let position_of = positions_in(active, design.ncols());
    let n_rows = design.nrows();
    let n_active = active.len();
    let mut cross = DMatrix::<f64>::zeros(n_active, n_active);
    let mut vector = DVector::<f64>::zeros(n_active);
    // Block partial sums, row-major upper triangle (a ≤ b).
    let mut partial = vec![0.0_f64; n_active * n_active];
    let mut partial_vector = vec![0.0_f64; n_active];
    // A dense design's non-zeros are gathered a block of rows at a time, column by column; the
    // stored rows are read a row at a time into a buffer of one row (the same entries in the
    // same order either way).
    let mut non_zeros = rows.is_none().then(|| BlockNonZeros::new(n_active));
    let mut row_positions: Vec<usize> = Vec::with_capacity(n_active);
    let mut row_values: Vec<f64> = Vec::with_capacity(n_active);
    let mut block_start = 0;
    while block_start < n_rows {
        let block_end = (block_start + ROW_BLOCK).min(n_rows);
        if let Some(non_zeros) = non_zeros.as_mut() {
            non_zeros.gather(
                design.dense().as_slice(),
                n_rows,
                active,
                block_start..block_end,
            );
        }
        for row in block_start..block_end {
            let (positions, values): (&[usize], &[f64]) = match (rows, non_zeros.as_ref()) {
                (Some(rows), _) => {
                    row_positions.clear();
                    row_values.clear();
                    let (columns, entries) = rows.entries(row);
                    for (&column, &value) in columns.iter().zip(entries) {
                        let position = position_of[column as usize];
                        if position != usize::MAX {
                            row_positions.push(position);
                            row_values.push(value);
                        }
                    }
                    (&row_positions, &row_values)
                }
                (None, Some(non_zeros)) => non_zeros.row(row - block_start),
                (None, None) => (&[], &[]),
            };
            let w = weights[row];
            for (i, (&a, &x_a)) in positions.iter().zip(values).enumerate() {
                for (&b, &x_b) in positions[i..].iter().zip(&values[i..]) {
                    partial[a * n_active + b] += x_a * x_b * w;
                }
                if let Some(rhs) = right_hand_side {
                    partial_vector[a] += x_a * rhs[row] * w;
                }
            }
        }
        // Each block's sums are added to the totals, as in the dense pass.
        for a in 0..n_active {
            for b in a..n_active {
                cross[(a, b)] += partial[a * n_active + b];
                partial[a * n_active + b] = 0.0;
            }
            vector[a] += partial_vector[a];
            partial_vector[a] = 0.0;
        }
        block_start = block_end;
    }
    for a in 0..n_active {
        for b in 0..a {
            cross[(a, b)] = cross[(b, a)];
        }
    }
    (cross, vector)
}

/// X_activeᵀ v, one contiguous pass per active column; from the stored rows when the fit
/// built them, visiting only their non-zeros. Each column's sum still runs over the rows in
/// order, and a skipped zero entry would add ±0, so the two routes agree in value (a sum of no
/// non-zero terms may differ in the sign of its zero). A non-finite entry of `vector` takes the
/// dense route, where 0 · NaN keeps the NaN.
pub(crate) fn transpose_multiply(
    design: &DenseOnDemand,
    rows: Option<&SparseRows>,
    active: &[usize],
    vector: &[f64],
) -> DVector<f64> {
    let n_rows = design.nrows();
    if let Some(rows) = rows.filter(|rows| {
        rows.covers(design, active)
            && vector.len() == n_rows
            && vector.iter().all(|v| v.is_finite())
    }) {
        let position_of = positions_in(active, design.ncols());
        let mut totals = vec![-0.0_f64; active.len()];
        for (row, &v) in vector.iter().enumerate() {
            for entry in rows.row_starts[row]..rows.row_starts[row + 1] {
                let position = position_of[rows.columns[entry] as usize];
                if position != usize::MAX {
                    totals[position] += rows.values[entry] * v;
                }
            }
        }
        return DVector::from_vec(totals);
    }
    let data = design.dense().as_slice();
    DVector::from_iterator(
        active.len(),
        active.iter().map(|&column| {
            data[column * n_rows..(column + 1) * n_rows]
                .iter()
                .zip(vector)
                .map(|(x, v)| x * v)
                .sum::<f64>()
        }),
    )
}

/// η = X_active β + offset, written into `linear_predictor` (column by column, contiguous); from
/// the stored rows when the fit built them and the active columns ascend, each row's terms
/// added in the same column order with its zeros skipped (a zero term would add ±0, so the
/// values agree with the dense route). Non-finite coefficients take the dense route.
pub(crate) fn linear_predictor_into(
    design: &DenseOnDemand,
    rows: Option<&SparseRows>,
    active: &[usize],
    coefficients: &DVector<f64>,
    offset: &[f64],
    linear_predictor: &mut [f64],
) {
    let n_rows = design.nrows();
    if let Some(rows) = rows.filter(|rows| {
        rows.covers(design, active)
            && active.windows(2).all(|pair| pair[0] < pair[1])
            && coefficients.iter().all(|b| b.is_finite())
    }) {
        let mut beta_of = vec![0.0; design.ncols()];
        let mut used = vec![false; design.ncols()];
        for (a, &column) in active.iter().enumerate() {
            beta_of[column] = coefficients[a];
            used[column] = true;
        }
        for (row, (eta, &base)) in linear_predictor.iter_mut().zip(offset).enumerate() {
            let mut value = base;
            for entry in rows.row_starts[row]..rows.row_starts[row + 1] {
                let column = rows.columns[entry] as usize;
                if used[column] {
                    value += rows.values[entry] * beta_of[column];
                }
            }
            *eta = value;
        }
        return;
    }
    let data = design.dense().as_slice();
    linear_predictor.copy_from_slice(offset);
    for (a, &column) in active.iter().enumerate() {
        let beta = coefficients[a];
        let column_values = &data[column * n_rows..(column + 1) * n_rows];
        for (eta, &x) in linear_predictor.iter_mut().zip(column_values) {
            *eta += x * beta;
        }
    }
}

/// Columns that are (numerically) linear combinations of earlier columns, found by a Cholesky
/// factorisation of the Jacobi-scaled cross-product that processes columns in their given order
/// and skips any whose scaled residual pivot (1 − R² on the earlier accepted columns) is below
/// `tolerance`. Keeping the order means that, as in R's limited-pivoting QR, the later of two
/// collinear columns is the one reported. All-zero columns are aliased.
pub(crate) fn aliased_columns(cross: &DMatrix<f64>, tolerance: f64) -> Vec<usize> {
    let size = cross.nrows();
    let scale: Vec<f64> = (0..size)
        .map(|j| {
            let d = cross[(j, j)];
            if d > 0.0 && d.is_finite() {
                1.0 / d.sqrt()
            } else {
                0.0
            }
        })
        .collect();
    // Rows of the lower-triangular factor for accepted columns, indexed by accepted order.
    let mut factor = DMatrix::<f64>::zeros(size, size);
    let mut accepted: Vec<usize> = Vec::new();
    let mut aliased = Vec::new();
    for j in 0..size {
        if scale[j] == 0.0 {
            aliased.push(j);
            continue;
        }
        let k = accepted.len();
        let mut row = vec![0.0; k];
        for (m, &column_m) in accepted.iter().enumerate() {
            let mut value = cross[(j, column_m)] * scale[j] * scale[column_m];
            for l in 0..m {
                value -= row[l] * factor[(m, l)];
            }
            row[m] = value / factor[(m, m)];
        }
        let residual = 1.0 - row.iter().map(|v| v * v).sum::<f64>();
        if residual <= tolerance || !residual.is_finite() {
            aliased.push(j);
            continue;
        }
        for (l, value) in row.iter().enumerate() {
            factor[(k, l)] = *value;
        }
        factor[(k, k)] = residual.sqrt();
        accepted.push(j);
    }
    aliased
}

/// A Cholesky factor of D A D with D = diag(A)^{-1/2}; solving through the scaled matrix keeps
/// the factorisation accurate when columns have very different weights (as happens when fitted
/// probabilities approach 0 or 1).
pub(crate) struct ScaledCholesky {
    scale: DVector<f64>,
    factor: nalgebra::Cholesky<f64, nalgebra::Dyn>,
}

impl ScaledCholesky {
    /// Factorises a symmetric matrix; `None` when it is not numerically positive definite.
    pub(crate) fn new(matrix: &DMatrix<f64>) -> Option<ScaledCholesky> {
        let size = matrix.nrows();
        let mut scale = DVector::<f64>::zeros(size);
        for j in 0..size {
            let d = matrix[(j, j)];
            if !(d > 0.0 && d.is_finite()) {
                return None;
            }
            scale[j] = 1.0 / d.sqrt();
        }
        let mut scaled = matrix.clone();
        for a in 0..size {
            for b in 0..size {
                scaled[(a, b)] *= scale[a] * scale[b];
            }
        }
        let factor = nalgebra::Cholesky::new(scaled)?;
        // A pivot this small relative to 1 means the scaled matrix is singular to working
        // precision; treat it as a failure rather than return a meaningless solution.
        let diagonal = factor.l_dirty().diagonal();
        if diagonal.iter().any(|d| !d.is_finite() || *d <= 1e-12) {
            return None;
        }
        Some(ScaledCholesky { scale, factor })
    }

    /// Solves A x = b.
    pub(crate) fn solve(&self, right_hand_side: &DVector<f64>) -> DVector<f64> {
        let scaled_rhs = right_hand_side.component_mul(&self.scale);
        self.factor.solve(&scaled_rhs).component_mul(&self.scale)
    }

    /// A^{-1}.
    pub(crate) fn inverse(&self) -> DMatrix<f64> {
        let mut inverse = self.factor.inverse();
        let size = inverse.nrows();
        for a in 0..size {
            for b in 0..size {
                inverse[(a, b)] *= self.scale[a] * self.scale[b];
            }
        }
        inverse
    }

    /// log det A.
    pub(crate) fn log_determinant(&self) -> f64 {
        let scaled_log_det: f64 = self
            .factor
            .l_dirty()
            .diagonal()
            .iter()
            .map(|d| 2.0 * d.pln())
            .sum();
        scaled_log_det - 2.0 * self.scale.iter().map(|s| s.pln()).sum::<f64>()
    }

    /// Σ over entries of (L⁻¹ D v)², i.e. vᵀ A⁻¹ v, using `work` (length = size) as scratch.
    pub(crate) fn quadratic_form_inverse(&self, vector: &[f64], work: &mut [f64]) -> f64 {
        let lower = self.factor.l_dirty();
        let size = work.len();
        let mut total = 0.0;
        for a in 0..size {
            let mut value = vector[a] * self.scale[a];
            for b in 0..a {
                value -= lower[(a, b)] * work[b];
            }
            value /= lower[(a, a)];
            work[a] = value;
            total += value * value;
        }
        total
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    // Common practice (floating-point semantics): adding ±0 leaves a sum unchanged, so the
    // sparse pass must give exactly the dense pass's bits on a design of dummies.
    #[test]
    fn sparse_and_dense_cross_products_agree_bit_for_bit() {
        let n_rows = 1000;
        let n_columns = 12;
        let mut state = 0x2545_F491_4F6C_DD1D_u64;
        let mut next = || {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            (state >> 11) as f64 / (1u64 << 53) as f64
        };
        let mut design = DMatrix::<f64>::zeros(n_rows, n_columns);
        for row in 0..n_rows {
            design[(row, 0)] = 1.0;
            design[(row, 1)] = next() * 40.0 - 7.0;
            let site = (next() * 10.0) as usize;
            design[(row, 2 + site.min(9))] = 1.0;
        }
        let weights: Vec<f64> = (0..n_rows).map(|_| next() + 0.01).collect();
        let response: Vec<f64> = (0..n_rows).map(|_| next() * 3.0 - 1.0).collect();
        let active: Vec<usize> = vec![0, 1, 2, 3, 5, 6, 7, 8, 9, 10, 11];
        assert!(is_sparse(design.as_slice(), n_rows, &active));
        let dense = dense_weighted_cross_product(&design, &active, &weights, Some(&response));
        let matrix = design.clone();
        let design = DenseOnDemand::new(DesignInput::Dense(&matrix));
        let sparse =
            sparse_weighted_cross_product(&design, None, &active, &weights, Some(&response));
        let every: Vec<usize> = (0..design.ncols()).collect();
        let rows = SparseRows::of(&matrix, &every).expect("a design of dummies is sparse");
        let stored =
            weighted_cross_product_from(&design, Some(&rows), &active, &weights, Some(&response));
        // Rows stored for the active columns only (a fit on a column subset).
        let rows_of_active = SparseRows::of(&matrix, &active).expect("still sparse");
        let stored_active = weighted_cross_product_from(
            &design,
            Some(&rows_of_active),
            &active,
            &weights,
            Some(&response),
        );
        for other in [&stored, &stored_active] {
            for (a, b) in dense.0.iter().zip(other.0.iter()) {
                assert_eq!(a.to_bits(), b.to_bits());
            }
            for (a, b) in dense.1.iter().zip(other.1.iter()) {
                assert_eq!(a.to_bits(), b.to_bits());
            }
        }
        for (a, b) in dense.0.iter().zip(sparse.0.iter()) {
            assert_eq!(a.to_bits(), b.to_bits());
        }
        for (a, b) in dense.1.iter().zip(sparse.1.iter()) {
            assert_eq!(a.to_bits(), b.to_bits());
        }

        // Xᵀv and Xβ + offset from the stored rows: the same values as the dense passes (a
        // zero may differ in sign only), and the dense route when a NaN must propagate.
        let coefficients = DVector::from_iterator(active.len(), (0..active.len()).map(|_| next()));
        let offset: Vec<f64> = (0..n_rows).map(|_| next() - 0.5).collect();
        for rows in [&rows, &rows_of_active] {
            let from_rows = transpose_multiply(&design, Some(rows), &active, &response);
            let dense_product = transpose_multiply(&design, None, &active, &response);
            assert_eq!(from_rows, dense_product);
            let mut eta_rows = vec![0.0; n_rows];
            let mut eta_dense = vec![0.0; n_rows];
            linear_predictor_into(
                &design,
                Some(rows),
                &active,
                &coefficients,
                &offset,
                &mut eta_rows,
            );
            linear_predictor_into(
                &design,
                None,
                &active,
                &coefficients,
                &offset,
                &mut eta_dense,
            );
            assert_eq!(eta_rows, eta_dense);
        }
        let mut with_nan = response.clone();
        with_nan[3] = f64::NAN;
        let product = transpose_multiply(&design, Some(&rows), &active, &with_nan);
        assert!(product.iter().all(|v| v.is_nan()), "{product:?}");
    }
}
