//! The demo study end to end: plans/demo/plan.yaml is copied to a scratch
//! folder and run with the binary; the outputs must match golden/ byte for
//! byte, the report must print the SHA-256 of the plan's bytes, and the
//! manifest must list every output with its hash.
//!
//! After an intended change to the report or the numbers, regenerate with
//! `UPDATE_GOLDEN=1 cargo test --test demo_run` and review `git diff golden/`.

mod common;

use common::{Scratch, cairn, copy_tree, read_json, root};

/// A copy of the demo study as committed: the plan, its lock record if any,
/// and the data (not the audit log or dry-run record a local run may leave).
fn demo_copy(label: &str) -> Scratch {
    let study = Scratch::new(label);
    for file in ["plan.yaml", "plan.lock.yaml"] {
        let source = root().join("plans/demo").join(file);
        if source.exists() {
            std::fs::copy(&source, study.path.join(file)).expect("copy demo file");
        }
    }
    copy_tree(&root().join("plans/demo/data"), &study.path.join("data"));
    study
}

const GOLDEN_FILES: [&str; 3] = ["report.md", "report.html", "results.json"];

#[test]
fn the_demo_matches_its_golden_outputs() {
    let study = demo_copy("demo");
    let outcome = cairn(&study.path, &["run", "plan.yaml", "--out", "out"]);
    assert_eq!(outcome.code, 0, "{}", outcome.stderr);
    let golden = root().join("golden");
    let update = std::env::var("UPDATE_GOLDEN").as_deref() == Ok("1");
    let mut differing = Vec::new();
    for file in GOLDEN_FILES {
        let fresh = std::fs::read(study.path.join("out").join(file)).expect("fresh output");
        let expected_path = golden.join(file);
        if update {
            std::fs::create_dir_all(&golden).expect("golden folder");
            std::fs::write(&expected_path, &fresh).expect("write golden");
        } else if std::fs::read(&expected_path).ok().as_deref() != Some(fresh.as_slice()) {
            differing.push(file);
        }
    }
    assert!(
        differing.is_empty(),
        "{differing:?} differ from golden/; if the change is intended, run `UPDATE_GOLDEN=1 cargo test --test demo_run` and review the diff"
    );
}

#[test]
fn the_demo_report_prints_the_hash_of_the_plan_and_a_complete_manifest() {
    let study = demo_copy("demo-hash");
    assert_eq!(
        cairn(&study.path, &["run", "plan.yaml", "--out", "out"]).code,
        0
    );
    let plan_hash = cairn::provenance::sha256_hex(
        &std::fs::read(root().join("plans/demo/plan.yaml")).expect("plan"),
    );
    let report = std::fs::read_to_string(study.path.join("out/report.md")).expect("report");
    assert!(
        report.contains(&plan_hash),
        "report.md must print the plan's SHA-256"
    );
    let html = std::fs::read_to_string(study.path.join("out/report.html")).expect("html");
    assert!(
        html.contains(&plan_hash),
        "report.html must print the plan's SHA-256"
    );
    for text in [&report, &html] {
        assert!(
            text.contains("do not replace, review by a qualified statistician"),
            "the caution must be in every report"
        );
    }
    // Self-contained: no scripts, no external resources.
    for forbidden in [
        "<script", "http://", "https://", "<link", "@import", "src=\"",
    ] {
        assert!(
            !html.contains(forbidden),
            "report.html contains {forbidden}"
        );
    }
    let manifest = read_json(&study.path.join("out/manifest.json"));
    let listed: Vec<&str> = manifest["outputs"]
        .as_array()
        .expect("outputs")
        .iter()
        .filter_map(|entry| entry["file"].as_str())
        .collect();
    for file in [
        "report.md",
        "report.html",
        "results.json",
        "tables/subject-flow.csv",
        "tables/easi-change-contrasts.csv",
    ] {
        assert!(listed.contains(&file), "manifest lacks {file}");
    }
    let results = read_json(&study.path.join("out/results.json"));
    for analysis in results["analyses"].as_array().expect("analyses") {
        assert_eq!(
            analysis["status"], "fitted",
            "analysis {} did not fit",
            analysis["id"]
        );
    }
}

/// Every file of a folder, by path relative to it, in sorted order.
fn files_of(folder: &std::path::Path) -> Vec<(String, Vec<u8>)> {
    let mut files = Vec::new();
    let mut pending = vec![folder.to_path_buf()];
    while let Some(current) = pending.pop() {
        for entry in std::fs::read_dir(&current).expect("read folder") {
            let path = entry.expect("folder entry").path();
            if path.is_dir() {
                pending.push(path);
            } else {
                let name = path
                    .strip_prefix(folder)
                    .expect("inside the folder")
                    .display()
                    .to_string();
                files.push((name, std::fs::read(&path).expect("read output")));
            }
        }
    }
    files.sort();
    files
}

/// Common practice for reproducible output: the number of threads must not reach any byte.
/// The demo's analyses fitted four at a time give the same outputs as one after another, and
/// `verify` with several threads accepts a run made with one.
#[test]
fn fitting_analyses_in_parallel_changes_no_output_byte() {
    let study = demo_copy("demo-jobs");
    let one = cairn(&study.path, &["run", "plan.yaml", "--out", "one"]);
    assert_eq!(one.code, 0, "{}", one.stderr);
    let four = cairn(
        &study.path,
        &["run", "plan.yaml", "--out", "four", "--jobs", "4"],
    );
    assert_eq!(four.code, 0, "{}", four.stderr);
    let (from_one, from_four) = (
        files_of(&study.path.join("one")),
        files_of(&study.path.join("four")),
    );
    assert!(
        from_one.len() >= 4,
        "the run wrote {} files",
        from_one.len()
    );
    let names = |files: &[(String, Vec<u8>)]| {
        files
            .iter()
            .map(|(name, _)| name.clone())
            .collect::<Vec<_>>()
    };
    assert_eq!(names(&from_one), names(&from_four));
    for ((name, bytes_one), (_, bytes_four)) in from_one.iter().zip(&from_four) {
        assert!(
            bytes_one == bytes_four,
            "{name} differs between --jobs 1 and --jobs 4"
        );
    }
    let verified = cairn(&study.path, &["verify", "one", "--jobs", "3"]);
    assert_eq!(verified.code, 0, "{}{}", verified.stdout, verified.stderr);
    let refused = cairn(
        &study.path,
        &["run", "plan.yaml", "--out", "none", "--jobs", "0"],
    );
    assert_ne!(refused.code, 0, "--jobs 0 was accepted");
    assert!(
        !study.path.join("none").exists(),
        "a refused run left an output folder"
    );
}
