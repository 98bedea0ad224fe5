//! Integration tests for the report figures: snapshot (golden) files compared
//! byte for byte, escaping of hostile labels, determinism, every error case,
//! well-formed markup and the geometry of points against their axis.
//!
//! Golden files live in `golden/figures/` at the crate root. To rewrite them
//! after an intended change, run `UPDATE_GOLDEN=1 cargo test` and review the
//! diff of the files (and look at the figures) before keeping it.
//!
//! The examples are realistic but invented numbers for a dermatology trial
//! (change in EASI, EASI-75 response); the graph is a common two-dose design
//! with one key secondary hypothesis per dose, in the style of the examples in
//! Bretz, Maurer, Brannath and Posch (2009), Statistics in Medicine 28:586–604.

use cairn::report::figures::{
    FigureError, ForestPlot, ForestRow, ForestScale, GraphFigure, GraphNode, forest_svg, graph_svg,
};
use std::path::Path;

// ---------------------------------------------------------------------------
// Examples
// ---------------------------------------------------------------------------

fn row(label: &str, estimate: f64, lower: f64, upper: f64) -> ForestRow {
    ForestRow {
        label: label.to_string(),
        estimate,
        lower,
        upper,
        note: None,
    }
}

fn noted_row(label: &str, note: &str) -> ForestRow {
    ForestRow {
        label: label.to_string(),
        estimate: f64::NAN,
        lower: f64::NAN,
        upper: f64::NAN,
        note: Some(note.to_string()),
    }
}

fn easi_differences() -> ForestPlot {
    ForestPlot {
        title: "Change from baseline in EASI at week 16".to_string(),
        axis_label: "Difference in mean change in EASI (95% CI)".to_string(),
        scale: ForestScale::Difference,
        favours_lower: "favours first-named arm".to_string(),
        favours_higher: "favours second-named arm".to_string(),
        rows: vec![
            row("Low dose vs placebo", -8.1, -11.2, -5.0),
            row("High dose vs placebo", -14.6, -17.7, -11.5),
            row("High dose vs low dose", -6.5, -9.6, -3.4),
        ],
        value_decimals: 1,
    }
}

fn easi75_odds_ratios() -> ForestPlot {
    ForestPlot {
        title: "EASI-75 response at week 16".to_string(),
        axis_label: "Odds ratio (95% CI), logarithmic scale".to_string(),
        scale: ForestScale::Ratio,
        favours_lower: "favours placebo".to_string(),
        favours_higher: "favours active dose".to_string(),
        rows: vec![
            row("Low dose vs placebo", 2.1, 1.3, 3.4),
            row("High dose vs placebo", 3.6, 2.2, 5.9),
        ],
        value_decimals: 1,
    }
}

fn single_row() -> ForestPlot {
    ForestPlot {
        title: "Itch NRS at week 4".to_string(),
        axis_label: "Difference in mean change (95% CI)".to_string(),
        scale: ForestScale::Difference,
        favours_lower: "favours High dose".to_string(),
        favours_higher: "favours placebo".to_string(),
        rows: vec![row("High dose vs placebo", -1.42, -2.05, -0.79)],
        value_decimals: 2,
    }
}

fn wide_and_missing() -> ForestPlot {
    ForestPlot {
        title: "Rate of flares over 52 weeks, by region".to_string(),
        axis_label: "Rate ratio (95% CI)".to_string(),
        scale: ForestScale::Ratio,
        favours_lower: "favours High dose".to_string(),
        favours_higher: "favours placebo".to_string(),
        rows: vec![
            row("Europe", 0.62, 0.48, 0.80),
            row("North America", 0.71, 0.52, 0.97),
            // A small region: the interval is enormous and must be clipped.
            row(
                "Asia-Pacific, a region with very few subjects in the trial",
                0.55,
                0.004,
                75.0,
            ),
            noted_row("Latin America", "not estimable: no flares in either arm"),
        ],
        value_decimals: 2,
    }
}

fn nothing_estimable() -> ForestPlot {
    ForestPlot {
        title: "Serious infections".to_string(),
        axis_label: "Odds ratio (95% CI)".to_string(),
        scale: ForestScale::Ratio,
        favours_lower: "favours High dose".to_string(),
        favours_higher: "favours placebo".to_string(),
        rows: vec![
            noted_row("High dose vs placebo", "not estimable"),
            noted_row("Low dose vs placebo", "not estimable"),
        ],
        value_decimals: 2,
    }
}

fn narrow_ratio() -> ForestPlot {
    ForestPlot {
        title: "Relative change in body weight".to_string(),
        axis_label: "Ratio of geometric means (95% CI)".to_string(),
        scale: ForestScale::Ratio,
        favours_lower: "lower with active".to_string(),
        favours_higher: "higher with active".to_string(),
        rows: vec![
            row("High dose vs placebo", 0.97, 0.91, 1.04),
            row("Low dose vs placebo", 1.01, 0.95, 1.08),
        ],
        value_decimals: 2,
    }
}

fn node(name: &str, weight: f64) -> GraphNode {
    GraphNode {
        name: name.to_string(),
        weight,
        rejected: false,
    }
}

/// H1 high dose and H2 low dose are primary (alpha split equally); H3 and H4
/// are the key secondary hypotheses of the high and low dose.
fn two_dose_graph() -> GraphFigure {
    GraphFigure {
        title: "Testing strategy: primary and key secondary hypotheses".to_string(),
        id_prefix: "graph-initial".to_string(),
        nodes: vec![
            node("H1", 0.5),
            node("H2", 0.5),
            node("H3", 0.0),
            node("H4", 0.0),
        ],
        transitions: vec![
            vec![0.0, 0.5, 0.5, 0.0],
            vec![0.5, 0.0, 0.0, 0.5],
            vec![0.0, 1.0, 0.0, 0.0],
            vec![1.0, 0.0, 0.0, 0.0],
        ],
        rows: Some(vec![vec![0, 1], vec![2, 3]]),
    }
}

