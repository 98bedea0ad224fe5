//! tables/*.csv: the report's tables at full precision, one file per table.

use super::format::exact;
use crate::results::{EstimateInfo, Results};

/// Every table as (file name, bytes), in a fixed order.
pub fn all(results: &Results) -> Vec<(String, Vec<u8>)> {
    let mut tables = Vec::new();
    let mut flow = String::from("population,arm,subjects\n");
    for (arm_index, arm) in results.study.arms.iter().enumerate() {
        flow.push_str(&format!(
            "randomised,{},{}\n",
            csv_field(&arm.code),
            results.subjects.randomised_per_arm[arm_index]
        ));
    }
    for population in &results.subjects.populations {
        for (arm_index, arm) in results.study.arms.iter().enumerate() {
            flow.push_str(&format!(
                "{},{},{}\n",
                csv_field(&population.id),
                csv_field(&arm.code),
                population.per_arm[arm_index]
            ));
        }
    }
    tables.push(("subject-flow.csv".to_string(), flow.into_bytes()));
    for analysis in &results.analyses {
        let header = "estimate,standard_error,statistic,df,p_value,lower,upper";
        let mut contrasts = format!("contrast,arm,versus,scale,{header}\n");
        for contrast in &analysis.contrasts {
            contrasts.push_str(&format!(
                "{},{},{},{},{}\n",
                csv_field(&contrast.id),
                csv_field(&contrast.arm),
                csv_field(&contrast.versus),
                contrast.scale,
                estimate_fields(contrast.estimate.as_ref())
            ));
        }
        tables.push((
            format!("{}-contrasts.csv", analysis.id),
            contrasts.into_bytes(),
        ));
        let mut coefficients = format!("column,term,{header}\n");
        for row in &analysis.coefficients {
            coefficients.push_str(&format!(
                "{},{},{}\n",
                csv_field(&row.name),
                csv_field(&row.term),
                estimate_fields(row.estimate.as_ref())
            ));
        }
        tables.push((
            format!("{}-coefficients.csv", analysis.id),
            coefficients.into_bytes(),
        ));
        if !analysis.adjusted_means.is_empty() {
            let mut means = format!("arm,{header}\n");
            for mean in &analysis.adjusted_means {
                means.push_str(&format!(
                    "{},{}\n",
                    csv_field(&mean.arm),
                    estimate_fields(mean.estimate.as_ref())
                ));
            }
            tables.push((
                format!("{}-adjusted-means.csv", analysis.id),
                means.into_bytes(),
            ));
        }
    }
    tables
}

fn estimate_fields(estimate: Option<&EstimateInfo>) -> String {
    match estimate {
        None => ",,,,,,".to_string(),
        Some(estimate) => format!(
            "{},{},{},{},{},{},{}",
            exact(estimate.estimate),
            exact(estimate.standard_error),
            exact(estimate.statistic),
            estimate.df.map(exact).unwrap_or_default(),
            exact(estimate.p_value),
            exact(estimate.lower),
            exact(estimate.upper)
        ),
    }
}

/// Quote a CSV field when it needs it (RFC 4180).
fn csv_field(text: &str) -> String {
    if text.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", text.replace('"', "\"\""))
    } else {
        text.to_string()
    }
}
