//! Cumulative link, nominal-effects and Brant-type fits checked against reference-library output
//! on public datasets that ship with R (MASS::housing, ordinal::wine, datasets::warpbreaks).
//! Reference values and the script that made them live in tests/reference/ordinal/
//! (make_reference.R; versions in versions.txt: R 4.2.2, MASS 7.3-58.2, ordinal 2022.11.16).

#[path = "common/ordinal_data.rs"]
mod common;

use cairn::models::StopReason;
use cairn::models::ordinal::{
    CumulativeLink, CumulativeLinkOptions, brant_test, cumulative_link_probabilities,
    fit_cumulative_link, fit_nominal_effects,
};
use common::{assert_close, load_dataset, load_reference, reference};

const DATASETS: [(&str, usize); 3] = [("housing", 3), ("wine", 5), ("warpbreaks", 3)];
const LINKS: [(&str, CumulativeLink); 3] = [
    ("logit", CumulativeLink::Logit),
    ("probit", CumulativeLink::Probit),
    ("cloglog", CumulativeLink::ComplementaryLogLog),
];

fn options(link: CumulativeLink) -> CumulativeLinkOptions {
    CumulativeLinkOptions {
        link,
        ..CumulativeLinkOptions::default()
    }
}

/// Source: ordinal::clm (R 4.2.2, ordinal 2022.11.16) with gradTol = 1e-12, relTol = 1e-14;
/// clm uses logit P(Y <= j) = theta_j - x'beta like cairn, so values compare without sign change.
/// Tolerance: 1e-8 relative (floor 1e-3 for values near zero) for estimates, SEs and covariance
/// (measured agreement is better than 1e-9), 1e-10 for the log-likelihood.
#[test]
fn cumulative_link_matches_ordinal_clm() {
    let map = load_reference("reference_values.csv");
    for (dataset, n_categories) in DATASETS {
        let data = load_dataset(dataset);
        for (link_name, link) in LINKS {
            let case = format!("{dataset}_{link_name}_clm");
            let fit = fit_cumulative_link(
                &data.design,
                &data.response,
                n_categories,
                Some(&data.weights),
                &options(link),
            )
            .expect("valid input");
            assert!(
                matches!(fit.stop_reason, StopReason::Converged { .. }),
                "{case}: {:?}",
                fit.stop_reason
            );
            let covariance = fit.covariance.as_ref().expect("covariance");
            let n_cut = n_categories - 1;
            let se: Vec<f64> = (0..covariance.nrows())
                .map(|r| covariance[(r, r)].sqrt())
                .collect();
            assert_close(
                &format!("{case} cut_points"),
                &fit.cut_points,
                reference(&map, &case, "cut_point"),
                1e-8,
                1e-3,
            );
            assert_close(
                &format!("{case} coefficients"),
                &fit.coefficients,
                reference(&map, &case, "coefficient"),
                1e-8,
                1e-3,
            );
            assert_close(
                &format!("{case} se cut_points"),
                &se[..n_cut],
                reference(&map, &case, "se_cut_point"),
                1e-8,
                1e-3,
            );
            assert_close(
                &format!("{case} se coefficients"),
                &se[n_cut..],
                reference(&map, &case, "se_coefficient"),
                1e-8,
                1e-3,
            );
            // Covariance is stored row-major in the same order (cut-points, then coefficients).
            let covariance_row_major: Vec<f64> = (0..covariance.nrows())
                .flat_map(|r| (0..covariance.ncols()).map(move |s| (r, s)))
                .map(|(r, s)| covariance[(r, s)])
                .collect();
            assert_close(
                &format!("{case} covariance"),
                &covariance_row_major,
                reference(&map, &case, "covariance"),
                1e-8,
                1e-4,
            );
            let log_likelihood = fit.log_likelihood.expect("log-likelihood");
            assert_close(
                &format!("{case} log_likelihood"),
                &[log_likelihood],
                reference(&map, &case, "log_likelihood"),
                1e-10,
                1.0,
            );
            eprintln!("{case}: {} iterations", fit.iterations);
        }
    }
}

