//! Identities the stratified Cochran–Mantel–Haenszel statistics must satisfy, the refusal of
//! bad input, and the issue values for tables whose covariance is singular. The expected values
//! here follow from the definitions (common practice), not from another program; agreement
//! with reference software is checked in cmh_reference.rs.

use std::mem::discriminant;

use cairn::inference::cmh::{
    CmhError, CmhIssue, CmhResult, CmhStatistic, CountProblem, ScoreSide, StratifiedTable,
    cmh_tests,
};
use nalgebra::DMatrix;
use proptest::prelude::*;

fn table(strata: &[&[f64]], n_arms: usize, n_categories: usize) -> StratifiedTable {
    let flat: Vec<f64> = strata
        .iter()
        .flat_map(|stratum| stratum.iter().copied())
        .collect();
    StratifiedTable::from_flat(strata.len(), n_arms, n_categories, &flat).expect("valid test table")
}

fn value(statistic: &Result<CmhStatistic, CmhIssue>) -> &CmhStatistic {
    statistic
        .as_ref()
        .unwrap_or_else(|issue| panic!("expected a statistic, got: {issue}"))
}

fn close(left: f64, right: f64, tolerance: f64) -> bool {
    // A statistic that is exactly zero in exact arithmetic comes out as roundoff
    // (1e-30 or 1e-27 depending on the scores); below 1e-12 both count as zero.
    (left - right).abs() <= tolerance * left.abs().max(right.abs()).max(1e-12)
}

/// Both computed and equal within `tolerance` (relative), or both the same kind of issue.
fn same_outcome(
    left: &Result<CmhStatistic, CmhIssue>,
    right: &Result<CmhStatistic, CmhIssue>,
    tolerance: f64,
) -> bool {
    match (left, right) {
        (Ok(a), Ok(b)) => {
            a.df == b.df
                && close(a.statistic, b.statistic, tolerance)
                && close(a.p_value, b.p_value, tolerance)
        }
        (Err(a), Err(b)) => discriminant(a) == discriminant(b),
        _ => false,
    }
}

fn assert_no_nan(result: &CmhResult) {
    for statistic in [
        &result.general_association,
        &result.row_mean_scores,
        &result.correlation,
    ]
    .into_iter()
    .flatten()
    {
        assert!(
            statistic.statistic.is_finite() && statistic.statistic >= 0.0,
            "{statistic:?}"
        );
        assert!((0.0..=1.0).contains(&statistic.p_value), "{statistic:?}");
    }
}

/// Random stratified tables: 1–4 strata, 2–4 arms, `categories` outcome categories, counts 0–12.
fn random_table(
    categories: std::ops::RangeInclusive<usize>,
) -> impl Strategy<Value = (usize, usize, usize, Vec<f64>)> {
    (1usize..=4, 2usize..=4, categories).prop_flat_map(|(n_strata, n_arms, n_categories)| {
        (
            Just(n_strata),
            Just(n_arms),
            Just(n_categories),
            prop::collection::vec(
                (0u32..=12).prop_map(f64::from),
                n_strata * n_arms * n_categories,
            ),
        )
    })
}

// Common practice (Agresti 2013, §8.4 / 2nd ed. §7.5): with one 2×2 stratum the general
// association statistic is (n − 1)/n times Pearson's X², because the hypergeometric variance has
// n − 1 where the Pearson statistic's multinomial variance has n. Pearson's X² is computed here
// as Σ (O − E)² / E. Tolerance 1e-12 relative.
#[test]
fn one_two_by_two_stratum_is_scaled_pearson() {
    for counts in [
        [12.0, 5.0, 7.0, 9.0],
        [1.0, 0.0, 3.0, 2.0],
        [40.0, 60.0, 55.0, 45.0],
    ] {
        let result = cmh_tests(&table(&[&counts], 2, 2), None, None).unwrap();
        let n: f64 = counts.iter().sum();
        let rows = [counts[0] + counts[1], counts[2] + counts[3]];
        let columns = [counts[0] + counts[2], counts[1] + counts[3]];
        let mut pearson = 0.0;
        for row in 0..2 {
            for column in 0..2 {
                let expected = rows[row] * columns[column] / n;
                pearson += (counts[2 * row + column] - expected).powi(2) / expected;
            }
        }
        let general = value(&result.general_association);
        assert!(
            close(general.statistic, (n - 1.0) / n * pearson, 1e-12),
            "{counts:?}: {general:?} vs {pearson}"
        );
        assert_eq!(general.df, 1);
    }
}

