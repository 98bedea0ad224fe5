//! Property tests of the multiplicity engine over random valid strategies and p-values:
//! invariance of the rejected set to the order of rejections, monotonicity of adjusted
//! p-values, agreement of decisions with adjusted p-values and with the step trace, the
//! graph identities (Holm, fixed sequence, fallback), and agreement with brute-force
//! closed tests. Every comparison target here is an independent implementation written
//! in this file from the papers' definitions, not a call back into cairn's own algorithm.
//!
//! Convention shared with cairn (stated in its module docs): a hypothesis whose current
//! weight is 0 holds no level and cannot be rejected, even when p = 0.

use cairn::multiplicity::{
    Outcome, Procedure, Strategy as MultiplicityStrategy, Trace, apply, fallback_graph,
    fixed_sequence_graph, holm_graph, weighted_holm_graph,
};
use proptest::prelude::*;

/// Adjusted p-values lie in [0, 1]; 1e-12 absolute is therefore 1e-12 relative to the
/// largest possible value, and far above the rounding of an O(m³) update (≈ 1e-15).
const TOLERANCE: f64 = 1e-12;

/// Mirrors the paper's "g_lj·g_jl = 1" case in floating point (see the update below).
const LOOP_FLOOR: f64 = 4.0 * f64::EPSILON;

// ---------------------------------------------------------------------------------------
// Independent implementations, written from the definitions.
// ---------------------------------------------------------------------------------------

/// Bretz et al. (2009), Algorithm 1, step 3, on plain nested vectors (not in place: a new
/// graph is built from the old one, exactly as the formulas read).
fn remove_from_graph(
    j: usize,
    active: &mut [bool],
    weights: &mut Vec<f64>,
    graph: &mut Vec<Vec<f64>>,
) {
    let m = weights.len();
    active[j] = false;
    let mut new_weights = vec![0.0; m];
    let mut new_graph = vec![vec![0.0; m]; m];
    for l in (0..m).filter(|&l| active[l]) {
        new_weights[l] = weights[l] + weights[j] * graph[j][l];
        for k in (0..m).filter(|&k| active[k] && k != l) {
            let denominator = 1.0 - graph[l][j] * graph[j][l];
            new_graph[l][k] = if denominator > LOOP_FLOOR {
                (graph[l][k] + graph[l][j] * graph[j][k]) / denominator
            } else {
                0.0
            };
        }
    }
    *weights = new_weights;
    *graph = new_graph;
}

/// Bretz et al. (2009), Algorithm 1, choosing which rejectable hypothesis to reject next
/// from `choices` instead of always the first: returns the rejected set.
fn algorithm1_in_chosen_order(
    weights: &[f64],
    graph: &[Vec<f64>],
    p: &[f64],
    alpha: f64,
    choices: &[usize],
) -> Vec<bool> {
    let m = weights.len();
    let mut weights = weights.to_vec();
    let mut graph = graph.to_vec();
    let mut active = vec![true; m];
    for step in 0.. {
        let rejectable: Vec<usize> = (0..m)
            .filter(|&i| active[i] && weights[i] > 0.0 && p[i] <= weights[i] * alpha)
            .collect();
        if rejectable.is_empty() {
            break;
        }
        let j = rejectable[choices[step % choices.len()] % rejectable.len()];
        remove_from_graph(j, &mut active, &mut weights, &mut graph);
    }
    active.iter().map(|&a| !a).collect()
}

