//! Multiplicity: turns the p-values of a family of hypotheses and a pre-specified
//! strategy into adjusted p-values and decisions at the family-wise level α.
//!
//! This stage owns the procedures (weighted Bonferroni, weighted Holm, Hochberg, Hommel,
//! fixed sequence, fallback and the graphical approach, which also expresses serial and
//! parallel gatekeeping), the validation of a strategy, and the step-by-step trace a
//! reviewer follows by hand. It knows nothing about models, plans, files or reports: it
//! takes slices and returns values, does no I/O, reads no clock or environment, uses no
//! randomness and never panics on bad input (it returns a [`MultiplicityError`]).
//!
//! Two entry points:
//! - [`apply`] returns an [`Outcome`] with a result per hypothesis and the trace; it
//!   allocates the trace and is meant for a report.
//! - [`Workspace::adjusted_p_values`] returns only the adjusted p-values and reuses its
//!   buffers, so repeated calls (simulating a plan's operating characteristics) do not
//!   allocate once the buffers have grown to the family size.
//!
//! Conventions used throughout: hypotheses are numbered by their 0-based position in the
//! family; steps are numbered from 1. A hypothesis is rejected when its adjusted p-value is
//! at most α (`p_adj ≤ α`, Bretz et al. 2009, Algorithm 2, step 5), and every trace takes its
//! decisions from that same comparison, so decisions and adjusted p-values always agree.
//! A failed analysis (`None`) enters every computation as p = 1: it is never rejected, its
//! adjusted p-value is 1, and any level it holds can only be passed on once it is rejected,
//! which never happens.
//! A hypothesis whose current weight is 0 holds no level and is never rejected, even when
//! p = 0 (read literally, "p ≤ 0·α" would allow it); this keeps p/w, and so the adjusted
//! p-value, defined, and it matches the closed test, whose intersections with all weights
//! 0 are never rejected.
//! Hochberg and Hommel are unweighted: a strategy that gives them weights is refused
//! ([`MultiplicityError::WeightsNotSupported`]) rather than silently ignored.
//!
//! References: Holm S (1979) Scand J Statist 6:65–70; Hochberg Y (1988) Biometrika
//! 75:800–802; Hommel G (1988) Biometrika 75:383–386 and Wright SP (1992) Biometrics
//! 48:1005–1013 for adjusted p-values; Wiens BL (2003) Pharm Stat 2:211–215 (fallback);
//! Bretz F, Maurer W, Brannath W, Posch M (2009) Stat Med 28:586–604 (graphical approach,
//! Algorithm 1 for the rejection sequence, Algorithm 2 for adjusted p-values).

mod error;
mod graphical;
mod stepwise;

pub use error::MultiplicityError;
pub use graphical::{
    fallback_graph, fixed_sequence_graph, holm_graph, parallel_gatekeeping_graph,
    weighted_holm_graph,
};

/// How far a sum of weights (or of a transition row) may exceed 1 and still be accepted,
/// so that weights such as three copies of 1/3 pass despite rounding.
pub const SUM_TOLERANCE: f64 = 1e-12;

/// A multiple-testing procedure.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Procedure {
    /// Weighted Bonferroni: reject Hᵢ when pᵢ ≤ wᵢα. Single step.
    Bonferroni,
    /// Weighted Holm: sequentially rejective weighted Bonferroni. Among the hypotheses not
    /// yet rejected (set I), Hᵢ is tested at α·wᵢ·S/Σ_{k∈I} w_k, where S is the total of the
    /// initial weights; with weights summing to 1 this is Holm's (1979) weighted procedure.
    Holm,
    /// Hochberg's (1988) step-up procedure, unweighted.
    Hochberg,
    /// Hommel's (1988) closed Simes procedure, unweighted.
    Hommel,
    /// Fixed sequence: H₀, H₁, … are each tested at the full α, in order, until the first
    /// one that is not rejected.
    FixedSequence,
    /// Wiens' (2003) fallback: Hᵢ is tested at wᵢα plus the level of Hᵢ₋₁ if Hᵢ₋₁ was
    /// rejected; every hypothesis is tested, in order.
    Fallback,
    /// Graphical approach of Bretz et al. (2009): initial weights and a transition matrix.
    Graphical,
}

