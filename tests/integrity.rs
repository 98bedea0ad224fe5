//! Integrity of a run: tampering with any input or output is detected by
//! `verify` or by the lock chain, naming the file; a dry run reveals no real
//! treatment effect.

mod common;

use common::{Outcome, Scratch, cairn, copy_tree, read_json, root};
use proptest::prelude::*;
use std::path::Path;

fn demo_study(label: &str) -> Scratch {
    let study = Scratch::new(label);
    std::fs::copy(
        root().join("plans/demo/plan.yaml"),
        study.path.join("plan.yaml"),
    )
    .expect("copy plan");
    copy_tree(&root().join("plans/demo/data"), &study.path.join("data"));
    study
}

fn base_study(label: &str) -> Scratch {
    let study = Scratch::new(label);
    copy_tree(&root().join("tests/cases/base"), &study.path);
    study
}

/// Flip the bits of one byte of `file` (XOR with a non-zero mask).
fn flip(file: &Path, position: usize, mask: u8) {
    let mut bytes = std::fs::read(file).expect("read file to tamper with");
    let index = position % bytes.len();
    bytes[index] ^= mask.max(1);
    std::fs::write(file, bytes).expect("write tampered file");
}

/// Whether a failed verification (or a refused one) names `file`.
fn detected(outcome: &Outcome, file: &str) -> bool {
    outcome.code != 0 && (outcome.stdout.contains(file) || outcome.stderr.contains(file))
}

/// Every file of a finished, locked study: inputs (relative to the study) and outputs (relative to out/).
fn files_of(study: &Scratch) -> (Vec<String>, Vec<String>) {
    let inputs = vec![
        "plan.yaml".to_string(),
        "plan.lock.yaml".to_string(),
        "data/subjects.csv".to_string(),
        "data/allocation.csv".to_string(),
    ];
    let manifest = read_json(&study.path.join("out/manifest.json"));
    let mut outputs: Vec<String> = manifest["outputs"]
        .as_array()
        .expect("outputs")
        .iter()
        .filter_map(|entry| entry["file"].as_str().map(str::to_string))
        .collect();
    outputs.push("manifest.json".to_string());
    (inputs, outputs)
}

fn prepare(study: &Scratch) {
    assert_eq!(
        cairn(
            &study.path,
            &[
                "lock",
                "plan.yaml",
                "--by",
                "tester",
                "--reason",
                "integrity test"
            ]
        )
        .code,
        0
    );
    let outcome = cairn(&study.path, &["run", "plan.yaml", "--out", "out"]);
    assert_eq!(outcome.code, 0, "{}", outcome.stderr);
    assert_eq!(
        cairn(&study.path, &["verify", "out", "--plan", "plan.yaml"]).code,
        0,
        "an untouched run verifies"
    );
}

#[test]
fn tampering_with_any_file_of_the_demo_is_detected_and_named() {
    let study = demo_study("tamper-demo");
    prepare(&study);
    let (inputs, outputs) = files_of(&study);
    let pristine = Scratch::new("tamper-demo-pristine");
    copy_tree(&study.path, &pristine.path);
    for (index, file) in inputs
        .iter()
        .map(|file| (file.clone(), file.clone()))
        .chain(
            outputs
                .iter()
                .map(|file| (format!("out/{file}"), file.clone())),
        )
        .enumerate()
    {
        let (path, name) = file;
        flip(&study.path.join(&path), 7919 * (index + 1), 0x20);
        let outcome = cairn(&study.path, &["verify", "out", "--plan", "plan.yaml"]);
        assert!(
            detected(&outcome, &name),
            "a flipped byte in {path} went unnoticed or unnamed: exit {}, stdout {}, stderr {}",
            outcome.code,
            outcome.stdout,
            outcome.stderr
        );
        // Restore everything for the next file.
        let _ = std::fs::remove_dir_all(&study.path);
        copy_tree(&pristine.path, &study.path);
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 48, .. ProptestConfig::default() })]
    #[test]
    fn any_flipped_byte_in_any_file_is_detected(which in 0usize..64, position in 0usize..100_000, mask in 1u8..=255) {
        let study = base_study("tamper-base");
        prepare(&study);
        let (inputs, outputs) = files_of(&study);
        let all: Vec<(String, String)> = inputs.iter().map(|file| (file.clone(), file.clone())).chain(outputs.iter().map(|file| (format!("out/{file}"), file.clone()))).collect();
        let (path, name) = &all[which % all.len()];
        flip(&study.path.join(path), position, mask);
        let outcome = cairn(&study.path, &["verify", "out", "--plan", "plan.yaml"]);
        prop_assert!(detected(&outcome, name), "flip at {} of {} not detected: exit {}, {} {}", position, path, outcome.code, outcome.stdout, outcome.stderr);
    }
}

