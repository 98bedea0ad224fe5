//! Property tests of invariances that any correct fit must show, run through the
//! whole pipeline (plan and CSV files in a scratch folder → `run::load_inputs` →
//! `run::produce` → results.json): the same study is written twice, once as is
//! and once transformed, and every number of the two results is compared.
//!
//! The invariances (common practice: they follow from the models' definitions,
//! e.g. McCullagh & Nelder, *Generalized Linear Models*, 2nd ed., 1989, §2–§5,
//! for the equivariance of maximum-likelihood estimates under a linear
//! reparameterisation of the design):
//! 1. permuting the rows of the subjects file and of the allocation file (each
//!    independently) changes nothing — every analysis, every family;
//! 2. multiplying a covariate by c ≠ 0 divides its coefficient, standard error
//!    and limits by c (limits swap when c < 0) and changes nothing else:
//!    treatment contrasts, tests, marginal effects and the fit are unchanged;
//! 3. renaming the arms, reordering them and choosing another reference arm in
//!    the plan (with the allocation file renamed to match) leaves every planned
//!    contrast — matched by its id — unchanged, and permutes the per-arm
//!    numbers (adjusted means, standardised means) with the arms;
//! 4. adding a constant k to a continuous endpoint adds k to the linear model's
//!    intercept and adjusted means (and their limits) and changes nothing else.
//!
//! The study has five analyses on one synthetic dataset (linear, binomial,
//! Poisson, cumulative logit and baseline-category logit), each with a numeric
//! covariate and a site stratum. The data are drawn by a seeded generator in
//! this file; the seed, the sample size and the transformation are chosen by
//! proptest. Numbers are compared with the tolerance stated at [`TOLERANCE`];
//! text must match exactly. This file owns no reference values: the reference
//! for each run is the untransformed run.

mod common;

use common::Scratch;
use proptest::prelude::*;
use serde_json::Value;

/// Relative tolerance of every numeric comparison: |a − b| ≤ 1e-9 · max(|a|, |b|, 1e-3).
/// The floor of 1e-3 makes numbers smaller than that (tiny p-values, estimates near
/// zero) compare with an absolute tolerance of 1e-12 instead of a relative one; the
/// transformed run differs from the original only by rounding (summation order, the
/// data written as the nearest double, another parameterisation). Measured in one
/// run of 150 cases per property (`-- --nocapture` prints each case's largest
/// difference): at most 2.5e-11 for permuted rows, 4.5e-11 for a rescaled covariate,
/// 7.1e-12 for relabelled arms and 4.4e-12 for a shifted endpoint, so 1e-9 leaves a
/// margin of at least 20 for the iterative fits, which stop at a convergence
/// tolerance rather than at an exact solution.
const TOLERANCE: f64 = 1e-9;
const FLOOR: f64 = 1e-3;

/// Cases per property: each case runs the pipeline twice on a study of 60–150
/// subjects, which keeps the whole file to a few seconds in a debug build.
const CASES: u32 = 16;

/// SplitMix64 (Steele, Lea & Flood 2014): a small, seeded generator for the test data.
struct Draws(u64);

