//! Bad input to the least-squares engine: empty designs, mismatched lengths,
//! non-finite values, too few observations, invalid options. Each must come
//! back as the documented error value with the offending indices — never a
//! panic and never a result containing NaN (common practice; project rule
//! that the numeric core does not panic on user data). This file does not
//! check accuracy; see nist_strd.rs for that.

use cairn::models::linear::{LeastSquaresError, LeastSquaresOptions, fit_least_squares};
use nalgebra::DMatrix;
use proptest::prelude::*;

fn options() -> LeastSquaresOptions {
    LeastSquaresOptions::default()
}

fn small_design() -> DMatrix<f64> {
    // Intercept and one covariate, 5 rows.
    DMatrix::from_column_slice(5, 2, &[1.0, 1.0, 1.0, 1.0, 1.0, 0.5, 1.5, 2.0, 3.5, 4.0])
}

#[test]
fn empty_designs_are_rejected() {
    let no_rows = DMatrix::<f64>::zeros(0, 2);
    assert_eq!(
        fit_least_squares(&no_rows, &[], &options()),
        Err(LeastSquaresError::EmptyDesign {
            n_observations: 0,
            n_columns: 2
        })
    );
    let no_columns = DMatrix::<f64>::zeros(3, 0);
    assert_eq!(
        fit_least_squares(&no_columns, &[1.0, 2.0, 3.0], &options()),
        Err(LeastSquaresError::EmptyDesign {
            n_observations: 3,
            n_columns: 0
        })
    );
}

#[test]
fn response_length_must_match_rows() {
    assert_eq!(
        fit_least_squares(&small_design(), &[1.0, 2.0, 3.0], &options()),
        Err(LeastSquaresError::DimensionMismatch {
            design_rows: 5,
            response_length: 3
        })
    );
}

#[test]
fn non_finite_design_entries_are_located() {
    for bad in [f64::NAN, f64::INFINITY, f64::NEG_INFINITY] {
        let mut design = small_design();
        design[(3, 1)] = bad;
        assert_eq!(
            fit_least_squares(&design, &[1.0, 2.0, 3.0, 4.0, 5.0], &options()),
            Err(LeastSquaresError::NonFiniteDesign { row: 3, column: 1 })
        );
    }
}

#[test]
fn non_finite_responses_are_located() {
    for bad in [f64::NAN, f64::INFINITY, f64::NEG_INFINITY] {
        let response = [1.0, bad, 3.0, 4.0, 5.0];
        assert_eq!(
            fit_least_squares(&small_design(), &response, &options()),
            Err(LeastSquaresError::NonFiniteResponse { row: 1 })
        );
    }
}

#[test]
fn no_residual_degrees_of_freedom() {
    // Two rows, two independent columns: an exact fit with n = rank.
    let square = DMatrix::from_column_slice(2, 2, &[1.0, 1.0, 0.0, 1.0]);
    assert_eq!(
        fit_least_squares(&square, &[1.0, 2.0], &options()),
        Err(LeastSquaresError::NoResidualDegreesOfFreedom {
            n_observations: 2,
            rank: 2
        })
    );
    // More columns than rows: the rank is at most n, so again none remain.
    let wide = DMatrix::from_column_slice(2, 3, &[1.0, 1.0, 0.0, 1.0, 2.0, 5.0]);
    assert_eq!(
        fit_least_squares(&wide, &[1.0, 2.0], &options()),
        Err(LeastSquaresError::NoResidualDegreesOfFreedom {
            n_observations: 2,
            rank: 2
        })
    );
    // Three rows, but the third column duplicates the first: rank 2 < 3 works.
    let aliased = DMatrix::from_column_slice(3, 3, &[1.0, 1.0, 1.0, 0.0, 1.0, 3.0, 1.0, 1.0, 1.0]);
    let fit =
        fit_least_squares(&aliased, &[1.0, 2.0, 4.0], &options()).expect("rank 2 of 3 rows fits");
    assert_eq!(
        (fit.rank, fit.residual_df, fit.aliased_columns.clone()),
        (2, 1, vec![2])
    );
}

