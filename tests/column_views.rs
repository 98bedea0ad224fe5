//! Fits on some columns of a design, read in place, are the fits on a copy of those columns to
//! the bit (an identity of the engines, common practice for a view: it only saves the copy). The
//! design is an intercept, an arm indicator, a covariate and site indicators, the shape of a
//! planned analysis; the views drop the intercept (cumulative link models take none) and the
//! arm (the reduced model of a likelihood-ratio test), and list columns out of order.

use cairn::models::multinomial::{
    MultinomialOptions, fit_multinomial_logit, fit_multinomial_logit_on,
};
use cairn::models::ordinal::{
    CumulativeLink, CumulativeLinkOptions, fit_cumulative_link, fit_cumulative_link_on,
    fit_nominal_effects, fit_nominal_effects_on,
};
use cairn::models::{DesignColumns, StopReason};
use nalgebra::DMatrix;

/// An invented design of `n` rows (a fixed linear-congruential sequence stands in for data)
/// and a response in four categories.
fn design_and_response(n: usize) -> (DMatrix<f64>, Vec<usize>) {
    let mut state = 20261202_u64;
    let mut uniform = move || {
        state = state
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (state >> 11) as f64 / (1u64 << 53) as f64
    };
    let sites = 5;
    let rows: Vec<(f64, f64, usize)> = (0..n)
        .map(|i| (((i / 2) % 2) as f64, uniform() * 3.0 - 1.5, i % sites))
        .collect();
    let design = DMatrix::from_fn(n, 3 + sites - 1, |i, j| match j {
        0 => 1.0,
        1 => rows[i].0,
        2 => rows[i].1,
        j => f64::from(rows[i].2 == j - 2),
    });
    let response = rows
        .iter()
        .map(|&(arm, x, site)| {
            let latent = 0.8 * arm + 0.6 * x + 0.2 * site as f64 + 2.0 * (uniform() - 0.5);
            [-0.4, 0.5, 1.3].iter().filter(|&&cut| latent > cut).count()
        })
        .collect();
    (design, response)
}

#[test]
fn cumulative_link_fits_on_views_are_fits_on_copies() {
    let (design, response) = design_and_response(400);
    let options = CumulativeLinkOptions {
        link: CumulativeLink::Logit,
        ..CumulativeLinkOptions::default()
    };
    for columns in [
        vec![1, 2, 3, 4, 5, 6],
        vec![2, 3, 4, 5, 6],
        vec![6, 2, 1, 4],
    ] {
        let copy = design.select_columns(&columns);
        let on_copy = fit_cumulative_link(&copy, &response, 4, None, &options)
            .expect("the fit on the copy runs");
        let view = DesignColumns::new(&design, &columns).expect("columns in range");
        let on_view =
            fit_cumulative_link_on(view, &response, 4, None, &options).expect("the view fit runs");
        assert!(
            matches!(on_view.stop_reason, StopReason::Converged { .. }),
            "{:?}",
            on_view.stop_reason
        );
        assert_eq!(
            format!("{on_copy:?}"),
            format!("{on_view:?}"),
            "columns {columns:?}"
        );
        let nominal_copy = fit_nominal_effects(&copy, &response, 4, None, &[0], &options)
            .expect("the nominal-effects fit on the copy runs");
        let nominal_view = fit_nominal_effects_on(view, &response, 4, None, &[0], &options)
            .expect("the nominal-effects view fit runs");
        assert_eq!(
            format!("{nominal_copy:?}"),
            format!("{nominal_view:?}"),
            "nominal effects, columns {columns:?}"
        );
    }
}