impl Draws {
    fn next(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
    fn uniform(&mut self) -> f64 {
        (self.next() >> 11) as f64 / (1u64 << 53) as f64
    }
    fn normal(&mut self) -> f64 {
        // Box–Muller; 1 − u keeps the logarithm finite.
        let radius = (-2.0 * (1.0 - self.uniform()).ln()).sqrt();
        radius * (2.0 * std::f64::consts::PI * self.uniform()).cos()
    }
    fn below(&mut self, n: usize) -> usize {
        (self.uniform() * n as f64) as usize % n
    }
}

/// One subject of the synthetic study. `arm` indexes [`ARMS`].
#[derive(Clone, Debug)]
struct Subject {
    id: String,
    arm: usize,
    site: &'static str,
    x: f64,
    y: f64,
    binary: &'static str,
    count: u64,
    ordinal: &'static str,
    nominal: &'static str,
}

const ARMS: [&str; 3] = ["placebo", "low", "high"];
const SITES: [&str; 3] = ["north", "south", "west"];
const ORDINAL: [&str; 4] = ["none", "mild", "moderate", "severe"];
const NOMINAL: [&str; 3] = ["red", "green", "blue"];

fn poisson(draws: &mut Draws, mean: f64) -> u64 {
    // Knuth's multiplication method; the means here are below 10.
    let limit = (-mean).exp();
    let mut product = draws.uniform();
    let mut count = 0;
    while product > limit {
        product *= draws.uniform();
        count += 1;
    }
    count
}

fn simulate(seed: u64, n_subjects: usize) -> Vec<Subject> {
    let mut draws = Draws(seed);
    (0..n_subjects)
        .map(|index| {
            // Arms cycle. The first 36 subjects have fixed sites and categorical
            // outcomes so that every arm and every site has every outcome category
            // (an empty arm × category or site × category cell means separation,
            // and the fit would rightly fail); everything else is random.
            let arm = index % 3;
            let fixed = index < 36;
            let site = if fixed {
                SITES[(index / 12) % 3]
            } else {
                SITES[draws.below(3)]
            };
            let x = 50.0 + 10.0 * draws.normal();
            let centred = (x - 50.0) / 10.0;
            let effect = [0.0, 0.4, 0.8][arm];
            let y = 10.0 + 2.0 * effect + 1.5 * centred + 2.0 * draws.normal();
            let risk = 1.0 / (1.0 + (-(-0.3 + effect + 0.5 * centred)).exp());
            let binary = if fixed {
                ["yes", "no"][(index / 3) % 2]
            } else if draws.uniform() < risk {
                "yes"
            } else {
                "no"
            };
            let count = poisson(&mut draws, (0.8 + 0.5 * effect + 0.2 * centred).exp());
            let latent = effect + 0.6 * centred + logistic_noise(&mut draws);
            let ordinal = if fixed {
                ORDINAL[(index / 3) % 4]
            } else {
                ORDINAL[[-0.8, 0.3, 1.3].iter().filter(|cut| latent > **cut).count()]
            };
            let nominal = if fixed {
                NOMINAL[(index / 3) % 3]
            } else {
                NOMINAL[draws.below(3)]
            };
            Subject {
                id: format!("S{index:04}"),
                arm,
                site,
                x,
                y,
                binary,
                count,
                ordinal,
                nominal,
            }
        })
        .collect()
}

fn logistic_noise(draws: &mut Draws) -> f64 {
    let u = draws.uniform().clamp(1e-12, 1.0 - 1e-12);
    (u / (1.0 - u)).ln()
}

/// How a study is written: the arm codes in plan order with the reference among
/// them, and the code each original arm gets in the allocation file.
struct Arms {
    /// Codes in the order the plan lists them.
    plan_order: Vec<String>,
    reference: String,
    /// `code_of[original arm]`: the code written for that arm.
    code_of: Vec<String>,
}

impl Arms {
    fn original() -> Arms {
        let codes: Vec<String> = ARMS.iter().map(|code| code.to_string()).collect();
        Arms {
            plan_order: codes.clone(),
            reference: codes[0].clone(),
            code_of: codes,
        }
    }
}

/// Write the study into `scratch` and return the results of a run as JSON.
fn run_study(
    scratch: &Scratch,
    subjects: &[Subject],
    arms: &Arms,
    subject_order: &[usize],
    allocation_order: &[usize],
) -> Value {
    let mut subjects_csv = String::from("USUBJID,FASFL,SITE,X,Y,B,C,O,N\n");
    for &index in subject_order {
        let s = &subjects[index];
        // `{}` writes the shortest text that reads back as the same double.
        subjects_csv.push_str(&format!(
            "{},Y,{},{},{},{},{},{},{}\n",
            s.id, s.site, s.x, s.y, s.binary, s.count, s.ordinal, s.nominal
        ));
    }
    let mut allocation_csv = String::from("USUBJID,ARM\n");
    for &index in allocation_order {
        allocation_csv.push_str(&format!(
            "{},{}\n",
            subjects[index].id, arms.code_of[subjects[index].arm]
        ));
    }
    scratch.write("data/subjects.csv", subjects_csv);
    scratch.write("data/allocation.csv", allocation_csv);
    // The contrasts are the same three comparisons of the original arms, named by
    // id, so that a relabelled run can be matched with the original one.
    // Codes are quoted so that a code such as `null` or `no` stays text.
    let [placebo, low, high] = [0, 1, 2].map(|arm| format!("\"{}\"", arms.code_of[arm]));
    let contrasts = format!(
        "    contrasts:\n      - {{id: low-vs-placebo, arm: {low}, versus: {placebo}}}\n      - {{id: high-vs-placebo, arm: {high}, versus: {placebo}}}\n      - {{id: high-vs-low, arm: {high}, versus: {low}}}\n"
    );
    let analysis = |id: &str, endpoint: &str, model: &str| {
        format!(
            "  - id: {id}\n    endpoint: {endpoint}\n    population: fas\n    model: {model}\n    covariates: [X]\n    strata: [SITE]\n{contrasts}"
        )
    };
    let plan = format!(
        "cairn-plan: 1
study: {{id: INV-1, title: invariance check, alpha: 0.05, sides: 2}}
data:
  subjects: data/subjects.csv
  key: USUBJID
  treatment: {{file: data/allocation.csv, column: ARM, levels: [{levels}], reference: {reference}}}
variables:
  FASFL: {{kind: factor, levels: [Y, N]}}
  SITE: {{kind: factor}}
  X: {{kind: numeric}}
  Y: {{kind: numeric}}
  B: {{kind: factor, levels: [no, yes]}}
  C: {{kind: count}}
  O: {{kind: ordinal, levels: [{ordinal}]}}
  N: {{kind: factor, levels: [{nominal}]}}
populations:
  fas: {{flag: FASFL, equals: Y}}
analyses:
{linear}{binomial}{poisson}{cumulative}{multinomial}",
        levels = arms
            .plan_order
            .iter()
            .map(|code| format!("\"{code}\""))
            .collect::<Vec<_>>()
            .join(", "),
        reference = format!("\"{}\"", arms.reference),
        ordinal = ORDINAL.join(", "),
        nominal = NOMINAL.join(", "),
        linear = analysis(
            "linear",
            "{column: Y, kind: continuous, higher-is: better}",
            "{family: linear}"
        ),
        binomial = analysis(
            "binomial",
            "{column: B, kind: binary, event: yes, higher-is: better}",
            "{family: binomial, link: logit}"
        ),
        poisson = analysis(
            "poisson",
            "{column: C, kind: count, higher-is: worse}",
            "{family: poisson}"
        ),
        cumulative = analysis(
            "cumulative",
            "{column: O, kind: ordinal, higher-is: worse}",
            "{family: cumulative, link: logit}"
        ),
        multinomial = analysis(
            "multinomial",
            "{column: N, kind: nominal}",
            "{family: multinomial, reference-category: red}"
        ),
    );
    let plan_path = scratch.write("plan.yaml", plan);
    let inputs = cairn::run::load_inputs(&plan_path, cairn::run::Mode::Unblinded)
        .unwrap_or_else(|error| panic!("the study should load: {error}"));
    let staged = cairn::run::produce(&inputs, &cairn::run::RunOptions::default())
        .unwrap_or_else(|error| panic!("the study should run: {error}"));
    let (_, bytes) = staged
        .files()
        .iter()
        .find(|(name, _)| name == "results.json")
        .expect("results.json is produced");
    let results: Value = serde_json::from_slice(bytes).expect("results.json parses");
    for analysis in results["analyses"].as_array().expect("analyses") {
        assert_eq!(
            analysis["status"], "fitted",
            "every analysis of the synthetic study should fit: {} {}",
            analysis["id"], analysis["failure"]
        );
    }
    results
}

fn identity(n: usize) -> Vec<usize> {
    (0..n).collect()
}

/// A permutation of 0..n from a seed (Fisher–Yates).
fn permutation(n: usize, seed: u64) -> Vec<usize> {
    let mut draws = Draws(seed);
    let mut order = identity(n);
    for last in (1..n).rev() {
        order.swap(last, draws.below(last + 1));
    }
    order
}

/// Compare two JSON values: structure and text exactly, numbers within
/// [`TOLERANCE`]. Differences are collected with their path.
fn compare(actual: &Value, expected: &Value, path: &str, differences: &mut Vec<String>) {
    match (actual, expected) {
        (Value::Number(a), Value::Number(b)) => {
            let (a, b) = (
                a.as_f64().unwrap_or(f64::NAN),
                b.as_f64().unwrap_or(f64::NAN),
            );
            let scale = a.abs().max(b.abs()).max(FLOOR);
            // Written negated so that a NaN (which compares false) counts as a difference.
            if !((a - b).abs() <= TOLERANCE * scale) {
                differences.push(format!(
                    "{path}: {a:e} vs expected {b:e} (relative difference {:.2e})",
                    (a - b).abs() / scale
                ));
            }
        }
        (Value::Array(a), Value::Array(b)) if a.len() == b.len() => {
            for (index, (x, y)) in a.iter().zip(b).enumerate() {
                compare(x, y, &format!("{path}[{index}]"), differences);
            }
        }
        (Value::Object(a), Value::Object(b)) if a.len() == b.len() => {
            for (key, y) in b {
                match a.get(key) {
                    Some(x) => compare(x, y, &format!("{path}.{key}"), differences),
                    None => differences.push(format!("{path}.{key}: missing")),
                }
            }
        }
        _ if actual == expected => {}
        _ => differences.push(format!("{path}: {actual} vs expected {expected}")),
    }
}

/// The largest relative difference (as [`compare`] measures it) between the
/// numbers of two values of the same shape; reported so that the margin below
/// [`TOLERANCE`] is visible in the test output with `--nocapture`.
fn largest_difference(actual: &Value, expected: &Value) -> f64 {
    match (actual, expected) {
        (Value::Number(a), Value::Number(b)) => {
            let (a, b) = (
                a.as_f64().unwrap_or(f64::NAN),
                b.as_f64().unwrap_or(f64::NAN),
            );
            (a - b).abs() / a.abs().max(b.abs()).max(FLOOR)
        }
        (Value::Array(a), Value::Array(b)) => a
            .iter()
            .zip(b)
            .map(|(x, y)| largest_difference(x, y))
            .fold(0.0, f64::max),
        (Value::Object(a), Value::Object(b)) => b
            .iter()
            .filter_map(|(key, y)| a.get(key).map(|x| largest_difference(x, y)))
            .fold(0.0, f64::max),
        _ => 0.0,
    }
}

fn assert_same(actual: &Value, expected: &Value, what: &str) {
    let mut differences = Vec::new();
    compare(actual, expected, "", &mut differences);
    let shown: Vec<&String> = differences.iter().take(20).collect();
    assert!(
        differences.is_empty(),
        "{what}: {} differences, first ones:\n{shown:#?}",
        differences.len()
    );
    eprintln!(
        "{what}: largest relative difference {:.2e}",
        largest_difference(actual, expected)
    );
}

/// The parts of results.json that must not depend on how the data files are
/// written: everything except the list of input files and their hashes, and
/// the linear fit's count of iterative-refinement steps. That count is a
/// diagnostic of the solver, not an estimate: refinement stops once a
/// correction no longer changes the solution, and whether the first pass is
/// already there depends on rounding, hence on the order of the rows (seen:
/// 1 step for one order, 2 for another, with estimates equal to 1e-15).
fn without_inputs(results: &Value) -> Value {
    let mut results = results.clone();
    if let Some(object) = results.as_object_mut() {
        object.remove("inputs");
    }
    if let Some(analyses) = results["analyses"].as_array_mut() {
        for analysis in analyses {
            if let Some(fit) = analysis["fit"].as_object_mut() {
                fit.remove("refinement_steps");
            }
        }
    }
    results
}

fn estimate_fields(estimate: &mut Value, transform: impl Fn(&str, f64) -> Option<f64>) {
    let Some(object) = estimate.as_object_mut() else {
        return;
    };
    for (key, value) in object.iter_mut() {
        if let Some(number) = value.as_f64() {
            if let Some(changed) = transform(key, number) {
                *value = serde_json::json!(changed);
            }
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: CASES, failure_persistence: None, ..ProptestConfig::default() })]

