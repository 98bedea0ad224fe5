//! Inference for ordinal endpoints: the cumulative link model
//! g(P(Y ≤ j | x)) = θⱼ − xᵀβ (β > 0 moves subjects toward higher
//! categories), with the plan's fallback for an empty outcome category, Wald
//! and likelihood-ratio tests of treatment, contrasts as log odds ratios and
//! odds ratios (logit link), the proportional-odds checks (likelihood ratio
//! against the model in which a term's effect varies by cut-point, and
//! Brant's Wald test from separate binary fits), the treatment-by-stratum
//! check, and the supportive stratified Cochran–Mantel–Haenszel tests.

use super::cmh::{StratifiedTable, cmh_tests};
use super::distributions::chi_square_upper_p;
use super::{
    AnalysisInference, CheckOutcome, CheckRow, CoefficientRow, ContrastResult, Finding,
    FitStatistics, bilinear, contrast_vector, describe_stop, likelihood_ratio, wald_chi_square,
    wald_estimate,
};
use crate::design::{Design, TermKind};
use crate::models::ordinal::{
    CumulativeLink, CumulativeLinkFit, CumulativeLinkOptions, brant_test, fit_cumulative_link,
    fit_cumulative_link_on, fit_nominal_effects_on,
};
use crate::models::{DesignColumns, StopReason};
use crate::plan::{Analysis, Check, Fallback, Supportive};
use nalgebra::DMatrix;

/// The model's data after the plan's category handling: the design without its
/// intercept (cut-points take its place; read in place, not copied), the response as
/// category indices.
struct Prepared<'a> {
    /// The analysis design, intercept first; the model uses its other columns.
    design: crate::models::DesignInput<'a>,
    /// Design column names without the intercept.
    names: Vec<String>,
    /// Position among the model's columns (the design's without the intercept) of each arm's
    /// indicator.
    treatment_columns: Vec<Option<usize>>,
    response: Vec<usize>,
    levels: Vec<String>,
}

impl Prepared<'_> {
    /// Number of the model's columns: the design's without the intercept.
    fn n_columns(&self) -> usize {
        self.design.ncols() - 1
    }

    /// The design columns of the model's columns `kept` (positions among the model's columns).
    fn design_columns(kept: &[usize]) -> Vec<usize> {
        kept.iter().map(|column| column + 1).collect()
    }
}

fn link_words(link: CumulativeLink) -> &'static str {
    match link {
        CumulativeLink::Logit => "logit (proportional odds)",
        CumulativeLink::Probit => "probit",
        CumulativeLink::ComplementaryLogLog => "complementary log-log",
    }
}

/// Merge empty categories with a neighbour (the next higher, or the next lower
/// for the top category) when the plan allows it.
fn prepare<'a>(
    design: &'a Design,
    analysis: &Analysis,
    findings: &mut Vec<Finding>,
    fallback_used: &mut Option<String>,
) -> Result<Prepared<'a>, String> {
    let mut levels = design.response_levels.clone();
    let mut response: Vec<usize> = design
        .response
        .iter()
        .map(|&value| value as usize)
        .collect();
    loop {
        let mut counts = vec![0usize; levels.len()];
        for &category in &response {
            counts[category] += 1;
        }
        let Some(empty) = counts.iter().position(|&count| count == 0) else {
            break;
        };
        if !analysis.fallbacks.contains(&Fallback::MergeEmptyCategory) {
            return Err(format!(
                "outcome category \"{}\" has no analysed subjects and no fallback was planned",
                levels[empty]
            ));
        }
        if levels.len() <= 2 {
            return Err(
                "fewer than two outcome categories remain after merging empty ones".to_string(),
            );
        }
        let neighbour = if empty + 1 < levels.len() {
            empty + 1
        } else {
            empty - 1
        };
        let merged = if neighbour > empty {
            format!("{}/{}", levels[empty], levels[neighbour])
        } else {
            format!("{}/{}", levels[neighbour], levels[empty])
        };
        let message = format!(
            "outcome category \"{}\" has no analysed subjects; as planned, it was merged with \"{}\"",
            levels[empty], levels[neighbour]
        );
        findings.push(Finding {
            code: "FALLBACK-USED",
            severity: "minor",
            message: message.clone(),
        });
        *fallback_used = Some(match fallback_used.take() {
            Some(earlier) => format!("{earlier}; {message}"),
            None => message,
        });
        let keep = empty.min(neighbour);
        levels[keep] = merged;
        levels.remove(empty.max(neighbour));
        for category in &mut response {
            if *category > keep {
                *category -= 1;
            }
        }
    }
    let names = design.column_names[1..].to_vec();
    let treatment_columns = design
        .treatment_columns
        .iter()
        .map(|column| column.map(|column| column - 1))
        .collect();
    Ok(Prepared {
        design: design.matrix.input(),
        names,
        treatment_columns,
        response,
        levels,
    })
}

