//! The graphical procedure and the unweighted step procedures on published worked
//! examples. Each test names its source; values are tagged as in the collection the lead
//! engineer assembled from the papers: [S] stated in the source, [S✓] stated and
//! recomputed by the collector, [C] computed by the collector with an exact-fraction
//! implementation of Bretz et al. (2009), not printed in the source.
//!
//! Sources: B2009 = Bretz, Maurer, Brannath, Posch, Stat Med 2009;28:586–604.
//! B2011 = Bretz, Posch, Glimm, Klinglmueller, Maurer, Rohmeyer, Biom J 2011;53:894–913.
//! BMH2011 = Bretz, Maurer, Hommel, Stat Med 2011;30:1489–1501. Lu2016 = Lu, Stat Med
//! 2016;35:4041–4055. XB2019 = Xi, Bretz, Stat Med 2019;38:5268–5282. Rom2013 = Rom, Br J
//! Math Stat Psychol (Appendix A).

use cairn::multiplicity::{
    GraphStep, Outcome, Procedure, Strategy, Trace, apply, holm_graph, parallel_gatekeeping_graph,
};

/// Tolerance for values that are exact in real arithmetic: a few ulps of rounding.
const EXACT_TOLERANCE: f64 = 1e-12;

/// The ε of B2009 §3.3 ("infinitesimally small"), realised as 2⁻⁴⁰ so that 1 − ε and
/// 1 − (1 − ε) are exact in binary floating point; results are then within O(ε) ≈ 1e-12 of
/// the ε → 0 limit, so those checks use a looser tolerance.
const EPSILON_EDGE: f64 = 1.0 / (1u64 << 40) as f64;
const EPSILON_LIMIT_TOLERANCE: f64 = 1e-10;

fn p_values(values: &[f64]) -> Vec<Option<f64>> {
    values.iter().copied().map(Some).collect()
}

fn rejected_indices(outcome: &Outcome) -> Vec<usize> {
    outcome
        .hypotheses
        .iter()
        .enumerate()
        .filter(|(_, h)| h.rejected)
        .map(|(i, _)| i)
        .collect()
}

fn assert_close(actual: &[f64], expected: &[f64], tolerance: f64, what: &str) {
    assert_eq!(actual.len(), expected.len(), "{what}: length");
    for (index, (a, e)) in actual.iter().zip(expected).enumerate() {
        assert!(
            (a - e).abs() <= tolerance,
            "{what}[{index}]: got {a}, expected {e} (±{tolerance})"
        );
    }
}

fn adjusted(outcome: &Outcome) -> Vec<f64> {
    outcome.hypotheses.iter().map(|h| h.adjusted_p).collect()
}

fn graph_steps(outcome: &Outcome) -> &[GraphStep] {
    match &outcome.trace {
        Trace::Graph(steps) => steps,
        other => panic!("expected a graph trace, got {other:?}"),
    }
}