impl Procedure {
    /// The procedure's name as written in a plan.
    pub fn name(self) -> &'static str {
        match self {
            Procedure::Bonferroni => "bonferroni",
            Procedure::Holm => "holm",
            Procedure::Hochberg => "hochberg",
            Procedure::Hommel => "hommel",
            Procedure::FixedSequence => "fixed-sequence",
            Procedure::Fallback => "fallback",
            Procedure::Graphical => "graphical",
        }
    }
}

/// A validated multiplicity strategy: a procedure, its weights and (graphical only) its
/// transition matrix, for a family of `hypothesis_count` hypotheses.
#[derive(Debug, Clone, PartialEq)]
pub struct Strategy {
    procedure: Procedure,
    hypothesis_count: usize,
    /// Initial weights; the local level of Hᵢ is weights[i]·α. For procedures given no
    /// weights these are filled in (equal split, or (1, 0, …, 0) for fixed sequence).
    weights: Vec<f64>,
    /// Row-major m×m transition matrix: entry [from·m + to]. Empty unless graphical.
    transitions: Vec<f64>,
}

impl Strategy {
    /// Builds and validates a strategy.
    ///
    /// - `weights`: one per hypothesis, each in [0, 1], summing to at most 1 (+[`SUM_TOLERANCE`]).
    ///   May be empty for Bonferroni, Holm and fallback (α is then split equally) and must be
    ///   empty for Hochberg, Hommel and fixed sequence, which are unweighted here. Required
    ///   for graphical.
    /// - `transitions`: graphical only (must be empty otherwise): m rows of m entries, each in
    ///   [0, 1], zero diagonal, each row summing to at most 1 (+[`SUM_TOLERANCE`]).
    pub fn new(
        procedure: Procedure,
        hypothesis_count: usize,
        weights: Vec<f64>,
        transitions: Vec<Vec<f64>>,
    ) -> Result<Strategy, MultiplicityError> {
        let m = hypothesis_count;
        if m == 0 {
            return Err(MultiplicityError::NoHypotheses);
        }
        let weights = match procedure {
            Procedure::Hochberg | Procedure::Hommel | Procedure::FixedSequence => {
                if !weights.is_empty() {
                    return Err(MultiplicityError::WeightsNotSupported { procedure });
                }
                if procedure == Procedure::FixedSequence {
                    let mut all_to_first = vec![0.0; m];
                    all_to_first[0] = 1.0;
                    all_to_first
                } else {
                    vec![1.0 / m as f64; m]
                }
            }
            Procedure::Bonferroni | Procedure::Holm | Procedure::Fallback if weights.is_empty() => {
                vec![1.0 / m as f64; m]
            }
            _ => weights,
        };
        validate_weights(&weights, m)?;
        let transitions = if procedure == Procedure::Graphical {
            validate_transitions(&transitions, m)?
        } else if !transitions.is_empty() {
            return Err(MultiplicityError::TransitionsNotSupported { procedure });
        } else {
            Vec::new()
        };
        Ok(Strategy {
            procedure,
            hypothesis_count: m,
            weights,
            transitions,
        })
    }

    /// Shorthand for [`Strategy::new`] with the graphical procedure.
    pub fn graphical(
        weights: Vec<f64>,
        transitions: Vec<Vec<f64>>,
    ) -> Result<Strategy, MultiplicityError> {
        let m = weights.len();
        Strategy::new(Procedure::Graphical, m, weights, transitions)
    }

    /// Shorthand for [`Strategy::new`] with no weights and no transitions.
    pub fn unweighted(
        procedure: Procedure,
        hypothesis_count: usize,
    ) -> Result<Strategy, MultiplicityError> {
        Strategy::new(procedure, hypothesis_count, Vec::new(), Vec::new())
    }

    /// The procedure.
    pub fn procedure(&self) -> Procedure {
        self.procedure
    }

    /// The number of hypotheses in the family.
    pub fn hypothesis_count(&self) -> usize {
        self.hypothesis_count
    }

    /// The initial weights (filled in when none were given).
    pub fn weights(&self) -> &[f64] {
        &self.weights
    }

