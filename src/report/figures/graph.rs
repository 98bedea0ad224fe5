//! The diagram of a graphical multiplicity procedure (Bretz, Maurer, Brannath
//! and Posch 2009, "A graphical approach to sequentially rejective multiple test
//! procedures", Statistics in Medicine 28:586–604): hypotheses are circles
//! holding their share of alpha, and arrows carry the fraction of a rejected
//! hypothesis's share that passes to another hypothesis.
//!
//! This file owns the checks on the graph it is asked to draw, a deterministic
//! grid layout, the routing of arrows (a pair of opposite arrows becomes two
//! arcs bending to opposite sides; an arrow that would cross a circle bends
//! around it) and the placement of the arrow labels. It must not run the
//! procedure itself: the caller passes the graph as it stands (initially or
//! after a rejection step) and may mark rejected hypotheses. No I/O; the same
//! input always yields the same bytes.

use super::{
    ACCENT, FONT_SERIF, FigureError, INK, MUTED, PAPER, RULE, WASH, coord, escape_xml, open_svg,
    significant, text_width, widest, wrap_words,
};

/// One hypothesis of the graph.
#[derive(Debug, Clone, PartialEq)]
pub struct GraphNode {
    /// Short name printed in the circle, e.g. "H1".
    pub name: String,
    /// Share of the overall alpha held by this hypothesis, in [0, 1].
    pub weight: f64,
    /// Drawn faded and dashed, with "rejected" in place of the weight.
    pub rejected: bool,
}

/// A whole graph diagram.
#[derive(Debug, Clone, PartialEq)]
pub struct GraphFigure {
    /// Figure title, printed above the diagram and used as its accessible name.
    pub title: String,
    /// Prefix for the ids inside this figure (arrowhead markers), so that two
    /// figures in one page do not collide; one or more of A–Z, a–z, 0–9, '-'.
    pub id_prefix: String,
    /// Hypotheses in their order; indices below refer to this order.
    pub nodes: Vec<GraphNode>,
    /// m × m transition weights: `transitions[from][to]`, zero means no arrow.
    pub transitions: Vec<Vec<f64>>,
    /// Optional layout: node indices per row, top row first (e.g. primary
    /// hypotheses on top, secondary ones below). Default: rows of up to four
    /// in the order given.
    pub rows: Option<Vec<Vec<usize>>>,
}

const MARGIN: f64 = 16.0;
const TITLE_FONT: f64 = 15.0;
const NAME_FONT: f64 = 13.0;
const WEIGHT_FONT: f64 = 12.0;
const STATUS_FONT: f64 = 10.5;
const EDGE_LABEL_FONT: f64 = 11.0;
const KEY_FONT: f64 = 10.5;
const LINE_SPACING: f64 = 1.3;
const MIN_RADIUS: f64 = 28.0;
const DEFAULT_COLUMNS: usize = 4;
const COLUMN_GAP: f64 = 150.0;
const ROW_GAP: f64 = 110.0;
const ARROW_LENGTH: f64 = 9.0;
const ARROW_HALF_WIDTH: f64 = 3.5;
/// Clearance an arrow must keep from the circles it does not connect.
const CLEARANCE: f64 = 8.0;
const CURVE_SAMPLES: usize = 48;
/// Distance a label keeps from arrows other than its own, beyond its own size.
const LABEL_CLEARANCE: f64 = 30.0;
const MIN_FIGURE_WIDTH: f64 = 380.0;
/// Allowed rounding excess when checking that weights add up to at most 1.
const SUM_TOLERANCE: f64 = 1e-9;
const EDGE_COLOUR: &str = "#3b4541";

const KEY_TEXT: &str = "Number in a circle: the hypothesis\u{2019}s share of the overall significance \
level \u{3b1}. Number on an arrow: the fraction of that share passed along the arrow when the \
hypothesis at its tail is rejected.";

