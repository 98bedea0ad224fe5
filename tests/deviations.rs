//! The deviation catalogue (README, "Deviation codes"): every code the tool
//! can raise is triggered here on a small constructed study, and the test
//! asserts that it appears in results.json and in the report's first
//! section, before any analysis.

mod common;

use common::{Scratch, cairn, copy_tree, read_json, root};
use serde_json::Value;

fn base(label: &str) -> Scratch {
    let scratch = Scratch::new(label);
    copy_tree(&root().join("tests/cases/base"), &scratch.path);
    scratch
}

fn edit(study: &Scratch, file: &str, find: &str, replace: &str) {
    let path = study.path.join(file);
    let text = std::fs::read_to_string(&path).expect("read");
    assert_eq!(
        text.matches(find).count(),
        1,
        "edit target {find:?} must occur once in {file}"
    );
    std::fs::write(&path, text.replacen(find, replace, 1)).expect("write");
}

fn run(study: &Scratch, arguments: &[&str]) -> Value {
    let outcome = cairn(&study.path, arguments);
    assert_eq!(outcome.code, 0, "{}", outcome.stderr);
    let out = arguments
        .iter()
        .position(|argument| *argument == "--out")
        .map(|position| arguments[position + 1])
        .unwrap_or("out");
    read_json(&study.path.join(out).join("results.json"))
}

/// Assert that `code` is among the deviations, with the expected severity,
/// and that the report lists it before the first analysis section.
fn assert_flagged(study: &Scratch, results: &Value, code: &str, severity: &str, out: &str) {
    let deviations = results["deviations"].as_array().expect("deviations");
    let found = deviations
        .iter()
        .find(|deviation| deviation["code"] == code);
    let Some(found) = found else {
        panic!(
            "{code} not raised; raised: {:?}",
            deviations
                .iter()
                .map(|d| d["code"].clone())
                .collect::<Vec<_>>()
        )
    };
    assert_eq!(found["severity"], severity, "severity of {code}");
    let report = std::fs::read_to_string(study.path.join(out).join("report.md")).expect("report");
    let at = report
        .find(code)
        .unwrap_or_else(|| panic!("{code} missing from report.md"));
    let section = report.find("## 2. Subjects").expect("subjects section");
    assert!(
        at < section,
        "{code} must be listed in section 1, before the subject flow and the analyses"
    );
}

#[test]
fn lock_absent() {
    let study = base("dev-lock-absent");
    let results = run(&study, &["run", "plan.yaml", "--out", "out"]);
    assert_flagged(&study, &results, "LOCK-ABSENT", "major", "out");
}

#[test]
fn lock_mismatch_and_tool_version() {
    let study = base("dev-lock");
    assert_eq!(
        cairn(
            &study.path,
            &["lock", "plan.yaml", "--by", "tester", "--reason", "first"]
        )
        .code,
        0
    );
    // Rewrite the record as if another cairn version had sealed it, keeping the chain valid.
    let path = study.path.join("plan.lock.yaml");
    let mut lock: cairn::provenance::lock::LockFile =
        serde_yaml::from_str(&std::fs::read_to_string(&path).expect("lock")).expect("parse");
    lock.records[0].tool_version = "0.0.1".to_string();
    lock.records[0].record_sha256 = lock.records[0].computed_hash().expect("hash");
    std::fs::write(&path, serde_yaml::to_string(&lock).expect("yaml")).expect("write");
    let results = run(&study, &["run", "plan.yaml", "--out", "out"]);
    assert_flagged(&study, &results, "LOCK-TOOL-VERSION", "minor", "out");
    edit(
        &study,
        "plan.yaml",
        "title: Base case for the error catalogue",
        "title: Base case, edited after locking",
    );
    let results = run(&study, &["run", "plan.yaml", "--out", "out2"]);
    assert_flagged(&study, &results, "LOCK-MISMATCH", "critical", "out2");
}

#[test]
fn subjects_unmatched() {
    let study = base("dev-unmatched");
    edit(
        &study,
        "plan.yaml",
        "  missing: [\"\", \"NA\"]\n",
        "  missing: [\"\", \"NA\"]\n  unmatched-subjects: exclude\n",
    );
    edit(&study, "data/allocation.csv", "S12,high\n", "");
    let results = run(&study, &["run", "plan.yaml", "--out", "out"]);
    assert_flagged(&study, &results, "SUBJECTS-UNMATCHED", "major", "out");
    assert_eq!(results["subjects"]["only_in_subjects_file"][0], "S12");
}

