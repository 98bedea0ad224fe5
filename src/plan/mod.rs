//! The plan: what the statistician fixed before unblinding, as typed values.
//!
//! Reading a plan has two stages. `yaml.rs` turns the file into a located
//! YAML tree; `validate.rs` walks that tree, collects every problem (unknown
//! keys with a did-you-mean hint, wrong types, dangling references) with its
//! file, line, column and YAML path, and only when there are none builds the
//! [`Plan`] below. Downstream stages see resolved indices (an analysis holds
//! the index of its population, a contrast the indices of its arms), never a
//! raw name that might not exist.
//!
//! This module reads the plan file only; it never opens the data files it
//! names (that is `data`'s job) and knows nothing about fitting.

mod validate;
pub mod yaml;

use crate::error::{Error, ErrorKind, Location, Problem};
use std::path::{Path, PathBuf};

/// The schema version this build of cairn reads.
pub const SCHEMA_VERSION: u64 = 1;

/// Limits on what a plan may hold (stated in the README's "Limits" table).
/// Each is far beyond any real trial's plan; they exist so that a malformed or
/// hostile file is refused with a located error instead of exhausting memory or
/// time (every count multiplies work downstream: arms give pairwise contrasts,
/// hypotheses a square transition matrix, levels design columns).
pub mod limits {
    /// The largest plan file, in bytes (1 MiB; the demo plan is about 7 KiB).
    pub const MAX_PLAN_BYTES: usize = 1024 * 1024;
    /// The most analyses in one plan.
    pub const MAX_ANALYSES: usize = 200;
    /// The most variables declared under `variables`.
    pub const MAX_VARIABLES: usize = 1_000;
    /// The most levels of one factor or ordinal variable (declared in the plan or, for a
    /// factor without declared levels, found in the data).
    pub const MAX_LEVELS: usize = 10_000;
    /// The most entries in one YAML list or mapping (which bounds declared levels).
    pub const MAX_ENTRIES: usize = super::yaml::MAX_ENTRIES;
    /// The most treatment arms.
    pub const MAX_ARMS: usize = 100;
    /// The most hypotheses in the confirmatory family.
    pub const MAX_HYPOTHESES: usize = 200;
    /// The deepest nesting of lists and mappings.
    pub const MAX_NESTING: usize = super::yaml::MAX_NESTING;
}

/// A validated plan.
#[derive(Debug, Clone, PartialEq)]
pub struct Plan {
    pub study: Study,
    pub data: DataSpec,
    /// Every column the plan uses, in file order.
    pub variables: Vec<Variable>,
    pub populations: Vec<Population>,
    pub analyses: Vec<Analysis>,
    /// The confirmatory family and how its type I error is controlled, if planned.
    pub multiplicity: Option<MultiplicitySpec>,
    /// Remarks for the statistician that do not stop the plan (shown by `check`).
    pub notes: Vec<Problem>,
}

/// The family of hypotheses whose familywise error rate is controlled together.
#[derive(Debug, Clone, PartialEq)]
pub struct MultiplicitySpec {
    pub procedure: crate::multiplicity::Procedure,
    /// The familywise level (the study's alpha unless the plan says otherwise).
    pub alpha: f64,
    /// In the plan's order, which is the testing order for fixed-sequence and fallback.
    pub hypotheses: Vec<HypothesisSpec>,
    /// The validated strategy, ready for the engine.
    pub strategy: crate::multiplicity::Strategy,
    /// Transition weights as planned (m × m; all zero unless graphical).
    pub transitions: Vec<Vec<f64>>,
}

/// One hypothesis of the family: a planned contrast of a planned analysis.
#[derive(Debug, Clone, PartialEq)]
pub struct HypothesisSpec {
    pub id: String,
    pub label: Option<String>,
    /// Index into `Plan::analyses`.
    pub analysis: usize,
    /// Index into that analysis's contrasts.
    pub contrast: usize,
    /// The initial weight (share of alpha) as planned or as filled in.
    pub weight: f64,
}

