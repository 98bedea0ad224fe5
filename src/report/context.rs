//! From the results document to the strings the templates lay out.
//!
//! Every string that comes from the plan or the data passes through
//! `markdown_text` here, once (or `markdown_code` where it is shown as code);
//! templates print context values verbatim.

use super::CAUTION;
use super::format::*;

/// The text a dry run puts in place of every number that compares arms.
const MASKED: &str = "masked in the dry run";
use crate::results::*;
use serde::Serialize;

#[derive(Serialize)]
pub struct Context {
    /// A banner for dry runs and partial runs; `None` for a full unblinded run.
    run_banner: Option<String>,
    study_id: String,
    study_title: String,
    tool_version: &'static str,
    caution: &'static str,
    plan_file: String,
    /// The plan's file name as a code span, and the command that reruns it.
    plan_file_code: String,
    rerun_command: String,
    verify_command: String,
    plan_sha256: String,
    lock_sentence: String,
    alpha_sentence: String,
    inputs: Vec<InputRow>,
    deviations: Vec<DeviationRow>,
    arm_labels: Vec<String>,
    flow: Vec<FlowRow>,
    flow_notes: Vec<String>,
    analyses: Vec<AnalysisView>,
    multiplicity: Option<MultiplicityView>,
}

#[derive(Serialize)]
struct MultiplicityView {
    section: usize,
    /// Whether the HTML report shows the graph (graphical procedure).
    graph: bool,
    summary: String,
    rows: Vec<HypothesisRow>,
    steps: Vec<String>,
    conclusion: String,
}

#[derive(Serialize)]
struct HypothesisRow {
    id: String,
    comparison: String,
    weight: String,
    raw_p: String,
    adjusted_p: String,
    decision: String,
}

#[derive(Serialize)]
struct InputRow {
    role: &'static str,
    file: String,
    sha256: String,
    bytes: u64,
}

#[derive(Serialize)]
struct DeviationRow {
    code: &'static str,
    severity: &'static str,
    scope: String,
    message: String,
}

#[derive(Serialize)]
struct FlowRow {
    label: String,
    cells: Vec<String>,
    total: String,
}

#[derive(Serialize)]
struct AnalysisView {
    estimand: Option<EstimandView>,
    number: usize,
    id: String,
    title: String,
    role: &'static str,
    methods: String,
    flow: Vec<FlowRow>,
    pooling: Vec<String>,
    failure: Option<String>,
    fallback: Option<String>,
    confidence: String,
    effect_header: String,
    se_header: String,
    has_category: bool,
    category_header: &'static str,
    /// The id of the analysis's forest plot in the HTML report.
    figure: Option<String>,
    marginal: Option<MarginalView>,
    effects: Vec<EffectRow>,
    effect_sentences: Vec<String>,
    overall: Option<String>,
    means: Vec<MeanRow>,
    coefficients: Vec<CoefficientRow>,
    statistic_header: &'static str,
    fit_line: Option<String>,
    checks: Vec<CheckView>,
    aliased: Vec<String>,
}