#[test]
fn term_aliased() {
    let study = base("dev-aliased");
    // A covariate that equals BASE exactly is aliased with it.
    let text = std::fs::read_to_string(study.path.join("data/subjects.csv")).expect("read");
    let mut doubled = String::new();
    for (index, line) in text.lines().enumerate() {
        let base = line.split(',').nth(3).unwrap_or("");
        doubled.push_str(&format!(
            "{line},{}\n",
            if index == 0 { "BASE2" } else { base }
        ));
    }
    std::fs::write(study.path.join("data/subjects.csv"), doubled).expect("write");
    edit(
        &study,
        "plan.yaml",
        "  BASE: {kind: numeric}\n",
        "  BASE: {kind: numeric}\n  BASE2: {kind: numeric}\n",
    );
    edit(
        &study,
        "plan.yaml",
        "covariates: [BASE]",
        "covariates: [BASE, BASE2]",
    );
    let results = run(&study, &["run", "plan.yaml", "--out", "out"]);
    assert_flagged(&study, &results, "TERM-ALIASED", "major", "out");
    assert!(
        results["deviations"][1]["message"]
            .as_str()
            .unwrap_or("")
            .contains("BASE2")
    );
}

#[test]
fn fit_failed_and_hypothesis_untestable() {
    let study = base("dev-fit-failed");
    // A binary endpoint with no events in one arm is separated; no fallback is planned.
    let text = std::fs::read_to_string(study.path.join("data/subjects.csv")).expect("read");
    let allocation = std::fs::read_to_string(study.path.join("data/allocation.csv")).expect("read");
    let arms: Vec<String> = allocation
        .lines()
        .skip(1)
        .map(|line| line.split(',').nth(1).unwrap_or("").to_string())
        .collect();
    let mut with_event = String::new();
    for (index, line) in text.lines().enumerate() {
        let event = if index == 0 {
            "EVENT".to_string()
        } else if arms[index - 1] == "high" {
            "N".to_string()
        } else if index % 2 == 0 {
            "Y".to_string()
        } else {
            "N".to_string()
        };
        with_event.push_str(&format!("{line},{event}\n"));
    }
    std::fs::write(study.path.join("data/subjects.csv"), with_event).expect("write");
    edit(
        &study,
        "plan.yaml",
        "  SCORE: {kind: numeric}\n",
        "  SCORE: {kind: numeric}\n  EVENT: {kind: factor, levels: [\"Y\", \"N\"]}\n",
    );
    edit(
        &study,
        "plan.yaml",
        "endpoint: {column: SCORE, kind: continuous, higher-is: worse}",
        "endpoint: {column: EVENT, kind: binary, event: \"Y\", higher-is: worse}",
    );
    edit(
        &study,
        "plan.yaml",
        "model: {family: linear}",
        "model: {family: binomial}",
    );
    edit(
        &study,
        "plan.yaml",
        "    covariates: [BASE]\n    strata: [SITE]\n",
        "",
    );
    std::fs::write(
        study.path.join("plan.yaml"),
        std::fs::read_to_string(study.path.join("plan.yaml")).expect("read")
            + "multiplicity:\n  procedure: holm\n  hypotheses:\n    - {id: H1, analysis: primary, contrast: high-vs-placebo}\n    - {id: H2, analysis: primary, contrast: low-vs-placebo}\n",
    )
    .expect("write");
    let results = run(&study, &["run", "plan.yaml", "--out", "out"]);
    assert_flagged(&study, &results, "FIT-FAILED", "critical", "out");
    assert_flagged(&study, &results, "HYPOTHESIS-UNTESTABLE", "critical", "out");
    assert_eq!(results["analyses"][0]["status"], "failed");
    assert!(
        results["analyses"][0]["failure"]
            .as_str()
            .unwrap_or("")
            .contains("separation")
    );
    assert_eq!(results["multiplicity"]["hypotheses"][0]["rejected"], false);
    assert_eq!(
        results["multiplicity"]["hypotheses"][0]["analysis_failed"],
        true
    );

    // With the remedy planned, the fallback is used and flagged instead.
    edit(
        &study,
        "plan.yaml",
        "    contrasts: each-vs-reference\n",
        "    contrasts: each-vs-reference\n    fallbacks:\n      - {when: separation, use: firth}\n",
    );
    let results = run(&study, &["run", "plan.yaml", "--out", "out2"]);
    assert_flagged(&study, &results, "FALLBACK-USED", "minor", "out2");
    assert_eq!(results["analyses"][0]["status"], "fitted");
}