    /// Weights of the intersection hypothesis H_J of the closed test that this graph
    /// defines (Bretz et al. 2009, §3, and Bretz et al. 2011, Algorithm 1): the hypotheses
    /// outside J are removed from the graph by the update rule, and the weights of those in
    /// J are what remains (0 outside J). `members[i]` says whether Hᵢ is in J. Graphical
    /// strategies only; the order of removal does not matter (Bretz et al. 2011, §2).
    pub fn intersection_weights(&self, members: &[bool]) -> Result<Vec<f64>, MultiplicityError> {
        if self.procedure != Procedure::Graphical {
            return Err(MultiplicityError::NotGraphical {
                procedure: self.procedure,
            });
        }
        let m = self.hypothesis_count;
        if members.len() != m {
            return Err(MultiplicityError::MembershipCountMismatch {
                expected: m,
                found: members.len(),
            });
        }
        Ok(graphical::intersection_weights(
            &self.weights,
            &self.transitions,
            members,
        ))
    }

    /// The transition weight from one hypothesis to another (0 unless graphical).
    pub fn transition(&self, from: usize, to: usize) -> f64 {
        let m = self.hypothesis_count;
        if self.transitions.is_empty() || from >= m || to >= m {
            0.0
        } else {
            self.transitions[from * m + to]
        }
    }
}

fn validate_weights(weights: &[f64], m: usize) -> Result<(), MultiplicityError> {
    if weights.len() != m {
        return Err(MultiplicityError::WeightCountMismatch {
            expected: m,
            found: weights.len(),
        });
    }
    for (hypothesis, &value) in weights.iter().enumerate() {
        if !(0.0..=1.0).contains(&value) {
            return Err(MultiplicityError::WeightOutOfRange { hypothesis, value });
        }
    }
    let sum: f64 = weights.iter().sum();
    if sum > 1.0 + SUM_TOLERANCE {
        return Err(MultiplicityError::WeightSumAboveOne { sum });
    }
    Ok(())
}

fn validate_transitions(rows: &[Vec<f64>], m: usize) -> Result<Vec<f64>, MultiplicityError> {
    if rows.len() != m {
        return Err(MultiplicityError::TransitionRowCountMismatch {
            expected: m,
            found: rows.len(),
        });
    }
    let mut flat = Vec::with_capacity(m * m);
    for (from, row) in rows.iter().enumerate() {
        if row.len() != m {
            return Err(MultiplicityError::TransitionRowLengthMismatch {
                from,
                expected: m,
                found: row.len(),
            });
        }
        for (to, &value) in row.iter().enumerate() {
            if !(0.0..=1.0).contains(&value) {
                return Err(MultiplicityError::TransitionOutOfRange { from, to, value });
            }
        }
        if row[from] != 0.0 {
            return Err(MultiplicityError::SelfLoop {
                hypothesis: from,
                value: row[from],
            });
        }
        let sum: f64 = row.iter().sum();
        if sum > 1.0 + SUM_TOLERANCE {
            return Err(MultiplicityError::TransitionRowSumAboveOne { from, sum });
        }
        flat.extend_from_slice(row);
    }
    Ok(flat)
}

/// The result for one hypothesis.
#[derive(Debug, Clone, PartialEq)]
pub struct HypothesisResult {
    /// The p-value as given; `None` when the analysis failed.
    pub raw_p: Option<f64>,
    /// The adjusted p-value, capped at 1: the smallest α at which the procedure rejects
    /// this hypothesis. A failed analysis gets 1.
    pub adjusted_p: f64,
    /// Rejected at the family-wise α, i.e. `adjusted_p <= alpha`.
    pub rejected: bool,
    /// For sequential procedures (Holm, Hochberg, fixed sequence, fallback, graphical), the
    /// 1-based step of the trace at which it was rejected; `None` when retained or when the
    /// procedure has no steps (Bonferroni, Hommel). Under Hochberg every rejected
    /// hypothesis shares the one step at which the step-up search stopped.
    pub rejection_step: Option<usize>,
    /// The analysis behind this hypothesis failed, so it was treated as p = 1.
    pub analysis_failed: bool,
}

