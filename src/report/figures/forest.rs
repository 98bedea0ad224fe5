//! The forest plot of treatment contrasts: one row per contrast, a label on the
//! left, the estimate with its interval drawn against a shared axis in the
//! middle, and the same numbers written out on the right.
//!
//! This file owns the axis choice (range, "nice" ticks, clipping of intervals
//! that would crush the others) and the layout of the plot. It draws values it
//! is given and must not compute any statistic itself; it does no I/O and its
//! output bytes depend only on its input.
//!
//! Axis rules (common practice for published forest plots, fixed here so that
//! every cairn report looks the same):
//! - a difference scale is linear with ticks in steps of 1, 2 or 5 times a
//!   power of ten and a null line at 0;
//! - a ratio scale is logarithmic with a null line at 1 and tick values that
//!   read well on a log axis: 0.8, 1, 1.25 for narrow ranges, powers of two
//!   (0.25, 0.5, 1, 2, 4) for moderate ones, 1-2-5 or powers of ten for wide ones;
//! - an interval reaching more than four typical half-widths beyond the
//!   estimates (or, for ratios, beyond 1/1000 to 1000) is clipped at the axis
//!   end with an arrowhead, and a footnote says so. The numbers on the right
//!   are never clipped.

use super::{
    ACCENT, FONT_SERIF, FigureError, INK, MUTED, RULE, coord, display_fixed, escape_xml, open_svg,
    significant, text_width, widest, wrap_words,
};

/// How the contrast is measured, which fixes the axis and the null value.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ForestScale {
    /// A difference (mean difference, risk difference): linear axis, null line at 0.
    Difference,
    /// A ratio (odds, risk or rate ratio): logarithmic axis, null line at 1.
    /// Estimates and limits must be greater than 0.
    Ratio,
}

/// One contrast to draw.
#[derive(Debug, Clone, PartialEq)]
pub struct ForestRow {
    /// Text in the left column, e.g. "High dose vs placebo".
    pub label: String,
    /// Point estimate on the plot's scale (a ratio itself, not its logarithm).
    pub estimate: f64,
    /// Lower confidence limit.
    pub lower: f64,
    /// Upper confidence limit.
    pub upper: f64,
    /// When present (e.g. "not estimable"), no point is drawn and this text is
    /// printed instead of the numbers; the three values are then ignored and
    /// may be NaN.
    pub note: Option<String>,
}

/// A whole forest plot.
#[derive(Debug, Clone, PartialEq)]
pub struct ForestPlot {
    /// Figure title, printed above the plot and used as its accessible name.
    pub title: String,
    /// Text under the axis, e.g. "Difference in change in EASI (95% CI)".
    pub axis_label: String,
    /// Difference (linear) or ratio (logarithmic) axis.
    pub scale: ForestScale,
    /// Text under the axis on the lower side of the null line, e.g. "favours High dose".
    pub favours_lower: String,
    /// Text under the axis on the higher side of the null line.
    pub favours_higher: String,
    /// Contrasts, drawn top to bottom in this order.
    pub rows: Vec<ForestRow>,
    /// Decimals for the numbers in the right column.
    pub value_decimals: usize,
}

/// The most decimals the right column will print.
pub const MAX_VALUE_DECIMALS: usize = 8;

// Layout, in SVG user units (about one CSS pixel at the figure's natural size).
const MARGIN: f64 = 16.0;
const COLUMN_GAP: f64 = 20.0;
const PANEL_WIDTH: f64 = 340.0;
const TITLE_FONT: f64 = 15.0;
const LABEL_FONT: f64 = 12.5;
const VALUE_FONT: f64 = 12.0;
const TICK_FONT: f64 = 11.0;
const AXIS_LABEL_FONT: f64 = 12.0;
const FAVOURS_FONT: f64 = 11.0;
const FOOTNOTE_FONT: f64 = 10.5;
const LINE_SPACING: f64 = 1.3;
const MIN_ROW_HEIGHT: f64 = 28.0;
const ROW_PADDING: f64 = 12.0;
const MAX_LABEL_WIDTH: f64 = 200.0;
const MAX_VALUE_WIDTH: f64 = 180.0;
const MIN_FIGURE_WIDTH: f64 = 380.0;
/// Width left for the empty panel when no row can be drawn.
const EMPTY_PANEL_WIDTH: f64 = 0.0;
const SQUARE_SIDE: f64 = 9.0;
/// Space between an estimate and its "(lower to upper)" text.
const ESTIMATE_GAP: f64 = 5.0;
/// Distance from the null line to the favours texts; the small pointer
/// triangles sit in this gap, pointing away from the null line.
const FAVOURS_OFFSET: f64 = 17.0;
const ARROW_LENGTH: f64 = 7.0;
const ARROW_HALF_HEIGHT: f64 = 4.0;
/// Intervals reaching beyond this many typical half-widths past the estimates are clipped.
const CLIP_REACH_FACTOR: f64 = 4.0;
/// On a ratio axis, limits beyond 1/RATIO_AXIS_LIMIT to RATIO_AXIS_LIMIT are
/// clipped unless an estimate itself lies there.
const RATIO_AXIS_LIMIT: f64 = 1000.0;

