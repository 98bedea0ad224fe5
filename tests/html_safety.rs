//! Text from a plan or a data file must never become markup in the reports.
//!
//! A small study is written to a scratch folder whose every free-text field
//! (study id and title, arm codes and labels, variable and population labels,
//! analysis titles, site names taken from the data, the name of a pooled
//! stratum level, the event level of a binary endpoint, a data file's name,
//! default contrast ids built from arm codes, and hypothesis labels of a
//! graphical multiplicity family) carries script, tags, attribute breakouts,
//! `javascript:` URLs, HTML entities, Markdown link syntax, table pipes and
//! the report's own figure marker. After `cairn run`, report.html must hold
//! only the elements and attributes a report is made of (checked by a small
//! tag scanner against an allow-list), exactly the expected figures, and the
//! hostile text escaped so that it reads as written; report.md's tables must
//! keep their column counts. The rules are the README's "Text from the plan
//! or data is escaped, so it can never become markup in either report" and
//! "no scripts, no external links"; the attack strings are common practice
//! (the classic cross-site-scripting probes).
//!
//! This file owns no fixture files: the study is written by the test itself.

mod common;

use common::{Scratch, cairn, read_json};

const SCRIPT: &str = "<script>alert(1)</script>";
const IMAGE: &str = "<img src=x onerror=alert(2)>";
const BREAKOUT: &str = "\"><svg onload=alert(3)>";
const LINK: &str = "[x](javascript:alert(4))";
const ENTITY: &str = "&lt;b&gt;";
const MARKER: &str = "<!-- cairn-figure:graph -->";

/// Every probe in one string, tagged so a reader can tell the fields apart.
fn hostile(tag: &str) -> String {
    format!(
        "{tag} {SCRIPT} {IMAGE} {BREAKOUT} {LINK} javascript:alert(5) {ENTITY} a|b {MARKER} *em* _u_ `code` #"
    )
}

/// A YAML single-quoted scalar (the probes hold no single quote).
fn yaml(text: &str) -> String {
    assert!(!text.contains('\''));
    format!("'{text}'")
}

/// A CSV field, quoted when it holds a quote, comma or line break.
fn csv(text: &str) -> String {
    if text.contains(['"', ',', '\n']) {
        format!("\"{}\"", text.replace('"', "\"\""))
    } else {
        text.to_string()
    }
}

const HIGH_ARM: &str = "<img src=x onerror=alert(6)>|hi";
const SUBJECTS_FILE: &str = "data/subjects <b>|x.csv";
/// The plan's own file name is shown as code: markup, a backtick and an
/// underscore in it must show as written.
const PLAN_FILE: &str = "plan_<b>`x.yaml";

/// The five sites: three large ones, and two single-subject ones that the
/// plan pools. One site name is exactly the report's figure marker.
fn sites() -> [String; 5] {
    [
        SCRIPT.to_string(),
        BREAKOUT.to_string(),
        format!("{LINK} a|b {ENTITY}"),
        MARKER.to_string(),
        "javascript:alert(7)".to_string(),
    ]
}

