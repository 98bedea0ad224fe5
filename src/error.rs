//! The one error type of cairn: a list of located problems.
//!
//! Every stage that can reject input (plan, data, provenance, output) reports a
//! [`Problem`]: what kind of failure it is, where it happened (file, line,
//! column, and the YAML path or CSV column), a lowercase message that quotes the
//! offending input and says what was expected, and an optional hint such as the
//! key that was probably meant. Stages that can find several problems at once
//! (plan validation, data typing) collect them all before failing, so a user
//! fixes a plan in one pass instead of one error per run.
//!
//! This module formats errors; it never decides exit codes beyond mapping
//! kinds to the documented codes (see [`Error::exit_code`]).

use std::fmt;

/// What class of failure a problem is. The class decides the exit code and
/// lets tests assert the kind without matching message text.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
pub enum ErrorKind {
    /// The plan is not well-formed YAML (tabs, bad indentation, duplicate keys).
    PlanSyntax,
    /// The plan's shape is wrong: unknown key, wrong type, missing key, bad value.
    PlanSchema,
    /// The plan refers to something that does not exist (an arm, a variable, a population).
    PlanReference,
    /// A file is not valid UTF-8.
    Encoding,
    /// A data file is malformed as CSV (ragged rows, no header, duplicate columns).
    DataFormat,
    /// A data value does not fit its declared kind or levels.
    DataValue,
    /// The subjects file and the allocation file do not join as the plan requires.
    DataJoin,
    /// A file could not be read or written.
    Io,
    /// The output folder exists and `--force` was not given.
    OutputExists,
    /// The lock record is malformed or its hash chain is broken.
    LockRecord,
    /// A limit stated in the README was exceeded.
    Limit,
    /// A bug in cairn: an invariant that should hold did not.
    Internal,
}

impl ErrorKind {
    /// A short stable name, used in messages and by tests.
    pub fn name(self) -> &'static str {
        match self {
            ErrorKind::PlanSyntax => "plan syntax",
            ErrorKind::PlanSchema => "plan schema",
            ErrorKind::PlanReference => "plan reference",
            ErrorKind::Encoding => "encoding",
            ErrorKind::DataFormat => "data format",
            ErrorKind::DataValue => "data value",
            ErrorKind::DataJoin => "data join",
            ErrorKind::Io => "file access",
            ErrorKind::OutputExists => "output exists",
            ErrorKind::LockRecord => "lock record",
            ErrorKind::Limit => "limit",
            ErrorKind::Internal => "internal",
        }
    }
}

/// Where a problem is. Every field is optional because not every problem has
/// every coordinate (a missing file has no line; a YAML syntax error has no path).
#[derive(Debug, Clone, Default, PartialEq, Eq)]
pub struct Location {
    /// The file as the user named it (relative to the plan's folder for data files).
    pub file: String,
    /// 1-based line number in the file.
    pub line: Option<usize>,
    /// 1-based column (character position in the line for YAML, field number for CSV).
    pub column: Option<usize>,
    /// The YAML path (`analyses[2].model.family`) or the CSV column name.
    pub path: Option<String>,
}

impl Location {
    /// A location that names only a file.
    pub fn file(file: impl Into<String>) -> Location {
        Location {
            file: file.into(),
            ..Location::default()
        }
    }
}

impl fmt::Display for Location {
    fn fmt(&self, formatter: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(formatter, "{}", self.file)?;
        if let Some(line) = self.line {
            write!(formatter, ":{line}")?;
            if let Some(column) = self.column {
                write!(formatter, ":{column}")?;
            }
        }
        Ok(())
    }
}

/// One located problem.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Problem {
    pub kind: ErrorKind,
    pub location: Option<Location>,
    /// Lowercase, concrete, quoting the bad input and saying what was expected.
    pub message: String,
    /// A suggestion, such as the key that was probably meant.
    pub hint: Option<String>,
}

impl Problem {
    pub fn new(kind: ErrorKind, message: impl Into<String>) -> Problem {
        Problem {
            kind,
            location: None,
            message: message.into(),
            hint: None,
        }
    }

    pub fn at(mut self, location: Location) -> Problem {
        self.location = Some(location);
        self
    }

    pub fn with_hint(mut self, hint: impl Into<String>) -> Problem {
        self.hint = Some(hint.into());
        self
    }
}

impl fmt::Display for Problem {
    fn fmt(&self, formatter: &mut fmt::Formatter<'_>) -> fmt::Result {
        if let Some(location) = &self.location {
            write!(formatter, "{location}: ")?;
            if let Some(path) = &location.path {
                write!(formatter, "{path}: ")?;
            }
        }
        write!(formatter, "{}: {}", self.kind.name(), self.message)?;
        if let Some(hint) = &self.hint {
            write!(formatter, " ({hint})")?;
        }
        Ok(())
    }
}

