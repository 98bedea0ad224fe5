//! Typing declared columns and joining the subjects file with the allocation file.

use super::Table;
use crate::error::{Error, ErrorKind, Location, Problem};
use crate::plan::{Plan, UnmatchedRule, VariableKind};
use std::collections::HashMap;

/// How many value problems are listed before the rest are summarised; a file
/// with a wrong delimiter would otherwise produce one message per cell.
const PROBLEM_LIMIT: usize = 25;

/// A typed column, aligned with `StudyData::subject_ids`.
#[derive(Debug, Clone, PartialEq)]
pub enum Column {
    Numeric(NumericValues),
    /// Codes index into `levels` (declared order, or sorted when taken from the data).
    Categorical {
        levels: Vec<String>,
        codes: Codes,
    },
}

impl Column {
    pub fn is_missing(&self, row: usize) -> bool {
        match self {
            Column::Numeric(values) => values.get(row).is_none(),
            Column::Categorical { codes, .. } => codes.get(row).is_none(),
        }
    }
}

/// The analysed subjects' keys in file order, held as one string with offsets (not a `String`
/// per subject).
#[derive(Debug, Clone, PartialEq)]
pub struct SubjectIds {
    text: String,
    /// End offset of each key in `text` (data files are at most 2 GiB, so `u32` holds any).
    ends: Vec<u32>,
}

impl SubjectIds {
    pub fn from_keys<'a>(keys: impl Iterator<Item = &'a str>) -> SubjectIds {
        let mut ids = SubjectIds {
            text: String::new(),
            ends: Vec::new(),
        };
        for key in keys {
            ids.text.push_str(key);
            ids.ends.push(ids.text.len() as u32);
        }
        // Held for the whole run: no spare capacity from the buffers' doubling.
        ids.text.shrink_to_fit();
        ids.ends.shrink_to_fit();
        ids
    }

    pub fn len(&self) -> usize {
        self.ends.len()
    }

    pub fn is_empty(&self) -> bool {
        self.ends.is_empty()
    }

    /// The key of subject `row`.
    pub fn get(&self, row: usize) -> &str {
        let start = if row == 0 {
            0
        } else {
            self.ends[row - 1] as usize
        };
        &self.text[start..self.ends[row] as usize]
    }
}

/// A numeric column, 8 bytes a value: a missing value is held as NaN, which no parsed value
/// can be (the parser refuses `nan`, `inf` and values beyond the range of a double).
#[derive(Debug, Clone, PartialEq)]
pub struct NumericValues(Vec<f64>);

impl NumericValues {
    pub fn from_options(values: impl IntoIterator<Item = Option<f64>>) -> NumericValues {
        NumericValues(
            values
                .into_iter()
                .map(|value| value.unwrap_or(f64::NAN))
                .collect(),
        )
    }

    pub fn get(&self, row: usize) -> Option<f64> {
        let value = self.0[row];
        (!value.is_nan()).then_some(value)
    }

    pub fn len(&self) -> usize {
        self.0.len()
    }

    pub fn is_empty(&self) -> bool {
        self.0.is_empty()
    }

    pub fn iter(&self) -> impl Iterator<Item = Option<f64>> + '_ {
        self.0
            .iter()
            .map(|&value| (!value.is_nan()).then_some(value))
    }
}

/// A categorical column's codes, 2 bytes a value: a missing value is held as `u16::MAX`,
/// which no code reaches (a factor has at most `MAX_LEVELS` levels, checked below).
#[derive(Debug, Clone, PartialEq)]
pub struct Codes(Vec<u16>);

const _: () = assert!(super::MAX_LEVELS < u16::MAX as usize);

impl Codes {
    const MISSING: u16 = u16::MAX;

    pub fn from_options(codes: impl IntoIterator<Item = Option<usize>>) -> Codes {
        Codes(
            codes
                .into_iter()
                .map(|code| {
                    code.and_then(|code| u16::try_from(code).ok())
                        .filter(|&code| code != Self::MISSING)
                        .unwrap_or(Self::MISSING)
                })
                .collect(),
        )
    }