/// The same graph after H1 is rejected, updated by hand with Algorithm 1 of
/// Bretz et al. (2009): w2 = 0.5 + 0.5·0.5 = 0.75, w3 = 0.5·0.5 = 0.25;
/// g23 = (0 + 0.5·0.5)/(1 − 0.5·0.5) = 1/3, g24 = 0.5/0.75 = 2/3,
/// g42 = 0 + 1·0.5 = 0.5, g43 = 0 + 1·0.5 = 0.5, g32 = 1 unchanged.
fn two_dose_graph_after_h1() -> GraphFigure {
    GraphFigure {
        title: "After rejecting H1".to_string(),
        id_prefix: "graph-step-1".to_string(),
        nodes: vec![
            GraphNode {
                name: "H1".to_string(),
                weight: 0.0,
                rejected: true,
            },
            node("H2", 0.75),
            node("H3", 0.25),
            node("H4", 0.0),
        ],
        transitions: vec![
            vec![0.0, 0.0, 0.0, 0.0],
            vec![0.0, 0.0, 1.0 / 3.0, 2.0 / 3.0],
            vec![0.0, 1.0, 0.0, 0.0],
            vec![0.0, 0.5, 0.5, 0.0],
        ],
        rows: Some(vec![vec![0, 1], vec![2, 3]]),
    }
}

/// Five hypotheses in the default layout (a row of four, then one), with a
/// fixed-sequence chain plus an arrow that skips a node in the same row.
fn default_layout_graph() -> GraphFigure {
    let mut transitions = vec![vec![0.0; 5]; 5];
    transitions[0][1] = 0.75;
    transitions[0][2] = 0.25;
    transitions[1][2] = 1.0;
    transitions[2][3] = 1.0;
    transitions[3][4] = 1.0;
    transitions[4][0] = 1.0;
    GraphFigure {
        title: "Fixed sequence with a shortcut".to_string(),
        id_prefix: "graph-chain".to_string(),
        nodes: vec![
            node("H1", 1.0),
            node("H2", 0.0),
            node("H3", 0.0),
            node("H4", 0.0),
            node("H5", 0.0),
        ],
        transitions,
        rows: None,
    }
}

// ---------------------------------------------------------------------------
// Helpers: golden files and a small XML checker (no XML crate is available).
// ---------------------------------------------------------------------------

fn golden_path(name: &str) -> std::path::PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("golden")
        .join("figures")
        .join(name)
}

/// Compares `actual` with the stored golden file byte for byte, or rewrites
/// the file when the environment variable UPDATE_GOLDEN is set.
fn check_golden(name: &str, actual: &str) {
    let path = golden_path(name);
    if std::env::var_os("UPDATE_GOLDEN").is_some() {
        std::fs::create_dir_all(path.parent().expect("golden folder"))
            .expect("create golden folder");
        std::fs::write(&path, actual).expect("write golden file");
        return;
    }
    let expected = std::fs::read_to_string(&path)
        .unwrap_or_else(|_| panic!("missing golden file {name}; run UPDATE_GOLDEN=1 cargo test"));
    if actual != expected {
        let first_difference = actual
            .lines()
            .zip(expected.lines())
            .position(|(a, e)| a != e)
            .unwrap_or_else(|| actual.lines().count().min(expected.lines().count()));
        panic!(
            "{name} differs from its golden file at line {}:\n  actual:   {:?}\n  expected: {:?}\n\
             (if the change is intended: UPDATE_GOLDEN=1 cargo test, then review the diff)",
            first_difference + 1,
            actual.lines().nth(first_difference),
            expected.lines().nth(first_difference)
        );
    }
}

#[derive(Debug)]
struct Element {
    name: String,
    attributes: Vec<(String, String)>,
    /// Text directly inside this element (entities left as written).
    text: String,
}

impl Element {
    fn attribute(&self, name: &str) -> Option<&str> {
        self.attributes
            .iter()
            .find(|(key, _)| key == name)
            .map(|(_, value)| value.as_str())
    }
    fn number(&self, name: &str) -> f64 {
        self.attribute(name)
            .unwrap_or_else(|| panic!("<{}> has no {name}", self.name))
            .parse()
            .unwrap_or_else(|_| panic!("<{}> {name} is not a number", self.name))
    }
}

fn check_entities(text: &str) -> Result<(), String> {
    let mut rest = text;
    while let Some(at) = rest.find('&') {
        let after = &rest[at + 1..];
        let end = after
            .find(';')
            .ok_or_else(|| format!("bare '&' in {text:?}"))?;
        let entity = &after[..end];
        let known = matches!(entity, "amp" | "lt" | "gt" | "quot" | "apos" | "#39")
            || (entity.starts_with('#')
                && entity[1..].chars().all(|c| c.is_ascii_digit())
                && entity.len() > 1);
        if !known {
            return Err(format!("unknown entity &{entity}; in {text:?}"));
        }
        rest = &after[end + 1..];
    }
    Ok(())
}