/// The error returned by every fallible public function: one or more problems,
/// in the order they were found (file order for plans and data).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Error {
    pub problems: Vec<Problem>,
}

impl Error {
    pub fn one(problem: Problem) -> Error {
        Error {
            problems: vec![problem],
        }
    }

    pub fn internal(message: impl Into<String>) -> Error {
        Error::one(Problem::new(ErrorKind::Internal, message))
    }

    pub fn io(file: &str, action: &str, cause: &std::io::Error) -> Error {
        Error::one(
            Problem::new(
                ErrorKind::Io,
                format!("cannot {action}: {}", describe_io(cause)),
            )
            .at(Location::file(file)),
        )
    }

    /// The first problem's kind; tests use it to assert the class of failure.
    pub fn kind(&self) -> ErrorKind {
        self.problems
            .first()
            .map(|problem| problem.kind)
            .unwrap_or(ErrorKind::Internal)
    }

    /// Documented exit codes: 1 for an internal error, 2 for bad input or usage.
    pub fn exit_code(&self) -> i32 {
        if self
            .problems
            .iter()
            .any(|problem| problem.kind == ErrorKind::Internal)
        {
            1
        } else {
            2
        }
    }
}

impl From<Problem> for Error {
    fn from(problem: Problem) -> Error {
        Error::one(problem)
    }
}

impl fmt::Display for Error {
    fn fmt(&self, formatter: &mut fmt::Formatter<'_>) -> fmt::Result {
        for (index, problem) in self.problems.iter().enumerate() {
            if index > 0 {
                writeln!(formatter)?;
            }
            write!(formatter, "error: {problem}")?;
        }
        Ok(())
    }
}

impl std::error::Error for Error {}

/// An I/O error in words, without the platform's error-number suffix so that
/// messages are the same on every system.
fn describe_io(cause: &std::io::Error) -> String {
    use std::io::ErrorKind as IoKind;
    match cause.kind() {
        IoKind::NotFound => "no such file or folder".to_string(),
        IoKind::PermissionDenied => "permission denied".to_string(),
        IoKind::AlreadyExists => "it already exists".to_string(),
        _ => cause.to_string().to_lowercase(),
    }
}

/// The candidate closest to `word` by edit distance, if it is close enough to be
/// a likely typo (at most a third of the word's length, and at least one edit).
pub fn did_you_mean<'a>(
    word: &str,
    candidates: impl IntoIterator<Item = &'a str>,
) -> Option<&'a str> {
    let limit = (word.chars().count() / 3).max(1);
    candidates
        .into_iter()
        .map(|candidate| (edit_distance(word, candidate), candidate))
        .filter(|(distance, _)| *distance <= limit)
        .min_by(|left, right| left.0.cmp(&right.0).then_with(|| left.1.cmp(right.1)))
        .map(|(_, candidate)| candidate)
}

/// Levenshtein distance over characters, case-insensitive (a key typed in the
/// wrong case is a typo too).
fn edit_distance(left: &str, right: &str) -> usize {
    let left: Vec<char> = left.to_lowercase().chars().collect();
    let right: Vec<char> = right.to_lowercase().chars().collect();
    let mut previous: Vec<usize> = (0..=right.len()).collect();
    let mut current = vec![0; right.len() + 1];
    for (i, left_char) in left.iter().enumerate() {
        current[0] = i + 1;
        for (j, right_char) in right.iter().enumerate() {
            let substitution = previous[j] + usize::from(left_char != right_char);
            current[j + 1] = substitution.min(previous[j + 1] + 1).min(current[j] + 1);
        }
        std::mem::swap(&mut previous, &mut current);
    }
    previous[right.len()]
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn suggestions_catch_typos_but_not_strangers() {
        let keys = ["covariates", "contrasts", "population", "strata"];
        assert_eq!(did_you_mean("covariate", keys), Some("covariates"));
        assert_eq!(did_you_mean("contrast", keys), Some("contrasts"));
        assert_eq!(did_you_mean("Strata", keys), Some("strata"));
        assert_eq!(did_you_mean("weight", keys), None);
    }

    #[test]
    fn exit_codes_follow_the_documented_table() {
        assert_eq!(
            Error::one(Problem::new(ErrorKind::PlanSchema, "x")).exit_code(),
            2
        );
        assert_eq!(Error::internal("x").exit_code(), 1);
    }
}
