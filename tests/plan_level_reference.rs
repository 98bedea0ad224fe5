//! Whole plans for every nonlinear model family (binomial, Poisson with
//! exposure, negative binomial, cumulative logit, baseline-category logit)
//! against R, through the `cairn` binary: plan → data → design → fit →
//! results.json. The engines are checked on hand-built designs elsewhere
//! (tests/glm_reference.rs, tests/ordinal_reference.rs,
//! tests/multinomial_reference.rs); this test checks the wiring — that the
//! plan's treatment, reference arm, covariates, strata, pooling, population,
//! missing values, exposure, event and reference-category keys build the
//! design R fits, and that contrasts (including a pair of non-reference arms),
//! their exponentials, the Wald and likelihood-ratio tests of treatment, the
//! standardised risk difference and the proportional-odds check come out as R
//! computes them.
//!
//! Reference values: tests/reference/plan_level/*_reference.json, written by
//! tests/reference/plan_level/make_reference.R (R 4.2.2, MASS 7.3-58.2,
//! ordinal 2022.11.16, nnet 7.3-18; the versions are also inside each JSON
//! file). The subjects and allocation files beside them are copied into a
//! temporary study folder with the plan written here.

mod common;

use common::{Scratch, cairn, read_json, relative_error, root};
use serde_json::Value;

/// Relative tolerance asked for the plan-level checks: every reference value
/// is R's at its converged (polished) maximum, so agreement is limited by the
/// convergence criteria of both programs, far below this.
const TOLERANCE: f64 = 1e-6;

fn number(value: &Value, what: &str) -> f64 {
    value
        .as_f64()
        .unwrap_or_else(|| panic!("{what}: not a number: {value}"))
}

/// Compare one number from results.json with R's, naming the source in the message.
fn close(actual: &Value, expected: &Value, source: &str, what: &str) -> f64 {
    let (actual, expected) = (actual.as_f64().unwrap_or(f64::NAN), number(expected, what));
    let error = relative_error(actual, expected);
    assert!(
        error <= TOLERANCE,
        "{source}: {what}: cairn {actual:e}, R {expected:e}, relative error {error:e}"
    );
    error
}

/// Run the plan on the case's study files and return the single analysis of results.json.
fn run(study: &str, plan: &str) -> Value {
    let scratch = Scratch::new(study);
    let folder = root().join("tests/reference/plan_level");
    for (file, target) in [
        ("subjects", "data/subjects.csv"),
        ("allocation", "data/allocation.csv"),
    ] {
        let text = std::fs::read(folder.join(format!("{study}_{file}.csv")))
            .expect("reference study file");
        scratch.write(target, text);
    }
    scratch.write("plan.yaml", plan);
    let outcome = cairn(&scratch.path, &["run", "plan.yaml", "--out", "out"]);
    assert_eq!(outcome.code, 0, "run failed: {}", outcome.stderr);
    let results = read_json(&scratch.path.join("out/results.json"));
    let analyses = results["analyses"].as_array().expect("analyses");
    assert_eq!(analyses.len(), 1);
    let analysis = analyses[0].clone();
    assert_eq!(
        analysis["status"], "fitted",
        "failure: {}",
        analysis["failure"]
    );
    analysis
}