// A stratum with fewer than two subjects contributes nothing and is not counted as used.
#[test]
fn strata_below_two_subjects_are_skipped() {
    let informative: &[f64] = &[5.0, 2.0, 1.0, 1.0, 4.0, 3.0];
    let single: &[f64] = &[0.0, 0.0, 0.0, 0.0, 1.0, 0.0];
    let empty: &[f64] = &[0.0; 6];
    let with_small = cmh_tests(&table(&[informative, single, empty], 2, 3), None, None).unwrap();
    let alone = cmh_tests(&table(&[informative], 2, 3), None, None).unwrap();
    assert_eq!((with_small.strata_used, with_small.strata_total), (1, 3));
    assert_eq!(with_small.general_association, alone.general_association);
    assert_eq!(with_small.row_mean_scores, alone.row_mean_scores);
    assert_eq!(with_small.correlation, alone.correlation);
}

proptest! {
    // Common practice: with two outcome categories the row-mean-scores statistic tests the same
    // I − 1 contrasts as the general association statistic, whatever the two scores.
    // Tolerance 1e-9 relative.
    #[test]
    fn row_mean_scores_equal_general_association_for_two_categories(
        (n_strata, n_arms, n_categories, counts) in random_table(2..=2),
        low in -3.0f64..3.0,
        gap in 0.5f64..4.0,
    ) {
        let stratified = StratifiedTable::from_flat(n_strata, n_arms, n_categories, &counts).unwrap();
        let result = cmh_tests(&stratified, Some(&[low, low + gap]), None).unwrap();
        assert_no_nan(&result);
        if let Ok(general) = &result.general_association {
            let means = value(&result.row_mean_scores);
            prop_assert_eq!(general.df, means.df);
            prop_assert!(close(general.statistic, means.statistic, 1e-9), "{:?} vs {:?}", general, means);
        }
    }

    // The statistics are sums over strata, so the order of the strata cannot matter
    // (reversed and rotated here). Tolerance 1e-10 relative (summation order only).
    #[test]
    fn permuting_strata_changes_nothing((n_strata, n_arms, n_categories, counts) in random_table(2..=5)) {
        let stratum_size = n_arms * n_categories;
        let original = StratifiedTable::from_flat(n_strata, n_arms, n_categories, &counts).unwrap();
        let reversed: Vec<f64> = counts.chunks(stratum_size).rev().flatten().copied().collect();
        let mut rotated: Vec<f64> = counts.clone();
        rotated.rotate_left(stratum_size);
        let base = cmh_tests(&original, None, None).unwrap();
        assert_no_nan(&base);
        for permuted in [reversed, rotated] {
            let other = cmh_tests(&StratifiedTable::from_flat(n_strata, n_arms, n_categories, &permuted).unwrap(), None, None).unwrap();
            prop_assert!(same_outcome(&base.general_association, &other.general_association, 1e-10));
            prop_assert!(same_outcome(&base.row_mean_scores, &other.row_mean_scores, 1e-10));
            prop_assert!(same_outcome(&base.correlation, &other.correlation, 1e-10));
            prop_assert_eq!(base.strata_used, other.strata_used);
        }
    }

    // Common practice: the score statistics are invariant under a linear change of the scores
    // a → αa + β (α ≠ 0): the summaries scale by α and their covariance by α². Integer scores
    // 1..J and 1..I against scaled and shifted versions. Tolerance 1e-9 relative.
    #[test]
    fn linear_change_of_scores_changes_nothing(
        (n_strata, n_arms, n_categories, counts) in random_table(2..=5),
        column_scale in prop_oneof![-4.0f64..-0.25, 0.25f64..4.0],
        column_shift in -10.0f64..10.0,
        row_scale in prop_oneof![-4.0f64..-0.25, 0.25f64..4.0],
        row_shift in -10.0f64..10.0,
    ) {
        let stratified = StratifiedTable::from_flat(n_strata, n_arms, n_categories, &counts).unwrap();
        let column_scores: Vec<f64> = (1..=n_categories).map(|j| column_scale * j as f64 + column_shift).collect();
        let row_scores: Vec<f64> = (1..=n_arms).map(|i| row_scale * i as f64 + row_shift).collect();
        let base = cmh_tests(&stratified, None, None).unwrap();
        let changed = cmh_tests(&stratified, Some(&column_scores), Some(&row_scores)).unwrap();
        assert_no_nan(&changed);
        prop_assert!(same_outcome(&base.row_mean_scores, &changed.row_mean_scores, 1e-9), "{:?} vs {:?}", base.row_mean_scores, changed.row_mean_scores);
        prop_assert!(same_outcome(&base.correlation, &changed.correlation, 1e-9), "{:?} vs {:?}", base.correlation, changed.correlation);
        prop_assert_eq!(&base.general_association, &changed.general_association);
    }
}