const CLIPPED_FOOTNOTE: &str = "An arrowhead marks an interval that runs beyond the axis; the numbers on the right are complete.";
const NOTHING_DRAWN_FOOTNOTE: &str =
    "No contrast could be drawn; the notes on the right give the reasons.";

/// A validated interval on the transformed axis scale (identity or natural log).
#[derive(Debug, Clone, Copy)]
struct Interval {
    estimate: f64,
    lower: f64,
    upper: f64,
}

/// The chosen axis, in transformed units (identity or natural log).
#[derive(Debug, Clone)]
struct Axis {
    low: f64,
    high: f64,
    /// Tick positions (transformed) with their printed labels.
    ticks: Vec<(f64, String)>,
}

/// Draws `plot` as an SVG string for inline use in the HTML report.
///
/// Requirements: at least one row; `value_decimals` at most
/// [`MAX_VALUE_DECIMALS`]; for every row without a note, finite values with
/// lower ≤ estimate ≤ upper, all greater than 0 on a ratio scale. Rows with a
/// note are printed with the note and no point. If no row can be drawn, the
/// labels and notes are still shown, without an axis.
pub fn forest_svg(plot: &ForestPlot) -> Result<String, FigureError> {
    if plot.rows.is_empty() {
        return Err(FigureError::NoRows);
    }
    if plot.value_decimals > MAX_VALUE_DECIMALS {
        return Err(FigureError::TooManyDecimals {
            requested: plot.value_decimals,
            maximum: MAX_VALUE_DECIMALS,
        });
    }
    let intervals = validate_rows(plot)?;
    let drawable: Vec<Interval> = intervals.iter().flatten().copied().collect();
    let axis = if drawable.is_empty() {
        None
    } else {
        Some(choose_axis(plot.scale, &drawable)?)
    };
    Ok(render(plot, &intervals, axis.as_ref()))
}

/// Checks every row and returns its interval on the transformed scale, or
/// `None` for rows carrying a note.
fn validate_rows(plot: &ForestPlot) -> Result<Vec<Option<Interval>>, FigureError> {
    let mut intervals = Vec::with_capacity(plot.rows.len());
    for (row_index, row) in plot.rows.iter().enumerate() {
        if row.note.is_some() {
            intervals.push(None);
            continue;
        }
        let quantities = [
            ("lower limit", row.lower),
            ("estimate", row.estimate),
            ("upper limit", row.upper),
        ];
        for (quantity, value) in quantities {
            if !value.is_finite() {
                return Err(FigureError::NonFiniteValue {
                    row: row_index,
                    label: row.label.clone(),
                    quantity,
                    value,
                });
            }
            if plot.scale == ForestScale::Ratio && value <= 0.0 {
                return Err(FigureError::NonPositiveRatio {
                    row: row_index,
                    label: row.label.clone(),
                    quantity,
                    value,
                });
            }
        }
        if !(row.lower <= row.estimate && row.estimate <= row.upper) {
            return Err(FigureError::IntervalOutOfOrder {
                row: row_index,
                label: row.label.clone(),
                lower: row.lower,
                estimate: row.estimate,
                upper: row.upper,
            });
        }
        intervals.push(Some(Interval {
            estimate: transform(plot.scale, row.estimate),
            lower: transform(plot.scale, row.lower),
            upper: transform(plot.scale, row.upper),
        }));
    }
    Ok(intervals)
}

/// Axis units: the value itself for differences, its natural log for ratios,
/// so that the null value is 0 on both.
fn transform(scale: ForestScale, value: f64) -> f64 {
    match scale {
        ForestScale::Difference => value,
        ForestScale::Ratio => value.ln(),
    }
}