/// The checks shared by every family: design size and column names, coefficients and SEs, every
/// planned contrast with its exponential, and both overall tests of treatment. Returns the
/// largest relative error seen.
fn check_common(analysis: &Value, reference: &Value, source: &str) -> f64 {
    let mut worst: f64 = 0.0;
    assert_eq!(
        analysis["fit"]["n_analysed"], reference["n_analysed"],
        "{source}: analysed subjects"
    );

    // Coefficients in cairn's design order, which R's formula reproduces term by term.
    let ours = analysis["coefficients"].as_array().expect("coefficients");
    let theirs = reference["coefficients"]
        .as_array()
        .expect("reference coefficients");
    assert_eq!(ours.len(), theirs.len(), "{source}: number of parameters");
    for (ours, theirs) in ours.iter().zip(theirs) {
        let name = theirs["cairn_name"].as_str().expect("name");
        assert_eq!(
            ours["name"], theirs["cairn_name"],
            "{source}: parameter order (R's {})",
            theirs["r_name"]
        );
        if let Some(category) = theirs.get("category") {
            assert_eq!(&ours["category"], category, "{source}: category of {name}");
        }
        let label = format!("{name} [{}]", theirs["r_name"].as_str().unwrap_or("?"));
        worst = worst.max(close(
            &ours["estimate"]["estimate"],
            &theirs["estimate"],
            source,
            &format!("estimate of {label}"),
        ));
        worst = worst.max(close(
            &ours["estimate"]["standard_error"],
            &theirs["std_error"],
            source,
            &format!("SE of {label}"),
        ));
    }

    // Contrasts, found by arm, versus and category; the count must match the plan's.
    let ours = analysis["contrasts"].as_array().expect("contrasts");
    let theirs = reference["contrasts"]
        .as_array()
        .expect("reference contrasts");
    assert_eq!(ours.len(), theirs.len(), "{source}: number of contrasts");
    for expected in theirs {
        let found = ours
            .iter()
            .find(|c| {
                c["arm"] == expected["arm"]
                    && c["versus"] == expected["versus"]
                    && c["category"] == expected["category"]
            })
            .unwrap_or_else(|| {
                panic!(
                    "{source}: no contrast {} vs {} ({})",
                    expected["arm"], expected["versus"], expected["category"]
                )
            });
        assert!(
            found["failure"].is_null(),
            "{source}: contrast failed: {}",
            found["failure"]
        );
        let label = format!(
            "{} − {} {}",
            expected["arm"],
            expected["versus"],
            if expected["category"].is_null() {
                String::new()
            } else {
                format!("(category {})", expected["category"])
            }
        );
        let estimate = &found["estimate"];
        for (field, theirs) in [
            ("estimate", "estimate"),
            ("standard_error", "std_error"),
            ("statistic", "statistic"),
            ("p_value", "p_value"),
            ("lower", "lower"),
            ("upper", "upper"),
        ] {
            worst = worst.max(close(
                &estimate[field],
                &expected[theirs],
                source,
                &format!("contrast {label} {field}"),
            ));
        }
        let ratio = &found["ratio"];
        for (field, theirs) in [
            ("estimate", "ratio"),
            ("lower", "ratio_lower"),
            ("upper", "ratio_upper"),
        ] {
            worst = worst.max(close(
                &ratio[field],
                &expected[theirs],
                source,
                &format!("exp(contrast {label}) {field}"),
            ));
        }
    }

    // Overall tests of treatment: Wald chi-square from R's vcov by hand, likelihood ratio from
    // the nested fits' log-likelihoods.
    let tests = analysis["treatment_tests"]
        .as_array()
        .expect("treatment tests");
    assert!(
        analysis["treatment_test_failure"].is_null(),
        "{source}: {}",
        analysis["treatment_test_failure"]
    );
    for (name, key) in [
        ("Wald chi-square", "wald"),
        ("likelihood ratio", "likelihood_ratio"),
    ] {
        let test = tests
            .iter()
            .find(|test| test["statistic_name"] == name)
            .unwrap_or_else(|| panic!("{source}: no {name} test"));
        worst = worst.max(close(
            &test["statistic"],
            &reference[key]["statistic"],
            source,
            &format!("{name} statistic"),
        ));
        worst = worst.max(close(
            &test["df1"],
            &reference[key]["df"],
            source,
            &format!("{name} df"),
        ));
        worst = worst.max(close(
            &test["p_value"],
            &reference[key]["p_value"],
            source,
            &format!("{name} p-value"),
        ));
    }
    worst
}

fn reference(case: &str) -> Value {
    read_json(&root().join(format!("tests/reference/plan_level/{case}_reference.json")))
}