    /// (1) Row order of either data file is irrelevant, for every family.
    #[test]
    fn permuting_the_rows_of_the_data_files_changes_no_estimate(
        seed in any::<u64>(), n_subjects in 60usize..150, subject_seed in any::<u64>(), allocation_seed in any::<u64>(),
    ) {
        let subjects = simulate(seed, n_subjects);
        let scratch = Scratch::new("invariance-permute");
        let original = run_study(&scratch, &subjects, &Arms::original(), &identity(n_subjects), &identity(n_subjects));
        let permuted = run_study(
            &scratch,
            &subjects,
            &Arms::original(),
            &permutation(n_subjects, subject_seed),
            &permutation(n_subjects, allocation_seed),
        );
        assert_same(&without_inputs(&permuted), &without_inputs(&original), "permuted rows");
    }

    /// (2) Rescaling the covariate X by c rescales its coefficient by 1/c only.
    #[test]
    fn rescaling_a_covariate_rescales_only_its_coefficient(
        seed in any::<u64>(), n_subjects in 60usize..150, log10_scale in -3.0f64..3.0, negative in any::<bool>(),
    ) {
        let scale = if negative { -(10f64.powf(log10_scale)) } else { 10f64.powf(log10_scale) };
        let subjects = simulate(seed, n_subjects);
        let scaled: Vec<Subject> = subjects.iter().map(|s| Subject { x: s.x * scale, ..s.clone() }).collect();
        let scratch = Scratch::new("invariance-scale");
        let order = identity(n_subjects);
        let mut expected = without_inputs(&run_study(&scratch, &subjects, &Arms::original(), &order, &order));
        let actual = without_inputs(&run_study(&scratch, &scaled, &Arms::original(), &order, &order));
        // The expected result: X's rows divided by c; with c < 0 the limits swap.
        let mut rows_changed = 0;
        for analysis in expected["analyses"].as_array_mut().expect("analyses") {
            for row in analysis["coefficients"].as_array_mut().expect("coefficients") {
                if row["term"] != "X" {
                    continue;
                }
                rows_changed += 1;
                let (lower, upper) = (row["estimate"]["lower"].as_f64(), row["estimate"]["upper"].as_f64());
                estimate_fields(&mut row["estimate"], |key, value| match key {
                    "estimate" => Some(value / scale),
                    "standard_error" => Some(value / scale.abs()),
                    "lower" => Some(if scale > 0.0 { value } else { upper.unwrap_or(value) } / scale),
                    "upper" => Some(if scale > 0.0 { value } else { lower.unwrap_or(value) } / scale),
                    _ => None,
                });
                if scale < 0.0 {
                    // The statistic (estimate / SE) changes sign with c; its two-sided p-value does not.
                    estimate_fields(&mut row["estimate"], |key, value| (key == "statistic").then_some(-value));
                }
            }
        }
        // One X row per analysis, and one per non-reference category for the nominal model.
        prop_assert_eq!(rows_changed, 6);
        assert_same(&actual, &expected, &format!("covariate scaled by {scale:e}"));
    }

