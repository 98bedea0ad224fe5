//! Accuracy of the least-squares engine on the NIST Statistical Reference
//! Datasets (StRD), Linear Least Squares Regression section: all eleven data
//! sets, every certified estimate, standard deviation of estimate, residual
//! standard deviation and R². The certified values are read from the `.dat`
//! files in `tests/reference/nist-strd/` (see PROVENANCE.md there); nothing is
//! typed in by hand. Accuracy is measured as the log relative error (LRE) of
//! McCullough (1998), "Assessing the reliability of statistical software:
//! Part I", *The American Statistician* 52:358–366. This file must not
//! loosen a threshold to make a failing change pass.
//!
//! Run with `cargo test --test nist_strd -- --nocapture` to see the table of
//! minimum LREs per data set.

use cairn::models::SparseRows;
use cairn::models::linear::{
    LeastSquaresError, LeastSquaresFit, LeastSquaresOptions, fit_least_squares,
    fit_least_squares_rows,
};
use nalgebra::DMatrix;
use std::path::PathBuf;

/// The digits NIST prints for a certified value; an LRE above this means nothing.
const CERTIFIED_DIGITS: f64 = 15.0;

struct Certified {
    estimates: Vec<f64>,
    standard_deviations: Vec<f64>,
    residual_standard_deviation: f64,
    r_squared: f64,
}

struct Dataset {
    certified: Certified,
    /// Rows of whitespace-separated numbers: y first, then the x columns.
    rows: Vec<Vec<f64>>,
}

fn reference_path(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests")
        .join("reference")
        .join("nist-strd")
        .join(format!("{name}.dat"))
}

/// Reads "(lines A to B)" after `label` in the header; 1-based, inclusive.
fn line_range(header: &[&str], label: &str) -> (usize, usize) {
    let line = header
        .iter()
        .find(|line| line.contains(label) && line.contains("(lines"))
        .unwrap_or_else(|| panic!("header has no '{label} (lines ...)'"));
    let inside = line.split("(lines").nth(1).expect("range text");
    let numbers: Vec<usize> = inside
        .replace(')', " ")
        .split_whitespace()
        .filter_map(|word| word.parse().ok())
        .collect();
    (numbers[0], numbers[1])
}

fn parse_number(text: &str) -> f64 {
    text.parse()
        .unwrap_or_else(|_| panic!("not a number: {text:?}"))
}

/// Parses a NIST StRD linear regression file in the layout its header
/// describes (README of the reference folder, step 1).
fn read_dataset(name: &str) -> Dataset {
    let raw = std::fs::read_to_string(reference_path(name)).expect("reference file is readable");
    let lines: Vec<&str> = raw
        .split('\n')
        .map(|line| line.trim_end_matches('\r'))
        .collect();
    let header = &lines[..lines.len().min(60)];
    let (certified_first, certified_last) = line_range(header, "Certified Values");
    let (data_first, data_last) = line_range(header, "Data");
    let block = &lines[certified_first - 1..certified_last];

    let mut estimates = Vec::new();
    let mut standard_deviations = Vec::new();
    let mut residual_standard_deviation = None;
    let mut r_squared = None;
    for line in block {
        let words: Vec<&str> = line.split_whitespace().collect();
        match words.as_slice() {
            [parameter, estimate, deviation]
                if parameter.starts_with('B')
                    && parameter[1..].chars().all(|c| c.is_ascii_digit()) =>
            {
                estimates.push(parse_number(estimate));
                standard_deviations.push(parse_number(deviation));
            }
            ["Standard", "Deviation", value] => {
                residual_standard_deviation = Some(parse_number(value))
            }
            ["R-Squared", value] => r_squared = Some(parse_number(value)),
            _ => {}
        }
    }
    let rows: Vec<Vec<f64>> = lines[data_first - 1..data_last]
        .iter()
        .filter(|line| !line.trim().is_empty())
        .map(|line| line.split_whitespace().map(parse_number).collect())
        .collect();
    assert_eq!(
        rows.len(),
        data_last - data_first + 1,
        "{name}: data row count"
    );
    Dataset {
        certified: Certified {
            estimates,
            standard_deviations,
            residual_standard_deviation: residual_standard_deviation.expect("residual SD line"),
            r_squared: r_squared.expect("R-squared line"),
        },
        rows,
    }
}

