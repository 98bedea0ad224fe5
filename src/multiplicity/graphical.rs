//! The graphical approach of Bretz, Maurer, Brannath and Posch (2009, Statistics in
//! Medicine 28:586–604): the weight-and-transition update after a rejection (Algorithm 1,
//! step 3), adjusted p-values by the sequentially rejective Algorithm 2, and constructors
//! for the graphs of common procedures (Holm, fixed sequence, fallback, parallel
//! gatekeeping). Everything is O(m²) per rejection, O(m³) in all, in reusable buffers;
//! the 2^m intersections of the closed test are never enumerated.
//!
//! This file does not validate (the [`Strategy`] constructor does). The adjusted-p-value
//! pass works in caller-owned buffers and allocates only to record the trace when asked.

use super::stepwise::ratio;
use super::{GraphStep, MultiplicityError, Procedure, Recorder, Strategy};

/// When 1 − g_lj·g_jl is this small, the two hypotheses pass all their level to each other
/// and the paper's rule "otherwise 0" applies; the margin absorbs rounding in products that
/// are exactly 1 in real arithmetic. It is far below any transition a plan would write.
const LOOP_DENOMINATOR_FLOOR: f64 = 4.0 * f64::EPSILON;

/// Buffers for the working copy of the graph.
#[derive(Debug, Clone, Default)]
pub(crate) struct GraphScratch {
    weights: Vec<f64>,
    transitions: Vec<f64>,
    remaining: Vec<usize>,
}

/// Removes hypothesis `j` from the graph (Bretz et al. 2009, Algorithm 1, step 3):
/// w_l ← w_l + w_j·g_jl; g_lk ← (g_lk + g_lj·g_jk) / (1 − g_lj·g_jl) for l ≠ k, both still in
/// the graph, and 0 when g_lj·g_jl = 1. `remaining` lists the hypotheses still in the
/// graph, in increasing order; `j` is taken out of it here. Row j and column j are only
/// read during the update, so it can be done in place, and only the remaining rows and
/// columns are visited, so removing hypotheses one by one costs about m³/3 steps in all.
fn remove_hypothesis(
    j: usize,
    m: usize,
    weights: &mut [f64],
    transitions: &mut [f64],
    remaining: &mut Vec<usize>,
) {
    remaining.retain(|&i| i != j);
    let released = weights[j];
    for &l in remaining.iter() {
        weights[l] += released * transitions[j * m + l];
    }
    weights[j] = 0.0;
    for &l in remaining.iter() {
        let to_removed = transitions[l * m + j];
        let back = transitions[j * m + l];
        let denominator = 1.0 - to_removed * back;
        for &k in remaining.iter() {
            if k == l {
                continue;
            }
            let index = l * m + k;
            transitions[index] = if denominator > LOOP_DENOMINATOR_FLOOR {
                // Rounding can push a quotient that is at most 1 in exact arithmetic a
                // hair above it; keep every entry a proportion.
                ((transitions[index] + to_removed * transitions[j * m + k]) / denominator).min(1.0)
            } else {
                0.0
            };
        }
    }
    for k in 0..m {
        transitions[j * m + k] = 0.0;
        transitions[k * m + j] = 0.0;
    }
}

/// Weights of the intersection of the hypotheses flagged in `members`: remove every other
/// hypothesis from the graph, in index order.
pub(crate) fn intersection_weights(
    initial_weights: &[f64],
    initial_transitions: &[f64],
    members: &[bool],
) -> Vec<f64> {
    let m = initial_weights.len();
    let mut weights = initial_weights.to_vec();
    let mut transitions = initial_transitions.to_vec();
    let mut remaining: Vec<usize> = (0..m).collect();
    for (j, _) in members.iter().enumerate().filter(|&(_, &member)| !member) {
        remove_hypothesis(j, m, &mut weights, &mut transitions, &mut remaining);
    }
    weights
}

/// Adjusted p-values of the graphical procedure (Bretz et al. 2009, Algorithm 2): take the
/// hypothesis with the smallest pᵢ/wᵢ (ties: smallest index), give it the running maximum
/// of those ratios, remove it from the graph, repeat. When every remaining weight is 0 the
/// remaining hypotheses can never be rejected and get 1.
///
/// The hypotheses whose adjusted p-value is at most α are taken first and in the order of
/// a valid rejection sequence of Algorithm 1 (each satisfied pᵢ ≤ wᵢα when taken), so the
/// same pass records the trace of rejections at α.
pub(crate) fn graphical(
    p: &[f64],
    initial_weights: &[f64],
    initial_transitions: &[f64],
    adjusted: &mut [f64],
    scratch: &mut GraphScratch,
    mut recorder: Option<Recorder<'_>>,
) {
    let m = p.len();
    let GraphScratch {
        weights,
        transitions,
        remaining,
    } = scratch;
    weights.clear();
    weights.extend_from_slice(initial_weights);
    transitions.clear();
    transitions.extend_from_slice(initial_transitions);
    remaining.clear();
    remaining.extend(0..m);
    for slot in adjusted.iter_mut() {
        *slot = 1.0;
    }
    let mut running_max = 0.0_f64;
    for step in 1..=m {
        let mut chosen = None;
        let mut smallest = f64::INFINITY;
        for &i in remaining.iter() {
            let candidate = ratio(p[i], weights[i]);
            if candidate < smallest {
                smallest = candidate;
                chosen = Some(i);
            }
        }
        // No remaining hypothesis holds any level: all stay at 1.
        let Some(j) = chosen else { break };
        running_max = running_max.max(smallest);
        adjusted[j] = running_max.min(1.0);
        if running_max >= 1.0 {
            // Every later hypothesis would get 1 as well; they already hold it.
            break;
        }
        match recorder.as_mut() {
            Some(Recorder::Graph { alpha, steps }) if adjusted[j] <= *alpha => {
                // Weights of removed hypotheses are already 0, so this gives their level as 0.
                let local_levels: Vec<f64> = weights.iter().map(|w| w * *alpha).collect();
                remove_hypothesis(j, m, weights, transitions, remaining);
                steps.push(GraphStep {
                    step,
                    rejected: j,
                    p_value: p[j],
                    local_levels,
                    weights_after: weights.clone(),
                    transitions_after: transitions.chunks(m).map(|row| row.to_vec()).collect(),
                });
            }
            _ if remaining.len() == 1 => {
                // The last hypothesis: nothing is left to pass its level to.
                remaining.clear();
            }
            _ => remove_hypothesis(j, m, weights, transitions, remaining),
        }
    }
}