fn write_study(study: &Scratch) {
    let plan = format!(
        "cairn-plan: 1
study:
  id: {study_id}
  title: {study_title}
  alpha: 0.05
  sides: 2
data:
  subjects: {subjects_file}
  key: USUBJID
  treatment:
    file: data/allocation.csv
    column: ARM
    levels: [placebo, low, {high}]
    reference: placebo
    labels:
      placebo: {placebo_label}
      low: {low_label}
  missing: ['']
variables:
  SITE: {{kind: factor, label: {site_label}}}
  FASFL: {{kind: factor, levels: [Y, N]}}
  BASE: {{kind: numeric, label: {base_label}}}
  SCORE: {{kind: numeric, label: {score_label}}}
  RESP: {{kind: factor, levels: [{event}, none], label: {response_label}}}
populations:
  full-analysis: {{flag: FASFL, equals: 'Y', label: {population_label}}}
analyses:
  - id: score_change
    title: {score_title}
    role: primary
    endpoint: {{column: SCORE, kind: continuous, higher-is: worse}}
    population: full-analysis
    model: {{family: linear}}
    covariates: [BASE]
    strata: [SITE]
    pool-small-strata: {{below: 2, into: {pooled}}}
    contrasts: each-vs-reference
  - id: response
    title: {response_title}
    endpoint: {{column: RESP, kind: binary, higher-is: better, event: {event}}}
    population: full-analysis
    model: {{family: binomial}}
    contrasts: each-vs-reference
multiplicity:
  procedure: graphical
  hypotheses:
    - {{id: H1, label: {h1_label}, analysis: score_change, contrast: {high_contrast}, weight: 0.5}}
    - {{id: H2, label: {h2_label}, analysis: score_change, contrast: low-vs-placebo, weight: 0.5}}
  transitions:
    H1: {{H2: 1}}
    H2: {{H1: 1}}
",
        study_id = yaml(&format!("ID{SCRIPT}|{MARKER}")),
        study_title = yaml(&hostile("study-title")),
        subjects_file = yaml(SUBJECTS_FILE),
        high = yaml(HIGH_ARM),
        placebo_label = yaml(&hostile("placebo-label")),
        low_label = yaml(&hostile("low-label")),
        site_label = yaml(&hostile("site-label")),
        base_label = yaml(&hostile("base-label")),
        score_label = yaml(&hostile("score-label")),
        response_label = yaml(&hostile("response-label")),
        event = yaml(&format!("{SCRIPT} responder|yes")),
        population_label = yaml(MARKER),
        score_title = yaml(&hostile("score-title")),
        response_title = yaml(&hostile("response-title")),
        pooled = yaml(&hostile("pooled-into")),
        high_contrast = yaml(&format!("{HIGH_ARM}-vs-placebo")),
        h1_label = yaml(&hostile("h1-label")),
        h2_label = yaml(&format!("<!-- cairn-figure:forest-1 --> {LINK}")),
    );
    study.write(PLAN_FILE, plan);
    let arms = ["placebo", "low", HIGH_ARM];
    let sites = sites();
    let mut subjects = String::from("USUBJID,SITE,FASFL,BASE,SCORE,RESP\n");
    let mut allocation = String::from("USUBJID,ARM\n");
    // 20 subjects: sites 0–2 with six each (two per arm), sites 3 and 4 with
    // one each. Scores and responses vary within every arm and site, so the
    // linear model and the logistic model are both estimable.
    for subject in 0..20usize {
        let site = if subject < 18 {
            subject / 6
        } else {
            subject - 15
        };
        let arm = subject % 3;
        let base = 20.0 + ((subject * 7) % 11) as f64;
        let score = 10.0 + base * 0.3 + [0.0, -2.0, -3.5][arm] + ((subject * 5) % 7) as f64 * 0.7;
        let responder = (subject * 3 + arm) % 4 < 2;
        let event = format!("{SCRIPT} responder|yes");
        subjects.push_str(&format!(
            "S{subject:02},{},Y,{base:.1},{score:.2},{}\n",
            csv(&sites[site]),
            csv(if responder { &event } else { "none" })
        ));
        allocation.push_str(&format!("S{subject:02},{}\n", csv(arms[arm])));
    }
    study.write(SUBJECTS_FILE, subjects);
    study.write("data/allocation.csv", allocation);
}

/// One start tag (or end tag) of the HTML: its name and attributes.
#[derive(Debug)]
struct Tag {
    name: String,
    closing: bool,
    attributes: Vec<(String, String)>,
}

