//! Design: from a planned analysis and typed data to a model matrix.
//!
//! For one analysis this stage selects the subjects (the population's flag,
//! then complete cases on the endpoint, covariates and strata, counting who is
//! left out and why), applies the plan's rule for pooling small strata, and
//! builds the design matrix with named columns: an intercept, one indicator per
//! non-reference arm (in plan order), numeric covariates as slopes, and factor
//! covariates and strata as treatment-coded fixed effects whose first level
//! present is the reference. Every column records the term it belongs to, so
//! a later stage can name an aliased term instead of a column number.
//!
//! Pure: no I/O. It never fits a model and never changes the data it is given.

use crate::data::{Column, StudyData};
use crate::error::{Error, ErrorKind, Problem};
use crate::models::{DesignInput, SparseRows};
use crate::plan::{Analysis, Plan};
use nalgebra::DMatrix;
use std::borrow::Cow;

/// Designs of more entries than this (n × p; 32 MiB as doubles) are held as rows of non-zero
/// entries and never formed dense: at 10⁶ subjects and 50 sites a dense design is 400 MiB,
/// its rows (an intercept, an arm, a site and a baseline value each) under 50 MiB. Smaller
/// designs stay dense, where every engine has its fastest and longest-validated route.
pub const DENSE_ENTRIES_AT_MOST: usize = 1 << 22;

/// How a design is held (see [`DENSE_ENTRIES_AT_MOST`]).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Layout {
    /// Dense up to [`DENSE_ENTRIES_AT_MOST`] entries, rows beyond.
    BySize,
    Dense,
    Rows,
}

/// The n × p design matrix, dense (column-major) or as rows of non-zero entries.
#[derive(Debug, Clone)]
pub enum DesignMatrix {
    Dense(DMatrix<f64>),
    Rows(SparseRows),
}

impl DesignMatrix {
    pub fn nrows(&self) -> usize {
        match self {
            DesignMatrix::Dense(matrix) => matrix.nrows(),
            DesignMatrix::Rows(rows) => rows.nrows(),
        }
    }

    pub fn ncols(&self) -> usize {
        match self {
            DesignMatrix::Dense(matrix) => matrix.ncols(),
            DesignMatrix::Rows(rows) => rows.ncols(),
        }
    }

    /// The design as an engine takes it.
    pub fn input(&self) -> DesignInput<'_> {
        match self {
            DesignMatrix::Dense(matrix) => DesignInput::Dense(matrix),
            DesignMatrix::Rows(rows) => DesignInput::Rows(rows),
        }
    }

    /// The dense matrix, formed from the rows when it is held as rows (for the supportive
    /// checks that need one; a large design then costs its dense size while they run).
    pub fn dense(&self) -> Cow<'_, DMatrix<f64>> {
        match self {
            DesignMatrix::Dense(matrix) => Cow::Borrowed(matrix),
            DesignMatrix::Rows(rows) => Cow::Owned(rows.to_dense()),
        }
    }

    /// The entry at (`row`, `column`).
    pub fn get(&self, row: usize, column: usize) -> f64 {
        match self {
            DesignMatrix::Dense(matrix) => matrix[(row, column)],
            DesignMatrix::Rows(rows) => rows.get(row, column),
        }
    }

    /// The sum of each column over the rows, in row order.
    pub fn column_sums(&self) -> Vec<f64> {
        match self {
            DesignMatrix::Dense(matrix) => (0..matrix.ncols())
                .map(|column| matrix.column(column).iter().sum::<f64>())
                .collect(),
            DesignMatrix::Rows(rows) => {
                let mut sums = vec![0.0; rows.ncols()];
                for row in 0..rows.nrows() {
                    let (columns, values) = rows.entries(row);
                    for (&column, &value) in columns.iter().zip(values) {
                        sums[column as usize] += value;
                    }
                }
                sums
            }
        }
    }
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum TermKind {
    Intercept,
    Treatment,
    Covariate,
    Stratum,
}

/// A model term: one or more adjacent design columns.
#[derive(Debug, Clone, PartialEq)]
pub struct Term {
    pub name: String,
    pub kind: TermKind,
    pub first_column: usize,
    pub column_count: usize,
}

