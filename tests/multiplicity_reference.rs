//! Checks cairn's Bonferroni, Holm, Hochberg and Hommel adjusted p-values against two
//! reference libraries: R's stats::p.adjust (tests/reference/multiplicity/p_adjust_R-*.csv)
//! and statsmodels' multipletests (multipletests_statsmodels-*.csv), both produced by the
//! scripts beside them from p_value_vectors.csv. The two libraries agree with each other
//! bit for bit on every shared vector (checked below too), so cairn follows both.

use std::collections::BTreeMap;
use std::fs;
use std::path::PathBuf;

use cairn::multiplicity::{Procedure, Strategy, Workspace, apply};

/// Absolute agreement required by the brief; every value is a probability in [0, 1].
const ABSOLUTE_TOLERANCE: f64 = 1e-12;
const ALPHA: f64 = 0.05;

fn reference_folder() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("tests/reference/multiplicity")
}

/// The one file in the reference folder whose name starts with `prefix`.
fn reference_file(prefix: &str) -> PathBuf {
    let mut matches: Vec<PathBuf> = fs::read_dir(reference_folder())
        .expect("reference folder is readable")
        .map(|entry| entry.expect("directory entry").path())
        .filter(|path| {
            path.file_name()
                .and_then(|name| name.to_str())
                .is_some_and(|name| name.starts_with(prefix))
        })
        .collect();
    matches.sort();
    assert_eq!(
        matches.len(),
        1,
        "expected exactly one {prefix}* file, found {matches:?}"
    );
    matches.remove(0)
}

fn parse_optional(text: &str) -> Option<f64> {
    if text == "NA" {
        None
    } else {
        Some(text.parse().expect("a number or NA"))
    }
}

/// Per (vector, method): the raw p-values and the reference adjusted p-values, in order.
type Cases = BTreeMap<(String, String), Vec<(Option<f64>, Option<f64>)>>;

fn read_reference(prefix: &str) -> (String, Cases) {
    let path = reference_file(prefix);
    let text = fs::read_to_string(&path).expect("reference file is readable");
    let mut header = String::new();
    let mut cases = Cases::new();
    for line in text.lines() {
        if let Some(comment) = line.strip_prefix('#') {
            header.push_str(comment.trim());
            continue;
        }
        if line.starts_with("vector,") || line.is_empty() {
            continue;
        }
        let fields: Vec<&str> = line.split(',').collect();
        assert_eq!(fields.len(), 5, "bad line {line:?}");
        let entry = cases
            .entry((fields[0].to_string(), fields[3].to_string()))
            .or_default();
        let index: usize = fields[1].parse().expect("index");
        assert_eq!(index, entry.len() + 1, "rows of a vector are in order");
        entry.push((parse_optional(fields[2]), parse_optional(fields[4])));
    }
    (header, cases)
}

fn procedure_named(name: &str) -> Procedure {
    match name {
        "bonferroni" => Procedure::Bonferroni,
        "holm" => Procedure::Holm,
        "hochberg" => Procedure::Hochberg,
        "hommel" => Procedure::Hommel,
        other => panic!("unknown method {other}"),
    }
}

/// Compares cairn with one reference file; returns the largest absolute difference and
/// the number of values compared.
fn check_against(prefix: &str) -> (f64, usize) {
    let (header, cases) = read_reference(prefix);
    assert!(!cases.is_empty(), "no cases in {prefix}");
    let mut largest_difference = 0.0_f64;
    let mut compared = 0;
    let mut workspace = Workspace::new();
    for ((vector, method), rows) in &cases {
        let p_values: Vec<Option<f64>> = rows.iter().map(|row| row.0).collect();
        let strategy = Strategy::unweighted(procedure_named(method), p_values.len()).unwrap();
        let outcome = apply(&strategy, &p_values, ALPHA).unwrap();
        let fast = workspace
            .adjusted_p_values(&strategy, &p_values)
            .unwrap()
            .to_vec();
        for (index, ((raw, expected), result)) in rows.iter().zip(&outcome.hypotheses).enumerate() {
            assert_eq!(result.raw_p, *raw);
            assert_eq!(
                fast[index], result.adjusted_p,
                "fast path equals apply ({vector}, {method})"
            );
            match expected {
                // A failed analysis: the reference leaves it NA (p.adjust counts it in n);
                // cairn treats it as p = 1, so its adjusted p is 1 and it is retained.
                None => {
                    assert!(result.analysis_failed && !result.rejected);
                    assert_eq!(result.adjusted_p, 1.0);
                }
                Some(expected) => {
                    let difference = (result.adjusted_p - expected).abs();
                    assert!(
                        difference <= ABSOLUTE_TOLERANCE,
                        "{header}: {vector} {method} H{index}: cairn {} vs reference {expected}",
                        result.adjusted_p
                    );
                    largest_difference = largest_difference.max(difference);
                    compared += 1;
                    // Decisions at α agree with the reference's adjusted p, except where the
                    // reference sits within the tolerance of α and rounding may decide.
                    if (expected - ALPHA).abs() > ABSOLUTE_TOLERANCE {
                        assert_eq!(
                            result.rejected,
                            *expected <= ALPHA,
                            "{vector} {method} H{index}"
                        );
                    }
                }
            }
        }
    }
    eprintln!("{prefix}: {compared} values, largest absolute difference {largest_difference:e}");
    (largest_difference, compared)
}

/// Source: R stats::p.adjust (R 4.2.2; version in the file name and header).
#[test]
fn agrees_with_r_p_adjust() {
    let (_, compared) = check_against("p_adjust_R-");
    assert!(
        compared >= 4 * 70,
        "all four methods on every vector were compared"
    );
}

/// Source: statsmodels.stats.multitest.multipletests (version in the file name and header).
#[test]
fn agrees_with_statsmodels_multipletests() {
    let (_, compared) = check_against("multipletests_statsmodels-");
    assert!(compared >= 4 * 60);
}

/// The two references agree with each other exactly on every vector both cover; if a new
/// library version ever disagrees, this test says where (cairn follows R in that case).
#[test]
fn r_and_statsmodels_agree() {
    let (_, r_cases) = read_reference("p_adjust_R-");
    let (_, statsmodels_cases) = read_reference("multipletests_statsmodels-");
    for (key, rows) in &statsmodels_cases {
        let r_rows = r_cases.get(key).expect("R covers every statsmodels vector");
        for (ours, theirs) in rows.iter().zip(r_rows) {
            assert_eq!(ours, theirs, "{key:?}");
        }
    }
}

/// Rom (2013) Appendix A Example 2 under Hommel: the adjusted p of H(2) is exactly 0.05 in
/// real arithmetic (multiplicity-examples §8a) and R gives the double nearest 0.05; cairn
/// computes the same double and so rejects H(2) under p_adj ≤ α.
#[test]
fn hommel_boundary_case_is_rejected() {
    let strategy = Strategy::unweighted(Procedure::Hommel, 5).unwrap();
    let p = [0.009, 0.015, 0.025, 0.04, 0.2].map(Some);
    let outcome = apply(&strategy, &p, 0.05).unwrap();
    assert_eq!(outcome.hypotheses[1].adjusted_p, 0.05);
    let rejected: Vec<bool> = outcome.hypotheses.iter().map(|h| h.rejected).collect();
    assert_eq!(rejected, [true, true, false, false, false]);
}
