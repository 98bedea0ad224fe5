//! Inference for generalised linear models (binary, count and positive
//! skewed endpoints): the planned fit with its fallbacks, Wald and
//! likelihood-ratio tests of treatment, contrasts on the link scale and
//! exponentiated, optional profile-likelihood limits, and the
//! treatment-by-stratum check.

use super::distributions::normal_quantile;
use super::{
    AnalysisInference, CheckOutcome, CoefficientRow, ContrastResult, Finding, FitStatistics,
    bilinear, contrast_vector, describe_stop, exponentiate, likelihood_ratio, wald_chi_square,
    wald_estimate,
};
use crate::design::Design;
use crate::models::StopReason;
use crate::models::glm::{
    CovarianceKind, Family, GlmData, GlmFit, GlmOptions, Link, Method, fit_glm, profile_interval,
};
use crate::plan::{Analysis, Check, Fallback, GlmFamily, GlmSpec};

/// The planned options for a GLM specification.
fn options_for(spec: &GlmSpec, family: GlmFamily, method: Method) -> GlmOptions {
    let engine_family = match family {
        GlmFamily::Binomial => Family::Binomial,
        GlmFamily::Poisson => Family::Poisson,
        GlmFamily::NegativeBinomial => Family::NegativeBinomial { theta: None },
        GlmFamily::Gamma => Family::Gamma,
    };
    let mut options = GlmOptions::new(engine_family, spec.link);
    options.method = method;
    options.covariance = if spec.sandwich {
        CovarianceKind::SandwichHc0
    } else {
        CovarianceKind::ModelBased
    };
    options
}

fn family_words(family: GlmFamily, link: Link) -> String {
    let link_name = match link {
        Link::Logit => "logit",
        Link::Probit => "probit",
        Link::CLogLog => "complementary log-log",
        Link::Log => "log",
        Link::Inverse => "inverse",
        Link::Identity => "identity",
    };
    match family {
        GlmFamily::Binomial => format!("A binomial generalised linear model with {link_name} link"),
        GlmFamily::Poisson => "A Poisson generalised linear model with log link".to_string(),
        GlmFamily::NegativeBinomial => "A negative binomial (NB2, variance μ + μ²/θ, θ by maximum likelihood) generalised linear model with log link".to_string(),
        GlmFamily::Gamma => format!("A Gamma generalised linear model with {link_name} link (dispersion estimated by Pearson chi-square / residual df)"),
    }
}

/// The scale of contrasts and, for log and logit links, the name of the exponentiated scale.
fn scales(
    family: GlmFamily,
    link: Link,
    has_exposure: bool,
) -> (&'static str, Option<&'static str>) {
    match (family, link) {
        (_, Link::Logit) => ("log odds ratio", Some("odds ratio")),
        (GlmFamily::Poisson | GlmFamily::NegativeBinomial, Link::Log) if has_exposure => {
            ("log rate ratio", Some("rate ratio"))
        }
        (GlmFamily::Poisson | GlmFamily::NegativeBinomial, Link::Log) => {
            ("log ratio of means", Some("ratio of means"))
        }
        (_, Link::Log) => ("log ratio of means", Some("ratio of means")),
        (_, Link::Probit) => ("difference on the probit scale", None),
        (_, Link::CLogLog) => ("difference on the complementary log-log scale", None),
        (_, Link::Inverse) => ("difference on the inverse scale", None),
        (_, Link::Identity) => ("difference", None),
    }
}

