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
