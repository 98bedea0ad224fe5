//! Checks the stratified Cochran–Mantel–Haenszel tests against values made outside cairn:
//! R's `mantelhaen.test` and `vcdExtra::CMHtest`, an element-by-element computation of the
//! Landis, Heyman & Koch (1978) formulas in R (all in tests/reference/cmh/, made by
//! `Rscript make_reference.R` there; versions in each file's first line), and values printed
//! in textbooks. This file only reads the reference files and compares; it must not compute
//! reference values itself.

use std::collections::BTreeMap;
use std::fs;
use std::path::PathBuf;

use cairn::inference::cmh::{CmhResult, CmhStatistic, StratifiedTable, cmh_tests};
use nalgebra::DMatrix;

fn reference_path(file: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests/reference/cmh")
        .join(file)
}

/// The data lines of a reference CSV: comment lines (`#`, the versions) and the header skipped.
fn data_lines(file: &str) -> Vec<Vec<String>> {
    let text = fs::read_to_string(reference_path(file)).expect("reference file is readable");
    text.lines()
        .filter(|line| !line.starts_with('#') && !line.trim().is_empty())
        .skip(1)
        .map(|line| line.split(',').map(str::to_string).collect())
        .collect()
}

fn number(field: &str) -> f64 {
    field
        .parse()
        .unwrap_or_else(|_| panic!("not a number: {field}"))
}

/// Tables of tables.csv by name, as StratifiedTable values.
fn reference_tables() -> BTreeMap<String, StratifiedTable> {
    // (table) -> list of (stratum, row, column, count), 1-based as written by R.
    let mut cells: BTreeMap<String, Vec<(usize, usize, usize, f64)>> = BTreeMap::new();
    for fields in data_lines("tables.csv") {
        cells.entry(fields[0].clone()).or_default().push((
            fields[1].parse().unwrap(),
            fields[2].parse().unwrap(),
            fields[3].parse().unwrap(),
            number(&fields[4]),
        ));
    }
    cells
        .into_iter()
        .map(|(name, entries)| {
            let n_strata = entries.iter().map(|entry| entry.0).max().unwrap();
            let n_rows = entries.iter().map(|entry| entry.1).max().unwrap();
            let n_columns = entries.iter().map(|entry| entry.2).max().unwrap();
            assert_eq!(
                entries.len(),
                n_strata * n_rows * n_columns,
                "table {name} is complete"
            );
            let mut strata = vec![DMatrix::zeros(n_rows, n_columns); n_strata];
            for (stratum, row, column, count) in entries {
                strata[stratum - 1][(row - 1, column - 1)] = count;
            }
            (
                name,
                StratifiedTable::new(strata).expect("reference table is valid"),
            )
        })
        .collect()
}

/// (table name, score set name).
type ScoreKey = (String, String);

/// Score sets of scores.csv: (table, score set) -> (row scores, column scores).
fn reference_scores() -> BTreeMap<ScoreKey, (Vec<f64>, Vec<f64>)> {
    type IndexedScores = Vec<(usize, f64)>;
    let mut sets: BTreeMap<ScoreKey, (IndexedScores, IndexedScores)> = BTreeMap::new();
    for fields in data_lines("scores.csv") {
        let entry = sets
            .entry((fields[0].clone(), fields[1].clone()))
            .or_default();
        let index: usize = fields[3].parse().unwrap();
        let score = number(&fields[4]);
        match fields[2].as_str() {
            "row" => entry.0.push((index, score)),
            "column" => entry.1.push((index, score)),
            other => panic!("unknown score side {other}"),
        }
    }
    sets.into_iter()
        .map(|(key, (mut rows, mut columns))| {
            rows.sort_by_key(|entry| entry.0);
            columns.sort_by_key(|entry| entry.0);
            (
                key,
                (
                    rows.into_iter().map(|e| e.1).collect(),
                    columns.into_iter().map(|e| e.1).collect(),
                ),
            )
        })
        .collect()
}

struct ReferenceValue {
    table: String,
    scores: String,
    statistic: String,
    source: String,
    value: f64,
    df: f64,
    p_value: f64,
}