// ---------------------------------------------------------------- issues

// An arm with no subjects anywhere makes the general association and row-mean-scores
// covariances singular; the correlation statistic is still defined and, since an empty arm
// contributes nothing to any sum, equals the one of the table without that arm.
#[test]
fn empty_arm_is_reported_and_correlation_survives() {
    let with_empty_arm = table(
        &[
            &[4.0, 2.0, 1.0, 0.0, 0.0, 0.0, 1.0, 3.0, 5.0],
            &[2.0, 2.0, 1.0, 0.0, 0.0, 0.0, 1.0, 1.0, 4.0],
        ],
        3,
        3,
    );
    let without = table(
        &[
            &[4.0, 2.0, 1.0, 1.0, 3.0, 5.0],
            &[2.0, 2.0, 1.0, 1.0, 1.0, 4.0],
        ],
        2,
        3,
    );
    let result = cmh_tests(&with_empty_arm, None, Some(&[0.0, 1.0, 2.0])).unwrap();
    assert_eq!(
        result.general_association,
        Err(CmhIssue::EmptyArm { arm: 1 })
    );
    assert_eq!(result.row_mean_scores, Err(CmhIssue::EmptyArm { arm: 1 }));
    let reduced = cmh_tests(&without, None, Some(&[0.0, 2.0])).unwrap();
    assert!(close(
        value(&result.correlation).statistic,
        value(&reduced.correlation).statistic,
        1e-12
    ));

    // The last arm, which the quadratic forms drop, is detected too.
    let last_empty = table(&[&[4.0, 2.0, 1.0, 1.0, 3.0, 5.0, 0.0, 0.0, 0.0]], 3, 3);
    let result = cmh_tests(&last_empty, None, None).unwrap();
    assert_eq!(
        result.general_association,
        Err(CmhIssue::EmptyArm { arm: 2 })
    );
    assert_eq!(result.row_mean_scores, Err(CmhIssue::EmptyArm { arm: 2 }));
}

// An outcome category with no subjects anywhere makes the general association covariance
// singular; the score statistics are unaffected by it and equal those of the table without
// that category (same scores for the others).
#[test]
fn empty_category_is_reported_and_score_statistics_survive() {
    let with_empty = table(
        &[
            &[4.0, 0.0, 2.0, 1.0, 1.0, 0.0, 3.0, 5.0],
            &[3.0, 0.0, 3.0, 2.0, 1.0, 0.0, 2.0, 6.0],
        ],
        2,
        4,
    );
    let without = table(
        &[
            &[4.0, 2.0, 1.0, 1.0, 3.0, 5.0],
            &[3.0, 3.0, 2.0, 1.0, 2.0, 6.0],
        ],
        2,
        3,
    );
    let result = cmh_tests(&with_empty, Some(&[1.0, 2.0, 3.0, 5.0]), None).unwrap();
    let reduced = cmh_tests(&without, Some(&[1.0, 3.0, 5.0]), None).unwrap();
    assert_eq!(
        result.general_association,
        Err(CmhIssue::EmptyCategory { category: 1 })
    );
    assert!(close(
        value(&result.row_mean_scores).statistic,
        value(&reduced.row_mean_scores).statistic,
        1e-12
    ));
    assert!(close(
        value(&result.correlation).statistic,
        value(&reduced.correlation).statistic,
        1e-12
    ));
}