/// Every tag of an HTML page, read with the tokenising rules a browser uses
/// for ordinary elements: `<` followed by a letter or `/` opens a tag, an
/// attribute value is quoted with `"` or `'` or runs to the next space or
/// `>`; comments and the doctype are returned under the name `!`. Text
/// between tags is skipped. (The report has no raw-text elements besides
/// `<style>`, whose CSS holds no `<`.)
fn scan_tags(html: &str) -> Vec<Tag> {
    let bytes = html.as_bytes();
    let mut tags = Vec::new();
    let mut position = 0;
    while let Some(offset) = html[position..].find('<') {
        let start = position + offset + 1;
        position = start;
        let Some(&first) = bytes.get(start) else {
            break;
        };
        if first == b'!' {
            let end = html[start..]
                .find('>')
                .map_or(html.len(), |end| start + end);
            tags.push(Tag {
                name: "!".to_string(),
                closing: false,
                attributes: vec![("text".to_string(), html[start + 1..end].to_string())],
            });
            position = end;
            continue;
        }
        let closing = first == b'/';
        let mut cursor = if closing { start + 1 } else { start };
        if !bytes.get(cursor).is_some_and(u8::is_ascii_alphabetic) {
            // Not a tag for a browser either: "<" then a space or digit is text.
            continue;
        }
        let name_start = cursor;
        while cursor < bytes.len()
            && !bytes[cursor].is_ascii_whitespace()
            && bytes[cursor] != b'>'
            && bytes[cursor] != b'/'
        {
            cursor += 1;
        }
        let name = html[name_start..cursor].to_ascii_lowercase();
        let mut attributes = Vec::new();
        loop {
            while cursor < bytes.len()
                && (bytes[cursor].is_ascii_whitespace() || bytes[cursor] == b'/')
            {
                cursor += 1;
            }
            if cursor >= bytes.len() || bytes[cursor] == b'>' {
                break;
            }
            let attribute_start = cursor;
            while cursor < bytes.len()
                && !bytes[cursor].is_ascii_whitespace()
                && !matches!(bytes[cursor], b'=' | b'>' | b'/')
            {
                cursor += 1;
            }
            let attribute = html[attribute_start..cursor].to_ascii_lowercase();
            let mut value = String::new();
            if bytes.get(cursor) == Some(&b'=') {
                cursor += 1;
                match bytes.get(cursor) {
                    Some(&quote) if quote == b'"' || quote == b'\'' => {
                        let value_end = html[cursor + 1..]
                            .find(quote as char)
                            .map_or(html.len(), |end| cursor + 1 + end);
                        value = html[cursor + 1..value_end].to_string();
                        cursor = (value_end + 1).min(html.len());
                    }
                    _ => {
                        let value_start = cursor;
                        while cursor < bytes.len()
                            && !bytes[cursor].is_ascii_whitespace()
                            && bytes[cursor] != b'>'
                        {
                            cursor += 1;
                        }
                        value = html[value_start..cursor].to_string();
                    }
                }
            }
            attributes.push((attribute, value));
        }
        tags.push(Tag {
            name,
            closing,
            attributes,
        });
        position = cursor.min(html.len());
    }
    tags
}

/// The elements a cairn report is made of: the page, the Markdown blocks
/// pulldown-cmark writes, and the SVG elements the figure code draws.
const ALLOWED_ELEMENTS: [&str; 38] = [
    "html",
    "head",
    "meta",
    "title",
    "style",
    "body",
    "main",
    "h1",
    "h2",
    "h3",
    "p",
    "ul",
    "li",
    "blockquote",
    "strong",
    "em",
    "code",
    "hr",
    "table",
    "thead",
    "tbody",
    "tr",
    "th",
    "td",
    "figure",
    "svg",
    "g",
    "defs",
    "marker",
    "desc",
    "text",
    "tspan",
    "line",
    "path",
    "rect",
    "circle",
    "polygon",
    "polyline",
];

/// The attributes they carry: presentation only, no URL-valued attribute and
/// no event handler.
const ALLOWED_ATTRIBUTES: [&str; 39] = [
    "lang",
    "charset",
    "name",
    "content",
    "class",
    "style",
    "id",
    "role",
    "aria-label",
    "viewbox",
    "width",
    "height",
    "x",
    "y",
    "x1",
    "y1",
    "x2",
    "y2",
    "cx",
    "cy",
    "r",
    "rx",
    "d",
    "fill",
    "stroke",
    "stroke-width",
    "stroke-dasharray",
    "font-family",
    "font-size",
    "font-style",
    "font-weight",
    "text-anchor",
    "marker-end",
    "orient",
    "markerwidth",
    "markerheight",
    "markerunits",
    "refx",
    "refy",
];