/// B2009 §2.1 and §3.1, Figs 3–4 (multiplicity-examples §1): Holm as a graph.
#[test]
fn b2009_holm_graph_example() {
    let alpha = 0.05; // [S p.590]
    let strategy = Strategy::graphical(
        vec![1.0 / 3.0; 3],
        vec![
            vec![0.0, 0.5, 0.5],
            vec![0.5, 0.0, 0.5],
            vec![0.5, 0.5, 0.0],
        ], // [S p.594]
    )
    .unwrap();
    assert_eq!(
        holm_graph(3).unwrap(),
        strategy,
        "holm_graph(3) is the graph of Fig. 3"
    );
    let outcome = apply(&strategy, &p_values(&[0.02, 0.055, 0.012]), alpha).unwrap();
    // Rejected H1, H3; retained H2 [S✓ p.590].
    assert_eq!(rejected_indices(&outcome), [0, 2]);
    // Adjusted p (0.04, 0.055, 0.036) [S✓ p.595].
    assert_close(
        &adjusted(&outcome),
        &[0.04, 0.055, 0.036],
        EXACT_TOLERANCE,
        "adjusted p",
    );
    // Steps [S✓ p.590]: H3 at α/3; then H1 at α/2; then H2 would need p ≤ α.
    let steps = graph_steps(&outcome);
    assert_eq!(steps.len(), 2);
    assert_eq!(steps[0].rejected, 2);
    assert_close(
        &steps[0].local_levels,
        &[alpha / 3.0; 3],
        EXACT_TOLERANCE,
        "levels before step 1",
    );
    assert_close(
        &steps[0].weights_after,
        &[0.5, 0.5, 0.0],
        EXACT_TOLERANCE,
        "weights after step 1",
    );
    // After removing H3, H1 and H2 pass everything to each other: (0.5 + 0.25)/(1 − 0.25) = 1.
    let expected_after_first = [[0.0, 1.0, 0.0], [1.0, 0.0, 0.0], [0.0, 0.0, 0.0]];
    for (row, expected) in steps[0].transitions_after.iter().zip(expected_after_first) {
        assert_close(row, &expected, EXACT_TOLERANCE, "transitions after step 1");
    }
    assert_eq!(steps[1].rejected, 0);
    assert_close(
        &steps[1].local_levels,
        &[0.025, 0.025, 0.0],
        EXACT_TOLERANCE,
        "levels before step 2",
    );
    assert_close(
        &steps[1].weights_after,
        &[0.0, 1.0, 0.0],
        EXACT_TOLERANCE,
        "weights after step 2",
    );
    assert_eq!(outcome.hypotheses[2].rejection_step, Some(1));
    assert_eq!(outcome.hypotheses[0].rejection_step, Some(2));
    assert_eq!(outcome.hypotheses[1].rejection_step, None);

    // The same p-values under Hochberg (0.04, 0.055, 0.036) and Hommel (0.04, 0.055, 0.03)
    // [C, matched R p.adjust by the collector].
    let hochberg = apply(
        &Strategy::unweighted(Procedure::Hochberg, 3).unwrap(),
        &p_values(&[0.02, 0.055, 0.012]),
        alpha,
    )
    .unwrap();
    assert_close(
        &adjusted(&hochberg),
        &[0.04, 0.055, 0.036],
        EXACT_TOLERANCE,
        "hochberg",
    );
    let hommel = apply(
        &Strategy::unweighted(Procedure::Hommel, 3).unwrap(),
        &p_values(&[0.02, 0.055, 0.012]),
        alpha,
    )
    .unwrap();
    assert_close(
        &adjusted(&hommel),
        &[0.04, 0.055, 0.03],
        EXACT_TOLERANCE,
        "hommel",
    );
}

fn dmitrienko_gatekeeping_transitions() -> Vec<Vec<f64>> {
    // B2009 Fig. 2 [S p.588].
    vec![
        vec![0.0, 0.0, 0.5, 0.5],
        vec![0.0, 0.0, 0.5, 0.5],
        vec![0.0, 0.0, 0.0, 1.0],
        vec![0.0, 0.0, 1.0, 0.0],
    ]
}

/// B2009 Fig. 2 and §3.3 (multiplicity-examples §2): the parallel gatekeeping procedure of
/// Dmitrienko et al. (2003) as a graph.
#[test]
fn b2009_parallel_gatekeeping_example() {
    let strategy = Strategy::graphical(
        vec![0.5, 0.5, 0.0, 0.0],
        dmitrienko_gatekeeping_transitions(),
    )
    .unwrap();
    assert_eq!(
        parallel_gatekeeping_graph(2, 2).unwrap(),
        strategy,
        "helper builds Fig. 2"
    );
    let outcome = apply(&strategy, &p_values(&[0.02, 0.04, 0.01, 0.015]), 0.05).unwrap(); // [S p.598]
    // Rejected H1, H3, H4; retained H2 [S✓ p.598, after the erratum noted in the collection].
    assert_eq!(rejected_indices(&outcome), [0, 2, 3]);
    // Adjusted p [C]: (0.04, 0.08, 0.04, 0.04).
    assert_close(
        &adjusted(&outcome),
        &[0.04, 0.08, 0.04, 0.04],
        EXACT_TOLERANCE,
        "adjusted p",
    );
    // Steps [S✓ p.598]: H1; H3 and H4 then hold α/4 each; H3; H4 now at α/2; H4; H2 stays at α/2.
    let steps = graph_steps(&outcome);
    let order: Vec<usize> = steps.iter().map(|s| s.rejected).collect();
    assert_eq!(order, [0, 2, 3]);
    assert_close(
        &steps[0].weights_after,
        &[0.0, 0.5, 0.25, 0.25],
        EXACT_TOLERANCE,
        "after H1",
    );
    assert_close(
        &steps[1].local_levels,
        &[0.0, 0.025, 0.0125, 0.0125],
        EXACT_TOLERANCE,
        "levels before H3",
    );
    assert_close(
        &steps[1].weights_after,
        &[0.0, 0.5, 0.0, 0.5],
        EXACT_TOLERANCE,
        "after H3",
    );
    assert_close(
        &steps[2].weights_after,
        &[0.0, 0.5, 0.0, 0.0],
        EXACT_TOLERANCE,
        "after H4",
    );
}