    pub fn get(&self, row: usize) -> Option<usize> {
        let code = self.0[row];
        (code != Self::MISSING).then_some(code as usize)
    }

    pub fn len(&self) -> usize {
        self.0.len()
    }

    pub fn is_empty(&self) -> bool {
        self.0.is_empty()
    }

    pub fn iter(&self) -> impl Iterator<Item = Option<usize>> + '_ {
        self.0
            .iter()
            .map(|&code| (code != Self::MISSING).then_some(code as usize))
    }
}

/// Counts from the join of the two files, for the subject flow.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct JoinSummary {
    pub subjects_rows: usize,
    pub allocation_rows: usize,
    pub matched: usize,
    /// Keys in the subjects file with no allocation, in file order.
    pub only_in_subjects: Vec<String>,
    /// Keys in the allocation file with no subject row, in file order.
    pub only_in_allocation: Vec<String>,
}

/// The analysis data: one entry per matched subject, in subjects-file order.
#[derive(Debug, Clone, PartialEq)]
pub struct StudyData {
    pub subject_ids: SubjectIds,
    /// Arm index (into the plan's arms, of which there are at most `MAX_ARMS`) per subject.
    pub arms: Vec<u16>,
    /// One column per plan variable, in the plan's order.
    pub columns: Vec<Column>,
    pub join: JoinSummary,
    /// Values outside a variable's declared range, per variable: (variable,
    /// count, the first few locations as "file:line").
    pub out_of_range: Vec<(String, usize, Vec<String>)>,
}

struct Collector {
    problems: Vec<Problem>,
    suppressed: usize,
}

impl Collector {
    fn push(&mut self, problem: Problem) {
        if self.problems.len() < PROBLEM_LIMIT {
            self.problems.push(problem);
        } else {
            self.suppressed += 1;
        }
    }

    fn finish(mut self) -> Result<(), Error> {
        if self.problems.is_empty() {
            return Ok(());
        }
        if self.suppressed > 0 {
            let kind = self.problems[0].kind;
            self.problems.push(Problem::new(
                kind,
                format!(
                    "{} more problems of the same kind are not listed",
                    self.suppressed
                ),
            ));
        }
        Err(Error {
            problems: self.problems,
        })
    }
}