/// Source: MASS::polr (MASS 7.3-58.2; methods logistic, probit, cloglog), an independent
/// implementation using optim (BFGS) with reltol 1e-15 and a finite-difference Hessian.
/// Estimates and logLik agree with the exact maximum to about 1e-6; polr's SEs come from a
/// numerically differentiated Hessian, so they are compared at 1e-4 relative.
#[test]
fn cumulative_link_matches_mass_polr() {
    let map = load_reference("reference_values.csv");
    let polr_method = |link: &str| {
        match link {
            "logit" => "logistic",
            other => other,
        }
        .to_string()
    };
    for (dataset, n_categories) in [("housing", 3), ("wine", 5)] {
        let data = load_dataset(dataset);
        for (link_name, link) in LINKS {
            let case = format!("{dataset}_{}_polr", polr_method(link_name));
            let fit = fit_cumulative_link(
                &data.design,
                &data.response,
                n_categories,
                Some(&data.weights),
                &options(link),
            )
            .expect("valid input");
            let covariance = fit.covariance.as_ref().expect("covariance");
            let n_cut = n_categories - 1;
            let se: Vec<f64> = (0..covariance.nrows())
                .map(|r| covariance[(r, r)].sqrt())
                .collect();
            assert_close(
                &format!("{case} cut_points"),
                &fit.cut_points,
                reference(&map, &case, "cut_point"),
                1e-5,
                1e-2,
            );
            assert_close(
                &format!("{case} coefficients"),
                &fit.coefficients,
                reference(&map, &case, "coefficient"),
                1e-5,
                1e-2,
            );
            assert_close(
                &format!("{case} se cut_points"),
                &se[..n_cut],
                reference(&map, &case, "se_cut_point"),
                1e-4,
                1e-2,
            );
            assert_close(
                &format!("{case} se coefficients"),
                &se[n_cut..],
                reference(&map, &case, "se_coefficient"),
                1e-4,
                1e-2,
            );
            assert_close(
                &format!("{case} log_likelihood"),
                &[fit.log_likelihood.expect("ll")],
                reference(&map, &case, "log_likelihood"),
                1e-9,
                1.0,
            );
        }
    }
}

/// Fitted probabilities are a property of the fit, checked against the model's defining
/// identity (common practice): each row sums to one and the observed categories' log
/// probabilities, weighted, add up to the reported log-likelihood.
#[test]
fn fitted_probabilities_reproduce_log_likelihood() {
    let data = load_dataset("housing");
    for (_, link) in LINKS {
        let fit = fit_cumulative_link(
            &data.design,
            &data.response,
            3,
            Some(&data.weights),
            &options(link),
        )
        .expect("fit");
        let probabilities =
            cumulative_link_probabilities(&fit, &data.design).expect("probabilities");
        let mut log_likelihood = 0.0;
        for row in 0..data.design.nrows() {
            let total: f64 = (0..3).map(|j| probabilities[(row, j)]).sum();
            assert!((total - 1.0).abs() < 1e-12, "row {row} sums to {total}");
            log_likelihood += data.weights[row] * probabilities[(row, data.response[row])].ln();
        }
        let reported = fit.log_likelihood.expect("ll");
        assert!(
            (log_likelihood - reported).abs() <= 1e-12 * reported.abs(),
            "{log_likelihood} vs {reported}"
        );
    }
}

/// Source: likelihood-ratio statistic 2 (logLik(clm with nominal = ~term) - logLik(clm)) from
/// ordinal::clm fits with tight tolerances, and ordinal::nominal_test's LRT and Df (default
/// tolerances, so compared at 1e-6 relative). Columns are the design columns of each term.
#[test]
fn nominal_effects_likelihood_ratio_matches_ordinal() {
    let map = load_reference("reference_values.csv");
    let cases: [(&str, usize, &str, Vec<usize>); 7] = [
        ("wine", 5, "temp", vec![0]),
        ("wine", 5, "contact", vec![1]),
        ("housing", 3, "Infl", vec![0, 1]),
        ("housing", 3, "Type", vec![2, 3, 4]),
        ("housing", 3, "Cont", vec![5]),
        ("warpbreaks", 3, "breaks", vec![0]),
        ("warpbreaks", 3, "wool", vec![1]),
    ];
    for (dataset, n_categories, term, columns) in cases {
        let data = load_dataset(dataset);
        let case = format!("{dataset}_nominal_{term}");
        let proportional = fit_cumulative_link(
            &data.design,
            &data.response,
            n_categories,
            Some(&data.weights),
            &options(CumulativeLink::Logit),
        )
        .expect("fit");
        let nominal = fit_nominal_effects(
            &data.design,
            &data.response,
            n_categories,
            Some(&data.weights),
            &columns,
            &options(CumulativeLink::Logit),
        )
        .expect("fit");
        let statistic =
            2.0 * (nominal.log_likelihood.expect("ll") - proportional.log_likelihood.expect("ll"));
        let df = (n_categories - 2) * columns.len();
        assert_eq!(
            df as f64,
            reference(&map, &case, "df")[0],
            "{case} df (ordinal::nominal_test Df)"
        );
        assert_close(
            &format!("{case} nominal logLik"),
            &[nominal.log_likelihood.expect("ll")],
            reference(&map, &case, "log_likelihood"),
            1e-9,
            1.0,
        );
        assert_close(
            &format!("{case} LRT vs clm fits"),
            &[statistic],
            reference(&map, &case, "lrt"),
            1e-6,
            1e-3,
        );
        assert_close(
            &format!("{case} LRT vs nominal_test"),
            &[statistic],
            reference(&map, &case, "lrt_nominal_test"),
            1e-6,
            1e-3,
        );
        assert_eq!(nominal.n_rows_with_crossing, 0, "{case}");
        if (dataset, term) == ("wine", "temp") {
            // No warm wine is rated 1 and no cold wine 5, so temp's effect at the outer
            // cut-points diverges; clm warns that its Hessian is singular for this fit.
            assert_eq!(
                nominal.stop_reason,
                StopReason::Separation { columns: vec![0] },
                "{case}"
            );
        } else {
            assert!(
                matches!(nominal.stop_reason, StopReason::Converged { .. }),
                "{case}: {:?}",
                nominal.stop_reason
            );
        }
    }
}