/// B2009 Fig. 12, §3.3 (multiplicity-examples §3): improved gatekeeping with ε-edges.
#[test]
fn b2009_improved_gatekeeping_with_epsilon_edges() {
    let e = EPSILON_EDGE;
    let strategy = Strategy::graphical(
        vec![0.5, 0.5, 0.0, 0.0],
        vec![
            vec![0.0, 0.0, 0.5, 0.5],
            vec![0.0, 0.0, 0.5, 0.5],
            vec![e, 0.0, 0.0, 1.0 - e],
            vec![0.0, e, 1.0 - e, 0.0],
        ], // [S p.598]
    )
    .unwrap();
    let outcome = apply(&strategy, &p_values(&[0.02, 0.04, 0.01, 0.015]), 0.05).unwrap();
    // All four rejected [S✓ p.598]; adjusted p (0.04, 0.04, 0.04, 0.04) [C, ε → 0].
    assert_eq!(rejected_indices(&outcome), [0, 1, 2, 3]);
    assert_close(
        &adjusted(&outcome),
        &[0.04; 4],
        EPSILON_LIMIT_TOLERANCE,
        "adjusted p",
    );
}

/// B2009 Fig. 9 (multiplicity-examples §4): Holm as gatekeeper, with an ε-edge.
#[test]
fn b2009_holm_gatekeeper_with_epsilon_edge() {
    let e = EPSILON_EDGE;
    let strategy = Strategy::graphical(
        vec![0.5, 0.5, 0.0],
        vec![
            vec![0.0, 1.0, 0.0],
            vec![1.0 - e, 0.0, e],
            vec![0.0, 0.0, 0.0],
        ], // [S p.596]
    )
    .unwrap();
    let outcome = apply(&strategy, &p_values(&[0.04, 0.01, 0.03]), 0.05).unwrap();
    // Steps [S✓ pp.596–597]: H2, then H1 at α (edge H1→H3 becomes 1), then H3 at α.
    assert_eq!(
        graph_steps(&outcome)
            .iter()
            .map(|s| s.rejected)
            .collect::<Vec<_>>(),
        [1, 0, 2]
    );
    let after_first = &graph_steps(&outcome)[0];
    assert!((after_first.transitions_after[0][2] - 1.0).abs() <= EPSILON_LIMIT_TOLERANCE);
    assert!((after_first.weights_after[0] - 1.0).abs() <= EPSILON_LIMIT_TOLERANCE);
    // Adjusted p [C, ε → 0]: (0.04, 0.02, 0.04).
    assert_close(
        &adjusted(&outcome),
        &[0.04, 0.02, 0.04],
        EPSILON_LIMIT_TOLERANCE,
        "adjusted p",
    );
}

/// B2009 Fig. 10 (multiplicity-examples §5): Holm gatekeeper into a weighted Holm family.
#[test]
fn b2009_holm_gatekeeper_into_weighted_family() {
    let e = EPSILON_EDGE;
    let (r1, r2) = (0.8, 0.2); // [S p.597]
    let strategy = Strategy::graphical(
        vec![0.5, 0.5, 0.0, 0.0],
        vec![
            vec![0.0, 1.0, 0.0, 0.0],
            vec![1.0 - e, 0.0, r1 * e, r2 * e],
            vec![0.0, 0.0, 0.0, 1.0],
            vec![0.0, 0.0, 1.0, 0.0],
        ], // [S p.597, Fig. 10]
    )
    .unwrap();
    let alpha = 0.05;
    let outcome = apply(&strategy, &p_values(&[0.04, 0.01, 0.03, 0.04]), alpha).unwrap();
    let steps = graph_steps(&outcome);
    // Steps [S✓ p.597]: H2; H1 at α with edges H1→H3 0.8, H1→H4 0.2; H3 at 0.04; H4 at 0.05.
    assert_eq!(
        steps.iter().map(|s| s.rejected).collect::<Vec<_>>(),
        [1, 0, 2, 3]
    );
    assert_close(
        &steps[0].transitions_after[0][2..],
        &[0.8, 0.2],
        EPSILON_LIMIT_TOLERANCE,
        "edges out of H1",
    );
    assert_close(
        &steps[2].local_levels[2..],
        &[0.04, 0.01],
        EPSILON_LIMIT_TOLERANCE,
        "levels of H3, H4",
    );
    assert_close(
        &steps[3].local_levels[3..],
        &[0.05],
        EPSILON_LIMIT_TOLERANCE,
        "level of H4",
    );
    // All four rejected [S✓]; adjusted p [C, ε → 0]: (0.04, 0.02, 0.04, 0.04).
    assert_close(
        &adjusted(&outcome),
        &[0.04, 0.02, 0.04, 0.04],
        EPSILON_LIMIT_TOLERANCE,
        "adjusted p",
    );
}

