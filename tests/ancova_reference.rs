//! ANCOVA fits of the least-squares engine against R's `lm` on two datasets
//! that ship with R (MASS::anorexia and datasets::mtcars). The data and the
//! reference values are in `tests/reference/ancova/` (made by
//! `make_reference.R` there, R 4.2.2, MASS 7.3-58.2; the versions are also
//! inside each JSON file). The test builds the treatment-coded design from
//! the CSV by hand, fits it, and compares coefficients, standard errors,
//! t values, residual SD, R², the F test of the three-level factor (from the
//! reduced and full residual sums of squares), adjusted means with
//! delta-method SEs and one pairwise contrast, all to 1e-8 relative. It must
//! not compute any reference value itself; p-values are checked only as far
//! as statrs's distributions allow (stated beside the check).

use cairn::models::linear::{LeastSquaresFit, LeastSquaresOptions, fit_least_squares};
use nalgebra::{DMatrix, DVector};
use serde_json::Value;
use statrs::distribution::{ContinuousCDF, FisherSnedecor, StudentsT};
use std::path::PathBuf;

/// Tolerance for every quantity the engine determines (estimates, SEs,
/// residual SD, F, adjusted means, contrasts): 1e-8 relative, as required for
/// the linear model. Measured agreement is printed with `--nocapture`.
const TOLERANCE: f64 = 1e-8;

fn reference_folder() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
        .join("tests")
        .join("reference")
        .join("ancova")
}

/// A CSV table: header names and rows of text cells. The files are written
/// by make_reference.R without quoting (it checks that no cell contains a
/// comma or quote), so splitting on commas is exact.
struct Table {
    header: Vec<String>,
    rows: Vec<Vec<String>>,
}

impl Table {
    fn read(name: &str) -> Table {
        let text = std::fs::read_to_string(reference_folder().join(format!("{name}.csv")))
            .expect("reference CSV is readable");
        let mut lines = text.lines().filter(|line| !line.is_empty());
        let header = lines
            .next()
            .expect("CSV header")
            .split(',')
            .map(String::from)
            .collect();
        let rows = lines
            .map(|line| line.split(',').map(String::from).collect())
            .collect();
        Table { header, rows }
    }

    fn column(&self, name: &str) -> Vec<&str> {
        let index = self
            .header
            .iter()
            .position(|column| column == name)
            .expect("column exists");
        self.rows.iter().map(|row| row[index].as_str()).collect()
    }

    fn numeric(&self, name: &str) -> Vec<f64> {
        self.column(name)
            .iter()
            .map(|cell| cell.parse().expect("numeric cell"))
            .collect()
    }
}

