//! The `cairn` command: parses arguments, calls the library, appends to the
//! study's audit log, and maps errors to the documented exit codes (0 success,
//! 1 internal error, 2 bad input or usage, 3 verification mismatch). Nothing
//! else lives here; this and the lock command are the only places that read
//! the clock.

use cairn::provenance::{audit, lock, sha256_hex};
use cairn::run::{Mode, RunOptions};
use clap::{Parser, Subcommand};
use std::path::{Path, PathBuf};
use std::process::ExitCode;

#[derive(Parser)]
#[command(
    name = "cairn",
    version,
    about = "Run a pre-specified clinical-trial analysis plan exactly as written, and prove it.",
    long_about = "Run a pre-specified clinical-trial analysis plan exactly as written, and prove it.\n\n\
        A plan (YAML) names the data, populations, models, covariates, contrasts and the multiplicity \
        strategy. `check` validates it, `lock` seals it with a hash-chained record, `dry-run` exercises \
        it on dummy treatment codes before unblinding, `run` fits every planned analysis and writes a \
        Markdown and HTML report, results.json, tables and a manifest of hashes, `verify` re-runs a \
        finished run and compares every byte, and `history` shows the lock chain and the audit log.\n\n\
        Exit codes: 0 success, 1 internal error, 2 bad input or usage, 3 verification mismatch.\n\n\
        Results support, and do not replace, review by a qualified statistician under the sponsor's \
        validated processes and the applicable local regulations."
)]
struct Arguments {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Validate a plan and the data files it names, listing every problem found.
    Check {
        /// The plan file (YAML, `cairn-plan: 1`).
        plan: PathBuf,
    },
    /// Seal the plan: append a lock record (hash, text, who, when, why) to PLAN's lock file.
    Lock {
        /// The plan file to seal.
        plan: PathBuf,
        /// Who locks the plan (name and role).
        #[arg(long, value_name = "NAME")]
        by: String,
        /// Why it is locked now (e.g. "final plan before database lock", "amendment 2: …").
        #[arg(long, value_name = "TEXT")]
        reason: String,
    },
    /// Before unblinding: run every analysis on dummy treatment codes, never reading the allocation file; estimates are masked.
    DryRun {
        /// The plan file.
        plan: PathBuf,
        /// The output folder; written whole or not at all.
        #[arg(long, value_name = "DIR")]
        out: PathBuf,
        /// Seed of the dummy treatment codes (balanced permutation within strata).
        #[arg(long, value_name = "N")]
        seed: u64,
        /// Replace the output folder if it exists.
        #[arg(long)]
        force: bool,
        /// Fit up to N analyses at once, one thread each. The outputs are the same
        /// bytes for any N; memory grows with N (one design per analysis in flight).
        #[arg(long, value_name = "N", default_value_t = 1, value_parser = clap::value_parser!(u16).range(1..))]
        jobs: u16,
    },
    /// Fit every planned analysis and write report.md, report.html, results.json, tables/ and manifest.json.
    Run {
        /// The plan file.
        plan: PathBuf,
        /// The output folder; written whole or not at all.
        #[arg(long, value_name = "DIR")]
        out: PathBuf,
        /// Replace the output folder if it exists.
        #[arg(long)]
        force: bool,
        /// Run only this analysis (repeatable). A departure from the plan, flagged in the report.
        #[arg(long, value_name = "ANALYSIS")]
        only: Vec<String>,
        /// Fit up to N analyses at once, one thread each. The outputs are the same
        /// bytes for any N; memory grows with N (one design per analysis in flight).
        #[arg(long, value_name = "N", default_value_t = 1, value_parser = clap::value_parser!(u16).range(1..))]
        jobs: u16,
    },
    /// Re-hash the inputs of a finished run, re-run it and compare every output byte for byte.
    Verify {
        /// The output folder of the run to verify.
        dir: PathBuf,
        /// The plan file, if it is not in the current folder or beside DIR.
        #[arg(long, value_name = "PLAN")]
        plan: Option<PathBuf>,
        /// Fit up to N analyses at once, one thread each. The outputs are the same
        /// bytes for any N; memory grows with N (one design per analysis in flight).
        #[arg(long, value_name = "N", default_value_t = 1, value_parser = clap::value_parser!(u16).range(1..))]
        jobs: u16,
    },
    /// Show the lock chain (who, when, why, what changed) and the audit log, checking both.
    History {
        /// The plan file.
        plan: PathBuf,
    },
}

