//! The catalogue of bad inputs: every case in tests/cases/bad/ starts from a
//! copy of tests/cases/base/ (a small valid study), changes one thing
//! (`edits.json`: exact text replacements, optionally repeated; `files/`:
//! files laid over the copy), runs `cairn check plan.yaml` (or the command in `command.txt`) and
//! must:
//! - exit with code 2 (bad input), not panic (exit 101) or fail internally (1);
//! - print exactly the stored message in `expected.txt`, which names the file,
//!   line and column (or row and column) of every problem;
//! - leave no output folder and no staging folder behind.
//!
//! After an intended change of wording, regenerate the expected messages with
//! `UPDATE_GOLDEN=1 cargo test --test bad_input` and review the diff.

mod common;

use common::{Scratch, cairn, copy_tree, root};
use std::path::Path;

#[derive(serde::Deserialize)]
struct Edit {
    file: String,
    find: String,
    replace: String,
    /// When given, the replacement is `replace` written this many times, with
    /// `{n}` in it standing for 1, 2, …: how the limit cases build a plan with
    /// 201 analyses or a header with 10 001 columns without storing it.
    #[serde(default)]
    repeat: Option<usize>,
}

impl Edit {
    fn replacement(&self) -> String {
        match self.repeat {
            None => self.replace.clone(),
            Some(count) => (1..=count)
                .map(|index| self.replace.replace("{n}", &index.to_string()))
                .collect(),
        }
    }
}

fn apply_case(case: &Path, study: &Path) {
    let edits = case.join("edits.json");
    if edits.exists() {
        let edits: Vec<Edit> = serde_json::from_slice(&std::fs::read(&edits).expect("read edits"))
            .expect("parse edits");
        for edit in edits {
            let path = study.join(&edit.file);
            let text = std::fs::read_to_string(&path).expect("read file to edit");
            assert_eq!(
                text.matches(&edit.find).count(),
                1,
                "{}: edit target {:?} must occur exactly once in {}",
                case.display(),
                edit.find,
                edit.file
            );
            std::fs::write(&path, text.replacen(&edit.find, &edit.replacement(), 1))
                .expect("write edited file");
        }
    }
    let files = case.join("files");
    if files.exists() {
        copy_tree(&files, study);
    }
}

fn run_case(case: &Path) -> Result<(), String> {
    let name = case
        .file_name()
        .and_then(|name| name.to_str())
        .unwrap_or("?")
        .to_string();
    let scratch = Scratch::new(&format!("bad-{name}"));
    copy_tree(&root().join("tests/cases/base"), &scratch.path);
    apply_case(case, &scratch.path);
    let had_output = scratch.path.join("out").exists();
    let command = std::fs::read_to_string(case.join("command.txt"))
        .unwrap_or_else(|_| "check plan.yaml".to_string());
    let arguments: Vec<&str> = command.split_whitespace().collect();
    let outcome = cairn(&scratch.path, &arguments);
    let mut failures = Vec::new();
    if outcome.code != 2 {
        failures.push(format!(
            "exit code {} (expected 2); stderr:\n{}",
            outcome.code, outcome.stderr
        ));
    }
    if !outcome
        .stderr
        .lines()
        .all(|line| line.starts_with("error: "))
        || outcome.stderr.trim().is_empty()
    {
        failures.push(format!(
            "every stderr line should be an \"error: \" line; got:\n{}",
            outcome.stderr
        ));
    }
    // Each message must carry a location: a file name, and for content errors a line.
    let first = outcome.stderr.lines().next().unwrap_or("");
    if !(first.contains("plan.yaml") || first.contains(".csv") || first.contains("out")) {
        failures.push(format!("the first message names no file: {first}"));
    }
    if !had_output && scratch.path.join("out").exists() {
        failures.push("an output folder was left behind".to_string());
    }
    if had_output {
        let entries: Vec<_> = std::fs::read_dir(scratch.path.join("out"))
            .expect("read out")
            .map(|entry| entry.expect("entry").file_name())
            .collect();
        if entries.len() != 1 {
            failures.push(format!(
                "the existing output folder was changed: {entries:?}"
            ));
        }
    }
    let leftovers: Vec<String> = std::fs::read_dir(&scratch.path)
        .expect("read study")
        .filter_map(|entry| {
            entry
                .ok()
                .map(|entry| entry.file_name().to_string_lossy().into_owned())
        })
        .filter(|name| name.contains(".partial-"))
        .collect();
    if !leftovers.is_empty() {
        failures.push(format!("staging files were left behind: {leftovers:?}"));
    }
    let expected_path = case.join("expected.txt");
    if std::env::var("UPDATE_GOLDEN").as_deref() == Ok("1") {
        std::fs::write(&expected_path, &outcome.stderr).expect("write expected message");
    } else {
        let expected = std::fs::read_to_string(&expected_path).unwrap_or_default();
        if expected != outcome.stderr {
            failures.push(format!(
                "message differs from expected.txt\n--- expected\n{expected}--- actual\n{}",
                outcome.stderr
            ));
        }
    }
    if failures.is_empty() {
        Ok(())
    } else {
        Err(format!("case {name}:\n{}", failures.join("\n")))
    }
}