/// Adjusted p-values of the closed weighted Bonferroni test that a graph defines, by
/// brute force over all 2^m − 1 intersections (Bretz et al. 2009, §3; Bretz et al. 2011,
/// §2): p_adj,i = max over J ∋ i of min_{j∈J} p_j / w_j(J), capped at 1.
fn closed_bonferroni_adjusted(weights: &[f64], graph: &[Vec<f64>], p: &[f64]) -> Vec<f64> {
    let m = weights.len();
    let mut adjusted = vec![0.0_f64; m];
    for mask in 1u32..(1 << m) {
        let mut intersection_weights = weights.to_vec();
        let mut intersection_graph = graph.to_vec();
        let mut active = vec![true; m];
        for j in 0..m {
            if mask & (1 << j) == 0 {
                remove_from_graph(
                    j,
                    &mut active,
                    &mut intersection_weights,
                    &mut intersection_graph,
                );
            }
        }
        let intersection_p = (0..m)
            .filter(|&j| mask & (1 << j) != 0 && intersection_weights[j] > 0.0)
            .map(|j| p[j] / intersection_weights[j])
            .fold(f64::INFINITY, f64::min)
            .min(1.0);
        for i in (0..m).filter(|&i| mask & (1 << i) != 0) {
            adjusted[i] = adjusted[i].max(intersection_p);
        }
    }
    adjusted
}

/// Hommel's procedure by brute force: the closed test of Simes tests (Hommel 1988);
/// p_adj,i = max over J ∋ i of min_j |J|·p₍ⱼ:J₎ / j.
fn closed_simes_adjusted(p: &[f64]) -> Vec<f64> {
    let m = p.len();
    let mut adjusted = vec![0.0_f64; m];
    for mask in 1u32..(1 << m) {
        let mut members: Vec<f64> = (0..m)
            .filter(|&j| mask & (1 << j) != 0)
            .map(|j| p[j])
            .collect();
        members.sort_by(f64::total_cmp);
        let size = members.len() as f64;
        let simes = members
            .iter()
            .enumerate()
            .map(|(rank, &value)| size * value / (rank + 1) as f64)
            .fold(f64::INFINITY, f64::min);
        for i in (0..m).filter(|&i| mask & (1 << i) != 0) {
            adjusted[i] = adjusted[i].max(simes.min(1.0));
        }
    }
    adjusted
}

/// Holm (1979), unweighted step-down at level α: the k-th smallest p is tested at
/// α/(m − k + 1) until the first failure.
fn holm_decisions(p: &[f64], alpha: f64) -> Vec<bool> {
    let m = p.len();
    let mut order: Vec<usize> = (0..m).collect();
    order.sort_by(|&a, &b| p[a].total_cmp(&p[b]));
    let mut rejected = vec![false; m];
    for (k, &i) in order.iter().enumerate() {
        if p[i] <= alpha / (m - k) as f64 {
            rejected[i] = true;
        } else {
            break;
        }
    }
    rejected
}

/// Hochberg (1988), step-up at level α: find the largest k with p₍ₖ₎ ≤ α/(m − k + 1) and
/// reject H₍₁₎ … H₍ₖ₎.
fn hochberg_decisions(p: &[f64], alpha: f64) -> Vec<bool> {
    let m = p.len();
    let mut order: Vec<usize> = (0..m).collect();
    order.sort_by(|&a, &b| p[a].total_cmp(&p[b]));
    let mut rejected = vec![false; m];
    if let Some(last) = (0..m)
        .rev()
        .find(|&k| p[order[k]] <= alpha / (m - k) as f64)
    {
        for &i in &order[..=last] {
            rejected[i] = true;
        }
    }
    rejected
}

/// Wiens (2003) fallback at level α: Hᵢ tested at wᵢα plus the level of Hᵢ₋₁ when Hᵢ₋₁
/// was rejected. With w = (1, 0, …, 0) and zero-weight hypotheses unable to reject unless
/// they inherit level, this is also the fixed-sequence procedure.
fn fallback_decisions(p: &[f64], weights: &[f64], alpha: f64) -> Vec<bool> {
    fallback_run(p, weights, alpha).0
}