/// x^power as the double nearest to the exact power of the stored x,
/// computed by repeated multiplication in double-double so that the design
/// carries no more rounding than the data themselves.
fn power(x: f64, exponent: usize) -> f64 {
    let (mut high, mut low) = (1.0_f64, 0.0_f64);
    for _ in 0..exponent {
        let product = high * x;
        let error = high.mul_add(x, -product) + low * x;
        high = product + error;
        low = error - (high - product);
    }
    high + low
}

/// The model each data set's header states (and the reference folder's
/// README table): returns the design and whether it has an intercept.
fn design_for(name: &str, rows: &[Vec<f64>]) -> (DMatrix<f64>, bool) {
    let n = rows.len();
    let polynomial =
        |degree: usize| DMatrix::from_fn(n, degree + 1, |row, column| power(rows[row][1], column));
    match name {
        "Norris" => (polynomial(1), true),
        "Pontius" => (polynomial(2), true),
        "Filip" => (polynomial(10), true),
        "NoInt1" | "NoInt2" => (DMatrix::from_fn(n, 1, |row, _| rows[row][1]), false),
        "Longley" => (
            DMatrix::from_fn(
                n,
                7,
                |row, column| if column == 0 { 1.0 } else { rows[row][column] },
            ),
            true,
        ),
        name if name.starts_with("Wampler") => (polynomial(5), true),
        other => panic!("unknown data set {other}"),
    }
}

/// Log relative error as McCullough (1998) defines it: the log absolute
/// error when the certified value is 0, the certified digits when the two
/// agree exactly, capped at those digits, and 0 below 1.
fn log_relative_error(estimate: f64, certified: f64) -> f64 {
    if estimate == certified {
        return CERTIFIED_DIGITS;
    }
    let score = if certified == 0.0 {
        -estimate.abs().log10()
    } else {
        -((estimate - certified).abs() / certified.abs()).log10()
    };
    if score.is_nan() || score < 1.0 {
        0.0
    } else {
        score.min(CERTIFIED_DIGITS)
    }
}

struct Scores {
    estimates: f64,
    standard_deviations: f64,
    residual_standard_deviation: f64,
    r_squared: f64,
    refinement_steps: usize,
    converged: bool,
}

impl Scores {
    fn minimum(&self) -> f64 {
        self.estimates
            .min(self.standard_deviations)
            .min(self.residual_standard_deviation)
            .min(self.r_squared)
    }
}

/// A least-squares route: the dense QR, or the row-block factorization of the stored rows.
type Route = fn(&DMatrix<f64>, &[f64]) -> Result<LeastSquaresFit, LeastSquaresError>;

fn dense_route(
    design: &DMatrix<f64>,
    response: &[f64],
) -> Result<LeastSquaresFit, LeastSquaresError> {
    fit_least_squares(design, response, &LeastSquaresOptions::default())
}

fn row_block_route(
    design: &DMatrix<f64>,
    response: &[f64],
) -> Result<LeastSquaresFit, LeastSquaresError> {
    let rows = SparseRows::from_dense(design).expect("a small design converts");
    fit_least_squares_rows(&rows, response, &LeastSquaresOptions::default())
}

fn score_dataset(name: &str, route: Route) -> Scores {
    let dataset = read_dataset(name);
    let (design, has_intercept) = design_for(name, &dataset.rows);
    let response: Vec<f64> = dataset.rows.iter().map(|row| row[0]).collect();
    let fit = route(&design, &response).unwrap_or_else(|error| panic!("{name}: {error}"));
    let certified = &dataset.certified;
    assert_eq!(
        certified.estimates.len(),
        design.ncols(),
        "{name}: parameter count"
    );
    // Every NIST StRD linear data set is full rank (Filip included), so no
    // column may be reported aliased.
    assert!(
        fit.aliased_columns.is_empty(),
        "{name}: aliased {:?}",
        fit.aliased_columns
    );
    assert_eq!(fit.rank, design.ncols());

    let standard_errors = fit.coefficient_standard_errors();
    let mut estimate_minimum = CERTIFIED_DIGITS;
    let mut deviation_minimum = CERTIFIED_DIGITS;
    for (parameter, standard_error) in standard_errors.iter().enumerate() {
        let estimate = fit.coefficients[parameter].expect("full-rank fit has every coefficient");
        let deviation = standard_error.expect("standard error exists");
        estimate_minimum =
            estimate_minimum.min(log_relative_error(estimate, certified.estimates[parameter]));
        deviation_minimum = deviation_minimum.min(log_relative_error(
            deviation,
            certified.standard_deviations[parameter],
        ));
    }
    // The refinement must end by meeting its convergence test on every data
    // set (it does in 1–3 steps); stagnation would signal a regression.
    let converged = fit.refinement_converged;
    let residual_sd = fit.residual_standard_deviation().expect("residual df ≥ 1");
    let r_squared = fit
        .r_squared(&response, has_intercept)
        .expect("response not constant");
    Scores {
        estimates: estimate_minimum,
        standard_deviations: deviation_minimum,
        residual_standard_deviation: log_relative_error(
            residual_sd,
            certified.residual_standard_deviation,
        ),
        r_squared: log_relative_error(r_squared, certified.r_squared),
        refinement_steps: fit.refinement_steps,
        converged,
    }
}