/// Draws `figure` as an SVG string for inline use in the HTML report.
///
/// Requirements (checked, in this order): at least one node; an id prefix of
/// A–Z, a–z, 0–9 and '-'; finite node weights in [0, 1] adding up to at most 1;
/// an m × m transition matrix of finite values in [0, 1] with zeros on the
/// diagonal and rows adding up to at most 1 (as in Bretz et al. 2009, §2);
/// a layout, if given, that names every node exactly once.
pub fn graph_svg(figure: &GraphFigure) -> Result<String, FigureError> {
    validate(figure)?;
    let rows = match &figure.rows {
        Some(rows) => rows.clone(),
        None => (0..figure.nodes.len())
            .collect::<Vec<_>>()
            .chunks(DEFAULT_COLUMNS)
            .map(|chunk| chunk.to_vec())
            .collect(),
    };
    Ok(render(figure, &rows))
}

fn validate(figure: &GraphFigure) -> Result<(), FigureError> {
    let n_nodes = figure.nodes.len();
    if n_nodes == 0 {
        return Err(FigureError::NoNodes);
    }
    let prefix_ok = !figure.id_prefix.is_empty()
        && figure
            .id_prefix
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || c == '-');
    if !prefix_ok {
        return Err(FigureError::InvalidIdPrefix {
            prefix: figure.id_prefix.clone(),
        });
    }
    let mut weight_sum = 0.0;
    for (node_index, node) in figure.nodes.iter().enumerate() {
        if !node.weight.is_finite() {
            return Err(FigureError::NonFiniteWeight {
                node: node_index,
                name: node.name.clone(),
                value: node.weight,
            });
        }
        if !(0.0..=1.0).contains(&node.weight) {
            return Err(FigureError::WeightOutOfRange {
                node: node_index,
                name: node.name.clone(),
                value: node.weight,
            });
        }
        weight_sum += node.weight;
    }
    if weight_sum > 1.0 + SUM_TOLERANCE {
        return Err(FigureError::WeightsSumAboveOne { sum: weight_sum });
    }
    if figure.transitions.len() != n_nodes {
        return Err(FigureError::TransitionRowCount {
            n_nodes,
            n_rows: figure.transitions.len(),
        });
    }
    for (from, row) in figure.transitions.iter().enumerate() {
        if row.len() != n_nodes {
            return Err(FigureError::TransitionRowLength {
                row: from,
                n_nodes,
                length: row.len(),
            });
        }
        let mut row_sum = 0.0;
        for (to, &value) in row.iter().enumerate() {
            if !value.is_finite() {
                return Err(FigureError::NonFiniteTransition { from, to, value });
            }
            if from == to && value != 0.0 {
                return Err(FigureError::SelfLoop {
                    node: from,
                    name: figure.nodes[from].name.clone(),
                    value,
                });
            }
            if !(0.0..=1.0).contains(&value) {
                return Err(FigureError::TransitionOutOfRange { from, to, value });
            }
            row_sum += value;
        }
        if row_sum > 1.0 + SUM_TOLERANCE {
            return Err(FigureError::TransitionRowSumAboveOne {
                from,
                name: figure.nodes[from].name.clone(),
                sum: row_sum,
            });
        }
    }
    if let Some(rows) = &figure.rows {
        let mut seen = vec![false; n_nodes];
        for (layout_row, row) in rows.iter().enumerate() {
            if row.is_empty() {
                return Err(FigureError::EmptyLayoutRow { layout_row });
            }
            for &index in row {
                if index >= n_nodes {
                    return Err(FigureError::LayoutIndexOutOfRange {
                        layout_row,
                        index,
                        n_nodes,
                    });
                }
                if seen[index] {
                    return Err(FigureError::LayoutDuplicateNode { index });
                }
                seen[index] = true;
            }
        }
        if let Some(index) = seen.iter().position(|placed| !placed) {
            return Err(FigureError::LayoutMissingNode { index });
        }
    }
    Ok(())
}

#[derive(Debug, Clone, Copy, PartialEq)]
struct Point {
    x: f64,
    y: f64,
}

impl Point {
    fn plus(self, other: Point) -> Point {
        Point {
            x: self.x + other.x,
            y: self.y + other.y,
        }
    }
    fn minus(self, other: Point) -> Point {
        Point {
            x: self.x - other.x,
            y: self.y - other.y,
        }
    }
    fn scaled(self, factor: f64) -> Point {
        Point {
            x: self.x * factor,
            y: self.y * factor,
        }
    }
    fn length(self) -> f64 {
        self.x.hypot(self.y)
    }
    /// Unit vector in this direction; a zero vector stays zero rather than
    /// becoming NaN (nodes never coincide, so this is only a guard).
    fn unit(self) -> Point {
        let length = self.length();
        if length > 0.0 {
            self.scaled(1.0 / length)
        } else {
            Point { x: 0.0, y: 0.0 }
        }
    }
}

