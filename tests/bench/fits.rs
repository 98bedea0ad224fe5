//! The speed-and-scale benchmark (not a test: it asserts agreement of estimates, never a time).
//! Run with `cargo bench --bench fits -- [--max-n 100000] [--plan-n 1000000] [--no-plans]
//! [--no-statsmodels] [--keep]` (`--keep` leaves the temporary folder with the data in place).
//!
//! What it does, in one run: for 10³, 10⁴, 10⁵ and 10⁶ subjects (three arms, 20/30/40/50
//! sites, a baseline covariate) it draws a seeded synthetic trial (`synthetic.rs`), writes it as
//! CSV to a temporary folder, times cairn's engines on the design (intercept, two arm
//! indicators, baseline, site indicators), then runs `tests/bench/statsmodels_side.py` on the
//! CSV, which times the same fits in statsmodels and prints JSON. It checks that both sides
//! found the same estimates (tolerances in `TOLERANCES`, stated in the output), and prints a
//! table of times, ratios and differences, the achieved flop rate of cairn's GLM and linear
//! fits (iterations × n·p² / time), the end-to-end time of the demo plan (median of 5) and the
//! time and peak memory of `cairn run` on a generated 10⁶-subject, six-analysis study. Targets
//! are printed beside the measurements and never asserted. If python3 or statsmodels is
//! missing it says so and times cairn only.
//!
//! It owns no library code. Timing uses the wall clock of this process; statsmodels is timed
//! inside Python with `time.perf_counter`, both sides single-threaded (the BLAS thread count is
//! set to 1 for Python).

mod synthetic;

use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Instant;

use cairn::models::StopReason;
use cairn::models::glm::{Family, GlmData, GlmOptions, Link, fit_glm};
use cairn::models::linear::{LeastSquaresOptions, fit_least_squares};
use cairn::models::multinomial::{MultinomialOptions, fit_multinomial_logit};
use cairn::models::ordinal::{CumulativeLinkOptions, fit_cumulative_link};
use nalgebra::DMatrix;
use serde_json::Value;

const SIZES: [(usize, usize); 4] = [(1_000, 20), (10_000, 30), (100_000, 40), (1_000_000, 50)];
const MODELS: [&str; 6] = [
    "linear",
    "binomial",
    "poisson",
    "negative-binomial",
    "cumulative",
    "multinomial",
];
/// statsmodels fits projected (from the previous size, scaled by n·p²) to take longer than this
/// are skipped.
const STATSMODELS_BUDGET_SECONDS: f64 = 120.0;
/// The OrderedModel optimiser (chosen by a pilot at 10³–10⁴: see README's Benchmarks section).
const ORDINAL_METHOD: &str = "bfgs";

/// Agreement required of each model: (max relative difference of the treatment coefficients,
/// max |difference| / cairn's standard error over every estimate).
fn tolerances(model: &str) -> (f64, f64) {
    match model {
        // Both direct QR solutions: only rounding differs.
        "linear" => (1e-9, 1e-8),
        // Both IRLS to tight deviance criteria.
        "binomial" | "poisson" => (1e-6, 1e-5),
        // Joint Newton (statsmodels) against θ/β alternation (cairn), both to tight criteria.
        "negative-binomial" => (1e-6, 1e-5),
        // statsmodels' BFGS stops on a gradient norm of 1e-5 per observation with a numerical
        // gradient, well before cairn's Newton criterion.
        "cumulative" => (1e-3, 1e-2),
        "multinomial" => (1e-6, 1e-5),
        _ => (0.0, 0.0),
    }
}

/// (cairn runs, statsmodels runs, OrderedModel runs): OrderedModel takes about two minutes a
/// run at 10⁵, so it is run once there.
fn runs_for(n: usize) -> (usize, usize, usize) {
    match n {
        0..=10_000 => (5, 5, 5),
        10_001..=100_000 => (3, 3, 1),
        _ => (3, 1, 1),
    }
}