/// Parses the subset of XML the figures use and checks that it is well
/// formed: tags balance, attributes are quoted and unique, text holds no raw
/// '<' or '>' and only known entities, and there is one root `<svg>`.
fn parse_xml(document: &str) -> Result<Vec<Element>, String> {
    let mut elements: Vec<Element> = Vec::new();
    let mut open: Vec<usize> = Vec::new();
    let mut roots = 0;
    let mut rest = document;
    loop {
        let next_tag = rest.find('<');
        let text = &rest[..next_tag.unwrap_or(rest.len())];
        if text.contains('>') {
            return Err(format!("raw '>' in text {text:?}"));
        }
        check_entities(text)?;
        match open.last() {
            Some(&index) => elements[index].text.push_str(text),
            None if !text.trim().is_empty() => {
                return Err(format!("text outside the root: {text:?}"));
            }
            None => {}
        }
        let Some(at) = next_tag else { break };
        rest = &rest[at..];
        if let Some(comment) = rest.strip_prefix("<!--") {
            let end = comment.find("-->").ok_or("unclosed comment")?;
            rest = &comment[end + 3..];
            continue;
        }
        if let Some(closing) = rest.strip_prefix("</") {
            let end = closing.find('>').ok_or("unclosed end tag")?;
            let name = closing[..end].trim();
            let index = open
                .pop()
                .ok_or_else(|| format!("end tag </{name}> with nothing open"))?;
            if elements[index].name != name {
                return Err(format!(
                    "end tag </{name}> closes <{}>",
                    elements[index].name
                ));
            }
            rest = &closing[end + 1..];
            continue;
        }
        let tag = &rest[1..];
        let name_end = tag
            .find(|c: char| !(c.is_ascii_alphanumeric() || c == '-' || c == ':'))
            .ok_or("unclosed tag")?;
        let name = &tag[..name_end];
        if name.is_empty() || !name.starts_with(|c: char| c.is_ascii_alphabetic()) {
            return Err(format!("bad tag name near {:?}", &tag[..tag.len().min(20)]));
        }
        let mut element = Element {
            name: name.to_string(),
            attributes: Vec::new(),
            text: String::new(),
        };
        let mut cursor = &tag[name_end..];
        let self_closing;
        loop {
            let trimmed = cursor.trim_start();
            if trimmed.len() == cursor.len()
                && !(trimmed.starts_with('>') || trimmed.starts_with("/>"))
            {
                return Err(format!("<{name}>: attributes must be separated by space"));
            }
            cursor = trimmed;
            if let Some(after) = cursor.strip_prefix("/>") {
                self_closing = true;
                cursor = after;
                break;
            }
            if let Some(after) = cursor.strip_prefix('>') {
                self_closing = false;
                cursor = after;
                break;
            }
            let key_end = cursor
                .find('=')
                .ok_or_else(|| format!("<{name}>: attribute without value"))?;
            let key = &cursor[..key_end];
            if key.is_empty()
                || !key
                    .chars()
                    .all(|c| c.is_ascii_alphanumeric() || c == '-' || c == ':' || c == '_')
            {
                return Err(format!("<{name}>: bad attribute name {key:?}"));
            }
            let after_equals = &cursor[key_end + 1..];
            let quote = after_equals
                .chars()
                .next()
                .ok_or("attribute at end of input")?;
            if quote != '"' && quote != '\'' {
                return Err(format!("<{name}> {key}: value not quoted"));
            }
            let value_end = after_equals[1..]
                .find(quote)
                .ok_or_else(|| format!("<{name}> {key}: unclosed value"))?;
            let value = &after_equals[1..1 + value_end];
            if value.contains('<') {
                return Err(format!("<{name}> {key}: raw '<' in value"));
            }
            check_entities(value)?;
            if element
                .attributes
                .iter()
                .any(|(existing, _)| existing == key)
            {
                return Err(format!("<{name}>: attribute {key} twice"));
            }
            element
                .attributes
                .push((key.to_string(), value.to_string()));
            cursor = &after_equals[1 + value_end + 1..];
        }
        if open.is_empty() {
            roots += 1;
            if name != "svg" {
                return Err(format!("root element is <{name}>, expected <svg>"));
            }
        }
        elements.push(element);
        if !self_closing {
            open.push(elements.len() - 1);
        }
        rest = cursor;
    }
    if let Some(&index) = open.last() {
        return Err(format!("<{}> is never closed", elements[index].name));
    }
    if roots != 1 {
        return Err(format!("{roots} root elements, expected exactly one"));
    }
    Ok(elements)
}

/// Checks shared by every figure: well-formed, accessible, scalable, no
/// non-numbers, no negative zero, every `url(#id)` resolving inside the figure.
fn check_figure(svg: &str) -> Vec<Element> {
    let elements =
        parse_xml(svg).unwrap_or_else(|problem| panic!("not well formed: {problem}\n{svg}"));
    let root = &elements[0];
    assert_eq!(root.attribute("role"), Some("img"));
    assert!(
        root.attribute("aria-label")
            .is_some_and(|label| !label.is_empty())
    );
    assert_eq!(root.attribute("width"), Some("100%"));
    assert!(root.attribute("viewBox").is_some());
    assert!(
        root.attribute("style")
            .is_some_and(|style| style.contains("max-width:"))
    );
    assert_eq!(
        elements[1].name, "title",
        "the <title> comes first inside <svg>"
    );
    for forbidden in ["NaN", "<script", "href", "@import", "class="] {
        assert!(!svg.contains(forbidden), "figure contains {forbidden:?}");
    }
    // Attribute values (coordinates, sizes) never hold a non-finite number.
    for element in &elements {
        for (key, value) in &element.attributes {
            if key != "aria-label" {
                assert!(
                    !value.contains("inf"),
                    "<{}> {key}=\"{value}\"",
                    element.name
                );
            }
        }
    }
    // No number is written as negative zero ("-0", "-0.0", "-0.00").
    for (at, _) in svg.match_indices("-0") {
        let digits: String = svg[at + 1..]
            .chars()
            .take_while(|c| c.is_ascii_digit() || *c == '.')
            .collect();
        let preceded_by_name = svg[..at]
            .chars()
            .last()
            .is_some_and(|c| c.is_ascii_alphanumeric());
        if !preceded_by_name {
            assert!(
                digits
                    .parse::<f64>()
                    .map(|value| value != 0.0)
                    .unwrap_or(true),
                "negative zero near {at}"
            );
        }
    }
    let ids: Vec<&str> = elements
        .iter()
        .filter_map(|element| element.attribute("id"))
        .collect();
    for (index, id) in ids.iter().enumerate() {
        assert!(!ids[..index].contains(id), "duplicate id {id}");
    }
    for element in &elements {
        for (_, value) in &element.attributes {
            if let Some(start) = value.find("url(#") {
                let reference = &value[start + 5
                    ..value[start..]
                        .find(')')
                        .map(|end| start + end)
                        .unwrap_or(value.len())];
                assert!(
                    ids.contains(&reference),
                    "url(#{reference}) does not resolve"
                );
            }
        }
    }
    elements
}