    /// (3) Renaming, reordering and re-referencing the arms permutes the contrasts
    /// (matched by id) and the per-arm numbers, and changes no comparison.
    #[test]
    fn relabelling_the_arms_permutes_the_contrasts_accordingly(
        seed in any::<u64>(), n_subjects in 60usize..150, order_index in 0usize..6, reference_arm in 0usize..3,
        names in prop::collection::btree_set("[A-Za-z][A-Za-z0-9_]{0,8}", 3),
    ) {
        let orders = [[0, 1, 2], [0, 2, 1], [1, 0, 2], [1, 2, 0], [2, 0, 1], [2, 1, 0]];
        // Names are distinct (a set) and quoted in the plan, so `null` or `no` are fine too.
        let code_of: Vec<String> = names.into_iter().collect();
        let relabelled = Arms {
            plan_order: orders[order_index].iter().map(|&arm| code_of[arm].clone()).collect(),
            reference: code_of[reference_arm].clone(),
            code_of: code_of.clone(),
        };
        let subjects = simulate(seed, n_subjects);
        let scratch = Scratch::new("invariance-relabel");
        let order = identity(n_subjects);
        let original = run_study(&scratch, &subjects, &Arms::original(), &order, &order);
        let actual = run_study(&scratch, &subjects, &relabelled, &order, &order);
        let rename = |code: &Value| -> Value {
            let index = ARMS.iter().position(|arm| code == *arm).expect("an original arm code");
            Value::String(code_of[index].clone())
        };
        // Per-arm arrays follow the plan's arm order: position p of the relabelled
        // run holds original arm orders[order_index][p].
        let permute = |values: &Value| -> Value {
            let values = values.as_array().expect("a per-arm array");
            if values.is_empty() {
                // Models without adjusted means report an empty list.
                return Value::Array(Vec::new());
            }
            Value::Array(orders[order_index].iter().map(|&arm| values[arm].clone()).collect())
        };
        let mut compared = 0;
        for (new, old) in actual["analyses"].as_array().expect("analyses").iter().zip(original["analyses"].as_array().expect("analyses")) {
            let what = format!("analysis {} with arms {:?}, reference {}", old["id"], relabelled.plan_order, relabelled.reference);
            // Contrasts by id (and category, for the nominal model), arms renamed.
            let mut expected_contrasts = old["contrasts"].clone();
            for contrast in expected_contrasts.as_array_mut().expect("contrasts") {
                contrast["arm"] = rename(&contrast["arm"]);
                contrast["versus"] = rename(&contrast["versus"]);
            }
            let key = |contrast: &Value| format!("{}/{}", contrast["id"], contrast["category"]);
            let mut sorted_new: Vec<Value> = new["contrasts"].as_array().expect("contrasts").clone();
            let mut sorted_old: Vec<Value> = expected_contrasts.as_array().expect("contrasts").clone();
            sorted_new.sort_by_key(key);
            sorted_old.sort_by_key(key);
            assert_same(&Value::Array(sorted_new), &Value::Array(sorted_old), &format!("{what}: contrasts"));
            assert_same(&new["treatment_tests"], &old["treatment_tests"], &format!("{what}: treatment tests"));
            assert_same(&new["analysed_per_arm"], &permute(&old["analysed_per_arm"]), &format!("{what}: analysed per arm"));
            // Adjusted means (linear) and standardised means (GLMs) per arm.
            let mut adjusted = permute(&old["adjusted_means"]);
            for mean in adjusted.as_array_mut().expect("adjusted means") {
                mean["arm"] = rename(&mean["arm"]);
            }
            assert_same(&new["adjusted_means"], &adjusted, &format!("{what}: adjusted means"));
            if !old["marginal"].is_null() {
                let mut means = permute(&old["marginal"]["means"]);
                for mean in means.as_array_mut().expect("means") {
                    mean["arm"] = rename(&mean["arm"]);
                }
                assert_same(&new["marginal"]["means"], &means, &format!("{what}: standardised means"));
                let effect_key = |effect: &Value| format!("{}/{}", effect["contrast"], effect["scale"]);
                let mut new_effects = new["marginal"]["effects"].as_array().expect("effects").clone();
                let mut old_effects = old["marginal"]["effects"].as_array().expect("effects").clone();
                for effect in old_effects.iter_mut() {
                    effect["arm"] = rename(&effect["arm"]);
                    effect["versus"] = rename(&effect["versus"]);
                }
                new_effects.sort_by_key(effect_key);
                old_effects.sort_by_key(effect_key);
                assert_same(&Value::Array(new_effects), &Value::Array(old_effects), &format!("{what}: standardised effects"));
            }
            // Coefficients not tied to the treatment coding (the covariate and the
            // strata) are unchanged; the intercept and cut-points move with the
            // reference arm, and the treatment rows are other parameters.
            let untied = |analysis: &Value| -> Value {
                Value::Array(
                    analysis["coefficients"].as_array().expect("coefficients").iter()
                        .filter(|row| row["term"] == "X" || row["term"] == "SITE")
                        .cloned()
                        .collect(),
                )
            };
            assert_same(&untied(new), &untied(old), &format!("{what}: covariate and stratum coefficients"));
            // The fit as a whole (log-likelihood, deviance, residual SD, …).
            let fit_numbers = |analysis: &Value| -> Value {
                let mut fit = analysis["fit"].clone();
                if let Some(object) = fit.as_object_mut() {
                    // A solver diagnostic that depends on rounding (see `without_inputs`).
                    object.remove("refinement_steps");
                }
                fit
            };
            assert_same(&fit_numbers(new), &fit_numbers(old), &format!("{what}: fit"));
            compared += 1;
        }
        prop_assert_eq!(compared, 5);
    }

