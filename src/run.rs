//! The edge of the pipeline: `check`, `run`, and the lock command's inputs.
//!
//! This is the only stage that does I/O for a run: it reads the plan, the lock
//! record and the data files, hashes them, hands typed values to the pure
//! stages (design → models → inference), collects deviations, renders the
//! outputs and writes them atomically. Nothing it writes depends on the clock,
//! the working folder or the environment.

use crate::data::{self, StudyData};
use crate::design::{self, Design};
use crate::error::Error;
use crate::inference::AnalysisInference;
use crate::output::Staged;
use crate::plan::{self, Analysis, LoadedPlan, ModelSpec, Plan};
use crate::provenance::lock::{self, LoadedLock};
use crate::provenance::{TOOL_VERSION, sha256_hex};
use crate::report;
use crate::results::*;
use std::path::Path;

/// How a run treats the treatment codes.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Mode {
    /// After unblinding: the allocation file is read.
    Unblinded,
    /// Before unblinding: the allocation file is never read; dummy codes from
    /// the seed stand in, and every treatment estimate is masked.
    DryRun { seed: u64 },
}

/// Everything a run needs besides the plan: the mode and any command-line
/// overrides (each reported as a deviation).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RunOptions {
    pub mode: Mode,
    /// Run only these analyses (a command-line override of the plan).
    pub only: Vec<String>,
    /// Analyses fitted at once, each on its own thread (1: one after another). The outputs do
    /// not depend on it: every analysis is computed by one thread, whichever, and the results
    /// are put together in plan order. Memory grows with it (one design per analysis in flight).
    pub jobs: usize,
    /// How designs are held ([`design::Layout`]); by their size unless a test says otherwise.
    /// Not a command-line option: only last bits can depend on it, of a linear fit (its
    /// row-block route is a different factorization) and of an influence-function variance of
    /// standardised means (summed by rows); `tests/design_layouts.rs`.
    pub layout: design::Layout,
}

impl Default for RunOptions {
    fn default() -> RunOptions {
        RunOptions {
            mode: Mode::Unblinded,
            only: Vec::new(),
            jobs: 1,
            layout: design::Layout::BySize,
        }
    }
}

/// `work` applied to every item, on up to `jobs` threads, the results in the items' order.
/// `None` when a worker thread panicked (a defect; the caller reports it as one).
fn map_in_order<T: Sync, R: Send>(
    items: &[T],
    jobs: usize,
    work: impl Fn(&T) -> R + Sync,
) -> Option<Vec<R>> {
    if jobs <= 1 || items.len() <= 1 {
        return Some(items.iter().map(work).collect());
    }
    let next = std::sync::atomic::AtomicUsize::new(0);
    let slots: Vec<std::sync::Mutex<Option<R>>> = (0..items.len())
        .map(|_| std::sync::Mutex::new(None))
        .collect();
    let finished = std::thread::scope(|scope| {
        let workers: Vec<_> = (0..jobs.min(items.len()))
            .map(|_| {
                scope.spawn(|| {
                    loop {
                        let index = next.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                        let Some(item) = items.get(index) else {
                            break;
                        };
                        let result = work(item);
                        if let Ok(mut slot) = slots[index].lock() {
                            *slot = Some(result);
                        }
                    }
                })
            })
            .collect();
        workers.into_iter().all(|worker| worker.join().is_ok())
    });
    if !finished {
        return None;
    }
    slots
        .into_iter()
        .map(|slot| slot.into_inner().ok().flatten())
        .collect()
}

/// Everything read from disk for one run, with the digests of the data files
/// (their bytes are hashed once when read and not kept).
pub struct Inputs {
    pub plan: LoadedPlan,
    pub lock: Option<LoadedLock>,
    pub dry_run: Option<crate::provenance::dry_run::LoadedDryRun>,
    pub subjects: FileDigest,
    /// `None` in a dry run, which never reads the allocation file.
    pub allocation: Option<FileDigest>,
    pub data: StudyData,
}

/// The SHA-256 (lower-case hex) and length of a file's bytes as read.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct FileDigest {
    pub sha256: String,
    pub bytes: u64,
}

impl FileDigest {
    fn of(bytes: &[u8]) -> FileDigest {
        FileDigest {
            sha256: sha256_hex(bytes),
            bytes: bytes.len() as u64,
        }
    }
}

/// What `check` found, for its one-line summary.
pub struct CheckSummary {
    /// Remarks that do not stop the plan, such as a procedure's assumptions.
    pub notes: Vec<crate::error::Problem>,
    pub analyses: usize,
    pub variables: usize,
    pub subjects: usize,
    pub lock_status: &'static str,
}