/// Text content of all `<text>` elements, in order.
fn texts(elements: &[Element]) -> Vec<&str> {
    elements
        .iter()
        .filter(|element| element.name == "text")
        .map(|element| element.text.as_str())
        .collect()
}

fn text_element<'a>(elements: &'a [Element], content: &str) -> &'a Element {
    elements
        .iter()
        .find(|element| element.name == "text" && element.text == content)
        .unwrap_or_else(|| panic!("no <text> reading {content:?}"))
}

// ---------------------------------------------------------------------------
// Snapshots
// ---------------------------------------------------------------------------

#[test]
fn golden_forest_plots() {
    let cases = [
        ("forest-easi-differences.svg", easi_differences()),
        ("forest-easi75-odds-ratios.svg", easi75_odds_ratios()),
        ("forest-single-row.svg", single_row()),
        ("forest-wide-and-missing.svg", wide_and_missing()),
        ("forest-nothing-estimable.svg", nothing_estimable()),
        ("forest-narrow-ratio.svg", narrow_ratio()),
    ];
    for (name, plot) in cases {
        let svg = forest_svg(&plot).unwrap_or_else(|error| panic!("{name}: {error}"));
        check_figure(&svg);
        check_golden(name, &svg);
    }
}

#[test]
fn golden_graphs() {
    let cases = [
        ("graph-two-doses.svg", two_dose_graph()),
        ("graph-two-doses-after-h1.svg", two_dose_graph_after_h1()),
        ("graph-default-layout.svg", default_layout_graph()),
    ];
    for (name, figure) in cases {
        let svg = graph_svg(&figure).unwrap_or_else(|error| panic!("{name}: {error}"));
        check_figure(&svg);
        check_golden(name, &svg);
    }
}

// ---------------------------------------------------------------------------
// Content and geometry
// ---------------------------------------------------------------------------

/// x of the centre of each estimate square, in row order (squares are the
/// only rectangles in a forest plot).
fn square_centres(elements: &[Element]) -> Vec<f64> {
    elements
        .iter()
        .filter(|element| element.name == "rect")
        .map(|element| element.number("x") + 0.5 * element.number("width"))
        .collect()
}

#[test]
fn difference_points_sit_where_the_linear_axis_puts_them() {
    let plot = easi_differences();
    let elements = check_figure(&forest_svg(&plot).expect("valid plot"));
    let all_text = texts(&elements).join(" ");
    // The right column prints the numbers with one decimal and a minus sign.
    assert!(all_text.contains("\u{2212}8.1 (\u{2212}11.2 to \u{2212}5.0)"));
    assert!(all_text.contains("\u{2212}14.6 (\u{2212}17.7 to \u{2212}11.5)"));
    assert!(all_text.contains("\u{2212}6.5 (\u{2212}9.6 to \u{2212}3.4)"));
    // Ticks −20 to 0 in steps of 5 (1-2-5 rule, common practice).
    for tick in ["\u{2212}20", "\u{2212}15", "\u{2212}10", "\u{2212}5", "0"] {
        text_element(&elements, tick);
    }
    let x_minus_20 = text_element(&elements, "\u{2212}20").number("x");
    let x_zero = text_element(&elements, "0").number("x");
    let centres = square_centres(&elements);
    assert_eq!(centres.len(), 3);
    for (centre, row) in centres.iter().zip(&plot.rows) {
        let expected = x_minus_20 + (row.estimate + 20.0) / 20.0 * (x_zero - x_minus_20);
        // Tolerance: coordinates are written with one decimal, so three
        // roundings of at most 0.05 each.
        assert!(
            (centre - expected).abs() <= 0.15,
            "{}: {centre} vs {expected}",
            row.label
        );
    }
    // The dashed null line stands at the 0 tick.
    let null_line = elements
        .iter()
        .find(|element| element.name == "line" && element.attribute("stroke-dasharray").is_some())
        .expect("null line");
    assert!((null_line.number("x1") - x_zero).abs() <= 0.1);
    assert!(
        !texts(&elements)
            .iter()
            .any(|text| text.contains("arrowhead")),
        "nothing is clipped"
    );
}

#[test]
fn ratio_points_sit_where_the_log_axis_puts_them() {
    let plot = easi75_odds_ratios();
    let elements = check_figure(&forest_svg(&plot).expect("valid plot"));
    // Range 1 to 5.9 uses powers of two (common practice for odds ratios).
    let x_one = text_element(&elements, "1").number("x");
    let x_eight = text_element(&elements, "8").number("x");
    let x_two = text_element(&elements, "2").number("x");
    let x_four = text_element(&elements, "4").number("x");
    // Equal ratios are equal distances on a log axis.
    assert!(((x_two - x_one) - (x_four - x_two)).abs() <= 0.15);
    for (centre, row) in square_centres(&elements).iter().zip(&plot.rows) {
        let expected = x_one + row.estimate.ln() / 8f64.ln() * (x_eight - x_one);
        assert!(
            (centre - expected).abs() <= 0.15,
            "{}: {centre} vs {expected}",
            row.label
        );
    }
    let all_text = texts(&elements).join(" ");
    assert!(all_text.contains("2.1 (1.3 to 3.4)"));
    assert!(all_text.contains("3.6 (2.2 to 5.9)"));
    // The favours texts sit either side of the null line at 1.
    let lower_side = text_element(&elements, "favours placebo");
    let higher_side = text_element(&elements, "favours active dose");
    assert_eq!(lower_side.attribute("text-anchor"), Some("end"));
    assert!(lower_side.number("x") < x_one && higher_side.number("x") > x_one);
}