#[test]
fn check_failed() {
    let study = base("dev-check");
    // A treatment effect that reverses between the two sites fails the treatment-by-stratum check.
    let allocation = std::fs::read_to_string(study.path.join("data/allocation.csv")).expect("read");
    let arms: Vec<String> = allocation
        .lines()
        .skip(1)
        .map(|line| line.split(',').nth(1).unwrap_or("").to_string())
        .collect();
    let mut text = String::from("USUBJID,SITE,FASFL,BASE,SCORE\n");
    for (index, arm) in arms.iter().enumerate() {
        let site = if index < 6 { "A" } else { "B" };
        let effect = match (arm.as_str(), site) {
            ("high", "A") => -8.0,
            ("high", "B") => 8.0,
            _ => 0.0,
        };
        let noise = [0.3, -0.2, 0.1, -0.4, 0.2, 0.0][index % 6];
        text.push_str(&format!(
            "S{:02},{site},Y,{:.1},{:.2}\n",
            index + 1,
            20.0 + index as f64,
            15.0 + effect + noise
        ));
    }
    std::fs::write(study.path.join("data/subjects.csv"), text).expect("write");
    edit(
        &study,
        "plan.yaml",
        "    contrasts: each-vs-reference\n",
        "    contrasts: each-vs-reference\n    checks: [treatment-by-stratum]\n",
    );
    let results = run(&study, &["run", "plan.yaml", "--out", "out"]);
    assert_flagged(&study, &results, "CHECK-FAILED", "minor", "out");
}

#[test]
fn command_line_override() {
    let study = base("dev-override");
    edit(
        &study,
        "plan.yaml",
        "analyses:\n  - id: primary\n",
        "analyses:\n  - id: other\n    endpoint: {column: BASE, kind: continuous, higher-is: worse}\n    population: full-analysis\n    model: {family: linear}\n    contrasts: each-vs-reference\n  - id: primary\n",
    );
    let results = run(
        &study,
        &["run", "plan.yaml", "--out", "out", "--only", "primary"],
    );
    assert_flagged(&study, &results, "COMMAND-LINE-OVERRIDE", "major", "out");
    assert_eq!(results["analyses"][0]["status"], "not run");
    assert_eq!(results["run"]["only"][0], "primary");
}

#[test]
fn data_and_plan_changed_since_dry_run() {
    let study = base("dev-dry-run");
    assert_eq!(
        cairn(
            &study.path,
            &["dry-run", "plan.yaml", "--out", "shell", "--seed", "7"]
        )
        .code,
        0
    );
    edit(
        &study,
        "data/subjects.csv",
        "S04,A,Y,19.8,12.2",
        "S04,A,Y,19.8,12.3",
    );
    edit(
        &study,
        "plan.yaml",
        "title: Base case for the error catalogue",
        "title: Base case, edited after the dry run",
    );
    let results = run(&study, &["run", "plan.yaml", "--out", "out"]);
    assert_flagged(
        &study,
        &results,
        "DATA-CHANGED-SINCE-DRY-RUN",
        "major",
        "out",
    );
    assert_flagged(
        &study,
        &results,
        "PLAN-CHANGED-SINCE-DRY-RUN",
        "minor",
        "out",
    );
    assert!(
        results["inputs"]
            .as_array()
            .expect("inputs")
            .iter()
            .any(|input| input["role"] == "dry-run record")
    );
}

#[test]
fn value_out_of_range() {
    let study = base("dev-range");
    edit(
        &study,
        "plan.yaml",
        "  BASE: {kind: numeric}",
        "  BASE: {kind: numeric, range: [0, 25]}",
    );
    let results = run(&study, &["run", "plan.yaml", "--out", "out"]);
    assert_flagged(&study, &results, "VALUE-OUT-OF-RANGE", "major", "out");
    let message = results["deviations"]
        .as_array()
        .expect("deviations")
        .iter()
        .find(|d| d["code"] == "VALUE-OUT-OF-RANGE")
        .expect("found")["message"]
        .as_str()
        .unwrap_or("")
        .to_string();
    assert!(
        message.contains("data/subjects.csv:4"),
        "the message names where: {message}"
    );
}

#[test]
fn missing_above_plan() {
    let study = base("dev-missing");
    edit(
        &study,
        "data/subjects.csv",
        "S04,A,Y,19.8,12.2",
        "S04,A,Y,19.8,NA",
    );
    edit(
        &study,
        "data/subjects.csv",
        "S05,A,Y,30.2,21.7",
        "S05,A,Y,30.2,NA",
    );
    edit(
        &study,
        "plan.yaml",
        "    contrasts: each-vs-reference\n",
        "    contrasts: each-vs-reference\n    max-excluded: 0.1\n",
    );
    let results = run(&study, &["run", "plan.yaml", "--out", "out"]);
    assert_flagged(&study, &results, "MISSING-ABOVE-PLAN", "major", "out");
}