/// Cells of one Markdown table row: split on every `|` not escaped by a
/// backslash, as GitHub-flavoured Markdown does (also inside code spans).
fn cell_count(row: &str) -> usize {
    let mut separators = 0usize;
    let mut characters = row.trim().chars();
    while let Some(character) = characters.next() {
        match character {
            '\\' => {
                characters.next();
            }
            '|' => separators += 1,
            _ => {}
        }
    }
    // A row written "| a | b |" has one more separator than cells.
    separators.saturating_sub(1)
}

struct Run {
    _study: Scratch,
    html: String,
    markdown: String,
    results: serde_json::Value,
}

fn run_hostile_study() -> Run {
    let study = Scratch::new("html-safety");
    write_study(&study);
    let outcome = cairn(&study.path, &["run", PLAN_FILE, "--out", "out"]);
    assert_eq!(
        outcome.code, 0,
        "the hostile study must run; stderr:\n{}",
        outcome.stderr
    );
    let html = std::fs::read_to_string(study.path.join("out/report.html")).expect("report.html");
    let markdown = std::fs::read_to_string(study.path.join("out/report.md")).expect("report.md");
    let results = read_json(&study.path.join("out/results.json"));
    Run {
        _study: study,
        html,
        markdown,
        results,
    }
}

#[test]
fn hostile_text_never_becomes_markup_in_the_html_report() {
    let run = run_hostile_study();
    let html = &run.html;
    // The study really carried the probes through to the results (else the
    // checks below would pass vacuously).
    let analyses = run.results["analyses"].as_array().expect("analyses");
    assert_eq!(analyses.len(), 2);
    for analysis in analyses {
        assert_eq!(
            analysis["status"], "fitted",
            "analysis {} must fit: {}",
            analysis["id"], analysis["failure"]
        );
    }
    assert!(
        run.results["study"]["title"]
            .as_str()
            .is_some_and(|title| title.contains(SCRIPT))
    );
    let coefficient_names: Vec<&str> = analyses[0]["coefficients"]
        .as_array()
        .expect("coefficients")
        .iter()
        .filter_map(|row| row["name"].as_str())
        .collect();
    assert!(
        coefficient_names.contains(&format!("SITE = {SCRIPT}").as_str()),
        "a site name from the data must reach the coefficients: {coefficient_names:?}"
    );
    assert_eq!(
        run.results["multiplicity"]["hypotheses"][0]["contrast"],
        format!("{HIGH_ARM}-vs-placebo")
    );

    for forbidden in [
        "<script",
        "<img",
        "<a ",
        "<a>",
        "<iframe",
        "<object",
        "<embed",
        "<link",
        "<base",
        "<form",
        "javascript:alert(4)\"",
    ] {
        assert!(
            !html.contains(forbidden),
            "report.html contains {forbidden:?}"
        );
    }
    // "onerror=" and "onload=" do occur, as escaped text; the tag scan below
    // shows that no element carries them as attributes.
    let tags = scan_tags(html);
    assert!(
        tags.len() > 100,
        "the tag scanner found only {} tags",
        tags.len()
    );
    for tag in &tags {
        if tag.name == "!" {
            let text = &tag.attributes[0].1;
            assert!(
                text.eq_ignore_ascii_case("DOCTYPE html"),
                "unexpected comment or declaration <!{text}> (a forged figure marker?)"
            );
            continue;
        }
        assert!(
            ALLOWED_ELEMENTS.contains(&tag.name.as_str()),
            "element <{}> is not one a report is made of: {tag:?}",
            tag.name
        );
        for (attribute, value) in &tag.attributes {
            assert!(
                ALLOWED_ATTRIBUTES.contains(&attribute.as_str()),
                "attribute {attribute}={value:?} on <{}> is not allowed",
                tag.name
            );
            assert!(
                !attribute.starts_with("on"),
                "event handler {attribute} on <{}>",
                tag.name
            );
            // aria-label is text read aloud (it repeats a figure's title, probes
            // included); every other allowed attribute could carry a URL
            // (style and marker-end through url(...)) and must not hold one.
            if attribute != "aria-label" {
                assert!(
                    !value.to_ascii_lowercase().contains("javascript:"),
                    "javascript: in {attribute} of <{}>",
                    tag.name
                );
                assert!(
                    !value.contains("url(") || value.starts_with("url(#"),
                    "a non-local url in {attribute} of <{}>: {value}",
                    tag.name
                );
            }
        }
        if tag.name == "style" && !tag.closing {
            assert!(
                tag.attributes.is_empty(),
                "the style element takes no attributes"
            );
        }
    }
    // Forest plots for the two analyses and the multiplicity graph, each once.
    let svg_count = tags
        .iter()
        .filter(|tag| tag.name == "svg" && !tag.closing)
        .count();
    assert_eq!(svg_count, 3, "expected 3 figures (2 forest plots, 1 graph)");
    assert_eq!(html.matches("<svg").count(), 3);
    assert_eq!(
        tags.iter()
            .filter(|tag| tag.name == "style" && !tag.closing)
            .count(),
        1,
        "only the page's own style element"
    );
    assert_eq!(
        tags.iter()
            .filter(|tag| tag.name == "title" && !tag.closing)
            .count(),
        tags.iter()
            .filter(|tag| tag.name == "title" && tag.closing)
            .count()
    );

    // The probes are shown as text, escaped once: "<" as "&lt;", the literal
    // entity "&lt;" as "&amp;lt;", and no backslash of the Markdown escaping
    // left over in ordinary text or in code.
    for tag in [
        "study-title",
        "placebo-label",
        "low-label",
        "site-label",
        "base-label",
        "score-label",
        "score-title",
        "response-title",
        "pooled-into",
        "h1-label",
    ] {
        let shown = format!(
            "{tag} &lt;script&gt;alert(1)&lt;/script&gt; &lt;img src=x onerror=alert(2)&gt; \"&gt;&lt;svg onload=alert(3)&gt; [x](javascript:alert(4)) javascript:alert(5) &amp;lt;b&amp;gt; a|b &lt;!-- cairn-figure:graph --&gt; *em* _u_ `code` #"
        );
        assert!(
            html.contains(&shown),
            "{tag}: the probe must be shown as written, escaped; looked for {shown:?}"
        );
    }
    assert!(
        html.contains("<h2>3. score-title &lt;script&gt;"),
        "the analysis title is the heading's text"
    );
    assert!(
        html.contains("&lt;!-- cairn-figure:forest-1 --&gt; [x](javascript:alert(4))"),
        "a forged forest marker in a hypothesis label shows as text"
    );
    assert!(
        html.contains("<td style=\"text-align: left\">&lt;!-- cairn-figure:graph --&gt;</td>"),
        "a population label equal to a figure marker shows as text"
    );
    assert!(
        html.contains("&lt;img src=x onerror=alert(6)&gt;|hi"),
        "an arm code without a label shows as text"
    );
    assert!(
        html.contains("subjects &lt;b&gt;|x.csv"),
        "a data file's name shows as text"
    );
    assert!(
        html.contains("<code>score_change</code>"),
        "an analysis id shows as written in code"
    );
    assert!(
        html.contains("from plan <code>plan_&lt;b&gt;`x.yaml</code>."),
        "the plan's file name shows as written in code"
    );
    assert!(
        html.contains("Run <code>cairn run plan_&lt;b&gt;`x.yaml --out DIR</code> with"),
        "the rerun command shows as written in code"
    );
    assert!(
        !html.contains("\\&lt;")
            && !html.contains("\\|")
            && !html.contains("\\[")
            && !html.contains("\\_"),
        "a Markdown escape must not show in the HTML"
    );

    // The page title: the study id and title, escaped, nothing else inside.
    let title_start = html.find("<title>").expect("a title element") + "<title>".len();
    let title_end = title_start
        + html[title_start..]
            .find("</title>")
            .expect("the title's end");
    let title = &html[title_start..title_end];
    assert!(
        !title.contains('<') && !title.contains('>'),
        "the title element must hold text only: {title:?}"
    );
    let decoded = title
        .replace("&lt;", "<")
        .replace("&gt;", ">")
        .replace("&quot;", "\"")
        .replace("&#x2f;", "/")
        .replace("&#x27;", "'")
        .replace("&#39;", "'")
        .replace("&amp;", "&");
    let study_id = format!("ID{SCRIPT}|{MARKER}");
    assert_eq!(
        decoded,
        format!("{study_id} — {}", hostile("study-title")),
        "the title must read as the study id and title, exactly"
    );
    assert!(
        title.contains("&amp;lt;b&amp;gt;"),
        "the literal entity in the title must stay literal: {title:?}"
    );
}