/// Subjects left out of an analysis because a value was missing, per arm.
#[derive(Debug, Clone, PartialEq)]
pub struct Exclusion {
    /// The variable whose missing value excluded them (the first one missing,
    /// in the order endpoint, covariates, strata).
    pub variable: String,
    pub per_arm: Vec<usize>,
}

/// What the pooling rule did to one stratification factor.
#[derive(Debug, Clone, PartialEq)]
pub struct PoolingOutcome {
    pub variable: String,
    /// The small levels merged, with their analysed subject counts, in level order.
    pub pooled_levels: Vec<(String, usize)>,
    pub into: String,
    pub pooled_size: usize,
    pub threshold: usize,
}

#[derive(Debug, Clone)]
pub struct Design {
    /// n × p.
    pub matrix: DesignMatrix,
    /// The endpoint per analysed subject: the value (continuous, count), 1 or 0
    /// (binary: event or not), or the category index (ordinal, nominal).
    pub response: Vec<f64>,
    /// log(exposure) per analysed subject when the model has an exposure.
    pub offset: Option<Vec<f64>>,
    /// The endpoint's levels for ordinal and nominal endpoints (category indices point here).
    pub response_levels: Vec<String>,
    pub column_names: Vec<String>,
    /// Index into `terms` for every column.
    pub column_terms: Vec<usize>,
    pub terms: Vec<Term>,
    /// Per arm: its indicator column, `None` for the reference arm.
    pub treatment_columns: Vec<Option<usize>>,
    /// Arm index per analysed subject.
    pub arm_of_row: Vec<usize>,
    /// Per arm: subjects in the population, and analysed.
    pub in_population: Vec<usize>,
    pub analysed_per_arm: Vec<usize>,
    pub exclusions: Vec<Exclusion>,
    pub pooling: Vec<PoolingOutcome>,
}

impl Design {
    pub fn n_rows(&self) -> usize {
        self.matrix.nrows()
    }
}

/// Categorical values of one factor for the analysed rows after pooling.
struct FactorValues {
    levels: Vec<String>,
    codes: Vec<usize>,
}

/// Build the design of `analysis` from `data`, held as its size says ([`Layout::BySize`]).
pub fn build(plan: &Plan, analysis: &Analysis, data: &StudyData) -> Result<Design, Error> {
    build_with_layout(plan, analysis, data, Layout::BySize)
}