/// Read and validate the plan and every file it names. A dry run reads the
/// subjects file only and makes dummy treatment codes from its seed.
pub fn load_inputs(plan_path: &Path, mode: Mode) -> Result<Inputs, Error> {
    let plan = plan::load(plan_path)?;
    let lock = lock::read(plan_path)?;
    let dry_run = match mode {
        Mode::Unblinded => crate::provenance::dry_run::read(plan_path)?,
        Mode::DryRun { .. } => None,
    };
    let subjects_path = plan.resolve(&plan.plan.data.subjects)?;
    let subjects_bytes = data::read_file(&subjects_path, &plan.plan.data.subjects)?;
    let subjects = data::read_table(&subjects_bytes, &plan.plan.data.subjects)?;
    let subjects_digest = FileDigest::of(&subjects_bytes);
    drop(subjects_bytes);
    let (allocation_digest, allocation) = match mode {
        Mode::Unblinded => {
            let allocation_path = plan.resolve(&plan.plan.data.treatment.file)?;
            let bytes = data::read_file(&allocation_path, &plan.plan.data.treatment.file)?;
            let table = data::read_table(&bytes, &plan.plan.data.treatment.file)?;
            (Some(FileDigest::of(&bytes)), table)
        }
        Mode::DryRun { seed } => (None, data::dummy_allocation(&plan.plan, &subjects, seed)),
    };
    let study_data = data::assemble(&plan.plan, &subjects, allocation)?;
    Ok(Inputs {
        plan,
        lock,
        dry_run,
        subjects: subjects_digest,
        allocation: allocation_digest,
        data: study_data,
    })
}

/// `cairn check`: validate the plan and the data it names, and build every
/// analysis's design (so empty arms and missing columns surface before a run).
pub fn check(plan_path: &Path) -> Result<CheckSummary, Error> {
    let inputs = load_inputs(plan_path, Mode::Unblinded)?;
    for analysis in &inputs.plan.plan.analyses {
        design::build(&inputs.plan.plan, analysis, &inputs.data)?;
    }
    Ok(CheckSummary {
        notes: inputs.plan.plan.notes.clone(),
        analyses: inputs.plan.plan.analyses.len(),
        variables: inputs.plan.plan.variables.len(),
        subjects: inputs.data.subject_ids.len(),
        lock_status: lock_status(&inputs).0,
    })
}

/// `cairn run` and `cairn dry-run`: fit every planned analysis and write the
/// outputs into `out`. Returns the inputs read and the staged outputs.
pub fn run(
    plan_path: &Path,
    out: &Path,
    force: bool,
    options: &RunOptions,
) -> Result<(Inputs, Staged), Error> {
    if out.exists() && !force {
        // Refuse before any work so that a long run does not end in this error.
        Staged::new().commit(out, false)?;
    }
    let inputs = load_inputs(plan_path, options.mode)?;
    let staged = produce(&inputs, options)?;
    staged.commit(out, force)?;
    if let Mode::DryRun { seed } = options.mode {
        crate::provenance::dry_run::write(
            plan_path,
            &inputs.plan.bytes,
            &inputs.plan.plan.data.subjects,
            &inputs.subjects.sha256,
            seed,
        )?;
    }
    Ok((inputs, staged))
}