/// CPU time of the calling thread in seconds (clock_gettime with CLOCK_THREAD_CPUTIME_ID, from
/// the C library std already links): unlike the wall clock it does not count time spent waiting
/// for a core, which matters on a shared machine. `None` off Linux or if the call fails.
#[cfg(target_os = "linux")]
fn thread_cpu_seconds() -> Option<f64> {
    #[repr(C)]
    struct Timespec {
        seconds: i64,
        nanoseconds: i64,
    }
    unsafe extern "C" {
        fn clock_gettime(clock: i32, time: *mut Timespec) -> i32;
    }
    const CLOCK_THREAD_CPUTIME_ID: i32 = 3;
    let mut time = Timespec {
        seconds: 0,
        nanoseconds: 0,
    };
    // SAFETY: `time` is a valid, writable timespec (two 64-bit fields on 64-bit Linux).
    let status = unsafe { clock_gettime(CLOCK_THREAD_CPUTIME_ID, &mut time) };
    (status == 0).then(|| time.seconds as f64 + time.nanoseconds as f64 * 1e-9)
}

#[cfg(not(target_os = "linux"))]
fn thread_cpu_seconds() -> Option<f64> {
    None
}

/// Times one call: (wall seconds, CPU seconds; the wall time when CPU time is unavailable).
fn timed<T>(work: impl FnOnce() -> T) -> (T, f64, f64) {
    let cpu_start = thread_cpu_seconds();
    let start = Instant::now();
    let value = work();
    let wall = start.elapsed().as_secs_f64();
    let cpu = match (cpu_start, thread_cpu_seconds()) {
        (Some(before), Some(after)) => after - before,
        _ => wall,
    };
    (value, wall, cpu)
}

fn median(values: &[f64]) -> f64 {
    let mut sorted = values.to_vec();
    sorted.sort_by(|a, b| a.total_cmp(b));
    let middle = sorted.len() / 2;
    if sorted.len() % 2 == 1 {
        sorted[middle]
    } else {
        0.5 * (sorted[middle - 1] + sorted[middle])
    }
}

/// Estimates of one cairn fit in the order statsmodels_side.py reports them.
struct CairnFit {
    estimates: Vec<f64>,
    standard_errors: Vec<f64>,
    treatment: Vec<usize>,
    iterations: usize,
    converged: bool,
}

fn design(trial: &synthetic::Trial, intercept: bool) -> DMatrix<f64> {
    let offset = usize::from(!intercept);
    let n_columns = 4 + trial.n_sites - 1 - offset;
    DMatrix::from_fn(trial.len(), n_columns, |i, j| match j + offset {
        0 => 1.0,
        1 => f64::from(u8::from(trial.arm[i] == 1)),
        2 => f64::from(u8::from(trial.arm[i] == 2)),
        3 => trial.baseline[i],
        column => f64::from(u8::from(trial.site[i] == column - 3)),
    })
}

fn converged(stop: &StopReason) -> bool {
    matches!(stop, StopReason::Converged { .. })
}

fn all_some(values: &[Option<f64>]) -> Vec<f64> {
    values.iter().map(|v| v.unwrap_or(f64::NAN)).collect()
}