/// Fit the planned GLM to `design` and infer from it.
pub fn analyse(
    design: &Design,
    analysis: &Analysis,
    spec: &GlmSpec,
) -> Result<AnalysisInference, String> {
    let mut data = GlmData::from_input(design.matrix.input(), &design.response);
    if let Some(offset) = &design.offset {
        data = data.with_offset(offset);
    }
    let mut findings = Vec::new();
    let mut fallback_used = None;
    let mut family = spec.family;
    let mut method = spec.method;
    let mut options = options_for(spec, family, method);
    let mut fit = fit_glm(&data, &options).map_err(|error| error.to_string())?;

    if let StopReason::Separation { columns } = &fit.stop_reason {
        let described = describe_stop(&fit.stop_reason, &design.column_names);
        if analysis.fallbacks.contains(&Fallback::FirthOnSeparation) {
            method = Method::Firth;
            options = options_for(spec, family, method);
            fit = fit_glm(&data, &options).map_err(|error| error.to_string())?;
            let message = format!(
                "{described}; as planned, the model was refitted by Firth's penalised likelihood"
            );
            findings.push(Finding {
                code: "FALLBACK-USED",
                severity: "minor",
                message: message.clone(),
            });
            fallback_used = Some(message);
        } else {
            let _ = columns;
            return Err(format!(
                "{described}: the maximum-likelihood estimates do not exist and no fallback was planned"
            ));
        }
    }
    if family == GlmFamily::Poisson
        && matches!(
            fit.stop_reason,
            StopReason::Converged { .. } | StopReason::SingularDesign { .. }
        )
    {
        let threshold = analysis
            .fallbacks
            .iter()
            .find_map(|fallback| match fallback {
                Fallback::NegativeBinomialAbove(threshold) => Some(*threshold),
                _ => None,
            });
        let ratio = fit.pearson_chi_square / fit.residual_df.max(1) as f64;
        if let Some(threshold) = threshold
            && ratio > threshold
        {
            family = GlmFamily::NegativeBinomial;
            options = options_for(spec, family, method);
            fit = fit_glm(&data, &options).map_err(|error| error.to_string())?;
            let message = format!(
                "Pearson chi-square / df of the Poisson fit is {ratio:.3}, above the planned {threshold}; as planned, a negative binomial model was fitted instead"
            );
            findings.push(Finding {
                code: "FALLBACK-USED",
                severity: "minor",
                message: message.clone(),
            });
            fallback_used = Some(message);
        }
    }
    match &fit.stop_reason {
        StopReason::Converged { .. } | StopReason::SingularDesign { .. } => {}
        other => return Err(describe_stop(other, &design.column_names)),
    }

    let confidence_level = analysis.confidence_level;
    let df = fit.dispersion_estimated.then_some(fit.residual_df as f64);
    let aliased: Vec<bool> = fit.coefficients.iter().map(Option::is_none).collect();
    let beta: Vec<f64> = fit
        .coefficients
        .iter()
        .map(|value| value.unwrap_or(0.0))
        .collect();
    let covariance = &fit.covariance;
    let coefficients = (0..design.column_names.len())
        .map(|column| CoefficientRow {
            name: design.column_names[column].clone(),
            term: design.terms[design.column_terms[column]].name.clone(),
            category: None,
            estimate: fit.coefficients[column].and_then(|value| {
                wald_estimate(
                    value,
                    covariance[(column, column)].sqrt(),
                    df,
                    confidence_level,
                )
                .ok()
            }),
        })
        .collect();

    // Overall tests of treatment: joint Wald and likelihood ratio against the model without treatment.
    let treatment_columns: Vec<usize> = design
        .treatment_columns
        .iter()
        .flatten()
        .copied()
        .filter(|&column| !aliased[column])
        .collect();
    let mut treatment_tests = Vec::new();
    let mut failures = Vec::new();
    match wald_chi_square(&beta, covariance, &treatment_columns) {
        Ok(test) => treatment_tests.push(test),
        Err(reason) => failures.push(reason),
    }
    // The fit's per-subject vectors serve only as the profile limits' warm start; without
    // those limits they are freed before the model without treatment is fitted.
    if !(spec.profile_intervals && method == Method::MaximumLikelihood) {
        fit.fitted_means = Vec::new();
        fit.linear_predictors = Vec::new();
    }
    match likelihood_ratio_test(design, &data, &options, &fit, &treatment_columns) {
        Ok(test) => treatment_tests.push(test),
        Err(reason) => failures.push(format!("likelihood-ratio test: {reason}")),
    }

    let (effect_scale, ratio_name) = scales(family, spec.link, design.offset.is_some());
    let profile = spec.profile_intervals && method == Method::MaximumLikelihood;
    let critical = normal_quantile(0.5 + confidence_level / 2.0);
    let contrasts = analysis
        .contrasts
        .iter()
        .map(|contrast| {
            let mut interval_method = "Wald";
            let estimate = contrast_vector(design, &aliased, contrast.arm, contrast.versus)
                .and_then(|weights| {
                    let value: f64 = weights.iter().zip(&beta).map(|(w, b)| w * b).sum();
                    let mut estimate = wald_estimate(
                        value,
                        bilinear(&weights, covariance, &weights).sqrt(),
                        df,
                        confidence_level,
                    )?;
                    // Profile limits exist for a single coefficient: a contrast against the reference arm.
                    let single = weights.iter().filter(|weight| **weight != 0.0).count() == 1;
                    if let (true, true, Some(critical)) = (profile, single, critical) {
                        let column = weights
                            .iter()
                            .position(|weight| *weight != 0.0)
                            .unwrap_or(0);
                        let sign = weights[column];
                        if let Ok(interval) =
                            profile_interval(&data, &options, &fit, column, critical)
                        {
                            let (lower, upper) = if sign > 0.0 {
                                (interval.lower, interval.upper)
                            } else {
                                (-interval.upper, -interval.lower)
                            };
                            if lower.is_finite() && upper.is_finite() {
                                estimate.lower = lower;
                                estimate.upper = upper;
                                interval_method = "profile likelihood";
                            }
                        }
                    }
                    Ok(estimate)
                });
            let ratio = match (ratio_name, &estimate) {
                (Some(_), Ok(estimate)) => exponentiate(estimate),
                _ => None,
            };
            ContrastResult {
                id: contrast.id.clone(),
                arm: contrast.arm,
                versus: contrast.versus,
                category: None,
                estimate,
                ratio,
                interval_method,
                joint: None,
            }
        })
        .collect();

    let mut checks = Vec::new();
    if analysis.checks.contains(&Check::TreatmentByStratum) {
        checks.push(heterogeneity_check(
            design,
            &data,
            &options,
            &fit,
            analysis.check_level,
        ));
    }
    for check in &checks {
        if check.failed {
            findings.push(Finding {
                code: "CHECK-FAILED",
                severity: "minor",
                message: format!("{}: {}", check.name, check.verdict),
            });
        }
    }

    let mut model_words = family_words(family, spec.link);
    model_words.push_str(match method {
        Method::Firth => " was fitted by Firth's penalised likelihood",
        Method::MaximumLikelihood => {
            " was fitted by maximum likelihood (iteratively reweighted least squares)"
        }
    });
    if design.offset.is_some() {
        model_words.push_str(", with the log of the exposure as offset,");
    }
    let mut model_details = if spec.sandwich {
        "Standard errors are White's heteroscedasticity-consistent (HC0) sandwich estimates."
            .to_string()
    } else {
        "Standard errors come from the expected (Fisher) information at the estimate.".to_string()
    };
    if profile {
        model_details.push_str(" Confidence limits for comparisons with the reference arm are profile-likelihood limits.");
    }

    Ok(AnalysisInference {
        model_words,
        model_details,
        fit: FitStatistics {
            n_analysed: design.n_rows(),
            n_parameters: design.column_names.len(),
            rank: fit.rank,
            stop_reason: describe_stop(&fit.stop_reason, &design.column_names),
            converged: true,
            iterations: Some(fit.iterations),
            residual_df: Some(fit.residual_df),
            deviance: Some(fit.deviance),
            null_deviance: fit.null_deviance,
            log_likelihood: Some(fit.penalised_log_likelihood.unwrap_or(fit.log_likelihood)),
            dispersion: fit.dispersion_estimated.then_some(fit.dispersion),
            pearson_chi_square: Some(fit.pearson_chi_square),
            theta: fit.theta.as_ref().map(|theta| theta.theta),
            theta_standard_error: fit.theta.as_ref().and_then(|theta| theta.standard_error),
            aliased_columns: fit
                .aliased_columns
                .iter()
                .map(|&column| design.column_names[column].clone())
                .collect(),
            ..FitStatistics::default()
        },
        coefficients,
        treatment_tests,
        treatment_test_failure: (!failures.is_empty()).then(|| failures.join("; ")),
        contrasts,
        effect_scale,
        ratio_name,
        adjusted_means: Vec::new(),
        marginal: Some(marginal_summary(
            design, analysis, &options, &fit, family, spec.link, method,
        )),
        checks,
        findings,
        fallback_used,
    })
}

