//! results.json: the full-precision record of a run (a serialisation boundary).
//!
//! The types here mirror the documented schema (README, "results.json") field
//! by field, in a fixed order, with no maps whose order could vary. Numbers
//! are written with the shortest representation that reads back to the same
//! double, so the file is byte-identical across runs. The report is rendered
//! from this document, so what a reader sees and what a reviewer compares are
//! the same numbers.

use serde::Serialize;

pub const SCHEMA: &str = "cairn-results/1";

#[derive(Debug, Clone, Serialize)]
pub struct Results {
    pub schema: &'static str,
    pub run: RunInfo,
    pub tool: Tool,
    pub study: StudyInfo,
    pub plan: PlanInfo,
    pub inputs: Vec<Input>,
    pub deviations: Vec<Deviation>,
    pub subjects: SubjectFlow,
    pub analyses: Vec<AnalysisResult>,
    pub multiplicity: Option<MultiplicityResult>,
}

/// The confirmatory family's decisions.
#[derive(Debug, Clone, Serialize)]
pub struct MultiplicityResult {
    pub procedure: &'static str,
    pub alpha: f64,
    /// 1 or 2: whether the hypotheses' p-values are one-sided (in the direction of benefit) or two-sided.
    pub sides: u32,
    /// True in a dry run: p-values and decisions are hidden.
    pub masked: bool,
    pub hypotheses: Vec<HypothesisResultInfo>,
    /// Sequential tests (holm, hochberg, fixed-sequence, fallback), in order.
    pub tests: Vec<TestStepInfo>,
    /// Rejections of the graphical procedure, in order, with the graph after each.
    pub graph_steps: Vec<GraphStepInfo>,
    /// Planned transition weights, rows "from", columns "to" (graphical only; empty otherwise).
    pub transitions: Vec<Vec<f64>>,
}

#[derive(Debug, Clone, Serialize)]
pub struct HypothesisResultInfo {
    pub id: String,
    pub label: Option<String>,
    pub analysis: String,
    pub contrast: String,
    pub initial_weight: f64,
    /// `null` when the analysis or contrast could not be estimated.
    pub raw_p: Option<f64>,
    /// `null` only when masked in a dry run.
    pub adjusted_p: Option<f64>,
    pub rejected: bool,
    pub rejection_step: Option<usize>,
    pub analysis_failed: bool,
}

#[derive(Debug, Clone, Serialize)]
pub struct TestStepInfo {
    pub step: usize,
    pub hypothesis: String,
    pub p_value: f64,
    pub local_level: f64,
    pub rejected: bool,
}

#[derive(Debug, Clone, Serialize)]
pub struct GraphStepInfo {
    pub step: usize,
    pub rejected: String,
    pub p_value: f64,
    pub local_levels: Vec<f64>,
    pub weights_after: Vec<f64>,
    pub transitions_after: Vec<Vec<f64>>,
}