/// Chooses the axis range and ticks from the drawable intervals.
fn choose_axis(scale: ForestScale, intervals: &[Interval]) -> Result<Axis, FigureError> {
    // The axis always shows every estimate and the null value.
    let mut core_low: f64 = 0.0;
    let mut core_high: f64 = 0.0;
    let mut lowest_limit = f64::INFINITY;
    let mut highest_limit = f64::NEG_INFINITY;
    let mut half_widths = Vec::with_capacity(intervals.len());
    for interval in intervals {
        core_low = core_low.min(interval.estimate);
        core_high = core_high.max(interval.estimate);
        lowest_limit = lowest_limit.min(interval.lower);
        highest_limit = highest_limit.max(interval.upper);
        half_widths
            .push((interval.estimate - interval.lower).max(interval.upper - interval.estimate));
    }
    let too_wide = || FigureError::RangeTooWide {
        lowest: untransform(scale, lowest_limit),
        highest: untransform(scale, highest_limit),
    };
    // One interval far wider than the rest would squeeze all others into a few
    // pixels, so the axis reaches only a few typical (median) half-widths
    // beyond the estimates; wider intervals are clipped and marked.
    half_widths.sort_by(f64::total_cmp);
    let middle = half_widths.len() / 2;
    let typical_half_width = if half_widths.len() % 2 == 1 {
        half_widths[middle]
    } else {
        0.5 * (half_widths[middle - 1] + half_widths[middle])
    };
    let reach = CLIP_REACH_FACTOR * typical_half_width;
    let mut allowed_low = core_low - reach;
    let mut allowed_high = core_high + reach;
    if scale == ForestScale::Ratio {
        let limit = RATIO_AXIS_LIMIT.ln();
        allowed_low = allowed_low.max(core_low.min(-limit));
        allowed_high = allowed_high.min(core_high.max(limit));
    }
    let mut low = lowest_limit.max(allowed_low).min(core_low);
    let mut high = highest_limit.min(allowed_high).max(core_high);
    if !(high - low).is_finite() {
        return Err(too_wide());
    }
    if high - low <= 1e-12 * low.abs().max(high.abs()).max(1.0) {
        // Every interval has zero width at the null value: show a unit range
        // (a factor of two either side for ratios) so the axis is readable.
        let half_range = match scale {
            ForestScale::Difference => 1.0,
            ForestScale::Ratio => 2.0_f64.ln(),
        };
        low -= half_range;
        high += half_range;
    }
    let axis = match scale {
        ForestScale::Difference => linear_ticks(low, high),
        ForestScale::Ratio => ratio_ticks(low.exp(), high.exp()),
    };
    let axis = axis.ok_or_else(too_wide)?;
    if !(axis.low.is_finite() && axis.high.is_finite() && axis.high > axis.low) {
        return Err(too_wide());
    }
    Ok(axis)
}

fn untransform(scale: ForestScale, value: f64) -> f64 {
    match scale {
        ForestScale::Difference => value,
        ForestScale::Ratio => value.exp(),
    }
}

/// Ticks at multiples of 1, 2 or 5 times a power of ten, about five intervals
/// across the range; the axis runs from the tick at or below `low` to the tick
/// at or above `high`.
fn linear_ticks(low: f64, high: f64) -> Option<Axis> {
    let raw_step = (high - low) / 5.0;
    if !(raw_step.is_finite() && raw_step > 0.0) {
        return None;
    }
    let exponent = raw_step.log10().floor() as i32;
    let residual = raw_step / 10f64.powi(exponent);
    let (mantissa, exponent) = if residual <= 1.0 {
        (1.0, exponent)
    } else if residual <= 2.0 {
        (2.0, exponent)
    } else if residual <= 5.0 {
        (5.0, exponent)
    } else {
        (1.0, exponent + 1)
    };
    let step = mantissa * 10f64.powi(exponent);
    let decimals = if exponent < 0 {
        (-exponent) as usize
    } else {
        0
    };
    // The small tolerance keeps a limit that sits exactly on a tick from
    // pulling in one more tick through rounding error.
    let first = (low / step + 1e-9).floor();
    let last = (high / step - 1e-9).ceil();
    if !(first.is_finite() && last.is_finite()) || last - first > 100.0 {
        return None;
    }
    let first = first as i64;
    let last = last as i64;
    let ticks: Vec<(f64, String)> = (first..=last)
        .map(|multiple| {
            let value = multiple as f64 * step;
            (value, display_fixed(value, decimals))
        })
        .collect();
    let low_tick = ticks.first()?.0;
    let high_tick = ticks.last()?.0;
    if !(low_tick.is_finite() && high_tick.is_finite()) {
        return None;
    }
    Some(Axis {
        low: low_tick,
        high: high_tick,
        ticks,
    })
}

/// Ticks for a logarithmic ratio axis between `low` and `high` (both > 0).
/// The returned axis is in natural-log units.
fn ratio_ticks(low: f64, high: f64) -> Option<Axis> {
    let span_ratio = high / low;
    if span_ratio <= 1.25 {
        // So narrow that the log axis is nearly linear: evenly stepped values
        // (0.9, 1.0, 1.1) read best.
        if let Some(linear) = linear_ticks(low, high)
            && linear.low > 0.0
        {
            return Some(Axis {
                low: linear.low.ln(),
                high: linear.high.ln(),
                ticks: linear
                    .ticks
                    .into_iter()
                    .map(|(value, label)| (value.ln(), label))
                    .collect(),
            });
        }
    }
    // Candidate tick sets from fine to coarse; start at the one suited to the
    // range and fall back to coarser sets if a set cannot bracket the range.
    let start_level = if span_ratio <= 4.0 {
        0
    } else if span_ratio <= 40.0 {
        1
    } else if span_ratio <= 2000.0 {
        2
    } else {
        3
    };
    for level in start_level..4 {
        let candidates = ratio_tick_set(level);
        let low_tick = candidates
            .iter()
            .rev()
            .find(|value| **value <= low * (1.0 + 1e-9));
        let high_tick = candidates
            .iter()
            .find(|value| **value >= high * (1.0 - 1e-9));
        if let (Some(&low_tick), Some(&high_tick)) = (low_tick, high_tick) {
            let ticks = candidates
                .iter()
                .filter(|value| **value >= low_tick && **value <= high_tick)
                .map(|value| (value.ln(), significant(*value, 4)))
                .collect();
            return Some(Axis {
                low: low_tick.ln(),
                high: high_tick.ln(),
                ticks,
            });
        }
    }
    None
}

