//! Adjusted p-values of the procedures that need no graph: weighted Bonferroni, weighted
//! Holm, Hochberg, Hommel, fixed sequence and fallback, each O(m²) or better, writing into
//! caller-provided buffers. Each function also records the steps of its procedure when
//! given a recorder; the decision of every recorded step is `adjusted ≤ α`, so a trace
//! can never contradict the adjusted p-values.
//!
//! Inputs are already validated by the caller (p-values finite in [0, 1], a failed
//! analysis already replaced by 1, weights valid); nothing here reads or returns errors.

use super::graphical::GraphScratch;
use super::{Recorder, TestStep};

/// Buffers reused between calls.
#[derive(Debug, Clone, Default)]
pub(crate) struct Scratch {
    order: Vec<usize>,
    first: Vec<f64>,
    second: Vec<f64>,
    third: Vec<f64>,
    pub(crate) graph: GraphScratch,
}

/// p / w, with a zero weight giving +∞ (the hypothesis can never be rejected).
pub(crate) fn ratio(p: f64, weight: f64) -> f64 {
    if weight > 0.0 {
        p / weight
    } else {
        f64::INFINITY
    }
}

/// Sorts `order` (filled with 0..m) by `keys` ascending, ties by index, so that the
/// result never depends on the sort algorithm.
fn sort_by_keys(order: &mut Vec<usize>, keys: &[f64]) {
    order.clear();
    order.extend(0..keys.len());
    order.sort_unstable_by(|&left, &right| {
        keys[left].total_cmp(&keys[right]).then(left.cmp(&right))
    });
}

/// Weighted Bonferroni: p_adj,i = min(1, pᵢ/wᵢ).
pub(crate) fn bonferroni(p: &[f64], weights: &[f64], adjusted: &mut [f64]) {
    for ((slot, &p_value), &weight) in adjusted.iter_mut().zip(p).zip(weights) {
        *slot = ratio(p_value, weight).min(1.0);
    }
}

/// Weighted Holm (Holm 1979, weighted form). Hypotheses are taken in increasing order of
/// pᵢ/wᵢ; when the set I is left, Hᵢ is tested at α·wᵢ·S/Σ_{k∈I} w_k with S the total of
/// the initial weights. The adjusted p-value of the hypothesis taken at position k is the
/// running maximum of (p/w)·(Σ_{I_k} w)/S, capped at 1. With equal weights this is
/// (m − k + 1)·p₍ₖ₎ under a running maximum, the textbook formula. Ties in p/w give equal
/// adjusted p-values whatever their order.
pub(crate) fn holm(
    p: &[f64],
    weights: &[f64],
    adjusted: &mut [f64],
    scratch: &mut Scratch,
    mut recorder: Option<Recorder<'_>>,
) {
    let m = p.len();
    let ratios = &mut scratch.first;
    ratios.clear();
    ratios.extend(
        p.iter()
            .zip(weights)
            .map(|(&p_value, &weight)| ratio(p_value, weight)),
    );
    sort_by_keys(&mut scratch.order, ratios);
    // Remaining weight before each position, summed from the end so that the small
    // remainders late in the sequence are accurate.
    let remaining = &mut scratch.second;
    remaining.clear();
    remaining.resize(m + 1, 0.0);
    for position in (0..m).rev() {
        remaining[position] = remaining[position + 1] + weights[scratch.order[position]];
    }
    let total = remaining[0];
    let mut running_max = 0.0_f64;
    let mut recording = true;
    for (position, &hypothesis) in scratch.order.iter().enumerate() {
        let share = if total > 0.0 {
            remaining[position] / total
        } else {
            0.0
        };
        let candidate = if share > 0.0 {
            ratios[hypothesis] * share
        } else {
            f64::INFINITY
        };
        running_max = running_max.max(candidate);
        adjusted[hypothesis] = running_max.min(1.0);
        if let (true, Some(Recorder::Tests { alpha, steps })) = (recording, recorder.as_mut()) {
            let local_level = if share > 0.0 {
                *alpha * weights[hypothesis] / share
            } else {
                0.0
            };
            let rejected = adjusted[hypothesis] <= *alpha;
            steps.push(TestStep {
                step: position + 1,
                hypothesis,
                p_value: p[hypothesis],
                local_level,
                rejected,
            });
            recording = rejected;
        }
    }
}

/// Hochberg's (1988) step-up procedure: with p₍₁₎ ≤ … ≤ p₍ₘ₎, p_adj,(i) =
/// min_{j≥i} min(1, (m − j + 1)·p₍ⱼ₎). The trace counts down from the largest p-value,
/// testing p₍ⱼ₎ at α/(m − j + 1), and stops at the first rejection.
pub(crate) fn hochberg(
    p: &[f64],
    adjusted: &mut [f64],
    scratch: &mut Scratch,
    mut recorder: Option<Recorder<'_>>,
) {
    let m = p.len();
    sort_by_keys(&mut scratch.order, p);
    let mut running_min = f64::INFINITY;
    for position in (0..m).rev() {
        let hypothesis = scratch.order[position];
        let multiplier = (m - position) as f64;
        running_min = running_min.min(multiplier * p[hypothesis]);
        adjusted[hypothesis] = running_min.min(1.0);
    }
    if let Some(Recorder::Tests { alpha, steps }) = recorder.as_mut() {
        for position in (0..m).rev() {
            let hypothesis = scratch.order[position];
            let rejected = adjusted[hypothesis] <= *alpha;
            steps.push(TestStep {
                step: m - position,
                hypothesis,
                p_value: p[hypothesis],
                local_level: *alpha / (m - position) as f64,
                rejected,
            });
            if rejected {
                break;
            }
        }
    }
}