fn main() -> ExitCode {
    let arguments = Arguments::parse();
    let outcome = match arguments.command {
        Command::Check { plan } => cairn::run::check(&plan).map(|summary| {
            for note in &summary.notes {
                let location = note
                    .location
                    .as_ref()
                    .map(|location| format!("{location}: "))
                    .unwrap_or_default();
                println!("note: {location}{}", note.message);
            }
            println!(
                "plan ok: {} analyses, {} variables; {} subjects matched; lock status: {}",
                summary.analyses, summary.variables, summary.subjects, summary.lock_status
            );
            ExitCode::SUCCESS
        }),
        Command::Lock { plan, by, reason } => {
            lock_plan(&plan, &by, &reason).map(|()| ExitCode::SUCCESS)
        }
        Command::DryRun {
            plan,
            out,
            seed,
            force,
            jobs,
        } => run_plan(
            &plan,
            &out,
            force,
            RunOptions {
                mode: Mode::DryRun { seed },
                only: Vec::new(),
                jobs: usize::from(jobs),
                ..RunOptions::default()
            },
            "dry-run",
        ),
        Command::Run {
            plan,
            out,
            force,
            only,
            jobs,
        } => run_plan(
            &plan,
            &out,
            force,
            RunOptions {
                mode: Mode::Unblinded,
                only,
                jobs: usize::from(jobs),
                ..RunOptions::default()
            },
            "run",
        ),
        Command::Verify { dir, plan, jobs } => verify(&dir, plan.as_deref(), usize::from(jobs)),
        Command::History { plan } => cairn::provenance::history::history(&plan).map(|text| {
            print!("{text}");
            ExitCode::SUCCESS
        }),
    };
    match outcome {
        Ok(code) => code,
        Err(error) => {
            eprintln!("{error}");
            ExitCode::from(error.exit_code() as u8)
        }
    }
}

fn now() -> String {
    chrono::Utc::now().format("%Y-%m-%dT%H:%M:%SZ").to_string()
}

fn run_plan(
    plan: &Path,
    out: &Path,
    force: bool,
    options: RunOptions,
    command: &str,
) -> Result<ExitCode, cairn::Error> {
    let (inputs, staged) = cairn::run::run(plan, out, force, &options)?;
    let manifest = staged
        .files()
        .iter()
        .find(|(name, _)| name == "manifest.json")
        .map(|(_, bytes)| sha256_hex(bytes));
    let mut recorded = vec![
        (
            inputs.plan.file_name.clone(),
            sha256_hex(&inputs.plan.bytes),
        ),
        (
            inputs.plan.plan.data.subjects.clone(),
            inputs.subjects.sha256.clone(),
        ),
    ];
    if let Some(digest) = &inputs.allocation {
        recorded.push((
            inputs.plan.plan.data.treatment.file.clone(),
            digest.sha256.clone(),
        ));
    }
    audit::append(
        plan,
        audit::AuditEntry {
            time: now(),
            command: command.to_string(),
            plan_sha256: sha256_hex(&inputs.plan.bytes),
            inputs: recorded,
            manifest_sha256: manifest,
            outcome: "ok".to_string(),
            previous_line_sha256: None,
        },
    )?;
    println!("wrote {} files to {}", staged.files().len(), out.display());
    Ok(ExitCode::SUCCESS)
}