/// The comparable log-likelihood of a fit: penalised for Firth, and for
/// Gamma the deviance scaled by the full model's dispersion.
fn comparable(fit: &GlmFit) -> f64 {
    fit.penalised_log_likelihood.unwrap_or(fit.log_likelihood)
}

/// Likelihood-ratio test of the treatment columns: the same model refitted without them.
fn likelihood_ratio_test(
    design: &Design,
    data: &GlmData<'_>,
    options: &GlmOptions,
    fit: &GlmFit,
    treatment_columns: &[usize],
) -> Result<super::JointTest, String> {
    // The reduced model reads the same design without its treatment columns (no copy).
    let kept: Vec<usize> = (0..design.matrix.ncols())
        .filter(|column| !treatment_columns.contains(column))
        .collect();
    let mut reduced_data =
        GlmData::from_input(design.matrix.input(), data.response).with_columns(&kept);
    if let Some(offset) = data.offset {
        reduced_data = reduced_data.with_offset(offset);
    }
    let reduced = fit_glm(&reduced_data, options).map_err(|error| error.to_string())?;
    if !matches!(
        reduced.stop_reason,
        StopReason::Converged { .. } | StopReason::SingularDesign { .. }
    ) {
        return Err(format!(
            "the model without treatment {}",
            describe_stop(&reduced.stop_reason, &[])
        ));
    }
    if fit.dispersion_estimated {
        // Gamma: the scaled deviance difference, with the full model's dispersion.
        let statistic = ((reduced.deviance - fit.deviance) / fit.dispersion).max(0.0);
        let p_value =
            super::distributions::chi_square_upper_p(statistic, treatment_columns.len() as f64)
                .ok_or_else(|| "p-value not computable".to_string())?;
        return Ok(super::JointTest {
            statistic_name: "likelihood ratio",
            statistic,
            df1: treatment_columns.len() as f64,
            df2: None,
            p_value,
        });
    }
    likelihood_ratio(
        comparable(fit),
        comparable(&reduced),
        treatment_columns.len(),
    )
}