fn fit_cairn(
    model: &str,
    trial: &synthetic::Trial,
    x: &DMatrix<f64>,
    x0: &DMatrix<f64>,
) -> CairnFit {
    let log_exposure: Vec<f64> = trial.exposure.iter().map(|e| e.ln()).collect();
    match model {
        "linear" => {
            let fit = fit_least_squares(x, &trial.linear, &LeastSquaresOptions::default())
                .expect("least squares");
            let sigma = fit.residual_standard_deviation().unwrap_or(f64::NAN);
            let p = x.ncols();
            CairnFit {
                estimates: all_some(&fit.coefficients),
                standard_errors: (0..p)
                    .map(|j| sigma * fit.unscaled_covariance[(j, j)].sqrt())
                    .collect(),
                treatment: vec![1, 2],
                iterations: 1,
                converged: fit.rank == p,
            }
        }
        "binomial" | "poisson" | "negative-binomial" => {
            let (family, response) = match model {
                "binomial" => (Family::Binomial, &trial.binary),
                "poisson" => (Family::Poisson, &trial.count),
                _ => (Family::NegativeBinomial { theta: None }, &trial.nb_count),
            };
            let link = if model == "binomial" {
                Link::Logit
            } else {
                Link::Log
            };
            let mut data = GlmData::new(x, response);
            if model != "binomial" {
                data = data.with_offset(&log_exposure);
            }
            let fit = fit_glm(&data, &GlmOptions::new(family, link)).expect("glm");
            let mut estimates = all_some(&fit.coefficients);
            let mut standard_errors = all_some(&fit.standard_errors);
            if let Some(theta) = &fit.theta {
                estimates.push(theta.theta);
                standard_errors.push(theta.standard_error.unwrap_or(f64::NAN));
            }
            CairnFit {
                estimates,
                standard_errors,
                treatment: vec![1, 2],
                iterations: fit.iterations,
                converged: converged(&fit.stop_reason),
            }
        }
        "cumulative" => {
            let fit = fit_cumulative_link(
                x0,
                &trial.ordinal,
                synthetic::N_ORDINAL,
                None,
                &CumulativeLinkOptions::default(),
            )
            .expect("cumulative link");
            let mut estimates = fit.cut_points.clone();
            estimates.extend(&fit.coefficients);
            let size = estimates.len();
            let standard_errors = match &fit.covariance {
                Some(c) => (0..size).map(|j| c[(j, j)].sqrt()).collect(),
                None => vec![f64::NAN; size],
            };
            let cuts = synthetic::N_ORDINAL - 1;
            CairnFit {
                estimates,
                standard_errors,
                treatment: vec![cuts, cuts + 1],
                iterations: fit.iterations,
                converged: converged(&fit.stop_reason),
            }
        }
        "multinomial" => {
            let fit = fit_multinomial_logit(
                x,
                &trial.nominal,
                synthetic::N_NOMINAL,
                0,
                None,
                &MultinomialOptions::default(),
            )
            .expect("multinomial");
            let p = x.ncols();
            let rows = fit.coefficients.nrows();
            let mut estimates = Vec::with_capacity(rows * p);
            for r in 0..rows {
                for c in 0..p {
                    estimates.push(fit.coefficients[(r, c)]);
                }
            }
            let size = estimates.len();
            let standard_errors = match &fit.covariance {
                Some(c) => (0..size).map(|j| c[(j, j)].sqrt()).collect(),
                None => vec![f64::NAN; size],
            };
            CairnFit {
                estimates,
                standard_errors,
                treatment: (0..rows).flat_map(|r| [r * p + 1, r * p + 2]).collect(),
                iterations: fit.iterations,
                converged: converged(&fit.stop_reason),
            }
        }
        _ => unreachable!("unknown model {model}"),
    }
}

fn statsmodels_available() -> Option<String> {
    let output = Command::new("python3")
        .args([
            "-c",
            "import statsmodels, scipy, pandas; print(statsmodels.__version__)",
        ])
        .output()
        .ok()?;
    output
        .status
        .success()
        .then(|| String::from_utf8_lossy(&output.stdout).trim().to_string())
}