#[test]
fn every_bad_input_is_a_located_error_with_exit_code_2_and_no_output() {
    let mut cases: Vec<_> = std::fs::read_dir(root().join("tests/cases/bad"))
        .expect("cases")
        .map(|entry| entry.expect("entry").path())
        .collect();
    cases.sort();
    assert!(
        cases.len() >= 40,
        "the catalogue should hold at least 40 cases; found {}",
        cases.len()
    );
    let failures: Vec<String> = cases
        .iter()
        .filter_map(|case| run_case(case).err())
        .collect();
    assert!(
        failures.is_empty(),
        "{} of {} cases failed:\n\n{}",
        failures.len(),
        cases.len(),
        failures.join("\n\n")
    );
}

#[test]
fn the_base_study_itself_is_valid() {
    let scratch = Scratch::new("base");
    copy_tree(&root().join("tests/cases/base"), &scratch.path);
    let outcome = cairn(&scratch.path, &["check", "plan.yaml"]);
    assert_eq!(outcome.code, 0, "{}", outcome.stderr);
}

#[cfg(unix)]
#[test]
fn a_symlink_loop_is_a_located_error() {
    // A data path that is a symbolic link to itself cannot be read; the error names it.
    let scratch = Scratch::new("bad-symlink-loop");
    copy_tree(&root().join("tests/cases/base"), &scratch.path);
    let path = scratch.path.join("data/subjects.csv");
    std::fs::remove_file(&path).expect("remove");
    std::os::unix::fs::symlink("subjects.csv", &path).expect("make a symlink loop");
    let outcome = cairn(&scratch.path, &["run", "plan.yaml", "--out", "out"]);
    assert_eq!(outcome.code, 2, "{}", outcome.stderr);
    assert!(
        outcome
            .stderr
            .starts_with("error: data/subjects.csv: file access:"),
        "{}",
        outcome.stderr
    );
    assert!(!scratch.path.join("out").exists());
}

#[test]
fn a_data_file_beyond_the_size_limit_is_refused_before_reading() {
    // A sparse file just over the documented limit (README, "Limits"): refused from its size alone.
    let scratch = Scratch::new("bad-large-file");
    copy_tree(&root().join("tests/cases/base"), &scratch.path);
    let file = std::fs::OpenOptions::new()
        .write(true)
        .open(scratch.path.join("data/subjects.csv"))
        .expect("open");
    file.set_len(cairn::data::MAX_FILE_BYTES + 1)
        .expect("grow the file sparsely");
    drop(file);
    let outcome = cairn(&scratch.path, &["check", "plan.yaml"]);
    assert_eq!(outcome.code, 2, "{}", outcome.stderr);
    assert!(
        outcome
            .stderr
            .starts_with("error: data/subjects.csv: limit:"),
        "{}",
        outcome.stderr
    );
}