/// Treatment-by-stratum interaction added to the planned model, tested by
/// likelihood ratio; supportive only (ICH E9 discusses centre effects).
fn heterogeneity_check(
    design: &Design,
    data: &GlmData<'_>,
    options: &GlmOptions,
    fit: &GlmFit,
    level: f64,
) -> CheckOutcome {
    let name = "Treatment-by-stratum interaction (supportive)".to_string();
    let (extended, added) = super::with_interactions(design);
    if added == 0 {
        return CheckOutcome {
            name,
            rows: Vec::new(),
            failed: false,
            verdict: "no interaction columns could be formed".to_string(),
            details: Vec::new(),
        };
    }
    let mut extended_data = GlmData::new(&extended, data.response);
    if let Some(offset) = data.offset {
        extended_data = extended_data.with_offset(offset);
    }
    let outcome = fit_glm(&extended_data, options)
        .map_err(|error| error.to_string())
        .and_then(|bigger| {
            if !matches!(
                bigger.stop_reason,
                StopReason::Converged { .. } | StopReason::SingularDesign { .. }
            ) {
                return Err(describe_stop(&bigger.stop_reason, &[]));
            }
            let df = bigger.rank.saturating_sub(fit.rank);
            if fit.dispersion_estimated {
                let statistic = ((fit.deviance - bigger.deviance) / bigger.dispersion).max(0.0);
                let p_value = super::distributions::chi_square_upper_p(statistic, df as f64)
                    .ok_or_else(|| "p-value not computable".to_string())?;
                Ok(super::JointTest {
                    statistic_name: "likelihood ratio",
                    statistic,
                    df1: df as f64,
                    df2: None,
                    p_value,
                })
            } else {
                likelihood_ratio(comparable(&bigger), comparable(fit), df)
            }
        });
    super::heterogeneity_outcome(name, outcome, level)
}