fn run_statsmodels(
    csv: &Path,
    n_sites: usize,
    runs: usize,
    cumulative_runs: usize,
    skip: &[String],
) -> Option<Value> {
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/bench/statsmodels_side.py");
    let output = Command::new("python3")
        .arg(script)
        .arg(csv)
        .args(["--sites", &n_sites.to_string(), "--runs", &runs.to_string()])
        .args([
            "--skip",
            &skip.join(","),
            "--ordinal-method",
            ORDINAL_METHOD,
        ])
        .args(["--runs-cumulative", &cumulative_runs.to_string()])
        .env("OPENBLAS_NUM_THREADS", "1")
        .env("OMP_NUM_THREADS", "1")
        .env("MKL_NUM_THREADS", "1")
        .stderr(std::process::Stdio::inherit())
        .output()
        .ok()?;
    if !output.status.success() {
        eprintln!("statsmodels side failed with {}", output.status);
        return None;
    }
    serde_json::from_slice(&output.stdout).ok()
}

struct Row {
    n: usize,
    sites: usize,
    p: usize,
    model: &'static str,
    /// Median CPU seconds.
    cairn_seconds: f64,
    /// Median wall seconds.
    cairn_wall: f64,
    cairn_runs: usize,
    cairn_iterations: usize,
    /// (median CPU seconds, median wall seconds, runs, iterations).
    statsmodels: Option<(f64, f64, usize, i64)>,
    skipped_reason: Option<String>,
    treatment_difference: Option<f64>,
    se_difference: Option<f64>,
}