/// Hommel's (1988) procedure: the closed test of all intersections by Simes' test, with
/// adjusted p-values computed in O(m²) as Wright (1992) describes. For an intersection of
/// size k, the largest Simes p-value among those containing H₍ᵢ₎ comes from H₍ᵢ₎ together
/// with the k − 1 hypotheses of largest p (or, if H₍ᵢ₎ is one of those, the k largest), so
/// only those m − 1 families of subsets need checking. The adjusted p-value is the maximum
/// over k of that worst Simes p-value.
pub(crate) fn hommel(p: &[f64], adjusted: &mut [f64], scratch: &mut Scratch) {
    let n = p.len();
    sort_by_keys(&mut scratch.order, p);
    let sorted = &mut scratch.first;
    sorted.clear();
    sorted.extend(scratch.order.iter().map(|&hypothesis| p[hypothesis]));
    // k = n: the global intersection, whose Simes p-value min_j n·p₍ⱼ₎/j bounds everyone.
    let global = (0..n)
        .map(|position| n as f64 * sorted[position] / (position + 1) as f64)
        .fold(f64::INFINITY, f64::min);
    let worst = &mut scratch.second;
    worst.clear();
    worst.resize(n, global);
    let current = &mut scratch.third;
    current.clear();
    current.resize(n, global);
    for size in (2..n).rev() {
        let k = size as f64;
        // Simes contribution of the size − 1 largest p-values, at ranks 2..size.
        let top_start = n - size + 1;
        let mut top_simes = f64::INFINITY;
        for (offset, &value) in sorted[top_start..].iter().enumerate() {
            top_simes = top_simes.min(k * value / (offset + 2) as f64);
        }
        for position in 0..top_start {
            current[position] = (k * sorted[position]).min(top_simes);
        }
        let boundary = current[top_start - 1];
        for value in current[top_start..].iter_mut() {
            *value = boundary;
        }
        for (worst_value, &value) in worst.iter_mut().zip(current.iter()) {
            *worst_value = worst_value.max(value);
        }
    }
    for (position, &hypothesis) in scratch.order.iter().enumerate() {
        // k = 1: the hypothesis alone, tested at α by its own p-value.
        adjusted[hypothesis] = worst[position].max(sorted[position]).min(1.0);
    }
}

/// Fixed sequence: p_adj,i = max_{k≤i} p_k (each tested at α, in order, until one fails).
pub(crate) fn fixed_sequence(p: &[f64], adjusted: &mut [f64], mut recorder: Option<Recorder<'_>>) {
    let mut running_max = 0.0_f64;
    for (slot, &p_value) in adjusted.iter_mut().zip(p) {
        running_max = running_max.max(p_value);
        *slot = running_max.min(1.0);
    }
    if let Some(Recorder::Tests { alpha, steps }) = recorder.as_mut() {
        for (hypothesis, &p_value) in p.iter().enumerate() {
            let rejected = adjusted[hypothesis] <= *alpha;
            steps.push(TestStep {
                step: hypothesis + 1,
                hypothesis,
                p_value,
                local_level: *alpha,
                rejected,
            });
            if !rejected {
                break;
            }
        }
    }
}

/// Wiens' (2003) fallback procedure. At level α, Hᵢ is tested at α·S(k*, i), where
/// S(k, i) = w_k + … + wᵢ and H_{k*}, …, H_{i−1} is the run of rejected hypotheses just
/// before Hᵢ. Because rejections grow with α, Hᵢ is rejected at α exactly when some k ≤ i
/// has H_k … H_{i−1} rejected at α and pᵢ ≤ α·S(k, i); hence
/// p_adj,i = min_{k≤i} max(pᵢ/S(k, i), max_{k≤l<i} p_adj,l), capped at 1.
pub(crate) fn fallback(
    p: &[f64],
    weights: &[f64],
    adjusted: &mut [f64],
    mut recorder: Option<Recorder<'_>>,
) {
    let m = p.len();
    for hypothesis in 0..m {
        let mut best = f64::INFINITY;
        let mut level_sum = 0.0;
        let mut predecessors_max = 0.0_f64;
        for start in (0..=hypothesis).rev() {
            if start < hypothesis {
                predecessors_max = predecessors_max.max(adjusted[start]);
            }
            if predecessors_max >= best {
                // Starting earlier only raises the predecessors' maximum further.
                break;
            }
            level_sum += weights[start];
            best = best.min(ratio(p[hypothesis], level_sum).max(predecessors_max));
        }
        adjusted[hypothesis] = best.min(1.0);
    }
    if let Some(Recorder::Tests { alpha, steps }) = recorder.as_mut() {
        let mut carried = 0.0;
        for hypothesis in 0..m {
            let local_level = *alpha * weights[hypothesis] + carried;
            let rejected = adjusted[hypothesis] <= *alpha;
            steps.push(TestStep {
                step: hypothesis + 1,
                hypothesis,
                p_value: p[hypothesis],
                local_level,
                rejected,
            });
            carried = if rejected { local_level } else { 0.0 };
        }
    }
}