/// How the run was made, so that `verify` can repeat it.
#[derive(Debug, Clone, Serialize)]
pub struct RunInfo {
    /// "run" (unblinded) or "dry-run" (dummy treatment codes, estimates masked).
    pub mode: &'static str,
    /// The dry run's seed.
    pub seed: Option<u64>,
    /// Analyses selected with --only (empty: all, as planned).
    pub only: Vec<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct Tool {
    pub name: &'static str,
    pub version: &'static str,
}

#[derive(Debug, Clone, Serialize)]
pub struct StudyInfo {
    pub id: String,
    pub title: String,
    pub alpha: f64,
    pub sides: u32,
    pub arms: Vec<ArmInfo>,
    pub reference_arm: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct ArmInfo {
    pub code: String,
    pub label: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct PlanInfo {
    pub file: String,
    pub sha256: String,
    /// "locked", "changed-since-lock" or "unlocked".
    pub lock_status: &'static str,
    pub lock_records: usize,
    pub last_lock: Option<LockSummary>,
}

#[derive(Debug, Clone, Serialize)]
pub struct LockSummary {
    pub sequence: u32,
    pub locked_at: String,
    pub locked_by: String,
    pub reason: String,
    pub plan_sha256: String,
    pub tool_version: String,
    pub record_sha256: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct Input {
    /// "plan", "lock record", "subjects", "allocation" or "template".
    pub role: &'static str,
    pub file: String,
    pub sha256: String,
    pub bytes: u64,
}

#[derive(Debug, Clone, Serialize)]
pub struct Deviation {
    /// A stable code (README, "Deviation codes").
    pub code: &'static str,
    /// "critical", "major" or "minor".
    pub severity: &'static str,
    /// The analysis concerned, if any.
    pub analysis: Option<String>,
    pub message: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct SubjectFlow {
    pub subjects_file_rows: usize,
    pub allocation_file_rows: usize,
    pub matched: usize,
    pub only_in_subjects_file: Vec<String>,
    pub only_in_allocation_file: Vec<String>,
    /// Randomised (matched) subjects per arm, in arm order.
    pub randomised_per_arm: Vec<usize>,
    pub populations: Vec<PopulationCount>,
}

#[derive(Debug, Clone, Serialize)]
pub struct PopulationCount {
    pub id: String,
    pub label: String,
    pub per_arm: Vec<usize>,
}

#[derive(Debug, Clone, Serialize)]
pub struct AnalysisResult {
    pub id: String,
    pub title: String,
    pub role: &'static str,
    pub population: String,
    /// The estimand as the plan states it (ICH E9(R1)), if it does.
    pub estimand: Option<EstimandInfo>,
    pub endpoint: EndpointInfo,
    pub model: ModelInfo,
    pub covariates: Vec<VariableInfo>,
    pub strata: Vec<VariableInfo>,
    pub confidence_level: f64,
    pub in_population_per_arm: Vec<usize>,
    pub analysed_per_arm: Vec<usize>,
    pub exclusions: Vec<ExclusionInfo>,
    pub pooling: Vec<PoolingInfo>,
    /// "fitted" or "failed".
    pub status: &'static str,
    /// Why the analysis failed, in words, when it did.
    pub failure: Option<String>,
    pub fit: Option<FitSummary>,
    pub coefficients: Vec<CoefficientInfo>,
    /// Overall tests of treatment: F (linear), or Wald chi-square and likelihood ratio.
    pub treatment_tests: Vec<TestInfo>,
    pub treatment_test_failure: Option<String>,
    pub contrasts: Vec<ContrastInfo>,
    pub adjusted_means: Vec<ArmMeanInfo>,
    /// Standardised (marginal) treatment effects of nonlinear models.
    pub marginal: Option<MarginalInfo>,
    /// Why the marginal effects could not be computed, when they could not.
    pub marginal_failure: Option<String>,
    pub checks: Vec<CheckInfo>,
    /// The planned fallback that was used, in words.
    pub fallback_used: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct EndpointInfo {
    pub column: String,
    pub label: String,
    pub kind: &'static str,
    pub higher_is: &'static str,
    /// Binary endpoints: the level that counts as the event.
    pub event: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct EstimandInfo {
    pub treatment: String,
    pub population: String,
    pub variable: String,
    pub intercurrent_events: Vec<IntercurrentEventInfo>,
    pub summary_measure: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct IntercurrentEventInfo {
    pub event: String,
    /// "treatment policy", "hypothetical", "composite variable", "while on treatment" or "principal stratum".
    pub strategy: &'static str,
}

/// A plan variable as named in the data and as labelled in the report.
#[derive(Debug, Clone, Serialize)]
pub struct VariableInfo {
    pub column: String,
    pub label: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct ModelInfo {
    /// As named in the plan: linear, binomial, poisson, negative-binomial, gamma, cumulative, multinomial.
    pub family: &'static str,
    /// The model actually fitted (after any fallback) and how, in words.
    pub description: String,
    /// Further sentences on the parameterisation and standard errors.
    pub details: String,
}

#[derive(Debug, Clone, Serialize)]
pub struct ExclusionInfo {
    pub missing: String,
    pub missing_label: String,
    pub per_arm: Vec<usize>,
}

#[derive(Debug, Clone, Serialize)]
pub struct PoolingInfo {
    pub stratum: String,
    pub stratum_label: String,
    pub below: usize,
    pub into: String,
    pub pooled_levels: Vec<PooledLevel>,
    pub pooled_size: usize,
}

#[derive(Debug, Clone, Serialize)]
pub struct PooledLevel {
    pub level: String,
    pub subjects: usize,
}

#[derive(Debug, Clone, Serialize)]
pub struct FitSummary {
    pub n_analysed: usize,
    /// Estimated parameters (design columns, plus cut-points for ordinal models; per category for nominal).
    pub n_parameters: usize,
    pub rank: usize,
    /// How the fit ended, in words.
    pub stop_reason: String,
    pub converged: bool,
    pub iterations: Option<usize>,
    /// Steps of iterative refinement of the least-squares solution (linear models).
    pub refinement_steps: Option<usize>,
    pub residual_df: Option<usize>,
    pub residual_sd: Option<f64>,
    pub r_squared: Option<f64>,
    pub adjusted_r_squared: Option<f64>,
    pub deviance: Option<f64>,
    pub null_deviance: Option<f64>,
    pub log_likelihood: Option<f64>,
    /// Estimated dispersion (Gamma).
    pub dispersion: Option<f64>,
    pub pearson_chi_square: Option<f64>,
    /// Negative binomial θ (variance μ + μ²/θ) and its standard error.
    pub theta: Option<f64>,
    pub theta_standard_error: Option<f64>,
    /// Design columns dropped because they are linear combinations of earlier ones.
    pub aliased_columns: Vec<String>,
}

impl From<&crate::inference::FitStatistics> for FitSummary {
    fn from(fit: &crate::inference::FitStatistics) -> FitSummary {
        FitSummary {
            n_analysed: fit.n_analysed,
            n_parameters: fit.n_parameters,
            rank: fit.rank,
            stop_reason: fit.stop_reason.clone(),
            converged: fit.converged,
            iterations: fit.iterations,
            refinement_steps: fit.refinement_steps,
            residual_df: fit.residual_df,
            residual_sd: fit.residual_sd,
            r_squared: fit.r_squared,
            adjusted_r_squared: fit.adjusted_r_squared,
            deviance: fit.deviance,
            null_deviance: fit.null_deviance,
            log_likelihood: fit.log_likelihood,
            dispersion: fit.dispersion,
            pearson_chi_square: fit.pearson_chi_square,
            theta: fit.theta,
            theta_standard_error: fit.theta_standard_error,
            aliased_columns: fit.aliased_columns.clone(),
        }
    }
}

/// Standardised treatment effects: per arm, the model's prediction averaged
/// over all analysed subjects as if all had received that arm.
#[derive(Debug, Clone, Serialize)]
pub struct MarginalInfo {
    /// The variance estimator, in words.
    pub variance: String,
    pub means: Vec<MarginalMeanInfo>,
    pub effects: Vec<MarginalEffectInfo>,
}

#[derive(Debug, Clone, Serialize)]
pub struct MarginalMeanInfo {
    pub arm: String,
    pub mean: f64,
    pub standard_error: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct MarginalEffectInfo {
    pub contrast: String,
    pub arm: String,
    pub versus: String,
    /// "risk difference", "risk ratio", "odds ratio", "mean difference" or "ratio of means".
    pub scale: &'static str,
    pub estimate: f64,
    /// Of the estimate for differences; of its natural logarithm for ratios.
    pub standard_error: f64,
    pub lower: f64,
    pub upper: f64,
    pub p_value: f64,
}

/// An assumption check or supportive test.
#[derive(Debug, Clone, Serialize)]
pub struct CheckInfo {
    pub name: String,
    pub rows: Vec<CheckRowInfo>,
    pub failed: bool,
    pub verdict: String,
    pub details: Vec<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct CheckRowInfo {
    pub term: String,
    pub statistic_name: &'static str,
    pub statistic: f64,
    pub df: f64,
    pub p_value: f64,
}

/// An exponentiated contrast (odds ratio, rate ratio, relative-risk ratio).
#[derive(Debug, Clone, Serialize)]
pub struct RatioInfo {
    pub name: &'static str,
    pub estimate: f64,
    pub lower: f64,
    pub upper: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct CoefficientInfo {
    pub name: String,
    pub term: String,
    /// The outcome category of the row (nominal endpoints), else `null`.
    pub category: Option<String>,
    pub aliased: bool,
    /// True in a dry run for treatment coefficients, whose estimates are hidden.
    pub masked: bool,
    pub estimate: Option<EstimateInfo>,
}

#[derive(Debug, Clone, Serialize)]
pub struct EstimateInfo {
    pub estimate: f64,
    pub standard_error: f64,
    pub statistic: f64,
    pub df: Option<f64>,
    pub p_value: f64,
    pub lower: f64,
    pub upper: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct TestInfo {
    pub statistic_name: &'static str,
    pub statistic: f64,
    pub df1: f64,
    pub df2: Option<f64>,
    pub p_value: f64,
}

#[derive(Debug, Clone, Serialize)]
pub struct ContrastInfo {
    pub id: String,
    pub arm: String,
    pub versus: String,
    /// The outcome category compared with the reference category (nominal endpoints), else `null`.
    pub category: Option<String>,
    /// The scale of `estimate`: "difference", "log odds ratio", "log rate ratio", …
    pub scale: &'static str,
    pub estimate: Option<EstimateInfo>,
    /// The exponentiated estimate and limits, for log and logit links.
    pub ratio: Option<RatioInfo>,
    /// "Wald" or "profile likelihood".
    pub interval_method: &'static str,
    /// For contrasts reported per outcome category or per cut-point: the joint
    /// Wald test over all their rows (the same on every row of the contrast).
    pub joint_test: Option<TestInfo>,
    pub failure: Option<String>,
}

#[derive(Debug, Clone, Serialize)]
pub struct ArmMeanInfo {
    pub arm: String,
    pub estimate: Option<EstimateInfo>,
    pub failure: Option<String>,
}

impl From<&crate::inference::Estimate> for EstimateInfo {
    fn from(estimate: &crate::inference::Estimate) -> EstimateInfo {
        EstimateInfo {
            estimate: estimate.value,
            standard_error: estimate.standard_error,
            statistic: estimate.statistic,
            df: estimate.df,
            p_value: estimate.p_value,
            lower: estimate.lower,
            upper: estimate.upper,
        }
    }
}

/// Serialise with two-space indentation and a final newline.
pub fn to_json(results: &Results) -> Result<Vec<u8>, crate::error::Error> {
    let mut bytes = serde_json::to_vec_pretty(results).map_err(|cause| {
        crate::error::Error::internal(format!("cannot serialise results: {cause}"))
    })?;
    bytes.push(b'\n');
    Ok(bytes)
}