/// Holm's procedure with equal weights as a graph: wᵢ = 1/m, g_ij = 1/(m − 1) for i ≠ j
/// (Bretz et al. 2009, §2.1, Fig. 3 for m = 3).
pub fn holm_graph(hypothesis_count: usize) -> Result<Strategy, MultiplicityError> {
    if hypothesis_count == 0 {
        return Err(MultiplicityError::NoHypotheses);
    }
    weighted_holm_graph(&vec![1.0 / hypothesis_count as f64; hypothesis_count])
}

/// Weighted Holm as a graph: g_ij = w_j / Σ_{k≠i} w_k, so a rejected hypothesis's level is
/// shared among the others in proportion to their weights (a row whose other weights are
/// all 0 is 0). Its decisions and adjusted p-values are those of [`Procedure::Holm`] with
/// the same weights.
pub fn weighted_holm_graph(weights: &[f64]) -> Result<Strategy, MultiplicityError> {
    let m = weights.len();
    let mut transitions = vec![vec![0.0; m]; m];
    for (from, row) in transitions.iter_mut().enumerate() {
        let others: f64 = weights
            .iter()
            .enumerate()
            .filter(|&(k, _)| k != from)
            .map(|(_, w)| w)
            .sum();
        if others > 0.0 {
            for (to, entry) in row.iter_mut().enumerate() {
                if to != from {
                    *entry = weights[to] / others;
                }
            }
        }
    }
    Strategy::new(Procedure::Graphical, m, weights.to_vec(), transitions)
}

/// Fixed sequence as a graph: w = (1, 0, …, 0), g_{i,i+1} = 1 (Bretz et al. 2009, Fig. 6
/// with all weight on the first hypothesis).
pub fn fixed_sequence_graph(hypothesis_count: usize) -> Result<Strategy, MultiplicityError> {
    if hypothesis_count == 0 {
        return Err(MultiplicityError::NoHypotheses);
    }
    let mut weights = vec![0.0; hypothesis_count];
    weights[0] = 1.0;
    fallback_graph(&weights)
}

/// Wiens' (2003) fallback procedure as a graph: the given α split w, and g_{i,i+1} = 1, so
/// a rejected hypothesis carries its level forward to the next (Bretz et al. 2009, Fig. 6).
pub fn fallback_graph(weights: &[f64]) -> Result<Strategy, MultiplicityError> {
    let m = weights.len();
    let mut transitions = vec![vec![0.0; m]; m];
    for (from, row) in transitions.iter_mut().enumerate() {
        if from + 1 < m {
            row[from + 1] = 1.0;
        }
    }
    Strategy::new(Procedure::Graphical, m, weights.to_vec(), transitions)
}

/// Parallel gatekeeping (Dmitrienko, Offen and Westfall 2003) as a graph, as in Bretz et
/// al. (2009, Fig. 2): the first `primary_count` hypotheses share α equally; a rejected
/// primary passes its level in equal parts to the `secondary_count` secondary hypotheses,
/// which form a Holm family among themselves (equal shares to the other secondaries). No
/// level returns to the primaries. Hypotheses are ordered primaries first.
pub fn parallel_gatekeeping_graph(
    primary_count: usize,
    secondary_count: usize,
) -> Result<Strategy, MultiplicityError> {
    if primary_count == 0 {
        return Err(MultiplicityError::NoHypotheses);
    }
    let m = primary_count + secondary_count;
    let mut weights = vec![0.0; m];
    for weight in weights.iter_mut().take(primary_count) {
        *weight = 1.0 / primary_count as f64;
    }
    let mut transitions = vec![vec![0.0; m]; m];
    for (from, row) in transitions.iter_mut().enumerate() {
        let targets = if from < primary_count {
            secondary_count
        } else {
            secondary_count - 1
        };
        if targets == 0 {
            continue;
        }
        for (to, entry) in row.iter_mut().enumerate().skip(primary_count) {
            if to != from {
                *entry = 1.0 / targets as f64;
            }
        }
    }
    Strategy::new(Procedure::Graphical, m, weights, transitions)
}
