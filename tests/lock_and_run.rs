//! The lock record and its effect on a run, on the small base study in
//! tests/cases/base/: locking, amendments forming a hash chain, a plan changed
//! after locking flagged first in the report, tampering detected, and reruns
//! byte-identical whatever the folder, time zone or locale.

mod common;

use common::{Scratch, cairn, cairn_with_env, copy_tree, read_json, root};

fn base_study(label: &str) -> Scratch {
    let scratch = Scratch::new(label);
    copy_tree(&root().join("tests/cases/base"), &scratch.path);
    scratch
}

fn lock(scratch: &Scratch, reason: &str) -> common::Outcome {
    cairn(
        &scratch.path,
        &[
            "lock",
            "plan.yaml",
            "--by",
            "A. Statistician (trial statistician)",
            "--reason",
            reason,
        ],
    )
}

#[test]
fn an_unlocked_plan_runs_and_says_so_first() {
    let study = base_study("unlocked");
    let outcome = cairn(&study.path, &["run", "plan.yaml", "--out", "out"]);
    assert_eq!(outcome.code, 0, "{}", outcome.stderr);
    let results = read_json(&study.path.join("out/results.json"));
    assert_eq!(results["plan"]["lock_status"], "unlocked");
    assert_eq!(results["deviations"][0]["code"], "LOCK-ABSENT");
    let report = std::fs::read_to_string(study.path.join("out/report.md")).expect("report");
    let deviations_at = report.find("LOCK-ABSENT").expect("deviation in report");
    let first_analysis_at = report.find("## 3.").expect("analysis section");
    assert!(
        deviations_at < first_analysis_at,
        "deviations must come before the analyses"
    );
}