/// [`build`] with the layout chosen by the caller (tests compare the two layouts).
pub fn build_with_layout(
    plan: &Plan,
    analysis: &Analysis,
    data: &StudyData,
    layout: Layout,
) -> Result<Design, Error> {
    let arms = &plan.data.treatment.arms;
    let population = &plan.populations[analysis.population];
    let fail = |message: String| {
        Error::one(
            Problem::new(
                ErrorKind::DataValue,
                format!("analysis \"{}\": {message}", analysis.id),
            )
            .at(analysis.origin.clone()),
        )
    };

    let Column::Categorical {
        levels: flag_levels,
        codes: flag_codes,
    } = &data.columns[population.column]
    else {
        return Err(Error::internal("population flag column is not categorical"));
    };
    let in_population: Vec<usize> = (0..data.subject_ids.len())
        .filter(|&row| {
            flag_codes
                .get(row)
                .is_some_and(|code| population.values.contains(&flag_levels[code]))
        })
        .collect();
    let mut in_population_per_arm = vec![0; arms.len()];
    for &row in &in_population {
        in_population_per_arm[usize::from(data.arms[row])] += 1;
    }

    let exposure = match &analysis.model {
        crate::plan::ModelSpec::Generalized(spec) => spec.exposure,
        _ => None,
    };
    let mut needed: Vec<usize> = vec![analysis.endpoint.variable];
    needed.extend(exposure);
    needed.extend(&analysis.covariates);
    needed.extend(&analysis.strata);
    let mut exclusions: Vec<Exclusion> = Vec::new();
    let mut analysed = Vec::with_capacity(in_population.len());
    for &row in &in_population {
        match needed
            .iter()
            .find(|&&variable| data.columns[variable].is_missing(row))
        {
            None => analysed.push(row),
            Some(&variable) => {
                let name = &plan.variables[variable].name;
                let position = match exclusions
                    .iter()
                    .position(|exclusion| &exclusion.variable == name)
                {
                    Some(position) => position,
                    None => {
                        exclusions.push(Exclusion {
                            variable: name.clone(),
                            per_arm: vec![0; arms.len()],
                        });
                        exclusions.len() - 1
                    }
                };
                exclusions[position].per_arm[usize::from(data.arms[row])] += 1;
            }
        }
    }
    // Report exclusions in the fixed order of the variables, not discovery order.
    exclusions.sort_by_key(|exclusion| {
        needed
            .iter()
            .position(|&variable| plan.variables[variable].name == exclusion.variable)
    });

    let mut analysed_per_arm = vec![0; arms.len()];
    for &row in &analysed {
        analysed_per_arm[usize::from(data.arms[row])] += 1;
    }
    if analysed.is_empty() {
        return Err(fail(format!(
            "no subject in population \"{}\" has the endpoint and every covariate",
            population.id
        )));
    }
    for (arm, count) in analysed_per_arm.iter().enumerate() {
        if *count == 0 {
            return Err(fail(format!(
                "arm \"{}\" has no analysed subjects in population \"{}\"",
                arms[arm].code, population.id
            )));
        }
    }

    let mut pooling = Vec::new();
    let mut strata_values: Vec<(String, FactorValues)> = Vec::new();
    for &stratum in &analysis.strata {
        let values = factor_values(&data.columns[stratum], &analysed)?;
        let name = plan.variables[stratum].name.clone();
        let values = match &analysis.pool_small_strata {
            Some(rule) => {
                let (pooled, outcome) = pool(values, rule.below, &rule.into, &name);
                if let Some(outcome) = outcome {
                    pooling.push(outcome);
                }
                pooled
            }
            None => values,
        };
        strata_values.push((name, values));
    }

    let n = analysed.len();
    let mut column_names = vec!["(intercept)".to_string()];
    // At most one column per arm, per numeric covariate, and per level of each factor.
    let column_bound = 1
        + arms.len()
        + analysis
            .covariates
            .iter()
            .map(|&covariate| match &data.columns[covariate] {
                Column::Numeric(_) => 1,
                Column::Categorical { levels, .. } => levels.len(),
            })
            .sum::<usize>()
        + strata_values
            .iter()
            .map(|(_, values)| values.levels.len())
            .sum::<usize>();
    let as_rows = match layout {
        Layout::BySize => n.saturating_mul(column_bound) > DENSE_ENTRIES_AT_MOST,
        Layout::Dense => false,
        Layout::Rows => true,
    };
    let mut columns = if as_rows {
        ColumnStore::sparse(n, column_bound)
    } else {
        ColumnStore::with_capacity(n, column_bound)
    };
    columns.push(std::iter::repeat_n(1.0, n));
    let mut terms = vec![Term {
        name: "(intercept)".to_string(),
        kind: TermKind::Intercept,
        first_column: 0,
        column_count: 1,
    }];
    let mut column_terms = vec![0];

    let mut treatment_columns = vec![None; arms.len()];
    let treatment_term = terms.len();
    let first = columns.len();
    for (arm_index, arm) in arms.iter().enumerate() {
        if arm_index == plan.data.treatment.reference {
            continue;
        }
        treatment_columns[arm_index] = Some(columns.len());
        columns.push(
            analysed
                .iter()
                .map(|&row| f64::from(u8::from(usize::from(data.arms[row]) == arm_index))),
        );
        column_names.push(format!("treatment = {}", arm.label));
        column_terms.push(treatment_term);
    }
    terms.push(Term {
        name: "treatment".to_string(),
        kind: TermKind::Treatment,
        first_column: first,
        column_count: columns.len() - first,
    });

    for &covariate in &analysis.covariates {
        let name = plan.variables[covariate].name.clone();
        let term_index = terms.len();
        let first = columns.len();
        match &data.columns[covariate] {
            Column::Numeric(values) => {
                columns.push(analysed.iter().map(|&row| values.get(row).unwrap_or(0.0)));
                column_names.push(name.clone());
                column_terms.push(term_index);
            }
            Column::Categorical { .. } => {
                let values = factor_values(&data.columns[covariate], &analysed)?;
                push_indicators(
                    &name,
                    &values,
                    &mut columns,
                    &mut column_names,
                    &mut column_terms,
                    term_index,
                );
            }
        }
        terms.push(Term {
            name,
            kind: TermKind::Covariate,
            first_column: first,
            column_count: columns.len() - first,
        });
    }
    for (name, values) in &strata_values {
        let term_index = terms.len();
        let first = columns.len();
        push_indicators(
            name,
            values,
            &mut columns,
            &mut column_names,
            &mut column_terms,
            term_index,
        );
        terms.push(Term {
            name: name.clone(),
            kind: TermKind::Stratum,
            first_column: first,
            column_count: columns.len() - first,
        });
    }
    // A term with no columns (a factor with one level present) carries no information.
    let terms: Vec<Term> = terms;

    let (response, response_levels): (Vec<f64>, Vec<String>) =
        match &data.columns[analysis.endpoint.variable] {
            Column::Numeric(values) => (
                analysed
                    .iter()
                    .map(|&row| values.get(row).unwrap_or(0.0))
                    .collect(),
                Vec::new(),
            ),
            Column::Categorical { levels, codes } => match analysis.endpoint.event {
                Some(event) => (
                    analysed
                        .iter()
                        .map(|&row| f64::from(u8::from(codes.get(row) == Some(event))))
                        .collect(),
                    levels.clone(),
                ),
                None => (
                    analysed
                        .iter()
                        .map(|&row| codes.get(row).unwrap_or(0) as f64)
                        .collect(),
                    levels.clone(),
                ),
            },
        };
    let offset = match exposure {
        None => None,
        Some(variable) => {
            let Column::Numeric(values) = &data.columns[variable] else {
                return Err(Error::internal("exposure column is not numeric"));
            };
            let mut offset = Vec::with_capacity(analysed.len());
            for &row in &analysed {
                let value = values.get(row).unwrap_or(0.0);
                // Written this way so that NaN is refused too.
                #[allow(clippy::neg_cmp_op_on_partial_ord)]
                if !(value > 0.0) {
                    return Err(fail(format!(
                        "subject \"{}\" has exposure {} = {value}; an exposure must be positive",
                        data.subject_ids.get(row),
                        plan.variables[variable].name
                    )));
                }
                offset.push(libm::log(value));
            }
            Some(offset)
        }
    };
    check_covariates(analysis, &terms, &columns, &column_names, &fail)?;
    let matrix = columns.finish();
    let arm_of_row = analysed
        .iter()
        .map(|&row| usize::from(data.arms[row]))
        .collect();
    Ok(Design {
        matrix,
        response,
        offset,
        response_levels,
        column_names,
        column_terms,
        terms,
        treatment_columns,
        arm_of_row,
        in_population: in_population_per_arm,
        analysed_per_arm,
        exclusions,
        pooling,
    })
}