/// Standardised arm means and their contrasts (2023 US FDA guidance on
/// covariate adjustment). The variance is Ye, Shao, Yi and Zhao's (2023)
/// model-robust estimator when the fit is a maximum-likelihood fit with the
/// canonical link (so residuals balance within arms); otherwise the
/// influence-function (sandwich) estimator of the joint M-estimator.
fn marginal_summary(
    design: &Design,
    analysis: &Analysis,
    options: &GlmOptions,
    fit: &GlmFit,
    family: GlmFamily,
    link: Link,
    method: Method,
) -> Result<super::MarginalSummary, String> {
    use super::marginal::{
        EffectScale, MarginalInput, MarginalVariance, marginal_effects, marginal_means,
    };
    let canonical = matches!(
        (family, link),
        (GlmFamily::Binomial, Link::Logit) | (GlmFamily::Poisson, Link::Log)
    );
    let (variance, words) = if canonical && method == Method::MaximumLikelihood {
        (
            MarginalVariance::Robust,
            "the model-robust variance of Ye, Shao, Yi and Zhao (2023), which accounts for the covariates being sampled",
        )
    } else {
        (
            MarginalVariance::InfluenceFunction,
            "the influence-function (sandwich) variance of the standardised means, which accounts for the covariates being sampled",
        )
    };
    let engine_family = match (&options.family, fit.theta.as_ref()) {
        (Family::NegativeBinomial { .. }, Some(theta)) => Family::NegativeBinomial {
            theta: Some(theta.theta),
        },
        (other, _) => *other,
    };
    let coefficients: Vec<f64> = fit
        .coefficients
        .iter()
        .map(|value| value.unwrap_or(0.0))
        .collect();
    let input = MarginalInput {
        design: design.matrix.input(),
        response: &design.response,
        offset: design.offset.as_deref(),
        treatment_columns: &design.treatment_columns,
        arm_of_row: &design.arm_of_row,
        coefficients: &coefficients,
        coefficient_covariance: Some(&fit.covariance),
        family: engine_family,
        link,
        variance,
    };
    let means = marginal_means(&input).map_err(|error| error.to_string())?;
    let binary = family == GlmFamily::Binomial;
    let scales: Vec<(EffectScale, &'static str)> = if binary {
        vec![
            (EffectScale::Difference, "risk difference"),
            (EffectScale::Ratio, "risk ratio"),
            (EffectScale::OddsRatio, "odds ratio"),
        ]
    } else {
        vec![
            (EffectScale::Difference, "mean difference"),
            (EffectScale::Ratio, "ratio of means"),
        ]
    };
    let pairs: Vec<(usize, usize)> = analysis
        .contrasts
        .iter()
        .map(|contrast| (contrast.arm, contrast.versus))
        .collect();
    let critical = normal_quantile(0.5 + analysis.confidence_level / 2.0)
        .ok_or_else(|| "the normal quantile could not be computed".to_string())?;
    let scale_list: Vec<EffectScale> = scales.iter().map(|(scale, _)| *scale).collect();
    let effects = marginal_effects(&means, &pairs, &scale_list, critical)
        .map_err(|error| error.to_string())?;
    let mut contrasts = Vec::new();
    for effect in &effects {
        let Some(contrast) = analysis
            .contrasts
            .iter()
            .find(|contrast| contrast.arm == effect.arm && contrast.versus == effect.versus)
        else {
            continue;
        };
        let scale = scales
            .iter()
            .find(|(scale, _)| *scale == effect.scale)
            .map(|(_, name)| *name)
            .unwrap_or("difference");
        contrasts.push(super::MarginalContrast {
            id: contrast.id.clone(),
            arm: effect.arm,
            versus: effect.versus,
            scale,
            estimate: effect.estimate,
            standard_error: effect.standard_error,
            lower: effect.lower,
            upper: effect.upper,
            p_value: effect.p_value,
        });
    }
    Ok(super::MarginalSummary {
        variance: words.to_string(),
        means: means
            .arms
            .iter()
            .map(|arm| (arm.arm, arm.mean, arm.standard_error))
            .collect(),
        effects: contrasts,
    })
}
