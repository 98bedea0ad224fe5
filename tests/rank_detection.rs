//! Aliased-column detection of the least-squares engine on constructed
//! designs (common practice: an exact duplicate, dummies that add up to the
//! intercept, and an exact linear combination are aliased by definition). The
//! later column in the caller's order must be reported by index, and the
//! remaining coefficients, covariance and residual sum of squares must equal
//! those of a fit of the design without that column. This file must not
//! depend on any particular data values beyond the deterministic ones built
//! here.

use cairn::models::linear::{LeastSquaresFit, LeastSquaresOptions, fit_least_squares};
use nalgebra::DMatrix;

const N_OBSERVATIONS: usize = 30;

/// Deterministic, irregular covariate values (no randomness in tests).
fn covariate(seed: f64, row: usize) -> f64 {
    let t = row as f64 + 1.0;
    (seed * t).sin() * 3.0 + (0.37 * seed * t * t).cos() + 0.1 * t
}

fn response() -> Vec<f64> {
    (0..N_OBSERVATIONS)
        .map(|row| {
            2.0 + 0.5 * covariate(1.3, row) - 1.2 * covariate(2.9, row) + covariate(7.1, row)
        })
        .collect()
}

/// Three-level factor assignment: level = row mod 3.
fn level(row: usize) -> usize {
    row % 3
}

fn build(columns: &[Vec<f64>]) -> DMatrix<f64> {
    DMatrix::from_fn(N_OBSERVATIONS, columns.len(), |row, column| {
        columns[column][row]
    })
}

fn column(function: impl Fn(usize) -> f64) -> Vec<f64> {
    (0..N_OBSERVATIONS).map(function).collect()
}

fn fit(columns: &[Vec<f64>], options: &LeastSquaresOptions) -> LeastSquaresFit {
    fit_least_squares(&build(columns), &response(), options).expect("design fits")
}

fn relative_difference(a: f64, b: f64) -> f64 {
    if a == b {
        0.0
    } else {
        (a - b).abs() / a.abs().max(b.abs())
    }
}

/// Checks that `full` (with the columns listed in `aliased` removed) agrees
/// with `reduced` to 1e-12 relative in every coefficient, covariance entry
/// and the residual sum of squares. The tolerance allows for the rounding of
/// two different but equally accurate computations; the refinement makes
/// both accurate to about 1e-15.
fn assert_matches_reduced(full: &LeastSquaresFit, reduced: &LeastSquaresFit, aliased: &[usize]) {
    let kept: Vec<usize> = (0..full.n_columns)
        .filter(|column| !aliased.contains(column))
        .collect();
    assert_eq!(kept.len(), reduced.n_columns);
    assert_eq!(full.rank, reduced.rank);
    assert_eq!(full.residual_df, reduced.residual_df);
    for (reduced_index, &full_index) in kept.iter().enumerate() {
        let a = full.coefficients[full_index].expect("kept column estimated");
        let b = reduced.coefficients[reduced_index].expect("reduced column estimated");
        assert!(
            relative_difference(a, b) < 1e-12,
            "coefficient {full_index}: {a} vs {b}"
        );
        for (reduced_other, &full_other) in kept.iter().enumerate() {
            let a = full.unscaled_covariance[(full_index, full_other)];
            let b = reduced.unscaled_covariance[(reduced_index, reduced_other)];
            // Off-diagonal entries can be near zero; compare them on the
            // scale of the diagonal (the covariance's natural size).
            let scale = (full.unscaled_covariance[(full_index, full_index)]
                * full.unscaled_covariance[(full_other, full_other)])
                .sqrt();
            assert!(
                (a - b).abs() <= 1e-12 * scale,
                "covariance ({full_index},{full_other})"
            );
        }
    }
    for &column in aliased {
        assert_eq!(full.coefficients[column], None);
        for other in 0..full.n_columns {
            assert_eq!(full.unscaled_covariance[(column, other)], 0.0);
            assert_eq!(full.unscaled_covariance[(other, column)], 0.0);
        }
    }
    assert!(
        relative_difference(
            full.residual_sum_of_squares,
            reduced.residual_sum_of_squares
        ) < 1e-12
    );
    let errors = full.coefficient_standard_errors();
    for &column in aliased {
        assert_eq!(errors[column], None);
    }
}

fn intercept() -> Vec<f64> {
    vec![1.0; N_OBSERVATIONS]
}

// Common practice: a column identical to an earlier one is aliased; the
// second copy (index 3) is the one reported.
#[test]
fn duplicated_column_is_aliased_by_index() {
    let x = column(|row| covariate(1.3, row));
    let z = column(|row| covariate(2.9, row));
    let options = LeastSquaresOptions::default();
    let full = fit(&[intercept(), x.clone(), z.clone(), x.clone()], &options);
    assert_eq!(full.aliased_columns, vec![3]);
    let reduced = fit(&[intercept(), x, z], &options);
    assert!(reduced.aliased_columns.is_empty());
    assert_matches_reduced(&full, &reduced, &[3]);
}