/// Compute every output of a run in memory.
pub fn produce(inputs: &Inputs, options: &RunOptions) -> Result<Staged, Error> {
    let plan = &inputs.plan.plan;
    let mut deviations = Vec::new();
    for id in &options.only {
        if !plan.analyses.iter().any(|analysis| &analysis.id == id) {
            let known: Vec<&str> = plan
                .analyses
                .iter()
                .map(|analysis| analysis.id.as_str())
                .collect();
            return Err(Error::one(crate::error::Problem::new(
                crate::error::ErrorKind::PlanReference,
                format!(
                    "--only names no analysis \"{id}\" (the plan has: {})",
                    known.join(", ")
                ),
            )));
        }
    }
    if !options.only.is_empty() {
        let skipped: Vec<&str> = plan
            .analyses
            .iter()
            .filter(|analysis| !options.only.contains(&analysis.id))
            .map(|analysis| analysis.id.as_str())
            .collect();
        deviations.push(Deviation {
            code: "COMMAND-LINE-OVERRIDE",
            severity: "major",
            analysis: None,
            message: format!(
                "--only restricted the run to {}; not run as planned: {}",
                options.only.join(", "),
                if skipped.is_empty() {
                    "none".to_string()
                } else {
                    skipped.join(", ")
                }
            ),
        });
    }
    if let (Mode::Unblinded, Some(dry_run)) = (options.mode, &inputs.dry_run) {
        let now = &inputs.subjects.sha256;
        if &dry_run.record.subjects_sha256 != now {
            deviations.push(Deviation {
                code: "DATA-CHANGED-SINCE-DRY-RUN",
                severity: "major",
                analysis: None,
                message: format!(
                    "the subjects file {} changed after the blinded dry run: its SHA-256 was {} at the dry run and is {} now",
                    plan.data.subjects, dry_run.record.subjects_sha256, now
                ),
            });
        }
        if dry_run.record.plan_sha256 != sha256_hex(&inputs.plan.bytes) {
            deviations.push(Deviation {
                code: "PLAN-CHANGED-SINCE-DRY-RUN",
                severity: "minor",
                analysis: None,
                message: format!(
                    "the plan changed after the blinded dry run (SHA-256 then {}, now {})",
                    dry_run.record.plan_sha256,
                    sha256_hex(&inputs.plan.bytes)
                ),
            });
        }
    }
    let (status, last) = lock_status(inputs);
    match status {
        "unlocked" => deviations.push(Deviation {
            code: "LOCK-ABSENT",
            severity: "major",
            analysis: None,
            message: format!("the plan has no lock record: nothing shows it was fixed before unblinding (run \"cairn lock {}\")", inputs.plan.file_name),
        }),
        "changed-since-lock" => deviations.push(Deviation {
            code: "LOCK-MISMATCH",
            severity: "critical",
            analysis: None,
            message: format!(
                "the plan's bytes differ from lock record {}: its SHA-256 is {}, the record seals {}",
                last.as_ref().map(|record| record.sequence).unwrap_or(0),
                sha256_hex(&inputs.plan.bytes),
                last.as_ref().map(|record| record.plan_sha256.as_str()).unwrap_or("")
            ),
        }),
        _ => {}
    }
    if let Some(record) = &last
        && record.tool_version != TOOL_VERSION
    {
        deviations.push(Deviation {
            code: "LOCK-TOOL-VERSION",
            severity: "minor",
            analysis: None,
            message: format!(
                "the plan was locked with cairn {} and is run with cairn {}",
                record.tool_version, TOOL_VERSION
            ),
        });
    }
    if !inputs.data.join.only_in_subjects.is_empty()
        || !inputs.data.join.only_in_allocation.is_empty()
    {
        deviations.push(Deviation {
            code: "SUBJECTS-UNMATCHED",
            severity: "major",
            analysis: None,
            message: format!(
                "{} subject(s) in the subjects file have no allocation and {} allocated subject(s) have no data; as the plan says, they are left out",
                inputs.data.join.only_in_subjects.len(),
                inputs.data.join.only_in_allocation.len()
            ),
        });
    }

    for (variable, count, places) in &inputs.data.out_of_range {
        let range = plan
            .variables
            .iter()
            .find(|candidate| &candidate.name == variable)
            .and_then(|candidate| candidate.range);
        let (low, high) = range.unwrap_or((f64::NAN, f64::NAN));
        deviations.push(Deviation {
            code: "VALUE-OUT-OF-RANGE",
            severity: "major",
            analysis: None,
            message: format!("{count} value(s) of {variable} lie outside its declared range {low} to {high} (first at {}); they were analysed as recorded", places.join(", ")),
        });
    }
    // Each analysis is independent of the others: fitted on up to `jobs` threads, its result
    // and its own departures are then taken in plan order, exactly as one after another.
    let per_analysis = map_in_order(&plan.analyses, options.jobs, |analysis| {
        let mut own = Vec::new();
        if !options.only.is_empty() && !options.only.contains(&analysis.id) {
            return Ok((not_run(plan, analysis), own));
        }
        let mut design = design::build_with_layout(plan, analysis, &inputs.data, options.layout)?;
        if let Some(limit) = analysis.max_excluded {
            let in_population: usize = design.in_population.iter().sum();
            let excluded: usize = design
                .exclusions
                .iter()
                .flat_map(|exclusion| exclusion.per_arm.iter())
                .sum();
            if in_population > 0 && excluded as f64 > limit * in_population as f64 {
                own.push(Deviation {
                    code: "MISSING-ABOVE-PLAN",
                    severity: "major",
                    analysis: Some(analysis.id.clone()),
                    message: format!(
                        "{excluded} of {in_population} subjects ({:.1}%) were left out for missing values, more than the planned {:.1}%",
                        100.0 * excluded as f64 / in_population as f64,
                        100.0 * limit
                    ),
                });
            }
        }
        let result = fit_analysis(plan, analysis, &mut design, &mut own);
        Ok::<_, Error>((result, own))
    })
    .ok_or_else(|| Error::internal("an analysis thread stopped unexpectedly"))?;
    let mut analyses = Vec::new();
    for outcome in per_analysis {
        let (result, own) = outcome?;
        deviations.extend(own);
        analyses.push(result);
    }

    let multiplicity = match &plan.multiplicity {
        Some(spec) => Some(apply_multiplicity(plan, spec, &analyses, &mut deviations)?),
        None => None,
    };
    let mut results = Results {
        schema: SCHEMA,
        run: RunInfo {
            mode: match options.mode {
                Mode::Unblinded => "run",
                Mode::DryRun { .. } => "dry-run",
            },
            seed: match options.mode {
                Mode::DryRun { seed } => Some(seed),
                Mode::Unblinded => None,
            },
            only: options.only.clone(),
        },
        tool: Tool {
            name: "cairn",
            version: TOOL_VERSION,
        },
        study: StudyInfo {
            id: plan.study.id.clone(),
            title: plan.study.title.clone(),
            alpha: plan.study.alpha,
            sides: plan.study.sides.count(),
            arms: plan
                .data
                .treatment
                .arms
                .iter()
                .map(|arm| ArmInfo {
                    code: arm.code.clone(),
                    label: arm.label.clone(),
                })
                .collect(),
            reference_arm: plan.data.treatment.arms[plan.data.treatment.reference]
                .code
                .clone(),
        },
        plan: PlanInfo {
            file: inputs.plan.file_name.clone(),
            sha256: sha256_hex(&inputs.plan.bytes),
            lock_status: status,
            lock_records: inputs
                .lock
                .as_ref()
                .map(|loaded| loaded.lock.records.len())
                .unwrap_or(0),
            last_lock: last,
        },
        inputs: input_list(inputs),
        deviations,
        subjects: subject_flow(plan, &inputs.data),
        multiplicity,
        analyses,
    };
    if let Mode::DryRun { .. } = options.mode {
        mask_for_dry_run(&mut results);
    }
    let results_json = to_json(&results)?;
    let rendered = report::render(&results)?;
    let mut staged = Staged::new();
    staged.add("report.md", rendered.markdown.into_bytes());
    staged.add("report.html", rendered.html.into_bytes());
    staged.add("results.json", results_json);
    for (name, bytes) in report::tables::all(&results) {
        staged.add(format!("tables/{name}"), bytes);
    }
    let manifest = manifest(&staged)?;
    staged.add("manifest.json", manifest);
    Ok(staged)
}