fn b2011_example1_strategy() -> Strategy {
    Strategy::graphical(
        vec![0.5, 0.5, 0.0, 0.0], // [S B2011 p.897]
        vec![
            vec![0.0, 0.0, 1.0, 0.0],
            vec![0.0, 0.0, 0.0, 1.0],
            vec![0.0, 1.0, 0.0, 0.0],
            vec![1.0, 0.0, 0.0, 0.0],
        ], // [S B2011 p.897]
    )
    .unwrap()
}

/// B2011 Table 1, p.898 (multiplicity-examples §6a): weights of all 15 intersections.
#[test]
fn b2011_intersection_weights_table_1() {
    let strategy = b2011_example1_strategy();
    // (members of J as H1..H4, weights of H1..H4 with 0 for "–") [S✓].
    let table: [([u8; 4], [f64; 4]); 15] = [
        ([1, 1, 1, 1], [0.5, 0.5, 0.0, 0.0]),
        ([1, 1, 1, 0], [0.5, 0.5, 0.0, 0.0]),
        ([1, 1, 0, 1], [0.5, 0.5, 0.0, 0.0]),
        ([1, 1, 0, 0], [0.5, 0.5, 0.0, 0.0]),
        ([0, 1, 1, 1], [0.0, 0.5, 0.5, 0.0]),
        ([1, 0, 1, 1], [0.5, 0.0, 0.0, 0.5]),
        ([1, 0, 1, 0], [1.0, 0.0, 0.0, 0.0]),
        ([1, 0, 0, 1], [0.5, 0.0, 0.0, 0.5]),
        ([1, 0, 0, 0], [1.0, 0.0, 0.0, 0.0]),
        ([0, 1, 1, 0], [0.0, 0.5, 0.5, 0.0]),
        ([0, 1, 0, 1], [0.0, 1.0, 0.0, 0.0]),
        ([0, 1, 0, 0], [0.0, 1.0, 0.0, 0.0]),
        ([0, 0, 1, 1], [0.0, 0.0, 0.5, 0.5]),
        ([0, 0, 1, 0], [0.0, 0.0, 1.0, 0.0]),
        ([0, 0, 0, 1], [0.0, 0.0, 0.0, 1.0]),
    ];
    for (members, expected) in table {
        let flags: Vec<bool> = members.iter().map(|&member| member == 1).collect();
        let weights = strategy.intersection_weights(&flags).unwrap();
        assert_close(
            &weights,
            &expected,
            EXACT_TOLERANCE,
            &format!("J = {members:?}"),
        );
    }
}

/// B2011 §3.1, p.899, Fig. 3 (multiplicity-examples §6b).
#[test]
fn b2011_example1_bonferroni_graph() {
    let p = p_values(&[0.01, 0.005, 0.1, 0.5]); // [S]
    // α = 0.025 as §3.3 refers back to it [S p.907]; "reject both H1 and H2" [S✓].
    let outcome = apply(&b2011_example1_strategy(), &p, 0.025).unwrap();
    assert_eq!(rejected_indices(&outcome), [0, 1]);
    // Adjusted p [C]: (0.02, 0.01, 0.2, 0.5).
    assert_close(
        &adjusted(&outcome),
        &[0.02, 0.01, 0.2, 0.5],
        EXACT_TOLERANCE,
        "adjusted p",
    );
    // Same decisions at α = 0.05 [C].
    assert_eq!(
        rejected_indices(&apply(&b2011_example1_strategy(), &p, 0.05).unwrap()),
        [0, 1]
    );
}