fn verify(dir: &Path, plan: Option<&Path>, jobs: usize) -> Result<ExitCode, cairn::Error> {
    let verification = cairn::verify::verify(dir, plan, jobs)?;
    use cairn::verify::Verdict;
    for input in &verification.inputs {
        if input.current_sha256.as_deref() != Some(input.recorded_sha256.as_str()) {
            match &input.current_sha256 {
                Some(now) => println!(
                    "input changed: {} {} (recorded {}, now {})",
                    input.role, input.file, input.recorded_sha256, now
                ),
                None => println!(
                    "input missing: {} {} (recorded {})",
                    input.role, input.file, input.recorded_sha256
                ),
            }
        }
    }
    for output in &verification.outputs {
        if !output.identical {
            match (&output.found_sha256, &output.fresh_sha256) {
                (None, _) => println!("output missing from the folder: {}", output.file),
                (_, None) => println!("output not made by the plan: {}", output.file),
                _ => println!("output differs: {}", output.file),
            }
        }
    }
    if let Some(error) = &verification.rerun_error {
        println!("the plan could not be re-run with the current inputs:");
        for line in error.lines() {
            println!("  {line}");
        }
    }
    for difference in &verification.number_differences {
        println!(
            "number differs: {}: recorded {}, fresh {}{}",
            difference.path,
            difference.recorded,
            difference.fresh,
            if difference.within_tolerance {
                " (within tolerance)"
            } else {
                ""
            }
        );
    }
    let plan_path = plan
        .map(Path::to_path_buf)
        .unwrap_or_else(|| PathBuf::from(&verification.plan_file));
    let outcome = match verification.verdict {
        Verdict::Match => "match",
        Verdict::NumericallyEquivalent => "numerically equivalent",
        Verdict::Mismatch => "mismatch",
    };
    if plan_path.is_file() {
        let plan_bytes = std::fs::read(&plan_path).unwrap_or_default();
        let _ = audit::append(
            &plan_path,
            audit::AuditEntry {
                time: now(),
                command: "verify".to_string(),
                plan_sha256: sha256_hex(&plan_bytes),
                inputs: verification
                    .inputs
                    .iter()
                    .map(|input| {
                        (
                            input.file.clone(),
                            input.current_sha256.clone().unwrap_or_default(),
                        )
                    })
                    .collect(),
                manifest_sha256: std::fs::read(dir.join("manifest.json"))
                    .ok()
                    .map(|bytes| sha256_hex(&bytes)),
                outcome: outcome.to_string(),
                previous_line_sha256: None,
            },
        );
    }
    match verification.verdict {
        Verdict::Match => {
            println!(
                "verified: every input hash and every output byte match ({} outputs); record written to {}",
                verification.outputs.len(),
                dir.join("verification.json").display()
            );
            Ok(ExitCode::SUCCESS)
        }
        Verdict::NumericallyEquivalent => {
            println!(
                "numerically equivalent: inputs match and every differing number agrees within a relative {:e}; record written to {}",
                cairn::verify::RELATIVE_TOLERANCE,
                dir.join("verification.json").display()
            );
            Ok(ExitCode::SUCCESS)
        }
        Verdict::Mismatch => {
            println!(
                "mismatch: see the differences above; record written to {}",
                dir.join("verification.json").display()
            );
            Ok(ExitCode::from(3))
        }
    }
}

fn lock_plan(plan: &Path, by: &str, reason: &str) -> Result<(), cairn::Error> {
    let loaded = cairn::load_plan(plan)?;
    // The blinded subjects file is hashed when it exists, so a later run can
    // show that the data it analyses are the data seen at lock time.
    let mut blinded = std::collections::BTreeMap::new();
    let subjects = loaded.resolve(&loaded.plan.data.subjects)?;
    if let Ok(bytes) = std::fs::read(&subjects) {
        blinded.insert(loaded.plan.data.subjects.clone(), sha256_hex(&bytes));
    }
    let record = lock::append(lock::LockRequest {
        plan_path: plan,
        plan_bytes: &loaded.bytes,
        locked_by: by,
        reason,
        locked_at: now(),
        blinded_data_sha256: blinded.clone(),
    })?;
    audit::append(
        plan,
        audit::AuditEntry {
            time: record.locked_at.clone(),
            command: "lock".to_string(),
            plan_sha256: record.plan_sha256.clone(),
            inputs: blinded.into_iter().collect(),
            manifest_sha256: None,
            outcome: format!("locked as record {}", record.sequence),
            previous_line_sha256: None,
        },
    )?;
    println!(
        "locked {} as record {} (plan SHA-256 {}) in {}",
        loaded.file_name,
        record.sequence,
        record.plan_sha256,
        lock::lock_path(plan).display()
    );
    Ok(())
}