#[derive(Debug, Clone, PartialEq)]
pub struct Study {
    pub id: String,
    pub title: String,
    /// The familywise significance level.
    pub alpha: f64,
    pub sides: Sides,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Sides {
    One,
    Two,
}

impl Sides {
    pub fn count(self) -> u32 {
        match self {
            Sides::One => 1,
            Sides::Two => 2,
        }
    }
}

/// Where the data are and how the two files join.
#[derive(Debug, Clone, PartialEq)]
pub struct DataSpec {
    /// Blinded subject-level file, relative to the plan's folder.
    pub subjects: String,
    /// The subject key column, present in both files.
    pub key: String,
    pub treatment: TreatmentSpec,
    /// Cell values that mean "missing".
    pub missing_codes: Vec<String>,
    /// What to do with a subject present in one file and not the other.
    pub unmatched: UnmatchedRule,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum UnmatchedRule {
    /// Stop with an error naming the subjects.
    Error,
    /// Leave them out of every analysis and count them in the subject flow.
    Exclude,
}

/// The randomisation list: a separate file, read only after unblinding.
#[derive(Debug, Clone, PartialEq)]
pub struct TreatmentSpec {
    pub file: String,
    pub column: String,
    /// The arms in plan order; the order fixes the design's dummy columns.
    pub arms: Vec<Arm>,
    /// Index into `arms` of the reference (control) arm.
    pub reference: usize,
}

#[derive(Debug, Clone, PartialEq)]
pub struct Arm {
    /// The code as it appears in the allocation file.
    pub code: String,
    /// The name shown in the report.
    pub label: String,
}

#[derive(Debug, Clone, PartialEq)]
pub struct Variable {
    pub name: String,
    pub kind: VariableKind,
    pub label: Option<String>,
    /// For numeric and count variables: the plausible range. Values outside
    /// are kept but reported as deviation `VALUE-OUT-OF-RANGE`.
    pub range: Option<(f64, f64)>,
}

impl Variable {
    pub fn display_name(&self) -> &str {
        self.label.as_deref().unwrap_or(&self.name)
    }
}

#[derive(Debug, Clone, PartialEq)]
pub enum VariableKind {
    /// A real number.
    Numeric,
    /// A non-negative whole number.
    Count,
    /// Unordered categories; `None` means the levels are taken from the data, sorted.
    Factor { levels: Option<Vec<String>> },
    /// Ordered categories, lowest first.
    Ordinal { levels: Vec<String> },
}

impl VariableKind {
    pub fn name(&self) -> &'static str {
        match self {
            VariableKind::Numeric => "numeric",
            VariableKind::Count => "count",
            VariableKind::Factor { .. } => "factor",
            VariableKind::Ordinal { .. } => "ordinal",
        }
    }
}

/// A subset of subjects: those whose `column` holds one of `values`.
#[derive(Debug, Clone, PartialEq)]
pub struct Population {
    pub id: String,
    pub label: String,
    /// Index into `Plan::variables`.
    pub column: usize,
    pub values: Vec<String>,
}

#[derive(Debug, Clone, PartialEq)]
pub struct Analysis {
    pub id: String,
    pub title: String,
    pub role: Role,
    pub endpoint: Endpoint,
    /// Index into `Plan::populations`.
    pub population: usize,
    pub model: ModelSpec,
    /// Indices into `Plan::variables`: numeric covariates enter as slopes,
    /// factor covariates as treatment-coded fixed effects.
    pub covariates: Vec<usize>,
    /// Indices into `Plan::variables`: stratification factors, entered as fixed
    /// effects after the pooling rule is applied.
    pub strata: Vec<usize>,
    pub pool_small_strata: Option<PoolingRule>,
    pub contrasts: Vec<Contrast>,
    /// Two-sided confidence level of every interval in this analysis.
    pub confidence_level: f64,
    pub fallbacks: Vec<Fallback>,
    pub checks: Vec<Check>,
    /// Level at which a check's p-value counts as a failed assumption.
    pub check_level: f64,
    pub supportive: Vec<Supportive>,
    /// The largest share of the population that may be left out for missing
    /// values before the run flags deviation `MISSING-ABOVE-PLAN`.
    pub max_excluded: Option<f64>,
    /// The estimand this analysis targets (ICH E9(R1)), when the plan states it.
    pub estimand: Option<Estimand>,
    /// Where the analysis is written in the plan, for errors found later
    /// (an arm with no analysed subjects is reported at its analysis).
    pub origin: Location,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Role {
    Primary,
    KeySecondary,
    Secondary,
    Sensitivity,
    Supplementary,
    Exploratory,
}

impl Role {
    pub fn name(self) -> &'static str {
        match self {
            Role::Primary => "primary",
            Role::KeySecondary => "key secondary",
            Role::Secondary => "secondary",
            Role::Sensitivity => "sensitivity",
            Role::Supplementary => "supplementary",
            Role::Exploratory => "exploratory",
        }
    }
}

#[derive(Debug, Clone, PartialEq)]
pub struct Endpoint {
    /// Index into `Plan::variables`.
    pub variable: usize,
    pub kind: EndpointKind,
    pub higher_is: Direction,
    /// Binary endpoints: the index of the level that counts as the event.
    pub event: Option<usize>,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum EndpointKind {
    /// A real-valued measurement (linear or Gamma model).
    Continuous,
    /// Event or no event: a two-level factor and the level that counts as the event.
    Binary,
    /// A whole number of events, possibly over a subject-specific exposure.
    Count,
    /// Ordered categories.
    Ordinal,
    /// Unordered categories.
    Nominal,
}

impl EndpointKind {
    pub fn name(self) -> &'static str {
        match self {
            EndpointKind::Continuous => "continuous",
            EndpointKind::Binary => "binary",
            EndpointKind::Count => "count",
            EndpointKind::Ordinal => "ordinal",
            EndpointKind::Nominal => "nominal",
        }
    }
}

/// Whether a higher endpoint value is good or bad news for the subject; the
/// report's sentences use it to say which arm a difference favours.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Direction {
    Better,
    Worse,
}