/// A routed arrow: a quadratic Bézier from `start` through control `control`
/// to `tip` (on the target circle); the drawn path stops `ARROW_LENGTH` short
/// of the tip, where the arrowhead takes over.
struct Edge {
    from: usize,
    to: usize,
    weight: f64,
    muted: bool,
    start: Point,
    control: Point,
    tip: Point,
    samples: Vec<Point>,
}

fn bezier(start: Point, control: Point, end: Point, t: f64) -> Point {
    let a = (1.0 - t) * (1.0 - t);
    let b = 2.0 * (1.0 - t) * t;
    let c = t * t;
    Point {
        x: a * start.x + b * control.x + c * end.x,
        y: a * start.y + b * control.y + c * end.y,
    }
}

/// Routes the arrow from `from_centre` to `to_centre` with the control point
/// pushed sideways by `deviation` × length (the curve's peak offset is half
/// of the control point's offset, so it is doubled here).
fn route(
    from_centre: Point,
    to_centre: Point,
    radius: f64,
    deviation: f64,
) -> (Point, Point, Point) {
    let chord = to_centre.minus(from_centre);
    let length = chord.length();
    let direction = chord.unit();
    // The left-hand normal in SVG coordinates (y grows downwards). The reverse
    // arrow has the opposite normal, so equal positive deviations bend a pair
    // of opposite arrows to opposite sides.
    let normal = Point {
        x: direction.y,
        y: -direction.x,
    };
    let midpoint = from_centre.plus(chord.scaled(0.5));
    let control = midpoint.plus(normal.scaled(2.0 * deviation * length));
    let start = from_centre.plus(control.minus(from_centre).unit().scaled(radius));
    let tip = to_centre.plus(control.minus(to_centre).unit().scaled(radius + 1.0));
    (start, control, tip)
}

/// Smallest distance from the curve to the centre of any circle other than
/// the two it connects, minus the radius: how much room the arrow leaves.
fn room(samples: &[Point], centres: &[Point], from: usize, to: usize, radius: f64) -> f64 {
    let mut smallest = f64::INFINITY;
    for (index, centre) in centres.iter().enumerate() {
        if index == from || index == to {
            continue;
        }
        for sample in samples {
            smallest = smallest.min(sample.minus(*centre).length() - radius);
        }
    }
    smallest
}

/// A candidate route: the room it leaves, its (start, control, tip) and its samples.
type RouteChoice = (f64, (Point, Point, Point), Vec<Point>);

fn sample_curve(start: Point, control: Point, tip: Point) -> Vec<Point> {
    (0..=CURVE_SAMPLES)
        .map(|step| bezier(start, control, tip, step as f64 / CURVE_SAMPLES as f64))
        .collect()
}

/// An axis-aligned box, used for label placement and the figure's extent.
#[derive(Debug, Clone, Copy)]
struct Box2 {
    left: f64,
    top: f64,
    right: f64,
    bottom: f64,
}

impl Box2 {
    fn around(centre: Point, half_width: f64, half_height: f64) -> Box2 {
        Box2 {
            left: centre.x - half_width,
            top: centre.y - half_height,
            right: centre.x + half_width,
            bottom: centre.y + half_height,
        }
    }
    fn overlaps(&self, other: &Box2) -> bool {
        self.left < other.right
            && other.left < self.right
            && self.top < other.bottom
            && other.top < self.bottom
    }
    fn contains(&self, point: Point) -> bool {
        point.x >= self.left
            && point.x <= self.right
            && point.y >= self.top
            && point.y <= self.bottom
    }
    fn distance_to(&self, point: Point) -> f64 {
        let dx = (self.left - point.x).max(0.0).max(point.x - self.right);
        let dy = (self.top - point.y).max(0.0).max(point.y - self.bottom);
        dx.hypot(dy)
    }
    fn include(&mut self, other: &Box2) {
        self.left = self.left.min(other.left);
        self.top = self.top.min(other.top);
        self.right = self.right.max(other.right);
        self.bottom = self.bottom.max(other.bottom);
    }
}

