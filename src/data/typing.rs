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
    Numeric(Vec<Option<f64>>),
    /// Codes index into `levels` (declared order, or sorted when taken from the data).
    Categorical {
        levels: Vec<String>,
        codes: Vec<Option<usize>>,
    },
}

impl Column {
    pub fn is_missing(&self, row: usize) -> bool {
        match self {
            Column::Numeric(values) => values[row].is_none(),
            Column::Categorical { codes, .. } => codes[row].is_none(),
        }
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
    pub subject_ids: Vec<String>,
    /// Arm index (into the plan's arms) per subject.
    pub arms: Vec<usize>,
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
pub fn assemble(plan: &Plan, subjects: &Table, allocation: &Table) -> Result<StudyData, Error> {
    let key = &plan.data.key;
    let treatment = &plan.data.treatment;
    let mut collector = Collector {
        problems: Vec::new(),
        suppressed: 0,
    };

    let subject_key = require_column(subjects, key, "the subject key (data.key)", &mut collector);
    let allocation_key = require_column(
        allocation,
        key,
        "the subject key (data.key)",
        &mut collector,
    );
    let arm_column = require_column(
        allocation,
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

    let (subject_rows, subject_index) = unique_keys(subjects, subject_key, &mut collector);
    let (allocation_rows, allocation_index) =
        unique_keys(allocation, allocation_key, &mut collector);
    collector.finish()?;
    let mut collector = Collector {
        problems: Vec::new(),
        suppressed: 0,
    };

    // Arms of every allocation row, checked against the plan's levels. The key
    // indexes are hash maps that are only looked up, never iterated, so their
    // order cannot reach any output.
    let mut arm_of_allocation_row: Vec<Option<usize>> = vec![None; allocation.n_rows()];
    for (row, slot) in arm_of_allocation_row.iter_mut().enumerate() {
        let code = allocation.cell(row, arm_column).trim();
        match treatment.arms.iter().position(|arm| arm.code == code) {
            Some(arm) => {
                *slot = Some(arm);
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
    let arm_of_subject: Vec<Option<usize>> = subject_rows
        .iter()
        .map(|(id, _)| {
            allocation_index
                .get(id)
                .and_then(|&row| arm_of_allocation_row[row])
        })
        .collect();
    let only_in_subjects: Vec<String> = subject_rows
        .iter()
        .zip(&arm_of_subject)
        .filter(|(_, arm)| arm.is_none())
        .map(|((id, _), _)| id.to_string())
        .collect();
    let only_in_allocation: Vec<String> = allocation_rows
        .iter()
        .filter(|(id, _)| !subject_index.contains_key(id))
        .map(|(id, _)| id.to_string())
        .collect();
    // A subject whose arm was rejected above would also count as unmatched;
    // saying so twice would bury the real problem.
    let arms_rejected = !collector.problems.is_empty();
    if plan.data.unmatched == UnmatchedRule::Error
        && !arms_rejected
        && (!only_in_subjects.is_empty() || !only_in_allocation.is_empty())
    {
        let sample = |ids: &[String]| ids.iter().take(5).cloned().collect::<Vec<_>>().join(", ");
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

    let (matched_rows, arms): (Vec<usize>, Vec<usize>) = subject_rows
        .iter()
        .zip(&arm_of_subject)
        .filter_map(|((_, row), arm)| arm.map(|arm| (*row, arm)))
        .unzip();
    let subject_ids: Vec<String> = matched_rows
        .iter()
        .map(|row| subjects.cell(*row, subject_key).trim().to_string())
        .collect();

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
        allocation_rows: allocation.n_rows(),
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

/// Keys in file order with their row; duplicates and empty keys are problems.
/// The non-empty keys of `column` in file order with their rows, and an index from key to
/// row; an empty or repeated key is a problem (the repeat is left out).
fn unique_keys<'a>(
    table: &'a Table,
    column: usize,
    collector: &mut Collector,
) -> (Vec<(&'a str, usize)>, HashMap<&'a str, usize>) {
    // Looked up, never iterated: its order cannot reach any output.
    let mut first_row: HashMap<&str, usize> = HashMap::with_capacity(table.n_rows());
    let mut keys = Vec::with_capacity(table.n_rows());
    for row in 0..table.n_rows() {
        let key = table.cell(row, column).trim();
        if key.is_empty() {
            collector.push(
                Problem::new(ErrorKind::DataValue, "the subject key is empty")
                    .at(table.cell_location(row, column)),
            );
            continue;
        }
        match first_row.entry(key) {
            std::collections::hash_map::Entry::Occupied(first) => {
                collector.push(
                    Problem::new(
                        ErrorKind::DataValue,
                        format!(
                            "subject key \"{key}\" appears twice (first on line {})",
                            table.lines[*first.get()]
                        ),
                    )
                    .at(table.cell_location(row, column)),
                );
                continue;
            }
            std::collections::hash_map::Entry::Vacant(slot) => {
                slot.insert(row);
            }
        }
        keys.push((key, row));
    }
    (keys, first_row)
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
            let values = rows
                .iter()
                .map(|&row| {
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
                })
                .collect();
            Column::Numeric(values)
        }
        VariableKind::Factor {
            levels: Some(levels),
        }
        | VariableKind::Ordinal { levels } => {
            let codes = rows
                .iter()
                .map(|&row| {
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
                })
                .collect();
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
                    codes: vec![None; rows.len()],
                };
            }
            let codes = rows
                .iter()
                .map(|&row| {
                    let text = cell(row);
                    if is_missing(text) {
                        None
                    } else {
                        distinct.get(text).copied()
                    }
                })
                .collect();
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
    use super::parse_number;

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