fn main() {
    let arguments: Vec<String> = std::env::args().collect();
    let value_of = |flag: &str| -> Option<usize> {
        arguments
            .iter()
            .position(|a| a == flag)
            .and_then(|i| arguments.get(i + 1))
            .and_then(|v| v.replace('_', "").parse().ok())
    };
    let max_n = value_of("--max-n").unwrap_or(1_000_000);
    let plan_n = value_of("--plan-n").unwrap_or(1_000_000);
    let with_plans = !arguments.iter().any(|a| a == "--no-plans");
    let with_statsmodels = !arguments.iter().any(|a| a == "--no-statsmodels");

    let folder = std::env::temp_dir().join(format!("cairn-bench-{}", std::process::id()));
    std::fs::create_dir_all(&folder).expect("temporary folder");
    print_machine();

    let statsmodels_version = if with_statsmodels {
        statsmodels_available()
    } else {
        None
    };
    match &statsmodels_version {
        Some(version) => println!("statsmodels {version} found; timing both sides."),
        None => println!(
            "python3 with statsmodels, scipy and pandas is not available (or --no-statsmodels): \
             timing cairn only."
        ),
    }
    println!(
        "OrderedModel method: {ORDINAL_METHOD} (its 'iterations' column counts gradient evaluations); \
         statsmodels fits projected over {STATSMODELS_BUDGET_SECONDS:.0} s are skipped above 10^5"
    );
    for model in MODELS {
        let (treatment, se) = tolerances(model);
        println!(
            "tolerance {model}: treatment coefficients {treatment:e} relative, every estimate {se:e} standard errors"
        );
    }

    let mut rows: Vec<Row> = Vec::new();
    let mut failures: Vec<String> = Vec::new();
    let mut previous_statsmodels: Vec<(&str, usize, usize, f64)> = Vec::new();
    let mut versions = None;
    for &(n, sites) in SIZES.iter().filter(|(n, _)| *n <= max_n) {
        let trial = synthetic::generate(n, sites, 0xC0FFEE + n as u64);
        let csv = folder.join(format!("trial-{n}.csv"));
        std::fs::write(&csv, trial.to_csv()).expect("write csv");
        let x = design(&trial, true);
        let x0 = design(&trial, false);
        let p = x.ncols();
        let (cairn_runs, statsmodels_runs, cumulative_runs) = runs_for(n);
        let mut cairn_fits = Vec::new();
        for model in MODELS {
            let mut times = Vec::new();
            let mut walls = Vec::new();
            let mut last = None;
            for _ in 0..cairn_runs {
                let (fit, wall, cpu) = timed(|| fit_cairn(model, &trial, &x, &x0));
                times.push(cpu);
                walls.push(wall);
                last = Some(fit);
            }
            let fit = last.expect("at least one run");
            if !fit.converged {
                failures.push(format!("n={n} {model}: cairn's fit did not converge"));
            }
            eprintln!(
                "cairn {model} n={n}: median CPU {:.4} s, wall {:.4} s",
                median(&times),
                median(&walls)
            );
            cairn_fits.push((model, median(&times), median(&walls), fit));
        }
        drop(x0);

        let mut skip = Vec::new();
        let mut skip_reason = std::collections::BTreeMap::new();
        // The targets are defined up to 10⁵, so nothing is skipped there.
        for &(model, previous_n, previous_p, seconds) in
            previous_statsmodels.iter().filter(|_| n > 100_000)
        {
            let projected =
                seconds * (n as f64 / previous_n as f64) * (p as f64 / previous_p as f64).powi(2);
            if projected > STATSMODELS_BUDGET_SECONDS {
                skip.push(model.to_string());
                skip_reason.insert(
                    model,
                    format!(
                        "skipped: projected {projected:.0} s (> {STATSMODELS_BUDGET_SECONDS:.0} s)"
                    ),
                );
            }
        }
        let statsmodels = statsmodels_version
            .as_ref()
            .and_then(|_| run_statsmodels(&csv, sites, statsmodels_runs, cumulative_runs, &skip));
        if let Some(json) = &statsmodels {
            versions = Some(json["versions"].clone());
        }
        previous_statsmodels.clear();
        for (model, cairn_seconds, cairn_wall, fit) in cairn_fits {
            let mut row = Row {
                n,
                sites,
                p,
                model,
                cairn_seconds,
                cairn_wall,
                cairn_runs,
                cairn_iterations: fit.iterations,
                statsmodels: None,
                skipped_reason: skip_reason.get(model).cloned(),
                treatment_difference: None,
                se_difference: None,
            };
            if let Some(result) = statsmodels.as_ref().and_then(|j| j["fits"].get(model)) {
                let seconds = result["median_cpu"].as_f64().unwrap_or(f64::NAN);
                let wall = result["median"].as_f64().unwrap_or(f64::NAN);
                let iterations = result["iterations"].as_i64().unwrap_or(-1);
                let runs = result["runs"].as_u64().unwrap_or(0) as usize;
                row.statsmodels = Some((seconds, wall, runs, iterations));
                previous_statsmodels.push((model, n, p, seconds));
                let theirs: Vec<f64> = result["estimates"]
                    .as_array()
                    .map(|a| a.iter().map(|v| v.as_f64().unwrap_or(f64::NAN)).collect())
                    .unwrap_or_default();
                if theirs.len() != fit.estimates.len() {
                    failures.push(format!(
                        "n={n} {model}: {} estimates from statsmodels, {} from cairn",
                        theirs.len(),
                        fit.estimates.len()
                    ));
                } else {
                    let treatment = fit
                        .treatment
                        .iter()
                        .map(|&j| (fit.estimates[j] - theirs[j]).abs() / theirs[j].abs())
                        .fold(0.0_f64, f64::max);
                    let in_se = (0..theirs.len())
                        .map(|j| (fit.estimates[j] - theirs[j]).abs() / fit.standard_errors[j])
                        .fold(0.0_f64, f64::max);
                    let (treatment_tolerance, se_tolerance) = tolerances(model);
                    // Written so that a NaN difference fails too.
                    if !(treatment <= treatment_tolerance && in_se <= se_tolerance) {
                        failures.push(format!(
                            "n={n} {model}: estimates differ (treatment {treatment:.3e} relative, \
                             {in_se:.3e} standard errors; tolerances {treatment_tolerance:e}, {se_tolerance:e})"
                        ));
                    }
                    if result["converged"].as_bool() != Some(true) {
                        println!("note: n={n} {model}: statsmodels reports no convergence");
                    }
                    row.treatment_difference = Some(treatment);
                    row.se_difference = Some(in_se);
                }
                if let Some(warnings) = result["warnings"].as_array()
                    && !warnings.is_empty()
                {
                    println!("note: n={n} {model}: statsmodels warned: {warnings:?}");
                }
            } else if statsmodels_version.is_some() && row.skipped_reason.is_none() {
                row.skipped_reason = Some("statsmodels side gave no result".to_string());
            }
            rows.push(row);
        }
    }

    if let Some(versions) = versions {
        println!("\nstatsmodels side: {versions}");
    }
    print_fit_table(&rows);
    print_flop_table(&rows);

    if with_plans {
        demo_plan_timing(&folder);
        large_plan(&folder, plan_n, &mut failures);
    }
    if arguments.iter().any(|a| a == "--keep") {
        println!("kept the temporary folder {}", folder.display());
    } else {
        let _ = std::fs::remove_dir_all(&folder);
    }
    if failures.is_empty() {
        println!("\nall estimate agreements held.");
    } else {
        println!("\nFAILURES:");
        for failure in &failures {
            println!("- {failure}");
        }
        std::process::exit(1);
    }
}

