//! Data: the subjects file and the allocation file, read, typed and joined.
//!
//! Files are read as raw bytes (the bytes that are hashed), checked to be
//! UTF-8 (a byte-order mark is allowed and skipped; LF and CRLF both work),
//! parsed as CSV with a header row, and every column the plan declares is
//! typed by its declared kind: numbers must be ordinary decimal numbers,
//! factor values must be among the declared levels, and the plan's
//! missing-value codes become missing. Every problem names the file, the line
//! and the column. The blinded subjects file and the randomisation list are
//! joined on the subject key; who is in one file and not the other is counted
//! and, as the plan says, either stops the run or is left out and reported.
//!
//! This module reads and types data; it never fits anything and never
//! decides which subjects an analysis uses (that is `design`'s job).

mod csv_table;
mod dummy;
mod typing;

pub use csv_table::{Table, read_table};
pub use dummy::{dummy_allocation, dummy_allocation_name};
pub use typing::{Codes, Column, JoinSummary, NumericValues, StudyData, SubjectIds, assemble};

use crate::error::{Error, ErrorKind, Location, Problem};

/// The largest data file cairn reads, in bytes (stated in the README).
pub const MAX_FILE_BYTES: u64 = 2 * 1024 * 1024 * 1024;

/// The most columns in one data file (stated in the README). Generous, because a
/// subjects file exported from a study database often carries many columns the
/// plan does not use; the bound keeps the header checks (each name against the
/// ones before it) quick.
pub const MAX_COLUMNS: usize = 10_000;

/// The most levels a factor without declared levels may show in the data; the
/// same bound as for levels declared in the plan ([`crate::plan::limits::MAX_LEVELS`]).
pub const MAX_LEVELS: usize = crate::plan::limits::MAX_LEVELS;

/// Check that `bytes` are UTF-8 and return the text without a leading BOM.
/// An invalid byte is reported with its line and column (in characters).
pub fn decode_utf8<'a>(bytes: &'a [u8], file: &str) -> Result<&'a str, Error> {
    let body = bytes.strip_prefix(b"\xEF\xBB\xBF").unwrap_or(bytes);
    match std::str::from_utf8(body) {
        Ok(text) => Ok(text),
        Err(utf8_error) => {
            let valid = &body[..utf8_error.valid_up_to()];
            // The prefix up to the error is valid UTF-8 by construction.
            let prefix = std::str::from_utf8(valid).unwrap_or_default();
            let line = prefix.matches('\n').count() + 1;
            let column = prefix
                .rsplit('\n')
                .next()
                .map(|tail| tail.chars().count())
                .unwrap_or(0)
                + 1;
            let offending = body[utf8_error.valid_up_to()];
            Err(Error::one(
                Problem::new(
                    ErrorKind::Encoding,
                    format!("byte 0x{offending:02X} is not valid UTF-8; save the file as UTF-8 (it may be Latin-1 or Windows-1252)"),
                )
                .at(Location { file: file.to_string(), line: Some(line), column: Some(column), path: None }),
            ))
        }
    }
}

/// Read a data file named in the plan, refusing files over the size limit
/// before reading them.
pub fn read_file(path: &std::path::Path, shown_as: &str) -> Result<Vec<u8>, Error> {
    let metadata = std::fs::metadata(path)
        .map_err(|cause| Error::io(shown_as, "read the data file", &cause))?;
    if !metadata.is_file() {
        return Err(Error::one(
            Problem::new(ErrorKind::Io, "expected a regular file").at(Location::file(shown_as)),
        ));
    }
    if metadata.len() > MAX_FILE_BYTES {
        return Err(Error::one(
            Problem::new(
                ErrorKind::Limit,
                format!(
                    "the file has {} bytes; cairn reads data files of at most {} bytes",
                    metadata.len(),
                    MAX_FILE_BYTES
                ),
            )
            .at(Location::file(shown_as)),
        ));
    }
    std::fs::read(path).map_err(|cause| Error::io(shown_as, "read the data file", &cause))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn bom_is_skipped_and_invalid_bytes_are_located() {
        assert_eq!(
            decode_utf8(b"\xEF\xBB\xBFa,b\n", "f.csv").expect("valid"),
            "a,b\n"
        );
        let error = decode_utf8(b"a,b\n1,caf\xE9\n", "f.csv").unwrap_err();
        let location = error.problems[0].location.clone().expect("located");
        assert_eq!((location.line, location.column), (Some(2), Some(6)));
        assert!(error.problems[0].message.contains("0xE9"));
    }
}
