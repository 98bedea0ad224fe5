//! The `cairn` command: parses arguments, calls the library, maps errors to
//! the documented exit codes (0 success, 1 internal error, 2 bad input or
//! usage, 3 verification mismatch). Nothing else lives here.

use cairn::provenance::lock;
use clap::{Parser, Subcommand};
use std::path::PathBuf;
use std::process::ExitCode;

#[derive(Parser)]
#[command(
    name = "cairn",
    version,
    about = "Run a pre-specified clinical-trial analysis plan exactly as written, and prove it.",
    long_about = "Run a pre-specified clinical-trial analysis plan exactly as written, and prove it.\n\n\
        A plan (YAML) names the data, populations, models, covariates and contrasts. `check` validates it, \
        `lock` seals it with a hash-chained record, and `run` fits every planned analysis and writes a \
        Markdown and HTML report, results.json, tables and a manifest of hashes.\n\n\
        Exit codes: 0 success, 1 internal error, 2 bad input or usage.\n\n\
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
    /// Seal the plan: append a lock record (hash, who, when, why) beside it.
    Lock {
        /// The plan file to seal.
        plan: PathBuf,
        /// Who locks the plan (name and role).
        #[arg(long, value_name = "NAME")]
        by: String,
        /// Why it is locked now (e.g. "final SAP before database lock").
        #[arg(long, value_name = "TEXT")]
        reason: String,
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
    },
}

fn main() -> ExitCode {
    let arguments = Arguments::parse();
    let outcome = match arguments.command {
        Command::Check { plan } => cairn::run::check(&plan).map(|summary| {
            for note in &summary.notes {
                let location = note.location.as_ref().map(|location| format!("{location}: ")).unwrap_or_default();
                println!("note: {location}{}", note.message);
            }
            println!(
                "plan ok: {} analyses, {} variables; {} subjects matched; lock status: {}",
                summary.analyses, summary.variables, summary.subjects, summary.lock_status
            );
        }),
        Command::Lock { plan, by, reason } => lock_plan(&plan, &by, &reason),
        Command::Run { plan, out, force } => cairn::run::run(&plan, &out, force).map(|files| {
            println!("wrote {} files to {}", files.len(), out.display());
        }),
    };
    match outcome {
        Ok(()) => ExitCode::SUCCESS,
        Err(error) => {
            eprintln!("{error}");
            ExitCode::from(error.exit_code() as u8)
        }
    }
}

fn lock_plan(plan: &std::path::Path, by: &str, reason: &str) -> Result<(), cairn::Error> {
    let loaded = cairn::load_plan(plan)?;
    // The blinded subjects file is hashed when it exists, so a later run can
    // show that the data it analyses are the data seen at lock time.
    let mut blinded = std::collections::BTreeMap::new();
    let subjects = loaded.resolve(&loaded.plan.data.subjects)?;
    if let Ok(bytes) = std::fs::read(&subjects) {
        blinded.insert(loaded.plan.data.subjects.clone(), cairn::provenance::sha256_hex(&bytes));
    }
    let record = lock::append(lock::LockRequest {
        plan_path: plan,
        plan_bytes: &loaded.bytes,
        locked_by: by,
        reason,
        locked_at: chrono::Utc::now().format("%Y-%m-%dT%H:%M:%SZ").to_string(),
        blinded_data_sha256: blinded,
    })?;
    println!(
        "locked {} as record {} (plan SHA-256 {}) in {}",
        loaded.file_name,
        record.sequence,
        record.plan_sha256,
        lock::lock_path(plan).display()
    );
    Ok(())
}
