//! The lock file: a hash chain of lock records beside the plan.

use super::sha256_hex;
use crate::error::{Error, ErrorKind, Location, Problem};
use serde::{Deserialize, Serialize};
use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

/// The on-disk shape of a lock file (`<plan>.lock.yaml`).
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct LockFile {
    pub cairn_lock: u32,
    pub records: Vec<LockRecord>,
}

/// One seal of the plan. `record_sha256` covers every other field, and
/// `previous_record_sha256` links to the record before it.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct LockRecord {
    pub sequence: u32,
    pub plan_file: String,
    pub plan_sha256: String,
    /// UTC, RFC 3339, to the second.
    pub locked_at: String,
    pub locked_by: String,
    pub reason: String,
    pub tool_version: String,
    /// Hashes of the blinded data files present at lock time, by file name.
    #[serde(default)]
    pub blinded_data_sha256: BTreeMap<String, String>,
    pub previous_record_sha256: Option<String>,
    /// The plan text as locked, so that `history` can show what each amendment changed.
    pub plan_text: String,
    pub record_sha256: String,
}

/// The part of a record that its own hash covers (everything but the hash).
#[derive(Serialize)]
#[serde(rename_all = "kebab-case")]
struct RecordBody<'a> {
    sequence: u32,
    plan_file: &'a str,
    plan_sha256: &'a str,
    locked_at: &'a str,
    locked_by: &'a str,
    reason: &'a str,
    tool_version: &'a str,
    blinded_data_sha256: &'a BTreeMap<String, String>,
    previous_record_sha256: &'a Option<String>,
    plan_text: &'a str,
}

impl LockRecord {
    /// The hash this record should carry, recomputed from its fields.
    pub fn computed_hash(&self) -> Result<String, Error> {
        let body = RecordBody {
            sequence: self.sequence,
            plan_file: &self.plan_file,
            plan_sha256: &self.plan_sha256,
            locked_at: &self.locked_at,
            locked_by: &self.locked_by,
            reason: &self.reason,
            tool_version: &self.tool_version,
            blinded_data_sha256: &self.blinded_data_sha256,
            previous_record_sha256: &self.previous_record_sha256,
            plan_text: &self.plan_text,
        };
        let text = serde_yaml::to_string(&body)
            .map_err(|cause| Error::internal(format!("cannot serialise a lock record: {cause}")))?;
        Ok(sha256_hex(text.as_bytes()))
    }
}

/// The lock file that belongs to a plan: `plan.yaml` → `plan.lock.yaml`.
pub fn lock_path(plan_path: &Path) -> PathBuf {
    let stem = plan_path
        .file_stem()
        .map(|stem| stem.to_string_lossy().into_owned())
        .unwrap_or_else(|| "plan".to_string());
    plan_path.with_file_name(format!("{stem}.lock.yaml"))
}

/// A lock file read from disk with its raw bytes (which are hashed as an input).
#[derive(Debug, Clone)]
pub struct LoadedLock {
    pub file_name: String,
    pub bytes: Vec<u8>,
    pub lock: LockFile,
}

/// Read and check the lock file of a plan; `Ok(None)` when there is none.
pub fn read(plan_path: &Path) -> Result<Option<LoadedLock>, Error> {
    let path = lock_path(plan_path);
    let file_name = path
        .file_name()
        .map(|name| name.to_string_lossy().into_owned())
        .unwrap_or_default();
    let bytes = match std::fs::read(&path) {
        Ok(bytes) => bytes,
        Err(cause) if cause.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(cause) => return Err(Error::io(&file_name, "read the lock record", &cause)),
    };
    let text = crate::data::decode_utf8(&bytes, &file_name)?;
    let lock: LockFile = serde_yaml::from_str(text).map_err(|cause| {
        let location = cause.location();
        Error::one(
            Problem::new(
                ErrorKind::LockRecord,
                format!(
                    "the lock file is malformed: {}",
                    strip_location(&cause.to_string())
                ),
            )
            .at(Location {
                file: file_name.clone(),
                line: location.as_ref().map(|l| l.line()),
                column: location.as_ref().map(|l| l.column()),
                path: None,
            }),
        )
    })?;
    check_chain(&lock, &file_name)?;
    Ok(Some(LoadedLock {
        file_name,
        bytes,
        lock,
    }))
}