struct EdgeLabel {
    text: String,
    centre: Point,
    area: Box2,
    muted: bool,
}

fn render(figure: &GraphFigure, rows: &[Vec<usize>]) -> String {
    let n_nodes = figure.nodes.len();
    let weight_texts: Vec<String> = figure
        .nodes
        .iter()
        .map(|node| {
            if node.rejected {
                "rejected".to_string()
            } else {
                significant(node.weight, 4)
            }
        })
        .collect();
    // One radius for all circles, large enough for the widest name or weight.
    let radius = figure
        .nodes
        .iter()
        .zip(&weight_texts)
        .map(|(node, weight)| {
            let name = text_width(&node.name, NAME_FONT, true);
            let second = if node.rejected {
                text_width(weight, STATUS_FONT, false)
            } else {
                text_width(weight, WEIGHT_FONT, false)
            };
            0.5 * name.max(second) + 9.0
        })
        .fold(MIN_RADIUS, f64::max);

    // Grid positions: rows of the layout, each row centred on the widest.
    let column_spacing = 2.0 * radius + COLUMN_GAP;
    let row_spacing = 2.0 * radius + ROW_GAP;
    let widest_row = rows.iter().map(Vec::len).max().unwrap_or(1);
    let mut centres = vec![Point { x: 0.0, y: 0.0 }; n_nodes];
    for (row_index, row) in rows.iter().enumerate() {
        let offset = 0.5 * (widest_row - row.len()) as f64 * column_spacing;
        for (column, &node) in row.iter().enumerate() {
            centres[node] = Point {
                x: offset + column as f64 * column_spacing,
                y: row_index as f64 * row_spacing,
            };
        }
    }

    // Route every arrow, in matrix order so the result is deterministic.
    let mut edges = Vec::new();
    for from in 0..n_nodes {
        for to in 0..n_nodes {
            let weight = figure.transitions[from][to];
            if weight == 0.0 {
                continue;
            }
            let paired = figure.transitions[to][from] != 0.0;
            // A pair of opposite arrows always bends (to opposite sides);
            // a single arrow stays straight unless a circle is in its way.
            let candidates: &[f64] = if paired {
                &[0.08, 0.14, 0.22, 0.3]
            } else {
                &[0.0, 0.12, -0.12, 0.2, -0.2, 0.3, -0.3]
            };
            let mut best: Option<RouteChoice> = None;
            for &deviation in candidates {
                let geometry = route(centres[from], centres[to], radius, deviation);
                let samples = sample_curve(geometry.0, geometry.1, geometry.2);
                let clearance = room(&samples, &centres, from, to, radius);
                let better = match &best {
                    None => true,
                    Some((best_room, _, _)) => clearance > *best_room,
                };
                if better {
                    best = Some((clearance, geometry, samples));
                }
                if clearance >= CLEARANCE {
                    break;
                }
            }
            if let Some((_, (start, control, tip), samples)) = best {
                edges.push(Edge {
                    from,
                    to,
                    weight,
                    muted: figure.nodes[from].rejected || figure.nodes[to].rejected,
                    start,
                    control,
                    tip,
                    samples,
                });
            }
        }
    }

    // Place each arrow's label on its own curve where it covers no other
    // arrow, label or circle; try the middle first, then points either side.
    let label_height = EDGE_LABEL_FONT + 4.0;
    let mut labels: Vec<EdgeLabel> = Vec::new();
    for (edge_index, edge) in edges.iter().enumerate() {
        let text = significant(edge.weight, 4);
        let half_width = 0.5 * text_width(&text, EDGE_LABEL_FONT, false) + 3.0;
        let mut best: Option<(f64, Point, Box2)> = None;
        for t in [0.5, 0.42, 0.58, 0.34, 0.66, 0.27, 0.73] {
            let centre = bezier(edge.start, edge.control, edge.tip, t);
            let area = Box2::around(centre, half_width, 0.5 * label_height);
            let padded = Box2::around(centre, half_width + 2.0, 0.5 * label_height + 2.0);
            let mut score = 0.0;
            for placed in &labels {
                if padded.overlaps(&placed.area) {
                    score += 100.0;
                }
            }
            for centre_point in &centres {
                if padded.distance_to(*centre_point) < radius + 2.0 {
                    score += 100.0;
                }
            }
            // A label close to another arrow could be read as belonging to
            // it (two diagonals crossing at the middle are the common case),
            // so it must keep some distance from every other curve.
            let keep_clear = 0.5 * (half_width.hypot(0.5 * label_height)) + LABEL_CLEARANCE;
            for (other_index, other) in edges.iter().enumerate() {
                if other_index != edge_index {
                    score += other
                        .samples
                        .iter()
                        .filter(|point| padded.contains(**point))
                        .count() as f64;
                    let nearest = other
                        .samples
                        .iter()
                        .map(|point| point.minus(centre).length())
                        .fold(f64::INFINITY, f64::min);
                    if nearest < keep_clear {
                        score += (keep_clear - nearest) / keep_clear;
                    }
                }
            }
            let better = match &best {
                None => true,
                Some((best_score, _, _)) => score < *best_score,
            };
            if better {
                best = Some((score, centre, area));
            }
            if score == 0.0 {
                break;
            }
        }
        if let Some((_, centre, area)) = best {
            labels.push(EdgeLabel {
                text,
                centre,
                area,
                muted: edge.muted,
            });
        }
    }

    // Extent of the drawing, then shift it below the title and centre it.
    let mut extent = Box2::around(centres[0], radius, radius);
    for centre in &centres {
        extent.include(&Box2::around(*centre, radius + 2.0, radius + 2.0));
    }
    for edge in &edges {
        for sample in &edge.samples {
            extent.include(&Box2::around(*sample, 2.0, 2.0));
        }
    }
    for label in &labels {
        extent.include(&label.area);
    }
    let drawing_width = extent.right - extent.left;
    let title_lines_natural = wrap_words(&figure.title, TITLE_FONT, true, 1.0e9);
    let title_natural = widest(&title_lines_natural, TITLE_FONT, true);
    // Titles wrap at the drawing's width, but a figure is never narrower than
    // MIN_FIGURE_WIDTH so the key below stays readable.
    let mut width = (drawing_width + 2.0 * MARGIN).max(MIN_FIGURE_WIDTH);
    if title_natural + 2.0 * MARGIN > width {
        width = width.max((title_natural + 2.0 * MARGIN).min(720.0));
    }
    // An empty title takes no space (the accessible name falls back to "Multiplicity graph").
    let title_lines = if figure.title.trim().is_empty() {
        Vec::new()
    } else {
        wrap_words(&figure.title, TITLE_FONT, true, width - 2.0 * MARGIN)
    };
    width = width.max(widest(&title_lines, TITLE_FONT, true) + 2.0 * MARGIN);

    let mut body = String::new();
    body.push_str(&marker_definitions(&figure.id_prefix));
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
    let shift = Point {
        x: 0.5 * (width - drawing_width) - extent.left,
        y: rule_y + 14.0 - extent.top,
    };
    let at = |point: Point| point.plus(shift);

    // Arrows first, so circles and labels sit on top of them.
    for edge in &edges {
        let end_direction = edge.tip.minus(edge.control).unit();
        let path_end = at(edge.tip.minus(end_direction.scaled(ARROW_LENGTH - 0.5)));
        let start = at(edge.start);
        let control = at(edge.control);
        let (colour, marker) = if edge.muted {
            (RULE, format!("{}-arrow-muted", figure.id_prefix))
        } else {
            (EDGE_COLOUR, format!("{}-arrow", figure.id_prefix))
        };
        body.push_str(&format!(
            "<path d=\"M{},{}Q{},{} {},{}\" fill=\"none\" stroke=\"{colour}\" stroke-width=\"1.2\" marker-end=\"url(#{marker})\"><title>{} to {}: {}</title></path>\n",
            coord(start.x),
            coord(start.y),
            coord(control.x),
            coord(control.y),
            coord(path_end.x),
            coord(path_end.y),
            escape_xml(&figure.nodes[edge.from].name),
            escape_xml(&figure.nodes[edge.to].name),
            significant(edge.weight, 4)
        ));
    }

    // Circles with name and weight.
    for (node_index, node) in figure.nodes.iter().enumerate() {
        let centre = at(centres[node_index]);
        if node.rejected {
            body.push_str(&format!(
                "<circle cx=\"{}\" cy=\"{}\" r=\"{}\" fill=\"{WASH}\" stroke=\"{RULE}\" stroke-width=\"1.3\" stroke-dasharray=\"4 3\"/>\n",
                coord(centre.x),
                coord(centre.y),
                coord(radius)
            ));
        } else {
            body.push_str(&format!(
                "<circle cx=\"{}\" cy=\"{}\" r=\"{}\" fill=\"{PAPER}\" stroke=\"{ACCENT}\" stroke-width=\"1.6\"/>\n",
                coord(centre.x),
                coord(centre.y),
                coord(radius)
            ));
        }
        let name_colour = if node.rejected { MUTED } else { INK };
        body.push_str(&format!(
            "<text x=\"{}\" y=\"{}\" text-anchor=\"middle\" font-size=\"{}\" font-weight=\"700\" fill=\"{name_colour}\">{}</text>\n",
            coord(centre.x),
            coord(centre.y - 1.5),
            coord(NAME_FONT),
            escape_xml(&node.name)
        ));
        if node.rejected {
            body.push_str(&format!(
                "<text x=\"{}\" y=\"{}\" text-anchor=\"middle\" font-size=\"{}\" font-style=\"italic\" fill=\"{MUTED}\">rejected</text>\n",
                coord(centre.x),
                coord(centre.y + 13.0),
                coord(STATUS_FONT)
            ));
        } else {
            body.push_str(&format!(
                "<text x=\"{}\" y=\"{}\" text-anchor=\"middle\" font-size=\"{}\" fill=\"{ACCENT}\" style=\"font-variant-numeric:tabular-nums\">{}</text>\n",
                coord(centre.x),
                coord(centre.y + 13.5),
                coord(WEIGHT_FONT),
                escape_xml(&weight_texts[node_index])
            ));
        }
    }

    // Arrow labels on a paper-coloured patch so the line does not run through the digits.
    if !labels.is_empty() {
        body.push_str(&format!(
            "<g font-size=\"{}\" text-anchor=\"middle\" style=\"font-variant-numeric:tabular-nums\">\n",
            coord(EDGE_LABEL_FONT)
        ));
        for label in &labels {
            let centre = at(label.centre);
            body.push_str(&format!(
                "<rect x=\"{}\" y=\"{}\" width=\"{}\" height=\"{}\" rx=\"2\" fill=\"{PAPER}\"/>\n",
                coord(label.area.left + shift.x),
                coord(label.area.top + shift.y),
                coord(label.area.right - label.area.left),
                coord(label.area.bottom - label.area.top)
            ));
            let colour = if label.muted { MUTED } else { INK };
            body.push_str(&format!(
                "<text x=\"{}\" y=\"{}\" fill=\"{colour}\">{}</text>\n",
                coord(centre.x),
                coord(centre.y + 0.35 * EDGE_LABEL_FONT),
                escape_xml(&label.text)
            ));
        }
        body.push_str("</g>\n");
    }

    // The key says how to read the numbers.
    cursor = extent.bottom + shift.y + 14.0;
    body.push_str(&format!(
        "<g font-size=\"{}\" fill=\"{MUTED}\">\n",
        coord(KEY_FONT)
    ));
    for line in wrap_words(KEY_TEXT, KEY_FONT, false, width - 2.0 * MARGIN) {
        cursor += KEY_FONT * LINE_SPACING;
        body.push_str(&format!(
            "<text x=\"{}\" y=\"{}\">{}</text>\n",
            coord(MARGIN),
            coord(cursor),
            escape_xml(&line)
        ));
    }
    body.push_str("</g>\n");
    let height = cursor + MARGIN;

    let accessible_name = if figure.title.trim().is_empty() {
        "Multiplicity graph".to_string()
    } else {
        figure.title.clone()
    };
    let mut svg = open_svg(
        width,
        height,
        &accessible_name,
        &describe(figure, &edges, &weight_texts),
    );
    svg.push_str(&body);
    svg.push_str("</svg>\n");
    svg
}

