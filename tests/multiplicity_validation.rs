//! Every validation rule of the multiplicity engine, triggered one at a time, with the
//! typed error and its rendered message (the message is part of the interface: the plan
//! validator shows it to the user). The rules are those of the design notes (§6, common
//! practice for graphical procedures: weights and transition rows are proportions that add
//! up to at most 1, and no hypothesis passes level to itself).

use cairn::multiplicity::{
    MultiplicityError, Procedure, SUM_TOLERANCE, Strategy, Workspace, apply, fallback_graph,
    fixed_sequence_graph, holm_graph, parallel_gatekeeping_graph, weighted_holm_graph,
};

fn graph_error(weights: Vec<f64>, transitions: Vec<Vec<f64>>) -> MultiplicityError {
    Strategy::new(
        Procedure::Graphical,
        weights.len().max(1),
        weights,
        transitions,
    )
    .unwrap_err()
}

#[test]
fn empty_family_is_refused() {
    let error = Strategy::unweighted(Procedure::Holm, 0).unwrap_err();
    assert_eq!(error, MultiplicityError::NoHypotheses);
    assert_eq!(
        error.to_string(),
        "a multiplicity family needs at least one hypothesis"
    );
    assert_eq!(holm_graph(0).unwrap_err(), MultiplicityError::NoHypotheses);
    assert_eq!(
        fixed_sequence_graph(0).unwrap_err(),
        MultiplicityError::NoHypotheses
    );
    assert_eq!(
        fallback_graph(&[]).unwrap_err(),
        MultiplicityError::NoHypotheses
    );
    assert_eq!(
        parallel_gatekeeping_graph(0, 2).unwrap_err(),
        MultiplicityError::NoHypotheses
    );
}

#[test]
fn weight_count_must_match() {
    let error = Strategy::new(Procedure::Bonferroni, 3, vec![0.5, 0.5], vec![]).unwrap_err();
    assert_eq!(
        error,
        MultiplicityError::WeightCountMismatch {
            expected: 3,
            found: 2
        }
    );
    assert_eq!(
        error.to_string(),
        "expected 3 weights (one per hypothesis), found 2"
    );
    // A graphical strategy needs its weights.
    let missing = Strategy::new(
        Procedure::Graphical,
        2,
        vec![],
        vec![vec![0.0, 1.0], vec![1.0, 0.0]],
    )
    .unwrap_err();
    assert_eq!(
        missing,
        MultiplicityError::WeightCountMismatch {
            expected: 2,
            found: 0
        }
    );
}

#[test]
fn weights_must_be_proportions() {
    for bad in [-0.1, 1.5, f64::NAN, f64::INFINITY] {
        let error = Strategy::new(Procedure::Holm, 2, vec![0.2, bad], vec![]).unwrap_err();
        match error {
            MultiplicityError::WeightOutOfRange {
                hypothesis: 1,
                value,
            } => {
                assert!(value.is_nan() && bad.is_nan() || value == bad)
            }
            other => panic!("unexpected {other:?}"),
        }
    }
    let error = Strategy::new(Procedure::Holm, 2, vec![0.2, -0.1], vec![]).unwrap_err();
    assert_eq!(
        error.to_string(),
        "weight of hypothesis 1 is -0.1; expected a number from 0 to 1"
    );
}

#[test]
fn weights_must_add_up_to_at_most_one() {
    let error = Strategy::new(Procedure::Fallback, 2, vec![0.6, 0.5], vec![]).unwrap_err();
    assert_eq!(error, MultiplicityError::WeightSumAboveOne { sum: 1.1 });
    assert_eq!(
        error.to_string(),
        "weights add up to 1.1; expected a total of at most 1"
    );
    // Within the tolerance: thirds, and a sum a little above 1.
    assert!(Strategy::new(Procedure::Holm, 3, vec![1.0 / 3.0; 3], vec![]).is_ok());
    assert!(
        Strategy::new(
            Procedure::Holm,
            2,
            vec![0.5, 0.5 + SUM_TOLERANCE / 2.0],
            vec![]
        )
        .is_ok()
    );
    assert!(matches!(
        Strategy::new(
            Procedure::Holm,
            2,
            vec![0.5, 0.5 + 10.0 * SUM_TOLERANCE],
            vec![]
        ),
        Err(MultiplicityError::WeightSumAboveOne { .. })
    ));
}

