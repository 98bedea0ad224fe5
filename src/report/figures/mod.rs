//! Report figures: the forest plot of treatment contrasts ([`forest`]) and the
//! diagram of a graphical multiplicity procedure ([`graph`]), each drawn by our
//! own code as one self-contained inline SVG string for the HTML report.
//!
//! This module owns the shared pieces: the one error type of the figures, XML
//! escaping, deterministic number formatting, a conservative text-width estimate
//! and the house style (colours, font stacks). It must not do I/O, read the clock
//! or the environment, or iterate over hash maps: the same input always yields
//! the same bytes, so a report's checksum is stable. Nothing in a figure depends
//! on the page it is placed in (no CSS classes, no scripts, no external links).

pub mod forest;
pub mod graph;

use std::fmt;

pub use forest::{ForestPlot, ForestRow, ForestScale, forest_svg};
pub use graph::{GraphFigure, GraphNode, graph_svg};

/// Why a figure could not be drawn. Every variant carries the offending values
/// so the message can quote them; locations use the input's own field paths
/// (`rows[1]`, `transitions[0][2]`) with zero-based indices.
#[derive(Debug, Clone, PartialEq)]
pub enum FigureError {
    /// A forest plot was given no rows.
    NoRows,
    /// A forest plot asked for more decimals than a report table can sensibly show.
    TooManyDecimals { requested: usize, maximum: usize },
    /// A value to be drawn on a forest plot is NaN or infinite.
    NonFiniteValue {
        row: usize,
        label: String,
        quantity: &'static str,
        value: f64,
    },
    /// A value on a ratio (log) axis is zero or negative.
    NonPositiveRatio {
        row: usize,
        label: String,
        quantity: &'static str,
        value: f64,
    },
    /// The interval does not satisfy lower ≤ estimate ≤ upper.
    IntervalOutOfOrder {
        row: usize,
        label: String,
        lower: f64,
        estimate: f64,
        upper: f64,
    },
    /// The values span a range too large to place on an axis (it overflows).
    RangeTooWide { lowest: f64, highest: f64 },
    /// A multiplicity graph was given no hypotheses.
    NoNodes,
    /// The transition matrix does not have one row per node.
    TransitionRowCount { n_nodes: usize, n_rows: usize },
    /// A row of the transition matrix does not have one entry per node.
    TransitionRowLength {
        row: usize,
        n_nodes: usize,
        length: usize,
    },
    /// A node's weight is NaN or infinite.
    NonFiniteWeight {
        node: usize,
        name: String,
        value: f64,
    },
    /// A node's weight lies outside [0, 1].
    WeightOutOfRange {
        node: usize,
        name: String,
        value: f64,
    },
    /// The node weights add up to more than 1 (more than the whole alpha).
    WeightsSumAboveOne { sum: f64 },
    /// A transition weight is NaN or infinite.
    NonFiniteTransition { from: usize, to: usize, value: f64 },
    /// A transition weight lies outside [0, 1].
    TransitionOutOfRange { from: usize, to: usize, value: f64 },
    /// A hypothesis passes weight to itself.
    SelfLoop {
        node: usize,
        name: String,
        value: f64,
    },
    /// The outgoing transition weights of one node add up to more than 1.
    TransitionRowSumAboveOne { from: usize, name: String, sum: f64 },
    /// The id prefix is empty or holds characters other than A–Z, a–z, 0–9 and '-'.
    InvalidIdPrefix { prefix: String },
    /// A layout row names a node index that does not exist.
    LayoutIndexOutOfRange {
        layout_row: usize,
        index: usize,
        n_nodes: usize,
    },
    /// A layout names the same node twice.
    LayoutDuplicateNode { index: usize },
    /// A layout leaves a node out.
    LayoutMissingNode { index: usize },
    /// A layout row is empty.
    EmptyLayoutRow { layout_row: usize },
}