/// Source: Brant's (1990) Wald statistic assembled by hand in make_reference.R from R's glm
/// binary fits (glm.control(epsilon = 1e-15)) and Brant's covariance formula; per term and
/// overall, with df. Tolerance 1e-9 relative (measured agreement better than 1.5e-12).
#[test]
fn brant_test_matches_hand_computation_in_r() {
    let map = load_reference("reference_values.csv");
    let cases: [(&str, usize, Vec<Vec<usize>>); 2] = [
        ("housing", 3, vec![vec![0, 1], vec![2, 3, 4], vec![5]]),
        ("warpbreaks", 3, vec![vec![0], vec![1]]),
    ];
    for (dataset, n_categories, terms) in cases {
        let data = load_dataset(dataset);
        let case = format!("{dataset}_brant");
        let test = brant_test(
            &data.design,
            &data.response,
            n_categories,
            Some(&data.weights),
            &terms,
        )
        .expect("valid input");
        assert!(
            matches!(test.stop_reason, StopReason::Converged { .. }),
            "{case}: {:?}",
            test.stop_reason
        );
        let overall = test.overall.as_ref().expect("overall");
        let expected = reference(&map, &case, "overall");
        assert_close(
            &format!("{case} overall"),
            &[overall.statistic],
            &expected[..1],
            1e-9,
            1e-3,
        );
        assert_eq!(overall.df as f64, expected[1]);
        for (index, term) in test.terms.iter().enumerate() {
            let expected = reference(&map, &case, &format!("term_{index}"));
            assert_close(
                &format!("{case} term {index}"),
                &[term.statistic],
                &expected[..1],
                1e-9,
                1e-3,
            );
            assert_eq!(term.df as f64, expected[1]);
        }
        let split: Vec<f64> = (0..test.split_coefficients.nrows())
            .flat_map(|r| (0..test.split_coefficients.ncols()).map(move |c| (r, c)))
            .map(|(r, c)| test.split_coefficients[(r, c)])
            .collect();
        assert_close(
            &format!("{case} split coefficients"),
            &split,
            reference(&map, &case, "split_coefficients"),
            1e-9,
            1e-3,
        );
    }
}

/// The wine split "rating > 4" has no cold wine (table(wine$rating, wine$temp) in R), so its
/// binary fit is separated and Brant's covariance does not exist: the test must say so.
#[test]
fn brant_test_reports_separated_split() {
    let data = load_dataset("wine");
    let test = brant_test(&data.design, &data.response, 5, None, &[vec![0], vec![1]])
        .expect("valid input");
    assert_eq!(
        test.stop_reason,
        StopReason::Separation { columns: vec![0] }
    );
    assert_eq!(test.failed_split, Some(0));
    assert!(test.overall.is_none() && test.terms.is_empty());
}

/// Source: statsmodels OrderedModel (make_reference.py; versions in versions_statsmodels.txt),
/// rows expanded by the frequency weights, Newton polish with tol 1e-14. Estimates at 1e-7
/// relative; its SEs come from a numerically differentiated Hessian (they differ from clm's
/// analytic ones by up to 1.2e-6), so SEs at 1e-5.
#[test]
fn cumulative_link_matches_statsmodels_ordered_model() {
    let map = load_reference("reference_values_statsmodels.csv");
    for (dataset, n_categories) in [("housing", 3), ("wine", 5)] {
        let data = load_dataset(dataset);
        for (link_name, link) in [
            ("logit", CumulativeLink::Logit),
            ("probit", CumulativeLink::Probit),
        ] {
            let case = format!("{dataset}_{link_name}_orderedmodel");
            let fit = fit_cumulative_link(
                &data.design,
                &data.response,
                n_categories,
                Some(&data.weights),
                &options(link),
            )
            .expect("valid input");
            let covariance = fit.covariance.as_ref().expect("covariance");
            let n_cut = n_categories - 1;
            let se: Vec<f64> = (n_cut..covariance.nrows())
                .map(|r| covariance[(r, r)].sqrt())
                .collect();
            assert_close(
                &format!("{case} cut_points"),
                &fit.cut_points,
                reference(&map, &case, "cut_point"),
                1e-7,
                1e-3,
            );
            assert_close(
                &format!("{case} coefficients"),
                &fit.coefficients,
                reference(&map, &case, "coefficient"),
                1e-7,
                1e-3,
            );
            assert_close(
                &format!("{case} se coefficients"),
                &se,
                reference(&map, &case, "se_coefficient"),
                1e-5,
                1e-3,
            );
            assert_close(
                &format!("{case} log_likelihood"),
                &[fit.log_likelihood.expect("ll")],
                reference(&map, &case, "log_likelihood"),
                1e-12,
                1.0,
            );
        }
    }
}