#[test]
fn binomial_logit_plan_matches_r_glm_on_birthwt() {
    // Source: R 4.2.2 stats::glm(event ~ RACE + AGE + LWT + SMOKE, binomial(logit)) on
    // MASS::birthwt without subjects 5 and 15 (population flag) and 10, 20, 30 (LWT missing);
    // the standardised risks are R's predict(type = "response") averaged with RACE set to each arm.
    let source = "R glm binomial logit, MASS::birthwt (birthwt_logit_reference.json)";
    let plan = r#"cairn-plan: 1
study: {id: REF-birthwt, title: reference check, alpha: 0.05, sides: 2}
data:
  subjects: data/subjects.csv
  key: USUBJID
  treatment: {file: data/allocation.csv, column: RACE, levels: [white, black, other], reference: white}
variables:
  FASFL: {kind: factor, levels: ["Y", "N"]}
  LOWBW: {kind: factor, levels: [normal, low]}
  AGE: {kind: numeric}
  LWT: {kind: numeric}
  SMOKE: {kind: factor, levels: ["no", "yes"]}
populations:
  fas: {flag: FASFL, equals: "Y"}
analyses:
  - id: low-birth-weight
    endpoint: {column: LOWBW, kind: binary, event: low, higher-is: worse}
    population: fas
    model: {family: binomial, link: logit}
    covariates: [AGE, LWT]
    strata: [SMOKE]
    contrasts:
      - {arm: black, versus: white}
      - {arm: other, versus: white}
      - {arm: other, versus: black}
"#;
    let analysis = run("birthwt_logit", plan);
    let reference = reference("birthwt_logit");
    let mut worst = check_common(&analysis, &reference, source);
    // The missing LWT values are counted as exclusions per arm: subjects 10 and 20 are white and
    // 30 is black (MASS::birthwt race codes, in birthwt_logit_allocation.csv).
    let exclusions = analysis["exclusions"].as_array().expect("exclusions");
    assert_eq!(exclusions.len(), 1);
    assert_eq!(exclusions[0]["missing"], "LWT");
    assert_eq!(
        exclusions[0]["per_arm"],
        serde_json::json!([2, 1, 0]),
        "subjects with LWT missing per arm"
    );
    // The deviance and log-likelihood of the fit.
    worst = worst.max(close(
        &analysis["fit"]["deviance"],
        &reference["deviance"],
        source,
        "deviance",
    ));
    worst = worst.max(close(
        &analysis["fit"]["log_likelihood"],
        &reference["log_likelihood"],
        source,
        "log-likelihood",
    ));
    // Standardised risks and risk differences (point estimates only; their variance is checked
    // in tests/marginal_reference.rs).
    let marginal = &analysis["marginal"];
    for expected in reference["standardised_risks"].as_array().expect("risks") {
        let found = marginal["means"]
            .as_array()
            .expect("means")
            .iter()
            .find(|mean| mean["arm"] == expected["arm"])
            .expect("arm mean");
        worst = worst.max(close(
            &found["mean"],
            &expected["mean"],
            source,
            &format!("standardised risk of {}", expected["arm"]),
        ));
    }
    for expected in reference["risk_differences"]
        .as_array()
        .expect("risk differences")
    {
        let found = marginal["effects"]
            .as_array()
            .expect("effects")
            .iter()
            .find(|effect| {
                effect["scale"] == "risk difference"
                    && effect["arm"] == expected["arm"]
                    && effect["versus"] == expected["versus"]
            })
            .expect("risk difference");
        worst = worst.max(close(
            &found["estimate"],
            &expected["estimate"],
            source,
            &format!(
                "risk difference {} − {}",
                expected["arm"], expected["versus"]
            ),
        ));
    }
    eprintln!("birthwt_logit: largest relative error {worst:e}");
}

#[test]
fn poisson_plan_with_exposure_matches_r_glm_on_insurance() {
    // Source: R 4.2.2 stats::glm(CLAIMS ~ AGEGRP + DISTRICT + GROUP + offset(log(HOLDERS)),
    // poisson) on MASS::Insurance, with the reference arm the last level in plan order.
    let source = "R glm Poisson with offset, MASS::Insurance (insurance_poisson_reference.json)";
    let plan = r#"cairn-plan: 1
study: {id: REF-insurance, title: reference check, alpha: 0.05, sides: 2}
data:
  subjects: data/subjects.csv
  key: USUBJID
  treatment: {file: data/allocation.csv, column: AGEGRP, levels: [age-u25, age-25-29, age-30-35, age-o35], reference: age-o35}
variables:
  ALLFL: {kind: factor, levels: ["Y", "N"]}
  CLAIMS: {kind: count}
  HOLDERS: {kind: numeric}
  DISTRICT: {kind: factor, levels: [D1, D2, D3, D4]}
  GROUP: {kind: factor}
populations:
  all: {flag: ALLFL, equals: "Y"}
analyses:
  - id: claims
    endpoint: {column: CLAIMS, kind: count, higher-is: worse}
    population: all
    model: {family: poisson, exposure: HOLDERS}
    covariates: [DISTRICT]
    strata: [GROUP]
    contrasts: all-pairs
"#;
    let analysis = run("insurance_poisson", plan);
    let reference = reference("insurance_poisson");
    let mut worst = check_common(&analysis, &reference, source);
    assert_eq!(analysis["contrasts"][0]["ratio"]["name"], "rate ratio");
    worst = worst.max(close(
        &analysis["fit"]["deviance"],
        &reference["deviance"],
        source,
        "deviance",
    ));
    worst = worst.max(close(
        &analysis["fit"]["log_likelihood"],
        &reference["log_likelihood"],
        source,
        "log-likelihood",
    ));
    eprintln!("insurance_poisson: largest relative error {worst:e}");
}

