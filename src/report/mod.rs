//! The report: Markdown from a minijinja template, HTML from that Markdown.
//!
//! The report is rendered from the results document alone (`context.rs`
//! turns it into display strings by the rules in `format.rs`), so the numbers
//! a reader sees are exactly those in results.json. Templates are compiled
//! into the binary and hashed as inputs. The HTML is the Markdown passed
//! through pulldown-cmark with every raw-HTML event turned back into text, so
//! no string from a plan or a data file can become live markup, and wrapped in
//! a self-contained page (inline CSS, no scripts, no external links).
//!
//! Pure: no I/O, no clock.

mod context;
pub mod figures;
pub mod format;
pub mod tables;

use crate::error::Error;
use crate::results::Results;
use minijinja::Environment;
use pulldown_cmark::{Event, Options, Parser, html};
use std::collections::BTreeMap;

/// The templates compiled into cairn, by name, as hashed inputs.
pub const TEMPLATES: [(&str, &str); 3] = [
    ("report.md.j2", include_str!("../../templates/report.md.j2")),
    (
        "report.html.j2",
        include_str!("../../templates/report.html.j2"),
    ),
    ("report.css", include_str!("../../templates/report.css")),
];

/// The caution every report carries.
pub const CAUTION: &str = "These results support, and do not replace, review by a qualified statistician under the sponsor's validated processes and the applicable local regulations.";

pub struct Rendered {
    pub markdown: String,
    pub html: String,
}

pub fn render(results: &Results) -> Result<Rendered, Error> {
    let context = context::build(results);
    let figures = build_figures(results)?;
    let mut environment = Environment::new();
    let syntax = minijinja::syntax::SyntaxConfig::builder()
        .trim_blocks(true)
        .lstrip_blocks(true)
        .keep_trailing_newline(true)
        .build()
        .map_err(|cause| Error::internal(format!("template syntax settings rejected: {cause}")))?;
    environment.set_syntax(syntax);
    environment.set_undefined_behavior(minijinja::UndefinedBehavior::Strict);
    for (name, text) in TEMPLATES {
        environment.add_template(name, text).map_err(|cause| {
            Error::internal(format!("template {name} does not compile: {cause}"))
        })?;
    }
    let markdown = environment
        .get_template("report.md.j2")
        .and_then(|template| template.render(minijinja::value::Serde(&context)))
        .map_err(|cause| {
            Error::internal(format!("cannot render the Markdown report: {cause:#}"))
        })?;
    let body = markdown_to_html_with_figures(&markdown, &figures);
    let css = TEMPLATES[2].1;
    let html = environment
        .get_template("report.html.j2")
        .and_then(|template| {
            template.render(minijinja::context! {
                title => format!("{} — {}", results.study.id, results.study.title),
                css => minijinja::Value::from_safe_string(css.to_string()),
                body => minijinja::Value::from_safe_string(body),
            })
        })
        .map_err(|cause| Error::internal(format!("cannot render the HTML report: {cause:#}")))?;
    Ok(Rendered { markdown, html })
}

/// CommonMark with tables to HTML; raw HTML in the Markdown is shown as text.
pub fn markdown_to_html(markdown: &str) -> String {
    markdown_to_html_with_figures(markdown, &BTreeMap::new())
}

/// The marker a template writes where a figure belongs: an HTML comment,
/// invisible in Markdown viewers. Text from plans and data cannot produce it,
/// because their `<` is escaped before it reaches the Markdown.
fn figure_marker(id: &str) -> String {
    format!("<!-- cairn-figure:{id} -->")
}

/// As [`markdown_to_html`], but a figure marker whose id is in `figures`
/// becomes that figure's SVG (drawn by our own code, escaped there).
fn markdown_to_html_with_figures(markdown: &str, figures: &BTreeMap<String, String>) -> String {
    let parser = Parser::new_ext(markdown, Options::ENABLE_TABLES).map(|event| match event {
        Event::Html(text) | Event::InlineHtml(text) => {
            let found = figures
                .iter()
                .find(|(id, _)| text.trim() == figure_marker(id));
            match found {
                // Inline SVG in HTML needs no namespace declaration; leaving it
                // out keeps the page free of any URL.
                Some((_, svg)) => Event::Html(
                    format!(
                        "<figure class=\"cairn-figure\">{}</figure>\n",
                        svg.replace(" xmlns=\"http://www.w3.org/2000/svg\"", "")
                    )
                    .into(),
                ),
                None => Event::Text(text),
            }
        }
        other => other,
    });
    let mut output = String::with_capacity(markdown.len() * 2);
    html::push_html(&mut output, parser);
    output
}

#[cfg(test)]
mod tests {
    use super::markdown_to_html;

    #[test]
    fn raw_html_never_becomes_markup() {
        let html =
            markdown_to_html("a <script>alert(1)</script> b\n\n<img src=x onerror=alert(1)>\n");
        assert!(!html.contains("<script"));
        assert!(!html.contains("<img"));
        assert!(html.contains("&lt;script&gt;"));
    }
}