/// B2011 §3.3, p.907 and Lu2016 p.4042 (multiplicity-examples §6c).
#[test]
fn b2011_lu2016_weighted_bonferroni_adjusted_p() {
    let outcome = apply(
        &b2011_example1_strategy(),
        &p_values(&[0.01, 0.005, 0.015, 0.022]),
        0.025,
    )
    .unwrap();
    // Closed weighted Bonferroni rejects H1, H2 [S✓ B2011].
    assert_eq!(rejected_indices(&outcome), [0, 1]);
    // Adjusted p (0.02, 0.01, 0.03, 0.03) [S✓ Lu2016].
    assert_close(
        &adjusted(&outcome),
        &[0.02, 0.01, 0.03, 0.03],
        EXACT_TOLERANCE,
        "adjusted p",
    );
}

/// B2011 Example 2, pp.902–903 (multiplicity-examples §6d), Bonferroni graph only.
#[test]
fn b2011_example2_bonferroni_graph() {
    let outcome = apply(
        &b2011_example1_strategy(),
        &p_values(&[0.0131, 0.1, 0.012, 0.01]),
        0.025,
    )
    .unwrap();
    // The weighted Bonferroni graph rejects none [S✓]; adjusted p (0.0262, 0.1, 0.0262, 0.1) [C].
    assert_eq!(rejected_indices(&outcome), Vec::<usize>::new());
    assert_close(
        &adjusted(&outcome),
        &[0.0262, 0.1, 0.0262, 0.1],
        EXACT_TOLERANCE,
        "adjusted p",
    );
    // Second set: the Bonferroni graph rejects H1, H3 [S✓ p.903].
    let second = apply(
        &b2011_example1_strategy(),
        &p_values(&[0.01, 0.1, 0.012, 0.01]),
        0.025,
    )
    .unwrap();
    assert_eq!(rejected_indices(&second), [0, 2]);
}

/// B2011 §4.1, pp.907–909, Fig. 5 (multiplicity-examples §6e): truncated Holm into Holm.
#[test]
fn b2011_truncated_holm_example() {
    let gamma = 0.5; // [S]
    let split = (1.0 - gamma) / 2.0;
    let strategy = Strategy::graphical(
        vec![0.5, 0.5, 0.0, 0.0],
        vec![
            vec![0.0, gamma, split, split],
            vec![gamma, 0.0, split, split],
            vec![0.0, 0.0, 0.0, 1.0],
            vec![0.0, 0.0, 1.0, 0.0],
        ], // [S Fig. 5]
    )
    .unwrap();
    let outcome = apply(
        &strategy,
        &p_values(&[0.0121, 0.0337, 0.0084, 0.0160]),
        0.05,
    )
    .unwrap(); // [S p.908]
    let values = adjusted(&outcome);
    // Published to three decimals: 0.024, 0.045, 0.045, 0.045 [S✓ p.908] (half a unit in the
    // last place as tolerance).
    assert_close(
        &values,
        &[0.024, 0.045, 0.045, 0.045],
        0.0005,
        "adjusted p, as printed",
    );
    // Unrounded [C]: 0.0242 and 0.0337/0.75 for the other three.
    let others = 0.0337 / 0.75;
    assert_close(
        &values,
        &[0.0242, others, others, others],
        EXACT_TOLERANCE,
        "adjusted p, unrounded",
    );
    // All four rejected at α = 0.05 [S✓].
    assert_eq!(rejected_indices(&outcome), [0, 1, 2, 3]);
}