/// Data set, the project's required minimum LRE and the floor asserted.
/// The requirement is 10 on every certified quantity, 7 for Filip (DESIGN
/// §4: QR plus refinement). The asserted floor is the minimum measured when
/// this test was written (printed table, 2 Dec 2026) rounded down to half a
/// digit, so a change that loses accuracy fails even while it still meets
/// the requirement. Results are deterministic IEEE arithmetic (fused
/// multiply-add is exactly rounded everywhere), so the floors are portable.
/// Floors may be raised after a measured improvement, never lowered.
const DATASETS: [(&str, f64, f64); 11] = [
    ("Norris", 10.0, 13.5),
    ("Pontius", 10.0, 13.5),
    ("NoInt1", 10.0, 14.5),
    ("NoInt2", 10.0, 14.5),
    ("Filip", 7.0, 7.5),
    ("Longley", 10.0, 14.5),
    ("Wampler1", 10.0, 15.0),
    ("Wampler2", 10.0, 13.0),
    ("Wampler3", 10.0, 14.0),
    ("Wampler4", 10.0, 14.0),
    ("Wampler5", 10.0, 13.5),
];

// Source: NIST StRD Linear Least Squares Regression, certified values in
// each .dat file; LRE as in McCullough (1998). Requirements and floors in DATASETS.
#[test]
fn nist_strd_linear_regression_certified_values() {
    score_every_dataset(dense_route, &DATASETS, &[]);
}

// Source: as above, NIST StRD certified values, through the route that factors the stored
// rows in blocks and refines the semi-normal equations; the requirements and floors of
// DATASETS hold for it too (measured 2 Dec 2026: its LREs equal the dense route's to the
// printed two decimals).
#[test]
fn nist_strd_certified_values_through_the_row_block_factorization() {
    // Filip, the worst-conditioned data set, is where refinement of the semi-normal equations
    // (whose rate is about κ²·ε) stops shrinking before its convergence test; its digits still
    // meet the requirement, as many as the dense route's. Every other data set must converge.
    score_every_dataset(row_block_route, &DATASETS, &["Filip"]);
}

/// Scores every data set through `route`, asserting the floors and that the refinement met
/// its convergence test everywhere except on the data sets named in `may_stall`.
fn score_every_dataset(route: Route, datasets: &[(&str, f64, f64)], may_stall: &[&str]) {
    println!();
    println!(
        "{:<9} {:>9} {:>9} {:>9} {:>9} {:>9} {:>6}",
        "dataset", "estimate", "sd(est)", "resid sd", "R2", "minimum", "steps"
    );
    let mut failures = Vec::new();
    for &(name, requirement, floor) in datasets {
        assert!(floor >= requirement, "{name}: floor below the requirement");
        let scores = score_dataset(name, route);
        println!(
            "{:<9} {:>9.2} {:>9.2} {:>9.2} {:>9.2} {:>9.2} {:>6}",
            name,
            scores.estimates,
            scores.standard_deviations,
            scores.residual_standard_deviation,
            scores.r_squared,
            scores.minimum(),
            scores.refinement_steps
        );
        if !scores.converged {
            println!("{name}: the refinement did not meet its convergence test");
            if !may_stall.contains(&name) {
                failures.push(format!("{name}: refinement did not converge"));
            }
        }
        if scores.minimum() < floor {
            failures.push(format!(
                "{name}: minimum LRE {:.2} < {floor}",
                scores.minimum()
            ));
        }
    }
    assert!(failures.is_empty(), "LRE below threshold: {failures:?}");
}