#[test]
fn negative_binomial_plan_matches_r_glm_nb_on_quine() {
    // Source: R 4.2.2 MASS::glm.nb(DAYS ~ AGE + SEX + LRN + ETH) on MASS::quine, polished to its
    // maximum with MASS::theta.ml and glm.fit; reference arm F1 (the second level in plan order).
    let source = "R MASS::glm.nb, MASS::quine (quine_negbin_reference.json)";
    let plan = r#"cairn-plan: 1
study: {id: REF-quine, title: reference check, alpha: 0.05, sides: 2}
data:
  subjects: data/subjects.csv
  key: USUBJID
  treatment: {file: data/allocation.csv, column: AGE, levels: [F0, F1, F2, F3], reference: F1}
variables:
  ALLFL: {kind: factor, levels: ["Y", "N"]}
  DAYS: {kind: count}
  SEX: {kind: factor, levels: [F, M]}
  LRN: {kind: factor, levels: [AL, SL]}
  ETH: {kind: factor, levels: [A, "N"]}
populations:
  all: {flag: ALLFL, equals: "Y"}
analyses:
  - id: days-absent
    endpoint: {column: DAYS, kind: count, higher-is: worse}
    population: all
    model: {family: negative-binomial}
    covariates: [SEX, LRN]
    strata: [ETH]
    contrasts: all-pairs
"#;
    let analysis = run("quine_negbin", plan);
    let reference = reference("quine_negbin");
    let mut worst = check_common(&analysis, &reference, source);
    worst = worst.max(close(
        &analysis["fit"]["theta"],
        &reference["theta"],
        source,
        "theta",
    ));
    worst = worst.max(close(
        &analysis["fit"]["theta_standard_error"],
        &reference["theta_se"],
        source,
        "SE of theta",
    ));
    worst = worst.max(close(
        &analysis["fit"]["log_likelihood"],
        &reference["log_likelihood"],
        source,
        "log-likelihood",
    ));
    eprintln!("quine_negbin: largest relative error {worst:e}");
}