fn lock_status(inputs: &Inputs) -> (&'static str, Option<LockSummary>) {
    let Some(loaded) = &inputs.lock else {
        return ("unlocked", None);
    };
    let Some(record) = loaded.lock.records.last() else {
        return ("unlocked", None);
    };
    let summary = LockSummary {
        sequence: record.sequence,
        locked_at: record.locked_at.clone(),
        locked_by: record.locked_by.clone(),
        reason: record.reason.clone(),
        plan_sha256: record.plan_sha256.clone(),
        tool_version: record.tool_version.clone(),
        record_sha256: record.record_sha256.clone(),
    };
    let status = if record.plan_sha256 == sha256_hex(&inputs.plan.bytes) {
        "locked"
    } else {
        "changed-since-lock"
    };
    (status, Some(summary))
}

fn input_list(inputs: &Inputs) -> Vec<Input> {
    let plan = &inputs.plan.plan;
    let mut list = vec![Input {
        role: "plan",
        file: inputs.plan.file_name.clone(),
        sha256: sha256_hex(&inputs.plan.bytes),
        bytes: inputs.plan.bytes.len() as u64,
    }];
    if let Some(loaded) = &inputs.lock {
        list.push(Input {
            role: "lock record",
            file: loaded.file_name.clone(),
            sha256: sha256_hex(&loaded.bytes),
            bytes: loaded.bytes.len() as u64,
        });
    }
    list.push(Input {
        role: "subjects",
        file: plan.data.subjects.clone(),
        sha256: inputs.subjects.sha256.clone(),
        bytes: inputs.subjects.bytes,
    });
    if let Some(digest) = &inputs.allocation {
        list.push(Input {
            role: "allocation",
            file: plan.data.treatment.file.clone(),
            sha256: digest.sha256.clone(),
            bytes: digest.bytes,
        });
    }
    if let Some(dry_run) = &inputs.dry_run {
        list.push(Input {
            role: "dry-run record",
            file: dry_run.file_name.clone(),
            sha256: sha256_hex(&dry_run.bytes),
            bytes: dry_run.bytes.len() as u64,
        });
    }
    for (name, text) in report::TEMPLATES {
        list.push(Input {
            role: "template",
            file: format!("templates/{name}"),
            sha256: sha256_hex(text.as_bytes()),
            bytes: text.len() as u64,
        });
    }
    list
}