/// The sorted tick values of one density level of the ratio axis.
fn ratio_tick_set(level: usize) -> Vec<f64> {
    let mut values: Vec<f64> = Vec::new();
    match level {
        0 => {
            // Readable values about 20% to 30% apart on the log scale; includes
            // the reciprocal pairs 0.8/1.25, 0.5/2 and 0.25/4.
            let mantissas = [1.0, 1.25, 1.5, 2.0, 2.5, 3.0, 4.0, 5.0, 6.0, 8.0];
            for exponent in -6..=6 {
                for mantissa in mantissas {
                    values.push(mantissa * 10f64.powi(exponent));
                }
            }
        }
        1 => {
            // Powers of two: 1/32 to 32 keeps the labels short.
            for exponent in -5..=5 {
                values.push(2f64.powi(exponent));
            }
        }
        2 => {
            for exponent in -12..=12 {
                for mantissa in [1.0, 2.0, 5.0] {
                    values.push(mantissa * 10f64.powi(exponent));
                }
            }
        }
        _ => {
            for exponent in -300..=300 {
                values.push(10f64.powi(exponent));
            }
        }
    }
    values.sort_by(f64::total_cmp);
    values
}

/// Keeps tick labels from running into each other by dropping every other
/// tick (keeping the null value) until adjacent labels have room.
fn thin_ticks(ticks: &[(f64, String)], position: impl Fn(f64) -> f64) -> Vec<(f64, String)> {
    let null_index = ticks
        .iter()
        .position(|(value, _)| value.abs() < 1e-12)
        .unwrap_or(0);
    let mut stride = 1;
    loop {
        let kept: Vec<(f64, String)> = ticks
            .iter()
            .enumerate()
            .filter(|(index, _)| index % stride == null_index % stride)
            .map(|(_, tick)| tick.clone())
            .collect();
        let crowded = kept.windows(2).any(|pair| {
            let gap = position(pair[1].0) - position(pair[0].0);
            let needed = 0.5
                * (text_width(&pair[0].1, TICK_FONT, false)
                    + text_width(&pair[1].1, TICK_FONT, false))
                + 8.0;
            gap < needed
        });
        if !crowded || kept.len() <= 2 {
            return kept;
        }
        stride += 1;
    }
}

/// What the right column shows for one row.
enum ValueText {
    /// The estimate (right-aligned in its own sub-column) and "(lower to upper)".
    Numbers(String, String),
    Note(Vec<String>),
}

fn value_text(plot: &ForestPlot, row: &ForestRow) -> ValueText {
    match &row.note {
        Some(note) => ValueText::Note(wrap_words(note, VALUE_FONT, false, MAX_VALUE_WIDTH)),
        None => {
            let shown = |value: f64| display_value(plot.scale, value, plot.value_decimals);
            ValueText::Numbers(
                shown(row.estimate),
                format!("({} to {})", shown(row.lower), shown(row.upper)),
            )
        }
    }
}

/// A value for the number column. A positive ratio that would round to zero
/// is printed as "<0.01" (at two decimals), since "0.00" is not a ratio.
fn display_value(scale: ForestScale, value: f64, decimals: usize) -> String {
    let text = display_fixed(value, decimals);
    let rounds_to_zero = text.chars().all(|c| c == '0' || c == '.');
    if scale == ForestScale::Ratio && rounds_to_zero {
        format!(
            "<{}",
            display_fixed(10f64.powi(-(decimals as i32)), decimals)
        )
    } else {
        text
    }
}