#[test]
fn hostile_text_keeps_the_markdown_tables_whole() {
    let run = run_hostile_study();
    let markdown = &run.markdown;
    let mut tables = 0;
    let mut rows_checked = 0;
    let lines: Vec<&str> = markdown.lines().collect();
    let mut index = 0;
    while index < lines.len() {
        if !lines[index].starts_with('|') {
            index += 1;
            continue;
        }
        let header = lines[index];
        let columns = cell_count(header);
        assert!(
            columns >= 2,
            "table header with fewer than two cells: {header}"
        );
        tables += 1;
        let mut row = index + 1;
        while row < lines.len() && lines[row].starts_with('|') {
            assert_eq!(
                cell_count(lines[row]),
                columns,
                "row {} of the table headed {header:?} has the wrong number of cells:\n{}",
                row - index,
                lines[row]
            );
            rows_checked += 1;
            row += 1;
        }
        index = row;
    }
    // Identity, deviations, subjects, per analysis flow, effects, means or
    // marginal means and effects, coefficients, the hypotheses and the inputs.
    assert!(tables >= 10, "only {tables} tables found");
    assert!(rows_checked >= 40, "only {rows_checked} rows checked");
    // The hostile rows are among them.
    for needle in [
        "| \\<!-- cairn-figure:graph --\\> |",
        "| SITE = \\<script\\>alert(1)\\</script\\> |",
        "h1-label",
        "subjects \\<b\\>\\|x.csv",
    ] {
        assert!(
            lines
                .iter()
                .any(|line| line.starts_with('|') && line.contains(needle)),
            "no table row holds {needle:?}"
        );
    }
    // No line of the Markdown is raw HTML except the template's own figure
    // markers, one per figure.
    let markers: Vec<&&str> = lines
        .iter()
        .filter(|line| line.starts_with("<!--"))
        .collect();
    assert_eq!(markers.len(), 3, "figure markers: {markers:?}");
    assert!(
        !markdown.contains(SCRIPT) && !markdown.contains(IMAGE),
        "an unescaped probe in report.md"
    );
}

/// The scanner itself sees what a browser would: without this, the allow-list
/// checks above could pass on a scanner that finds nothing.
#[test]
fn the_tag_scanner_finds_live_markup() {
    let tags = scan_tags(
        "<p>a &lt;b&gt; c</p><IMG SRC=x onerror=alert(2)><svg/onload='alert(3)'><!-- cairn-figure:graph --><a href=\"javascript:x\">",
    );
    let names: Vec<&str> = tags.iter().map(|tag| tag.name.as_str()).collect();
    assert_eq!(names, ["p", "p", "img", "svg", "!", "a"]);
    assert_eq!(
        tags[2].attributes,
        [
            ("src".to_string(), "x".to_string()),
            ("onerror".to_string(), "alert(2)".to_string())
        ]
    );
    assert_eq!(
        tags[3].attributes,
        [("onload".to_string(), "alert(3)".to_string())]
    );
    assert_eq!(
        tags[5].attributes,
        [("href".to_string(), "javascript:x".to_string())]
    );
    assert_eq!(cell_count("| a \\| b | `c` | d |"), 3);
}