/// A number as quoted in an error message: Rust's shortest round-trip form,
/// switching to exponent notation for very large or very small magnitudes so
/// that a message never holds hundreds of digits.
fn quoted(value: f64) -> String {
    let magnitude = value.abs();
    if value.is_finite() && value != 0.0 && !(1e-4..1e9).contains(&magnitude) {
        format!("{value:e}")
    } else {
        format!("{value}")
    }
}

impl fmt::Display for FigureError {
    fn fmt(&self, formatter: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            FigureError::NoRows => {
                write!(
                    formatter,
                    "forest plot has no rows; expected at least one contrast"
                )
            }
            FigureError::TooManyDecimals { requested, maximum } => write!(
                formatter,
                "forest plot asks for {requested} decimals; expected at most {maximum}"
            ),
            FigureError::NonFiniteValue {
                row,
                label,
                quantity,
                value,
            } => write!(
                formatter,
                "rows[{row}] ({label:?}) has a non-finite {quantity} ({value_q}); expected a finite \
                 number, or a note such as \"not estimable\" instead of values",
                value_q = quoted(*value)
            ),
            FigureError::NonPositiveRatio {
                row,
                label,
                quantity,
                value,
            } => write!(
                formatter,
                "rows[{row}] ({label:?}) has {quantity} {value_q} on a ratio scale; expected a value \
                 greater than 0",
                value_q = quoted(*value)
            ),
            FigureError::IntervalOutOfOrder {
                row,
                label,
                lower,
                estimate,
                upper,
            } => write!(
                formatter,
                "rows[{row}] ({label:?}) has estimate {estimate_q} with interval {lower_q} to {upper_q}; \
                 expected lower <= estimate <= upper",
                estimate_q = quoted(*estimate),
                lower_q = quoted(*lower),
                upper_q = quoted(*upper)
            ),
            FigureError::RangeTooWide { lowest, highest } => write!(
                formatter,
                "values from {lowest_q} to {highest_q} span too wide a range to draw on one axis",
                lowest_q = quoted(*lowest),
                highest_q = quoted(*highest)
            ),
            FigureError::NoNodes => {
                write!(
                    formatter,
                    "multiplicity graph has no hypotheses; expected at least one"
                )
            }
            FigureError::TransitionRowCount { n_nodes, n_rows } => write!(
                formatter,
                "transition matrix has {n_rows} rows for {n_nodes} hypotheses; expected {n_nodes}"
            ),
            FigureError::TransitionRowLength {
                row,
                n_nodes,
                length,
            } => write!(
                formatter,
                "transitions[{row}] has {length} entries for {n_nodes} hypotheses; expected {n_nodes}"
            ),
            FigureError::NonFiniteWeight { node, name, value } => write!(
                formatter,
                "nodes[{node}] ({name:?}) has a non-finite weight ({value_q}); expected a number in [0, 1]",
                value_q = quoted(*value)
            ),
            FigureError::WeightOutOfRange { node, name, value } => write!(
                formatter,
                "nodes[{node}] ({name:?}) has weight {value_q}; expected a number in [0, 1]",
                value_q = quoted(*value)
            ),
            FigureError::WeightsSumAboveOne { sum } => write!(
                formatter,
                "hypothesis weights add up to {sum_q}; expected a total of at most 1",
                sum_q = quoted(*sum)
            ),
            FigureError::NonFiniteTransition { from, to, value } => write!(
                formatter,
                "transitions[{from}][{to}] is non-finite ({value_q}); expected a number in [0, 1]",
                value_q = quoted(*value)
            ),
            FigureError::TransitionOutOfRange { from, to, value } => write!(
                formatter,
                "transitions[{from}][{to}] is {value_q}; expected a number in [0, 1]",
                value_q = quoted(*value)
            ),
            FigureError::SelfLoop { node, name, value } => write!(
                formatter,
                "transitions[{node}][{node}] is {value_q}: hypothesis {name:?} passes weight to \
                 itself; expected 0 on the diagonal",
                value_q = quoted(*value)
            ),
            FigureError::TransitionRowSumAboveOne { from, name, sum } => write!(
                formatter,
                "transitions[{from}] (from {name:?}) adds up to {sum_q}; expected a total of at most 1",
                sum_q = quoted(*sum)
            ),
            FigureError::InvalidIdPrefix { prefix } => write!(
                formatter,
                "id prefix {prefix:?} is not usable; expected one or more of A-Z, a-z, 0-9 and '-'"
            ),
            FigureError::LayoutIndexOutOfRange {
                layout_row,
                index,
                n_nodes,
            } => write!(
                formatter,
                "layout rows[{layout_row}] names node {index}, but there are only {n_nodes} \
                 hypotheses (indices 0 to {})",
                n_nodes.saturating_sub(1)
            ),
            FigureError::LayoutDuplicateNode { index } => {
                write!(
                    formatter,
                    "layout names node {index} more than once; expected each once"
                )
            }
            FigureError::LayoutMissingNode { index } => {
                write!(
                    formatter,
                    "layout leaves out node {index}; expected every node exactly once"
                )
            }
            FigureError::EmptyLayoutRow { layout_row } => write!(
                formatter,
                "layout rows[{layout_row}] is empty; expected at least one node index per row"
            ),
        }
    }
}