// Source: NIST StRD Filip (full rank, certified 11 parameters) and the
// reference folder's README note that R's lm with tol = 1e-7 drops a term.
// The default tolerance must keep all columns, and so must 1e-9 (Filip's
// smallest in-order ratio is about 5e-8, so this checks the margin the
// engine's documentation claims); 1e-7 is expected to alias one, which shows
// the test can detect a tolerance that is too loose.
#[test]
fn filip_rank_depends_on_tolerance_as_documented() {
    let dataset = read_dataset("Filip");
    let (design, _) = design_for("Filip", &dataset.rows);
    let response: Vec<f64> = dataset.rows.iter().map(|row| row[0]).collect();
    let strict =
        fit_least_squares(&design, &response, &LeastSquaresOptions::default()).expect("Filip fits");
    assert_eq!(strict.rank, 11);
    let margin = LeastSquaresOptions {
        rank_tolerance: 1e-9,
        ..LeastSquaresOptions::default()
    };
    assert_eq!(
        fit_least_squares(&design, &response, &margin)
            .expect("Filip fits")
            .rank,
        11
    );
    let loose = LeastSquaresOptions {
        rank_tolerance: 1e-7,
        ..LeastSquaresOptions::default()
    };
    let loose_fit = fit_least_squares(&design, &response, &loose).expect("Filip fits");
    assert!(
        loose_fit.rank < 11,
        "a tolerance of 1e-7 should alias a Filip column"
    );
}

// Source: exact rational solution of the Filip problem as stored in doubles
// (tests/reference/nist-strd/filip_double_exact.json, made by
// filip_double_exact.py there with Python's fractions module). Filip's LRE
// against NIST is limited to about 7.6 by the rounding of the data to
// doubles, not by the engine; this check shows the engine reaches the exact
// answer of the problem it is given. Tolerance 1e-13 relative on every
// estimate and standard deviation.
#[test]
fn filip_matches_exact_solution_of_the_double_problem() {
    let text = std::fs::read_to_string(
        PathBuf::from(env!("CARGO_MANIFEST_DIR"))
            .join("tests/reference/nist-strd/filip_double_exact.json"),
    )
    .expect("exact Filip reference is readable");
    let exact: serde_json::Value = serde_json::from_str(&text).expect("JSON parses");
    let numbers = |key: &str| -> Vec<f64> {
        exact[key]
            .as_array()
            .expect("array")
            .iter()
            .map(|v| v.as_f64().expect("number"))
            .collect()
    };
    let dataset = read_dataset("Filip");
    let (design, _) = design_for("Filip", &dataset.rows);
    let response: Vec<f64> = dataset.rows.iter().map(|row| row[0]).collect();
    let fit =
        fit_least_squares(&design, &response, &LeastSquaresOptions::default()).expect("Filip fits");
    let standard_errors = fit.coefficient_standard_errors();
    let mut worst: f64 = 0.0;
    for (parameter, (estimate, deviation)) in numbers("estimates")
        .iter()
        .zip(numbers("standard_deviations"))
        .enumerate()
    {
        let ours = fit.coefficients[parameter].expect("estimated");
        let our_deviation = standard_errors[parameter].expect("standard error");
        worst = worst
            .max(((ours - estimate) / estimate).abs())
            .max(((our_deviation - deviation) / deviation).abs());
    }
    println!("Filip vs exact solution of the double problem: worst relative error {worst:.2e}");
    assert!(worst < 1e-13, "worst relative error {worst:e}");
}

// Source: NIST StRD Norris, Pontius and Longley designs. On a well-conditioned
// design the covariance is taken from R⁻¹R⁻ᵀ without refinement; both routes
// must agree to far below the digits a report shows (tolerance 1e-12
// relative, common practice for double precision on designs of κ ≤ 1e3).
#[test]
fn covariance_without_refinement_agrees_with_refined_covariance() {
    for name in ["Norris", "Pontius", "Longley", "Wampler1"] {
        let dataset = read_dataset(name);
        let (design, _) = design_for(name, &dataset.rows);
        let response: Vec<f64> = dataset.rows.iter().map(|row| row[0]).collect();
        let default =
            fit_least_squares(&design, &response, &LeastSquaresOptions::default()).expect("fits");
        let refined = fit_least_squares(
            &design,
            &response,
            &LeastSquaresOptions {
                always_refine_covariance: true,
                ..LeastSquaresOptions::default()
            },
        )
        .expect("fits");
        for (a, b) in default
            .unscaled_covariance
            .iter()
            .zip(refined.unscaled_covariance.iter())
        {
            let scale = b.abs().max(f64::MIN_POSITIVE);
            assert!(
                (a - b).abs() <= 1e-12 * scale,
                "{name}: covariance entry {a:e} against refined {b:e}"
            );
        }
    }
}