fn reference_results() -> Vec<ReferenceValue> {
    data_lines("results.csv")
        .into_iter()
        .map(|fields| ReferenceValue {
            table: fields[0].clone(),
            scores: fields[1].clone(),
            statistic: fields[2].clone(),
            source: fields[3].clone(),
            value: number(&fields[4]),
            df: number(&fields[5]),
            p_value: number(&fields[6]),
        })
        .collect()
}

fn relative_error(computed: f64, reference: f64) -> f64 {
    (computed - reference).abs() / reference.abs().max(f64::MIN_POSITIVE)
}

fn pick<'a>(result: &'a CmhResult, statistic: &str) -> &'a CmhStatistic {
    let chosen = match statistic {
        "general_association" => &result.general_association,
        "row_mean_scores" => &result.row_mean_scores,
        "correlation" => &result.correlation,
        other => panic!("unknown statistic {other}"),
    };
    chosen
        .as_ref()
        .unwrap_or_else(|issue| panic!("{statistic} not computed: {issue}"))
}

/// Compares every reference value of the given sources; returns the largest relative error
/// seen for statistics and p-values and how many values were compared.
fn compare_sources(sources: &[&str], tolerance: f64) -> (f64, f64, usize) {
    let tables = reference_tables();
    let scores = reference_scores();
    let mut worst_statistic: f64 = 0.0;
    let mut worst_p: f64 = 0.0;
    let mut compared = 0;
    for reference in reference_results()
        .iter()
        .filter(|r| sources.contains(&r.source.as_str()))
    {
        let table = &tables[&reference.table];
        let (row_scores, column_scores) =
            &scores[&(reference.table.clone(), reference.scores.clone())];
        let result = cmh_tests(table, Some(column_scores), Some(row_scores)).expect("valid scores");
        let computed = pick(&result, &reference.statistic);
        let label = format!(
            "{} / {} / {} / {}",
            reference.table, reference.scores, reference.statistic, reference.source
        );
        assert_eq!(computed.df as f64, reference.df, "df of {label}");
        let statistic_error = relative_error(computed.statistic, reference.value);
        let p_error = relative_error(computed.p_value, reference.p_value);
        assert!(
            statistic_error <= tolerance,
            "{label}: statistic {} vs {} (rel {statistic_error:e})",
            computed.statistic,
            reference.value
        );
        assert!(
            p_error <= tolerance,
            "{label}: p {} vs {} (rel {p_error:e})",
            computed.p_value,
            reference.p_value
        );
        worst_statistic = worst_statistic.max(statistic_error);
        worst_p = worst_p.max(p_error);
        compared += 1;
    }
    (worst_statistic, worst_p, compared)
}

// Source: R 4.2.2 stats::mantelhaen.test (correct = FALSE for the 2×2×6 UCBAdmissions table),
// whose statistic for I×J×K tables is the general association statistic. Tables: UCBAdmissions,
// esoph (controls), vcd::Arthritis, Agresti's job-satisfaction table, and a sparse made-up table
// (without its one-subject stratum, which mantelhaen.test refuses and cairn skips).
// Tolerance: 1e-10 relative on statistic and p-value.
#[test]
fn general_association_matches_mantelhaen_test() {
    let (worst_statistic, worst_p, compared) = compare_sources(&["mantelhaen"], 1e-10);
    assert_eq!(compared, 5, "one mantelhaen.test value per table");
    eprintln!("mantelhaen.test: max rel error statistic {worst_statistic:e}, p {worst_p:e}");
}

// Source: vcdExtra 0.8.2 CMHtest(..., overall = TRUE) — all three statistics, on the tables
// where it runs (it stops on esoph and on the sparse table because it also tests each stratum
// alone). Tolerance: 1e-10 relative.
#[test]
fn all_statistics_match_vcdextra() {
    let (worst_statistic, worst_p, compared) = compare_sources(&["vcdextra"], 1e-10);
    assert_eq!(compared, 12, "three statistics for each of four score sets");
    eprintln!("vcdExtra: max rel error statistic {worst_statistic:e}, p {worst_p:e}");
}