fn strip_location(message: &str) -> String {
    match message.find(" at line ") {
        Some(position) => message[..position].to_string(),
        None => message.to_string(),
    }
}

/// Verify every record's own hash and its link to the one before.
pub fn check_chain(lock: &LockFile, file_name: &str) -> Result<(), Error> {
    let broken = |message: String| {
        Error::one(Problem::new(ErrorKind::LockRecord, message).at(Location::file(file_name)))
    };
    if lock.cairn_lock != 1 {
        return Err(broken(format!(
            "lock file version {} is not supported; this cairn reads version 1",
            lock.cairn_lock
        )));
    }
    if lock.records.is_empty() {
        return Err(broken("the lock file holds no records".to_string()));
    }
    let mut previous: Option<&LockRecord> = None;
    for (index, record) in lock.records.iter().enumerate() {
        let expected_sequence = index as u32 + 1;
        if record.sequence != expected_sequence {
            return Err(broken(format!(
                "record {} has sequence {}; a record was removed or reordered",
                expected_sequence, record.sequence
            )));
        }
        if record.computed_hash()? != record.record_sha256 {
            return Err(broken(format!(
                "record {} was edited after it was written: its contents no longer match its hash",
                record.sequence
            )));
        }
        if sha256_hex(record.plan_text.as_bytes()) != record.plan_sha256 {
            return Err(broken(format!(
                "record {}: the stored plan text does not match the stored plan hash",
                record.sequence
            )));
        }
        let expected_previous = previous.map(|earlier| earlier.record_sha256.clone());
        if record.previous_record_sha256 != expected_previous {
            return Err(broken(format!(
                "the chain breaks at record {}: it does not point to the hash of record {}",
                record.sequence, index
            )));
        }
        previous = Some(record);
    }
    Ok(())
}

/// What `cairn lock` needs to write a new record.
pub struct LockRequest<'a> {
    pub plan_path: &'a Path,
    pub plan_bytes: &'a [u8],
    pub locked_by: &'a str,
    pub reason: &'a str,
    /// UTC time, RFC 3339, supplied by the caller (the edge reads the clock).
    pub locked_at: String,
    pub blinded_data_sha256: BTreeMap<String, String>,
}

/// Append a record to the plan's lock file (creating it), and return the record.
pub fn append(request: LockRequest<'_>) -> Result<LockRecord, Error> {
    let plan_file = request
        .plan_path
        .file_name()
        .map(|name| name.to_string_lossy().into_owned())
        .unwrap_or_default();
    let plan_text = crate::data::decode_utf8(request.plan_bytes, &plan_file)?.to_string();
    let existing = read(request.plan_path)?;
    let plan_sha256 = sha256_hex(plan_text.as_bytes());
    let mut lock = match existing {
        Some(loaded) => loaded.lock,
        None => LockFile {
            cairn_lock: 1,
            records: Vec::new(),
        },
    };
    if let Some(last) = lock.records.last()
        && last.plan_sha256 == plan_sha256
    {
        return Err(Error::one(
            Problem::new(
                ErrorKind::LockRecord,
                format!(
                    "the plan is already locked with these exact contents (record {})",
                    last.sequence
                ),
            )
            .at(Location::file(plan_file)),
        ));
    }
    for (field, value) in [("--by", request.locked_by), ("--reason", request.reason)] {
        if value.trim().is_empty() {
            return Err(Error::one(Problem::new(
                ErrorKind::PlanSchema,
                format!("{field} must not be empty"),
            )));
        }
    }
    let mut record = LockRecord {
        sequence: lock.records.len() as u32 + 1,
        plan_file,
        plan_sha256,
        locked_at: request.locked_at,
        locked_by: request.locked_by.trim().to_string(),
        reason: request.reason.trim().to_string(),
        tool_version: super::TOOL_VERSION.to_string(),
        blinded_data_sha256: request.blinded_data_sha256,
        previous_record_sha256: lock.records.last().map(|last| last.record_sha256.clone()),
        plan_text,
        record_sha256: String::new(),
    };
    record.record_sha256 = record.computed_hash()?;
    lock.records.push(record.clone());
    let text = serde_yaml::to_string(&lock)
        .map_err(|cause| Error::internal(format!("cannot serialise the lock file: {cause}")))?;
    let path = lock_path(request.plan_path);
    crate::output::write_atomically(&path, text.as_bytes())?;
    Ok(record)
}