#[test]
fn a_very_wide_interval_is_clipped_and_the_figure_says_so() {
    let svg = forest_svg(&wide_and_missing()).expect("valid plot");
    let elements = check_figure(&svg);
    let arrowheads = elements
        .iter()
        .filter(|element| {
            element.name == "path" && element.attribute("d").is_some_and(|d| d.ends_with('Z'))
        })
        .count();
    // Both ends of the Asia-Pacific interval are clipped (two arrowheads); the
    // other two triangles are the pointers beside the favours texts.
    assert_eq!(arrowheads, 2 + 2);
    let all_text = texts(&elements).join(" ");
    assert!(all_text.contains("arrowhead marks an interval"));
    // The complete numbers still appear, and the note replaces the point.
    assert!(all_text.contains("0.55 (&lt;0.01 to 75.00)"));
    assert!(all_text.contains("not estimable: no flares in either arm"));
    assert_eq!(square_centres(&elements).len(), 3);
}

#[test]
fn all_rows_not_estimable_draws_labels_and_notes_without_an_axis() {
    let svg = forest_svg(&nothing_estimable()).expect("valid plot");
    let elements = check_figure(&svg);
    assert_eq!(square_centres(&elements).len(), 0);
    assert!(
        !svg.contains("stroke-dasharray"),
        "no null line without an axis"
    );
    let all_text = texts(&elements);
    assert_eq!(
        all_text
            .iter()
            .filter(|text| **text == "not estimable")
            .count(),
        2
    );
    assert!(
        all_text
            .iter()
            .any(|text| text.starts_with("No contrast could be drawn"))
    );
}

#[test]
fn graph_shows_weights_and_every_transition() {
    let figure = two_dose_graph();
    let elements = check_figure(&graph_svg(&figure).expect("valid graph"));
    let paths_with_markers: Vec<&Element> = elements
        .iter()
        .filter(|element| element.attribute("marker-end").is_some())
        .collect();
    // Six non-zero transitions, six arrows, each pointing at this figure's marker.
    assert_eq!(paths_with_markers.len(), 6);
    for path in &paths_with_markers {
        assert_eq!(
            path.attribute("marker-end"),
            Some("url(#graph-initial-arrow)")
        );
    }
    let all_text = texts(&elements);
    for name in ["H1", "H2", "H3", "H4"] {
        assert!(all_text.contains(&name));
    }
    assert_eq!(
        all_text.iter().filter(|text| **text == "0.5").count(),
        2 + 4,
        "two weights, four arrows"
    );
    assert_eq!(all_text.iter().filter(|text| **text == "1").count(), 2);
    assert_eq!(all_text.iter().filter(|text| **text == "0").count(), 2);
}

#[test]
fn opposite_transitions_get_labels_that_do_not_overlap() {
    let elements = check_figure(&graph_svg(&two_dose_graph()).expect("valid graph"));
    // Label patches are the rectangles; no two may overlap (and the six arrows
    // each have one).
    let patches: Vec<(f64, f64, f64, f64)> = elements
        .iter()
        .filter(|element| element.name == "rect")
        .map(|element| {
            let x = element.number("x");
            let y = element.number("y");
            (
                x,
                y,
                x + element.number("width"),
                y + element.number("height"),
            )
        })
        .collect();
    assert_eq!(patches.len(), 6);
    for (index, a) in patches.iter().enumerate() {
        for b in &patches[index + 1..] {
            let overlap = a.0 < b.2 && b.0 < a.2 && a.1 < b.3 && b.1 < a.3;
            assert!(!overlap, "label patches {a:?} and {b:?} overlap");
        }
    }
}

#[test]
fn rejected_hypotheses_are_marked_and_weights_print_four_significant_digits() {
    let elements = check_figure(&graph_svg(&two_dose_graph_after_h1()).expect("valid graph"));
    let all_text = texts(&elements);
    assert!(all_text.contains(&"rejected"));
    assert!(all_text.contains(&"0.75"));
    assert!(all_text.contains(&"0.25"));
    assert!(all_text.contains(&"0.3333"));
    assert!(all_text.contains(&"0.6667"));
    let dashed_circles = elements
        .iter()
        .filter(|element| {
            element.name == "circle" && element.attribute("stroke-dasharray").is_some()
        })
        .count();
    assert_eq!(dashed_circles, 1);
}

#[test]
fn two_graphs_in_one_page_have_distinct_marker_ids() {
    let first = graph_svg(&two_dose_graph()).expect("valid graph");
    let second = graph_svg(&two_dose_graph_after_h1()).expect("valid graph");
    let id_list = |svg: &str| -> Vec<String> {
        parse_xml(svg)
            .expect("well formed")
            .iter()
            .filter_map(|element| element.attribute("id").map(str::to_string))
            .collect()
    };
    let first_ids = id_list(&first);
    let second_ids = id_list(&second);
    assert!(!first_ids.is_empty());
    for id in &first_ids {
        assert!(!second_ids.contains(id), "id {id} appears in both figures");
    }
    // Forest plots carry no ids at all, so any number of them can share a page.
    assert!(
        !forest_svg(&easi_differences())
            .expect("valid")
            .contains(" id=")
    );
}

#[test]
fn empty_titles_fall_back_to_a_generic_accessible_name() {
    let svg = forest_svg(&ForestPlot {
        title: String::new(),
        ..single_row()
    })
    .expect("valid");
    let elements = check_figure(&svg);
    assert_eq!(elements[0].attribute("aria-label"), Some("Forest plot"));
    assert!(
        texts(&elements).iter().all(|text| !text.is_empty()),
        "no empty title line"
    );
    let svg = graph_svg(&GraphFigure {
        title: "  ".to_string(),
        ..two_dose_graph()
    })
    .expect("valid");
    let elements = check_figure(&svg);
    assert_eq!(
        elements[0].attribute("aria-label"),
        Some("Multiplicity graph")
    );
}