/// Type every declared variable from `subjects`, the arm from `allocation`, and
/// join the two on the plan's key.
pub fn assemble(plan: &Plan, subjects: &Table, allocation: Table) -> Result<StudyData, Error> {
    let key = &plan.data.key;
    let treatment = &plan.data.treatment;
    let mut collector = Collector {
        problems: Vec::new(),
        suppressed: 0,
    };

    let subject_key = require_column(subjects, key, "the subject key (data.key)", &mut collector);
    let allocation_key = require_column(
        &allocation,
        key,
        "the subject key (data.key)",
        &mut collector,
    );
    let arm_column = require_column(
        &allocation,
        &treatment.column,
        "the treatment column (data.treatment.column)",
        &mut collector,
    );
    let variable_columns: Vec<Option<usize>> = plan
        .variables
        .iter()
        .map(|variable| {
            require_column(
                subjects,
                &variable.name,
                "declared under variables",
                &mut collector,
            )
        })
        .collect();
    collector.finish()?;
    let mut collector = Collector {
        problems: Vec::new(),
        suppressed: 0,
    };
    let (Some(subject_key), Some(allocation_key), Some(arm_column)) =
        (subject_key, allocation_key, arm_column)
    else {
        return Err(Error::internal(
            "a required column went missing after it was checked",
        ));
    };

    // The join, in a block of its own so that its indexes are freed before the columns are
    // typed (at 10⁶ subjects they are tens of megabytes).
    // Problems of the join and of the values are reported together.
    let (matched_rows, arms, only_in_subjects, only_in_allocation, mut collector) = {
        let (subject_rows, subject_index) = unique_keys(subjects, subject_key, &mut collector);
        let (allocation_rows, allocation_index) =
            unique_keys(&allocation, allocation_key, &mut collector);
        collector.finish()?;
        let mut collector = Collector {
            problems: Vec::new(),
            suppressed: 0,
        };

        // Arms of every allocation row, checked against the plan's levels (`NO_ARM` when
        // not one of them). The key indexes are only looked up, never iterated, so their
        // order cannot reach any output.
        let mut arm_of_allocation_row: Vec<u32> = vec![NO_ARM; allocation.n_rows()];
        for (row, slot) in arm_of_allocation_row.iter_mut().enumerate() {
            let code = allocation.cell(row, arm_column).trim();
            match treatment.arms.iter().position(|arm| arm.code == code) {
                Some(arm) => {
                    *slot = arm as u32;
                }
                None => {
                    let levels: Vec<&str> =
                        treatment.arms.iter().map(|arm| arm.code.as_str()).collect();
                    collector.push(
                        Problem::new(
                            ErrorKind::DataValue,
                            format!(
                                "treatment \"{code}\" is not one of the planned arms ({})",
                                levels.join(", ")
                            ),
                        )
                        .at(allocation.cell_location(row, arm_column)),
                    );
                }
            }
        }

        // Per subject (in file order): the arm of its allocation row, if it has one with a
        // planned arm.
        let key_of = |table: &Table, column: usize, row: u32| -> String {
            table.cell(row as usize, column).trim().to_string()
        };
        let arm_of_subject: Vec<u32> = subject_rows
            .iter()
            .map(|&row| {
                let key = subjects.cell(row as usize, subject_key).trim();
                allocation_index
                    .get(&allocation, allocation_key, key)
                    .map_or(NO_ARM, |row| arm_of_allocation_row[row])
            })
            .collect();
        let only_in_subjects: Vec<String> = subject_rows
            .iter()
            .zip(&arm_of_subject)
            .filter(|(_, arm)| **arm == NO_ARM)
            .map(|(&row, _)| key_of(subjects, subject_key, row))
            .collect();
        let only_in_allocation: Vec<String> = allocation_rows
            .iter()
            .filter(|&&row| {
                let key = allocation.cell(row as usize, allocation_key).trim();
                subject_index.get(subjects, subject_key, key).is_none()
            })
            .map(|&row| key_of(&allocation, allocation_key, row))
            .collect();
        // A subject whose arm was rejected above would also count as unmatched;
        // saying so twice would bury the real problem.
        let arms_rejected = !collector.problems.is_empty();
        if plan.data.unmatched == UnmatchedRule::Error
            && !arms_rejected
            && (!only_in_subjects.is_empty() || !only_in_allocation.is_empty())
        {
            let sample =
                |ids: &[String]| ids.iter().take(5).cloned().collect::<Vec<_>>().join(", ");
            let mut parts = Vec::new();
            if !only_in_subjects.is_empty() {
                parts.push(format!(
                    "{} subject(s) in {} have no allocation (first: {})",
                    only_in_subjects.len(),
                    subjects.file,
                    sample(&only_in_subjects)
                ));
            }
            if !only_in_allocation.is_empty() {
                parts.push(format!(
                    "{} subject(s) in {} are missing from {} (first: {})",
                    only_in_allocation.len(),
                    allocation.file,
                    subjects.file,
                    sample(&only_in_allocation)
                ));
            }
            collector.push(
                Problem::new(ErrorKind::DataJoin, parts.join("; "))
                    .at(Location::file(subjects.file.clone()))
                    .with_hint(
                        "set data.unmatched-subjects: exclude to leave them out and report them",
                    ),
            );
        }
        let (matched_rows, arms): (Vec<usize>, Vec<u16>) = subject_rows
            .iter()
            .zip(&arm_of_subject)
            .filter(|(_, arm)| **arm != NO_ARM)
            .map(|(&row, &arm)| (row as usize, arm as u16))
            .unzip();
        (
            matched_rows,
            arms,
            only_in_subjects,
            only_in_allocation,
            collector,
        )
    };
    let allocation_rows = allocation.n_rows();
    drop(allocation);
    let subject_ids = SubjectIds::from_keys(
        matched_rows
            .iter()
            .map(|row| subjects.cell(*row, subject_key).trim()),
    );

    let mut columns = Vec::with_capacity(plan.variables.len());
    for (variable, column) in plan.variables.iter().zip(&variable_columns) {
        let Some(column) = *column else { continue };
        columns.push(type_column(
            &variable.kind,
            subjects,
            column,
            &matched_rows,
            &plan.data.missing_codes,
            &mut collector,
        ));
    }
    collector.finish()?;
    let mut out_of_range = Vec::new();
    for (variable, column) in plan.variables.iter().zip(&columns) {
        let (Some((low, high)), Column::Numeric(values)) = (variable.range, column) else {
            continue;
        };
        let outside: Vec<usize> = values
            .iter()
            .enumerate()
            .filter(|(_, value)| value.is_some_and(|value| value < low || value > high))
            .map(|(row, _)| row)
            .collect();
        if !outside.is_empty() {
            let places = outside
                .iter()
                .take(3)
                .map(|&row| format!("{}:{}", subjects.file, subjects.lines[matched_rows[row]]))
                .collect();
            out_of_range.push((variable.name.clone(), outside.len(), places));
        }
    }
    let join = JoinSummary {
        subjects_rows: subjects.n_rows(),
        allocation_rows,
        matched: subject_ids.len(),
        only_in_subjects,
        only_in_allocation,
    };
    Ok(StudyData {
        subject_ids,
        arms,
        columns,
        join,
        out_of_range,
    })
}