fn subject_flow(plan: &Plan, data: &StudyData) -> SubjectFlow {
    let arms = plan.data.treatment.arms.len();
    let mut randomised = vec![0; arms];
    for &arm in &data.arms {
        randomised[usize::from(arm)] += 1;
    }
    let populations = plan
        .populations
        .iter()
        .map(|population| {
            let mut per_arm = vec![0; arms];
            if let data::Column::Categorical { levels, codes } = &data.columns[population.column] {
                for (row, code) in codes.iter().enumerate() {
                    if code.is_some_and(|code| population.values.contains(&levels[code])) {
                        per_arm[usize::from(data.arms[row])] += 1;
                    }
                }
            }
            PopulationCount {
                id: population.id.clone(),
                label: population.label.clone(),
                per_arm,
            }
        })
        .collect();
    SubjectFlow {
        subjects_file_rows: data.join.subjects_rows,
        allocation_file_rows: data.join.allocation_rows,
        matched: data.join.matched,
        only_in_subjects_file: data.join.only_in_subjects.clone(),
        only_in_allocation_file: data.join.only_in_allocation.clone(),
        randomised_per_arm: randomised,
        populations,
    }
}

fn fit_analysis(
    plan: &Plan,
    analysis: &Analysis,
    design: &mut Design,
    deviations: &mut Vec<Deviation>,
) -> AnalysisResult {
    let arms = &plan.data.treatment.arms;
    let variable_info = |index: usize| VariableInfo {
        column: plan.variables[index].name.clone(),
        label: plan.variables[index].display_name().to_string(),
    };
    let label_of = |name: &str| {
        plan.variables
            .iter()
            .find(|variable| variable.name == name)
            .map(|variable| variable.display_name().to_string())
            .unwrap_or_else(|| name.to_string())
    };
    let mut result = AnalysisResult {
        id: analysis.id.clone(),
        title: analysis.title.clone(),
        role: analysis.role.name(),
        population: plan.populations[analysis.population].id.clone(),
        estimand: analysis.estimand.as_ref().map(estimand_info),
        endpoint: endpoint_info(plan, analysis),
        model: ModelInfo {
            family: analysis.model.family_name(),
            description: String::new(),
            details: String::new(),
        },
        covariates: analysis
            .covariates
            .iter()
            .map(|&index| variable_info(index))
            .collect(),
        strata: analysis
            .strata
            .iter()
            .map(|&index| variable_info(index))
            .collect(),
        confidence_level: analysis.confidence_level,
        in_population_per_arm: design.in_population.clone(),
        analysed_per_arm: design.analysed_per_arm.clone(),
        exclusions: design
            .exclusions
            .iter()
            .map(|exclusion| ExclusionInfo {
                missing: exclusion.variable.clone(),
                missing_label: label_of(&exclusion.variable),
                per_arm: exclusion.per_arm.clone(),
            })
            .collect(),
        pooling: design
            .pooling
            .iter()
            .map(|outcome| PoolingInfo {
                stratum: outcome.variable.clone(),
                stratum_label: label_of(&outcome.variable),
                below: outcome.threshold,
                into: outcome.into.clone(),
                pooled_levels: outcome
                    .pooled_levels
                    .iter()
                    .map(|(level, subjects)| PooledLevel {
                        level: level.clone(),
                        subjects: *subjects,
                    })
                    .collect(),
                pooled_size: outcome.pooled_size,
            })
            .collect(),
        status: "failed",
        failure: None,
        fit: None,
        coefficients: Vec::new(),
        treatment_tests: Vec::new(),
        treatment_test_failure: None,
        contrasts: Vec::new(),
        adjusted_means: Vec::new(),
        marginal: None,
        marginal_failure: None,
        checks: Vec::new(),
        fallback_used: None,
    };
    let inferred = match &analysis.model {
        ModelSpec::Linear => crate::inference::linear::analyse(design, analysis),
        ModelSpec::Generalized(spec) => crate::inference::glm::analyse(design, analysis, spec),
        ModelSpec::Cumulative { link } => {
            crate::inference::ordinal::analyse(design, analysis, *link)
        }
        ModelSpec::Multinomial { reference_category } => {
            crate::inference::nominal::analyse(design, analysis, *reference_category)
        }
    };
    match inferred {
        Err(reason) => {
            deviations.push(Deviation {
                code: "FIT-FAILED",
                severity: "critical",
                analysis: Some(analysis.id.clone()),
                message: format!("the model could not be fitted: {reason}"),
            });
            result.failure = Some(reason);
        }
        Ok(inference) => fill(&mut result, &inference, arms, deviations),
    }
    result
}