// ---------------------------------------------------------------------------
// Escaping and determinism
// ---------------------------------------------------------------------------

const HOSTILE: &str = "<script>alert(\"x\")</script> & 'q' ]]> <!-- --> <b onload=x>";
const HOSTILE_ESCAPED: &str = "&lt;script&gt;alert(&quot;x&quot;)&lt;/script&gt; &amp; &#39;q&#39; ]]&gt; &lt;!-- --&gt; &lt;b onload=x&gt;";

fn assert_nothing_unescaped(svg: &str) {
    check_figure(svg);
    for raw in [
        "<script",
        "</script",
        "alert(\"x\")",
        "'q'",
        "<!--",
        "]]>",
        "<b ",
    ] {
        assert!(!svg.contains(raw), "found unescaped {raw:?}");
    }
    assert!(svg.contains("&lt;script&gt;alert(&quot;x&quot;)&lt;/script&gt;"));
}

#[test]
fn every_user_string_is_escaped_in_forest_plots() {
    let mut plot = easi_differences();
    plot.title = HOSTILE.to_string();
    plot.axis_label = HOSTILE.to_string();
    plot.favours_lower = HOSTILE.to_string();
    plot.favours_higher = HOSTILE.to_string();
    for row in &mut plot.rows {
        row.label = HOSTILE.to_string();
    }
    plot.rows.push(ForestRow {
        note: Some(HOSTILE.to_string()),
        ..plot.rows[0].clone()
    });
    let svg = forest_svg(&plot).expect("valid plot");
    assert_nothing_unescaped(&svg);
    // The title lands whole in the aria-label and <title>.
    assert!(svg.contains(&format!("aria-label=\"{HOSTILE_ESCAPED}\"")));
    assert!(svg.contains(&format!("<title>{HOSTILE_ESCAPED}</title>")));
}

#[test]
fn every_user_string_is_escaped_in_graphs() {
    let mut figure = two_dose_graph();
    figure.title = HOSTILE.to_string();
    for node in &mut figure.nodes {
        node.name = HOSTILE.to_string();
    }
    let svg = graph_svg(&figure).expect("valid graph");
    assert_nothing_unescaped(&svg);
    assert!(svg.contains(&format!("<title>{HOSTILE_ESCAPED}</title>")));
}

#[test]
fn the_same_input_gives_the_same_bytes() {
    let forest_plots = [
        easi_differences(),
        easi75_odds_ratios(),
        wide_and_missing(),
        narrow_ratio(),
    ];
    for plot in &forest_plots {
        let first = forest_svg(plot).expect("valid");
        let second = forest_svg(&plot.clone()).expect("valid");
        assert_eq!(first, second);
    }
    for figure in [
        two_dose_graph(),
        two_dose_graph_after_h1(),
        default_layout_graph(),
    ] {
        let first = graph_svg(&figure).expect("valid");
        // Render on another thread as well: nothing may depend on the thread.
        let copy = figure.clone();
        let second = std::thread::spawn(move || graph_svg(&copy).expect("valid"))
            .join()
            .expect("thread");
        assert_eq!(first, second);
    }
}

#[test]
fn default_layout_bends_an_arrow_around_the_node_it_skips() {
    let figure = default_layout_graph();
    let elements = check_figure(&graph_svg(&figure).expect("valid graph"));
    let circles: Vec<(f64, f64, f64)> = elements
        .iter()
        .filter(|element| element.name == "circle")
        .map(|element| {
            (
                element.number("cx"),
                element.number("cy"),
                element.number("r"),
            )
        })
        .collect();
    assert_eq!(circles.len(), 5);
    // Four on the first row, the fifth centred below.
    assert!(circles[..4].iter().all(|circle| circle.1 == circles[0].1));
    assert!(circles[4].1 > circles[0].1);
    // H1 -> H3 (the second arrow in matrix order) must keep clear of H2.
    let arrows: Vec<&Element> = elements
        .iter()
        .filter(|element| element.attribute("marker-end").is_some())
        .collect();
    let d = arrows[1].attribute("d").expect("path data");
    let numbers: Vec<f64> = d
        .split(['M', 'Q', ',', ' '])
        .filter(|part| !part.is_empty())
        .map(|part| part.parse().expect("number"))
        .collect();
    let (start, control, end) = (
        (numbers[0], numbers[1]),
        (numbers[2], numbers[3]),
        (numbers[4], numbers[5]),
    );
    let (h2_x, h2_y, radius) = circles[1];
    let mut closest = f64::INFINITY;
    for step in 0..=100 {
        let t = step as f64 / 100.0;
        let x = (1.0 - t).powi(2) * start.0 + 2.0 * (1.0 - t) * t * control.0 + t * t * end.0;
        let y = (1.0 - t).powi(2) * start.1 + 2.0 * (1.0 - t) * t * control.1 + t * t * end.1;
        closest = closest.min((x - h2_x).hypot(y - h2_y));
    }
    assert!(
        closest > radius + 4.0,
        "arrow passes {closest} from the centre of H2 (radius {radius})"
    );
}

// ---------------------------------------------------------------------------
// Errors: the rendered messages are stored as a golden file too.
// ---------------------------------------------------------------------------