/// Lays out and writes the figure. All inputs are validated by now.
fn render(plot: &ForestPlot, intervals: &[Option<Interval>], axis: Option<&Axis>) -> String {
    let line_height = LABEL_FONT * LINE_SPACING;
    let label_lines: Vec<Vec<String>> = plot
        .rows
        .iter()
        .map(|row| wrap_words(&row.label, LABEL_FONT, false, MAX_LABEL_WIDTH))
        .collect();
    let values: Vec<ValueText> = plot.rows.iter().map(|row| value_text(plot, row)).collect();

    // Columns: labels | plot panel | numbers, each sized to its content.
    let mut label_column = label_lines
        .iter()
        .map(|lines| widest(lines, LABEL_FONT, false))
        .fold(60.0, f64::max);
    // The number column is a small table: estimates right-aligned in their own
    // sub-column so their last digits line up, intervals left-aligned after it.
    let estimate_column = values
        .iter()
        .map(|value| match value {
            ValueText::Numbers(estimate, _) => text_width(estimate, VALUE_FONT, false),
            ValueText::Note(_) => 0.0,
        })
        .fold(0.0, f64::max);
    let value_column = values
        .iter()
        .map(|value| match value {
            ValueText::Numbers(_, interval) => {
                estimate_column + ESTIMATE_GAP + text_width(interval, VALUE_FONT, false)
            }
            ValueText::Note(lines) => widest(lines, VALUE_FONT, false),
        })
        .fold(60.0, f64::max);

    // The favours texts sit either side of the null line and may run under
    // the label and number columns; widen the figure if they would not fit.
    let favours_lower = if plot.favours_lower.trim().is_empty() {
        None
    } else {
        Some(plot.favours_lower.trim().to_string())
    };
    let favours_higher = if plot.favours_higher.trim().is_empty() {
        None
    } else {
        Some(plot.favours_higher.trim().to_string())
    };
    let panel_width = if axis.is_some() {
        PANEL_WIDTH
    } else {
        EMPTY_PANEL_WIDTH
    };
    let null_fraction = axis
        .map(|axis| (0.0 - axis.low) / (axis.high - axis.low))
        .unwrap_or(0.5);
    let mut extra_right = 0.0;
    if axis.is_some() {
        if let Some(text) = &favours_lower {
            let null_x = MARGIN + label_column + COLUMN_GAP + null_fraction * panel_width;
            let start = null_x - FAVOURS_OFFSET - text_width(text, FAVOURS_FONT, false);
            if start < MARGIN {
                label_column += MARGIN - start;
            }
        }
        if let Some(text) = &favours_higher {
            let null_x = MARGIN + label_column + COLUMN_GAP + null_fraction * panel_width;
            let end = null_x + FAVOURS_OFFSET + text_width(text, FAVOURS_FONT, false);
            let right_edge = MARGIN + label_column + 2.0 * COLUMN_GAP + panel_width + value_column;
            if end > right_edge {
                extra_right = end - right_edge;
            }
        }
    }
    let panel_left = MARGIN + label_column + COLUMN_GAP;
    let panel_right = panel_left + panel_width;
    let value_left = panel_right + COLUMN_GAP;
    let estimate_right = value_left + estimate_column;
    // A minimum width keeps the footnotes from wrapping into a narrow column
    // when there is little to draw.
    let mut width = (value_left + value_column + extra_right + MARGIN).max(MIN_FIGURE_WIDTH);
    let content_width = width - 2.0 * MARGIN;

    // An empty title takes no space (the accessible name falls back to "Forest plot").
    let title_lines = if plot.title.trim().is_empty() {
        Vec::new()
    } else {
        wrap_words(&plot.title, TITLE_FONT, true, content_width)
    };
    let title_width = widest(&title_lines, TITLE_FONT, true);
    if title_width > content_width {
        width += title_width - content_width;
    }
    let axis_label_lines = wrap_words(
        &plot.axis_label,
        AXIS_LABEL_FONT,
        false,
        PANEL_WIDTH + COLUMN_GAP,
    );

    let position = |value: f64| match axis {
        Some(axis) => panel_left + (value - axis.low) / (axis.high - axis.low) * panel_width,
        None => panel_left,
    };

    // Vertical layout, top to bottom.
    let mut body = String::new();
    let mut cursor = MARGIN;
    body.push_str(&format!(
        "<g font-family=\"{FONT_SERIF}\" font-size=\"{}\" font-weight=\"600\">\n",
        coord(TITLE_FONT)
    ));
    for line in &title_lines {
        cursor += TITLE_FONT;
        body.push_str(&format!(
            "<text x=\"{}\" y=\"{}\">{}</text>\n",
            coord(MARGIN),
            coord(cursor),
            escape_xml(line)
        ));
        cursor += TITLE_FONT * (LINE_SPACING - 1.0);
    }
    body.push_str("</g>\n");
    let rule_y = cursor + 6.0;
    body.push_str(&format!(
        "<line x1=\"{}\" y1=\"{y}\" x2=\"{}\" y2=\"{y}\" stroke=\"{RULE}\" stroke-width=\"0.8\"/>\n",
        coord(MARGIN),
        coord(width - MARGIN),
        y = coord(rule_y)
    ));
    let rows_top = rule_y + 6.0;

    let mut row_centres = Vec::with_capacity(plot.rows.len());
    let mut labels_svg = String::new();
    let mut values_svg = String::new();
    let mut row_top = rows_top;
    for (row_index, lines) in label_lines.iter().enumerate() {
        let value_line_count = match &values[row_index] {
            ValueText::Numbers(..) => 1,
            ValueText::Note(note_lines) => note_lines.len(),
        };
        let line_count = lines.len().max(value_line_count);
        let row_height = (line_count as f64 * line_height + ROW_PADDING).max(MIN_ROW_HEIGHT);
        let centre = row_top + 0.5 * row_height;
        row_centres.push(centre);
        // Baselines are placed so that each block of lines is centred on the row;
        // 0.35 em from the centre puts the x-height in the middle.
        let first_baseline = |count: usize, font: f64| {
            centre - 0.5 * (count as f64 - 1.0) * font * LINE_SPACING + 0.35 * font
        };
        for (line_index, line) in lines.iter().enumerate() {
            labels_svg.push_str(&format!(
                "<text x=\"{}\" y=\"{}\">{}</text>\n",
                coord(MARGIN),
                coord(first_baseline(lines.len(), LABEL_FONT) + line_index as f64 * line_height),
                escape_xml(line)
            ));
        }
        match &values[row_index] {
            ValueText::Numbers(estimate, interval) => {
                let baseline = coord(first_baseline(1, VALUE_FONT));
                values_svg.push_str(&format!(
                    "<text x=\"{}\" y=\"{baseline}\" text-anchor=\"end\">{}</text>\n",
                    coord(estimate_right),
                    escape_xml(estimate)
                ));
                values_svg.push_str(&format!(
                    "<text x=\"{}\" y=\"{baseline}\">{}</text>\n",
                    coord(estimate_right + ESTIMATE_GAP),
                    escape_xml(interval)
                ));
            }
            ValueText::Note(note_lines) => {
                for (line_index, line) in note_lines.iter().enumerate() {
                    values_svg.push_str(&format!(
                        "<text x=\"{}\" y=\"{}\" font-style=\"italic\" fill=\"{MUTED}\">{}</text>\n",
                        coord(value_left),
                        coord(
                            first_baseline(note_lines.len(), VALUE_FONT)
                                + line_index as f64 * VALUE_FONT * LINE_SPACING
                        ),
                        escape_xml(line)
                    ));
                }
            }
        }
        row_top += row_height;
    }
    let rows_bottom = row_top;
    body.push_str(&format!(
        "<g font-size=\"{}\">\n{labels_svg}</g>\n",
        coord(LABEL_FONT)
    ));
    body.push_str(&format!(
        "<g font-size=\"{}\" style=\"font-variant-numeric:tabular-nums\">\n{values_svg}</g>\n",
        coord(VALUE_FONT)
    ));

    let mut footnotes: Vec<&str> = Vec::new();
    let mut cursor = rows_bottom;
    match axis {
        Some(axis) => {
            let axis_y = rows_bottom + 4.0;
            let null_x = position(0.0);
            // Null line under everything else.
            body.push_str(&format!(
                "<line x1=\"{x}\" y1=\"{}\" x2=\"{x}\" y2=\"{}\" stroke=\"{MUTED}\" stroke-width=\"0.9\" stroke-dasharray=\"4 3\"/>\n",
                coord(rows_top),
                coord(axis_y),
                x = coord(null_x)
            ));
            let mut clipped_any = false;
            body.push_str(&format!("<g fill=\"{ACCENT}\" stroke=\"{ACCENT}\">\n"));
            for (row_index, interval) in intervals.iter().enumerate() {
                let Some(interval) = interval else { continue };
                let y = row_centres[row_index];
                let span_tolerance = 1e-9 * (axis.high - axis.low);
                let clipped_low = interval.lower < axis.low - span_tolerance;
                let clipped_high = interval.upper > axis.high + span_tolerance;
                clipped_any |= clipped_low || clipped_high;
                let mut line_start = position(interval.lower.max(axis.low));
                let mut line_end = position(interval.upper.min(axis.high));
                if clipped_low {
                    body.push_str(&arrowhead(panel_left, y, -1.0));
                    line_start = panel_left + ARROW_LENGTH - 1.0;
                }
                if clipped_high {
                    body.push_str(&arrowhead(panel_right, y, 1.0));
                    line_end = panel_right - ARROW_LENGTH + 1.0;
                }
                body.push_str(&format!(
                    "<line x1=\"{}\" y1=\"{y}\" x2=\"{}\" y2=\"{y}\" stroke-width=\"1.6\"/>\n",
                    coord(line_start),
                    coord(line_end),
                    y = coord(y)
                ));
                let estimate_x = position(interval.estimate);
                body.push_str(&format!(
                    "<rect x=\"{}\" y=\"{}\" width=\"{side}\" height=\"{side}\" stroke=\"none\"/>\n",
                    coord(estimate_x - 0.5 * SQUARE_SIDE),
                    coord(y - 0.5 * SQUARE_SIDE),
                    side = coord(SQUARE_SIDE)
                ));
            }
            body.push_str("</g>\n");
            if clipped_any {
                footnotes.push(CLIPPED_FOOTNOTE);
            }

            // Axis line, ticks and tick labels.
            body.push_str(&format!(
                "<g stroke=\"{INK}\" stroke-width=\"0.8\">\n<line x1=\"{}\" y1=\"{y}\" x2=\"{}\" y2=\"{y}\"/>\n",
                coord(panel_left),
                coord(panel_right),
                y = coord(axis_y)
            ));
            let ticks = thin_ticks(&axis.ticks, position);
            for (value, _) in &ticks {
                body.push_str(&format!(
                    "<line x1=\"{x}\" y1=\"{}\" x2=\"{x}\" y2=\"{}\"/>\n",
                    coord(axis_y),
                    coord(axis_y + 4.0),
                    x = coord(position(*value))
                ));
            }
            body.push_str("</g>\n");
            let tick_label_y = axis_y + 6.0 + TICK_FONT;
            body.push_str(&format!(
                "<g font-size=\"{}\" text-anchor=\"middle\" fill=\"{MUTED}\" style=\"font-variant-numeric:tabular-nums\">\n",
                coord(TICK_FONT)
            ));
            for (value, label) in &ticks {
                body.push_str(&format!(
                    "<text x=\"{}\" y=\"{}\">{}</text>\n",
                    coord(position(*value)),
                    coord(tick_label_y),
                    escape_xml(label)
                ));
            }
            body.push_str("</g>\n");
            cursor = tick_label_y;

            // Axis label centred on the panel, then the favours texts.
            if !plot.axis_label.trim().is_empty() {
                body.push_str(&format!(
                    "<g font-size=\"{}\" text-anchor=\"middle\">\n",
                    coord(AXIS_LABEL_FONT)
                ));
                for line in &axis_label_lines {
                    cursor += AXIS_LABEL_FONT * LINE_SPACING + 2.0;
                    body.push_str(&format!(
                        "<text x=\"{}\" y=\"{}\">{}</text>\n",
                        coord(0.5 * (panel_left + panel_right)),
                        coord(cursor),
                        escape_xml(line)
                    ));
                }
                body.push_str("</g>\n");
            }
            if favours_lower.is_some() || favours_higher.is_some() {
                cursor += FAVOURS_FONT * LINE_SPACING + 4.0;
                body.push_str(&format!(
                    "<g font-size=\"{}\" font-style=\"italic\" fill=\"{MUTED}\">\n",
                    coord(FAVOURS_FONT)
                ));
                let pointer_y = cursor - 0.33 * FAVOURS_FONT;
                if let Some(text) = &favours_lower {
                    body.push_str(&pointer(null_x - 5.0, pointer_y, -1.0));
                    body.push_str(&format!(
                        "<text x=\"{}\" y=\"{}\" text-anchor=\"end\">{}</text>\n",
                        coord(null_x - FAVOURS_OFFSET),
                        coord(cursor),
                        escape_xml(text)
                    ));
                }
                if let Some(text) = &favours_higher {
                    body.push_str(&pointer(null_x + 5.0, pointer_y, 1.0));
                    body.push_str(&format!(
                        "<text x=\"{}\" y=\"{}\" text-anchor=\"start\">{}</text>\n",
                        coord(null_x + FAVOURS_OFFSET),
                        coord(cursor),
                        escape_xml(text)
                    ));
                }
                body.push_str("</g>\n");
            }
        }
        None => footnotes.push(NOTHING_DRAWN_FOOTNOTE),
    }

    if !footnotes.is_empty() {
        cursor += 6.0;
        body.push_str(&format!(
            "<g font-size=\"{}\" fill=\"{MUTED}\">\n",
            coord(FOOTNOTE_FONT)
        ));
        for footnote in &footnotes {
            for line in wrap_words(footnote, FOOTNOTE_FONT, false, width - 2.0 * MARGIN) {
                cursor += FOOTNOTE_FONT * LINE_SPACING;
                body.push_str(&format!(
                    "<text x=\"{}\" y=\"{}\">{}</text>\n",
                    coord(MARGIN),
                    coord(cursor),
                    escape_xml(&line)
                ));
            }
        }
        body.push_str("</g>\n");
    }
    let height = cursor + MARGIN;

    let accessible_name = if plot.title.trim().is_empty() {
        "Forest plot".to_string()
    } else {
        plot.title.clone()
    };
    let description = describe(plot, &values, &footnotes);
    let mut svg = open_svg(width, height, &accessible_name, &description);
    svg.push_str(&body);
    svg.push_str("</svg>\n");
    svg
}