fn factor_values(column: &Column, rows: &[usize]) -> Result<FactorValues, Error> {
    let Column::Categorical { levels, codes } = column else {
        return Err(Error::internal("a factor term refers to a numeric column"));
    };
    // Keep only the levels present among the analysed subjects, in level order.
    let mut present = vec![false; levels.len()];
    for &row in rows {
        if let Some(code) = codes.get(row) {
            present[code] = true;
        }
    }
    let mut remap = vec![usize::MAX; levels.len()];
    let mut kept = Vec::new();
    for (index, level) in levels.iter().enumerate() {
        if present[index] {
            remap[index] = kept.len();
            kept.push(level.clone());
        }
    }
    let codes = rows
        .iter()
        .map(|&row| codes.get(row).map(|code| remap[code]).unwrap_or(0))
        .collect();
    Ok(FactorValues {
        levels: kept,
        codes,
    })
}

/// Merge every level with fewer than `below` subjects into one level `into`,
/// placed last. Returns the recoded values and what was done (None when no
/// level was small).
fn pool(
    values: FactorValues,
    below: usize,
    into: &str,
    variable: &str,
) -> (FactorValues, Option<PoolingOutcome>) {
    let mut counts = vec![0usize; values.levels.len()];
    for &code in &values.codes {
        counts[code] += 1;
    }
    let small: Vec<bool> = counts.iter().map(|&count| count < below).collect();
    if !small.iter().any(|&is_small| is_small) {
        return (values, None);
    }
    let mut remap = vec![0; values.levels.len()];
    let mut levels = Vec::new();
    for (index, level) in values.levels.iter().enumerate() {
        if !small[index] {
            remap[index] = levels.len();
            levels.push(level.clone());
        }
    }
    let pooled_code = levels.len();
    levels.push(into.to_string());
    for (index, is_small) in small.iter().enumerate() {
        if *is_small {
            remap[index] = pooled_code;
        }
    }
    let pooled_levels: Vec<(String, usize)> = values
        .levels
        .iter()
        .zip(&counts)
        .zip(&small)
        .filter(|(_, is_small)| **is_small)
        .map(|((level, count), _)| (level.clone(), *count))
        .collect();
    let pooled_size = pooled_levels.iter().map(|(_, count)| count).sum();
    let codes = values.codes.iter().map(|&code| remap[code]).collect();
    let outcome = PoolingOutcome {
        variable: variable.to_string(),
        pooled_levels,
        into: into.to_string(),
        pooled_size,
        threshold: below,
    };
    (FactorValues { levels, codes }, Some(outcome))
}