#[test]
fn multinomial_fits_on_views_are_fits_on_copies() {
    let (design, response) = design_and_response(400);
    let options = MultinomialOptions::default();
    for columns in [
        vec![0, 1, 2, 3, 4, 5, 6],
        vec![0, 2, 3, 4, 5, 6],
        vec![2, 0, 6, 1],
    ] {
        let copy = design.select_columns(&columns);
        let on_copy = fit_multinomial_logit(&copy, &response, 4, 0, None, &options)
            .expect("the fit on the copy runs");
        let view = DesignColumns::new(&design, &columns).expect("columns in range");
        let on_view = fit_multinomial_logit_on(view, &response, 4, 0, None, &options)
            .expect("the view fit runs");
        assert!(
            matches!(on_view.stop_reason, StopReason::Converged { .. }),
            "{:?}",
            on_view.stop_reason
        );
        assert_eq!(
            format!("{on_copy:?}"),
            format!("{on_view:?}"),
            "columns {columns:?}"
        );
    }
}

#[test]
fn views_refuse_columns_out_of_range_or_repeated() {
    let (design, _) = design_and_response(10);
    assert!(DesignColumns::new(&design, &[0, 7]).is_none());
    assert!(DesignColumns::new(&design, &[2, 2]).is_none());
    let view = DesignColumns::new(&design, &[6, 0]).expect("in range");
    assert_eq!((view.nrows(), view.ncols()), (10, 2));
    assert_eq!(view.column(1), &design.as_slice()[..10]);
    assert_eq!(view.get(3, 0), design[(3, 6)]);
}

/// The linear fit that factors the design's own storage is, to the bit, the fit on a copy, and
/// it puts the design back exactly (zero signs included): on a mostly-zero design (the stored
/// rows route, with an aliased column and a −0.0 entry) and on a dense one (the copy route).
#[test]
fn linear_fit_in_place_is_the_fit_on_a_copy_and_restores_the_design() {
    use cairn::models::linear::{
        LeastSquaresOptions, fit_least_squares, fit_least_squares_in_place,
    };
    // Intercept, arm, a covariate and twelve site indicators: about 3.5 non-zeros of 16 per
    // row, sparse enough for the stored-rows route (at most a third of the entries non-zero).
    let n = 600;
    let sites = 13;
    let mut sparse = DMatrix::from_fn(n, 3 + sites - 1 + 1, |i, j| match j {
        0 => 1.0,
        1 => ((i / 2) % 2) as f64,
        2 => ((i * 37 % 101) as f64 - 50.0) / 10.0,
        j if j < 3 + sites - 1 => f64::from(i % sites == j - 2),
        _ => f64::from(i % sites == 1),
    });
    let non_zero = sparse.iter().filter(|v| **v != 0.0).count();
    assert!(
        3 * non_zero <= sparse.len(),
        "the design is meant to be sparse"
    );
    // The last column repeats site 1's (aliased); a negative zero sits in the covariate.
    sparse[(50, 2)] = -0.0;
    let y: Vec<f64> = (0..n)
        .map(|i| {
            0.3 * ((i / 2) % 2) as f64 + 0.1 * (i % sites) as f64 + ((i * 7919) % 97) as f64 / 97.0
        })
        .collect();
    let dense = DMatrix::from_fn(60, 3, |i, j| {
        [1.0, (i as f64).sin(), (i as f64 * 0.3).cos()][j]
    });
    let dense_y: Vec<f64> = (0..60).map(|i| (i as f64 * 0.7).sin()).collect();
    for (design, response) in [(sparse, y.clone()), (dense, dense_y)] {
        let options = LeastSquaresOptions::default();
        let on_copy = fit_least_squares(&design, &response, &options).expect("the copy fit runs");
        let mut in_place = design.clone();
        let fitted = fit_least_squares_in_place(&mut in_place, &response, &options)
            .expect("the in-place fit runs");
        assert_eq!(format!("{on_copy:?}"), format!("{fitted:?}"));
        let bits = |matrix: &DMatrix<f64>| matrix.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
        assert_eq!(
            bits(&design),
            bits(&in_place),
            "the design was not restored exactly"
        );
    }
}