#[test]
fn invalid_inputs_give_typed_errors_with_clear_messages() {
    let mut messages = String::new();
    let mut expect =
        |case: &str, result: Result<String, FigureError>, expected: fn(&FigureError) -> bool| {
            let error = result.expect_err(case);
            assert!(expected(&error), "{case}: unexpected {error:?}");
            messages.push_str(&format!("{case}: {error}\n"));
        };

    let with_rows = |rows: Vec<ForestRow>, scale: ForestScale| ForestPlot {
        rows,
        scale,
        ..easi_differences()
    };
    expect(
        "forest, no rows",
        forest_svg(&with_rows(vec![], ForestScale::Difference)),
        |e| matches!(e, FigureError::NoRows),
    );
    expect(
        "forest, too many decimals",
        forest_svg(&ForestPlot {
            value_decimals: 12,
            ..easi_differences()
        }),
        |e| matches!(e, FigureError::TooManyDecimals { requested: 12, .. }),
    );
    expect(
        "forest, NaN estimate",
        forest_svg(&with_rows(
            vec![row("A", f64::NAN, -1.0, 1.0)],
            ForestScale::Difference,
        )),
        |e| {
            matches!(
                e,
                FigureError::NonFiniteValue {
                    row: 0,
                    quantity: "estimate",
                    ..
                }
            )
        },
    );
    expect(
        "forest, infinite upper limit",
        forest_svg(&with_rows(
            vec![row("A", 1.0, 0.0, 2.0), row("B", 1.0, 0.0, f64::INFINITY)],
            ForestScale::Difference,
        )),
        |e| {
            matches!(
                e,
                FigureError::NonFiniteValue {
                    row: 1,
                    quantity: "upper limit",
                    ..
                }
            )
        },
    );
    expect(
        "forest, ratio with zero lower limit",
        forest_svg(&with_rows(
            vec![row("A", 1.5, 0.0, 3.0)],
            ForestScale::Ratio,
        )),
        |e| {
            matches!(
                e,
                FigureError::NonPositiveRatio {
                    quantity: "lower limit",
                    ..
                }
            )
        },
    );
    expect(
        "forest, ratio with negative values",
        forest_svg(&with_rows(
            vec![row("A", -0.5, -1.0, 3.0)],
            ForestScale::Ratio,
        )),
        |e| matches!(e, FigureError::NonPositiveRatio { .. }),
    );
    expect(
        "forest, estimate outside its interval",
        forest_svg(&with_rows(
            vec![row("A", 5.0, 1.0, 3.0)],
            ForestScale::Difference,
        )),
        |e| matches!(e, FigureError::IntervalOutOfOrder { .. }),
    );
    expect(
        "forest, range overflows",
        forest_svg(&with_rows(
            vec![row("A", 0.0, -1e308, 1e308)],
            ForestScale::Difference,
        )),
        |e| matches!(e, FigureError::RangeTooWide { .. }),
    );

    let graph = two_dose_graph;
    let with_prefix = |prefix: &str| GraphFigure {
        id_prefix: prefix.to_string(),
        ..graph()
    };
    expect(
        "graph, no nodes",
        graph_svg(&GraphFigure {
            nodes: vec![],
            transitions: vec![],
            rows: None,
            ..graph()
        }),
        |e| matches!(e, FigureError::NoNodes),
    );
    expect("graph, empty id prefix", graph_svg(&with_prefix("")), |e| {
        matches!(e, FigureError::InvalidIdPrefix { .. })
    });
    expect(
        "graph, id prefix with a space",
        graph_svg(&with_prefix("two words")),
        |e| matches!(e, FigureError::InvalidIdPrefix { .. }),
    );
    expect(
        "graph, id prefix with a quote",
        graph_svg(&with_prefix("a\"b")),
        |e| matches!(e, FigureError::InvalidIdPrefix { .. }),
    );
    let with_weight = |index: usize, weight: f64| {
        let mut figure = graph();
        figure.nodes[index].weight = weight;
        figure
    };
    expect(
        "graph, NaN weight",
        graph_svg(&with_weight(2, f64::NAN)),
        |e| matches!(e, FigureError::NonFiniteWeight { node: 2, .. }),
    );
    expect(
        "graph, weight above 1",
        graph_svg(&with_weight(0, 1.5)),
        |e| matches!(e, FigureError::WeightOutOfRange { node: 0, .. }),
    );
    expect(
        "graph, negative weight",
        graph_svg(&with_weight(3, -0.1)),
        |e| matches!(e, FigureError::WeightOutOfRange { node: 3, .. }),
    );
    expect(
        "graph, weights add up above 1",
        graph_svg(&with_weight(2, 0.2)),
        |e| matches!(e, FigureError::WeightsSumAboveOne { .. }),
    );
    let with_transitions = |transitions: Vec<Vec<f64>>| GraphFigure {
        transitions,
        ..graph()
    };
    expect(
        "graph, three rows for four nodes",
        graph_svg(&with_transitions(graph().transitions[..3].to_vec())),
        |e| {
            matches!(
                e,
                FigureError::TransitionRowCount {
                    n_nodes: 4,
                    n_rows: 3
                }
            )
        },
    );
    let with_entry = |from: usize, to: usize, value: f64| {
        let mut figure = graph();
        figure.transitions[from][to] = value;
        figure
    };
    let mut short_row = graph();
    short_row.transitions[1].pop();
    expect("graph, short transition row", graph_svg(&short_row), |e| {
        matches!(
            e,
            FigureError::TransitionRowLength {
                row: 1,
                length: 3,
                ..
            }
        )
    });
    expect(
        "graph, NaN transition",
        graph_svg(&with_entry(2, 3, f64::NAN)),
        |e| matches!(e, FigureError::NonFiniteTransition { from: 2, to: 3, .. }),
    );
    expect(
        "graph, self-loop",
        graph_svg(&with_entry(1, 1, 0.25)),
        |e| matches!(e, FigureError::SelfLoop { node: 1, .. }),
    );
    expect(
        "graph, transition above 1",
        graph_svg(&with_entry(3, 2, 1.5)),
        |e| matches!(e, FigureError::TransitionOutOfRange { from: 3, to: 2, .. }),
    );
    expect(
        "graph, negative transition",
        graph_svg(&with_entry(0, 3, -0.5)),
        |e| matches!(e, FigureError::TransitionOutOfRange { from: 0, to: 3, .. }),
    );
    expect(
        "graph, transitions add up above 1",
        graph_svg(&with_entry(0, 3, 0.5)),
        |e| matches!(e, FigureError::TransitionRowSumAboveOne { from: 0, .. }),
    );
    let with_layout = |rows: Vec<Vec<usize>>| GraphFigure {
        rows: Some(rows),
        ..graph()
    };
    expect(
        "graph, layout index out of range",
        graph_svg(&with_layout(vec![vec![0, 1], vec![2, 4]])),
        |e| {
            matches!(
                e,
                FigureError::LayoutIndexOutOfRange {
                    layout_row: 1,
                    index: 4,
                    n_nodes: 4
                }
            )
        },
    );
    expect(
        "graph, layout names a node twice",
        graph_svg(&with_layout(vec![vec![0, 1], vec![1, 2, 3]])),
        |e| matches!(e, FigureError::LayoutDuplicateNode { index: 1 }),
    );
    expect(
        "graph, layout leaves a node out",
        graph_svg(&with_layout(vec![vec![0, 1], vec![3]])),
        |e| matches!(e, FigureError::LayoutMissingNode { index: 2 }),
    );
    expect(
        "graph, empty layout row",
        graph_svg(&with_layout(vec![vec![0, 1], vec![], vec![2, 3]])),
        |e| matches!(e, FigureError::EmptyLayoutRow { layout_row: 1 }),
    );

    check_golden("errors.txt", &messages);
}

