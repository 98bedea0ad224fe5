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
pub mod format;
pub mod tables;

use crate::error::Error;
use crate::results::Results;
use minijinja::Environment;
use pulldown_cmark::{html, Event, Options, Parser};

/// The templates compiled into cairn, by name, as hashed inputs.
pub const TEMPLATES: [(&str, &str); 3] = [
    ("report.md.j2", include_str!("../../templates/report.md.j2")),
    ("report.html.j2", include_str!("../../templates/report.html.j2")),
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
        environment.add_template(name, text).map_err(|cause| Error::internal(format!("template {name} does not compile: {cause}")))?;
    }
    let markdown = environment
        .get_template("report.md.j2")
        .and_then(|template| template.render(minijinja::value::Serde(&context)))
        .map_err(|cause| Error::internal(format!("cannot render the Markdown report: {cause:#}")))?;
    let body = markdown_to_html(&markdown);
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
    let parser = Parser::new_ext(markdown, Options::ENABLE_TABLES).map(|event| match event {
        Event::Html(text) | Event::InlineHtml(text) => Event::Text(text),
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
        let html = markdown_to_html("a <script>alert(1)</script> b\n\n<img src=x onerror=alert(1)>\n");
        assert!(!html.contains("<script"));
        assert!(!html.contains("<img"));
        assert!(html.contains("&lt;script&gt;"));
    }
}