#[test]
fn a_dry_run_reveals_no_real_treatment_effect() {
    // Invented data with a planted, large effect of the high dose (−40 points).
    let study = base_study("dry-run-leak");
    let allocation =
        std::fs::read_to_string(study.path.join("data/allocation.csv")).expect("allocation");
    let mut subjects = String::from("USUBJID,SITE,FASFL,BASE,SCORE\n");
    let mut allocation_out = String::from("USUBJID,ARM\n");
    let arms = ["placebo", "low", "high"];
    for index in 0..60 {
        let arm = arms[index % 3];
        let effect = match arm {
            "high" => -40.0,
            "low" => -15.0,
            _ => 0.0,
        };
        let noise = ((index * 37) % 11) as f64 / 5.0 - 1.0;
        subjects.push_str(&format!(
            "T{index:03},{},Y,{:.1},{:.2}\n",
            if index % 2 == 0 { "A" } else { "B" },
            20.0 + (index % 7) as f64,
            60.0 + effect + noise
        ));
        allocation_out.push_str(&format!("T{index:03},{arm}\n"));
    }
    let _ = allocation;
    std::fs::write(study.path.join("data/subjects.csv"), subjects).expect("write");
    std::fs::write(study.path.join("data/allocation.csv"), allocation_out).expect("write");

    assert_eq!(
        cairn(&study.path, &["run", "plan.yaml", "--out", "real"]).code,
        0
    );
    let real = read_json(&study.path.join("real/results.json"));
    let real_effect = real["analyses"][0]["contrasts"][1]["estimate"]["estimate"]
        .as_f64()
        .expect("real estimate");
    assert!(
        (real_effect + 40.0).abs() < 2.0,
        "the planted effect is found by the real run: {real_effect}"
    );

    // The dry run must not read the allocation file: remove it.
    std::fs::remove_file(study.path.join("data/allocation.csv")).expect("remove allocation");
    let outcome = cairn(
        &study.path,
        &["dry-run", "plan.yaml", "--out", "shell", "--seed", "11"],
    );
    assert_eq!(
        outcome.code, 0,
        "the dry run works without the allocation file: {}",
        outcome.stderr
    );
    let shell = read_json(&study.path.join("shell/results.json"));
    for contrast in shell["analyses"][0]["contrasts"]
        .as_array()
        .expect("contrasts")
    {
        assert!(
            contrast["estimate"].is_null(),
            "a dry-run contrast carries an estimate"
        );
    }
    // No number anywhere in the shell outputs is near a real contrast estimate or limit.
    let mut real_numbers = Vec::new();
    for contrast in real["analyses"][0]["contrasts"]
        .as_array()
        .expect("contrasts")
    {
        for key in ["estimate", "lower", "upper", "statistic"] {
            real_numbers.push(contrast["estimate"][key].as_f64().expect("number"));
        }
    }
    let mut shell_numbers = Vec::new();
    collect_numbers(&shell, &mut shell_numbers);
    for table in std::fs::read_dir(study.path.join("shell/tables")).expect("tables") {
        let text = std::fs::read_to_string(table.expect("entry").path()).expect("table");
        shell_numbers.extend(
            text.split([',', '\n'])
                .filter_map(|cell| cell.parse::<f64>().ok()),
        );
    }
    for real_number in &real_numbers {
        for shell_number in &shell_numbers {
            // A real estimate reproduced to three significant digits would be a leak; the
            // blinded data's own summaries (intercept, covariate slopes) may lie anywhere else.
            assert!(
                (shell_number - real_number).abs() > 1e-3 * real_number.abs().max(1.0),
                "the dry run shows {shell_number}, close to the real {real_number}"
            );
        }
    }
    let report = std::fs::read_to_string(study.path.join("shell/report.md")).expect("report");
    for real_number in &real_numbers {
        assert!(
            !report.contains(&format!("{real_number:.2}")),
            "the shell report prints a real number {real_number:.2}"
        );
    }
    assert!(report.contains("Blinded dry run"));
}

fn collect_numbers(value: &serde_json::Value, into: &mut Vec<f64>) {
    match value {
        serde_json::Value::Number(number) => into.extend(number.as_f64()),
        serde_json::Value::Array(items) => {
            items.iter().for_each(|item| collect_numbers(item, into))
        }
        serde_json::Value::Object(map) => map.values().for_each(|item| collect_numbers(item, into)),
        _ => {}
    }
}