#[test]
fn all_zero_design_has_nothing_to_estimate() {
    let zeros = DMatrix::<f64>::zeros(4, 2);
    assert_eq!(
        fit_least_squares(&zeros, &[1.0, 2.0, 3.0, 4.0], &options()),
        Err(LeastSquaresError::NoEstimableColumns { n_columns: 2 })
    );
}

#[test]
fn invalid_rank_tolerance_is_rejected() {
    for bad in [f64::NAN, -1e-12, 1.0, f64::INFINITY] {
        let options = LeastSquaresOptions {
            rank_tolerance: bad,
            ..LeastSquaresOptions::default()
        };
        let result = fit_least_squares(&small_design(), &[1.0, 2.0, 3.0, 4.0, 5.0], &options);
        assert!(
            matches!(
                result,
                Err(LeastSquaresError::InvalidOption {
                    name: "rank_tolerance",
                    ..
                })
            ),
            "tolerance {bad} accepted"
        );
    }
}

#[test]
fn values_too_large_to_square_are_an_error_not_a_nan() {
    // Response near the largest double: the residual sum of squares overflows.
    let response = [1e300, -1e300, 1e300, -1e300, 1e300];
    let result = fit_least_squares(&small_design(), &response, &options());
    assert!(
        matches!(result, Err(LeastSquaresError::NumericalFailure { .. })),
        "{result:?}"
    );
}

#[test]
fn constant_response_has_no_r_squared() {
    let fit = fit_least_squares(&small_design(), &[2.0; 5], &options()).expect("fits");
    assert_eq!(fit.r_squared(&[2.0; 5], true), None);
    // A response of the wrong length is refused rather than misread.
    assert_eq!(fit.r_squared(&[2.0; 4], true), None);
}

#[test]
fn error_messages_quote_the_offending_values() {
    let message = LeastSquaresError::NonFiniteDesign { row: 3, column: 1 }.to_string();
    assert_eq!(
        message,
        "design entry at row 4 column 2 is not a finite number"
    );
    let message = LeastSquaresError::NoResidualDegreesOfFreedom {
        n_observations: 2,
        rank: 2,
    }
    .to_string();
    assert!(message.contains("2 observations") && message.contains("rank 2"));
}

proptest! {
    // Common practice (robustness): any finite design, including duplicated
    // and zero columns and extreme magnitudes, gives either an error value or
    // a fit whose every number is finite; it never panics.
    #[test]
    fn arbitrary_finite_input_never_panics_or_leaks_nan(
        n_observations in 1usize..8,
        n_columns in 1usize..5,
        values in proptest::collection::vec(prop_oneof![
            Just(0.0), Just(1.0), -1e3f64..1e3, -1e150f64..1e150
        ], 64),
        duplicate in any::<bool>(),
    ) {
        let mut design = DMatrix::from_fn(n_observations, n_columns, |row, column| {
            values[(row * n_columns + column) % values.len()]
        });
        if duplicate && n_columns > 1 {
            for row in 0..n_observations {
                design[(row, n_columns - 1)] = design[(row, 0)];
            }
        }
        let response: Vec<f64> = (0..n_observations).map(|row| values[(row * 7 + 3) % values.len()]).collect();
        if let Ok(fit) = fit_least_squares(&design, &response, &LeastSquaresOptions::default()) {
            prop_assert!(fit.rank >= 1 && fit.rank < n_observations);
            prop_assert!(fit.coefficients.iter().flatten().all(|value| value.is_finite()));
            prop_assert!(fit.unscaled_covariance.iter().all(|value| value.is_finite()));
            prop_assert!(fit.residuals.iter().chain(&fit.fitted).all(|value| value.is_finite()));
            prop_assert!(fit.residual_sum_of_squares.is_finite());
            prop_assert!(fit.coefficient_standard_errors().iter().flatten().all(|value| value.is_finite()));
            if let Some(r_squared) = fit.r_squared(&response, true) {
                prop_assert!(r_squared.is_finite());
            }
        }
    }
}