// Common practice: with an intercept, one dummy per level of a three-level
// factor is aliased (the dummies add up to the intercept column); the last
// dummy (index 3) is reported, as treatment coding would drop one level.
#[test]
fn dummies_summing_to_intercept_alias_the_last_dummy() {
    let dummies: Vec<Vec<f64>> = (0..3)
        .map(|wanted| column(|row| if level(row) == wanted { 1.0 } else { 0.0 }))
        .collect();
    let x = column(|row| covariate(7.1, row));
    let options = LeastSquaresOptions::default();
    let full = fit(
        &[
            intercept(),
            dummies[0].clone(),
            dummies[1].clone(),
            dummies[2].clone(),
            x.clone(),
        ],
        &options,
    );
    assert_eq!(full.aliased_columns, vec![3]);
    let reduced = fit(
        &[intercept(), dummies[0].clone(), dummies[1].clone(), x],
        &options,
    );
    assert_matches_reduced(&full, &reduced, &[3]);
}

// Common practice: a column equal (up to the rounding of its own
// computation) to 0.3·x₁ − 2.7·x₂ + 5 is aliased. The columns are given very
// different scales (10⁶ and 10⁻³) to show that the rank test does not depend
// on units.
#[test]
fn exact_linear_combination_is_aliased_whatever_the_scales() {
    let x1 = column(|row| 1e6 * covariate(1.3, row));
    let x2 = column(|row| 1e-3 * covariate(2.9, row));
    let x3 = column(|row| covariate(7.1, row));
    let combination = column(|row| 0.3 * x1[row] - 2.7 * x2[row] + 5.0);
    let options = LeastSquaresOptions::default();
    let full = fit(
        &[intercept(), x1.clone(), x2.clone(), combination, x3.clone()],
        &options,
    );
    assert_eq!(full.aliased_columns, vec![3]);
    let reduced = fit(&[intercept(), x1, x2, x3], &options);
    assert_matches_reduced(&full, &reduced, &[3]);
}

// Common practice: a column of zeros carries no information and is aliased;
// two aliased columns at once are both reported, in ascending order.
#[test]
fn zero_column_and_duplicate_are_both_reported() {
    let x = column(|row| covariate(1.3, row));
    let z = column(|row| covariate(2.9, row));
    let options = LeastSquaresOptions::default();
    let full = fit(
        &[
            vec![0.0; N_OBSERVATIONS],
            intercept(),
            x.clone(),
            z.clone(),
            z.clone(),
        ],
        &options,
    );
    assert_eq!(full.aliased_columns, vec![0, 4]);
    let reduced = fit(&[intercept(), x, z], &options);
    assert_matches_reduced(&full, &reduced, &[0, 4]);
}

// Common practice: a tiny column (values near 10⁻¹⁰⁰) that is not a
// combination of the others is a legitimate, estimable column, and its
// coefficient is 10¹⁰⁰ times that of the unscaled column (1e-12 relative
// allows for the rounding of the scaled values).
#[test]
fn tiny_but_independent_column_is_not_aliased() {
    let x = column(|row| covariate(1.3, row));
    let tiny_x = column(|row| 1e-100 * covariate(1.3, row));
    let z = column(|row| covariate(2.9, row));
    let options = LeastSquaresOptions::default();
    let tiny = fit(&[intercept(), tiny_x, z.clone()], &options);
    assert!(tiny.aliased_columns.is_empty());
    assert_eq!(tiny.rank, 3);
    let plain = fit(&[intercept(), x, z], &options);
    let scaled_back = tiny.coefficients[1].expect("estimated") * 1e-100;
    assert!(relative_difference(scaled_back, plain.coefficients[1].expect("estimated")) < 1e-12);
}

// Common practice: a column that is independent but only barely (its distance
// to the span of the others is 10⁻⁹ of its length, far above rounding level)
// must be kept, while the same column at distance 0 is aliased.
#[test]
fn nearly_but_not_exactly_collinear_column_is_kept() {
    let x = column(|row| covariate(1.3, row));
    let z = column(|row| covariate(2.9, row));
    let w = column(|row| covariate(7.1, row));
    let nearly = column(|row| x[row] + 1e-9 * w[row]);
    let options = LeastSquaresOptions::default();
    let kept = fit(&[intercept(), x.clone(), z.clone(), nearly], &options);
    assert!(kept.aliased_columns.is_empty());
    let exact = fit(&[intercept(), x.clone(), z, x], &options);
    assert_eq!(exact.aliased_columns, vec![3]);
}
