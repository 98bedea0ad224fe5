//! A design held as rows of non-zero entries (how cairn holds a large design, never forming the
//! dense matrix) gives the same analysis as the design held dense. The demo plan is run both
//! ways through the library: every number of a GLM, cumulative-link or multinomial analysis is
//! the same bits (their engines visit the same non-zeros in the same order either way), and a
//! linear analysis, whose row-block route is a different factorization of the same problem,
//! agrees to 1e-10 relative; the report shows the same text. The row-block route's own external
//! check is NIST StRD (tests/nist_strd.rs).

mod common;

use cairn::design::Layout;
use cairn::run::{Mode, RunOptions, load_inputs, produce};
use common::{Scratch, copy_tree, root};
use serde_json::Value;

fn outputs(plan: &std::path::Path, layout: Layout) -> Vec<(String, Vec<u8>)> {
    let inputs = load_inputs(plan, Mode::Unblinded).expect("the plan loads");
    let options = RunOptions {
        layout,
        ..RunOptions::default()
    };
    produce(&inputs, &options)
        .expect("the demo plan runs")
        .files()
        .to_vec()
}

fn file<'a>(files: &'a [(String, Vec<u8>)], name: &str) -> &'a [u8] {
    &files
        .iter()
        .find(|(path, _)| path == name)
        .unwrap_or_else(|| panic!("{name} is an output"))
        .1
}

/// Walks two JSON trees in step; numbers must be equal, or within `tolerance` relative when
/// `tolerance` is positive. Returns the number of numbers compared.
fn compare(a: &Value, b: &Value, tolerance: f64, path: &str) -> usize {
    match (a, b) {
        (Value::Object(x), Value::Object(y)) => {
            assert_eq!(
                x.keys().collect::<Vec<_>>(),
                y.keys().collect::<Vec<_>>(),
                "{path}"
            );
            x.iter()
                .map(|(key, value)| compare(value, &y[key], tolerance, &format!("{path}.{key}")))
                .sum()
        }
        (Value::Array(x), Value::Array(y)) => {
            assert_eq!(x.len(), y.len(), "{path}");
            x.iter()
                .zip(y)
                .enumerate()
                .map(|(index, (p, q))| compare(p, q, tolerance, &format!("{path}[{index}]")))
                .sum()
        }
        (Value::Number(x), Value::Number(y)) => {
            let (x, y) = (x.as_f64().expect("finite"), y.as_f64().expect("finite"));
            if tolerance > 0.0 {
                assert!(
                    (x - y).abs() <= tolerance * x.abs().max(y.abs()).max(1e-300),
                    "{path}: {x} against {y}"
                );
            } else {
                assert_eq!(x.to_bits(), y.to_bits(), "{path}: {x} against {y}");
            }
            1
        }
        _ => {
            assert_eq!(a, b, "{path}");
            0
        }
    }
}

#[test]
fn designs_held_as_rows_give_the_analyses_of_dense_designs() {
    let plan = root().join("plans/demo/plan.yaml");
    let dense = outputs(&plan, Layout::Dense);
    let rows = outputs(&plan, Layout::Rows);
    let parse = |files: &[(String, Vec<u8>)]| -> Value {
        serde_json::from_slice(file(files, "results.json")).expect("results.json parses")
    };
    let (dense_results, rows_results) = (parse(&dense), parse(&rows));
    let dense_analyses = dense_results["analyses"].as_array().expect("analyses");
    let rows_analyses = rows_results["analyses"].as_array().expect("analyses");
    assert_eq!(dense_analyses.len(), rows_analyses.len());
    let mut families = Vec::new();
    for (a, b) in dense_analyses.iter().zip(rows_analyses) {
        let family = a["model"]["family"].as_str().expect("a family").to_string();
        let tolerance = if family == "linear" { 1e-10 } else { 0.0 };
        let numbers = compare(a, b, tolerance, a["id"].as_str().expect("an id"));
        assert!(numbers > 10, "{family}: only {numbers} numbers compared");
        families.push(family);
    }
    for family in ["linear", "binomial", "poisson", "cumulative", "multinomial"] {
        assert!(
            families.iter().any(|f| f == family),
            "the demo has no {family} analysis ({families:?})"
        );
    }
    assert_eq!(
        String::from_utf8_lossy(file(&dense, "report.md")),
        String::from_utf8_lossy(file(&rows, "report.md")),
        "the report differs between the layouts"
    );
}

/// The negative binomial, which the demo reaches only as a fallback: its standardised means use
/// the influence-function variance, whose x_iᵀG products the rows route sums per row (the dense
/// route multiplies matrices), so those agree to rounding; everything else is the same bits.
#[test]
fn a_negative_binomial_analysis_held_as_rows_agrees_with_the_dense_one() {
    let study = Scratch::new("layouts-nb");
    copy_tree(&root().join("plans/demo/data"), &study.path.join("data"));
    let text = std::fs::read_to_string(root().join("plans/demo/plan.yaml")).expect("plan");
    let planned = "model: {family: poisson, exposure: DAYS_ON_STUDY}";
    assert!(text.contains(planned), "the demo's count analysis changed");
    let fallback =
        "    fallbacks:\n      - {when: overdispersion, above: 1.5, use: negative-binomial}\n";
    assert!(text.contains(fallback), "the demo's count fallback changed");
    let text = text
        .replace(
            planned,
            "model: {family: negative-binomial, exposure: DAYS_ON_STUDY}",
        )
        .replacen(fallback, "", 1);
    let plan = study.write("plan.yaml", text);
    let parse = |files: &[(String, Vec<u8>)]| -> Value {
        serde_json::from_slice(file(files, "results.json")).expect("results.json parses")
    };
    let dense = parse(&outputs(&plan, Layout::Dense));
    let rows = parse(&outputs(&plan, Layout::Rows));
    let find = |results: &Value| -> Value {
        results["analyses"]
            .as_array()
            .expect("analyses")
            .iter()
            .find(|analysis| analysis["id"] == "flares")
            .expect("the flares analysis")
            .clone()
    };
    let (a, b) = (find(&dense), find(&rows));
    assert_eq!(a["model"]["family"], "negative-binomial");
    assert_eq!(a["status"], b["status"]);
    let mut a_rest = a.clone();
    let mut b_rest = b.clone();
    let a_marginal = a_rest["marginal"].take();
    let b_marginal = b_rest["marginal"].take();
    assert!(a_marginal.is_object(), "standardised means were reported");
    assert!(compare(&a_rest, &b_rest, 0.0, "flares") > 10);
    assert!(compare(&a_marginal, &b_marginal, 1e-12, "flares.marginal") > 5);
}
