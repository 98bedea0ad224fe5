//! Inference for the normal linear model (ANCOVA): t tests, the F test of
//! treatment, contrasts and adjusted means, all with the residual degrees of
//! freedom as reference.

use super::distributions::{f_upper_p, t_quantile, t_two_sided_p};
use super::{bilinear, ArmMean, CoefficientRow, ContrastResult, Estimate, JointTest};
use crate::design::Design;
use crate::models::linear::LeastSquaresFit;
use crate::plan::Contrast;
use nalgebra::DMatrix;

/// Everything inferred from one linear fit.
#[derive(Debug, Clone, PartialEq)]
pub struct LinearInference {
    pub residual_sd: f64,
    pub residual_df: usize,
    pub r_squared: Option<f64>,
    pub adjusted_r_squared: Option<f64>,
    pub coefficients: Vec<CoefficientRow>,
    pub treatment_test: Result<JointTest, String>,
    pub contrasts: Vec<ContrastResult>,
    pub adjusted_means: Vec<ArmMean>,
}

/// Infer from `fit` of `design`; intervals at `confidence_level` (two-sided).
pub fn infer(design: &Design, fit: &LeastSquaresFit, contrasts: &[Contrast], confidence_level: f64) -> Result<LinearInference, String> {
    let residual_df = fit.residual_df;
    let residual_sd = fit
        .residual_standard_deviation()
        .ok_or_else(|| "no residual degrees of freedom are left, so no standard error can be estimated".to_string())?;
    if residual_sd == 0.0 {
        return Err("the model fits the data exactly (residual SD is zero); standard errors are undefined".to_string());
    }
    let df = residual_df as f64;
    let critical = t_quantile(0.5 + confidence_level / 2.0, df).ok_or_else(|| "the t quantile could not be computed".to_string())?;
    let variance = residual_sd * residual_sd;
    let covariance: DMatrix<f64> = &fit.unscaled_covariance * variance;

    let estimate_from = |value: f64, standard_error: f64| -> Result<Estimate, String> {
        if !(standard_error > 0.0 && standard_error.is_finite() && value.is_finite()) {
            return Err("its standard error is zero or undefined".to_string());
        }
        let statistic = value / standard_error;
        let p_value = t_two_sided_p(statistic, df).ok_or_else(|| "its p-value could not be computed".to_string())?;
        Ok(Estimate {
            value,
            standard_error,
            statistic,
            df: Some(df),
            p_value,
            lower: value - critical * standard_error,
            upper: value + critical * standard_error,
        })
    };

    let coefficients = (0..design.column_names.len())
        .map(|column| CoefficientRow {
            name: design.column_names[column].clone(),
            term: design.terms[design.column_terms[column]].name.clone(),
            estimate: fit.coefficients[column].and_then(|value| estimate_from(value, covariance[(column, column)].sqrt()).ok()),
        })
        .collect();

    let beta: Vec<f64> = fit.coefficients.iter().map(|value| value.unwrap_or(0.0)).collect();
    let treatment_test = treatment_f_test(design, fit, &beta, &covariance, df);

    let contrast_results = contrasts
        .iter()
        .map(|contrast| {
            let estimate = contrast_vector(design, fit, contrast.arm, contrast.versus).and_then(|weights| {
                let value: f64 = weights.iter().zip(&beta).map(|(w, b)| w * b).sum();
                estimate_from(value, bilinear(&weights, &covariance, &weights).sqrt())
            });
            ContrastResult { id: contrast.id.clone(), arm: contrast.arm, versus: contrast.versus, estimate }
        })
        .collect();

    let adjusted_means = (0..design.treatment_columns.len())
        .map(|arm| {
            let estimate = if design.treatment_columns[arm].is_some_and(|column| fit.coefficients[column].is_none()) {
                Err("its treatment indicator is aliased".to_string())
            } else {
                let weights = averaged_row(design, arm);
                let value: f64 = weights.iter().zip(&beta).map(|(w, b)| w * b).sum();
                estimate_from(value, bilinear(&weights, &covariance, &weights).sqrt())
            };
            ArmMean { arm, estimate }
        })
        .collect();

    let r_squared = fit.r_squared(&design.response, true);
    let n = fit.n_observations as f64;
    let adjusted_r_squared = r_squared.map(|r2| 1.0 - (1.0 - r2) * (n - 1.0) / df);
    Ok(LinearInference {
        residual_sd,
        residual_df,
        r_squared,
        adjusted_r_squared,
        coefficients,
        treatment_test,
        contrasts: contrast_results,
        adjusted_means,
    })
}

/// L for "arm minus versus": +1 on the arm's indicator, −1 on the other's (the
/// reference arm has no indicator).
fn contrast_vector(design: &Design, fit: &LeastSquaresFit, arm: usize, versus: usize) -> Result<Vec<f64>, String> {
    let mut weights = vec![0.0; design.column_names.len()];
    for (index, sign) in [(arm, 1.0), (versus, -1.0)] {
        if let Some(column) = design.treatment_columns[index] {
            if fit.coefficients[column].is_none() {
                return Err(format!("the indicator of \"{}\" is aliased with other terms", design.column_names[column]));
            }
            weights[column] += sign;
        }
    }
    Ok(weights)
}

/// The design row averaged over all analysed subjects with the treatment set
/// to `arm` for everyone.
fn averaged_row(design: &Design, arm: usize) -> Vec<f64> {
    let n = design.n_rows() as f64;
    (0..design.column_names.len())
        .map(|column| {
            if let Some(position) = design.treatment_columns.iter().position(|indicator| *indicator == Some(column)) {
                f64::from(u8::from(position == arm))
            } else {
                design.matrix.column(column).iter().sum::<f64>() / n
            }
        })
        .collect()
}

/// The F test that every non-reference arm's coefficient is zero, as the Wald
/// form βₜᵀ Vₜ⁻¹ βₜ / q, which equals the extra-sum-of-squares F for a
/// linear model.
fn treatment_f_test(design: &Design, fit: &LeastSquaresFit, beta: &[f64], covariance: &DMatrix<f64>, df: f64) -> Result<JointTest, String> {
    let columns: Vec<usize> = design.treatment_columns.iter().flatten().copied().filter(|&column| fit.coefficients[column].is_some()).collect();
    if columns.is_empty() {
        return Err("every treatment indicator is aliased".to_string());
    }
    let q = columns.len();
    let block = DMatrix::from_fn(q, q, |i, j| covariance[(columns[i], columns[j])]);
    let values = nalgebra::DVector::from_iterator(q, columns.iter().map(|&column| beta[column]));
    let cholesky = block.cholesky().ok_or_else(|| "the covariance of the treatment coefficients is singular".to_string())?;
    let solved = cholesky.solve(&values);
    let wald = values.dot(&solved);
    let statistic = wald / q as f64;
    let p_value = f_upper_p(statistic, q as f64, df).ok_or_else(|| "the F p-value could not be computed".to_string())?;
    Ok(JointTest { statistic_name: "F", statistic, df1: q as f64, df2: Some(df), p_value })
}
