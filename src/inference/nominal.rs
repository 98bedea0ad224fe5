//! Inference for nominal endpoints: the baseline-category (multinomial) logit
//! log(P(Y = k) / P(Y = reference)) = xᵀβₖ, with coefficients per
//! non-reference category, contrasts as log relative-risk ratios and their
//! exponentials per category, and overall Wald and likelihood-ratio tests of
//! treatment across all categories.

use super::{
    AnalysisInference, CoefficientRow, ContrastResult, FitStatistics, bilinear, contrast_vector,
    describe_stop, likelihood_ratio, wald_chi_square, wald_estimate,
};
use crate::design::Design;
use crate::models::DesignColumns;
use crate::models::StopReason;
use crate::models::multinomial::{
    MultinomialOptions, fit_multinomial_logit, fit_multinomial_logit_on,
};
use crate::plan::Analysis;

pub fn analyse(
    design: &Design,
    analysis: &Analysis,
    reference_category: usize,
) -> Result<AnalysisInference, String> {
    let levels = &design.response_levels;
    let response: Vec<usize> = design
        .response
        .iter()
        .map(|&value| value as usize)
        .collect();
    let mut counts = vec![0usize; levels.len()];
    for &category in &response {
        counts[category] += 1;
    }
    if let Some(empty) = counts.iter().position(|&count| count == 0) {
        return Err(format!(
            "outcome category \"{}\" has no analysed subjects",
            levels[empty]
        ));
    }
    let options = MultinomialOptions::default();
    let all_columns = crate::models::every_column(design.matrix.ncols());
    let full_view = DesignColumns::of(design.matrix.input(), &all_columns)
        .ok_or_else(|| "internal error: the design's columns are out of range".to_string())?;
    let fit = fit_multinomial_logit_on(
        full_view,
        &response,
        levels.len(),
        reference_category,
        None,
        &options,
    )
    .map_err(|error| error.to_string())?;
    if !matches!(fit.stop_reason, StopReason::Converged { .. }) {
        return Err(describe_stop(&fit.stop_reason, &design.column_names));
    }
    let covariance = fit.covariance.clone().ok_or_else(|| {
        "the information matrix is not positive definite at the estimate".to_string()
    })?;
    let p = design.column_names.len();
    let confidence_level = analysis.confidence_level;
    // Parameters in category-major order: position · p + column.
    let parameters: Vec<f64> = (0..fit.non_reference_categories.len())
        .flat_map(|position| (0..p).map(move |column| (position, column)))
        .map(|(position, column)| fit.coefficients[(position, column)])
        .collect();

    let mut coefficients = Vec::new();
    for (position, &category) in fit.non_reference_categories.iter().enumerate() {
        for column in 0..p {
            let index = position * p + column;
            coefficients.push(CoefficientRow {
                name: design.column_names[column].clone(),
                term: design.terms[design.column_terms[column]].name.clone(),
                category: Some(levels[category].clone()),
                estimate: wald_estimate(
                    parameters[index],
                    covariance[(index, index)].sqrt(),
                    None,
                    confidence_level,
                )
                .ok(),
            });
        }
    }

    let treatment: Vec<usize> = design.treatment_columns.iter().flatten().copied().collect();
    let treatment_parameters: Vec<usize> = (0..fit.non_reference_categories.len())
        .flat_map(|position| treatment.iter().map(move |column| position * p + column))
        .collect();
    let mut treatment_tests = Vec::new();
    let mut failures = Vec::new();
    match wald_chi_square(&parameters, &covariance, &treatment_parameters) {
        Ok(test) => treatment_tests.push(test),
        Err(reason) => failures.push(reason),
    }
    // The reduced model reads the design without its treatment columns in place (no copy).
    let kept: Vec<usize> = (0..p)
        .filter(|column| !treatment.contains(column))
        .collect();
    let reduced_view = DesignColumns::of(design.matrix.input(), &kept).ok_or_else(|| {
        "internal error: a model column is not a column of the design".to_string()
    })?;
    match fit_multinomial_logit_on(
        reduced_view,
        &response,
        levels.len(),
        reference_category,
        None,
        &options,
    ) {
        Ok(reduced) => match (
            reduced.log_likelihood,
            fit.log_likelihood,
            &reduced.stop_reason,
        ) {
            (Some(reduced_log_likelihood), Some(full), StopReason::Converged { .. }) => {
                match likelihood_ratio(full, reduced_log_likelihood, treatment_parameters.len()) {
                    Ok(test) => treatment_tests.push(test),
                    Err(reason) => failures.push(reason),
                }
            }
            (_, _, reason) => failures.push(format!(
                "likelihood-ratio test: the model without treatment {}",
                describe_stop(reason, &[])
            )),
        },
        Err(error) => failures.push(format!("likelihood-ratio test: {error}")),
    }

    let no_alias = vec![false; p];
    let mut contrasts = Vec::new();
    for contrast in &analysis.contrasts {
        // The contrast across all categories at once, for a hypothesis about it.
        let joint = contrast_vector(design, &no_alias, contrast.arm, contrast.versus)
            .ok()
            .and_then(|by_column| {
                let rows: Vec<Vec<f64>> = (0..fit.non_reference_categories.len())
                    .map(|position| {
                        let mut weights = vec![0.0; parameters.len()];
                        for (column, weight) in by_column.iter().enumerate() {
                            weights[position * p + column] = *weight;
                        }
                        weights
                    })
                    .collect();
                super::joint_wald(&rows, &parameters, &covariance)
            });
        for (position, &category) in fit.non_reference_categories.iter().enumerate() {
            let estimate = contrast_vector(design, &no_alias, contrast.arm, contrast.versus)
                .and_then(|weights_by_column| {
                    let mut weights = vec![0.0; parameters.len()];
                    for (column, weight) in weights_by_column.iter().enumerate() {
                        weights[position * p + column] = *weight;
                    }
                    let value: f64 = weights.iter().zip(&parameters).map(|(w, b)| w * b).sum();
                    wald_estimate(
                        value,
                        bilinear(&weights, &covariance, &weights).sqrt(),
                        None,
                        confidence_level,
                    )
                });
            let ratio = estimate.as_ref().ok().and_then(super::exponentiate);
            contrasts.push(ContrastResult {
                id: contrast.id.clone(),
                arm: contrast.arm,
                versus: contrast.versus,
                category: Some(levels[category].clone()),
                estimate,
                ratio,
                interval_method: "Wald",
                joint: joint.clone(),
            });
        }
    }
    let checks = if analysis
        .checks
        .contains(&crate::plan::Check::TreatmentByStratum)
    {
        vec![heterogeneity(
            design,
            &response,
            levels.len(),
            reference_category,
            fit.log_likelihood,
            analysis.check_level,
        )]
    } else {
        Vec::new()
    };
    Ok(AnalysisInference {
        model_words: "A baseline-category (multinomial) logit model was fitted by maximum likelihood (Newton–Raphson with analytic derivatives)".to_string(),
        model_details: format!(
            "The model is log(P(Y = k) / P(Y = {0})) = xᵀβₖ for each category k other than \"{0}\", so exp of a treatment contrast is the relative-risk ratio of category k against \"{0}\". Standard errors come from the observed information.",
            levels[reference_category]
        ),
        fit: FitStatistics {
            n_analysed: design.n_rows(),
            n_parameters: parameters.len(),
            rank: parameters.len(),
            stop_reason: describe_stop(&fit.stop_reason, &[]),
            converged: true,
            iterations: Some(fit.iterations),
            log_likelihood: fit.log_likelihood,
            ..FitStatistics::default()
        },
        coefficients,
        treatment_tests,
        treatment_test_failure: (!failures.is_empty()).then(|| failures.join("; ")),
        contrasts,
        effect_scale: "log relative-risk ratio",
        ratio_name: Some("relative-risk ratio"),
        adjusted_means: Vec::new(),
        marginal: None,
        findings: checks
            .iter()
            .filter(|check| check.failed)
            .map(|check| super::Finding { code: "CHECK-FAILED", severity: "minor", message: format!("{}: {}", check.name, check.verdict) })
            .collect(),
        checks,
        fallback_used: None,
    })
}