/// Wiens' recurrence: the decisions and the level each hypothesis was tested at.
fn fallback_run(p: &[f64], weights: &[f64], alpha: f64) -> (Vec<bool>, Vec<f64>) {
    let mut carried = 0.0;
    let mut rejected = Vec::with_capacity(p.len());
    let mut levels = Vec::with_capacity(p.len());
    for (i, &p_value) in p.iter().enumerate() {
        let level = weights[i] * alpha + carried;
        let reject = level > 0.0 && p_value <= level;
        rejected.push(reject);
        levels.push(level);
        carried = if reject { level } else { 0.0 };
    }
    (rejected, levels)
}

// ---------------------------------------------------------------------------------------
// Generators.
// ---------------------------------------------------------------------------------------

/// A p-value: often small so that rejections happen, sometimes exactly 0 or 1.
fn p_value() -> impl Strategy<Value = f64> {
    prop_oneof![5 => 0.0f64..0.08, 3 => 0.0f64..1.0, 1 => Just(0.0), 1 => Just(1.0)]
}

/// A proportion used to build weights and transitions, sometimes exactly 0.
fn share() -> impl Strategy<Value = f64> {
    prop_oneof![4 => 0.0f64..1.0, 1 => Just(0.0)]
}

/// Scales `raw` to add up to `total` (all zeros stay zeros).
fn scaled(raw: &[f64], total: f64) -> Vec<f64> {
    let sum: f64 = raw.iter().sum();
    if sum > 0.0 {
        raw.iter().map(|value| value / sum * total).collect()
    } else {
        vec![0.0; raw.len()]
    }
}

/// A random valid graph: weights summing to at most 1 and a row-substochastic transition
/// matrix with zero diagonal, plus p-values, α and a sequence of choices.
#[derive(Debug, Clone)]
struct GraphCase {
    weights: Vec<f64>,
    graph: Vec<Vec<f64>>,
    p: Vec<f64>,
    alpha: f64,
    choices: Vec<usize>,
}

fn total() -> impl Strategy<Value = f64> {
    prop_oneof![1 => Just(1.0), 1 => 0.3f64..1.0]
}

fn graph_case(max_m: usize) -> impl Strategy<Value = GraphCase> {
    (1..=max_m).prop_flat_map(|m| {
        (
            prop::collection::vec(share(), m),
            total(),
            prop::collection::vec((prop::collection::vec(share(), m), total()), m),
            prop::collection::vec(p_value(), m),
            prop_oneof![Just(0.025), Just(0.05), 0.001f64..0.3],
            prop::collection::vec(0usize..1000, 1..8),
        )
            .prop_map(
                move |(raw_weights, weight_total, raw_rows, p, alpha, choices)| {
                    let weights = scaled(&raw_weights, weight_total);
                    let graph = raw_rows
                        .iter()
                        .enumerate()
                        .map(|(from, (row, row_total))| {
                            let mut row = row.clone();
                            row[from] = 0.0;
                            scaled(&row, *row_total)
                        })
                        .collect();
                    GraphCase {
                        weights,
                        graph,
                        p,
                        alpha,
                        choices,
                    }
                },
            )
    })
}

fn some(p: &[f64]) -> Vec<Option<f64>> {
    p.iter().copied().map(Some).collect()
}

fn adjusted(outcome: &Outcome) -> Vec<f64> {
    outcome.hypotheses.iter().map(|h| h.adjusted_p).collect()
}

fn decisions(outcome: &Outcome) -> Vec<bool> {
    outcome.hypotheses.iter().map(|h| h.rejected).collect()
}

/// True when some adjusted p-value lies so close to α that rounding may decide; decision
/// comparisons between two float implementations skip such cases.
fn near_alpha(values: &[f64], alpha: f64) -> bool {
    values
        .iter()
        .any(|value| (value - alpha).abs() <= TOLERANCE)
}

fn assert_all_close(actual: &[f64], expected: &[f64], what: &str) -> Result<(), TestCaseError> {
    for (index, (a, e)) in actual.iter().zip(expected).enumerate() {
        prop_assert!((a - e).abs() <= TOLERANCE, "{what}[{index}]: {a} vs {e}");
    }
    Ok(())
}