fn fill(
    result: &mut AnalysisResult,
    inference: &AnalysisInference,
    arms: &[plan::Arm],
    deviations: &mut Vec<Deviation>,
) {
    let aliased = &inference.fit.aliased_columns;
    if !aliased.is_empty() {
        deviations.push(Deviation {
            code: "TERM-ALIASED",
            severity: "major",
            analysis: Some(result.id.clone()),
            message: format!("{} design column(s) are linear combinations of earlier ones and were not estimated: {}", aliased.len(), aliased.join(", ")),
        });
    }
    for finding in &inference.findings {
        deviations.push(Deviation {
            code: finding.code,
            severity: finding.severity,
            analysis: Some(result.id.clone()),
            message: finding.message.clone(),
        });
    }
    result.status = "fitted";
    result.model.description = inference.model_words.clone();
    result.model.details = inference.model_details.clone();
    result.fit = Some(FitSummary::from(&inference.fit));
    result.coefficients = inference
        .coefficients
        .iter()
        .map(|row| CoefficientInfo {
            name: row.name.clone(),
            term: row.term.clone(),
            category: row.category.clone(),
            aliased: row.estimate.is_none(),
            masked: false,
            estimate: row.estimate.as_ref().map(EstimateInfo::from),
        })
        .collect();
    result.treatment_tests = inference
        .treatment_tests
        .iter()
        .map(|test| TestInfo {
            statistic_name: test.statistic_name,
            statistic: test.statistic,
            df1: test.df1,
            df2: test.df2,
            p_value: test.p_value,
        })
        .collect();
    result.treatment_test_failure = inference.treatment_test_failure.clone();
    result.contrasts = inference
        .contrasts
        .iter()
        .map(|contrast| ContrastInfo {
            id: contrast.id.clone(),
            arm: arms[contrast.arm].code.clone(),
            versus: arms[contrast.versus].code.clone(),
            category: contrast.category.clone(),
            scale: inference.effect_scale,
            estimate: contrast.estimate.as_ref().ok().map(EstimateInfo::from),
            ratio: match (inference.ratio_name, &contrast.ratio) {
                (Some(name), Some(ratio)) => Some(RatioInfo {
                    name,
                    estimate: ratio.estimate,
                    lower: ratio.lower,
                    upper: ratio.upper,
                }),
                _ => None,
            },
            interval_method: contrast.interval_method,
            joint_test: contrast.joint.as_ref().map(|test| TestInfo {
                statistic_name: test.statistic_name,
                statistic: test.statistic,
                df1: test.df1,
                df2: test.df2,
                p_value: test.p_value,
            }),
            failure: contrast.estimate.as_ref().err().cloned(),
        })
        .collect();
    result.adjusted_means = inference
        .adjusted_means
        .iter()
        .map(|mean| ArmMeanInfo {
            arm: arms[mean.arm].code.clone(),
            estimate: mean.estimate.as_ref().ok().map(EstimateInfo::from),
            failure: mean.estimate.as_ref().err().cloned(),
        })
        .collect();
    result.checks = inference
        .checks
        .iter()
        .map(|check| CheckInfo {
            name: check.name.clone(),
            rows: check
                .rows
                .iter()
                .map(|row| CheckRowInfo {
                    term: row.term.clone(),
                    statistic_name: row.statistic_name,
                    statistic: row.statistic,
                    df: row.df,
                    p_value: row.p_value,
                })
                .collect(),
            failed: check.failed,
            verdict: check.verdict.clone(),
            details: check.details.clone(),
        })
        .collect();
    result.fallback_used = inference.fallback_used.clone();
    match &inference.marginal {
        Some(Ok(summary)) => {
            result.marginal = Some(MarginalInfo {
                variance: summary.variance.clone(),
                means: summary
                    .means
                    .iter()
                    .map(|(arm, mean, standard_error)| MarginalMeanInfo {
                        arm: arms[*arm].code.clone(),
                        mean: *mean,
                        standard_error: *standard_error,
                    })
                    .collect(),
                effects: summary
                    .effects
                    .iter()
                    .map(|effect| MarginalEffectInfo {
                        contrast: effect.id.clone(),
                        arm: arms[effect.arm].code.clone(),
                        versus: arms[effect.versus].code.clone(),
                        scale: effect.scale,
                        estimate: effect.estimate,
                        standard_error: effect.standard_error,
                        lower: effect.lower,
                        upper: effect.upper,
                        p_value: effect.p_value,
                    })
                    .collect(),
            });
        }
        Some(Err(reason)) => result.marginal_failure = Some(reason.clone()),
        None => {}
    }
}

fn manifest(staged: &Staged) -> Result<Vec<u8>, Error> {
    #[derive(serde::Serialize)]
    struct Entry<'a> {
        file: &'a str,
        sha256: String,
        bytes: usize,
    }
    #[derive(serde::Serialize)]
    struct Manifest<'a> {
        schema: &'static str,
        tool_version: &'static str,
        outputs: Vec<Entry<'a>>,
    }
    let mut outputs: Vec<Entry<'_>> = staged
        .files()
        .iter()
        .map(|(name, bytes)| Entry {
            file: name,
            sha256: sha256_hex(bytes),
            bytes: bytes.len(),
        })
        .collect();
    outputs.sort_by(|left, right| left.file.cmp(right.file));
    let mut bytes = serde_json::to_vec_pretty(&Manifest {
        schema: "cairn-manifest/1",
        tool_version: TOOL_VERSION,
        outputs,
    })
    .map_err(|cause| Error::internal(format!("cannot serialise the manifest: {cause}")))?;
    bytes.push(b'\n');
    Ok(bytes)
}