#[derive(Debug, Clone, PartialEq)]
pub enum ModelSpec {
    /// Normal linear model fitted by least squares (ANCOVA when covariates are present).
    Linear,
    /// A generalised linear model fitted by IRLS.
    Generalized(GlmSpec),
    /// A cumulative link model for an ordinal endpoint: g(P(Y ≤ j)) = θⱼ − xᵀβ.
    Cumulative {
        link: crate::models::ordinal::CumulativeLink,
    },
    /// Baseline-category logit for a nominal endpoint; `reference_category` indexes the endpoint's levels.
    Multinomial { reference_category: usize },
}

impl ModelSpec {
    /// The family's name as written in the plan.
    pub fn family_name(&self) -> &'static str {
        match self {
            ModelSpec::Linear => "linear",
            ModelSpec::Generalized(spec) => spec.family.name(),
            ModelSpec::Cumulative { .. } => "cumulative",
            ModelSpec::Multinomial { .. } => "multinomial",
        }
    }
}

/// The GLM families a plan can name.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum GlmFamily {
    Binomial,
    Poisson,
    NegativeBinomial,
    Gamma,
}

impl GlmFamily {
    pub fn name(self) -> &'static str {
        match self {
            GlmFamily::Binomial => "binomial",
            GlmFamily::Poisson => "poisson",
            GlmFamily::NegativeBinomial => "negative-binomial",
            GlmFamily::Gamma => "gamma",
        }
    }
}

#[derive(Debug, Clone, PartialEq)]
pub struct GlmSpec {
    pub family: GlmFamily,
    pub link: crate::models::glm::Link,
    /// Index into `Plan::variables` of the exposure (its log enters as an offset).
    pub exposure: Option<usize>,
    pub method: crate::models::glm::Method,
    /// White's HC0 sandwich standard errors instead of model-based ones.
    pub sandwich: bool,
    /// Profile-likelihood confidence intervals for treatment contrasts against the reference.
    pub profile_intervals: bool,
}

/// The five attributes of an estimand (ICH E9(R1), section A.3.2).
#[derive(Debug, Clone, PartialEq)]
pub struct Estimand {
    pub treatment: String,
    pub population: String,
    pub variable: String,
    pub intercurrent_events: Vec<IntercurrentEvent>,
    pub summary_measure: String,
}

/// An intercurrent event and the strategy that addresses it.
#[derive(Debug, Clone, PartialEq)]
pub struct IntercurrentEvent {
    pub event: String,
    pub strategy: IntercurrentStrategy,
}

/// The strategies of ICH E9(R1), section A.3.3.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum IntercurrentStrategy {
    TreatmentPolicy,
    Hypothetical,
    Composite,
    WhileOnTreatment,
    PrincipalStratum,
}

impl IntercurrentStrategy {
    pub fn name(self) -> &'static str {
        match self {
            IntercurrentStrategy::TreatmentPolicy => "treatment policy",
            IntercurrentStrategy::Hypothetical => "hypothetical",
            IntercurrentStrategy::Composite => "composite variable",
            IntercurrentStrategy::WhileOnTreatment => "while on treatment",
            IntercurrentStrategy::PrincipalStratum => "principal stratum",
        }
    }
}

/// A pre-specified alternative used when its condition occurs; using it is a
/// deviation of the mildest kind, planned but reported.
#[derive(Debug, Clone, PartialEq)]
pub enum Fallback {
    /// Binomial logit: refit by Firth's penalised likelihood when separation is detected.
    FirthOnSeparation,
    /// Poisson: refit as negative binomial when Pearson χ²/df exceeds the threshold.
    NegativeBinomialAbove(f64),
    /// Ordinal: merge an outcome category that is empty in the analysed subjects with its
    /// neighbour (the next higher one, or the next lower one for the top category).
    MergeEmptyCategory,
    /// Cumulative logit: when the proportional-odds likelihood-ratio check fails for the
    /// treatment term at the check level, let the treatment effect vary by cut-point
    /// (partial proportional odds) and report the treatment odds ratio at each cut-point.
    PartialProportionalOdds,
}