/// Every figure of the report, by the id its marker uses: a forest plot per
/// analysis with estimable contrasts, and the multiplicity graph.
fn build_figures(results: &Results) -> Result<BTreeMap<String, String>, Error> {
    use figures::{
        ForestPlot, ForestRow, ForestScale, GraphFigure, GraphNode, forest_svg, graph_svg,
    };
    let arm_label = |code: &str| {
        results
            .study
            .arms
            .iter()
            .find(|arm| arm.code == code)
            .map(|arm| arm.label.clone())
            .unwrap_or_else(|| code.to_string())
    };
    let mut figures = BTreeMap::new();
    for (index, analysis) in results.analyses.iter().enumerate() {
        if analysis
            .contrasts
            .iter()
            .all(|contrast| contrast.estimate.is_none())
        {
            continue;
        }
        let ratio = analysis
            .contrasts
            .iter()
            .find_map(|contrast| contrast.ratio.as_ref().map(|ratio| ratio.name));
        let rows = analysis
            .contrasts
            .iter()
            .map(|contrast| {
                let mut label = format!(
                    "{} vs {}",
                    arm_label(&contrast.arm),
                    arm_label(&contrast.versus)
                );
                if let Some(category) = &contrast.category {
                    label = format!("{label}: {category}");
                }
                match (&contrast.ratio, &contrast.estimate) {
                    (Some(ratio), _) => ForestRow {
                        label,
                        estimate: ratio.estimate,
                        lower: ratio.lower,
                        upper: ratio.upper,
                        note: None,
                    },
                    (None, Some(estimate)) if ratio.is_none() => ForestRow {
                        label,
                        estimate: estimate.estimate,
                        lower: estimate.lower,
                        upper: estimate.upper,
                        note: None,
                    },
                    _ => ForestRow {
                        label,
                        estimate: f64::NAN,
                        lower: f64::NAN,
                        upper: f64::NAN,
                        note: Some("not estimable".to_string()),
                    },
                }
            })
            .collect();
        let confidence = format::percent(analysis.confidence_level);
        let (scale, axis_label) = match ratio {
            Some(name) => (
                ForestScale::Ratio,
                format!("{} ({confidence} CI, log scale)", context::capitalise(name)),
            ),
            None => (
                ForestScale::Difference,
                format!(
                    "{} in {} ({confidence} CI)",
                    context::capitalise(analysis.contrasts[0].scale),
                    analysis.endpoint.label
                ),
            ),
        };
        let ordered = analysis.endpoint.kind != "nominal";
        let lower_is_better = analysis.endpoint.higher_is == "worse";
        let (favours_lower, favours_higher) = match (ordered, lower_is_better) {
            (false, _) => (String::new(), String::new()),
            (true, true) => (
                "favours the first-named arm".to_string(),
                "favours the second-named arm".to_string(),
            ),
            (true, false) => (
                "favours the second-named arm".to_string(),
                "favours the first-named arm".to_string(),
            ),
        };
        let decimals = match analysis.fit.as_ref().and_then(|fit| fit.residual_sd) {
            Some(sd) if ratio.is_none() => format::decimals_for_scale(sd),
            _ => 2,
        };
        let plot = ForestPlot {
            title: analysis.title.clone(),
            axis_label,
            scale,
            favours_lower,
            favours_higher,
            rows,
            value_decimals: decimals,
        };
        let svg = forest_svg(&plot).map_err(|error| {
            Error::internal(format!(
                "the forest plot of analysis {} could not be drawn: {error}",
                analysis.id
            ))
        })?;
        figures.insert(format!("forest-{}", index + 1), svg);
    }
    if let Some(family) = &results.multiplicity
        && family.procedure == "graphical"
    {
        let nodes = family
            .hypotheses
            .iter()
            .map(|hypothesis| GraphNode {
                name: hypothesis.id.clone(),
                weight: hypothesis.initial_weight,
                rejected: false,
            })
            .collect();
        // One row per analysis, in the order the family first names them.
        let mut rows: Vec<(String, Vec<usize>)> = Vec::new();
        for (index, hypothesis) in family.hypotheses.iter().enumerate() {
            match rows
                .iter_mut()
                .find(|(analysis, _)| analysis == &hypothesis.analysis)
            {
                Some((_, members)) => members.push(index),
                None => rows.push((hypothesis.analysis.clone(), vec![index])),
            }
        }
        let figure = GraphFigure {
            title: "The planned multiplicity graph".to_string(),
            id_prefix: "family".to_string(),
            nodes,
            transitions: family.transitions.clone(),
            rows: Some(rows.into_iter().map(|(_, members)| members).collect()),
        };
        let svg = graph_svg(&figure).map_err(|error| {
            Error::internal(format!(
                "the multiplicity graph could not be drawn: {error}"
            ))
        })?;
        figures.insert("graph".to_string(), svg);
    }
    Ok(figures)
}