/// The design's columns written end to end into the column-major storage of the finished
/// matrix, so the design is held once while it is assembled (not as columns and again as the
/// matrix). The capacity is an upper bound on the columns; pages that are never written are
/// never touched.
/// The design's columns as they are built: column-major values, or each column's non-zero
/// entries (a zero of either sign is not stored) for a design to be held as rows.
enum ColumnStore {
    Dense {
        n_rows: usize,
        n_columns: usize,
        data: Vec<f64>,
    },
    Sparse {
        n_rows: usize,
        /// Per column: the rows and values of its stored entries, rows ascending.
        columns: Vec<(Vec<u32>, Vec<f64>)>,
    },
}

impl ColumnStore {
    fn with_capacity(n_rows: usize, columns: usize) -> ColumnStore {
        ColumnStore::Dense {
            n_rows,
            n_columns: 0,
            data: Vec::with_capacity(n_rows * columns),
        }
    }

    fn sparse(n_rows: usize, columns: usize) -> ColumnStore {
        ColumnStore::Sparse {
            n_rows,
            columns: Vec::with_capacity(columns),
        }
    }

    fn len(&self) -> usize {
        match self {
            ColumnStore::Dense { n_columns, .. } => *n_columns,
            ColumnStore::Sparse { columns, .. } => columns.len(),
        }
    }

    fn n_rows(&self) -> usize {
        match self {
            ColumnStore::Dense { n_rows, .. } | ColumnStore::Sparse { n_rows, .. } => *n_rows,
        }
    }

    /// Appends one column of exactly `n_rows` values.
    fn push(&mut self, values: impl Iterator<Item = f64>) {
        match self {
            ColumnStore::Dense {
                n_rows,
                n_columns,
                data,
            } => {
                let before = data.len();
                data.extend(values);
                debug_assert_eq!(data.len() - before, *n_rows);
                *n_columns += 1;
            }
            ColumnStore::Sparse { columns, .. } => {
                let mut rows = Vec::new();
                let mut stored = Vec::new();
                for (row, value) in values.enumerate() {
                    if value != 0.0 {
                        rows.push(row as u32);
                        stored.push(value);
                    }
                }
                rows.shrink_to_fit();
                stored.shrink_to_fit();
                columns.push((rows, stored));
            }
        }
    }