/// Supportive checks of the model's assumptions, reported beside the planned model.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Check {
    /// Cumulative logit only: the proportional-odds assumption, per term and overall.
    ProportionalOdds,
    /// Treatment-by-stratum interaction added to the planned model (needs strata).
    TreatmentByStratum,
}

/// Supportive analyses run beside the planned model.
#[derive(Debug, Clone, PartialEq)]
pub enum Supportive {
    /// Stratified Cochran–Mantel–Haenszel tests of treatment × ordinal outcome by the first stratum;
    /// column scores as planned (default 1, 2, …).
    MantelHaenszel { scores: Option<Vec<f64>> },
}

/// Strata with fewer than `below` analysed subjects are merged into one level named `into`.
#[derive(Debug, Clone, PartialEq)]
pub struct PoolingRule {
    pub below: usize,
    pub into: String,
}

/// A planned comparison: `arm` minus `versus`, as indices into the arms.
#[derive(Debug, Clone, PartialEq)]
pub struct Contrast {
    pub id: String,
    pub arm: usize,
    pub versus: usize,
}

/// A plan together with the bytes it was read from and where it lives.
#[derive(Debug, Clone)]
pub struct LoadedPlan {
    pub plan: Plan,
    /// The raw bytes of the plan file, exactly as hashed.
    pub bytes: Vec<u8>,
    /// The plan's file name as shown in reports (no folders: outputs must not
    /// depend on where the study folder sits on a machine).
    pub file_name: String,
    /// The study folder: the plan's own folder, against which data paths resolve.
    pub folder: PathBuf,
}

impl LoadedPlan {
    /// Resolve a data path named in the plan. Paths must stay inside the study
    /// folder: absolute paths and `..` components are refused so that a plan
    /// cannot reach files its reviewers were not given.
    pub fn resolve(&self, relative: &str) -> Result<PathBuf, Error> {
        resolve_inside(&self.folder, relative, &self.file_name)
    }
}

fn resolve_inside(folder: &Path, relative: &str, plan_file: &str) -> Result<PathBuf, Error> {
    let candidate = Path::new(relative);
    let escapes = candidate.is_absolute()
        || candidate.components().any(|component| {
            !matches!(
                component,
                std::path::Component::Normal(_) | std::path::Component::CurDir
            )
        });
    if escapes {
        return Err(Error::one(
            Problem::new(
                ErrorKind::PlanSchema,
                format!("data path \"{relative}\" leaves the study folder; give a path relative to the plan's folder without \"..\""),
            )
            .at(Location::file(plan_file)),
        ));
    }
    Ok(folder.join(candidate))
}

/// Read and validate a plan file.
pub fn load(path: &Path) -> Result<LoadedPlan, Error> {
    let file_name = path
        .file_name()
        .map(|name| name.to_string_lossy().into_owned())
        .unwrap_or_else(|| path.display().to_string());
    // Refuse an oversized file before reading it into memory.
    if let Ok(metadata) = std::fs::metadata(path)
        && metadata.len() > limits::MAX_PLAN_BYTES as u64
    {
        return Err(plan_too_large(metadata.len(), &file_name));
    }
    let bytes = std::fs::read(path)
        .map_err(|cause| Error::io(&path.display().to_string(), "read the plan", &cause))?;
    let plan = parse(&bytes, &file_name)?;
    let folder = path.parent().map(Path::to_path_buf).unwrap_or_default();
    let folder = if folder.as_os_str().is_empty() {
        PathBuf::from(".")
    } else {
        folder
    };
    Ok(LoadedPlan {
        plan,
        bytes,
        file_name,
        folder,
    })
}

/// Validate plan bytes; `file` names the file in errors.
pub fn parse(bytes: &[u8], file: &str) -> Result<Plan, Error> {
    if bytes.len() > limits::MAX_PLAN_BYTES {
        return Err(plan_too_large(bytes.len() as u64, file));
    }
    let text = crate::data::decode_utf8(bytes, file)?;
    let root = yaml::parse(text, file)?;
    validate::validate(&root, file)
}

fn plan_too_large(bytes: u64, file: &str) -> Error {
    Error::one(
        Problem::new(
            ErrorKind::Limit,
            format!(
                "the plan file has {bytes} bytes; cairn reads plans of at most {} bytes",
                limits::MAX_PLAN_BYTES
            ),
        )
        .at(Location::file(file)),
    )
}