// Arms 0–1 appear only in the first stratum and arms 2–3 only in the second: no arm is empty,
// but contrasts between the two pairs are not estimable and the covariance is singular.
#[test]
fn arms_that_never_share_a_stratum_give_a_singular_covariance() {
    let disconnected = table(
        &[
            &[3.0, 2.0, 1.0, 4.0, 0.0, 0.0, 0.0, 0.0],
            &[0.0, 0.0, 0.0, 0.0, 2.0, 5.0, 3.0, 1.0],
        ],
        4,
        2,
    );
    let result = cmh_tests(&disconnected, None, None).unwrap();
    assert!(
        matches!(
            result.general_association,
            Err(CmhIssue::SingularCovariance { .. })
        ),
        "{:?}",
        result.general_association
    );
    assert!(
        matches!(
            result.row_mean_scores,
            Err(CmhIssue::SingularCovariance { .. })
        ),
        "{:?}",
        result.row_mean_scores
    );
    assert!(result.correlation.is_ok());
}

#[test]
fn no_usable_strata() {
    let result = cmh_tests(
        &table(&[&[1.0, 0.0, 0.0, 0.0], &[0.0; 4]], 2, 2),
        None,
        None,
    )
    .unwrap();
    assert_eq!((result.strata_used, result.strata_total), (0, 2));
    for statistic in [
        &result.general_association,
        &result.row_mean_scores,
        &result.correlation,
    ] {
        assert_eq!(statistic, &Err(CmhIssue::NoUsableStrata));
    }
}

// Each stratum has subjects in a single outcome category: the score sums are fixed by the
// margins in every stratum, so there is nothing to test.
#[test]
fn outcome_constant_within_every_stratum() {
    let result = cmh_tests(
        &table(&[&[3.0, 0.0, 2.0, 0.0], &[0.0, 4.0, 0.0, 1.0]], 2, 2),
        None,
        None,
    )
    .unwrap();
    assert_eq!(
        result.row_mean_scores,
        Err(CmhIssue::NoCategoryScoreVariation)
    );
    assert_eq!(result.correlation, Err(CmhIssue::NoCategoryScoreVariation));
    assert!(matches!(
        result.general_association,
        Err(CmhIssue::SingularCovariance { .. })
    ));
}

// Arms observed together in a stratum all carry the same caller-given score.
#[test]
fn arm_scores_constant_within_every_stratum() {
    let stratified = table(
        &[
            &[3.0, 1.0, 2.0, 4.0, 0.0, 0.0],
            &[0.0, 0.0, 0.0, 0.0, 5.0, 2.0],
        ],
        3,
        2,
    );
    let result = cmh_tests(&stratified, None, Some(&[1.0, 1.0, 2.0])).unwrap();
    assert_eq!(result.correlation, Err(CmhIssue::NoArmScoreVariation));
}

// ---------------------------------------------------------------- bad input

