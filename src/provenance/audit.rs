//! The audit log: one line per `lock`, `dry-run`, `run` and `verify`, kept in
//! the study folder as `<plan>.audit.log`.
//!
//! Each line is a JSON object with the time (UTC), the command, the plan's
//! hash, the input hashes, the hash of the outputs' manifest (when there are
//! outputs) and the SHA-256 of the previous line's bytes, so that an edited or
//! removed line breaks the chain at the line after it. `cairn history` checks
//! the chain. The log holds wall-clock times and is never an input of a run.

use super::sha256_hex;
use crate::error::{Error, ErrorKind, Location, Problem};
use serde::{Deserialize, Serialize};
use std::io::Write;
use std::path::{Path, PathBuf};

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct AuditEntry {
    pub time: String,
    pub command: String,
    pub plan_sha256: String,
    /// (file, SHA-256) of every input the command read.
    pub inputs: Vec<(String, String)>,
    pub manifest_sha256: Option<String>,
    /// What the command concluded, in a word or two ("locked", "ok", "match", …).
    pub outcome: String,
    /// SHA-256 of the previous line's bytes (without its newline); `None` on the first line.
    pub previous_line_sha256: Option<String>,
}

/// `plan.yaml` → `plan.audit.log`.
pub fn log_path(plan_path: &Path) -> PathBuf {
    let stem = plan_path
        .file_stem()
        .map(|stem| stem.to_string_lossy().into_owned())
        .unwrap_or_else(|| "plan".to_string());
    plan_path.with_file_name(format!("{stem}.audit.log"))
}

/// Read and check the whole log; an empty list when there is none.
pub fn read(plan_path: &Path) -> Result<Vec<AuditEntry>, Error> {
    let path = log_path(plan_path);
    let file_name = path
        .file_name()
        .map(|name| name.to_string_lossy().into_owned())
        .unwrap_or_default();
    let bytes = match std::fs::read(&path) {
        Ok(bytes) => bytes,
        Err(cause) if cause.kind() == std::io::ErrorKind::NotFound => return Ok(Vec::new()),
        Err(cause) => return Err(Error::io(&file_name, "read the audit log", &cause)),
    };
    let text = crate::data::decode_utf8(&bytes, &file_name)?;
    let mut entries = Vec::new();
    let mut previous: Option<&str> = None;
    for (index, line) in text.lines().enumerate() {
        let located = |message: String| {
            Error::one(Problem::new(ErrorKind::LockRecord, message).at(Location {
                file: file_name.clone(),
                line: Some(index + 1),
                column: None,
                path: None,
            }))
        };
        let entry: AuditEntry = serde_json::from_str(line).map_err(|cause| {
            located(format!(
                "this audit line is malformed ({cause}); it was edited by hand"
            ))
        })?;
        let expected = previous.map(|line| sha256_hex(line.as_bytes()));
        if entry.previous_line_sha256 != expected {
            return Err(located(if index == 0 {
                "the first line points to a previous line: lines were removed from the start of the log".to_string()
            } else {
                format!(
                    "the chain breaks here: this line does not carry the hash of line {index}, which was edited or removed"
                )
            }));
        }
        entries.push(entry);
        previous = Some(line);
    }
    Ok(entries)
}

/// Append one entry, linking it to the last line of the log.
pub fn append(plan_path: &Path, mut entry: AuditEntry) -> Result<(), Error> {
    let path = log_path(plan_path);
    let shown = path.display().to_string();
    let existing = std::fs::read(&path).unwrap_or_default();
    let text = String::from_utf8_lossy(&existing);
    entry.previous_line_sha256 = text.lines().last().map(|line| sha256_hex(line.as_bytes()));
    let line = serde_json::to_string(&entry)
        .map_err(|cause| Error::internal(format!("cannot serialise an audit line: {cause}")))?;
    let mut file = std::fs::OpenOptions::new()
        .create(true)
        .append(true)
        .open(&path)
        .map_err(|cause| Error::io(&shown, "open the audit log", &cause))?;
    if !existing.is_empty() && !existing.ends_with(b"\n") {
        file.write_all(b"\n")
            .map_err(|cause| Error::io(&shown, "append to the audit log", &cause))?;
    }
    file.write_all(format!("{line}\n").as_bytes())
        .map_err(|cause| Error::io(&shown, "append to the audit log", &cause))
}