/// The view of `columns` of `matrix`; they are the design's own, so a refusal is a defect.
fn view<'a>(
    design: crate::models::DesignInput<'a>,
    columns: &'a [usize],
) -> Result<DesignColumns<'a>, String> {
    DesignColumns::of(design, columns)
        .ok_or_else(|| "internal error: a model column is not a column of the design".to_string())
}

/// Fit, dropping aliased covariate columns (reported) and refusing an aliased treatment.
fn fit(
    prepared: &Prepared,
    options: &CumulativeLinkOptions,
) -> Result<(CumulativeLinkFit, Vec<usize>), String> {
    let mut dropped: Vec<usize> = Vec::new();
    loop {
        let kept: Vec<usize> = (0..prepared.n_columns())
            .filter(|column| !dropped.contains(column))
            .collect();
        let columns = Prepared::design_columns(&kept);
        let fit = fit_cumulative_link_on(
            view(prepared.design, &columns)?,
            &prepared.response,
            prepared.levels.len(),
            None,
            options,
        )
        .map_err(|error| error.to_string())?;
        match &fit.stop_reason {
            StopReason::Converged { .. } => return Ok((fit, dropped)),
            StopReason::SingularDesign { columns } if !columns.is_empty() => {
                let original: Vec<usize> = columns.iter().map(|&column| kept[column]).collect();
                if original
                    .iter()
                    .any(|column| prepared.treatment_columns.contains(&Some(*column)))
                {
                    return Err("a treatment indicator is aliased with other terms".to_string());
                }
                dropped.extend(original);
                dropped.sort_unstable();
            }
            other => {
                return Err(describe_stop(
                    other,
                    &kept
                        .iter()
                        .map(|&column| prepared.names[column].clone())
                        .collect::<Vec<_>>(),
                ));
            }
        }
    }
}

/// Expand a fit on the kept columns back to all columns (aliased ones `None`).
fn expand(
    fit: &CumulativeLinkFit,
    n_columns: usize,
    dropped: &[usize],
) -> (Vec<Option<f64>>, Vec<usize>) {
    let kept: Vec<usize> = (0..n_columns)
        .filter(|column| !dropped.contains(column))
        .collect();
    let mut coefficients = vec![None; n_columns];
    for (position, &column) in kept.iter().enumerate() {
        coefficients[column] = Some(fit.coefficients[position]);
    }
    (coefficients, kept)
}