#[test]
fn locking_seals_the_plan_and_amendments_chain() {
    let study = base_study("lock");
    let outcome = lock(&study, "final plan before database lock");
    assert_eq!(outcome.code, 0, "{}", outcome.stderr);
    let lock_text = std::fs::read_to_string(study.path.join("plan.lock.yaml"))
        .expect("lock file beside the plan");
    let plan_bytes = std::fs::read(study.path.join("plan.yaml")).expect("plan");
    let plan_hash = cairn::provenance::sha256_hex(&plan_bytes);
    assert!(lock_text.contains(&format!("plan-sha256: {plan_hash}")));
    assert!(lock_text.contains("reason: final plan before database lock"));
    // The blinded subjects file is hashed at lock time.
    let subjects_hash = cairn::provenance::sha256_hex(
        &std::fs::read(study.path.join("data/subjects.csv")).expect("subjects"),
    );
    assert!(lock_text.contains(&subjects_hash));

    // Locking identical contents again is refused.
    let again = lock(&study, "again");
    assert_eq!(again.code, 2);
    assert!(again.stderr.contains("already locked"), "{}", again.stderr);

    // A locked plan runs without lock deviations.
    let run = cairn(&study.path, &["run", "plan.yaml", "--out", "out"]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let results = read_json(&study.path.join("out/results.json"));
    assert_eq!(results["plan"]["lock_status"], "locked");
    assert_eq!(results["deviations"].as_array().map(Vec::len), Some(0));
    assert_eq!(results["plan"]["sha256"], plan_hash.as_str());
    assert!(
        results["inputs"]
            .as_array()
            .expect("inputs")
            .iter()
            .any(|input| input["role"] == "lock record")
    );

    // Edit the plan after locking: the run flags it as critical, first.
    let mut edited = plan_bytes.clone();
    edited.extend_from_slice(b"# an edit after locking\n");
    std::fs::write(study.path.join("plan.yaml"), &edited).expect("edit plan");
    let run = cairn(
        &study.path,
        &["run", "plan.yaml", "--out", "out", "--force"],
    );
    assert_eq!(run.code, 0, "{}", run.stderr);
    let results = read_json(&study.path.join("out/results.json"));
    assert_eq!(results["plan"]["lock_status"], "changed-since-lock");
    assert_eq!(results["deviations"][0]["code"], "LOCK-MISMATCH");
    assert_eq!(results["deviations"][0]["severity"], "critical");

    // An amendment appends record 2, linked to record 1.
    let amend = lock(&study, "amendment 1: comment added");
    assert_eq!(amend.code, 0, "{}", amend.stderr);
    let lock_file: serde_yaml::Value = serde_yaml::from_str(
        &std::fs::read_to_string(study.path.join("plan.lock.yaml")).expect("lock"),
    )
    .expect("yaml");
    let records = lock_file["records"].as_sequence().expect("records");
    assert_eq!(records.len(), 2);
    assert_eq!(
        records[1]["previous-record-sha256"],
        records[0]["record-sha256"]
    );
    assert_eq!(records[1]["sequence"].as_u64(), Some(2));
}

#[test]
fn a_tampered_lock_record_stops_the_run_and_says_where() {
    let study = base_study("tamper");
    assert_eq!(lock(&study, "first").code, 0);
    std::fs::write(
        study.path.join("plan.yaml"),
        [
            std::fs::read(study.path.join("plan.yaml")).expect("plan"),
            b"# v2\n".to_vec(),
        ]
        .concat(),
    )
    .expect("edit");
    assert_eq!(lock(&study, "second").code, 0);
    let path = study.path.join("plan.lock.yaml");
    let text = std::fs::read_to_string(&path).expect("lock");
    std::fs::write(&path, text.replacen("reason: first", "reason: frist", 1)).expect("tamper");
    let run = cairn(&study.path, &["run", "plan.yaml", "--out", "out"]);
    assert_eq!(run.code, 2);
    assert!(
        run.stderr.contains("plan.lock.yaml") && run.stderr.contains("record 1 was edited"),
        "{}",
        run.stderr
    );
    assert!(!study.path.join("out").exists());

    // Removing the first record breaks the chain at the sequence check.
    let text =
        std::fs::read_to_string(&path)
            .expect("lock")
            .replacen("reason: frist", "reason: first", 1);
    let lock_file: serde_yaml::Value = serde_yaml::from_str(&text).expect("yaml");
    let mut trimmed = lock_file.clone();
    if let Some(records) = trimmed["records"].as_sequence_mut() {
        records.remove(0);
    }
    std::fs::write(&path, serde_yaml::to_string(&trimmed).expect("yaml")).expect("write");
    let run = cairn(&study.path, &["run", "plan.yaml", "--out", "out"]);
    assert_eq!(run.code, 2);
    assert!(
        run.stderr.contains("removed or reordered"),
        "{}",
        run.stderr
    );
}

#[test]
fn reruns_are_byte_identical_across_folders_time_zones_and_locales() {
    let first = base_study("rerun-a");
    let second = base_study("rerun-b");
    assert_eq!(
        cairn_with_env(
            &first.path,
            &["run", "plan.yaml", "--out", "out"],
            &[("TZ", "UTC"), ("LANG", "C")]
        )
        .code,
        0
    );
    assert_eq!(
        cairn_with_env(
            &second.path,
            &["run", "plan.yaml", "--out", "elsewhere/out"],
            &[
                ("TZ", "Asia/Kolkata"),
                ("LANG", "de_DE.UTF-8"),
                ("LC_ALL", "de_DE.UTF-8")
            ]
        )
        .code,
        0
    );
    let manifest_a = std::fs::read(first.path.join("out/manifest.json")).expect("manifest");
    let manifest_b =
        std::fs::read(second.path.join("elsewhere/out/manifest.json")).expect("manifest");
    assert_eq!(manifest_a, manifest_b, "manifests differ");
    let manifest = read_json(&first.path.join("out/manifest.json"));
    let outputs = manifest["outputs"].as_array().expect("outputs");
    assert!(outputs.len() >= 5);
    for output in outputs {
        let file = output["file"].as_str().expect("file");
        let a = std::fs::read(first.path.join("out").join(file)).expect("output a");
        let b = std::fs::read(second.path.join("elsewhere/out").join(file)).expect("output b");
        assert_eq!(a, b, "{file} differs between runs");
        assert_eq!(
            output["sha256"],
            cairn::provenance::sha256_hex(&a).as_str(),
            "manifest hash of {file}"
        );
    }
}

#[test]
fn the_output_folder_is_replaced_only_with_force() {
    let study = base_study("force");
    assert_eq!(
        cairn(&study.path, &["run", "plan.yaml", "--out", "out"]).code,
        0
    );
    std::fs::write(study.path.join("out/stale.txt"), "left from before").expect("write");
    let refused = cairn(&study.path, &["run", "plan.yaml", "--out", "out"]);
    assert_eq!(refused.code, 2);
    assert!(study.path.join("out/stale.txt").exists());
    assert_eq!(
        cairn(
            &study.path,
            &["run", "plan.yaml", "--out", "out", "--force"]
        )
        .code,
        0
    );
    assert!(
        !study.path.join("out/stale.txt").exists(),
        "--force replaces the whole folder"
    );
    assert!(study.path.join("out/report.html").exists());
}

#[test]
fn plan_hash_equals_sha256sum() {
    // sha256sum (GNU coreutils) is the reference the README promises; skip only where it is absent.
    let study = base_study("sha");
    let Ok(output) = std::process::Command::new("sha256sum")
        .arg("plan.yaml")
        .current_dir(&study.path)
        .output()
    else {
        eprintln!("sha256sum not found; skipping the comparison with it");
        return;
    };
    let printed = String::from_utf8_lossy(&output.stdout)
        .split_whitespace()
        .next()
        .unwrap_or("")
        .to_string();
    assert_eq!(
        cairn(&study.path, &["run", "plan.yaml", "--out", "out"]).code,
        0
    );
    let results = read_json(&study.path.join("out/results.json"));
    assert_eq!(results["plan"]["sha256"], printed.as_str());
    let report = std::fs::read_to_string(study.path.join("out/report.md")).expect("report");
    assert!(
        report.contains(&printed),
        "the report must print the plan's hash"
    );
}