/// The row-block route for large designs (`fit_least_squares_rows`, which never forms the
/// n × p matrix) agrees with the dense QR to about the accuracy of either on a well-conditioned
/// design of dummies spanning many blocks (n not a multiple of the block): the same aliased
/// column; coefficients and residual sum of squares within 1e-12 relative; covariance entries
/// within 1e-12 of their variances. The external check of the route is tests/nist_strd.rs; this
/// one covers blocks, sparsity and an aliased column, which the NIST designs do not have. Bad
/// input gets the dense route's errors.
#[test]
fn row_block_least_squares_agrees_with_the_dense_fit() {
    use cairn::models::SparseRows;
    use cairn::models::linear::{
        LeastSquaresError, LeastSquaresOptions, fit_least_squares, fit_least_squares_rows,
    };
    let n = 1000;
    let sites = 20;
    let design = DMatrix::from_fn(n, 4 + sites - 1 + 1, |i, j| match j {
        0 => 1.0,
        1 => f64::from(i % 3 == 1),
        2 => f64::from(i % 3 == 2),
        3 => ((i * 37 % 101) as f64 - 50.0) / 10.0,
        j if j < 4 + sites - 1 => f64::from((i * 7) % sites == j - 3),
        _ => f64::from((i * 7) % sites == 2),
    });
    let y: Vec<f64> = (0..n)
        .map(|i| {
            0.3 * f64::from(i % 3 == 1) - 0.2 * f64::from(i % 3 == 2)
                + 0.1 * ((i * 7) % sites) as f64
                + ((i * 7919) % 97) as f64 / 9.7
        })
        .collect();
    let options = LeastSquaresOptions::default();
    let dense = fit_least_squares(&design, &y, &options).expect("the dense fit runs");
    let rows = SparseRows::from_dense(&design).expect("converts");
    let blocked = fit_least_squares_rows(&rows, &y, &options).expect("the row-block fit runs");
    assert_eq!(dense.aliased_columns, vec![design.ncols() - 1]);
    assert_eq!(blocked.aliased_columns, dense.aliased_columns);
    assert_eq!(blocked.rank, dense.rank);
    let close = |a: f64, b: f64, what: &str| {
        assert!(
            (a - b).abs() <= 1e-12 * b.abs().max(1e-300),
            "{what}: {a} against {b}"
        );
    };
    for (a, b) in blocked.coefficients.iter().zip(&dense.coefficients) {
        assert_eq!(a.is_some(), b.is_some());
        if let (Some(a), Some(b)) = (a, b) {
            close(*a, *b, "coefficient");
        }
    }
    // Covariance entries relative to their row's and column's variances (an off-diagonal entry
    // near zero has no relative accuracy of its own).
    let (a, b) = (&blocked.unscaled_covariance, &dense.unscaled_covariance);
    for i in 0..b.nrows() {
        for j in 0..b.ncols() {
            let scale = (b[(i, i)] * b[(j, j)]).sqrt();
            if scale == 0.0 {
                assert_eq!(a[(i, j)], 0.0, "aliased column's covariance entry");
            } else {
                assert!(
                    (a[(i, j)] - b[(i, j)]).abs() <= 1e-12 * scale,
                    "covariance ({i}, {j}): {} against {}",
                    a[(i, j)],
                    b[(i, j)]
                );
            }
        }
    }
    close(
        blocked.residual_sum_of_squares,
        dense.residual_sum_of_squares,
        "residual sum of squares",
    );
    assert!(blocked.refinement_converged);

    let mut broken = design.clone();
    broken[(17, 3)] = f64::NAN;
    broken[(5, 9)] = f64::INFINITY;
    let broken_rows = SparseRows::from_dense(&broken).expect("converts");
    assert_eq!(
        fit_least_squares_rows(&broken_rows, &y, &options),
        Err(LeastSquaresError::NonFiniteDesign { row: 17, column: 3 })
    );
    assert_eq!(
        fit_least_squares(&broken, &y, &options).unwrap_err(),
        LeastSquaresError::NonFiniteDesign { row: 17, column: 3 }
    );
    assert_eq!(
        fit_least_squares_rows(&rows, &y[1..], &options),
        Err(LeastSquaresError::DimensionMismatch {
            design_rows: n,
            response_length: n - 1
        })
    );
}