    /// Every value of `column`, zeros included.
    fn column_values(&self, column: usize) -> Cow<'_, [f64]> {
        match self {
            ColumnStore::Dense { n_rows, data, .. } => {
                Cow::Borrowed(&data[column * n_rows..(column + 1) * n_rows])
            }
            ColumnStore::Sparse { n_rows, columns } => {
                let mut values = vec![0.0; *n_rows];
                let (rows, stored) = &columns[column];
                for (&row, &value) in rows.iter().zip(stored) {
                    values[row as usize] = value;
                }
                Cow::Owned(values)
            }
        }
    }

    /// The rows where `column` is non-zero, ascending.
    fn non_zero_rows(&self, column: usize) -> Vec<usize> {
        match self {
            ColumnStore::Dense { n_rows, data, .. } => data[column * n_rows..(column + 1) * n_rows]
                .iter()
                .enumerate()
                .filter(|(_, value)| **value != 0.0)
                .map(|(row, _)| row)
                .collect(),
            ColumnStore::Sparse { columns, .. } => {
                let (rows, stored) = &columns[column];
                rows.iter()
                    .zip(stored)
                    .filter(|(_, value)| **value != 0.0)
                    .map(|(&row, _)| row as usize)
                    .collect()
            }
        }
    }

    /// The columns `selected` (ascending) as a design of their own, in this store's layout.
    fn select(&self, selected: &[usize]) -> DesignMatrix {
        match self {
            ColumnStore::Dense { n_rows, data, .. } => {
                let mut values = Vec::with_capacity(n_rows * selected.len());
                for &column in selected {
                    values.extend_from_slice(&data[column * n_rows..(column + 1) * n_rows]);
                }
                DesignMatrix::Dense(DMatrix::from_vec(*n_rows, selected.len(), values))
            }
            ColumnStore::Sparse { n_rows, columns } => {
                let chosen: Vec<&(Vec<u32>, Vec<f64>)> =
                    selected.iter().map(|&column| &columns[column]).collect();
                DesignMatrix::Rows(transpose(*n_rows, &chosen))
            }
        }
    }

    fn finish(self) -> DesignMatrix {
        match self {
            ColumnStore::Dense {
                n_rows,
                n_columns,
                data,
            } => DesignMatrix::Dense(DMatrix::from_vec(n_rows, n_columns, data)),
            ColumnStore::Sparse { n_rows, columns } => {
                let chosen: Vec<&(Vec<u32>, Vec<f64>)> = columns.iter().collect();
                DesignMatrix::Rows(transpose(n_rows, &chosen))
            }
        }
    }
}

/// Rows of stored entries from columns of them (a counting sort by row; each row's entries
/// come out in column order).
fn transpose(n_rows: usize, columns: &[&(Vec<u32>, Vec<f64>)]) -> SparseRows {
    let mut counts = vec![0u32; n_rows];
    let mut total = 0;
    for (rows, _) in columns {
        total += rows.len();
        for &row in rows {
            counts[row as usize] += 1;
        }
    }
    // Row starts, then the entries dropped into place column by column.
    let mut row_starts = Vec::with_capacity(n_rows + 1);
    let mut start = 0usize;
    row_starts.push(0);
    for &count in &counts {
        start += count as usize;
        row_starts.push(start);
    }
    drop(counts);
    let mut next: Vec<usize> = row_starts[..n_rows].to_vec();
    let mut slot_columns = vec![0u32; total];
    let mut slot_values = vec![0.0; total];
    for (column, (rows, values)) in columns.iter().enumerate() {
        for (&row, &value) in rows.iter().zip(values) {
            let slot = &mut next[row as usize];
            slot_columns[*slot] = column as u32;
            slot_values[*slot] = value;
            *slot += 1;
        }
    }
    SparseRows::from_parts(columns.len(), row_starts, slot_columns, slot_values)
}