/// The p-value of one hypothesis: two-sided as reported with the contrast, or
/// one-sided in the direction of benefit (the endpoint's `higher-is` says
/// which sign of arm − versus is benefit); for a contrast reported per
/// category or cut-point, the p-value of its joint Wald test. `None` when it
/// cannot be estimated.
fn hypothesis_p_value(result: &AnalysisResult, contrast: &str, sides: u32) -> Option<f64> {
    let rows: Vec<&ContrastInfo> = result
        .contrasts
        .iter()
        .filter(|candidate| candidate.id == contrast)
        .collect();
    if rows.len() > 1 {
        // A contrast reported per category or cut-point is tested jointly
        // (a chi-square test, which has no direction).
        return rows[0].joint_test.as_ref().map(|test| test.p_value);
    }
    let contrast = rows.first()?;
    let estimate = contrast.estimate.as_ref()?;
    if sides == 2 {
        return Some(estimate.p_value);
    }
    let benefit_statistic = if result.endpoint.higher_is == "better" {
        estimate.statistic
    } else {
        -estimate.statistic
    };
    match estimate.df {
        Some(df) => crate::inference::distributions::t_upper_p(benefit_statistic, df),
        None => Some(crate::inference::distributions::normal_upper(
            benefit_statistic,
        )),
    }
}

fn apply_multiplicity(
    plan: &Plan,
    spec: &plan::MultiplicitySpec,
    analyses: &[AnalysisResult],
    deviations: &mut Vec<Deviation>,
) -> Result<MultiplicityResult, Error> {
    use crate::multiplicity::Trace;
    let sides = plan.study.sides.count();
    let p_values: Vec<Option<f64>> = spec
        .hypotheses
        .iter()
        .map(|hypothesis| {
            let analysis = &plan.analyses[hypothesis.analysis];
            let contrast = &analysis.contrasts[hypothesis.contrast];
            hypothesis_p_value(&analyses[hypothesis.analysis], &contrast.id, sides)
        })
        .collect();
    for (hypothesis, p) in spec.hypotheses.iter().zip(&p_values) {
        if p.is_none() {
            deviations.push(Deviation {
                code: "HYPOTHESIS-UNTESTABLE",
                severity: "critical",
                analysis: Some(plan.analyses[hypothesis.analysis].id.clone()),
                message: format!("hypothesis {} has no p-value because its analysis or contrast could not be estimated; it cannot be rejected", hypothesis.id),
            });
        }
    }
    let outcome =
        crate::multiplicity::apply(&spec.strategy, &p_values, spec.alpha).map_err(|error| {
            Error::internal(format!(
                "the multiplicity strategy was validated but the engine refused it: {error}"
            ))
        })?;
    let name = |index: usize| spec.hypotheses[index].id.clone();
    let hypotheses = spec
        .hypotheses
        .iter()
        .zip(&outcome.hypotheses)
        .map(|(hypothesis, result)| HypothesisResultInfo {
            id: hypothesis.id.clone(),
            label: hypothesis.label.clone(),
            analysis: plan.analyses[hypothesis.analysis].id.clone(),
            contrast: plan.analyses[hypothesis.analysis].contrasts[hypothesis.contrast]
                .id
                .clone(),
            initial_weight: hypothesis.weight,
            raw_p: result.raw_p,
            adjusted_p: Some(result.adjusted_p),
            rejected: result.rejected,
            rejection_step: result.rejection_step,
            analysis_failed: result.analysis_failed,
        })
        .collect();
    let (tests, graph_steps) = match &outcome.trace {
        Trace::NotSequential => (Vec::new(), Vec::new()),
        Trace::Tests(steps) => (
            steps
                .iter()
                .map(|step| TestStepInfo {
                    step: step.step,
                    hypothesis: name(step.hypothesis),
                    p_value: step.p_value,
                    local_level: step.local_level,
                    rejected: step.rejected,
                })
                .collect(),
            Vec::new(),
        ),
        Trace::Graph(steps) => (
            Vec::new(),
            steps
                .iter()
                .map(|step| GraphStepInfo {
                    step: step.step,
                    rejected: name(step.rejected),
                    p_value: step.p_value,
                    local_levels: step.local_levels.clone(),
                    weights_after: step.weights_after.clone(),
                    transitions_after: step.transitions_after.clone(),
                })
                .collect(),
        ),
    };
    Ok(MultiplicityResult {
        masked: false,
        procedure: spec.procedure.name(),
        alpha: spec.alpha,
        sides,
        hypotheses,
        tests,
        graph_steps,
        transitions: if spec.procedure == crate::multiplicity::Procedure::Graphical {
            spec.transitions.clone()
        } else {
            Vec::new()
        },
    })
}