fn require_column(
    table: &Table,
    name: &str,
    role: &str,
    collector: &mut Collector,
) -> Option<usize> {
    let found = table.column_index(name);
    if found.is_none() {
        let hint = crate::error::did_you_mean(name, table.headers.iter().map(String::as_str))
            .map(|close| format!("did you mean \"{close}\"?"));
        let mut problem = Problem::new(
            ErrorKind::DataFormat,
            format!(
                "no column \"{name}\" ({role}); the header has: {}",
                table.headers.join(", ")
            ),
        )
        .at(Location {
            file: table.file.clone(),
            line: Some(1),
            column: None,
            path: None,
        });
        problem.hint = hint;
        collector.push(problem);
    }
    found
}

/// No planned arm (an allocation row whose arm was refused, or a subject without one).
const NO_ARM: u32 = u32::MAX;

/// An index from subject key to row of one key column of a table: open addressing over row
/// numbers (4 bytes a slot, at most half full), the keys read from the table itself, hashed
/// with the standard library's randomly keyed hasher. Looked up, never iterated, so neither the
/// hash nor the slot order can reach an output.
struct KeyIndex {
    hasher: std::collections::hash_map::RandomState,
    /// Row + 1 per slot; 0 for an empty slot.
    slots: Vec<u32>,
}

impl KeyIndex {
    fn with_capacity(keys: usize) -> KeyIndex {
        let size = (2 * keys.max(1)).next_power_of_two();
        KeyIndex {
            hasher: std::collections::hash_map::RandomState::new(),
            slots: vec![0; size],
        }
    }

    fn first_slot(&self, key: &str) -> usize {
        use std::hash::BuildHasher;
        (self.hasher.hash_one(key) as usize) & (self.slots.len() - 1)
    }

    /// The row of `key`, or `None`.
    fn get(&self, table: &Table, column: usize, key: &str) -> Option<usize> {
        let mask = self.slots.len() - 1;
        let mut slot = self.first_slot(key);
        loop {
            match self.slots[slot] {
                0 => return None,
                stored => {
                    let row = stored as usize - 1;
                    if table.cell(row, column).trim() == key {
                        return Some(row);
                    }
                }
            }
            slot = (slot + 1) & mask;
        }
    }