fn push_indicators(
    name: &str,
    values: &FactorValues,
    columns: &mut ColumnStore,
    column_names: &mut Vec<String>,
    column_terms: &mut Vec<usize>,
    term_index: usize,
) {
    for (level_index, level) in values.levels.iter().enumerate().skip(1) {
        columns.push(
            values
                .codes
                .iter()
                .map(|&code| f64::from(u8::from(code == level_index))),
        );
        column_names.push(format!("{name} = {level}"));
        column_terms.push(term_index);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pooling_merges_small_levels_into_one_last_level() {
        let values = FactorValues {
            levels: vec!["A".into(), "B".into(), "C".into()],
            codes: vec![0, 0, 0, 1, 2, 2, 2],
        };
        let (pooled, outcome) = pool(values, 3, "pooled", "SITE");
        assert_eq!(pooled.levels, vec!["A", "C", "pooled"]);
        assert_eq!(pooled.codes, vec![0, 0, 0, 2, 1, 1, 1]);
        let outcome = outcome.expect("B is small");
        assert_eq!(outcome.pooled_levels, vec![("B".to_string(), 1)]);
        assert_eq!(outcome.pooled_size, 1);
    }
}

/// A covariate that carries no information of its own is a mistake in the
/// plan or the data, not something to fit around: one that is constant over
/// the analysed subjects, or one that the strata determine exactly (a
/// site-level characteristic entered beside site). Both are refused, naming
/// the covariate.
fn check_covariates(
    analysis: &Analysis,
    terms: &[Term],
    matrix: &ColumnStore,
    column_names: &[String],
    fail: &dyn Fn(String) -> Error,
) -> Result<(), Error> {
    use crate::models::linear::{LeastSquaresOptions, least_squares_residual_sum};
    let strata_columns: Vec<usize> = terms
        .iter()
        .filter(|term| term.kind == TermKind::Stratum)
        .flat_map(|term| term.first_column..term.first_column + term.column_count)
        .collect();
    let n_strata_terms = terms
        .iter()
        .filter(|term| term.kind == TermKind::Stratum && term.column_count > 0)
        .count();
    for term in terms.iter().filter(|term| term.kind == TermKind::Covariate) {
        if term.column_count == 0 {
            return Err(fail(format!(
                "covariate \"{}\" takes a single value in the analysed subjects, so it cannot be adjusted for",
                term.name
            )));
        }
        for column in term.first_column..term.first_column + term.column_count {
            let values = matrix.column_values(column);
            let first = values[0];
            if values.iter().all(|&value| value == first) {
                return Err(fail(format!(
                    "covariate \"{}\" is constant ({first}) in the analysed subjects, so it cannot be adjusted for",
                    column_names[column]
                )));
            }
            if strata_columns.is_empty() {
                continue;
            }
            // Regress the column on the intercept and the strata; a residual of
            // (numerically) zero means the strata determine it. With one stratum the
            // fit is the cell means, so the residual is the within-stratum sum of
            // squares, found in two passes over the rows instead of a QR of n × levels.
            let response: Vec<f64> = values.iter().copied().collect();
            let residual = if n_strata_terms == 1 {
                Ok(within_cell_sum_of_squares(
                    matrix,
                    &strata_columns,
                    &response,
                ))
            } else {
                let mut predictors = vec![0usize];
                predictors.extend(&strata_columns);
                match matrix.select(&predictors) {
                    DesignMatrix::Dense(design) => least_squares_residual_sum(
                        &design,
                        &response,
                        &LeastSquaresOptions::default(),
                    ),
                    DesignMatrix::Rows(rows) => crate::models::linear::fit_least_squares_rows(
                        &rows,
                        &response,
                        &LeastSquaresOptions::default(),
                    )
                    .map(|fit| fit.residual_sum_of_squares),
                }
            };
            if let Ok(residual_sum_of_squares) = residual {
                let mean = response.iter().sum::<f64>() / response.len() as f64;
                let total: f64 = response
                    .iter()
                    .map(|value| (value - mean) * (value - mean))
                    .sum();
                if total > 0.0 && residual_sum_of_squares <= 1e-20 * total {
                    let strata: Vec<&str> = terms
                        .iter()
                        .filter(|term| term.kind == TermKind::Stratum)
                        .map(|term| term.name.as_str())
                        .collect();
                    return Err(fail(format!(
                        "covariate column \"{}\" is determined exactly by the strata ({}): it is collinear with them and cannot be adjusted for beside them",
                        column_names[column],
                        strata.join(", ")
                    )));
                }
            }
        }
    }
    let _ = analysis;
    Ok(())
}

/// Σ (value − mean of its cell)² where the cell of a row is the dummy column of
/// `cell_columns` that is non-zero in it, or the reference level when none is:
/// the residual sum of squares of regressing `values` on one factor.
fn within_cell_sum_of_squares(matrix: &ColumnStore, cell_columns: &[usize], values: &[f64]) -> f64 {
    let n_rows = values.len();
    debug_assert_eq!(n_rows, matrix.n_rows());
    let mut cells = vec![0usize; n_rows];
    for (position, &column) in cell_columns.iter().enumerate() {
        for row in matrix.non_zero_rows(column) {
            cells[row] = position + 1;
        }
    }
    let n_cells = cell_columns.len() + 1;
    let mut sums = vec![0.0; n_cells];
    let mut counts = vec![0usize; n_cells];
    for (&cell, &value) in cells.iter().zip(values) {
        sums[cell] += value;
        counts[cell] += 1;
    }
    let means: Vec<f64> = sums
        .iter()
        .zip(&counts)
        .map(|(&sum, &count)| if count > 0 { sum / count as f64 } else { 0.0 })
        .collect();
    cells
        .iter()
        .zip(values)
        .map(|(&cell, &value)| (value - means[cell]) * (value - means[cell]))
        .sum()
}