/// One test in the trace of Holm, Hochberg, fixed sequence or fallback.
#[derive(Debug, Clone, PartialEq)]
pub struct TestStep {
    /// 1-based step number.
    pub step: usize,
    /// The hypothesis tested.
    pub hypothesis: usize,
    /// Its p-value as used (1 for a failed analysis).
    pub p_value: f64,
    /// The level it was tested at.
    pub local_level: f64,
    /// Whether the test rejected it. For Hochberg (step-up) a rejection at a step also
    /// rejects every hypothesis with a smaller p-value, at the same step.
    pub rejected: bool,
}

/// One rejection in the graphical procedure (Bretz et al. 2009, Algorithm 1), with the
/// state of the graph after the update, so the sequence can be followed by hand.
#[derive(Debug, Clone, PartialEq)]
pub struct GraphStep {
    /// 1-based step number.
    pub step: usize,
    /// The hypothesis rejected at this step.
    pub rejected: usize,
    /// Its p-value.
    pub p_value: f64,
    /// Local levels wᵢα of all m hypotheses just before this rejection (0 for hypotheses
    /// already rejected); the rejected one satisfied p ≤ its level.
    pub local_levels: Vec<f64>,
    /// Weights after the update (0 for rejected hypotheses).
    pub weights_after: Vec<f64>,
    /// Transition matrix after the update, rows "from", columns "to" (rows and columns of
    /// rejected hypotheses are 0).
    pub transitions_after: Vec<Vec<f64>>,
}

/// The steps behind the decisions, for a reviewer.
#[derive(Debug, Clone, PartialEq)]
pub enum Trace {
    /// Bonferroni and Hommel decide in one pass: there is no sequence to show.
    NotSequential,
    /// The tests carried out, in order (Holm, Hochberg, fixed sequence, fallback). Holm and
    /// fixed sequence stop after the first test that does not reject; Hochberg stops at the
    /// first rejection (counting down from the largest p-value); fallback tests everything.
    Tests(Vec<TestStep>),
    /// The rejections of the graphical procedure, in order.
    Graph(Vec<GraphStep>),
}

/// The outcome of a procedure on one family.
#[derive(Debug, Clone, PartialEq)]
pub struct Outcome {
    /// The procedure applied.
    pub procedure: Procedure,
    /// The family-wise level used.
    pub alpha: f64,
    /// One result per hypothesis, in family order.
    pub hypotheses: Vec<HypothesisResult>,
    /// How the decisions came about.
    pub trace: Trace,
}

/// Reusable buffers for computing adjusted p-values without allocating on every call.
#[derive(Debug, Clone, Default)]
pub struct Workspace {
    effective_p: Vec<f64>,
    adjusted: Vec<f64>,
    scratch: stepwise::Scratch,
}

impl Workspace {
    /// An empty workspace; buffers grow to the family size on first use.
    pub fn new() -> Workspace {
        Workspace::default()
    }

    /// Adjusted p-values (capped at 1) of the strategy for these p-values, one per
    /// hypothesis. Does not allocate once the buffers have reached the family size.
    pub fn adjusted_p_values(
        &mut self,
        strategy: &Strategy,
        p_values: &[Option<f64>],
    ) -> Result<&[f64], MultiplicityError> {
        load_p_values(strategy, p_values, &mut self.effective_p)?;
        let m = strategy.hypothesis_count;
        self.adjusted.clear();
        self.adjusted.resize(m, 1.0);
        compute(
            strategy,
            &self.effective_p,
            &mut self.adjusted,
            &mut self.scratch,
            None,
        );
        Ok(&self.adjusted)
    }
}

/// Checks the p-values and writes them into `effective`, with a failed analysis as 1.
fn load_p_values(
    strategy: &Strategy,
    p_values: &[Option<f64>],
    effective: &mut Vec<f64>,
) -> Result<(), MultiplicityError> {
    let m = strategy.hypothesis_count;
    if p_values.len() != m {
        return Err(MultiplicityError::PValueCountMismatch {
            expected: m,
            found: p_values.len(),
        });
    }
    effective.clear();
    for (hypothesis, p_value) in p_values.iter().enumerate() {
        match *p_value {
            Some(value) if (0.0..=1.0).contains(&value) => effective.push(value),
            Some(value) => return Err(MultiplicityError::PValueOutOfRange { hypothesis, value }),
            None => effective.push(1.0),
        }
    }
    Ok(())
}