fn print_machine() {
    let cpu = std::fs::read_to_string("/proc/cpuinfo")
        .ok()
        .and_then(|text| {
            text.lines()
                .find(|l| l.starts_with("model name"))
                .and_then(|l| l.split(':').nth(1))
                .map(|s| s.trim().to_string())
        })
        .unwrap_or_else(|| "unknown".to_string());
    let memory = std::fs::read_to_string("/proc/meminfo")
        .ok()
        .and_then(|text| {
            text.lines()
                .next()
                .map(|l| l.split_whitespace().nth(1).unwrap_or("?").to_string())
        })
        .and_then(|kb| kb.parse::<f64>().ok())
        .map(|kb| format!("{:.1} GiB", kb / 1048576.0))
        .unwrap_or_else(|| "unknown".to_string());
    let threads = std::thread::available_parallelism()
        .map(|v| v.get())
        .unwrap_or(0);
    println!("machine: {threads} hardware threads, CPU {cpu}, memory {memory}");
}

fn target_for(row: &Row) -> &'static str {
    match row.model {
        "cumulative" if row.n == 100_000 => ">= 10x",
        "binomial" | "poisson" | "negative-binomial" => ">= 2x",
        _ => "",
    }
}

fn print_fit_table(rows: &[Row]) {
    println!(
        "\nTimes are medians of CPU seconds (wall seconds in brackets); (k) = number of runs.\n\n\
         | n | sites | p | model | cairn s | cairn iter. | statsmodels s | sm iter. | ratio sm/cairn (CPU) | target | max rel. diff. treatment | max diff. / SE |"
    );
    println!("|---:|---:|---:|---|---:|---:|---:|---:|---:|---|---:|---:|");
    for row in rows {
        let (statsmodels, iterations, ratio) = match (&row.statsmodels, &row.skipped_reason) {
            (Some((seconds, wall, runs, iterations)), _) => (
                format!("{seconds:.4} [{wall:.4}] ({runs})"),
                iterations.to_string(),
                format!("{:.1}", seconds / row.cairn_seconds),
            ),
            (None, Some(reason)) => (reason.clone(), "".to_string(), "".to_string()),
            (None, None) => ("not run".to_string(), "".to_string(), "".to_string()),
        };
        let format_difference =
            |value: Option<f64>| value.map(|v| format!("{v:.1e}")).unwrap_or_default();
        println!(
            "| {} | {} | {} | {} | {:.4} [{:.4}] ({}) | {} | {} | {} | {} | {} | {} | {} |",
            row.n,
            row.sites,
            row.p,
            row.model,
            row.cairn_seconds,
            row.cairn_wall,
            row.cairn_runs,
            row.cairn_iterations,
            statsmodels,
            iterations,
            ratio,
            target_for(row),
            format_difference(row.treatment_difference),
            format_difference(row.se_difference)
        );
    }
}