    /// Adds `key` at `row`, or returns the row that already holds it.
    fn insert(&mut self, table: &Table, column: usize, key: &str, row: usize) -> Result<(), usize> {
        let mask = self.slots.len() - 1;
        let mut slot = self.first_slot(key);
        loop {
            match self.slots[slot] {
                0 => {
                    self.slots[slot] = row as u32 + 1;
                    return Ok(());
                }
                stored => {
                    let first = stored as usize - 1;
                    if table.cell(first, column).trim() == key {
                        return Err(first);
                    }
                }
            }
            slot = (slot + 1) & mask;
        }
    }
}

/// The rows of the non-empty keys of `column` in file order, and an index from key to row; an
/// empty or repeated key is a problem (the repeat is left out).
fn unique_keys(table: &Table, column: usize, collector: &mut Collector) -> (Vec<u32>, KeyIndex) {
    let mut index = KeyIndex::with_capacity(table.n_rows());
    let mut rows = Vec::with_capacity(table.n_rows());
    for row in 0..table.n_rows() {
        let key = table.cell(row, column).trim();
        if key.is_empty() {
            collector.push(
                Problem::new(ErrorKind::DataValue, "the subject key is empty")
                    .at(table.cell_location(row, column)),
            );
            continue;
        }
        if let Err(first) = index.insert(table, column, key, row) {
            collector.push(
                Problem::new(
                    ErrorKind::DataValue,
                    format!(
                        "subject key \"{key}\" appears twice (first on line {})",
                        table.lines[first]
                    ),
                )
                .at(table.cell_location(row, column)),
            );
            continue;
        }
        rows.push(row as u32);
    }
    (rows, index)
}

fn type_column(
    kind: &VariableKind,
    table: &Table,
    column: usize,
    rows: &[usize],
    missing_codes: &[String],
    collector: &mut Collector,
) -> Column {
    let cell = |row: usize| table.cell(row, column).trim();
    let missing_codes: Vec<&str> = missing_codes.iter().map(|code| code.trim()).collect();
    let is_missing = |text: &str| missing_codes.contains(&text);
    match kind {
        VariableKind::Numeric | VariableKind::Count => {
            let values = NumericValues::from_options(rows.iter().map(|&row| {
                let text = cell(row);
                if is_missing(text) {
                    return None;
                }
                match parse_number(text, matches!(kind, VariableKind::Count)) {
                    Ok(value) => Some(value),
                    Err(expected) => {
                        collector.push(
                            Problem::new(
                                ErrorKind::DataValue,
                                format!("expected {expected}; found \"{text}\""),
                            )
                            .at(table.cell_location(row, column)),
                        );
                        None
                    }
                }
            }));
            Column::Numeric(values)
        }
        VariableKind::Factor {
            levels: Some(levels),
        }
        | VariableKind::Ordinal { levels } => {
            let codes = Codes::from_options(rows.iter().map(|&row| {
                let text = cell(row);
                if is_missing(text) {
                    return None;
                }
                let code = levels.iter().position(|level| level == text);
                if code.is_none() {
                    collector.push(
                        Problem::new(
                            ErrorKind::DataValue,
                            format!(
                                "\"{text}\" is not a declared level (levels: {})",
                                levels.join(", ")
                            ),
                        )
                        .at(table.cell_location(row, column)),
                    );
                }
                code
            }));
            Column::Categorical {
                levels: levels.clone(),
                codes,
            }
        }
        VariableKind::Factor { levels: None } => {
            // The distinct values, borrowed from the table; the levels are them in sorted
            // order, so the set's (hash) order never shows.
            let mut distinct: HashMap<&str, usize> = HashMap::new();
            for &row in rows {
                let text = cell(row);
                if !is_missing(text) && !distinct.contains_key(text) {
                    distinct.insert(text, 0);
                }
            }
            let mut sorted: Vec<&str> = distinct.keys().copied().collect();
            sorted.sort_unstable();
            for (code, text) in sorted.iter().enumerate() {
                distinct.insert(text, code);
            }
            let levels: Vec<String> = sorted.iter().map(|text| text.to_string()).collect();
            if levels.len() > super::MAX_LEVELS {
                // Every level becomes a design column downstream; refuse rather than build them.
                collector.push(
                    Problem::new(
                        ErrorKind::Limit,
                        format!("the column holds {} different values; a factor may have at most {} levels", levels.len(), super::MAX_LEVELS),
                    )
                    .at(Location { file: table.file.clone(), line: Some(1), column: Some(column + 1), path: table.headers.get(column).map(|header| format!("column {header}")) }),
                );
                return Column::Categorical {
                    levels: Vec::new(),
                    codes: Codes::from_options(vec![None; rows.len()]),
                };
            }
            let codes = Codes::from_options(rows.iter().map(|&row| {
                let text = cell(row);
                if is_missing(text) {
                    None
                } else {
                    distinct.get(text).copied()
                }
            }));
            Column::Categorical { levels, codes }
        }
    }
}