    /// (4) Adding k to the continuous endpoint moves only the intercept and the adjusted means.
    #[test]
    fn adding_a_constant_to_the_endpoint_changes_only_the_intercept(
        seed in any::<u64>(), n_subjects in 60usize..150, shift in -1000.0f64..1000.0,
    ) {
        let subjects = simulate(seed, n_subjects);
        let shifted: Vec<Subject> = subjects.iter().map(|s| Subject { y: s.y + shift, ..s.clone() }).collect();
        let scratch = Scratch::new("invariance-shift");
        let order = identity(n_subjects);
        let original = without_inputs(&run_study(&scratch, &subjects, &Arms::original(), &order, &order));
        let actual = without_inputs(&run_study(&scratch, &shifted, &Arms::original(), &order, &order));
        let mut expected = original.clone();
        let linear = &mut expected["analyses"][0];
        prop_assert_eq!(&linear["id"], "linear");
        let shift_location = |estimate: &mut Value| {
            estimate_fields(estimate, |key, value| matches!(key, "estimate" | "lower" | "upper").then_some(value + shift));
        };
        for row in linear["coefficients"].as_array_mut().expect("coefficients") {
            if row["term"] == "(intercept)" {
                shift_location(&mut row["estimate"]);
            }
        }
        for mean in linear["adjusted_means"].as_array_mut().expect("adjusted means") {
            shift_location(&mut mean["estimate"]);
        }
        // The intercept's and the adjusted means' t statistics and p-values test
        // "= 0", which the shift changes; they are taken from the shifted run so
        // that every other number is still compared.
        let actual_linear = &actual["analyses"][0];
        for (index, row) in actual_linear["coefficients"].as_array().expect("coefficients").iter().enumerate() {
            if row["term"] == "(intercept)" {
                for key in ["statistic", "p_value"] {
                    linear["coefficients"][index]["estimate"][key] = row["estimate"][key].clone();
                }
            }
        }
        for (index, mean) in actual_linear["adjusted_means"].as_array().expect("adjusted means").iter().enumerate() {
            for key in ["statistic", "p_value"] {
                linear["adjusted_means"][index]["estimate"][key] = mean["estimate"][key].clone();
            }
        }
        assert_same(&actual, &expected, &format!("endpoint shifted by {shift}"));
    }
}