fn print_flop_table(rows: &[Row]) {
    println!(
        "\ncairn's achieved rate, iterations × n·p² / CPU time (linear: one QR, iterations = 1; \
         negative binomial: IRLS iterations summed over the theta/beta alternation):\n"
    );
    println!("| n | p | model | iterations | n·p² | GFLOP/s |");
    println!("|---:|---:|---|---:|---:|---:|");
    for row in rows.iter().filter(|r| {
        matches!(
            r.model,
            "linear" | "binomial" | "poisson" | "negative-binomial"
        )
    }) {
        let work = row.n as f64 * (row.p * row.p) as f64;
        println!(
            "| {} | {} | {} | {} | {:.2e} | {:.2} |",
            row.n,
            row.p,
            row.model,
            row.cairn_iterations,
            work,
            row.cairn_iterations as f64 * work / row.cairn_seconds / 1e9
        );
    }
}

fn cairn_binary() -> PathBuf {
    PathBuf::from(env!("CARGO_BIN_EXE_cairn"))
}

/// What one `cairn run` cost: wall seconds, and from /usr/bin/time (when present) user + system
/// CPU seconds and the peak resident set in KiB.
struct ChildCost {
    wall: f64,
    cpu: Option<f64>,
    peak_kib: Option<f64>,
    success: bool,
    stderr: String,
}

fn run_cairn(plan: &Path, out: &Path, jobs: usize) -> ChildCost {
    let use_time = Path::new("/usr/bin/time").exists();
    let mut command = if use_time {
        let mut command = Command::new("/usr/bin/time");
        command
            .arg("-f")
            .arg("BENCH-COST %e %U %S %M")
            .arg(cairn_binary());
        command
    } else {
        Command::new(cairn_binary())
    };
    command
        .arg("run")
        .arg(plan)
        .arg("--out")
        .arg(out)
        .arg("--force")
        .arg("--jobs")
        .arg(jobs.to_string());
    let start = Instant::now();
    let output = command.output().expect("run cairn");
    let wall = start.elapsed().as_secs_f64();
    let stderr = String::from_utf8_lossy(&output.stderr).to_string();
    let fields: Vec<f64> = stderr
        .lines()
        .rev()
        .find_map(|l| l.strip_prefix("BENCH-COST "))
        .map(|l| {
            l.split_whitespace()
                .filter_map(|v| v.parse().ok())
                .collect()
        })
        .unwrap_or_default();
    ChildCost {
        wall,
        cpu: (fields.len() == 4).then(|| fields[1] + fields[2]),
        peak_kib: (fields.len() == 4).then(|| fields[3]),
        success: output.status.success(),
        stderr,
    }
}

fn demo_plan_timing(folder: &Path) {
    let plan = Path::new(env!("CARGO_MANIFEST_DIR")).join("plans/demo/plan.yaml");
    let out = folder.join("demo-out");
    let mut walls = Vec::new();
    let mut cpus = Vec::new();
    for _ in 0..5 {
        let cost = run_cairn(&plan, &out, 1);
        assert!(cost.success, "the demo plan failed to run: {}", cost.stderr);
        walls.push(cost.wall);
        cpus.extend(cost.cpu);
    }
    let cpu = if cpus.len() == 5 {
        format!(
            "; CPU (user + system, 10 ms resolution) median {:.2} s",
            median(&cpus)
        )
    } else {
        String::new()
    };
    println!(
        "\ndemo plan end to end (cairn run plans/demo/plan.yaml --out TMP --force): wall median of 5 = {:.3} s (runs {:?}){cpu}; target < 0.2 s",
        median(&walls),
        walls.iter().map(|t| format!("{t:.3}")).collect::<Vec<_>>()
    );
}

