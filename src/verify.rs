//! Independent verification: re-hash every input named in a run's
//! results.json, re-run the plan in memory exactly as recorded (same mode,
//! seed and overrides), and compare every output byte for byte.
//!
//! The verdict is one of: **match** (every input hash and every output byte
//! equal), **numerically equivalent** (inputs equal, and the only differences
//! are numbers in results.json within a relative tolerance, as happens when a
//! platform's math library differs in the last bits), or **mismatch** (with
//! each differing input hash, each differing file, and each differing number
//! by its path in results.json). A verification record is written into the
//! output folder. This module reads files and never changes the outputs it
//! verifies.

use crate::error::{Error, ErrorKind, Location, Problem};
use crate::provenance::{TOOL_VERSION, sha256_hex};
use crate::run::{self, Mode, RunOptions};
use serde::Serialize;
use serde_json::Value;
use std::path::{Path, PathBuf};

/// Numbers whose relative difference is at most this count as equivalent.
pub const RELATIVE_TOLERANCE: f64 = 1e-9;

#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "kebab-case")]
pub enum Verdict {
    Match,
    NumericallyEquivalent,
    Mismatch,
}

#[derive(Debug, Clone, Serialize)]
pub struct InputCheck {
    pub role: String,
    pub file: String,
    pub recorded_sha256: String,
    /// `None` when the input is no longer there.
    pub current_sha256: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct OutputCheck {
    pub file: String,
    /// SHA-256 of the file in the folder being verified (`None` if missing).
    pub found_sha256: Option<String>,
    /// SHA-256 of the same file from the fresh run (`None` if the fresh run has no such file).
    pub fresh_sha256: Option<String>,
    pub identical: bool,
}

#[derive(Debug, Clone, Serialize)]
pub struct NumberDifference {
    /// Path in results.json, e.g. `analyses[0].contrasts[1].estimate.p_value`.
    pub path: String,
    pub recorded: String,
    pub fresh: String,
    /// Whether the difference is within the numeric tolerance.
    pub within_tolerance: bool,
}

/// The verification record written as `verification.json`.
#[derive(Debug, Clone, Serialize)]
pub struct Verification {
    pub schema: &'static str,
    pub tool_version: &'static str,
    pub verdict: Verdict,
    pub relative_tolerance: f64,
    pub plan_file: String,
    pub inputs: Vec<InputCheck>,
    pub outputs: Vec<OutputCheck>,
    pub number_differences: Vec<NumberDifference>,
    /// Why the plan could not be re-run, when it could not (e.g. a changed
    /// plan that no longer validates); the verdict is then a mismatch.
    pub rerun_error: Option<String>,
}

fn bad(message: String, file: &str) -> Error {
    Error::one(Problem::new(ErrorKind::DataFormat, message).at(Location::file(file)))
}

/// Verify the run in `dir`; `plan` overrides where the plan is looked for
/// (by default: the recorded plan file name in the current folder, then in
/// the output folder's parent).
pub fn verify(dir: &Path, plan: Option<&Path>, jobs: usize) -> Result<Verification, Error> {
    let results_path = dir.join("results.json");
    let shown = results_path.display().to_string();
    let bytes = std::fs::read(&results_path)
        .map_err(|cause| Error::io(&shown, "read the run's results", &cause))?;
    let recorded: Value = serde_json::from_slice(&bytes)
        .map_err(|cause| bad(format!("results.json is not valid JSON: {cause}"), &shown))?;
    let plan_file = recorded["plan"]["file"]
        .as_str()
        .ok_or_else(|| bad("results.json names no plan file".to_string(), &shown))?
        .to_string();
    let plan_path = match plan {
        Some(path) => path.to_path_buf(),
        None => locate_plan(dir, &plan_file).ok_or_else(|| {
            Error::one(
                Problem::new(ErrorKind::Io, format!("cannot find the plan \"{plan_file}\" in the current folder or beside the output folder"))
                    .at(Location::file(plan_file.clone()))
                    .with_hint("give it with --plan"),
            )
        })?,
    };
    let mode = match (
        recorded["run"]["mode"].as_str(),
        recorded["run"]["seed"].as_u64(),
    ) {
        (Some("dry-run"), Some(seed)) => Mode::DryRun { seed },
        (Some("run"), _) => Mode::Unblinded,
        _ => {
            return Err(bad(
                "results.json does not say how the run was made (run.mode)".to_string(),
                &shown,
            ));
        }
    };
    let only: Vec<String> = recorded["run"]["only"]
        .as_array()
        .map(|items| {
            items
                .iter()
                .filter_map(|item| item.as_str().map(str::to_string))
                .collect()
        })
        .unwrap_or_default();
    let options = RunOptions {
        mode,
        only,
        jobs,
        ..RunOptions::default()
    };

    // Re-hash every recorded input where it is now.
    let folder = plan_path
        .parent()
        .map(Path::to_path_buf)
        .unwrap_or_else(|| PathBuf::from("."));
    let mut inputs = Vec::new();
    for input in recorded["inputs"]
        .as_array()
        .map(Vec::as_slice)
        .unwrap_or_default()
    {
        let role = input["role"].as_str().unwrap_or("").to_string();
        let file = input["file"].as_str().unwrap_or("").to_string();
        let recorded_sha256 = input["sha256"].as_str().unwrap_or("").to_string();
        let current_sha256 = match role.as_str() {
            "template" => crate::report::TEMPLATES
                .iter()
                .find(|(name, _)| format!("templates/{name}") == file)
                .map(|(_, text)| sha256_hex(text.as_bytes())),
            "plan" => std::fs::read(&plan_path)
                .ok()
                .map(|bytes| sha256_hex(&bytes)),
            _ => std::fs::read(folder.join(&file))
                .ok()
                .map(|bytes| sha256_hex(&bytes)),
        };
        inputs.push(InputCheck {
            role,
            file,
            recorded_sha256,
            current_sha256,
        });
    }
    let inputs_match = inputs
        .iter()
        .all(|input| input.current_sha256.as_deref() == Some(input.recorded_sha256.as_str()));

    // Re-run in memory and compare every output. A re-run that fails (a changed
    // input that no longer validates) is itself a finding, not an error.
    let staged = match run::load_inputs(&plan_path, options.mode)
        .and_then(|fresh| run::produce(&fresh, &options))
    {
        Ok(staged) => staged,
        Err(error) => {
            let verification = Verification {
                schema: "cairn-verification/1",
                tool_version: TOOL_VERSION,
                verdict: Verdict::Mismatch,
                relative_tolerance: RELATIVE_TOLERANCE,
                plan_file,
                inputs,
                outputs: Vec::new(),
                number_differences: Vec::new(),
                rerun_error: Some(error.to_string()),
            };
            write_record(dir, &verification)?;
            return Ok(verification);
        }
    };
    let mut outputs = Vec::new();
    let mut listed: Vec<String> = Vec::new();
    for (name, fresh) in staged.files() {
        listed.push(name.clone());
        let found = std::fs::read(dir.join(name)).ok();
        let identical = found.as_deref() == Some(fresh.as_slice());
        outputs.push(OutputCheck {
            file: name.clone(),
            found_sha256: found.as_deref().map(sha256_hex),
            fresh_sha256: Some(sha256_hex(fresh)),
            identical,
        });
    }
    for name in files_below(dir) {
        if name != "verification.json" && !listed.contains(&name) {
            outputs.push(OutputCheck {
                file: name.clone(),
                found_sha256: std::fs::read(dir.join(&name))
                    .ok()
                    .as_deref()
                    .map(sha256_hex),
                fresh_sha256: None,
                identical: false,
            });
        }
    }
    let mut number_differences = Vec::new();
    let fresh_results = staged
        .files()
        .iter()
        .find(|(name, _)| name == "results.json")
        .map(|(_, bytes)| bytes.clone())
        .unwrap_or_default();
    let fresh_value: Value = serde_json::from_slice(&fresh_results).unwrap_or(Value::Null);
    let structural = compare_json(&recorded, &fresh_value, "", &mut number_differences);
    let all_identical = outputs.iter().all(|output| output.identical);
    let verdict = if inputs_match && all_identical {
        Verdict::Match
    } else if inputs_match
        && !structural
        && !number_differences.is_empty()
        && number_differences
            .iter()
            .all(|difference| difference.within_tolerance)
    {
        // Numbers in results.json differ, all within tolerance; the other outputs
        // differ only as far as they print those numbers.
        Verdict::NumericallyEquivalent
    } else {
        Verdict::Mismatch
    };
    let verification = Verification {
        schema: "cairn-verification/1",
        tool_version: TOOL_VERSION,
        verdict,
        relative_tolerance: RELATIVE_TOLERANCE,
        plan_file,
        inputs,
        outputs,
        number_differences,
        rerun_error: None,
    };
    write_record(dir, &verification)?;
    Ok(verification)
}

fn write_record(dir: &Path, verification: &Verification) -> Result<(), Error> {
    let mut record = serde_json::to_vec_pretty(verification).map_err(|cause| {
        Error::internal(format!("cannot serialise the verification record: {cause}"))
    })?;
    record.push(b'\n');
    crate::output::write_atomically(&dir.join("verification.json"), &record)
}

fn locate_plan(dir: &Path, plan_file: &str) -> Option<PathBuf> {
    let candidates = [
        PathBuf::from(plan_file),
        dir.parent()
            .map(|parent| parent.join(plan_file))
            .unwrap_or_default(),
    ];
    candidates.into_iter().find(|candidate| candidate.is_file())
}

/// Relative paths of the regular files below `dir`, sorted.
fn files_below(dir: &Path) -> Vec<String> {
    let mut found = Vec::new();
    let mut stack = vec![(dir.to_path_buf(), String::new())];
    while let Some((folder, prefix)) = stack.pop() {
        let Ok(entries) = std::fs::read_dir(&folder) else {
            continue;
        };
        for entry in entries.flatten() {
            let name = format!("{prefix}{}", entry.file_name().to_string_lossy());
            match entry.file_type() {
                Ok(kind) if kind.is_dir() => stack.push((entry.path(), format!("{name}/"))),
                Ok(kind) if kind.is_file() => found.push(name),
                _ => {}
            }
        }
    }
    found.sort();
    found
}

/// Walk two JSON documents; record every differing number, and return true
/// when they differ in anything but numbers (structure, text, booleans).
fn compare_json(
    recorded: &Value,
    fresh: &Value,
    path: &str,
    differences: &mut Vec<NumberDifference>,
) -> bool {
    match (recorded, fresh) {
        (Value::Number(a), Value::Number(b)) => {
            if a != b {
                let (x, y) = (
                    a.as_f64().unwrap_or(f64::NAN),
                    b.as_f64().unwrap_or(f64::NAN),
                );
                let scale = x.abs().max(y.abs());
                let within_tolerance = (x - y).abs() <= RELATIVE_TOLERANCE * scale;
                differences.push(NumberDifference {
                    path: path.to_string(),
                    recorded: a.to_string(),
                    fresh: b.to_string(),
                    within_tolerance,
                });
            }
            false
        }
        (Value::Object(a), Value::Object(b)) => {
            let mut structural = a.len() != b.len();
            for (key, value) in a {
                let child = if path.is_empty() {
                    key.clone()
                } else {
                    format!("{path}.{key}")
                };
                match b.get(key) {
                    Some(other) => structural |= compare_json(value, other, &child, differences),
                    None => structural = true,
                }
            }
            structural
        }
        (Value::Array(a), Value::Array(b)) => {
            let mut structural = a.len() != b.len();
            for (index, (left, right)) in a.iter().zip(b).enumerate() {
                structural |= compare_json(left, right, &format!("{path}[{index}]"), differences);
            }
            structural
        }
        (a, b) => a != b,
    }
}