/// A filled triangle pointing left (`direction` −1) or right (+1) with its tip at `tip_x`.
fn arrowhead(tip_x: f64, y: f64, direction: f64) -> String {
    let base_x = tip_x - direction * ARROW_LENGTH;
    format!(
        "<path d=\"M{},{}L{},{}L{},{}Z\" stroke=\"none\"/>\n",
        coord(tip_x),
        coord(y),
        coord(base_x),
        coord(y - ARROW_HALF_HEIGHT),
        coord(base_x),
        coord(y + ARROW_HALF_HEIGHT)
    )
}

/// A small triangle beside a favours text, its base at `base_x`, pointing
/// away from the null line (`direction` −1 to the left, +1 to the right).
fn pointer(base_x: f64, y: f64, direction: f64) -> String {
    let tip_x = base_x + direction * 6.0;
    format!(
        "<path d=\"M{},{}L{},{}L{},{}Z\" stroke=\"none\"/>\n",
        coord(tip_x),
        coord(y),
        coord(base_x),
        coord(y - 3.0),
        coord(base_x),
        coord(y + 3.0)
    )
}

/// The text alternative for screen readers: every row's label and numbers.
fn describe(plot: &ForestPlot, values: &[ValueText], footnotes: &[&str]) -> String {
    let scale = match plot.scale {
        ForestScale::Difference => "linear axis, no difference at 0",
        ForestScale::Ratio => "logarithmic axis, no difference at 1",
    };
    let mut description = format!("Forest plot, {scale}. {}.", plot.axis_label.trim());
    for (row, value) in plot.rows.iter().zip(values) {
        let text = match value {
            ValueText::Numbers(estimate, interval) => format!("{estimate} {interval}"),
            ValueText::Note(lines) => lines.join(" "),
        };
        description.push_str(&format!(" {}: {}.", row.label.trim(), text));
    }
    for footnote in footnotes {
        description.push(' ');
        description.push_str(footnote);
    }
    description
}