#[derive(Serialize)]
struct EstimandView {
    treatment: String,
    population: String,
    variable: String,
    events: Vec<(String, &'static str)>,
    summary_measure: String,
}

#[derive(Serialize)]
struct MarginalView {
    sentence: String,
    means: Vec<MarginalMeanRow>,
    effects: Vec<MarginalRow>,
    failure: Option<String>,
}

#[derive(Serialize)]
struct MarginalMeanRow {
    arm: String,
    mean: String,
    standard_error: String,
}

#[derive(Serialize)]
struct MarginalRow {
    label: String,
    scale: String,
    estimate: String,
    interval: String,
    p_value: String,
}

#[derive(Serialize)]
struct CheckView {
    name: String,
    rows: Vec<CheckRowView>,
    verdict: String,
    failed: bool,
    details: Vec<String>,
}

#[derive(Serialize)]
struct CheckRowView {
    term: String,
    statistic_name: &'static str,
    statistic: String,
    df: String,
    p_value: String,
}

#[derive(Serialize)]
struct EffectRow {
    label: String,
    category: String,
    estimate: String,
    standard_error: String,
    interval: String,
    p_value: String,
}

#[derive(Serialize)]
struct MeanRow {
    arm: String,
    n: String,
    estimate: String,
    standard_error: String,
    interval: String,
}

#[derive(Serialize)]
struct CoefficientRow {
    name: String,
    estimate: String,
    standard_error: String,
    statistic: String,
    p_value: String,
    interval: String,
}

pub fn build(results: &Results) -> Context {
    let arm_label = |code: &str| {
        results
            .study
            .arms
            .iter()
            .find(|arm| arm.code == code)
            .map(|arm| arm.label.clone())
            .unwrap_or_else(|| code.to_string())
    };
    let arm_labels: Vec<String> = results
        .study
        .arms
        .iter()
        .map(|arm| markdown_text(&arm.label))
        .collect();
    let lock_sentence = match (&results.plan.last_lock, results.plan.lock_status) {
        (Some(lock), "locked") => format!(
            "Locked: record {} of {}, sealed {} by {} (reason: {}), with cairn {}.",
            lock.sequence,
            results.plan.lock_records,
            markdown_text(&lock.locked_at),
            markdown_text(&lock.locked_by),
            markdown_text(&lock.reason),
            markdown_text(&lock.tool_version)
        ),
        (Some(lock), _) => format!(
            "**Changed since lock**: the plan's bytes differ from lock record {} (sealed {} by {}).",
            lock.sequence,
            markdown_text(&lock.locked_at),
            markdown_text(&lock.locked_by)
        ),
        (None, _) => "**Not locked**: no lock record exists for this plan.".to_string(),
    };
    let sides = if results.study.sides == 1 {
        "one-sided"
    } else {
        "two-sided"
    };
    let alpha_sentence = format!(
        "Familywise significance level {} ({sides}).",
        results.study.alpha
    );

    let total = |cells: &[usize]| count(cells.iter().sum::<usize>());
    let mut flow = vec![FlowRow {
        label: "Randomised (in both files)".to_string(),
        cells: results
            .subjects
            .randomised_per_arm
            .iter()
            .map(|value| count(*value))
            .collect(),
        total: total(&results.subjects.randomised_per_arm),
    }];
    for population in &results.subjects.populations {
        flow.push(FlowRow {
            label: markdown_text(&population.label),
            cells: population
                .per_arm
                .iter()
                .map(|value| count(*value))
                .collect(),
            total: total(&population.per_arm),
        });
    }
    let mut flow_notes = Vec::new();
    if !results.subjects.only_in_subjects_file.is_empty() {
        flow_notes.push(format!(
            "{} subject(s) in the subjects file have no allocation and are not analysed.",
            results.subjects.only_in_subjects_file.len()
        ));
    }
    if !results.subjects.only_in_allocation_file.is_empty() {
        flow_notes.push(format!(
            "{} allocated subject(s) have no row in the subjects file.",
            results.subjects.only_in_allocation_file.len()
        ));
    }

    let analyses: Vec<AnalysisView> = results
        .analyses
        .iter()
        .enumerate()
        .map(|(index, analysis)| analysis_view(index + 1, analysis, results, &arm_label))
        .collect();
    let multiplicity = results
        .multiplicity
        .as_ref()
        .map(|family| multiplicity_view(analyses.len() + 3, family, results, &arm_label));
    let run_banner = match (results.run.mode, results.run.seed) {
        ("dry-run", Some(seed)) => Some(format!(
            "**Blinded dry run (shell report).** Treatment codes are dummy codes (seed {seed}, balanced within strata); the allocation file was not read. Every treatment estimate, confidence interval, test of treatment and multiplicity decision is masked; data checks and convergence are shown."
        )),
        _ if !results.run.only.is_empty() => Some(format!(
            "**Partial run.** Only these analyses were run, by command-line override: {}.",
            markdown_text(&results.run.only.join(", "))
        )),
        _ => None,
    };
    Context {
        run_banner,
        study_id: markdown_text(&results.study.id),
        study_title: markdown_text(&results.study.title),
        tool_version: results.tool.version,
        caution: CAUTION,
        plan_file: markdown_text(&results.plan.file),
        plan_file_code: markdown_code(&results.plan.file),
        rerun_command: markdown_code(&format!("cairn run {} --out DIR", results.plan.file)),
        verify_command: markdown_code(&format!("cairn verify DIR --plan {}", results.plan.file)),
        plan_sha256: results.plan.sha256.clone(),
        lock_sentence,
        alpha_sentence,
        inputs: results
            .inputs
            .iter()
            .map(|input| InputRow {
                role: input.role,
                file: markdown_text(&input.file),
                sha256: input.sha256.clone(),
                bytes: input.bytes,
            })
            .collect(),
        deviations: results
            .deviations
            .iter()
            .map(|deviation| DeviationRow {
                code: deviation.code,
                severity: deviation.severity,
                scope: deviation
                    .analysis
                    .as_deref()
                    .map(markdown_text)
                    .unwrap_or_else(|| "whole run".to_string()),
                message: markdown_text(&deviation.message),
            })
            .collect(),
        arm_labels,
        flow,
        flow_notes,
        analyses,
        multiplicity,
    }
}

/// A weight or level with up to four significant decimals, trailing zeros trimmed.
fn share(value: f64) -> String {
    let text = fixed(value, 4);
    let trimmed = text.trim_end_matches('0').trim_end_matches('.');
    if trimmed.is_empty() {
        "0".to_string()
    } else {
        trimmed.to_string()
    }
}

fn level(value: f64) -> String {
    if value != 0.0 && value.abs() < 1e-4 {
        return format!("{value:.1e}");
    }
    let text = format!("{value:.6}");
    let trimmed = text.trim_end_matches('0').trim_end_matches('.');
    trimmed.to_string()
}

fn multiplicity_view(
    section: usize,
    family: &MultiplicityResult,
    results: &Results,
    arm_label: &dyn Fn(&str) -> String,
) -> MultiplicityView {
    let procedure_words = match family.procedure {
        "bonferroni" => "the (weighted) Bonferroni procedure",
        "holm" => "the (weighted) Holm procedure (Holm 1979)",
        "hochberg" => "the Hochberg step-up procedure (Hochberg 1988)",
        "hommel" => "the Hommel procedure (Hommel 1988)",
        "fixed-sequence" => "a fixed-sequence procedure in the planned order",
        "fallback" => "the fallback procedure (Wiens 2003) in the planned order",
        _ => {
            "the graphical procedure of Bretz, Maurer, Brannath and Posch (2009) with the planned initial weights and transitions"
        }
    };
    let sides = if family.sides == 1 {
        "one-sided p-values in the direction of benefit"
    } else {
        "two-sided p-values"
    };
    let summary = format!(
        "The familywise error rate over the {} hypotheses below is controlled at α = {} ({sides}) by {procedure_words}. A hypothesis is rejected when its adjusted p-value is at most α.",
        family.hypotheses.len(),
        family.alpha
    );
    let comparison_of = |hypothesis: &HypothesisResultInfo| {
        let analysis = results
            .analyses
            .iter()
            .find(|analysis| analysis.id == hypothesis.analysis);
        let contrast = analysis.and_then(|analysis| {
            analysis
                .contrasts
                .iter()
                .find(|contrast| contrast.id == hypothesis.contrast)
        });
        let text = match (analysis, contrast) {
            (Some(analysis), Some(contrast)) => format!(
                "{}: {} − {}",
                analysis.title,
                arm_label(&contrast.arm),
                arm_label(&contrast.versus)
            ),
            _ => format!("{} / {}", hypothesis.analysis, hypothesis.contrast),
        };
        match &hypothesis.label {
            Some(label) => format!("{} ({})", markdown_text(label), markdown_text(&text)),
            None => markdown_text(&text),
        }
    };
    let rows = family
        .hypotheses
        .iter()
        .map(|hypothesis| HypothesisRow {
            id: markdown_text(&hypothesis.id),
            comparison: comparison_of(hypothesis),
            weight: share(hypothesis.initial_weight),
            raw_p: hypothesis.raw_p.map(p_value).unwrap_or_else(|| {
                if family.masked {
                    "masked".to_string()
                } else {
                    "none".to_string()
                }
            }),
            adjusted_p: hypothesis
                .adjusted_p
                .map(p_value)
                .unwrap_or_else(|| "masked".to_string()),
            decision: if family.masked {
                "masked (dry run)".to_string()
            } else if hypothesis.analysis_failed {
                "cannot be rejected: its analysis failed".to_string()
            } else if hypothesis.rejected {
                match hypothesis.rejection_step {
                    Some(step) => format!("rejected (step {step})"),
                    None => "rejected".to_string(),
                }
            } else {
                "not rejected".to_string()
            },
        })
        .collect();
    let ids: Vec<String> = family
        .hypotheses
        .iter()
        .map(|hypothesis| markdown_text(&hypothesis.id))
        .collect();
    let mut steps = Vec::new();
    for step in &family.tests {
        let index = family
            .hypotheses
            .iter()
            .position(|hypothesis| hypothesis.id == step.hypothesis)
            .unwrap_or(0);
        steps.push(format!(
            "Step {}: {} is tested at level {}: p = {} → {}.",
            step.step,
            ids[index],
            level(step.local_level),
            level(step.p_value),
            if step.rejected {
                "rejected"
            } else {
                "not rejected"
            }
        ));
    }
    let mut current_weights: Vec<f64> = family
        .hypotheses
        .iter()
        .map(|hypothesis| hypothesis.initial_weight)
        .collect();
    for step in &family.graph_steps {
        let index = family
            .hypotheses
            .iter()
            .position(|hypothesis| hypothesis.id == step.rejected)
            .unwrap_or(0);
        let weights: Vec<String> = step
            .weights_after
            .iter()
            .enumerate()
            .filter(|(position, weight)| **weight > 0.0 && *position != index)
            .map(|(position, weight)| format!("{} {}", ids[position], share(*weight)))
            .collect();
        let mut edges = Vec::new();
        for (from, row) in step.transitions_after.iter().enumerate() {
            for (to, weight) in row.iter().enumerate() {
                if *weight > 0.0 {
                    edges.push(format!("{}→{} {}", ids[from], ids[to], share(*weight)));
                }
            }
        }
        steps.push(format!(
            "Step {}: {} has p = {} ≤ its local level {} (weight {} × α), so it is rejected and its weight is passed on. Weights now: {}. Transitions now: {}.",
            step.step,
            ids[index],
            level(step.p_value),
            level(step.local_levels[index]),
            share(current_weights[index]),
            if weights.is_empty() { "none".to_string() } else { weights.join(", ") },
            if edges.is_empty() { "none".to_string() } else { edges.join(", ") }
        ));
        current_weights = step.weights_after.clone();
    }
    let remaining: Vec<String> = family
        .hypotheses
        .iter()
        .enumerate()
        .filter(|(_, hypothesis)| !hypothesis.rejected)
        .map(|(index, hypothesis)| {
            let p = hypothesis
                .raw_p
                .map(level)
                .unwrap_or_else(|| "none".to_string());
            if family.procedure == "graphical" {
                format!(
                    "{} (p = {p}, local level {})",
                    ids[index],
                    level(current_weights[index] * family.alpha)
                )
            } else {
                format!("{} (p = {p})", ids[index])
            }
        })
        .collect();
    let rejected = family
        .hypotheses
        .iter()
        .filter(|hypothesis| hypothesis.rejected)
        .count();
    let conclusion = if family.masked {
        "The decisions are masked in the dry run; the strategy above is what the run will apply."
            .to_string()
    } else if remaining.is_empty() {
        format!(
            "All {rejected} hypotheses are rejected at familywise level {}.",
            family.alpha
        )
    } else if family.procedure == "graphical" {
        format!(
            "{rejected} of {} hypotheses are rejected. No remaining hypothesis has a p-value at or below its local level: {}.",
            family.hypotheses.len(),
            remaining.join(", ")
        )
    } else {
        format!(
            "{rejected} of {} hypotheses are rejected; not rejected: {}.",
            family.hypotheses.len(),
            remaining.join(", ")
        )
    };
    MultiplicityView {
        section,
        graph: family.procedure == "graphical",
        summary,
        rows,
        steps,
        conclusion,
    }
}

fn analysis_view(
    number: usize,
    analysis: &AnalysisResult,
    results: &Results,
    arm_label: &dyn Fn(&str) -> String,
) -> AnalysisView {
    let reference = arm_label(&results.study.reference_arm);
    let population_label = results
        .subjects
        .populations
        .iter()
        .find(|population| population.id == analysis.population)
        .map(|population| population.label.clone())
        .unwrap_or_else(|| analysis.population.clone());
    let n_analysed: usize = analysis.analysed_per_arm.iter().sum();
    let linear = analysis.model.family == "linear";
    let decimals = match analysis.fit.as_ref().and_then(|fit| fit.residual_sd) {
        Some(sd) if linear => decimals_for_scale(sd),
        _ => 3,
    };
    let confidence = percent(analysis.confidence_level);
    let scale = analysis
        .contrasts
        .first()
        .map(|contrast| contrast.scale)
        .unwrap_or("difference");
    let ratio_name = analysis
        .contrasts
        .iter()
        .find_map(|contrast| contrast.ratio.as_ref().map(|ratio| ratio.name));

    // Methods text.
    let mut terms = vec![format!(
        "treatment (reference: {})",
        markdown_text(&reference)
    )];
    terms.extend(
        analysis
            .covariates
            .iter()
            .map(|variable| markdown_text(&variable.label)),
    );
    terms.extend(
        analysis
            .strata
            .iter()
            .map(|variable| format!("{} (stratum)", markdown_text(&variable.label))),
    );
    let mut methods = format!(
        "{} to {} in the {} (n = {}), with {} as fixed effects. ",
        markdown_text(&analysis.model.description),
        markdown_text(&analysis.endpoint.label),
        markdown_text(&population_label),
        count(n_analysed),
        join_words(&terms)
    );
    if !analysis.model.details.is_empty() {
        methods.push_str(&markdown_text(&analysis.model.details));
        methods.push(' ');
    }
    if let Some(event) = &analysis.endpoint.event {
        methods.push_str(&format!("The event is \"{}\". ", markdown_text(event)));
    }
    for pooling in &analysis.pooling {
        methods.push_str(&format!(
            "As planned, levels of {} with fewer than {} analysed subjects were pooled into one level, \"{}\". ",
            markdown_text(&pooling.stratum_label),
            pooling.below,
            markdown_text(&pooling.into)
        ));
    }
    let reference_distribution = match analysis
        .contrasts
        .first()
        .and_then(|contrast| contrast.estimate.as_ref())
        .and_then(|estimate| estimate.df)
    {
        Some(df) => format!("the t distribution on {} degrees of freedom", degrees(df)),
        None => "the normal distribution".to_string(),
    };
    let exponentiated = ratio_name
        .map(|name| format!(", and exponentiated as {name}s"))
        .unwrap_or_default();
    let interval_kind = if analysis
        .contrasts
        .iter()
        .any(|contrast| contrast.interval_method == "profile likelihood")
    {
        "profile-likelihood or Wald"
    } else {
        "Wald"
    };
    methods.push_str(&format!(
        "Treatment comparisons are contrasts of the model coefficients on the {scale} scale{exponentiated}, with {confidence} {interval_kind} confidence intervals and two-sided p-values from {reference_distribution}. "
    ));
    if linear {
        methods.push_str("The overall effect of treatment is tested with an F test. Adjusted means are the model's predictions averaged over all analysed subjects as if each had received that arm. ");
    } else {
        methods.push_str("The overall effect of treatment is tested with a joint Wald chi-square test and a likelihood-ratio test against the model without treatment. ");
    }
    methods.push_str("Subjects with a missing endpoint or covariate are left out of this analysis (complete cases).");

    let mut analysis_flow = vec![FlowRow {
        label: format!("In {}", markdown_text(&population_label)),
        cells: analysis
            .in_population_per_arm
            .iter()
            .map(|value| count(*value))
            .collect(),
        total: count(analysis.in_population_per_arm.iter().sum::<usize>()),
    }];
    for exclusion in &analysis.exclusions {
        analysis_flow.push(FlowRow {
            label: format!(
                "Excluded: {} missing",
                markdown_text(&exclusion.missing_label)
            ),
            cells: exclusion
                .per_arm
                .iter()
                .map(|value| count(*value))
                .collect(),
            total: count(exclusion.per_arm.iter().sum::<usize>()),
        });
    }
    analysis_flow.push(FlowRow {
        label: "Analysed".to_string(),
        cells: analysis
            .analysed_per_arm
            .iter()
            .map(|value| count(*value))
            .collect(),
        total: count(n_analysed),
    });
    let pooling = analysis
        .pooling
        .iter()
        .map(|pooling| {
            let levels: Vec<String> = pooling
                .pooled_levels
                .iter()
                .map(|level| format!("{} ({})", markdown_text(&level.level), level.subjects))
                .collect();
            format!(
                "{}: {} pooled into \"{}\" ({} subjects).",
                markdown_text(&pooling.stratum_label),
                levels.join(", "),
                markdown_text(&pooling.into),
                pooling.pooled_size
            )
        })
        .collect();

    // Treatment effects.
    let lower_is_better = analysis.endpoint.higher_is == "worse";
    let ordered = analysis.endpoint.kind != "nominal";
    let mut effects = Vec::new();
    let mut effect_sentences = Vec::new();
    for contrast in &analysis.contrasts {
        let label = format!(
            "{} vs {}",
            markdown_text(&arm_label(&contrast.arm)),
            markdown_text(&arm_label(&contrast.versus))
        );
        let category = contrast
            .category
            .as_deref()
            .map(markdown_text)
            .unwrap_or_default();
        match (&contrast.estimate, &contrast.failure) {
            (Some(estimate), _) => {
                let row = match &contrast.ratio {
                    Some(ratio) => {
                        let ratio_decimals = if ratio.estimate < 0.1 { 3 } else { 2 };
                        EffectRow {
                            label: label.clone(),
                            category: category.clone(),
                            estimate: fixed(ratio.estimate, ratio_decimals),
                            standard_error: format!(
                                "{} ({})",
                                fixed(estimate.estimate, 3),
                                fixed(estimate.standard_error, 3)
                            ),
                            interval: interval(ratio.lower, ratio.upper, ratio_decimals),
                            p_value: p_value(estimate.p_value),
                        }
                    }
                    None => EffectRow {
                        label: label.clone(),
                        category: category.clone(),
                        estimate: fixed(estimate.estimate, decimals),
                        standard_error: fixed(estimate.standard_error, decimals),
                        interval: interval(estimate.lower, estimate.upper, decimals),
                        p_value: p_value(estimate.p_value),
                    },
                };
                effects.push(row);
                if ordered {
                    let arm_higher = estimate.estimate > 0.0;
                    let favoured = if arm_higher != lower_is_better {
                        arm_label(&contrast.arm)
                    } else {
                        arm_label(&contrast.versus)
                    };
                    let direction = if lower_is_better {
                        "lower values are better"
                    } else {
                        "higher values are better"
                    };
                    let what = match analysis.endpoint.kind {
                        "binary" => "a higher chance of the event",
                        "count" => "more events",
                        "ordinal" => "higher categories",
                        _ => "higher values",
                    };
                    let sentence = if estimate.estimate == 0.0 {
                        format!("{label}: no difference in the point estimate.")
                    } else if analysis.endpoint.kind == "continuous" {
                        format!(
                            "{label}: the point estimate favours {} ({direction}).",
                            markdown_text(&favoured)
                        )
                    } else {
                        let subject = if arm_higher {
                            arm_label(&contrast.arm)
                        } else {
                            arm_label(&contrast.versus)
                        };
                        format!(
                            "{label}: the point estimate gives {} {what}; as {}, it favours {}.",
                            markdown_text(&subject),
                            if lower_is_better {
                                "higher values are worse"
                            } else {
                                "higher values are better"
                            },
                            markdown_text(&favoured)
                        )
                    };
                    effect_sentences.push(sentence);
                }
            }
            (None, failure) if failure.as_deref() == Some(MASKED) => effects.push(EffectRow {
                label,
                category,
                estimate: "masked".to_string(),
                standard_error: "masked".to_string(),
                interval: "masked".to_string(),
                p_value: "masked".to_string(),
            }),
            (None, failure) => effects.push(EffectRow {
                label,
                category,
                estimate: "not estimable".to_string(),
                standard_error: String::new(),
                interval: failure.as_deref().map(markdown_text).unwrap_or_default(),
                p_value: String::new(),
            }),
        }
    }
    let (effect_header, se_header) = match ratio_name {
        Some(name) => (capitalise(name), format!("{} (SE)", capitalise(scale))),
        None if linear => ("Difference".to_string(), "SE".to_string()),
        None => (capitalise(scale), "SE".to_string()),
    };
    let overall_parts: Vec<String> = analysis
        .treatment_tests
        .iter()
        .map(|test| {
            let name = match test.statistic_name {
                "F" => "F".to_string(),
                "Wald chi-square" => "Wald χ²".to_string(),
                _ => "likelihood-ratio χ²".to_string(),
            };
            let df = match test.df2 {
                Some(df2) => format!("{}, {}", degrees(test.df1), degrees(df2)),
                None => degrees(test.df1),
            };
            format!(
                "{name}({df}) = {}, p = {}",
                statistic(test.statistic),
                p_value(test.p_value)
            )
            .replace("p = <", "p <")
        })
        .collect();
    let mut overall = (!overall_parts.is_empty()).then(|| overall_parts.join("; "));
    if let Some(reason) = &analysis.treatment_test_failure {
        let text = format!("not available: {}", markdown_text(reason));
        overall = Some(match overall {
            Some(tests) => format!("{tests} ({text})"),
            None => text,
        });
    }
    let means = analysis
        .adjusted_means
        .iter()
        .enumerate()
        .map(|(index, mean)| match &mean.estimate {
            Some(estimate) => MeanRow {
                arm: markdown_text(&arm_label(&mean.arm)),
                n: count(analysis.analysed_per_arm[index]),
                estimate: fixed(estimate.estimate, decimals),
                standard_error: fixed(estimate.standard_error, decimals),
                interval: interval(estimate.lower, estimate.upper, decimals),
            },
            None if mean.failure.as_deref() == Some(MASKED) => MeanRow {
                arm: markdown_text(&arm_label(&mean.arm)),
                n: count(analysis.analysed_per_arm[index]),
                estimate: "masked".to_string(),
                standard_error: "masked".to_string(),
                interval: "masked".to_string(),
            },
            None => MeanRow {
                arm: markdown_text(&arm_label(&mean.arm)),
                n: count(analysis.analysed_per_arm[index]),
                estimate: "not estimable".to_string(),
                standard_error: String::new(),
                interval: mean
                    .failure
                    .as_deref()
                    .map(markdown_text)
                    .unwrap_or_default(),
            },
        })
        .collect();
    let coefficients = analysis
        .coefficients
        .iter()
        .map(|row| {
            let name = match &row.category {
                Some(category) => {
                    format!("{}: {}", markdown_text(category), markdown_text(&row.name))
                }
                None => markdown_text(&row.name),
            };
            match &row.estimate {
                Some(estimate) => CoefficientRow {
                    name,
                    estimate: fixed(estimate.estimate, decimals.max(3)),
                    standard_error: fixed(estimate.standard_error, decimals.max(3)),
                    statistic: statistic(estimate.statistic),
                    p_value: p_value(estimate.p_value),
                    interval: interval(estimate.lower, estimate.upper, decimals.max(3)),
                },
                None if row.masked => CoefficientRow {
                    name,
                    estimate: "masked".to_string(),
                    standard_error: String::new(),
                    statistic: String::new(),
                    p_value: String::new(),
                    interval: String::new(),
                },
                None => CoefficientRow {
                    name,
                    estimate: "aliased".to_string(),
                    standard_error: String::new(),
                    statistic: String::new(),
                    p_value: String::new(),
                    interval: String::new(),
                },
            }
        })
        .collect();
    let statistic_header = match analysis
        .coefficients
        .iter()
        .find_map(|row| row.estimate.as_ref())
        .and_then(|estimate| estimate.df)
    {
        Some(_) => "t",
        None => "z",
    };
    let fit_line = analysis.fit.as_ref().map(|fit| {
        let mut parts = vec![
            format!("n = {}", count(fit.n_analysed)),
            format!("{} parameters of rank {}", fit.n_parameters, fit.rank),
        ];
        if let Some(sd) = fit.residual_sd {
            parts.push(format!(
                "residual SD {} on {} degrees of freedom",
                fixed(sd, decimals + 1),
                fit.residual_df.unwrap_or(0)
            ));
        }
        if let Some(r2) = fit.r_squared {
            parts.push(format!("R² = {}", fixed(r2, 4)));
        }
        if let Some(deviance) = fit.deviance {
            parts.push(format!(
                "deviance {} on {} degrees of freedom",
                fixed(deviance, 3),
                fit.residual_df.unwrap_or(0)
            ));
        }
        if let Some(log_likelihood) = fit.log_likelihood {
            parts.push(format!("log-likelihood {}", fixed(log_likelihood, 3)));
        }
        if let (Some(pearson), Some(df)) = (fit.pearson_chi_square, fit.residual_df)
            && df > 0
        {
            parts.push(format!("Pearson χ²/df = {}", fixed(pearson / df as f64, 3)));
        }
        if let Some(dispersion) = fit.dispersion {
            parts.push(format!("dispersion {}", fixed(dispersion, 4)));
        }
        if let Some(theta) = fit.theta {
            let se = fit
                .theta_standard_error
                .map(|se| format!(" (SE {})", fixed(se, 3)))
                .unwrap_or_default();
            parts.push(format!("θ = {}{se}", fixed(theta, 3)));
        }
        if let Some(iterations) = fit.iterations {
            if fit.stop_reason.contains("iterations") {
                parts.push(markdown_text(&fit.stop_reason));
            } else {
                parts.push(format!(
                    "{} ({iterations} iterations)",
                    markdown_text(&fit.stop_reason)
                ));
            }
        }
        if let Some(steps) = fit.refinement_steps {
            parts.push(format!(
                "{steps} refinement step(s) of the least-squares solution"
            ));
        }
        format!("{}.", parts.join(", "))
    });
    let checks = analysis
        .checks
        .iter()
        .map(|check| CheckView {
            name: markdown_text(&check.name),
            rows: check
                .rows
                .iter()
                .map(|row| CheckRowView {
                    term: markdown_text(&row.term),
                    statistic_name: row.statistic_name,
                    statistic: statistic(row.statistic),
                    df: degrees(row.df),
                    p_value: p_value(row.p_value),
                })
                .collect(),
            verdict: markdown_text(&check.verdict),
            failed: check.failed,
            details: check
                .details
                .iter()
                .map(|detail| markdown_text(detail))
                .collect(),
        })
        .collect();
    let marginal = match (&analysis.marginal, &analysis.marginal_failure) {
        (Some(marginal), _) => {
            let percent_scale = analysis.endpoint.kind == "binary";
            let show_mean = |value: f64| {
                if percent_scale {
                    fixed(value * 100.0, 1) + "%"
                } else {
                    fixed(value, 3)
                }
            };
            Some(MarginalView {
                sentence: format!(
                    "For each arm, the model's predicted {} is averaged over all {} analysed subjects as if every one had received that arm (standardisation, as the 2023 US FDA guidance on covariate adjustment describes); contrasts of these means have Wald {confidence} confidence intervals from {}.",
                    if percent_scale {
                        "probability of the event"
                    } else {
                        "mean"
                    },
                    n_analysed,
                    markdown_text(&marginal.variance)
                ),
                means: marginal
                    .means
                    .iter()
                    .map(|mean| MarginalMeanRow {
                        arm: markdown_text(&arm_label(&mean.arm)),
                        mean: show_mean(mean.mean),
                        standard_error: show_mean(mean.standard_error),
                    })
                    .collect(),
                effects: marginal
                    .effects
                    .iter()
                    .map(|effect| {
                        let difference = effect.scale.ends_with("difference");
                        let show = |value: f64| {
                            if difference && percent_scale {
                                format!("{} points", fixed(value * 100.0, 1))
                            } else if difference {
                                fixed(value, 3)
                            } else {
                                fixed(value, 2)
                            }
                        };
                        MarginalRow {
                            label: format!(
                                "{} vs {}",
                                markdown_text(&arm_label(&effect.arm)),
                                markdown_text(&arm_label(&effect.versus))
                            ),
                            scale: capitalise(effect.scale),
                            estimate: show(effect.estimate),
                            interval: format!("{} to {}", show(effect.lower), show(effect.upper)),
                            p_value: p_value(effect.p_value),
                        }
                    })
                    .collect(),
                failure: None,
            })
        }
        (None, Some(reason)) => Some(MarginalView {
            sentence: String::new(),
            means: Vec::new(),
            effects: Vec::new(),
            failure: Some(markdown_text(reason)),
        }),
        (None, None) => None,
    };
    let estimand = analysis.estimand.as_ref().map(|estimand| EstimandView {
        treatment: markdown_text(&estimand.treatment),
        population: markdown_text(&estimand.population),
        variable: markdown_text(&estimand.variable),
        events: estimand
            .intercurrent_events
            .iter()
            .map(|event| (markdown_text(&event.event), event.strategy))
            .collect(),
        summary_measure: markdown_text(&estimand.summary_measure),
    });
    AnalysisView {
        estimand,
        marginal,
        number,
        id: markdown_code(&analysis.id),
        title: markdown_text(&analysis.title),
        role: analysis.role,
        methods,
        flow: analysis_flow,
        pooling,
        failure: analysis.failure.as_deref().map(markdown_text),
        fallback: analysis.fallback_used.as_deref().map(markdown_text),
        confidence,
        effect_header,
        se_header,
        has_category: analysis
            .contrasts
            .iter()
            .any(|contrast| contrast.category.is_some()),
        category_header: if analysis.endpoint.kind == "ordinal" {
            "Cut-point"
        } else {
            "Category vs reference"
        },
        figure: (analysis
            .contrasts
            .iter()
            .any(|contrast| contrast.estimate.is_some()))
        .then(|| format!("forest-{number}")),
        effects,
        effect_sentences,
        overall,
        means,
        coefficients,
        statistic_header,
        fit_line,
        checks,
        aliased: analysis
            .fit
            .as_ref()
            .map(|fit| {
                fit.aliased_columns
                    .iter()
                    .map(|name| markdown_text(name))
                    .collect()
            })
            .unwrap_or_default(),
    }
}

pub(crate) fn capitalise(text: &str) -> String {
    let mut characters = text.chars();
    match characters.next() {
        Some(first) => first.to_uppercase().collect::<String>() + characters.as_str(),
        None => String::new(),
    }
}

fn join_words(words: &[String]) -> String {
    match words {
        [] => String::new(),
        [only] => only.clone(),
        [init @ .., last] => format!("{} and {last}", init.join(", ")),
    }
}