/// Treatment-by-stratum interaction added to the planned model, tested by
/// likelihood ratio over all non-reference categories; supportive only.
fn heterogeneity(
    design: &Design,
    response: &[usize],
    n_categories: usize,
    reference_category: usize,
    log_likelihood: Option<f64>,
    level: f64,
) -> super::CheckOutcome {
    let name = "Treatment-by-stratum interaction (supportive)".to_string();
    let (extended, added) = super::with_interactions(design);
    let outcome = if added == 0 {
        Err("no interaction columns could be formed".to_string())
    } else {
        fit_multinomial_logit(
            &extended,
            response,
            n_categories,
            reference_category,
            None,
            &MultinomialOptions::default(),
        )
        .map_err(|error| error.to_string())
        .and_then(|bigger| {
            match (bigger.log_likelihood, log_likelihood, &bigger.stop_reason) {
                (
                    Some(bigger_log_likelihood),
                    Some(log_likelihood),
                    StopReason::Converged { .. },
                ) => likelihood_ratio(
                    bigger_log_likelihood,
                    log_likelihood,
                    added * (n_categories - 1),
                ),
                (_, _, reason) => Err(format!(
                    "the interaction model {}",
                    describe_stop(reason, &[])
                )),
            }
        })
    };

    super::heterogeneity_outcome(name, outcome, level)
}