/// BMH2011 §3.3, Figs 2–5 (multiplicity-examples §7): three doses × two endpoints.
/// Order: H11, H21, H31, H12, H22, H32.
#[test]
fn bmh2011_three_doses_two_endpoints() {
    let third = 1.0 / 3.0;
    let strategy = Strategy::graphical(
        vec![third, third, third, 0.0, 0.0, 0.0], // [S p.1493/1494]
        vec![
            vec![0.0, 0.5, 0.0, 0.5, 0.0, 0.0],       // H11 → H21, H12
            vec![third, 0.0, third, 0.0, third, 0.0], // H21 → H11, H31, H22
            vec![0.0, 0.5, 0.0, 0.0, 0.0, 0.5],       // H31 → H21, H32
            vec![0.0, 1.0, 0.0, 0.0, 0.0, 0.0],       // H12 → H21
            vec![0.5, 0.0, 0.5, 0.0, 0.0, 0.0],       // H22 → H11, H31
            vec![0.0, 1.0, 0.0, 0.0, 0.0, 0.0],       // H32 → H21
        ], // [S Fig. 2, p.1493]
    )
    .unwrap();
    let alpha = 0.025; // [S p.1494]
    let p = p_values(&[0.1, 0.008, 0.005, 0.15, 0.04, 0.006]); // [S p.1494]
    let outcome = apply(&strategy, &p, alpha).unwrap();
    let steps = graph_steps(&outcome);
    // Steps [S✓ pp.1494–1495]: H31, then H21, then H32.
    assert_eq!(
        steps.iter().map(|s| s.rejected).collect::<Vec<_>>(),
        [2, 1, 5]
    );
    // After step 1: α21 = α/2, α32 = α/6, and the edge H21→H11 is 2/5 [S✓].
    assert!((steps[0].weights_after[1] * alpha - alpha / 2.0).abs() <= EXACT_TOLERANCE);
    assert!((steps[0].weights_after[5] * alpha - alpha / 6.0).abs() <= EXACT_TOLERANCE);
    assert!((steps[0].transitions_after[1][0] - 0.4).abs() <= EXACT_TOLERANCE);
    // Step 3 used 4α/15 for H32 [S✓].
    assert!((steps[2].local_levels[5] - 4.0 * alpha / 15.0).abs() <= EXACT_TOLERANCE);
    // Final local levels: H11 2α/3, H22 α/3, H12 0 [S✓].
    let final_levels: Vec<f64> = steps[2].weights_after.iter().map(|w| w * alpha).collect();
    assert_close(
        &final_levels,
        &[2.0 * alpha / 3.0, 0.0, 0.0, 0.0, alpha / 3.0, 0.0],
        EXACT_TOLERANCE,
        "final levels",
    );
    assert_eq!(rejected_indices(&outcome), [1, 2, 5]);
    // Adjusted p [C]: 0.12, 0.016, 0.015, 0.15, 0.12, 0.0225.
    assert_close(
        &adjusted(&outcome),
        &[0.12, 0.016, 0.015, 0.15, 0.12, 0.0225],
        EXACT_TOLERANCE,
        "adjusted p",
    );
}

fn tests_trace(outcome: &Outcome) -> Vec<(usize, f64, bool)> {
    match &outcome.trace {
        Trace::Tests(steps) => steps
            .iter()
            .map(|s| (s.hypothesis, s.local_level, s.rejected))
            .collect(),
        other => panic!("expected a test trace, got {other:?}"),
    }
}

/// Rom2013 Appendix A (multiplicity-examples §8a), α = 0.05.
#[test]
fn rom2013_hochberg_examples() {
    let hochberg3 = Strategy::unweighted(Procedure::Hochberg, 3).unwrap();
    // Example 1: "Hochberg's procedure rejects no hypothesis" [S✓].
    let first = apply(&hochberg3, &p_values(&[0.02, 0.03, 0.2]), 0.05).unwrap();
    assert!(rejected_indices(&first).is_empty());
    // Example 2: rejects H(1) only, at the last step, since P(1) < α/5 = 0.01 [S✓].
    let hochberg5 = Strategy::unweighted(Procedure::Hochberg, 5).unwrap();
    let second = apply(
        &hochberg5,
        &p_values(&[0.009, 0.015, 0.025, 0.04, 0.2]),
        0.05,
    )
    .unwrap();
    assert_eq!(rejected_indices(&second), [0]);
    let trace = tests_trace(&second);
    assert_eq!(trace.len(), 5);
    let (hypothesis, level, rejected) = trace[4];
    assert_eq!((hypothesis, rejected), (0, true));
    assert!((level - 0.01).abs() <= EXACT_TOLERANCE);
    assert_eq!(second.hypotheses[0].rejection_step, Some(5));
    // Computed [C] adjusted p: Holm and Hochberg (0.045, 0.06, 0.075, 0.08, 0.2).
    assert_close(
        &adjusted(&second),
        &[0.045, 0.06, 0.075, 0.08, 0.2],
        EXACT_TOLERANCE,
        "hochberg ex 2",
    );
    let holm = apply(
        &Strategy::unweighted(Procedure::Holm, 5).unwrap(),
        &p_values(&[0.009, 0.015, 0.025, 0.04, 0.2]),
        0.05,
    )
    .unwrap();
    assert_close(
        &adjusted(&holm),
        &[0.045, 0.06, 0.075, 0.08, 0.2],
        EXACT_TOLERANCE,
        "holm ex 2",
    );
    // Hommel [C]: Ex 1 (0.045, 0.06, 0.2); Ex 2 (0.0375, 0.05, 0.06, 0.08, 0.2).
    let hommel = apply(
        &Strategy::unweighted(Procedure::Hommel, 3).unwrap(),
        &p_values(&[0.02, 0.03, 0.2]),
        0.05,
    )
    .unwrap();
    assert_close(
        &adjusted(&hommel),
        &[0.045, 0.06, 0.2],
        EXACT_TOLERANCE,
        "hommel ex 1",
    );
    assert_eq!(rejected_indices(&hommel), [0]);
}