fn large_plan(folder: &Path, n: usize, failures: &mut Vec<String>) {
    let sites = 50;
    let trial = synthetic::generate(n, sites, 0x5EED + n as u64);
    let study = folder.join("study");
    std::fs::create_dir_all(study.join("data")).expect("study folder");
    std::fs::write(study.join("data/subjects.csv"), trial.subjects_csv()).expect("subjects");
    std::fs::write(study.join("data/allocation.csv"), trial.allocation_csv()).expect("allocation");
    std::fs::write(study.join("plan.yaml"), synthetic::study_plan(n, sites)).expect("plan");
    let data_bytes = n * synthetic::Trial::N_NUMERIC_SUBJECT_COLUMNS * 8;
    let p = 4 + sites - 1;
    drop(trial);
    let threads = std::thread::available_parallelism()
        .map_or(1, |n| n.get())
        .min(6);
    let mut one_thread_results: Option<Vec<u8>> = None;
    for jobs in if threads > 1 {
        vec![1, threads]
    } else {
        vec![1]
    } {
        let out = study.join(format!("out-jobs-{jobs}"));
        let cost = run_cairn(&study.join("plan.yaml"), &out, jobs);
        let seconds = cost.wall;
        if !cost.success {
            failures.push(format!("the {n}-subject plan failed: {}", cost.stderr));
            return;
        }
        let peak_kib = cost.peak_kib;
        let bytes = std::fs::read(out.join("results.json")).unwrap_or_default();
        match &one_thread_results {
            None => one_thread_results = Some(bytes.clone()),
            Some(first) if *first != bytes => failures.push(format!(
                "the {n}-subject plan's results.json differs between --jobs 1 and --jobs {jobs}"
            )),
            Some(_) => {}
        }
        let results: Value = serde_json::from_slice(&bytes).unwrap_or(Value::Null);
        let statuses: Vec<String> = results["analyses"]
            .as_array()
            .map(|a| {
                a.iter()
                    .map(|x| {
                        format!(
                            "{}: {}",
                            x["id"].as_str().unwrap_or("?"),
                            x["status"].as_str().unwrap_or("?")
                        )
                    })
                    .collect()
            })
            .unwrap_or_default();
        if statuses.len() != 6 || statuses.iter().any(|s| !s.ends_with("fitted")) {
            failures.push(format!(
                "the {n}-subject plan did not fit all six analyses: {statuses:?}"
            ));
        }
        let cpu = cost
            .cpu
            .map(|c| format!(", CPU {c:.2} s"))
            .unwrap_or_default();
        println!(
            "\n{n}-subject, {sites}-site, six-analysis plan end to end with --jobs {jobs} (one run): wall {seconds:.2} s{cpu}; analyses {statuses:?}"
        );
        let data_mib = data_bytes as f64 / 1048576.0;
        let all_variables_mib = (n * synthetic::Trial::N_PLAN_VARIABLES * 8) as f64 / 1048576.0;
        let design_mib = (n * p * 8) as f64 / 1048576.0;
        match peak_kib {
            // The data held as f64: every plan variable and the arm, one double a value (a
            // factor as its code); the numeric columns alone are shown beside it.
            Some(kib) => println!(
                "peak resident memory {:.0} MiB; the data as f64 (every plan variable and the arm, {n} × {} columns × 8 B) = {all_variables_mib:.0} MiB, target ≤ 3× = {:.0} MiB (ratio {:.2}×); the numeric columns alone ({}) = {data_mib:.0} MiB, 3× = {:.0} MiB (ratio {:.1}×); one {n} × {p} design as f64 = {design_mib:.0} MiB",
                kib / 1024.0,
                synthetic::Trial::N_PLAN_VARIABLES,
                3.0 * all_variables_mib,
                kib / 1024.0 / all_variables_mib,
                synthetic::Trial::N_NUMERIC_SUBJECT_COLUMNS,
                3.0 * data_mib,
                kib / 1024.0 / data_mib,
            ),
            None => println!("peak memory not measured (/usr/bin/time not available)"),
        }
    }
}