impl std::error::Error for FigureError {}

// ---------------------------------------------------------------------------
// House style. One accent colour, greys for everything secondary, thin rules.
// Font stacks name only fonts that ship with common systems; no web fonts.
// ---------------------------------------------------------------------------

/// The single accent colour of cairn's figures (a muted green).
pub(crate) const ACCENT: &str = "#2f6f5e";
/// Main text colour: a near-black with a trace of the accent.
pub(crate) const INK: &str = "#1e2422";
/// Secondary text (tick labels, notes, keys).
pub(crate) const MUTED: &str = "#5d6863";
/// Rules and faded strokes.
pub(crate) const RULE: &str = "#a9b3ae";
/// Very light fill for de-emphasised shapes.
pub(crate) const WASH: &str = "#eef1ef";
/// Paper colour used behind labels that sit on lines.
pub(crate) const PAPER: &str = "#ffffff";
/// Sans-serif stack for all figure text except titles. Single quotes because it
/// sits inside a double-quoted attribute.
pub(crate) const FONT_SANS: &str =
    "'Segoe UI', 'Helvetica Neue', Helvetica, Arial, 'Liberation Sans', 'DejaVu Sans', sans-serif";
/// Serif stack for figure titles.
pub(crate) const FONT_SERIF: &str =
    "Georgia, 'Times New Roman', 'Liberation Serif', 'DejaVu Serif', serif";

// ---------------------------------------------------------------------------
// Text and number helpers.
// ---------------------------------------------------------------------------

/// Escapes a user-supplied string for use in XML text or a double-quoted
/// attribute. Control characters that XML 1.0 forbids are replaced by a space,
/// because they cannot be represented at all and would make the page invalid.
pub(crate) fn escape_xml(text: &str) -> String {
    let mut escaped = String::with_capacity(text.len() + 8);
    for character in text.chars() {
        match character {
            '&' => escaped.push_str("&amp;"),
            '<' => escaped.push_str("&lt;"),
            '>' => escaped.push_str("&gt;"),
            '"' => escaped.push_str("&quot;"),
            '\'' => escaped.push_str("&#39;"),
            '\t' | '\n' | '\r' => escaped.push(' '),
            other if (other as u32) < 0x20 || other == '\u{7f}' => escaped.push(' '),
            '\u{fffe}' | '\u{ffff}' => escaped.push(' '),
            other => escaped.push(other),
        }
    }
    escaped
}