/// XB2019 p.5272 (multiplicity-examples §8b), α = 0.025 one-sided.
#[test]
fn xi_bretz_2019_hochberg_separates_from_holm() {
    let p = p_values(&[0.01, 0.011, 0.03]);
    let hochberg = apply(
        &Strategy::unweighted(Procedure::Hochberg, 3).unwrap(),
        &p,
        0.025,
    )
    .unwrap();
    // Rejects H1, H2, not H3: p(3) = 0.03 > 0.025 but p(2) = 0.011 < 0.0125 [S✓].
    assert_eq!(rejected_indices(&hochberg), [0, 1]);
    let trace = tests_trace(&hochberg);
    assert_eq!(trace.len(), 2);
    assert_eq!((trace[0].0, trace[0].2), (2, false));
    assert_eq!((trace[1].0, trace[1].2), (1, true));
    assert!((trace[1].1 - 0.0125).abs() <= EXACT_TOLERANCE);
    // [C]: Hochberg (0.022, 0.022, 0.03); Holm (0.03, 0.03, 0.03) rejecting none; Hommel (0.02, 0.022, 0.03).
    assert_close(
        &adjusted(&hochberg),
        &[0.022, 0.022, 0.03],
        EXACT_TOLERANCE,
        "hochberg",
    );
    let holm = apply(
        &Strategy::unweighted(Procedure::Holm, 3).unwrap(),
        &p,
        0.025,
    )
    .unwrap();
    assert_close(
        &adjusted(&holm),
        &[0.03, 0.03, 0.03],
        EXACT_TOLERANCE,
        "holm",
    );
    assert!(rejected_indices(&holm).is_empty());
    let hommel = apply(
        &Strategy::unweighted(Procedure::Hommel, 3).unwrap(),
        &p,
        0.025,
    )
    .unwrap();
    assert_close(
        &adjusted(&hommel),
        &[0.02, 0.022, 0.03],
        EXACT_TOLERANCE,
        "hommel",
    );
}

/// A failed analysis (None) is never rejected, counts as p = 1 and blocks a fixed sequence
/// (common practice: a hypothesis without a valid test cannot be rejected).
#[test]
fn failed_analysis_is_never_rejected() {
    let p = vec![Some(0.001), None, Some(0.001)];
    let sequence = apply(
        &Strategy::unweighted(Procedure::FixedSequence, 3).unwrap(),
        &p,
        0.05,
    )
    .unwrap();
    assert_eq!(rejected_indices(&sequence), [0]);
    assert!(sequence.hypotheses[1].analysis_failed);
    assert_eq!(sequence.hypotheses[1].raw_p, None);
    assert_eq!(sequence.hypotheses[1].adjusted_p, 1.0);
    assert_eq!(sequence.hypotheses[2].adjusted_p, 1.0);
    // In the Holm graph the failed hypothesis keeps its share: H3 is tested at α/2 at most.
    let graph = apply(&holm_graph(3).unwrap(), &p, 0.05).unwrap();
    assert_eq!(rejected_indices(&graph), [0, 2]);
    assert_eq!(graph.hypotheses[1].adjusted_p, 1.0);
    assert_close(
        &adjusted(&graph),
        &[0.003, 1.0, 0.003],
        EXACT_TOLERANCE,
        "holm graph with a failure",
    );
}