/// The endpoint of an analysis as results.json describes it.
fn endpoint_info(plan: &Plan, analysis: &Analysis) -> EndpointInfo {
    let variable = &plan.variables[analysis.endpoint.variable];
    EndpointInfo {
        column: variable.name.clone(),
        label: variable.display_name().to_string(),
        kind: analysis.endpoint.kind.name(),
        higher_is: match analysis.endpoint.higher_is {
            plan::Direction::Better => "better",
            plan::Direction::Worse => "worse",
        },
        event: analysis
            .endpoint
            .event
            .and_then(|event| match &variable.kind {
                plan::VariableKind::Factor {
                    levels: Some(levels),
                } => levels.get(event).cloned(),
                _ => None,
            }),
    }
}

/// The entry of an analysis left out by `--only`.
fn not_run(plan: &Plan, analysis: &Analysis) -> AnalysisResult {
    let arms = plan.data.treatment.arms.len();
    AnalysisResult {
        id: analysis.id.clone(),
        title: analysis.title.clone(),
        role: analysis.role.name(),
        population: plan.populations[analysis.population].id.clone(),
        estimand: analysis.estimand.as_ref().map(estimand_info),
        endpoint: endpoint_info(plan, analysis),
        model: ModelInfo {
            family: analysis.model.family_name(),
            description: String::new(),
            details: String::new(),
        },
        covariates: Vec::new(),
        strata: Vec::new(),
        confidence_level: analysis.confidence_level,
        in_population_per_arm: vec![0; arms],
        analysed_per_arm: vec![0; arms],
        exclusions: Vec::new(),
        pooling: Vec::new(),
        status: "not run",
        failure: Some("not run: left out by --only on the command line".to_string()),
        fit: None,
        coefficients: Vec::new(),
        treatment_tests: Vec::new(),
        treatment_test_failure: None,
        contrasts: Vec::new(),
        adjusted_means: Vec::new(),
        marginal: None,
        marginal_failure: None,
        checks: Vec::new(),
        fallback_used: None,
    }
}

/// Hide every number that compares arms: in a dry run the arms are dummy
/// codes, and the shell report must show the layout without estimates.
fn mask_for_dry_run(results: &mut Results) {
    const MASKED: &str = "masked in the dry run";
    for analysis in &mut results.analyses {
        for coefficient in &mut analysis.coefficients {
            if coefficient.term == "treatment" {
                coefficient.estimate = None;
                coefficient.masked = true;
            }
        }
        analysis.treatment_tests.clear();
        analysis.treatment_test_failure = Some(MASKED.to_string());
        for contrast in &mut analysis.contrasts {
            contrast.estimate = None;
            contrast.ratio = None;
            contrast.failure = Some(MASKED.to_string());
        }
        for mean in &mut analysis.adjusted_means {
            mean.estimate = None;
            mean.failure = Some(MASKED.to_string());
        }
        if analysis.marginal.is_some() {
            analysis.marginal = None;
            analysis.marginal_failure = Some(MASKED.to_string());
        }
        for check in &mut analysis.checks {
            let about_treatment =
                check.name.contains("Mantel") || check.name.contains("Treatment-by-stratum");
            check
                .rows
                .retain(|row| !about_treatment && row.term != "treatment");
            check
                .details
                .retain(|detail| !detail.contains("odds ratio of"));
            if about_treatment {
                check.verdict = MASKED.to_string();
                check.failed = false;
            }
        }
        // Data checks stay; the fit's summary statistics describe the dummy model only.
        if let Some(fit) = &mut analysis.fit {
            fit.log_likelihood = None;
            fit.deviance = None;
        }
    }
    if let Some(family) = &mut results.multiplicity {
        family.masked = true;
        for hypothesis in &mut family.hypotheses {
            hypothesis.raw_p = None;
            hypothesis.adjusted_p = None;
            hypothesis.rejected = false;
            hypothesis.rejection_step = None;
        }
        family.tests.clear();
        family.graph_steps.clear();
    }
    results.deviations.retain(|deviation| {
        deviation.code != "HYPOTHESIS-UNTESTABLE" && deviation.code != "CHECK-FAILED"
    });
}

fn estimand_info(estimand: &plan::Estimand) -> EstimandInfo {
    EstimandInfo {
        treatment: estimand.treatment.clone(),
        population: estimand.population.clone(),
        variable: estimand.variable.clone(),
        intercurrent_events: estimand
            .intercurrent_events
            .iter()
            .map(|event| IntercurrentEventInfo {
                event: event.event.clone(),
                strategy: event.strategy.name(),
            })
            .collect(),
        summary_measure: estimand.summary_measure.clone(),
    }
}