#[cfg(test)]
mod tests {
    use super::*;

    fn labels(axis: &Axis) -> Vec<String> {
        axis.ticks.iter().map(|(_, label)| label.clone()).collect()
    }

    #[test]
    fn linear_ticks_use_one_two_five_steps() {
        // Common practice: steps of 1, 2 or 5 times a power of ten.
        let axis = linear_ticks(-17.7, 0.0).expect("axis");
        assert_eq!(
            labels(&axis),
            ["\u{2212}20", "\u{2212}15", "\u{2212}10", "\u{2212}5", "0"]
        );
        let axis = linear_ticks(-0.13, 0.42).expect("axis");
        assert_eq!(labels(&axis), ["\u{2212}0.2", "0.0", "0.2", "0.4", "0.6"]);
        let axis = linear_ticks(0.0, 1.0).expect("axis");
        assert_eq!(labels(&axis), ["0.0", "0.2", "0.4", "0.6", "0.8", "1.0"]);
    }

    #[test]
    fn ratio_ticks_follow_the_range() {
        // Moderate range: powers of two (common practice for odds ratios).
        let axis = ratio_ticks(1.0, 5.9).expect("axis");
        assert_eq!(labels(&axis), ["1", "2", "4", "8"]);
        let axis = ratio_ticks(0.3, 3.0).expect("axis");
        assert_eq!(labels(&axis), ["0.25", "0.5", "1", "2", "4"]);
        // Narrow range: the reciprocal pair 0.8 and 1.25 around 1.
        let axis = ratio_ticks(0.82, 1.22).expect("axis");
        assert_eq!(labels(&axis), ["0.8", "1", "1.25"]);
        // Very narrow: evenly stepped values.
        let axis = ratio_ticks(0.93, 1.08).expect("axis");
        assert_eq!(labels(&axis), ["0.90", "0.95", "1.00", "1.05", "1.10"]);
        // Wide: 1-2-5.
        let axis = ratio_ticks(0.05, 30.0).expect("axis");
        assert_eq!(
            labels(&axis),
            ["0.05", "0.1", "0.2", "0.5", "1", "2", "5", "10", "20", "50"]
        );
    }

    #[test]
    fn one_very_wide_interval_is_clipped_not_allowed_to_stretch_the_axis() {
        let intervals = [
            Interval {
                estimate: -8.0,
                lower: -11.0,
                upper: -5.0,
            },
            Interval {
                estimate: -14.0,
                lower: -17.0,
                upper: -11.0,
            },
            Interval {
                estimate: -6.0,
                lower: -200.0,
                upper: 150.0,
            },
        ];
        let axis = choose_axis(ForestScale::Difference, &intervals).expect("axis");
        // Median half-width 3, reach 12: the allowed range is −26 to 12, which
        // the tick step of 10 rounds out to −30 to 20; the wide row is clipped.
        assert_eq!((axis.low, axis.high), (-30.0, 20.0));
        assert!(intervals[2].lower < axis.low && intervals[2].upper > axis.high);
    }

    #[test]
    fn thinning_keeps_the_null_tick() {
        let ticks: Vec<(f64, String)> = (-10..=10)
            .map(|k| (k as f64, format!("{}000000", k)))
            .collect();
        let kept = thin_ticks(&ticks, |value| 200.0 + value * 10.0);
        assert!(kept.len() < ticks.len());
        assert!(kept.iter().any(|(value, _)| *value == 0.0));
    }
}
