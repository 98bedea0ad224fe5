//! A CSV file as text cells with their line numbers; no typing here.

use super::decode_utf8;
use crate::error::{Error, ErrorKind, Location, Problem};

/// A CSV file: its header and rows of text cells, with the line on which each
/// row starts (1-based, counting the header as line 1 for a simple file).
///
/// The cells are kept in one string with the end offset of each cell, row by
/// row, rather than as a `String` apiece: a million-row file then costs its
/// own text plus four bytes a cell, not an allocation per cell.
#[derive(Debug, Clone)]
pub struct Table {
    pub file: String,
    pub headers: Vec<String>,
    pub lines: Vec<usize>,
    text: String,
    /// End offset in `text` of every cell, row-major; a cell starts where the
    /// previous one ends. Files are at most 2 GiB, so `u32` holds any offset.
    ends: Vec<u32>,
}

impl Table {
    /// A table with the given header and no rows yet.
    pub fn new(file: String, headers: Vec<String>) -> Table {
        Table {
            file,
            headers,
            lines: Vec::new(),
            text: String::new(),
            ends: Vec::new(),
        }
    }

    /// Appends a row of exactly one cell per header, which starts on `line`.
    pub fn push_row<'a>(&mut self, cells: impl IntoIterator<Item = &'a str>, line: usize) {
        let before = self.ends.len();
        for cell in cells {
            self.text.push_str(cell);
            self.ends.push(self.text.len() as u32);
        }
        debug_assert_eq!(self.ends.len() - before, self.headers.len());
        self.lines.push(line);
    }

    /// Number of data rows.
    pub fn n_rows(&self) -> usize {
        self.lines.len()
    }

    /// The text of one cell, untrimmed.
    pub fn cell(&self, row: usize, column: usize) -> &str {
        let index = row * self.headers.len() + column;
        let start = if index == 0 {
            0
        } else {
            self.ends[index - 1] as usize
        };
        &self.text[start..self.ends[index] as usize]
    }

    pub fn column_index(&self, name: &str) -> Option<usize> {
        self.headers.iter().position(|header| header == name)
    }

    /// The location of one cell, for error messages.
    pub fn cell_location(&self, row: usize, column: usize) -> Location {
        Location {
            file: self.file.clone(),
            line: self.lines.get(row).copied(),
            column: Some(column + 1),
            path: self
                .headers
                .get(column)
                .map(|header| format!("column {header}")),
        }
    }
}

/// Parse CSV bytes with a header row. Rejects: invalid UTF-8, an empty file, a
/// header without data rows, empty or duplicate column names, and rows with
/// the wrong number of fields.
pub fn read_table(bytes: &[u8], file: &str) -> Result<Table, Error> {
    let text = decode_utf8(bytes, file)?;
    let located = |line: Option<usize>, message: String| {
        Error::one(Problem::new(ErrorKind::DataFormat, message).at(Location {
            file: file.to_string(),
            line,
            column: None,
            path: None,
        }))
    };
    if text.trim().is_empty() {
        return Err(located(
            None,
            "the file is empty; expected a header row and one row per subject".to_string(),
        ));
    }
    // The csv reader counts lines correctly only for LF endings, so CRLF is
    // folded to LF first (the raw bytes, not this text, are what is hashed).
    let text = if text.contains('\r') {
        std::borrow::Cow::Owned(text.replace("\r\n", "\n"))
    } else {
        std::borrow::Cow::Borrowed(text)
    };
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(false)
        .from_reader(text.as_bytes());
    let headers: Vec<String> = match reader.headers() {
        Ok(record) => record
            .iter()
            .map(|header| header.trim().to_string())
            .collect(),
        Err(cause) => {
            return Err(located(
                Some(1),
                format!("cannot read the header row: {}", describe_csv(&cause)),
            ));
        }
    };
    if headers.len() > super::MAX_COLUMNS {
        return Err(Error::one(
            Problem::new(
                ErrorKind::Limit,
                format!(
                    "the header row has {} columns; cairn reads data files of at most {} columns",
                    headers.len(),
                    super::MAX_COLUMNS
                ),
            )
            .at(Location {
                file: file.to_string(),
                line: Some(1),
                column: None,
                path: None,
            }),
        ));
    }
    // Each name's first column, so that a repeated name is found without
    // comparing it with every earlier one.
    let mut first_column: std::collections::BTreeMap<&str, usize> =
        std::collections::BTreeMap::new();
    for (index, header) in headers.iter().enumerate() {
        if header.is_empty() {
            return Err(Error::one(
                Problem::new(
                    ErrorKind::DataFormat,
                    format!("column {} has no name in the header row", index + 1),
                )
                .at(Location {
                    file: file.to_string(),
                    line: Some(1),
                    column: Some(index + 1),
                    path: None,
                }),
            ));
        }
        if let Some(&first) = first_column.get(header.as_str()) {
            return Err(Error::one(
                Problem::new(
                    ErrorKind::DataFormat,
                    format!(
                        "column name \"{header}\" appears twice (columns {} and {})",
                        first + 1,
                        index + 1
                    ),
                )
                .at(Location {
                    file: file.to_string(),
                    line: Some(1),
                    column: Some(index + 1),
                    path: None,
                }),
            ));
        }
        first_column.insert(header.as_str(), index);
    }
    let mut table = Table::new(file.to_string(), headers);
    // Reserve once, from the file's size and line count, rather than let the buffers double
    // as rows arrive (each doubling briefly holds the old and the new buffer).
    let line_count = text.bytes().filter(|&byte| byte == b'\n').count() + 1;
    table.text.reserve_exact(text.len());
    table.ends.reserve_exact(line_count * table.headers.len());
    table.lines.reserve_exact(line_count);
    let mut record = csv::StringRecord::new();
    loop {
        match reader.read_record(&mut record) {
            Ok(false) => break,
            Ok(true) => {
                let line = record
                    .position()
                    .map(|position| position.line() as usize)
                    .unwrap_or(0);
                table.push_row(record.iter(), line);
            }
            Err(cause) => {
                let line = cause.position().map(|position| position.line() as usize);
                return Err(located(line, describe_csv(&cause)));
            }
        }
    }
    if table.n_rows() == 0 {
        return Err(located(
            Some(1),
            "the file has a header row but no data rows".to_string(),
        ));
    }
    Ok(table)
}