/// One term of the model formula, in formula order.
enum Term<'a> {
    /// Treatment-coded factor: name and levels, reference level first.
    Factor(&'a str, &'a [&'a str]),
    Covariate(&'a str),
}

/// Builds intercept + terms with treatment coding as R's default contrasts
/// do: one 0/1 column per non-reference level, named `<factor><level>`.
fn build_design(table: &Table, terms: &[Term]) -> (DMatrix<f64>, Vec<String>) {
    let n = table.rows.len();
    let mut columns: Vec<Vec<f64>> = vec![vec![1.0; n]];
    let mut names = vec!["(Intercept)".to_string()];
    for term in terms {
        match term {
            Term::Factor(name, levels) => {
                let cells = table.column(name);
                for cell in &cells {
                    assert!(levels.contains(cell), "unexpected level {cell} of {name}");
                }
                for level in &levels[1..] {
                    columns.push(
                        cells
                            .iter()
                            .map(|cell| if cell == level { 1.0 } else { 0.0 })
                            .collect(),
                    );
                    names.push(format!("{name}{level}"));
                }
            }
            Term::Covariate(name) => {
                columns.push(table.numeric(name));
                names.push(name.to_string());
            }
        }
    }
    let design = DMatrix::from_fn(n, columns.len(), |row, column| columns[column][row]);
    (design, names)
}

fn read_reference(name: &str) -> Value {
    let text = std::fs::read_to_string(reference_folder().join(format!("{name}_reference.json")))
        .expect("reference JSON is readable");
    serde_json::from_str(&text).expect("reference JSON parses")
}

fn number(value: &Value) -> f64 {
    value.as_f64().expect("a number in the reference file")
}

fn relative_error(value: f64, reference: f64) -> f64 {
    if value == reference {
        0.0
    } else {
        (value - reference).abs() / reference.abs()
    }
}

/// Records the worst relative error seen and fails on any above `tolerance`.
struct Checker {
    dataset: String,
    worst: f64,
    worst_label: String,
    worst_with_statrs: f64,
    failures: Vec<String>,
}

impl Checker {
    fn new(dataset: &str) -> Checker {
        Checker {
            dataset: dataset.into(),
            worst: 0.0,
            worst_label: String::new(),
            worst_with_statrs: 0.0,
            failures: Vec::new(),
        }
    }

    /// Checks a value that also depends on a statrs distribution function
    /// (p-values, CI bounds); tracked separately from the engine's own values.
    fn check_with_statrs(&mut self, label: &str, value: f64, reference: f64, tolerance: f64) {
        let error = relative_error(value, reference);
        self.worst_with_statrs = self.worst_with_statrs.max(error);
        if error.is_nan() || error > tolerance {
            self.failures.push(format!(
                "{label}: {value} vs R {reference} (relative {error:.2e})"
            ));
        }
    }

    fn check(&mut self, label: &str, value: f64, reference: f64, tolerance: f64) {
        let error = relative_error(value, reference);
        if error > self.worst {
            self.worst = error;
            self.worst_label = label.to_string();
        }
        if error.is_nan() || error > tolerance {
            self.failures.push(format!(
                "{label}: {value} vs R {reference} (relative {error:.2e})"
            ));
        }
    }

    fn finish(self) {
        println!(
            "{}: worst relative error {:.2e} ({}); with statrs p-values/quantiles {:.2e}",
            self.dataset, self.worst, self.worst_label, self.worst_with_statrs
        );
        assert!(
            self.failures.is_empty(),
            "{}: {:#?}",
            self.dataset,
            self.failures
        );
    }
}

fn fit(design: &DMatrix<f64>, response: &[f64]) -> LeastSquaresFit {
    fit_least_squares(design, response, &LeastSquaresOptions::default()).expect("design fits")
}

/// Keeps the columns whose names do not start with `factor` followed by a level.
fn without_factor(
    design: &DMatrix<f64>,
    names: &[String],
    factor: &str,
    levels: &[&str],
) -> DMatrix<f64> {
    let keep: Vec<usize> = (0..names.len())
        .filter(|&column| {
            !levels
                .iter()
                .any(|level| names[column] == format!("{factor}{level}"))
        })
        .collect();
    DMatrix::from_fn(design.nrows(), keep.len(), |row, column| {
        design[(row, keep[column])]
    })
}

fn check_dataset(dataset: &str, terms: &[Term], factor: &str, factor_levels: &[&str]) {
    let table = Table::read(dataset);
    let reference = read_reference(dataset);
    let response = table.numeric(reference["response"].as_str().expect("response name"));
    let (design, names) = build_design(&table, terms);

    // The design must be the one R used: same rows and columns, same order.
    let reference_names: Vec<&str> = reference["design_columns"]
        .as_array()
        .expect("design columns")
        .iter()
        .map(|name| name.as_str().expect("column name"))
        .collect();
    assert_eq!(names, reference_names, "{dataset}: design columns");
    let reference_levels: Vec<&str> = reference["factor_levels"]
        .as_array()
        .expect("levels")
        .iter()
        .filter_map(Value::as_str)
        .collect();
    assert_eq!(factor_levels, reference_levels.as_slice());
    assert_eq!(
        design.nrows() as u64,
        reference["n_observations"].as_u64().expect("n")
    );

    let full = fit(&design, &response);
    assert!(
        full.aliased_columns.is_empty(),
        "{dataset}: R found no aliased column"
    );
    let mut checker = Checker::new(dataset);
    let sigma = full.residual_standard_deviation().expect("residual df ≥ 1");
    let standard_errors = full.coefficient_standard_errors();
    let residual_df = full.residual_df as f64;
    assert_eq!(
        full.residual_df as u64,
        reference["residual_df"].as_u64().expect("df")
    );
    // statrs's Student t: p-values are checked to 1e-6 relative only; they
    // test the distribution function, not the engine.
    let t_distribution = StudentsT::new(0.0, 1.0, residual_df).expect("valid t distribution");

    for (column, entry) in reference["coefficients"]
        .as_array()
        .expect("coefficients")
        .iter()
        .enumerate()
    {
        let name = entry["name"].as_str().expect("name");
        let estimate = full.coefficients[column].expect("estimated");
        let standard_error = standard_errors[column].expect("standard error");
        let t_value = estimate / standard_error;
        // Source: R lm, summary(fit)$coefficients.
        checker.check(
            &format!("{name} estimate"),
            estimate,
            number(&entry["estimate"]),
            TOLERANCE,
        );
        checker.check(
            &format!("{name} SE"),
            standard_error,
            number(&entry["std_error"]),
            TOLERANCE,
        );
        checker.check(
            &format!("{name} t"),
            t_value,
            number(&entry["t_value"]),
            TOLERANCE,
        );
        let p_value = 2.0 * t_distribution.cdf(-t_value.abs());
        checker.check_with_statrs(
            &format!("{name} p"),
            p_value,
            number(&entry["p_value"]),
            1e-6,
        );
    }
    // Source: R summary.lm sigma, r.squared; sum(residuals^2).
    checker.check(
        "residual SD",
        sigma,
        number(&reference["residual_standard_deviation"]),
        TOLERANCE,
    );
    checker.check(
        "RSS",
        full.residual_sum_of_squares,
        number(&reference["residual_sum_of_squares"]),
        TOLERANCE,
    );
    let r_squared = full.r_squared(&response, true).expect("response varies");
    checker.check(
        "R squared",
        r_squared,
        number(&reference["r_squared"]),
        TOLERANCE,
    );

    // F test of the factor given the other terms. Source: R anova(reduced, full).
    let reduced = fit(
        &without_factor(&design, &names, factor, &factor_levels[1..]),
        &response,
    );
    let df1 = (full.rank - reduced.rank) as f64;
    let test = &reference["factor_test"];
    assert_eq!(df1 as u64, test["df1"].as_u64().expect("df1"));
    assert_eq!(full.residual_df as u64, test["df2"].as_u64().expect("df2"));
    let f_statistic = ((reduced.residual_sum_of_squares - full.residual_sum_of_squares) / df1)
        / (full.residual_sum_of_squares / residual_df);
    checker.check(
        "reduced RSS",
        reduced.residual_sum_of_squares,
        number(&test["rss_reduced"]),
        TOLERANCE,
    );
    checker.check("F", f_statistic, number(&test["F"]), TOLERANCE);
    // The same F from the full fit alone, as the inference stage may compute
    // it: the Wald form (Lβ)ᵀ [L (XᵀX)⁻¹ Lᵀ]⁻¹ (Lβ) / (df1 · s²) equals the
    // extra sum of squares over df1 · s² (Searle, *Linear Models*, 1971, §3.6).
    let factor_columns: Vec<usize> = (0..names.len())
        .filter(|&column| {
            factor_levels[1..]
                .iter()
                .any(|level| names[column] == format!("{factor}{level}"))
        })
        .collect();
    let q = factor_columns.len();
    let sub_covariance = DMatrix::from_fn(q, q, |a, b| {
        full.unscaled_covariance[(factor_columns[a], factor_columns[b])]
    });
    let sub_estimates = DVector::from_fn(q, |a, _| {
        full.coefficients[factor_columns[a]].expect("estimated")
    });
    let cholesky = sub_covariance
        .cholesky()
        .expect("covariance block is positive definite");
    let wald = sub_estimates.dot(&cholesky.solve(&sub_estimates));
    checker.check(
        "F (Wald form)",
        wald / (df1 * sigma * sigma),
        number(&test["F"]),
        TOLERANCE,
    );
    // statrs's F distribution, 1e-6 relative as for the t p-values.
    let f_distribution = FisherSnedecor::new(df1, residual_df).expect("valid F distribution");
    checker.check_with_statrs(
        "F p",
        f_distribution.sf(f_statistic),
        number(&test["p_value"]),
        1e-6,
    );

    // Adjusted means: a = column means of the design with every row set to
    // the level; estimate a'β, SE sqrt(a' V a) with V = s²(XᵀX)⁻¹. The
    // averaged rows are rebuilt here from the CSV, not read from the file.
    let coefficients = DVector::from_iterator(
        names.len(),
        full.coefficients.iter().map(|c| c.expect("estimated")),
    );
    let covariance = &full.unscaled_covariance * (sigma * sigma);
    let averaged_row = |level: &str| -> DVector<f64> {
        let mut row = DVector::from_fn(names.len(), |column, _| design.column(column).mean());
        for other in &factor_levels[1..] {
            let position = names
                .iter()
                .position(|name| *name == format!("{factor}{other}"))
                .expect("dummy");
            row[position] = if *other == level { 1.0 } else { 0.0 };
        }
        row
    };
    for entry in reference["adjusted_means"]
        .as_array()
        .expect("adjusted means")
    {
        let level = entry["level"].as_str().expect("level");
        let row = averaged_row(level);
        // Source: R mean(predict(fit, counterfactual data)); delta-method SE.
        checker.check(
            &format!("adjusted mean {level}"),
            row.dot(&coefficients),
            number(&entry["estimate"]),
            TOLERANCE,
        );
        let standard_error = (row.transpose() * &covariance * &row)[(0, 0)].sqrt();
        checker.check(
            &format!("adjusted mean SE {level}"),
            standard_error,
            number(&entry["std_error"]),
            TOLERANCE,
        );
    }

    // Pairwise contrast level − versus, with t-based 95% CI.
    let contrast = &reference["contrast"];
    let vector = averaged_row(contrast["level"].as_str().expect("level"))
        - averaged_row(contrast["versus"].as_str().expect("versus"));
    let estimate = vector.dot(&coefficients);
    let standard_error = (vector.transpose() * &covariance * &vector)[(0, 0)].sqrt();
    // Source: R, difference of averaged rows, qt(0.975, df).
    checker.check(
        "contrast estimate",
        estimate,
        number(&contrast["estimate"]),
        TOLERANCE,
    );
    checker.check(
        "contrast SE",
        standard_error,
        number(&contrast["std_error"]),
        TOLERANCE,
    );
    checker.check(
        "contrast t",
        estimate / standard_error,
        number(&contrast["t_value"]),
        TOLERANCE,
    );
    let quantile = t_distribution.inverse_cdf(0.975);
    // The CI bounds also depend on statrs's t quantile; 1e-8 holds when the
    // quantile is accurate to about 1e-9 (it is checked here implicitly).
    checker.check_with_statrs(
        "contrast CI low",
        estimate - quantile * standard_error,
        number(&contrast["conf_low"]),
        TOLERANCE,
    );
    checker.check_with_statrs(
        "contrast CI high",
        estimate + quantile * standard_error,
        number(&contrast["conf_high"]),
        TOLERANCE,
    );
    checker.check_with_statrs(
        "contrast p",
        2.0 * t_distribution.cdf(-(estimate / standard_error).abs()),
        number(&contrast["p_value"]),
        1e-6,
    );
    checker.finish();
}

// Source: R 4.2.2 lm on MASS::anorexia, Postwt ~ Treat + Prewt, Treat
// reference "Cont" (tests/reference/ancova/anorexia_reference.json).
#[test]
fn anorexia_ancova_matches_r() {
    let levels = ["Cont", "CBT", "FT"];
    check_dataset(
        "anorexia",
        &[Term::Factor("Treat", &levels), Term::Covariate("Prewt")],
        "Treat",
        &levels,
    );
}

// Source: R 4.2.2 lm on datasets::mtcars, mpg ~ cyl + wt + gear with cyl and
// gear as factors (tests/reference/ancova/mtcars_reference.json).
#[test]
fn mtcars_factor_covariate_and_block_matches_r() {
    let cylinders = ["cyl4", "cyl6", "cyl8"];
    let gears = ["gear3", "gear4", "gear5"];
    check_dataset(
        "mtcars",
        &[
            Term::Factor("cyl", &cylinders),
            Term::Covariate("wt"),
            Term::Factor("gear", &gears),
        ],
        "cyl",
        &cylinders,
    );
}