/// Parse an ordinary decimal number. Rejects decimal commas, thousands
/// separators, hexadecimal, `inf`/`nan` and values outside the range of a
/// double. On failure returns what was expected, for the message.
pub fn parse_number(text: &str, whole: bool) -> Result<f64, &'static str> {
    let expected = if whole {
        "a whole number of 0 or more"
    } else {
        "a number such as 12 or -3.5 (a full stop as decimal mark)"
    };
    let body = text.strip_prefix(['-', '+']).unwrap_or(text);
    let ordinary = !body.is_empty()
        && body
            .chars()
            .next()
            .is_some_and(|first| first.is_ascii_digit() || first == '.')
        && body.chars().all(|character| {
            character.is_ascii_digit() || matches!(character, '.' | 'e' | 'E' | '-' | '+')
        });
    if !ordinary {
        return Err(expected);
    }
    let value: f64 = text.parse().map_err(|_| expected)?;
    if !value.is_finite() {
        return Err("a number within the range of a double (about ±1.8e308)");
    }
    if whole && (value < 0.0 || value.fract() != 0.0) {
        return Err(expected);
    }
    Ok(value)
}

#[cfg(test)]
mod tests {
    use super::{Codes, NumericValues, SubjectIds, parse_number};

    // Common practice for a compact encoding: what goes in comes out, a missing value included.
    #[test]
    fn compact_columns_give_back_what_they_were_given() {
        let values = [Some(1.5), None, Some(-0.0), Some(f64::MAX), None];
        let numeric = NumericValues::from_options(values);
        assert_eq!(numeric.len(), 5);
        for (row, value) in values.iter().enumerate() {
            assert_eq!(numeric.get(row).map(f64::to_bits), value.map(f64::to_bits));
        }
        assert_eq!(numeric.iter().collect::<Vec<_>>(), values.to_vec());
        let codes = [Some(0), None, Some(7), Some(4095)];
        let coded = Codes::from_options(codes);
        assert_eq!(coded.iter().collect::<Vec<_>>(), codes.to_vec());
        assert_eq!(coded.get(2), Some(7));
        let ids = SubjectIds::from_keys(["DERM-001", "", "DERM-1002"].into_iter());
        assert_eq!(
            (ids.len(), ids.get(0), ids.get(1), ids.get(2)),
            (3, "DERM-001", "", "DERM-1002")
        );
    }

    #[test]
    fn numbers_are_strict() {
        assert_eq!(parse_number("12", false), Ok(12.0));
        assert_eq!(parse_number("-3.5", false), Ok(-3.5));
        assert_eq!(parse_number("1e-3", false), Ok(0.001));
        for bad in [
            "1,5", "1 000", "0x10", "inf", "NaN", "1e999", "", "--1", "5kg",
        ] {
            assert!(
                parse_number(bad, false).is_err(),
                "{bad} should be rejected"
            );
        }
        assert!(parse_number("2.5", true).is_err());
        assert!(parse_number("-1", true).is_err());
        assert_eq!(parse_number("3", true), Ok(3.0));
    }
}