#[test]
fn every_documented_code_has_a_test_here() {
    // The README's catalogue and this file must list the same codes.
    let readme = std::fs::read_to_string(root().join("README.md")).expect("README");
    let section = readme
        .split("### Deviation codes")
        .nth(1)
        .expect("catalogue section")
        .split("\n## ")
        .next()
        .unwrap_or("");
    let this_file = std::fs::read_to_string(root().join("tests/deviations.rs")).expect("this file");
    let mut codes = Vec::new();
    for line in section.lines().filter(|line| line.starts_with("| `")) {
        let code = line.split('`').nth(1).unwrap_or("").to_string();
        codes.push(code);
    }
    assert!(
        codes.len() >= 14,
        "the catalogue lists {} codes",
        codes.len()
    );
    for code in codes {
        assert!(
            this_file.matches(&format!("\"{code}\"")).count() >= 1,
            "no test triggers {code}"
        );
    }
}

#[test]
fn partial_proportional_odds_fallback() {
    // Invented ordinal data in which the high dose pushes subjects out of both
    // extreme categories (non-proportional odds for treatment).
    let study = base("dev-ppo");
    let mut subjects = String::from("USUBJID,SITE,FASFL,BASE,SCORE,GRADE\n");
    let mut allocation = String::from("USUBJID,ARM\n");
    let arms = ["placebo", "low", "high"];
    for index in 0..180 {
        let arm = arms[index % 3];
        let draw = (index * 7919 + 13) % 10;
        let grade = match arm {
            "high" => ["g2", "g2", "g2", "g2", "g2", "g2", "g2", "g3", "g1", "g2"][draw],
            "low" => ["g1", "g2", "g3", "g1", "g2", "g3", "g2", "g1", "g3", "g2"][draw],
            _ => ["g1", "g1", "g3", "g3", "g1", "g2", "g3", "g1", "g3", "g2"][draw],
        };
        subjects.push_str(&format!(
            "P{index:03},{},Y,20.0,10.0,{grade}\n",
            if index % 2 == 0 { "A" } else { "B" }
        ));
        allocation.push_str(&format!("P{index:03},{arm}\n"));
    }
    std::fs::write(study.path.join("data/subjects.csv"), subjects).expect("write");
    std::fs::write(study.path.join("data/allocation.csv"), allocation).expect("write");
    edit(
        &study,
        "plan.yaml",
        "  SCORE: {kind: numeric}\n",
        "  SCORE: {kind: numeric}\n  GRADE: {kind: ordinal, levels: [g1, g2, g3]}\n",
    );
    edit(
        &study,
        "plan.yaml",
        "endpoint: {column: SCORE, kind: continuous, higher-is: worse}",
        "endpoint: {column: GRADE, kind: ordinal, higher-is: worse}",
    );
    edit(
        &study,
        "plan.yaml",
        "model: {family: linear}",
        "model: {family: cumulative}",
    );
    edit(&study, "plan.yaml", "    covariates: [BASE]\n", "");
    edit(
        &study,
        "plan.yaml",
        "    contrasts: each-vs-reference\n",
        "    contrasts: each-vs-reference\n    checks: [proportional-odds]\n    fallbacks:\n      - {when: non-proportional-odds, use: partial-proportional-odds}\n",
    );
    std::fs::write(
        study.path.join("plan.yaml"),
        std::fs::read_to_string(study.path.join("plan.yaml")).expect("read")
            + "multiplicity:\n  procedure: bonferroni\n  hypotheses:\n    - {id: H1, analysis: primary, contrast: high-vs-placebo}\n",
    )
    .expect("write");
    let results = run(&study, &["run", "plan.yaml", "--out", "out"]);
    assert_flagged(&study, &results, "FALLBACK-USED", "minor", "out");
    let contrasts = results["analyses"][0]["contrasts"]
        .as_array()
        .expect("contrasts");
    // Two contrasts, each at both cut-points, named by the cut-point.
    assert_eq!(contrasts.len(), 4);
    assert_eq!(contrasts[0]["category"], "above g1");
    assert_eq!(contrasts[1]["category"], "above g2");
    // The high dose raises the odds above g1 and lowers them above g2.
    let high_above_g1 = contrasts[2]["estimate"]["estimate"]
        .as_f64()
        .expect("estimate");
    let high_above_g2 = contrasts[3]["estimate"]["estimate"]
        .as_f64()
        .expect("estimate");
    assert!(
        high_above_g1 > 0.0 && high_above_g2 < 0.0,
        "{high_above_g1} {high_above_g2}"
    );
    // The hypothesis takes the joint test of the contrast over both cut-points.
    let joint = contrasts[2]["joint_test"]["p_value"]
        .as_f64()
        .expect("joint p");
    assert_eq!(
        results["multiplicity"]["hypotheses"][0]["raw_p"].as_f64(),
        Some(joint)
    );
    assert_eq!(contrasts[2]["joint_test"]["df1"].as_f64(), Some(2.0));
}