#[test]
fn invalid_counts_are_refused_with_their_location() {
    for (bad, problem) in [
        (-1.0, CountProblem::Negative),
        (f64::NAN, CountProblem::NonFinite),
        (f64::INFINITY, CountProblem::NonFinite),
        (2.5, CountProblem::NonInteger),
        (1e17, CountProblem::TooLarge),
    ] {
        let mut second = DMatrix::from_element(2, 3, 1.0);
        second[(1, 2)] = bad;
        let error =
            StratifiedTable::new(vec![DMatrix::from_element(2, 3, 1.0), second]).unwrap_err();
        match error {
            CmhError::InvalidCount {
                stratum,
                arm,
                category,
                problem: found,
                ..
            } => {
                assert_eq!((stratum, arm, category, found), (1, 1, 2, problem));
            }
            other => panic!("expected InvalidCount, got {other:?}"),
        }
        assert!(
            error.to_string().contains("stratum 1, arm 1, category 2"),
            "{error}"
        );
    }
}

#[test]
fn shapes_are_checked() {
    assert_eq!(StratifiedTable::new(vec![]), Err(CmhError::NoStrata));
    assert_eq!(
        StratifiedTable::from_flat(0, 2, 2, &[]),
        Err(CmhError::NoStrata)
    );
    assert_eq!(
        StratifiedTable::new(vec![DMatrix::zeros(1, 3)]),
        Err(CmhError::TooFewArms { found: 1 })
    );
    assert_eq!(
        StratifiedTable::new(vec![DMatrix::zeros(3, 1)]),
        Err(CmhError::TooFewCategories { found: 1 })
    );
    assert_eq!(
        StratifiedTable::new(vec![DMatrix::zeros(2, 3), DMatrix::zeros(3, 2)]),
        Err(CmhError::StratumShapeMismatch {
            stratum: 1,
            expected_arms: 2,
            expected_categories: 3,
            found_arms: 3,
            found_categories: 2
        })
    );
    assert_eq!(
        StratifiedTable::from_flat(2, 2, 3, &[1.0; 11]),
        Err(CmhError::FlatLengthMismatch {
            expected: 12,
            found: 11
        })
    );
    assert_eq!(
        StratifiedTable::from_flat(usize::MAX, 2, 2, &[1.0; 4]),
        Err(CmhError::FlatLengthMismatch {
            expected: usize::MAX,
            found: 4
        })
    );
}

// The flat layout is stratum by stratum, arm by arm (row-major within a stratum).
#[test]
fn flat_layout_is_row_major_within_strata() {
    let flat = StratifiedTable::from_flat(
        2,
        2,
        3,
        &[
            1.0, 2.0, 3.0, 4.0, 5.0, 6.0, 7.0, 8.0, 9.0, 10.0, 11.0, 12.0,
        ],
    )
    .unwrap();
    assert_eq!(flat.stratum(1).unwrap()[(0, 2)], 9.0);
    assert_eq!(flat.stratum(0).unwrap()[(1, 0)], 4.0);
    assert_eq!(
        (flat.n_strata(), flat.n_arms(), flat.n_categories()),
        (2, 2, 3)
    );
}

#[test]
fn scores_are_checked() {
    let stratified = table(&[&[3.0, 1.0, 2.0, 2.0, 1.0, 4.0]], 2, 3);
    assert_eq!(
        cmh_tests(&stratified, Some(&[1.0, 2.0]), None),
        Err(CmhError::ScoreCountMismatch {
            side: ScoreSide::Categories,
            expected: 3,
            found: 2
        })
    );
    assert_eq!(
        cmh_tests(&stratified, None, Some(&[1.0, 2.0, 3.0])),
        Err(CmhError::ScoreCountMismatch {
            side: ScoreSide::Arms,
            expected: 2,
            found: 3
        })
    );
    assert!(matches!(
        cmh_tests(&stratified, Some(&[1.0, f64::NAN, 3.0]), None),
        Err(CmhError::NonFiniteScore {
            side: ScoreSide::Categories,
            index: 1,
            ..
        })
    ));
    assert_eq!(
        cmh_tests(&stratified, Some(&[2.0, 2.0, 2.0]), None),
        Err(CmhError::ConstantScores {
            side: ScoreSide::Categories
        })
    );
    assert_eq!(
        cmh_tests(&stratified, None, Some(&[0.5, 0.5])),
        Err(CmhError::ConstantScores {
            side: ScoreSide::Arms
        })
    );
}