/// Formats a finite number with a fixed number of decimals, never as "-0.0".
/// A non-finite input cannot reach here through the public functions (inputs
/// are validated and every derived coordinate is bounded); should one arrive,
/// it is written as zero so that no "NaN" can ever appear in a figure.
pub(crate) fn fixed(value: f64, decimals: usize) -> String {
    if !value.is_finite() {
        return format!("{:.*}", decimals, 0.0);
    }
    let text = format!("{value:.decimals$}");
    // Rounding a small negative number can give "-0.00"; drop the sign then.
    if text.starts_with('-') && text[1..].chars().all(|c| c == '0' || c == '.') {
        text[1..].to_string()
    } else {
        text
    }
}

/// A coordinate or length in the SVG: one decimal is far below a printed dot.
pub(crate) fn coord(value: f64) -> String {
    fixed(value, 1)
}

/// A number as printed for a reader: fixed decimals with a typographic minus
/// sign (U+2212), which matches the width of the digits in most fonts.
pub(crate) fn display_fixed(value: f64, decimals: usize) -> String {
    let text = fixed(value, decimals);
    match text.strip_prefix('-') {
        Some(rest) => format!("\u{2212}{rest}"),
        None => text,
    }
}

/// A number with at most `digits` significant digits, trailing zeros trimmed
/// ("0.5", "1", "0.3333", "0.125"). Used for weights, which are fractions of
/// alpha, and for ratio-axis tick labels.
pub(crate) fn significant(value: f64, digits: usize) -> String {
    if !value.is_finite() || value == 0.0 {
        return "0".to_string();
    }
    let magnitude = value.abs().log10().floor() as i64;
    let decimals = (digits as i64 - 1 - magnitude).clamp(0, 12) as usize;
    let text = fixed(value, decimals);
    let trimmed = if text.contains('.') {
        text.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        text
    };
    if trimmed == "-0" {
        "0".to_string()
    } else {
        trimmed
    }
}

/// Estimated advance width of `text` in user units at `font_size`. No font
/// metrics are available to a pure function, so this errs on the wide side:
/// the per-character factors follow DejaVu Sans, the widest of the fonts our
/// stacks can fall back to, so layouts computed with it also fit narrower
/// fonts such as Arial or Segoe UI.
pub(crate) fn text_width(text: &str, font_size: f64, bold: bool) -> f64 {
    let mut em = 0.0;
    for character in text.chars() {
        em += match character {
            'i' | 'j' | 'l' | '!' | '|' | '.' | ',' | ':' | ';' | '\'' | '`' => 0.30,
            ' ' | 'f' | 't' | 'r' | 'I' | 'J' | '(' | ')' | '[' | ']' | '{' | '}' | '-' | '/' => {
                0.40
            }
            'm' | 'w' | 'M' | 'W' | '@' | '%' => 0.92,
            '0'..='9' | '\u{2212}' | '+' | '=' | '<' | '>' | '~' | '#' | '$' | '_' => 0.64,
            'A'..='Z' => 0.72,
            'a'..='z' => 0.61,
            '\u{2190}'..='\u{21ff}' => 0.84,
            character if (character as u32) < 0x2000 => 0.66,
            // East Asian and other wide characters take a full em.
            _ => 1.0,
        };
    }
    let weight_factor = if bold { 1.08 } else { 1.0 };
    em * font_size * weight_factor
}

/// Breaks `text` into lines at spaces so that each line fits `max_width`
/// where possible. A single word wider than `max_width` stays whole on its own
/// line; callers size their columns from the widest line they get back.
pub(crate) fn wrap_words(text: &str, font_size: f64, bold: bool, max_width: f64) -> Vec<String> {
    let mut lines = Vec::new();
    let mut current = String::new();
    for word in text.split_whitespace() {
        if current.is_empty() {
            current.push_str(word);
            continue;
        }
        let candidate = format!("{current} {word}");
        if text_width(&candidate, font_size, bold) <= max_width {
            current = candidate;
        } else {
            lines.push(std::mem::take(&mut current));
            current.push_str(word);
        }
    }
    if !current.is_empty() || lines.is_empty() {
        lines.push(current);
    }
    lines
}