/// Records the trace while computing; `alpha` decides which steps count as rejections.
pub(crate) enum Recorder<'a> {
    Tests {
        alpha: f64,
        steps: &'a mut Vec<TestStep>,
    },
    Graph {
        alpha: f64,
        steps: &'a mut Vec<GraphStep>,
    },
}

fn compute(
    strategy: &Strategy,
    p: &[f64],
    adjusted: &mut [f64],
    scratch: &mut stepwise::Scratch,
    recorder: Option<Recorder<'_>>,
) {
    let weights = &strategy.weights;
    match strategy.procedure {
        Procedure::Bonferroni => stepwise::bonferroni(p, weights, adjusted),
        Procedure::Holm => stepwise::holm(p, weights, adjusted, scratch, recorder),
        Procedure::Hochberg => stepwise::hochberg(p, adjusted, scratch, recorder),
        Procedure::Hommel => stepwise::hommel(p, adjusted, scratch),
        Procedure::FixedSequence => stepwise::fixed_sequence(p, adjusted, recorder),
        Procedure::Fallback => stepwise::fallback(p, weights, adjusted, recorder),
        Procedure::Graphical => graphical::graphical(
            p,
            weights,
            &strategy.transitions,
            adjusted,
            &mut scratch.graph,
            recorder,
        ),
    }
}

/// Applies the strategy to the family's p-values at family-wise level `alpha`.
///
/// `p_values[i]` is `None` when the analysis of Hᵢ failed; such a hypothesis is never
/// rejected and is reported with `analysis_failed: true`. Errors: the p-value count differs
/// from the strategy's, a p-value is non-finite or outside [0, 1], or α is not in (0, 1).
pub fn apply(
    strategy: &Strategy,
    p_values: &[Option<f64>],
    alpha: f64,
) -> Result<Outcome, MultiplicityError> {
    if !(alpha > 0.0 && alpha < 1.0) {
        return Err(MultiplicityError::AlphaOutOfRange { value: alpha });
    }
    let mut effective = Vec::new();
    load_p_values(strategy, p_values, &mut effective)?;
    let m = strategy.hypothesis_count;
    let mut adjusted = vec![1.0; m];
    let mut scratch = stepwise::Scratch::default();
    let mut test_steps = Vec::new();
    let mut graph_steps = Vec::new();
    let recorder = match strategy.procedure {
        Procedure::Bonferroni | Procedure::Hommel => None,
        Procedure::Graphical => Some(Recorder::Graph {
            alpha,
            steps: &mut graph_steps,
        }),
        _ => Some(Recorder::Tests {
            alpha,
            steps: &mut test_steps,
        }),
    };
    compute(strategy, &effective, &mut adjusted, &mut scratch, recorder);

    let mut rejection_step = vec![None; m];
    let trace = match strategy.procedure {
        Procedure::Bonferroni | Procedure::Hommel => Trace::NotSequential,
        Procedure::Graphical => {
            for step in &graph_steps {
                rejection_step[step.rejected] = Some(step.step);
            }
            Trace::Graph(graph_steps)
        }
        Procedure::Hochberg => {
            // A step-up rejection at a step takes every hypothesis with a smaller p-value
            // with it; those are exactly the ones whose adjusted p-value is at most α.
            if let Some(last) = test_steps.last().filter(|step| step.rejected) {
                for (hypothesis, slot) in rejection_step.iter_mut().enumerate() {
                    if adjusted[hypothesis] <= alpha {
                        *slot = Some(last.step);
                    }
                }
            }
            Trace::Tests(test_steps)
        }
        _ => {
            for step in test_steps.iter().filter(|step| step.rejected) {
                rejection_step[step.hypothesis] = Some(step.step);
            }
            Trace::Tests(test_steps)
        }
    };

    let hypotheses = (0..m)
        .map(|hypothesis| HypothesisResult {
            raw_p: p_values[hypothesis],
            adjusted_p: adjusted[hypothesis],
            rejected: adjusted[hypothesis] <= alpha,
            rejection_step: rejection_step[hypothesis],
            analysis_failed: p_values[hypothesis].is_none(),
        })
        .collect();
    Ok(Outcome {
        procedure: strategy.procedure,
        alpha,
        hypotheses,
        trace,
    })
}