fn describe_csv(cause: &csv::Error) -> String {
    match cause.kind() {
        csv::ErrorKind::UnequalLengths {
            expected_len, len, ..
        } => {
            format!(
                "this row has {len} fields but the header has {expected_len}; check for a stray or missing delimiter"
            )
        }
        csv::ErrorKind::Utf8 { .. } => "a field is not valid UTF-8".to_string(),
        _ => cause.to_string().to_lowercase(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn crlf_and_bom_read_like_lf() {
        let lf = read_table(b"ID,X\n1,2\n3,4\n", "a.csv").expect("reads");
        let crlf = read_table(b"\xEF\xBB\xBFID,X\r\n1,2\r\n3,4\r\n", "a.csv").expect("reads");
        assert_eq!(lf.headers, crlf.headers);
        for row in 0..2 {
            for column in 0..2 {
                assert_eq!(lf.cell(row, column), crlf.cell(row, column));
            }
        }
        assert_eq!(lf.cell(1, 1), "4");
        assert_eq!(crlf.lines, vec![2, 3]);
    }

    #[test]
    fn ragged_rows_name_their_line() {
        let error = read_table(b"ID,X\n1,2\n3,4,5\n", "a.csv").unwrap_err();
        assert_eq!(error.kind(), ErrorKind::DataFormat);
        assert_eq!(
            error.problems[0].location.as_ref().and_then(|l| l.line),
            Some(3)
        );
    }

    #[test]
    fn too_many_columns_is_a_limit_error_on_the_header_line() {
        let header = |count: usize| {
            (0..count)
                .map(|index| format!("C{index}"))
                .collect::<Vec<_>>()
                .join(",")
        };
        let row = |count: usize| vec!["1"; count].join(",");
        let within = format!(
            "{}\n{}\n",
            header(super::super::MAX_COLUMNS),
            row(super::super::MAX_COLUMNS)
        );
        assert!(read_table(within.as_bytes(), "a.csv").is_ok());
        let beyond = format!(
            "{}\n{}\n",
            header(super::super::MAX_COLUMNS + 1),
            row(super::super::MAX_COLUMNS + 1)
        );
        let error = read_table(beyond.as_bytes(), "a.csv").unwrap_err();
        assert_eq!(error.kind(), ErrorKind::Limit);
        assert_eq!(
            error.problems[0].location.as_ref().and_then(|l| l.line),
            Some(1)
        );
    }

    #[test]
    fn header_only_and_duplicate_columns_are_errors() {
        assert!(
            read_table(b"ID,X\n", "a.csv").unwrap_err().problems[0]
                .message
                .contains("no data rows")
        );
        let duplicate = read_table(b"ID,X,X\n1,2,3\n", "a.csv").unwrap_err();
        assert_eq!(
            duplicate.problems[0]
                .location
                .as_ref()
                .and_then(|l| l.column),
            Some(3)
        );
    }
}