#[test]
fn unweighted_procedures_refuse_weights() {
    for procedure in [
        Procedure::Hochberg,
        Procedure::Hommel,
        Procedure::FixedSequence,
    ] {
        let error = Strategy::new(procedure, 2, vec![0.5, 0.5], vec![]).unwrap_err();
        assert_eq!(error, MultiplicityError::WeightsNotSupported { procedure });
    }
    assert_eq!(
        Strategy::new(Procedure::Hochberg, 2, vec![0.5, 0.5], vec![])
            .unwrap_err()
            .to_string(),
        "procedure hochberg takes no weights; remove them (it splits α equally or, for fixed \
         sequence, spends all of α on the first hypothesis)"
    );
}

#[test]
fn only_graphical_takes_transitions() {
    let error = Strategy::new(
        Procedure::Holm,
        2,
        vec![],
        vec![vec![0.0, 1.0], vec![1.0, 0.0]],
    )
    .unwrap_err();
    assert_eq!(
        error,
        MultiplicityError::TransitionsNotSupported {
            procedure: Procedure::Holm
        }
    );
    assert_eq!(
        error.to_string(),
        "procedure holm takes no transition matrix; only graphical does"
    );
}

#[test]
fn transition_matrix_must_be_square() {
    let rows = graph_error(vec![0.5, 0.5], vec![vec![0.0, 1.0]]);
    assert_eq!(
        rows,
        MultiplicityError::TransitionRowCountMismatch {
            expected: 2,
            found: 1
        }
    );
    assert_eq!(
        rows.to_string(),
        "transition matrix has 1 rows; expected 2 (one per hypothesis)"
    );
    let empty = graph_error(vec![0.5, 0.5], vec![]);
    assert_eq!(
        empty,
        MultiplicityError::TransitionRowCountMismatch {
            expected: 2,
            found: 0
        }
    );
    let length = graph_error(vec![0.5, 0.5], vec![vec![0.0, 1.0], vec![1.0]]);
    assert_eq!(
        length,
        MultiplicityError::TransitionRowLengthMismatch {
            from: 1,
            expected: 2,
            found: 1
        }
    );
    assert_eq!(
        length.to_string(),
        "transition row of hypothesis 1 has 1 entries; expected 2"
    );
}

#[test]
fn transitions_must_be_proportions() {
    for bad in [-0.1, 1.2, f64::NAN, f64::NEG_INFINITY] {
        let error = graph_error(vec![0.5, 0.5], vec![vec![0.0, bad], vec![1.0, 0.0]]);
        assert!(
            matches!(
                error,
                MultiplicityError::TransitionOutOfRange { from: 0, to: 1, .. }
            ),
            "{error:?}"
        );
    }
    let error = graph_error(vec![0.5, 0.5], vec![vec![0.0, 1.2], vec![1.0, 0.0]]);
    assert_eq!(
        error.to_string(),
        "transition from hypothesis 0 to hypothesis 1 is 1.2; expected a number from 0 to 1"
    );
}

#[test]
fn self_loops_are_refused() {
    let error = graph_error(
        vec![0.5, 0.5, 0.0],
        vec![
            vec![0.0, 0.5, 0.5],
            vec![0.25, 0.5, 0.25],
            vec![0.5, 0.5, 0.0],
        ],
    );
    assert_eq!(
        error,
        MultiplicityError::SelfLoop {
            hypothesis: 1,
            value: 0.5
        }
    );
    assert_eq!(
        error.to_string(),
        "hypothesis 1 passes 0.5 of its level to itself; the diagonal of the transition matrix must be 0"
    );
}

#[test]
fn transition_rows_must_add_up_to_at_most_one() {
    let error = graph_error(
        vec![0.5, 0.5, 0.0],
        vec![
            vec![0.0, 0.6, 0.6],
            vec![0.5, 0.0, 0.5],
            vec![0.5, 0.5, 0.0],
        ],
    );
    assert_eq!(
        error,
        MultiplicityError::TransitionRowSumAboveOne { from: 0, sum: 1.2 }
    );
    assert_eq!(
        error.to_string(),
        "transitions out of hypothesis 0 add up to 1.2; expected a total of at most 1"
    );
}