pub fn analyse(
    design: &Design,
    analysis: &Analysis,
    link: CumulativeLink,
) -> Result<AnalysisInference, String> {
    let mut findings = Vec::new();
    let mut fallback_used = None;
    let prepared = prepare(design, analysis, &mut findings, &mut fallback_used)?;
    let options = CumulativeLinkOptions {
        link,
        ..CumulativeLinkOptions::default()
    };
    let (model, dropped) = fit(&prepared, &options)?;
    let n_cuts = prepared.levels.len() - 1;
    let n_columns = prepared.n_columns();
    let (beta_or_none, kept) = expand(&model, n_columns, &dropped);
    let covariance_kept = model.covariance.clone().ok_or_else(|| {
        "the information matrix is not positive definite at the estimate".to_string()
    })?;
    // Covariance over (cut-points, all columns), zero for dropped columns.
    let size = n_cuts + n_columns;
    let mut covariance = DMatrix::zeros(size, size);
    let index_of = |position: usize| {
        if position < n_cuts {
            position
        } else {
            n_cuts + kept[position - n_cuts]
        }
    };
    for i in 0..covariance_kept.nrows() {
        for j in 0..covariance_kept.ncols() {
            covariance[(index_of(i), index_of(j))] = covariance_kept[(i, j)];
        }
    }
    let mut parameters: Vec<f64> = model.cut_points.clone();
    parameters.extend(beta_or_none.iter().map(|value| value.unwrap_or(0.0)));
    let confidence_level = analysis.confidence_level;

    let mut coefficients = Vec::new();
    for (cut, value) in model.cut_points.iter().enumerate() {
        coefficients.push(CoefficientRow {
            name: format!(
                "cut-point {} | {}",
                prepared.levels[cut],
                prepared.levels[cut + 1]
            ),
            term: "cut-points".to_string(),
            category: None,
            estimate: wald_estimate(
                *value,
                covariance[(cut, cut)].sqrt(),
                None,
                confidence_level,
            )
            .ok(),
        });
    }
    for column in 0..n_columns {
        let index = n_cuts + column;
        coefficients.push(CoefficientRow {
            name: prepared.names[column].clone(),
            term: design.terms[design.column_terms[column + 1]].name.clone(),
            category: None,
            estimate: beta_or_none[column].and_then(|value| {
                wald_estimate(
                    value,
                    covariance[(index, index)].sqrt(),
                    None,
                    confidence_level,
                )
                .ok()
            }),
        });
    }

    // Tests of treatment; parameter indices are offset by the cut-points.
    let treatment: Vec<usize> = prepared
        .treatment_columns
        .iter()
        .flatten()
        .copied()
        .collect();
    let treatment_parameters: Vec<usize> = treatment.iter().map(|column| n_cuts + column).collect();
    let mut treatment_tests: Vec<super::JointTest> = Vec::new();
    let mut failures = Vec::new();
    match wald_chi_square(&parameters, &covariance, &treatment_parameters) {
        Ok(test) => treatment_tests.push(test),
        Err(reason) => failures.push(reason),
    }
    let without_treatment: Vec<usize> = kept
        .iter()
        .copied()
        .filter(|column| !treatment.contains(column))
        .collect();
    let reduced_columns = Prepared::design_columns(&without_treatment);
    let reduced = fit_cumulative_link_on(
        view(prepared.design, &reduced_columns)?,
        &prepared.response,
        prepared.levels.len(),
        None,
        &options,
    );
    match (reduced, model.log_likelihood) {
        (Ok(reduced), Some(full))
            if matches!(reduced.stop_reason, StopReason::Converged { .. }) =>
        {
            match reduced.log_likelihood {
                Some(reduced_log_likelihood) => {
                    match likelihood_ratio(full, reduced_log_likelihood, treatment.len()) {
                        Ok(test) => treatment_tests.push(test),
                        Err(reason) => failures.push(reason),
                    }
                }
                None => {
                    failures.push("the model without treatment has no log-likelihood".to_string())
                }
            }
        }
        (Ok(reduced), _) => failures.push(format!(
            "likelihood-ratio test: the model without treatment {}",
            describe_stop(&reduced.stop_reason, &[])
        )),
        (Err(error), _) => failures.push(format!("likelihood-ratio test: {error}")),
    }

    // Contrasts: L over (cut-points, columns); the design's contrast helper works on the full design.
    let aliased_full: Vec<bool> = (0..design.column_names.len())
        .map(|column| column > 0 && beta_or_none[column - 1].is_none())
        .collect();
    let ratio_name = (link == CumulativeLink::Logit).then_some("odds ratio");
    let contrasts: Vec<ContrastResult> = analysis
        .contrasts
        .iter()
        .map(|contrast| {
            let estimate = contrast_vector(design, &aliased_full, contrast.arm, contrast.versus)
                .and_then(|weights_full| {
                    let mut weights = vec![0.0; size];
                    for (column, weight) in weights_full.iter().enumerate().skip(1) {
                        weights[n_cuts + column - 1] = *weight;
                    }
                    let value: f64 = weights.iter().zip(&parameters).map(|(w, b)| w * b).sum();
                    wald_estimate(
                        value,
                        bilinear(&weights, &covariance, &weights).sqrt(),
                        None,
                        confidence_level,
                    )
                });
            let ratio = match (ratio_name, &estimate) {
                (Some(_), Ok(estimate)) => super::exponentiate(estimate),
                _ => None,
            };
            ContrastResult {
                id: contrast.id.clone(),
                arm: contrast.arm,
                versus: contrast.versus,
                category: None,
                estimate,
                ratio,
                interval_method: "Wald",
                joint: None,
            }
        })
        .collect();

    // The planned fallback for non-proportional odds in the treatment term.
    let mut contrasts = contrasts;
    let mut model_words_extra = String::new();
    if analysis
        .fallbacks
        .contains(&Fallback::PartialProportionalOdds)
        && let Some(partial) =
            partial_proportional_odds(design, analysis, &prepared, &kept, &model, &options)
    {
        let message = partial.message.clone();
        findings.push(Finding {
            code: "FALLBACK-USED",
            severity: "minor",
            message: message.clone(),
        });
        fallback_used = Some(match fallback_used.take() {
            Some(earlier) => format!("{earlier}; {message}"),
            None => message,
        });
        contrasts = partial.contrasts;
        treatment_tests = partial.tests;
        model_words_extra = " The treatment effect was then allowed to vary by cut-point (partial proportional odds), as planned; each comparison is reported at every cut-point as the odds ratio of being above it.".to_string();
    }

    let mut checks = Vec::new();
    if analysis.checks.contains(&Check::ProportionalOdds) {
        checks.extend(proportional_odds_checks(
            design,
            &prepared,
            &kept,
            &model,
            &options,
            analysis.check_level,
        ));
    }
    if analysis.checks.contains(&Check::TreatmentByStratum) {
        checks.push(heterogeneity(
            design,
            &prepared,
            &kept,
            &model,
            &options,
            analysis.check_level,
        ));
    }
    for supportive in &analysis.supportive {
        match supportive {
            Supportive::MantelHaenszel { scores } => {
                checks.push(mantel_haenszel(design, &prepared, scores.as_deref()))
            }
        }
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

    let model_words = format!(
        "A cumulative link model with {} link was fitted by maximum likelihood (Newton–Raphson with analytic derivatives)",
        link_words(link)
    );
    let model_details = format!(
        "The model is g(P(Y ≤ j)) = θⱼ − xᵀβ over the {} ordered categories ({}), so a positive β moves subjects toward higher categories{}. Standard errors come from the observed information at the estimate.",
        prepared.levels.len(),
        prepared.levels.join(" < "),
        if link == CumulativeLink::Logit {
            " and exp(β) is the common odds ratio of being in a higher category"
        } else {
            ""
        }
    ) + &model_words_extra;
    Ok(AnalysisInference {
        model_words,
        model_details,
        fit: FitStatistics {
            n_analysed: design.n_rows(),
            n_parameters: size,
            rank: n_cuts + kept.len(),
            stop_reason: describe_stop(&model.stop_reason, &[]),
            converged: true,
            iterations: Some(model.iterations),
            log_likelihood: model.log_likelihood,
            aliased_columns: dropped
                .iter()
                .map(|&column| prepared.names[column].clone())
                .collect(),
            ..FitStatistics::default()
        },
        coefficients,
        treatment_tests,
        treatment_test_failure: (!failures.is_empty()).then(|| failures.join("; ")),
        contrasts,
        effect_scale: if link == CumulativeLink::Logit {
            "log odds ratio"
        } else {
            "difference on the latent scale"
        },
        ratio_name,
        adjusted_means: Vec::new(),
        marginal: None,
        checks,
        findings,
        fallback_used,
    })
}

/// The terms of the prepared design (without the intercept), as column lists
/// within the kept columns.
fn terms_within(design: &Design, kept: &[usize]) -> Vec<(String, bool, Vec<usize>)> {
    design
        .terms
        .iter()
        .filter(|term| term.kind != TermKind::Intercept && term.column_count > 0)
        .map(|term| {
            let columns: Vec<usize> = (term.first_column..term.first_column + term.column_count)
                .filter_map(|column| {
                    kept.iter()
                        .position(|&kept_column| kept_column == column - 1)
                })
                .collect();
            (term.name.clone(), term.kind == TermKind::Treatment, columns)
        })
        .filter(|(_, _, columns)| !columns.is_empty())
        .collect()
}

fn proportional_odds_checks(
    design: &Design,
    prepared: &Prepared,
    kept: &[usize],
    model: &CumulativeLinkFit,
    options: &CumulativeLinkOptions,
    level: f64,
) -> Vec<CheckOutcome> {
    let mut outcomes = Vec::new();
    let n_categories = prepared.levels.len();
    if n_categories < 3 {
        return vec![CheckOutcome {
            name: "Proportional odds".to_string(),
            rows: Vec::new(),
            failed: false,
            verdict: "with two outcome categories there is one cut-point and nothing to check"
                .to_string(),
            details: Vec::new(),
        }];
    }
    let columns = Prepared::design_columns(kept);
    let model_view = match view(prepared.design, &columns) {
        Ok(model_view) => model_view,
        Err(reason) => {
            return vec![CheckOutcome {
                name: "Proportional odds".to_string(),
                rows: Vec::new(),
                failed: true,
                verdict: reason,
                details: Vec::new(),
            }];
        }
    };
    let terms = terms_within(design, kept);
    let full_log_likelihood = model.log_likelihood.unwrap_or(f64::NAN);

    // Likelihood-ratio test per term and overall against the nominal-effects model.
    let mut rows = Vec::new();
    let mut problems = Vec::new();
    let mut every_column: Vec<usize> = Vec::new();
    for (name, _, columns) in &terms {
        every_column.extend(columns);
        match fit_nominal_effects_on(
            model_view,
            &prepared.response,
            n_categories,
            None,
            columns,
            options,
        ) {
            Ok(nominal) => match (nominal.log_likelihood, &nominal.stop_reason) {
                (
                    Some(log_likelihood),
                    StopReason::Converged { .. } | StopReason::Separation { .. },
                ) => {
                    let statistic = (2.0 * (log_likelihood - full_log_likelihood)).max(0.0);
                    let df = (n_categories - 2) * columns.len();
                    if let Some(p_value) = chi_square_upper_p(statistic, df as f64) {
                        rows.push(CheckRow {
                            term: name.clone(),
                            statistic_name: "likelihood ratio",
                            statistic,
                            df: df as f64,
                            p_value,
                        });
                    }
                }
                (_, reason) => problems.push(format!("{name}: {}", describe_stop(reason, &[]))),
            },
            Err(error) => problems.push(format!("{name}: {error}")),
        }
    }
    let failed = rows.iter().any(|row| row.p_value < level);
    let verdict = if rows.is_empty() {
        format!("could not be computed: {}", problems.join("; "))
    } else if failed {
        let terms: Vec<String> = rows
            .iter()
            .filter(|row| row.p_value < level)
            .map(|row| row.term.clone())
            .collect();
        format!(
            "the proportional-odds assumption is questionable at level {level} for {}",
            terms.join(", ")
        )
    } else {
        format!("no term departs from proportional odds at level {level}")
    };
    let mut details: Vec<String> = problems
        .iter()
        .map(|problem| format!("not computed for {problem}"))
        .collect();
    details.insert(0, "each term's effect is allowed to vary by cut-point in turn (the other terms keep a common effect)".to_string());
    outcomes.push(CheckOutcome {
        name: "Proportional odds: likelihood-ratio test against cut-point-specific effects"
            .to_string(),
        rows,
        failed,
        verdict,
        details,
    });

    // Brant's Wald test from separate binary logit fits.
    let brant_terms: Vec<Vec<usize>> = terms
        .iter()
        .map(|(_, _, columns)| columns.clone())
        .collect();
    // Brant's separate binary fits read the design through a copy of the model's columns.
    let matrix = prepared.design.select_columns(&columns);
    let outcome = match brant_test(
        &matrix,
        &prepared.response,
        n_categories,
        None,
        &brant_terms,
    ) {
        Ok(brant) if matches!(brant.stop_reason, StopReason::Converged { .. }) => {
            let mut rows = Vec::new();
            for ((name, _, _), statistic) in terms.iter().zip(&brant.terms) {
                if let Some(p_value) = chi_square_upper_p(statistic.statistic, statistic.df as f64)
                {
                    rows.push(CheckRow {
                        term: name.clone(),
                        statistic_name: "Wald chi-square",
                        statistic: statistic.statistic,
                        df: statistic.df as f64,
                        p_value,
                    });
                }
            }
            if let Some(overall) = &brant.overall
                && let Some(p_value) = chi_square_upper_p(overall.statistic, overall.df as f64)
            {
                rows.push(CheckRow {
                    term: "all terms".to_string(),
                    statistic_name: "Wald chi-square",
                    statistic: overall.statistic,
                    df: overall.df as f64,
                    p_value,
                });
            }
            let failed = rows.iter().any(|row| row.p_value < level);
            let mut details = vec!["binary logistic fits of Y above each cut-point; Wald test that each term's slopes are equal across the splits (Brant 1990)".to_string()];
            if failed {
                // The treatment odds ratio at each cut-point, from the binary splits.
                for (arm, column) in prepared.treatment_columns.iter().enumerate() {
                    let Some(column) = column else { continue };
                    let Some(position) = kept.iter().position(|kept_column| kept_column == column)
                    else {
                        continue;
                    };
                    let ratios: Vec<String> = (0..brant.split_coefficients.nrows())
                        .map(|split| {
                            format!(
                                "above {}: {:.3}",
                                prepared.levels[split],
                                libm::exp(brant.split_coefficients[(split, position)])
                            )
                        })
                        .collect();
                    details.push(format!(
                        "odds ratio of {} vs the reference arm at each cut-point — {}",
                        prepared.names[*column].trim_start_matches("treatment = "),
                        ratios.join(", ")
                    ));
                    let _ = arm;
                }
            }
            let verdict = if failed {
                format!("at least one term's slopes differ across cut-points at level {level}")
            } else {
                format!("no term's slopes differ across cut-points at level {level}")
            };
            CheckOutcome {
                name: "Proportional odds: Brant's Wald test".to_string(),
                rows,
                failed,
                verdict,
                details,
            }
        }
        Ok(brant) => CheckOutcome {
            name: "Proportional odds: Brant's Wald test".to_string(),
            rows: Vec::new(),
            failed: false,
            verdict: format!(
                "could not be computed: the binary split above \"{}\" shows {}",
                brant
                    .failed_split
                    .and_then(|split| prepared.levels.get(split))
                    .cloned()
                    .unwrap_or_default(),
                describe_stop(
                    &brant.stop_reason,
                    &kept
                        .iter()
                        .map(|&column| prepared.names[column].clone())
                        .collect::<Vec<_>>()
                )
            ),
            details: Vec::new(),
        },
        Err(error) => CheckOutcome {
            name: "Proportional odds: Brant's Wald test".to_string(),
            rows: Vec::new(),
            failed: false,
            verdict: format!("could not be computed: {error}"),
            details: Vec::new(),
        },
    };
    outcomes.push(outcome);
    outcomes
}

fn heterogeneity(
    design: &Design,
    prepared: &Prepared,
    kept: &[usize],
    model: &CumulativeLinkFit,
    options: &CumulativeLinkOptions,
    level: f64,
) -> CheckOutcome {
    let name = "Treatment-by-stratum interaction (supportive)".to_string();
    let (extended, added) = super::with_interactions(design);
    let outcome = if added == 0 {
        Err("no interaction columns could be formed".to_string())
    } else {
        let mut columns: Vec<usize> = kept.iter().map(|column| column + 1).collect();
        columns.extend(design.matrix.ncols()..design.matrix.ncols() + added);
        let matrix = extended.select_columns(&columns);
        fit_cumulative_link(
            &matrix,
            &prepared.response,
            prepared.levels.len(),
            None,
            options,
        )
        .map_err(|error| error.to_string())
        .and_then(|bigger| {
            match (
                bigger.log_likelihood,
                model.log_likelihood,
                &bigger.stop_reason,
            ) {
                (
                    Some(bigger_log_likelihood),
                    Some(log_likelihood),
                    StopReason::Converged { .. },
                ) => likelihood_ratio(bigger_log_likelihood, log_likelihood, added),
                (_, _, reason) => Err(format!(
                    "the interaction model {}",
                    describe_stop(reason, &[])
                )),
            }
        })
    };
    super::heterogeneity_outcome(name, outcome, level)
}

/// Stratified CMH tests of treatment × outcome by the first stratification
/// factor (after pooling), supportive to the model.
fn mantel_haenszel(design: &Design, prepared: &Prepared, scores: Option<&[f64]>) -> CheckOutcome {
    let name = "Stratified Cochran–Mantel–Haenszel tests (supportive)".to_string();
    let Some(stratum) = design
        .terms
        .iter()
        .find(|term| term.kind == TermKind::Stratum)
    else {
        return CheckOutcome {
            name,
            rows: Vec::new(),
            failed: false,
            verdict: "no stratum to stratify by".to_string(),
            details: Vec::new(),
        };
    };
    let n_strata = stratum.column_count + 1;
    let n_arms = design.treatment_columns.len();
    let n_categories = prepared.levels.len();
    let mut counts = vec![0.0; n_strata * n_arms * n_categories];
    for row in 0..design.n_rows() {
        let level = (0..stratum.column_count)
            .find(|offset| design.matrix.get(row, stratum.first_column + offset) == 1.0)
            .map(|offset| offset + 1)
            .unwrap_or(0);
        let arm = design.arm_of_row[row];
        counts[(level * n_arms + arm) * n_categories + prepared.response[row]] += 1.0;
    }
    // Planned scores refer to the declared levels; after a merge they no longer line up.
    let scores = scores.filter(|scores| scores.len() == n_categories);
    let result = StratifiedTable::from_flat(n_strata, n_arms, n_categories, &counts)
        .map_err(|error| error.to_string())
        .and_then(|table| cmh_tests(&table, scores, None).map_err(|error| error.to_string()));
    match result {
        Ok(result) => {
            let mut rows = Vec::new();
            let mut notes = Vec::new();
            for (label, statistic) in [
                ("general association", &result.general_association),
                ("row mean scores", &result.row_mean_scores),
                ("nonzero correlation", &result.correlation),
            ] {
                match statistic {
                    Ok(statistic) => rows.push(CheckRow {
                        term: label.to_string(),
                        statistic_name: "CMH chi-square",
                        statistic: statistic.statistic,
                        df: statistic.df as f64,
                        p_value: statistic.p_value,
                    }),
                    Err(issue) => notes.push(format!("{label}: {issue}")),
                }
            }
            let score_words = if scores.is_some() {
                "planned scores"
            } else {
                "integer scores 1, 2, …"
            };
            let mut details = vec![format!(
                "stratified by {} ({} of {} strata informative); column {score_words}",
                stratum.name, result.strata_used, result.strata_total
            )];
            details.extend(notes);
            CheckOutcome {
                name,
                rows,
                failed: false,
                verdict:
                    "supportive nonparametric tests of association between treatment and outcome"
                        .to_string(),
                details,
            }
        }
        Err(reason) => CheckOutcome {
            name,
            rows: Vec::new(),
            failed: false,
            verdict: format!("could not be computed: {reason}"),
            details: Vec::new(),
        },
    }
}

/// What the partial-proportional-odds fallback produced.
struct PartialOdds {
    contrasts: Vec<ContrastResult>,
    tests: Vec<super::JointTest>,
    message: String,
}

/// When the likelihood-ratio test of proportional odds for the treatment term
/// fails at the plan's check level, refit with cut-point-specific treatment
/// effects (g(P(Y ≤ j)) = θⱼ − xᵀβ − zᵀγⱼ, z the treatment indicators) and
/// report each contrast at every cut-point; `None` when the check passes or
/// the refit does not converge (the proportional-odds results then stand).
fn partial_proportional_odds(
    design: &Design,
    analysis: &Analysis,
    prepared: &Prepared,
    kept: &[usize],
    model: &CumulativeLinkFit,
    options: &CumulativeLinkOptions,
) -> Option<PartialOdds> {
    let n_categories = prepared.levels.len();
    if n_categories < 3 {
        return None;
    }
    let columns = Prepared::design_columns(kept);
    let model_view = view(prepared.design, &columns).ok()?;
    // Positions (within the kept columns) of the arms' indicators.
    let arm_position: Vec<Option<usize>> = prepared
        .treatment_columns
        .iter()
        .map(|column| {
            column.and_then(|column| kept.iter().position(|&kept_column| kept_column == column))
        })
        .collect();
    let nominal: Vec<usize> = arm_position.iter().flatten().copied().collect();
    let fit = fit_nominal_effects_on(
        model_view,
        &prepared.response,
        n_categories,
        None,
        &nominal,
        options,
    )
    .ok()?;
    if !matches!(fit.stop_reason, StopReason::Converged { .. }) {
        return None;
    }
    let (full, base) = (fit.log_likelihood?, model.log_likelihood?);
    let df = (n_categories - 2) * nominal.len();
    let statistic = (2.0 * (full - base)).max(0.0);
    let p_value = chi_square_upper_p(statistic, df as f64)?;
    if p_value >= analysis.check_level {
        return None;
    }
    let covariance = fit.covariance.clone()?;
    let n_cuts = n_categories - 1;
    let k = nominal.len();
    // Parameters: cut-points, then γ cut-point by cut-point (k each), then the common β.
    let mut parameters = fit.cut_points.clone();
    for cut in 0..n_cuts {
        for position in 0..k {
            parameters.push(fit.nominal_coefficients[(cut, position)]);
        }
    }
    parameters.extend(&fit.coefficients);
    let gamma_index = |cut: usize, arm: usize| -> Option<usize> {
        let column = arm_position[arm]?;
        let position = nominal
            .iter()
            .position(|&nominal_column| nominal_column == column)?;
        Some(n_cuts + cut * k + position)
    };
    let mut contrasts = Vec::new();
    for contrast in &analysis.contrasts {
        let rows: Vec<Vec<f64>> = (0..n_cuts)
            .map(|cut| {
                let mut weights = vec![0.0; parameters.len()];
                if let Some(index) = gamma_index(cut, contrast.arm) {
                    weights[index] += 1.0;
                }
                if let Some(index) = gamma_index(cut, contrast.versus) {
                    weights[index] -= 1.0;
                }
                weights
            })
            .collect();
        let joint = super::joint_wald(&rows, &parameters, &covariance);
        for (cut, weights) in rows.iter().enumerate() {
            let value: f64 = weights.iter().zip(&parameters).map(|(w, b)| w * b).sum();
            let estimate = wald_estimate(
                value,
                bilinear(weights, &covariance, weights).sqrt(),
                None,
                analysis.confidence_level,
            );
            let ratio = estimate.as_ref().ok().and_then(super::exponentiate);
            contrasts.push(ContrastResult {
                id: contrast.id.clone(),
                arm: contrast.arm,
                versus: contrast.versus,
                category: Some(format!("above {}", prepared.levels[cut])),
                estimate,
                ratio,
                interval_method: "Wald",
                joint: joint.clone(),
            });
        }
    }
    let all_treatment: Vec<usize> = (0..n_cuts)
        .flat_map(|cut| (0..k).map(move |position| n_cuts + cut * k + position))
        .collect();
    let mut tests = Vec::new();
    if let Ok(test) = wald_chi_square(&parameters, &covariance, &all_treatment) {
        tests.push(test);
    }
    let _ = design;
    Some(PartialOdds {
        contrasts,
        tests,
        message: format!(
            "the proportional-odds assumption failed for treatment (likelihood ratio {statistic:.2} on {df} df, p = {p_value:.4}, below {}); as planned, the treatment effect was allowed to vary by cut-point",
            analysis.check_level
        ),
    })
}