// ---------------------------------------------------------------------------
// The checker itself must reject broken markup, or the checks above prove nothing.
// ---------------------------------------------------------------------------

#[test]
fn the_xml_checker_rejects_broken_markup() {
    let good = "<svg a=\"1\"><g><text x=\"1\">a &amp; b</text></g><line x1=\"0\"/></svg>";
    assert!(parse_xml(good).is_ok());
    for bad in [
        "<svg><g></svg>",
        "<svg><g></text></g></svg>",
        "<svg a=1></svg>",
        "<svg a=\"1\" a=\"2\"></svg>",
        "<svg><text>a & b</text></svg>",
        "<svg><text>a < b</text></svg>",
        "<svg><text>a > b</text></svg>",
        "<svg a=\"<\"></svg>",
        "<svg></svg><svg></svg>",
        "<svg>",
        "<svg a=\"1\"b=\"2\"></svg>",
        "<g></g>",
    ] {
        assert!(parse_xml(bad).is_err(), "accepted {bad:?}");
    }
}

// ---------------------------------------------------------------------------
// Properties: any valid input draws, well formed and free of non-numbers.
// ---------------------------------------------------------------------------

mod properties {
    use super::*;
    use proptest::prelude::*;

    /// One generated row: (centre, spread below, spread above, has a note).
    type RowSeed = (f64, f64, f64, bool);

    /// (ratio scale?, rows, decimals)
    fn forest_input() -> impl Strategy<Value = (bool, Vec<RowSeed>, usize)> {
        (
            any::<bool>(),
            prop::collection::vec(
                (
                    -6.0f64..6.0,
                    0.0f64..3.0,
                    0.0f64..3.0,
                    prop::bool::weighted(0.15),
                ),
                1..9,
            ),
            0usize..4,
        )
    }

    proptest! {
        #![proptest_config(ProptestConfig { cases: 96, ..ProptestConfig::default() })]

        #[test]
        fn any_valid_forest_plot_draws((ratio, rows, decimals) in forest_input()) {
            let rows: Vec<ForestRow> = rows
                .iter()
                .enumerate()
                .map(|(index, &(centre, below, above, noted))| {
                    let label = format!("Contrast {index}");
                    if noted {
                        noted_row(&label, "not estimable")
                    } else if ratio {
                        // Ratios from about 0.0025 to 400, intervals up to a factor of 20 each side.
                        row(&label, centre.exp(), (centre - below).exp(), (centre + above).exp())
                    } else {
                        let scale = 10f64.powf(centre);
                        row(&label, centre * scale, (centre - below) * scale, (centre + above) * scale)
                    }
                })
                .collect();
            let plot = ForestPlot {
                scale: if ratio { ForestScale::Ratio } else { ForestScale::Difference },
                rows,
                value_decimals: decimals,
                ..easi_differences()
            };
            let svg = forest_svg(&plot).map_err(|error| TestCaseError::fail(error.to_string()))?;
            check_figure(&svg);
            prop_assert_eq!(svg.clone(), forest_svg(&plot).expect("valid"));
        }

        #[test]
        fn any_valid_graph_draws(
            n_nodes in 1usize..8,
            raw_weights in prop::collection::vec(0.0f64..1.0, 8),
            raw_transitions in prop::collection::vec(prop::collection::vec(0.0f64..1.0, 8), 8),
            sparsity in prop::collection::vec(prop::collection::vec(any::<bool>(), 8), 8),
            rejected in prop::collection::vec(prop::bool::weighted(0.2), 8),
        ) {
            let weight_total: f64 = raw_weights[..n_nodes].iter().sum::<f64>().max(1e-9);
            let nodes: Vec<GraphNode> = (0..n_nodes)
                .map(|index| GraphNode {
                    name: format!("H{}", index + 1),
                    weight: raw_weights[index] / weight_total,
                    rejected: rejected[index],
                })
                .collect();
            let transitions: Vec<Vec<f64>> = (0..n_nodes)
                .map(|from| {
                    let mut row: Vec<f64> = (0..n_nodes)
                        .map(|to| if from == to || !sparsity[from][to] { 0.0 } else { raw_transitions[from][to] })
                        .collect();
                    let total: f64 = row.iter().sum();
                    if total > 0.0 {
                        for value in &mut row {
                            *value /= total;
                        }
                    }
                    row
                })
                .collect();
            let figure = GraphFigure {
                title: "Random graph".to_string(),
                id_prefix: "random".to_string(),
                nodes,
                transitions,
                rows: None,
            };
            let svg = graph_svg(&figure).map_err(|error| TestCaseError::fail(error.to_string()))?;
            check_figure(&svg);
        }
    }
}