#[test]
fn p_values_are_checked() {
    let strategy = Strategy::unweighted(Procedure::Holm, 2).unwrap();
    let count = apply(&strategy, &[Some(0.01)], 0.05).unwrap_err();
    assert_eq!(
        count,
        MultiplicityError::PValueCountMismatch {
            expected: 2,
            found: 1
        }
    );
    assert_eq!(
        count.to_string(),
        "expected 2 p-values (one per hypothesis), found 1"
    );
    for bad in [-0.01, 1.01, f64::NAN, f64::INFINITY] {
        let error = apply(&strategy, &[Some(0.01), Some(bad)], 0.05).unwrap_err();
        assert!(
            matches!(
                error,
                MultiplicityError::PValueOutOfRange { hypothesis: 1, .. }
            ),
            "{error:?}"
        );
        let mut workspace = Workspace::new();
        assert_eq!(
            workspace
                .adjusted_p_values(&strategy, &[Some(0.01), Some(bad)])
                .unwrap_err()
                .to_string(),
            error.to_string()
        );
    }
    assert_eq!(
        apply(&strategy, &[Some(0.01), Some(1.01)], 0.05)
            .unwrap_err()
            .to_string(),
        "p-value of hypothesis 1 is 1.01; expected a finite number from 0 to 1"
    );
    // Exactly 0 and 1 are valid p-values.
    assert!(apply(&strategy, &[Some(0.0), Some(1.0)], 0.05).is_ok());
}

#[test]
fn alpha_must_lie_strictly_between_zero_and_one() {
    let strategy = Strategy::unweighted(Procedure::Bonferroni, 1).unwrap();
    for bad in [0.0, 1.0, -0.05, 1.5, f64::NAN] {
        let error = apply(&strategy, &[Some(0.01)], bad).unwrap_err();
        assert!(
            matches!(error, MultiplicityError::AlphaOutOfRange { .. }),
            "{error:?}"
        );
    }
    assert_eq!(
        apply(&strategy, &[Some(0.01)], 1.0)
            .unwrap_err()
            .to_string(),
        "family-wise level alpha is 1; expected a number strictly between 0 and 1"
    );
}

#[test]
fn intersection_weights_need_a_graph_of_the_right_size() {
    let holm = Strategy::unweighted(Procedure::Holm, 2).unwrap();
    assert_eq!(
        holm.intersection_weights(&[true, false]).unwrap_err(),
        MultiplicityError::NotGraphical {
            procedure: Procedure::Holm
        }
    );
    let graph = holm_graph(2).unwrap();
    assert_eq!(
        graph.intersection_weights(&[true]).unwrap_err(),
        MultiplicityError::MembershipCountMismatch {
            expected: 2,
            found: 1
        }
    );
}

/// Small families and helper graphs at their edges (common practice: one hypothesis is
/// tested at the full α by every procedure).
#[test]
fn single_hypothesis_and_degenerate_graphs() {
    for strategy in [
        Strategy::unweighted(Procedure::Bonferroni, 1).unwrap(),
        Strategy::unweighted(Procedure::Holm, 1).unwrap(),
        Strategy::unweighted(Procedure::Hochberg, 1).unwrap(),
        Strategy::unweighted(Procedure::Hommel, 1).unwrap(),
        Strategy::unweighted(Procedure::FixedSequence, 1).unwrap(),
        Strategy::unweighted(Procedure::Fallback, 1).unwrap(),
        holm_graph(1).unwrap(),
        fixed_sequence_graph(1).unwrap(),
    ] {
        let outcome = apply(&strategy, &[Some(0.04)], 0.05).unwrap();
        assert_eq!(
            outcome.hypotheses[0].adjusted_p,
            0.04,
            "{:?}",
            strategy.procedure()
        );
        assert!(outcome.hypotheses[0].rejected);
    }
    // Weighted Holm graph with weights all zero: nothing can ever be rejected.
    let zero = weighted_holm_graph(&[0.0, 0.0]).unwrap();
    let outcome = apply(&zero, &[Some(0.0), Some(0.0)], 0.05).unwrap();
    assert!(
        outcome
            .hypotheses
            .iter()
            .all(|h| !h.rejected && h.adjusted_p == 1.0)
    );
    // Parallel gatekeeping without secondaries is Bonferroni on the primaries.
    let only_primaries = apply(
        &parallel_gatekeeping_graph(2, 0).unwrap(),
        &[Some(0.02), Some(0.03)],
        0.05,
    )
    .unwrap();
    assert_eq!(
        only_primaries
            .hypotheses
            .iter()
            .map(|h| h.adjusted_p)
            .collect::<Vec<_>>(),
        [0.04, 0.06]
    );
}