/// Source: R's plogis, pnorm and -expm1(-exp(t)) on a grid (make_reference.R). The inverse links
/// must keep full relative precision in both tails: tolerance 1e-12 relative (the largest
/// difference seen is 1.2e-13, for pnorm(-30) = 4.9e-198, where R and libm use different
/// algorithms).
#[test]
fn inverse_links_match_r() {
    let map = load_reference("reference_values.csv");
    let grid = reference(&map, "inverse_link_grid", "t");
    for (name, link) in LINKS {
        let values: Vec<f64> = grid.iter().map(|&t| link.cdf(t)).collect();
        assert_close(
            &format!("inverse link {name}"),
            &values,
            reference(&map, "inverse_link_grid", name),
            1e-12,
            1e-300,
        );
    }
}

/// Source: the nominal-effects fits of ordinal::clm (nominal = ~term, tight tolerances). clm
/// orders its threshold parameters column-major (the J-1 intercepts, then each nominal column's
/// J-1 effects) and adds `z * alpha` to the thresholds, so cairn's `gamma_j = -alpha_j`; the
/// common coefficients follow. Estimates and SEs at 1e-7 relative (floor 1e-3). The separated
/// wine/temp fit has no clm covariance and is covered by the LR test above.
#[test]
fn nominal_effects_estimates_match_ordinal_clm() {
    let map = load_reference("reference_values.csv");
    let cases: [(&str, usize, &str, Vec<usize>); 6] = [
        ("wine", 5, "contact", vec![1]),
        ("housing", 3, "Infl", vec![0, 1]),
        ("housing", 3, "Type", vec![2, 3, 4]),
        ("housing", 3, "Cont", vec![5]),
        ("warpbreaks", 3, "breaks", vec![0]),
        ("warpbreaks", 3, "wool", vec![1]),
    ];
    for (dataset, n_categories, term, columns) in cases {
        let data = load_dataset(dataset);
        let case = format!("{dataset}_nominal_{term}");
        let fit = fit_nominal_effects(
            &data.design,
            &data.response,
            n_categories,
            Some(&data.weights),
            &columns,
            &options(CumulativeLink::Logit),
        )
        .expect("fit");
        let n_cut = n_categories - 1;
        let k = columns.len();
        let alpha = reference(&map, &case, "alpha");
        let se = reference(&map, &case, "se");
        // Rebuild cairn's order (cut-points, gamma cut-point by cut-point, common) from clm's.
        let clm_index = |ours: usize| -> (usize, f64) {
            if ours < n_cut {
                (ours, 1.0)
            } else if ours < n_cut * (1 + k) {
                let offset = ours - n_cut;
                let (cut_point, m) = (offset / k, offset % k);
                ((m + 1) * n_cut + cut_point, -1.0)
            } else {
                (ours, 1.0)
            }
        };
        let n_parameters = n_cut * (1 + k) + fit.coefficients.len();
        let mut ours = fit.cut_points.clone();
        for cut_point in 0..n_cut {
            for m in 0..k {
                ours.push(fit.nominal_coefficients[(cut_point, m)]);
            }
        }
        ours.extend_from_slice(&fit.coefficients);
        let expected: Vec<f64> = (0..n_parameters)
            .map(|i| {
                let (index, sign) = clm_index(i);
                if index < alpha.len() {
                    sign * alpha[index]
                } else {
                    reference(&map, &case, "beta")[index - alpha.len()]
                }
            })
            .collect();
        let covariance = fit.covariance.as_ref().expect("covariance");
        let ours_se: Vec<f64> = (0..n_parameters)
            .map(|i| covariance[(i, i)].sqrt())
            .collect();
        let expected_se: Vec<f64> = (0..n_parameters).map(|i| se[clm_index(i).0]).collect();
        assert_close(&format!("{case} estimates"), &ours, &expected, 1e-7, 1e-3);
        assert_close(&format!("{case} se"), &ours_se, &expected_se, 1e-7, 1e-3);
    }
}