// Source: the formulas of Landis, Heyman & Koch (1978) written element by element in
// make_reference.R (no package code), for every table and score set, including caller-given
// unequally spaced scores and the sparse table with a one-subject stratum.
// Tolerance: 1e-10 relative.
#[test]
fn all_statistics_match_formulas_written_by_hand_in_r() {
    let (worst_statistic, worst_p, compared) = compare_sources(&["hand"], 1e-10);
    assert_eq!(
        compared, 21,
        "three statistics for each of seven score sets"
    );
    eprintln!("hand formulas: max rel error statistic {worst_statistic:e}, p {worst_p:e}");
}

// The sparse reference table has one stratum with a single subject: it is skipped and said so.
#[test]
fn sparse_table_reports_strata_used() {
    let tables = reference_tables();
    let result = cmh_tests(&tables["sparse"], None, None).unwrap();
    assert_eq!((result.strata_used, result.strata_total), (3, 4));
}

/// Asserts a value printed to `decimals` decimal places, allowing half a unit in the last place
/// plus a little (the printed value is rounded).
fn assert_printed(computed: f64, printed: f64, decimals: i32, label: &str) {
    let allowed = 0.5 * 10f64.powi(-decimals) * 1.0001;
    assert!(
        (computed - printed).abs() <= allowed,
        "{label}: {computed} vs printed {printed}"
    );
}

// Published worked example: the arthritis trial (vcd::Arthritis; Koch & Edwards 1988),
// treatment × improvement (none, some, marked) stratified by sex, integer scores, as printed in
// Stokes, Davis & Koch, Categorical Data Analysis Using the SAS System (2nd ed., 2000):
// nonzero correlation 14.6319 (df 1), row mean scores 14.6319 (df 1), general association
// 14.6323 (df 2). VALUES FROM MEMORY, not re-read from the book; they agree with R above.
// Tolerance: half a unit in the 4th decimal.
#[test]
fn arthritis_trial_matches_printed_values() {
    let tables = reference_tables();
    let result = cmh_tests(&tables["arthritis"], None, None).unwrap();
    let correlation = result.correlation.as_ref().unwrap();
    let means = result.row_mean_scores.as_ref().unwrap();
    let general = result.general_association.as_ref().unwrap();
    assert_printed(correlation.statistic, 14.6319, 4, "correlation");
    assert_printed(means.statistic, 14.6319, 4, "row mean scores");
    assert_printed(general.statistic, 14.6323, 4, "general association");
    assert_eq!((correlation.df, means.df, general.df), (1, 1, 2));
}

// Published worked example: Agresti, Categorical Data Analysis (2nd ed., 2002), Table 6.12,
// income × job satisfaction for 104 black Americans stratified by gender, income scores
// (3, 10, 20, 35) and satisfaction scores (1, 3, 4, 5), generalized CMH statistics discussed in
// §7.5: correlation 6.1563 (df 1, P = 0.0131), mean scores 9.0342 (df 3, P = 0.0288), general
// association 10.2001 (df 9, P = 0.3345). COUNTS AND VALUES FROM MEMORY, not re-read from the
// book (the total of 104 matches the book's text); they agree with R above.
// Tolerance: half a unit in the last printed decimal.
#[test]
fn job_satisfaction_matches_printed_values() {
    let tables = reference_tables();
    let result = cmh_tests(
        &tables["jobsat"],
        Some(&[1.0, 3.0, 4.0, 5.0]),
        Some(&[3.0, 10.0, 20.0, 35.0]),
    )
    .unwrap();
    let total: f64 = (0..2)
        .map(|k| tables["jobsat"].stratum(k).unwrap().sum())
        .sum();
    assert_eq!(total, 104.0);
    let correlation = result.correlation.as_ref().unwrap();
    let means = result.row_mean_scores.as_ref().unwrap();
    let general = result.general_association.as_ref().unwrap();
    assert_printed(correlation.statistic, 6.1563, 4, "correlation");
    assert_printed(correlation.p_value, 0.0131, 4, "correlation p");
    assert_printed(means.statistic, 9.0342, 4, "mean scores");
    assert_printed(means.p_value, 0.0288, 4, "mean scores p");
    assert_printed(general.statistic, 10.2001, 4, "general association");
    assert_printed(general.p_value, 0.3345, 4, "general association p");
    assert_eq!((correlation.df, means.df, general.df), (1, 3, 9));
}