/// Wiens (2003) fallback, by hand from the definition (common practice; no published
/// numbers were found): w = (1/2, 1/4, 1/4), α = 0.05, so the planned levels are 0.025,
/// 0.0125, 0.0125, and a rejected hypothesis adds its level to the next one's.
#[test]
fn fallback_trace_by_hand() {
    let strategy = Strategy::new(Procedure::Fallback, 3, vec![0.5, 0.25, 0.25], vec![]).unwrap();
    let cases: [([f64; 3], [f64; 3], [bool; 3]); 3] = [
        // H1 at 0.025 rejected; H2 at 0.0375 rejected; H3 at 0.05 rejected.
        (
            [0.02, 0.03, 0.045],
            [0.025, 0.0375, 0.05],
            [true, true, true],
        ),
        // H1 retained; H2 at 0.0125 rejected; H3 at 0.025 rejected.
        (
            [0.03, 0.01, 0.02],
            [0.025, 0.0125, 0.025],
            [false, true, true],
        ),
        // H1 retained; H2 retained, so H3 is tested at its own 0.0125 only.
        (
            [0.03, 0.02, 0.02],
            [0.025, 0.0125, 0.0125],
            [false, false, false],
        ),
    ];
    for (p, levels, rejected) in cases {
        let outcome = apply(&strategy, &p_values(&p), 0.05).unwrap();
        let trace = tests_trace(&outcome);
        assert_eq!(trace.len(), 3);
        for (index, (hypothesis, level, step_rejected)) in trace.into_iter().enumerate() {
            assert_eq!(hypothesis, index);
            assert!(
                (level - levels[index]).abs() <= EXACT_TOLERANCE,
                "{p:?}: level {level}"
            );
            assert_eq!(step_rejected, rejected[index], "{p:?}: H{index}");
            assert_eq!(outcome.hypotheses[index].rejected, rejected[index]);
            assert_eq!(
                outcome.hypotheses[index].rejection_step,
                rejected[index].then_some(index + 1)
            );
        }
    }
    // Adjusted p of the first case, by the definition (smallest α that rejects):
    // H1 0.02/0.5 = 0.04; H2 max(0.04, 0.03/0.75) = 0.04; H3 max(0.04, 0.045/1) = 0.045.
    let outcome = apply(&strategy, &p_values(&[0.02, 0.03, 0.045]), 0.05).unwrap();
    assert_close(
        &adjusted(&outcome),
        &[0.04, 0.04, 0.045],
        EXACT_TOLERANCE,
        "fallback adjusted p",
    );
}

/// Holm (1979) and fixed sequence traces, by hand (common practice): p = (0.03, 0.01, 0.04)
/// at α = 0.05. Holm tests H2 at α/3, H1 at α/2, H3 at α; fixed sequence tests H1 at α,
/// H2 at α, H3 at α.
#[test]
fn holm_and_fixed_sequence_traces_by_hand() {
    let p = p_values(&[0.03, 0.01, 0.04]);
    let holm = apply(&Strategy::unweighted(Procedure::Holm, 3).unwrap(), &p, 0.05).unwrap();
    let trace = tests_trace(&holm);
    let expected = [(1, 0.05 / 3.0, true), (0, 0.025, false)];
    assert_eq!(
        trace.len(),
        2,
        "Holm stops at the first retained hypothesis"
    );
    for ((hypothesis, level, rejected), (e_hypothesis, e_level, e_rejected)) in
        trace.into_iter().zip(expected)
    {
        assert_eq!((hypothesis, rejected), (e_hypothesis, e_rejected));
        assert!((level - e_level).abs() <= EXACT_TOLERANCE);
    }
    assert_eq!(holm.hypotheses[1].rejection_step, Some(1));
    assert_close(
        &adjusted(&holm),
        &[0.06, 0.03, 0.06],
        EXACT_TOLERANCE,
        "holm adjusted p",
    );
    let sequence = apply(
        &Strategy::unweighted(Procedure::FixedSequence, 3).unwrap(),
        &p,
        0.05,
    )
    .unwrap();
    assert_eq!(
        tests_trace(&sequence),
        [(0, 0.05, true), (1, 0.05, true), (2, 0.05, true)]
    );
    assert_close(
        &adjusted(&sequence),
        &[0.03, 0.03, 0.04],
        EXACT_TOLERANCE,
        "fixed sequence adjusted p",
    );
}
