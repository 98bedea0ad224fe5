//! Inference for the normal linear model (ANCOVA): t tests, the F test of
//! treatment, contrasts and adjusted means, all with the residual degrees of
//! freedom as reference.

use super::distributions::f_upper_p;
use super::{
    AnalysisInference, ArmMean, CoefficientRow, ContrastResult, FitStatistics, JointTest, bilinear,
    contrast_vector, wald_estimate,
};
use crate::design::{Design, DesignMatrix};
use crate::models::linear::{
    LeastSquaresFit, LeastSquaresOptions, fit_least_squares, fit_least_squares_in_place,
    fit_least_squares_rows,
};
use crate::plan::Contrast;
use nalgebra::DMatrix;

/// Fit the planned linear model to `design` and infer from it. A dense design's matrix serves
/// as the factorization's workspace and is put back exactly before the fit returns (no n × p
/// copy); a design held as rows is factored in row blocks.
pub fn analyse(
    design: &mut Design,
    analysis: &crate::plan::Analysis,
) -> Result<AnalysisInference, String> {
    let options = LeastSquaresOptions::default();
    let fit = match &mut design.matrix {
        DesignMatrix::Dense(matrix) => {
            fit_least_squares_in_place(matrix, &design.response, &options)
        }
        DesignMatrix::Rows(rows) => fit_least_squares_rows(rows, &design.response, &options),
    }
    .map_err(|error| error.to_string())?;
    let design = &*design;
    let mut inference = infer(design, &fit, &analysis.contrasts, analysis.confidence_level)?;
    if analysis
        .checks
        .contains(&crate::plan::Check::TreatmentByStratum)
    {
        let name = "Treatment-by-stratum interaction (supportive)".to_string();
        let (extended, added) = super::with_interactions(design);
        let outcome = if added == 0 {
            Err("no interaction columns could be formed".to_string())
        } else {
            fit_least_squares(&extended, &design.response, &LeastSquaresOptions::default())
                .map_err(|error| error.to_string())
                .and_then(|bigger| {
                    let df1 = bigger.rank.saturating_sub(fit.rank);
                    let df2 = bigger.residual_df;
                    if df1 == 0 || df2 == 0 || bigger.residual_sum_of_squares <= 0.0 {
                        return Err("the interaction model leaves no degrees of freedom to test"
                            .to_string());
                    }
                    let statistic = ((fit.residual_sum_of_squares
                        - bigger.residual_sum_of_squares)
                        / df1 as f64)
                        / (bigger.residual_sum_of_squares / df2 as f64);
                    let p_value = f_upper_p(statistic.max(0.0), df1 as f64, df2 as f64)
                        .ok_or_else(|| "the F p-value could not be computed".to_string())?;
                    Ok(JointTest {
                        statistic_name: "F",
                        statistic: statistic.max(0.0),
                        df1: df1 as f64,
                        df2: Some(df2 as f64),
                        p_value,
                    })
                })
        };
        let check = super::heterogeneity_outcome(name, outcome, analysis.check_level);
        if check.failed {
            inference.findings.push(super::Finding {
                code: "CHECK-FAILED",
                severity: "minor",
                message: format!("{}: {}", check.name, check.verdict),
            });
        }
        inference.checks.push(check);
    }
    Ok(inference)
}