/// Arrowhead markers, one for normal and one for faded arrows. Their ids carry
/// the figure's prefix so several figures can share one HTML page.
fn marker_definitions(prefix: &str) -> String {
    let mut definitions = String::from("<defs>\n");
    for (suffix, colour) in [("arrow", EDGE_COLOUR), ("arrow-muted", RULE)] {
        definitions.push_str(&format!(
            "<marker id=\"{prefix}-{suffix}\" viewBox=\"0 0 {l} {w}\" refX=\"0.5\" refY=\"{h}\" markerWidth=\"{l}\" markerHeight=\"{w}\" markerUnits=\"userSpaceOnUse\" orient=\"auto\"><path d=\"M0,0L{l},{h}L0,{w}Z\" fill=\"{colour}\"/></marker>\n",
            l = coord(ARROW_LENGTH),
            w = coord(2.0 * ARROW_HALF_WIDTH),
            h = coord(ARROW_HALF_WIDTH),
        ));
    }
    definitions.push_str("</defs>\n");
    definitions
}

/// The text alternative for screen readers: every hypothesis and arrow.
fn describe(figure: &GraphFigure, edges: &[Edge], weight_texts: &[String]) -> String {
    let mut description = format!("Multiplicity graph with {} hypotheses.", figure.nodes.len());
    for (node, weight) in figure.nodes.iter().zip(weight_texts) {
        if node.rejected {
            description.push_str(&format!(" {}: rejected.", node.name.trim()));
        } else {
            description.push_str(&format!(" {}: weight {}.", node.name.trim(), weight));
        }
    }
    for edge in edges {
        description.push_str(&format!(
            " {} to {}: {}.",
            figure.nodes[edge.from].name.trim(),
            figure.nodes[edge.to].name.trim(),
            significant(edge.weight, 4)
        ));
    }
    description
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn opposite_arrows_bend_to_opposite_sides() {
        let a = Point { x: 0.0, y: 0.0 };
        let b = Point { x: 200.0, y: 0.0 };
        let (_, forward_control, _) = route(a, b, 28.0, 0.08);
        let (_, backward_control, _) = route(b, a, 28.0, 0.08);
        // Same magnitude of bend, opposite sides of the chord (common practice
        // for drawing a pair of opposite transitions).
        assert!(forward_control.y * backward_control.y < 0.0);
        assert!((forward_control.y.abs() - backward_control.y.abs()).abs() < 1e-12);
        assert!((forward_control.y.abs() - 2.0 * 0.08 * 200.0).abs() < 1e-9);
    }

    #[test]
    fn arrow_endpoints_sit_on_the_circles() {
        let a = Point { x: 0.0, y: 0.0 };
        let b = Point { x: 0.0, y: 150.0 };
        let (start, _, tip) = route(a, b, 30.0, 0.0);
        assert!((start.minus(a).length() - 30.0).abs() < 1e-9);
        assert!((tip.minus(b).length() - 31.0).abs() < 1e-9);
    }

    #[test]
    fn a_straight_arrow_through_a_circle_is_bent_around_it() {
        // Three hypotheses in one row; H1 -> H3 would pass through H2.
        let figure = GraphFigure {
            title: "Row".to_string(),
            id_prefix: "t".to_string(),
            nodes: (1..=3)
                .map(|k| GraphNode {
                    name: format!("H{k}"),
                    weight: 1.0 / 3.0,
                    rejected: false,
                })
                .collect(),
            transitions: vec![vec![0.0, 0.0, 1.0], vec![0.0; 3], vec![0.0; 3]],
            rows: None,
        };
        let svg = graph_svg(&figure).expect("valid graph");
        // The one path must be a real curve: its control point is off the row.
        let after_definitions = svg.find("</defs>").expect("marker definitions");
        let path_start = svg[after_definitions..]
            .find("<path d=\"M")
            .expect("an arrow");
        let path_text = &svg[after_definitions + path_start..];
        let d_end = path_text[9..].find('"').expect("end of d") + 9;
        let d = &path_text[9..d_end];
        let numbers: Vec<f64> = d
            .split(['M', 'Q', ',', ' '])
            .filter(|part| !part.is_empty())
            .map(|part| part.parse::<f64>().expect("number"))
            .collect();
        assert_eq!(numbers.len(), 6);
        let (start_y, control_y) = (numbers[1], numbers[3]);
        assert!((control_y - start_y).abs() > 40.0, "path {d}");
    }
}