fn graphical(case: &GraphCase) -> MultiplicityStrategy {
    MultiplicityStrategy::graphical(case.weights.clone(), case.graph.clone())
        .expect("generated graph is valid")
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 512, ..ProptestConfig::default() })]

    /// (a) The rejected set does not depend on the order of rejections (Bretz et al. 2009,
    /// §2.2 and Appendix): a random rejectable hypothesis at each step gives the same set.
    #[test]
    fn rejections_do_not_depend_on_order(case in graph_case(8)) {
        let outcome = apply(&graphical(&case), &some(&case.p), case.alpha).unwrap();
        prop_assume!(!near_alpha(&adjusted(&outcome), case.alpha));
        let in_random_order = algorithm1_in_chosen_order(&case.weights, &case.graph, &case.p, case.alpha, &case.choices);
        prop_assert_eq!(decisions(&outcome), in_random_order);
    }

    /// Algorithm 2's adjusted p-values equal those of the closed weighted Bonferroni test
    /// the graph defines (Bretz et al. 2009, §3), found here by brute force.
    #[test]
    fn graphical_adjusted_p_equal_closed_test(case in graph_case(6)) {
        let outcome = apply(&graphical(&case), &some(&case.p), case.alpha).unwrap();
        let brute_force = closed_bonferroni_adjusted(&case.weights, &case.graph, &case.p);
        assert_all_close(&adjusted(&outcome), &brute_force, "graphical vs closed test")?;
    }

    /// (b) Lowering one raw p-value never raises any adjusted p-value, for every procedure
    /// (adjusted p-values of a closed test are monotone in the raw ones: common practice).
    #[test]
    fn adjusted_p_are_monotone(case in graph_case(8), which in 0usize..8, factor in 0.0f64..1.0) {
        let m = case.p.len();
        let k = which % m;
        let mut lowered = case.p.clone();
        lowered[k] *= factor;
        let strategies = [
            graphical(&case),
            MultiplicityStrategy::new(Procedure::Bonferroni, m, case.weights.clone(), vec![]).unwrap(),
            MultiplicityStrategy::new(Procedure::Holm, m, case.weights.clone(), vec![]).unwrap(),
            MultiplicityStrategy::new(Procedure::Fallback, m, case.weights.clone(), vec![]).unwrap(),
            MultiplicityStrategy::unweighted(Procedure::Hochberg, m).unwrap(),
            MultiplicityStrategy::unweighted(Procedure::Hommel, m).unwrap(),
            MultiplicityStrategy::unweighted(Procedure::FixedSequence, m).unwrap(),
        ];
        for strategy in &strategies {
            let before = adjusted(&apply(strategy, &some(&case.p), case.alpha).unwrap());
            let after = adjusted(&apply(strategy, &some(&lowered), case.alpha).unwrap());
            for (index, (b, a)) in before.iter().zip(&after).enumerate() {
                prop_assert!(*a <= *b + TOLERANCE, "{:?} H{}: {} rose to {}", strategy.procedure(), index, b, a);
            }
        }
    }

    /// (c) Rejected ⇔ adjusted p ≤ α, and the graph trace is a valid run of Algorithm 1:
    /// each rejection had p ≤ its local level, weights and rows stay substochastic, and
    /// after the last step no remaining hypothesis has p ≤ its level.
    #[test]
    fn decisions_agree_with_adjusted_p_and_trace(case in graph_case(8)) {
        let outcome = apply(&graphical(&case), &some(&case.p), case.alpha).unwrap();
        for hypothesis in &outcome.hypotheses {
            prop_assert_eq!(hypothesis.rejected, hypothesis.adjusted_p <= case.alpha);
            prop_assert_eq!(hypothesis.rejected, hypothesis.rejection_step.is_some());
            prop_assert!((0.0..=1.0).contains(&hypothesis.adjusted_p));
        }
        let Trace::Graph(steps) = &outcome.trace else { panic!("graph trace expected") };
        let mut levels: Vec<f64> = case.weights.iter().map(|w| w * case.alpha).collect();
        for step in steps {
            prop_assert!(case.p[step.rejected] <= step.local_levels[step.rejected] * (1.0 + TOLERANCE));
            prop_assert!(step.weights_after.iter().sum::<f64>() <= 1.0 + 1e-9);
            for (from, row) in step.transitions_after.iter().enumerate() {
                prop_assert_eq!(row[from], 0.0);
                prop_assert!(row.iter().sum::<f64>() <= 1.0 + 1e-9);
            }
            levels = step.weights_after.iter().map(|w| w * case.alpha).collect();
        }
        for (index, hypothesis) in outcome.hypotheses.iter().enumerate() {
            if !hypothesis.rejected && levels[index] > 0.0 {
                prop_assert!(case.p[index] > levels[index] * (1.0 - TOLERANCE), "H{} could still be rejected", index);
            }
        }
    }

    /// The Holm graph (equal weights, G[i][j] = 1/(m − 1)) gives Holm's adjusted p-values
    /// (Bretz et al. 2009, §2.1), and both decide as the textbook step-down (Holm 1979).
    #[test]
    fn holm_graph_is_holm(case in graph_case(10)) {
        let m = case.p.len();
        let holm = apply(&MultiplicityStrategy::unweighted(Procedure::Holm, m).unwrap(), &some(&case.p), case.alpha).unwrap();
        let graph = apply(&holm_graph(m).unwrap(), &some(&case.p), case.alpha).unwrap();
        assert_all_close(&adjusted(&graph), &adjusted(&holm), "holm graph vs holm")?;
        prop_assume!(!near_alpha(&adjusted(&holm), case.alpha));
        prop_assert_eq!(decisions(&holm), holm_decisions(&case.p, case.alpha));
    }

    /// The proportional graph g_ij = w_j / Σ_{k≠i} w_k gives weighted Holm.
    #[test]
    fn weighted_holm_graph_is_weighted_holm(case in graph_case(10)) {
        let m = case.p.len();
        let holm = apply(&MultiplicityStrategy::new(Procedure::Holm, m, case.weights.clone(), vec![]).unwrap(), &some(&case.p), case.alpha).unwrap();
        let graph = apply(&weighted_holm_graph(&case.weights).unwrap(), &some(&case.p), case.alpha).unwrap();
        assert_all_close(&adjusted(&graph), &adjusted(&holm), "weighted holm graph vs weighted holm")?;
    }

    /// A chain graph with all weight on H1 gives the fixed sequence (Bretz et al. 2009,
    /// Fig. 6 with w = (1, 0, …, 0)), deciding as the textbook procedure.
    #[test]
    fn chain_graph_is_fixed_sequence(case in graph_case(10)) {
        let m = case.p.len();
        let sequence = apply(&MultiplicityStrategy::unweighted(Procedure::FixedSequence, m).unwrap(), &some(&case.p), case.alpha).unwrap();
        let graph = apply(&fixed_sequence_graph(m).unwrap(), &some(&case.p), case.alpha).unwrap();
        assert_all_close(&adjusted(&graph), &adjusted(&sequence), "chain graph vs fixed sequence")?;
        let mut first_weight = vec![0.0; m];
        first_weight[0] = 1.0;
        prop_assume!(!near_alpha(&adjusted(&sequence), case.alpha));
        prop_assert_eq!(decisions(&sequence), fallback_decisions(&case.p, &first_weight, case.alpha));
    }

    /// The fallback graph gives Wiens' (2003) fallback: equal adjusted p-values, and the
    /// decisions of Wiens' recurrence at α.
    #[test]
    fn fallback_graph_is_fallback(case in graph_case(10)) {
        let m = case.p.len();
        let fallback = apply(&MultiplicityStrategy::new(Procedure::Fallback, m, case.weights.clone(), vec![]).unwrap(), &some(&case.p), case.alpha).unwrap();
        let graph = apply(&fallback_graph(&case.weights).unwrap(), &some(&case.p), case.alpha).unwrap();
        assert_all_close(&adjusted(&graph), &adjusted(&fallback), "fallback graph vs fallback")?;
        prop_assume!(!near_alpha(&adjusted(&fallback), case.alpha));
        prop_assert_eq!(decisions(&fallback), fallback_decisions(&case.p, &case.weights, case.alpha));
        prop_assert_eq!(decisions(&graph), decisions(&fallback));
    }

    /// Hommel's O(m²) adjusted p-values equal the brute-force closed Simes test, and
    /// Hochberg and Bonferroni decide as their textbook definitions.
    #[test]
    fn hommel_hochberg_bonferroni_match_definitions(case in graph_case(8)) {
        let m = case.p.len();
        let hommel = apply(&MultiplicityStrategy::unweighted(Procedure::Hommel, m).unwrap(), &some(&case.p), case.alpha).unwrap();
        assert_all_close(&adjusted(&hommel), &closed_simes_adjusted(&case.p), "hommel vs closed Simes")?;
        let hochberg = apply(&MultiplicityStrategy::unweighted(Procedure::Hochberg, m).unwrap(), &some(&case.p), case.alpha).unwrap();
        let bonferroni = apply(&MultiplicityStrategy::unweighted(Procedure::Bonferroni, m).unwrap(), &some(&case.p), case.alpha).unwrap();
        prop_assume!(!near_alpha(&adjusted(&hochberg), case.alpha) && !near_alpha(&adjusted(&bonferroni), case.alpha));
        prop_assert_eq!(decisions(&hochberg), hochberg_decisions(&case.p, case.alpha));
        let expected: Vec<bool> = case.p.iter().map(|&p| p <= case.alpha / m as f64).collect();
        prop_assert_eq!(decisions(&bonferroni), expected);
    }

    /// The step traces follow their procedures' definitions: fallback tests every
    /// hypothesis in order at Wiens' carried-forward level; unweighted Holm tests the k-th
    /// smallest p at α/(m − k + 1) and stops after the first retention (Holm 1979).
    #[test]
    fn step_traces_follow_definitions(case in graph_case(10)) {
        let m = case.p.len();
        let fallback = apply(&MultiplicityStrategy::new(Procedure::Fallback, m, case.weights.clone(), vec![]).unwrap(), &some(&case.p), case.alpha).unwrap();
        prop_assume!(!near_alpha(&adjusted(&fallback), case.alpha));
        let (expected_decisions, expected_levels) = fallback_run(&case.p, &case.weights, case.alpha);
        let Trace::Tests(steps) = &fallback.trace else { panic!("test trace expected") };
        prop_assert_eq!(steps.len(), m);
        for (index, step) in steps.iter().enumerate() {
            prop_assert_eq!(step.hypothesis, index);
            prop_assert_eq!(step.rejected, expected_decisions[index]);
            prop_assert!((step.local_level - expected_levels[index]).abs() <= TOLERANCE);
        }
        let holm = apply(&MultiplicityStrategy::unweighted(Procedure::Holm, m).unwrap(), &some(&case.p), case.alpha).unwrap();
        prop_assume!(!near_alpha(&adjusted(&holm), case.alpha));
        let Trace::Tests(steps) = &holm.trace else { panic!("test trace expected") };
        let rejected_count = holm.hypotheses.iter().filter(|h| h.rejected).count();
        prop_assert_eq!(steps.len(), (rejected_count + 1).min(m));
        for (k, step) in steps.iter().enumerate() {
            prop_assert!((step.local_level - case.alpha / (m - k) as f64).abs() <= TOLERANCE);
            prop_assert_eq!(step.rejected, k < rejected_count);
            // The k-th tested hypothesis has the k-th smallest p-value.
            let smaller = case.p.iter().filter(|&&other| other < case.p[step.hypothesis]).count();
            prop_assert!(smaller <= k);
        }
    }
}
