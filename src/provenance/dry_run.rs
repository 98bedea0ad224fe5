//! The dry-run record: what the blinded dry run saw, kept beside the plan.
//!
//! `cairn dry-run` writes `<plan>.dry-run.yaml` with the seed, the plan's hash
//! and the SHA-256 of the blinded subjects file. A later `run` reads it, lists
//! it among its inputs, and flags subjects data that changed after the dry run.

use super::sha256_hex;
use crate::error::{Error, ErrorKind, Location, Problem};
use serde::{Deserialize, Serialize};
use std::path::{Path, PathBuf};

#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, rename_all = "kebab-case")]
pub struct DryRunRecord {
    pub cairn_dry_run: u32,
    pub seed: u64,
    pub plan_sha256: String,
    pub subjects_file: String,
    pub subjects_sha256: String,
    pub tool_version: String,
}

/// `plan.yaml` → `plan.dry-run.yaml`.
pub fn record_path(plan_path: &Path) -> PathBuf {
    let stem = plan_path
        .file_stem()
        .map(|stem| stem.to_string_lossy().into_owned())
        .unwrap_or_else(|| "plan".to_string());
    plan_path.with_file_name(format!("{stem}.dry-run.yaml"))
}

/// A dry-run record read from disk with its raw bytes.
#[derive(Debug, Clone)]
pub struct LoadedDryRun {
    pub file_name: String,
    pub bytes: Vec<u8>,
    pub record: DryRunRecord,
}

pub fn read(plan_path: &Path) -> Result<Option<LoadedDryRun>, Error> {
    let path = record_path(plan_path);
    let file_name = path
        .file_name()
        .map(|name| name.to_string_lossy().into_owned())
        .unwrap_or_default();
    let bytes = match std::fs::read(&path) {
        Ok(bytes) => bytes,
        Err(cause) if cause.kind() == std::io::ErrorKind::NotFound => return Ok(None),
        Err(cause) => return Err(Error::io(&file_name, "read the dry-run record", &cause)),
    };
    let text = crate::data::decode_utf8(&bytes, &file_name)?;
    let record: DryRunRecord = serde_yaml::from_str(text).map_err(|cause| {
        Error::one(
            Problem::new(
                ErrorKind::LockRecord,
                format!("the dry-run record is malformed: {cause}"),
            )
            .at(Location::file(file_name.clone())),
        )
    })?;
    Ok(Some(LoadedDryRun {
        file_name,
        bytes,
        record,
    }))
}

/// Write the record for a dry run of `plan_bytes` on the subjects file whose
/// SHA-256 is `subjects_sha256`.
pub fn write(
    plan_path: &Path,
    plan_bytes: &[u8],
    subjects_file: &str,
    subjects_sha256: &str,
    seed: u64,
) -> Result<(), Error> {
    let record = DryRunRecord {
        cairn_dry_run: 1,
        seed,
        plan_sha256: sha256_hex(plan_bytes),
        subjects_file: subjects_file.to_string(),
        subjects_sha256: subjects_sha256.to_string(),
        tool_version: super::TOOL_VERSION.to_string(),
    };
    let text = serde_yaml::to_string(&record).map_err(|cause| {
        Error::internal(format!("cannot serialise the dry-run record: {cause}"))
    })?;
    crate::output::write_atomically(&record_path(plan_path), text.as_bytes())
}