/// Width of the widest of `lines`.
pub(crate) fn widest(lines: &[String], font_size: f64, bold: bool) -> f64 {
    lines
        .iter()
        .map(|line| text_width(line, font_size, bold))
        .fold(0.0, f64::max)
}

/// The opening `<svg>` element with its accessible name, `<title>` and
/// `<desc>`. The figure scales to its container (`width="100%"`) but never
/// beyond its natural size, on screen and in print.
pub(crate) fn open_svg(
    width: f64,
    height: f64,
    accessible_name: &str,
    description: &str,
) -> String {
    let name = escape_xml(accessible_name);
    format!(
        "<svg xmlns=\"http://www.w3.org/2000/svg\" viewBox=\"0 0 {w} {h}\" width=\"100%\" \
         style=\"max-width:{w}px;height:auto;display:block;break-inside:avoid\" role=\"img\" aria-label=\"{name}\" \
         font-family=\"{FONT_SANS}\" fill=\"{INK}\">\n<title>{name}</title>\n<desc>{desc}</desc>\n",
        w = coord(width),
        h = coord(height),
        desc = escape_xml(description),
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn escaping_covers_the_five_xml_specials_and_controls() {
        // The five characters are the XML 1.0 predefined entities (common practice).
        assert_eq!(escape_xml("a&b<c>d\"e'f"), "a&amp;b&lt;c&gt;d&quot;e&#39;f");
        assert_eq!(escape_xml("x\u{1}y\nz"), "x y z");
        assert_eq!(escape_xml("Zulassung ä → é"), "Zulassung ä → é");
    }

    #[test]
    fn fixed_never_writes_negative_zero() {
        assert_eq!(fixed(-0.0, 1), "0.0");
        assert_eq!(fixed(-0.04, 1), "0.0");
        assert_eq!(fixed(-0.05001, 1), "-0.1");
        assert_eq!(fixed(-0.0004, 3), "0.000");
        assert_eq!(fixed(12.25, 0), "12");
        assert_eq!(fixed(f64::NAN, 2), "0.00");
        assert_eq!(display_fixed(-8.1, 1), "\u{2212}8.1");
        assert_eq!(display_fixed(-0.01, 1), "0.0");
    }

    #[test]
    fn significant_trims_and_rounds_to_four_digits() {
        assert_eq!(significant(0.5, 4), "0.5");
        assert_eq!(significant(1.0, 4), "1");
        assert_eq!(significant(1.0 / 3.0, 4), "0.3333");
        assert_eq!(significant(2.0 / 3.0, 4), "0.6667");
        assert_eq!(significant(0.125, 4), "0.125");
        assert_eq!(significant(0.03125, 4), "0.03125");
        assert_eq!(significant(0.99999, 4), "1");
        assert_eq!(significant(250.0, 4), "250");
        assert_eq!(significant(0.0, 4), "0");
    }

    #[test]
    fn wrapping_keeps_words_whole_and_respects_width() {
        let lines = wrap_words("favours the high dose arm strongly", 12.0, false, 90.0);
        assert!(lines.len() > 1);
        for line in &lines {
            // A line may exceed the width only when it is one unbreakable word.
            assert!(text_width(line, 12.0, false) <= 90.0 || !line.contains(' '));
        }
        assert_eq!(lines.join(" "), "favours the high dose arm strongly");
        assert_eq!(wrap_words("", 12.0, false, 50.0), vec![String::new()]);
    }

    #[test]
    fn width_estimate_grows_with_text_and_weight() {
        assert!(text_width("WWW", 12.0, false) > text_width("iii", 12.0, false));
        assert!(text_width("H1", 12.0, true) > text_width("H1", 12.0, false));
        assert_eq!(text_width("", 12.0, false), 0.0);
    }
}