/// Infer from `fit` of `design`; intervals at `confidence_level` (two-sided).
pub fn infer(
    design: &Design,
    fit: &LeastSquaresFit,
    contrasts: &[Contrast],
    confidence_level: f64,
) -> Result<AnalysisInference, String> {
    let residual_df = fit.residual_df;
    let residual_sd = fit.residual_standard_deviation().ok_or_else(|| {
        "no residual degrees of freedom are left, so no standard error can be estimated".to_string()
    })?;
    if residual_sd == 0.0 {
        return Err(
            "the model fits the data exactly (residual SD is zero); standard errors are undefined"
                .to_string(),
        );
    }
    let df = residual_df as f64;
    let variance = residual_sd * residual_sd;
    let covariance: DMatrix<f64> = &fit.unscaled_covariance * variance;
    let aliased: Vec<bool> = fit.coefficients.iter().map(Option::is_none).collect();

    let coefficients = (0..design.column_names.len())
        .map(|column| CoefficientRow {
            name: design.column_names[column].clone(),
            term: design.terms[design.column_terms[column]].name.clone(),
            category: None,
            estimate: fit.coefficients[column].and_then(|value| {
                wald_estimate(
                    value,
                    covariance[(column, column)].sqrt(),
                    Some(df),
                    confidence_level,
                )
                .ok()
            }),
        })
        .collect();

    let beta: Vec<f64> = fit
        .coefficients
        .iter()
        .map(|value| value.unwrap_or(0.0))
        .collect();
    let treatment_test = treatment_f_test(design, fit, &beta, &covariance, df);

    let contrast_results = contrasts
        .iter()
        .map(|contrast| {
            let estimate = contrast_vector(design, &aliased, contrast.arm, contrast.versus)
                .and_then(|weights| {
                    let value: f64 = weights.iter().zip(&beta).map(|(w, b)| w * b).sum();
                    wald_estimate(
                        value,
                        bilinear(&weights, &covariance, &weights).sqrt(),
                        Some(df),
                        confidence_level,
                    )
                });
            ContrastResult {
                id: contrast.id.clone(),
                arm: contrast.arm,
                versus: contrast.versus,
                category: None,
                estimate,
                ratio: None,
                interval_method: "Wald",
                joint: None,
            }
        })
        .collect();

    let adjusted_means = (0..design.treatment_columns.len())
        .map(|arm| {
            let estimate = if design.treatment_columns[arm].is_some_and(|column| aliased[column]) {
                Err("its treatment indicator is aliased".to_string())
            } else {
                let weights = averaged_row(design, arm);
                let value: f64 = weights.iter().zip(&beta).map(|(w, b)| w * b).sum();
                wald_estimate(
                    value,
                    bilinear(&weights, &covariance, &weights).sqrt(),
                    Some(df),
                    confidence_level,
                )
            };
            ArmMean { arm, estimate }
        })
        .collect();

    let r_squared = fit.r_squared(&design.response, true);
    let n = fit.n_observations as f64;
    let adjusted_r_squared = r_squared.map(|r2| 1.0 - (1.0 - r2) * (n - 1.0) / df);
    let (treatment_tests, treatment_test_failure) = match treatment_test {
        Ok(test) => (vec![test], None),
        Err(reason) => (Vec::new(), Some(reason)),
    };
    Ok(AnalysisInference {
        model_words: "A linear model (analysis of covariance) was fitted by least squares"
            .to_string(),
        model_details:
            "Standard errors use the residual variance on the residual degrees of freedom."
                .to_string(),
        fit: FitStatistics {
            n_analysed: fit.n_observations,
            n_parameters: fit.n_columns,
            rank: fit.rank,
            stop_reason: "exact solution".to_string(),
            converged: true,
            refinement_steps: Some(fit.refinement_steps),
            residual_df: Some(residual_df),
            residual_sd: Some(residual_sd),
            r_squared,
            adjusted_r_squared,
            aliased_columns: fit
                .aliased_columns
                .iter()
                .map(|&column| design.column_names[column].clone())
                .collect(),
            ..FitStatistics::default()
        },
        coefficients,
        treatment_tests,
        treatment_test_failure,
        contrasts: contrast_results,
        effect_scale: "difference",
        ratio_name: None,
        adjusted_means,
        marginal: None,
        checks: Vec::new(),
        findings: Vec::new(),
        fallback_used: None,
    })
}

/// The design row averaged over all analysed subjects with the treatment set
/// to `arm` for everyone.
pub(crate) fn averaged_row(design: &Design, arm: usize) -> Vec<f64> {
    let n = design.n_rows() as f64;
    let sums = design.matrix.column_sums();
    (0..design.column_names.len())
        .map(|column| {
            if let Some(position) = design
                .treatment_columns
                .iter()
                .position(|indicator| *indicator == Some(column))
            {
                f64::from(u8::from(position == arm))
            } else {
                sums[column] / n
            }
        })
        .collect()
}

/// The F test that every non-reference arm's coefficient is zero, as the Wald
/// form βₜᵀ Vₜ⁻¹ βₜ / q, which equals the extra-sum-of-squares F for a
/// linear model.
fn treatment_f_test(
    design: &Design,
    fit: &LeastSquaresFit,
    beta: &[f64],
    covariance: &DMatrix<f64>,
    df: f64,
) -> Result<JointTest, String> {
    let columns: Vec<usize> = design
        .treatment_columns
        .iter()
        .flatten()
        .copied()
        .filter(|&column| fit.coefficients[column].is_some())
        .collect();
    let wald = super::wald_chi_square(beta, covariance, &columns)?;
    let q = wald.df1;
    let statistic = wald.statistic / q;
    let p_value = f_upper_p(statistic, q, df)
        .ok_or_else(|| "the F p-value could not be computed".to_string())?;
    Ok(JointTest {
        statistic_name: "F",
        statistic,
        df1: q,
        df2: Some(df),
        p_value,
    })
}