#[test]
fn cumulative_logit_plan_with_pooled_strata_matches_r_clm_on_housing() {
    // Source: R 4.2.2 ordinal::clm(SAT ~ INFL + CONT + TYPE_POOLED, link = "logit") on
    // MASS::housing expanded by Freq (1681 respondents), with Atrium and Terrace pooled as the
    // plan asks; proportional-odds LR tests from clm fits with nominal = ~ term.
    let source = "R ordinal::clm, MASS::housing (housing_cumulative_reference.json)";
    let plan = r#"cairn-plan: 1
study: {id: REF-housing, title: reference check, alpha: 0.05, sides: 2}
data:
  subjects: data/subjects.csv
  key: USUBJID
  treatment: {file: data/allocation.csv, column: INFL, levels: [Low, Medium, High], reference: Low}
variables:
  ALLFL: {kind: factor, levels: ["Y", "N"]}
  SAT: {kind: ordinal, levels: [Low, Medium, High]}
  CONT: {kind: factor, levels: [Low, High]}
  TYPE: {kind: factor, levels: [Tower, Apartment, Atrium, Terrace]}
populations:
  all: {flag: ALLFL, equals: "Y"}
analyses:
  - id: satisfaction
    endpoint: {column: SAT, kind: ordinal, higher-is: better}
    population: all
    model: {family: cumulative, link: logit}
    covariates: [CONT]
    strata: [TYPE]
    pool-small-strata: {below: 300, into: pooled-types}
    contrasts:
      - {arm: Medium, versus: Low}
      - {arm: High, versus: Low}
      - {arm: High, versus: Medium}
    checks: [proportional-odds]
"#;
    let analysis = run("housing", plan);
    let reference = reference("housing_cumulative");
    let mut worst = check_common(&analysis, &reference, source);
    assert_eq!(analysis["contrasts"][0]["ratio"]["name"], "odds ratio");
    worst = worst.max(close(
        &analysis["fit"]["log_likelihood"],
        &reference["log_likelihood"],
        source,
        "log-likelihood",
    ));

    // The pooling rule merged exactly the two small types, with R's counts.
    let pooling = &analysis["pooling"][0];
    assert_eq!(pooling["stratum"], "TYPE");
    assert_eq!(pooling["into"], "pooled-types");
    let pooled = pooling["pooled_levels"].as_array().expect("pooled levels");
    let expected = reference["pooled_levels"]
        .as_array()
        .expect("reference pooled levels");
    assert_eq!(pooled.len(), expected.len());
    for (ours, theirs) in pooled.iter().zip(expected) {
        assert_eq!(ours["level"], theirs["level"]);
        assert_eq!(ours["subjects"], theirs["subjects"]);
    }

    // Proportional-odds check: per term, LR against the model with cut-point-specific effects.
    let check = analysis["checks"]
        .as_array()
        .expect("checks")
        .iter()
        .find(|check| {
            check["name"]
                .as_str()
                .is_some_and(|name| name.contains("likelihood-ratio"))
        })
        .expect("proportional-odds LR check")
        .clone();
    let rows = check["rows"].as_array().expect("rows");
    let expected_rows = reference["proportional_odds"]
        .as_array()
        .expect("reference rows");
    assert_eq!(
        rows.len(),
        expected_rows.len(),
        "{source}: proportional-odds rows"
    );
    for expected in expected_rows {
        let row = rows
            .iter()
            .find(|row| row["term"] == expected["term"])
            .unwrap_or_else(|| panic!("no row for {}", expected["term"]));
        let term = expected["term"].as_str().unwrap_or("?");
        worst = worst.max(close(
            &row["statistic"],
            &expected["statistic"],
            source,
            &format!("proportional-odds LR of {term}"),
        ));
        worst = worst.max(close(
            &row["df"],
            &expected["df"],
            source,
            &format!("proportional-odds df of {term}"),
        ));
        worst = worst.max(close(
            &row["p_value"],
            &expected["p_value"],
            source,
            &format!("proportional-odds p of {term}"),
        ));
    }
    eprintln!("housing_cumulative: largest relative error {worst:e}");
}

#[test]
fn multinomial_plan_with_non_first_reference_category_matches_r_on_housing() {
    // Source: R 4.2.2 nnet::multinom(SAT ~ INFL + CONT + TYPE) on MASS::housing expanded by Freq,
    // SAT releveled to reference Medium, polished by Newton-Raphson in R (make_reference.R).
    let source =
        "R nnet::multinom + Newton polish, MASS::housing (housing_multinomial_reference.json)";
    let plan = r#"cairn-plan: 1
study: {id: REF-housing-nominal, title: reference check, alpha: 0.05, sides: 2}
data:
  subjects: data/subjects.csv
  key: USUBJID
  treatment: {file: data/allocation.csv, column: INFL, levels: [Low, Medium, High], reference: Low}
variables:
  ALLFL: {kind: factor, levels: ["Y", "N"]}
  SAT: {kind: factor, levels: [Low, Medium, High]}
  CONT: {kind: factor, levels: [Low, High]}
  TYPE: {kind: factor, levels: [Tower, Apartment, Atrium, Terrace]}
populations:
  all: {flag: ALLFL, equals: "Y"}
analyses:
  - id: satisfaction-nominal
    endpoint: {column: SAT, kind: nominal}
    population: all
    model: {family: multinomial, reference-category: Medium}
    covariates: [CONT]
    strata: [TYPE]
    contrasts: all-pairs
"#;
    let analysis = run("housing", plan);
    let reference = reference("housing_multinomial");
    let mut worst = check_common(&analysis, &reference, source);
    assert_eq!(
        analysis["contrasts"][0]["ratio"]["name"],
        "relative-risk ratio"
    );
    worst = worst.max(close(
        &analysis["fit"]["log_likelihood"],
        &reference["log_likelihood"],
        source,
        "log-likelihood",
    ));
    eprintln!("housing_multinomial: largest relative error {worst:e}");
}
