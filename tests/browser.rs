//! The demo report in a real browser: headless Chromium renders
//! report.html from a fresh demo run, and the test checks what a reader
//! would see rather than the bytes of the page.
//!
//! - A screenshot is not blank: decoded, it has ink on it, and the page's
//!   inline style sheet took effect (the title band's and the accent's
//!   colours from templates/report.css are present).
//! - No table or figure sticks out of the report's column at print-like
//!   widths: a 794 CSS pixel window (A4's width at 96 pixels per inch), and a
//!   782 pixel one, whose column (less the screen padding of 2 × 32 px) is
//!   718 px, A4's width less 1 cm margins. The screen style's font is larger
//!   than the print style's, so this errs on the strict side. The report
//!   itself stays free of script: a wrapper page written to the scratch folder
//!   holds the report in same-origin `srcdoc` frames and measures them with a
//!   small script, and Chromium's `--dump-dom` returns the measurements.
//! - Printed to PDF, every analysis of results.json has its section, each
//!   beginning a page, "What was fitted" occurs once per analysis, and the
//!   text is printed at full size, not shrunk to fit something too wide (text
//!   and word boxes extracted with poppler's pdftotext).
//!
//! The expectations are the README's ("one self-contained HTML page … readable
//! on screen and in print") and common practice for print layout. The test
//! needs Chromium and pdftotext (Debian: `chromium`, `poppler-utils`, which
//! .ci/run installs). Where they are missing it prints why and passes, except
//! when the environment variable CI is "true": there a missing browser fails.

mod common;

use common::{Scratch, cairn, copy_tree, read_json, root};
use std::io::Write;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

/// Flags that keep Chromium quiet, offline and reproducible in a container:
/// no sandbox (CI runs as root), no GPU, no network side traffic, no first-run
/// dialogs. A fresh profile folder is added per run.
const CHROMIUM_FLAGS: [&str; 9] = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--hide-scrollbars",
];

/// A guard against a hung browser, not a performance check: a render takes a
/// few seconds.
const HANG_GUARD: Duration = Duration::from_secs(300);

fn on_ci() -> bool {
    std::env::var("CI").as_deref() == Ok("true")
}

/// The first of `names` found on PATH.
fn find_program(names: &[&str]) -> Option<PathBuf> {
    let path = std::env::var_os("PATH")?;
    std::env::split_paths(&path)
        .flat_map(|folder| names.iter().map(move |name| folder.join(name)))
        .find(|candidate| candidate.is_file())
}

/// A program the test needs: its path, or `None` after saying why the check
/// is skipped. On CI a missing program fails the test.
fn required_program(names: &[&str], package: &str) -> Option<PathBuf> {
    match find_program(names) {
        Some(path) => Some(path),
        None if on_ci() => panic!(
            "CI=true but none of {names:?} is on PATH; install the Debian package {package} (.ci/run does)"
        ),
        None => {
            // Written to the process's stderr directly, past the test
            // harness's capture of print!, so a skip is visible in a plain
            // `cargo test`.
            let _ = writeln!(
                std::io::stderr(),
                "SKIPPED browser check: none of {names:?} is on PATH (Debian package {package}); it runs on CI"
            );
            None
        }
    }
}

/// Run a command to completion and return its standard output, failing the
/// test if it exits unsuccessfully or hangs.
fn run(mut command: Command, what: &str) -> Vec<u8> {
    let mut child = command
        .stdin(Stdio::null())
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap_or_else(|error| panic!("{what}: cannot start: {error}"));
    // Read both pipes on threads so a chatty process cannot block on a full pipe.
    let mut stdout_pipe = child.stdout.take().expect("stdout pipe");
    let mut stderr_pipe = child.stderr.take().expect("stderr pipe");
    let stdout_reader = std::thread::spawn(move || {
        let mut bytes = Vec::new();
        std::io::Read::read_to_end(&mut stdout_pipe, &mut bytes).map(|_| bytes)
    });
    let stderr_reader = std::thread::spawn(move || {
        let mut bytes = Vec::new();
        std::io::Read::read_to_end(&mut stderr_pipe, &mut bytes).map(|_| bytes)
    });
    let started = Instant::now();
    let status = loop {
        if let Some(status) = child.try_wait().expect("wait for child") {
            break status;
        }
        if started.elapsed() > HANG_GUARD {
            let _ = child.kill();
            let _ = child.wait();
            panic!(
                "{what}: still running after {} s; killed",
                HANG_GUARD.as_secs()
            );
        }
        std::thread::sleep(Duration::from_millis(50));
    };
    let stdout = stdout_reader
        .join()
        .expect("stdout reader")
        .expect("read stdout");
    let stderr = String::from_utf8_lossy(
        &stderr_reader
            .join()
            .expect("stderr reader")
            .expect("read stderr"),
    )
    .into_owned();
    assert!(
        status.success(),
        "{what}: exited with {status}; stderr:\n{stderr}"
    );
    stdout
}

/// Chromium on `target` (a file in the scratch folder) with a fresh profile.
fn chromium(
    binary: &Path,
    scratch: &Scratch,
    profile: &str,
    arguments: &[String],
    target: &Path,
    what: &str,
) -> Vec<u8> {
    let profile_folder = scratch.path.join(format!("profile-{profile}"));
    std::fs::create_dir_all(&profile_folder).expect("profile folder");
    let mut command = Command::new(binary);
    command
        .args(CHROMIUM_FLAGS)
        .arg(format!("--user-data-dir={}", profile_folder.display()))
        .args(arguments)
        .arg(file_url(target));
    run(command, what)
}

fn file_url(path: &Path) -> String {
    let absolute = path.canonicalize().expect("absolute path");
    let mut url = String::from("file://");
    for byte in absolute.to_string_lossy().bytes() {
        match byte {
            b'A'..=b'Z' | b'a'..=b'z' | b'0'..=b'9' | b'/' | b'-' | b'_' | b'.' | b'~' => {
                url.push(byte as char)
            }
            other => url.push_str(&format!("%{other:02X}")),
        }
    }
    url
}

/// Pixels of an 8-bit RGB or RGBA image as RGB triples.
fn decode_png(bytes: &[u8]) -> (u32, u32, Vec<[u8; 3]>) {
    let mut decoder = png::Decoder::new(std::io::Cursor::new(bytes));
    // Expand palettes and low bit depths to 8-bit samples; strip 16-bit ones.
    decoder.set_transformations(png::Transformations::normalize_to_color8());
    let mut reader = decoder.read_info().expect("a PNG header");
    let mut buffer = vec![0; reader.output_buffer_size().expect("an image of sane size")];
    let frame = reader.next_frame(&mut buffer).expect("PNG pixel data");
    let data = &buffer[..frame.buffer_size()];
    let channels = match frame.color_type {
        png::ColorType::Rgb => 3,
        png::ColorType::Rgba => 4,
        png::ColorType::Grayscale => 1,
        png::ColorType::GrayscaleAlpha => 2,
        other => panic!("unexpected PNG colour type {other:?}"),
    };
    let pixels = data
        .chunks_exact(channels)
        .map(|sample| {
            if channels >= 3 {
                [sample[0], sample[1], sample[2]]
            } else {
                [sample[0]; 3]
            }
        })
        .collect();
    (frame.width, frame.height, pixels)
}

/// What a screenshot shows, in numbers.
#[derive(Debug)]
struct Ink {
    /// Share of pixels that are not (near) white.
    inked_share: f64,
    /// Pixels of the given colours (each channel within 3).
    colour_counts: Vec<usize>,
}

fn measure_ink(pixels: &[[u8; 3]], colours: &[[u8; 3]]) -> Ink {
    let inked = pixels
        .iter()
        .filter(|pixel| pixel.iter().any(|channel| *channel < 245))
        .count();
    let colour_counts = colours
        .iter()
        .map(|colour| {
            pixels
                .iter()
                .filter(|pixel| {
                    pixel
                        .iter()
                        .zip(colour)
                        .all(|(channel, wanted)| channel.abs_diff(*wanted) <= 3)
                })
                .count()
        })
        .collect();
    Ink {
        inked_share: inked as f64 / pixels.len().max(1) as f64,
        colour_counts,
    }
}

/// The band behind the report's title (`--band: #eef3f1`) and the accent of
/// its rules and left border (`--accent: #2f6f5e`), from templates/report.css.
const BAND: [u8; 3] = [0xee, 0xf3, 0xf1];
const ACCENT: [u8; 3] = [0x2f, 0x6f, 0x5e];

/// Why a screenshot counts as blank, if it does: a page is "not blank" when
/// at least 2% of it is ink (a screen of report text is about 5–15%; a blank
/// page 0) and the style sheet's colours show.
fn blank_reason(ink: &Ink) -> Option<String> {
    if ink.inked_share <= 0.02 {
        Some(format!(
            "only {:.3}% of its pixels are not white",
            ink.inked_share * 100.0
        ))
    } else if ink.colour_counts[0] <= 2000 {
        Some(format!(
            "the title band's colour covers only {} pixels; was the inline CSS applied?",
            ink.colour_counts[0]
        ))
    } else if ink.colour_counts[1] <= 200 {
        Some(format!(
            "the accent colour covers only {} pixels; was the inline CSS applied?",
            ink.colour_counts[1]
        ))
    } else {
        None
    }
}

/// The checks must be able to fail: an all-white image is blank, and so is a
/// page of black text without the report's colours.
#[test]
fn a_blank_screenshot_is_recognised_as_blank() {
    let encode = |pixel: [u8; 3]| {
        let mut encoded = Vec::new();
        let mut encoder = png::Encoder::new(&mut encoded, 40, 30);
        encoder.set_color(png::ColorType::Rgb);
        encoder.set_depth(png::BitDepth::Eight);
        let mut writer = encoder.write_header().expect("header");
        writer
            .write_image_data(&pixel.repeat(40 * 30))
            .expect("data");
        writer.finish().expect("finish");
        encoded
    };
    let (width, height, pixels) = decode_png(&encode([255, 255, 255]));
    assert_eq!((width, height, pixels.len()), (40, 30, 1200));
    let ink = measure_ink(&pixels, &[BAND, ACCENT]);
    assert_eq!(ink.inked_share, 0.0);
    assert!(
        blank_reason(&ink).is_some_and(|reason| reason.starts_with("only 0.000%")),
        "a white image must count as blank"
    );
    let (_, _, pixels) = decode_png(&encode([0, 0, 0]));
    let ink = measure_ink(&pixels, &[BAND, ACCENT]);
    assert_eq!(ink.inked_share, 1.0);
    assert!(
        blank_reason(&ink).is_some_and(|reason| reason.contains("title band")),
        "ink without the report's colours must fail"
    );
}

/// One measurement: a frame `width` CSS pixels wide, optionally with the
/// report's serif font replaced.
struct Frame {
    name: &'static str,
    width: u32,
    font: Option<&'static str>,
}

/// The wrapper page: the report in `srcdoc` frames (same origin as the
/// wrapper, so its script may measure them) at each width, and a script that
/// writes one line per finding into `<pre id="cairn-layout">`.
fn layout_wrapper(report_html: &str, frames: &[Frame]) -> String {
    let frames: String = frames
        .iter()
        .map(|frame| {
            // The font override goes into the wrapper's copy only, last in the
            // head so that it wins; the report file is not touched.
            let html = match frame.font {
                Some(font) => report_html.replacen("</head>", &format!("<style>body {{ font-family: \"{font}\"; }}</style>\n</head>"), 1),
                None => report_html.to_string(),
            };
            let escaped = html.replace('&', "&amp;").replace('"', "&quot;");
            format!("<iframe data-width=\"{}\" style=\"width:{}px;height:2000px;border:0;display:block\" srcdoc=\"{escaped}\"></iframe>\n", frame.name, frame.width)
        })
        .collect();
    format!(
        r#"<!DOCTYPE html>
<html><head><meta charset="utf-8"><title>layout probe</title></head>
<body style="margin:0">
<pre id="cairn-layout">pending</pre>
{frames}<script>
// Runs after every frame has loaded (window load waits for them).
window.addEventListener("load", function () {{
  var lines = [];
  document.querySelectorAll("iframe").forEach(function (frame) {{
    var width = frame.getAttribute("data-width");
    var doc = frame.contentDocument;
    var main = doc.querySelector("main");
    if (!main) {{ lines.push("frame " + width + " no-main"); return; }}
    var style = doc.defaultView.getComputedStyle(main);
    var box = main.getBoundingClientRect();
    var left = box.left + parseFloat(style.paddingLeft);
    var right = box.right - parseFloat(style.paddingRight);
    var tables = doc.querySelectorAll("table");
    var figures = doc.querySelectorAll("figure svg");
    var widest = 0;
    var overflowing = 0;
    function check(kind, index, element) {{
      var rect = element.getBoundingClientRect();
      widest = Math.max(widest, rect.width);
      var sticksOut = rect.right > right + 0.5 || rect.left < left - 0.5 || element.scrollWidth > element.clientWidth + 1;
      if (sticksOut) {{
        overflowing += 1;
        lines.push("overflow " + width + " " + kind + " " + index + " left " + rect.left.toFixed(1) + " right " + rect.right.toFixed(1) +
          " column " + left.toFixed(1) + " to " + right.toFixed(1) + " scroll " + element.scrollWidth + " client " + element.clientWidth);
      }}
    }}
    tables.forEach(function (table, index) {{ check("table", index, table); }});
    figures.forEach(function (svg, index) {{ check("figure", index, svg); }});
    var page = doc.documentElement;
    lines.push("frame " + width + " tables " + tables.length + " figures " + figures.length + " overflowing " + overflowing +
      " page-scroll " + page.scrollWidth + " page-client " + page.clientWidth + " widest " + widest.toFixed(1) + " column " + (right - left).toFixed(1));
  }});
  document.getElementById("cairn-layout").textContent = lines.join("\n");
}});
</script>
</body></html>
"#
    )
}

/// The text of `<pre id="cairn-layout">` in a dumped DOM.
fn layout_lines(dom: &str) -> Vec<String> {
    let start = dom
        .find("<pre id=\"cairn-layout\">")
        .expect("the probe's result element")
        + "<pre id=\"cairn-layout\">".len();
    let end = start
        + dom[start..]
            .find("</pre>")
            .expect("the end of the probe's result");
    dom[start..end].lines().map(str::to_string).collect()
}

/// Whitespace removed, so text wrapped differently by the PDF still matches.
fn squeeze(text: &str) -> String {
    text.chars()
        .filter(|character| !character.is_whitespace())
        .collect()
}

#[test]
fn the_demo_report_renders_in_a_real_browser() {
    let Some(browser) = required_program(
        &[
            "chromium",
            "chromium-browser",
            "google-chrome",
            "google-chrome-stable",
        ],
        "chromium",
    ) else {
        return;
    };
    let scratch = Scratch::new("browser");
    copy_tree(&root().join("plans/demo"), &scratch.path.join("demo"));
    let outcome = cairn(
        &scratch.path.join("demo"),
        &["run", "plan.yaml", "--out", "out"],
    );
    assert_eq!(outcome.code, 0, "{}", outcome.stderr);
    let out = scratch.path.join("demo/out");
    let report = out.join("report.html");
    let results = read_json(&out.join("results.json"));
    let analyses = results["analyses"].as_array().expect("analyses");
    let titles: Vec<&str> = analyses
        .iter()
        .map(|analysis| analysis["title"].as_str().expect("a title"))
        .collect();
    assert!(titles.len() >= 2, "the demo has several analyses");

    // 1. A screenshot of the first screen is not blank and shows the CSS.
    let screenshot = scratch.path.join("screen.png");
    chromium(
        &browser,
        &scratch,
        "screenshot",
        &[
            format!("--screenshot={}", screenshot.display()),
            "--window-size=1280,1600".to_string(),
        ],
        &report,
        "chromium --screenshot",
    );
    let (width, height, pixels) =
        decode_png(&std::fs::read(&screenshot).expect("the screenshot file"));
    assert_eq!(
        (width, height),
        (1280, 1600),
        "the screenshot has the window's size"
    );
    let ink = measure_ink(&pixels, &[BAND, ACCENT]);
    println!(
        "screenshot {width}×{height}: {:.2}% ink, {} band pixels, {} accent pixels",
        ink.inked_share * 100.0,
        ink.colour_counts[0],
        ink.colour_counts[1]
    );
    if let Some(reason) = blank_reason(&ink) {
        panic!("the screenshot looks blank: {reason}");
    }

    // 2. Nothing sticks out of the column at print-like widths.
    // Also with DejaVu Serif, a wide serif that stands in where none of the
    // style sheet's fonts (Georgia, Times New Roman or its metric twin
    // Liberation Serif) is installed: a table that fits only with narrow
    // letters would stick out for those readers.
    let frames = [
        Frame {
            name: "794",
            width: 794,
            font: None,
        },
        Frame {
            name: "782",
            width: 782,
            font: None,
        },
        Frame {
            name: "794-dejavu-serif",
            width: 794,
            font: Some("DejaVu Serif"),
        },
    ];
    let wrapper = scratch.path.join("layout.html");
    std::fs::write(
        &wrapper,
        layout_wrapper(
            &std::fs::read_to_string(&report).expect("report.html"),
            &frames,
        ),
    )
    .expect("write the wrapper");
    let dom = chromium(
        &browser,
        &scratch,
        "layout",
        &[
            "--dump-dom".to_string(),
            "--virtual-time-budget=5000".to_string(),
            "--window-size=900,2000".to_string(),
        ],
        &wrapper,
        "chromium --dump-dom",
    );
    let dom = String::from_utf8_lossy(&dom).into_owned();
    let lines = layout_lines(&dom);
    let html = std::fs::read_to_string(&report).expect("report.html");
    let expected_tables = html.matches("<table>").count();
    let expected_figures = html.matches("<svg").count();
    for frame in &frames {
        let width = frame.name;
        let summary = lines
            .iter()
            .find(|line| line.starts_with(&format!("frame {width} ")))
            .unwrap_or_else(|| {
                panic!(
                    "no measurement at {width} px; probe said:\n{}",
                    lines.join("\n")
                )
            });
        println!("{summary}");
        let fields: Vec<&str> = summary.split(' ').collect();
        let value = |name: &str| {
            fields
                .iter()
                .position(|field| *field == name)
                .and_then(|index| fields.get(index + 1))
                .and_then(|text| text.parse::<f64>().ok())
                .unwrap_or(f64::NAN)
        };
        assert_eq!(
            value("tables"),
            expected_tables as f64,
            "every table measured at {width} px: {summary}"
        );
        assert_eq!(
            value("figures"),
            expected_figures as f64,
            "every figure measured at {width} px: {summary}"
        );
        assert_eq!(
            value("overflowing"),
            0.0,
            "tables or figures stick out of the column at {width} px:\n{}",
            lines.join("\n")
        );
        assert!(
            value("page-scroll") <= value("page-client"),
            "the page scrolls sideways at {width} px: {summary}"
        );
    }

    // 3. Printed to PDF: a section per analysis, each starting a page.
    let pdf = scratch.path.join("report.pdf");
    chromium(
        &browser,
        &scratch,
        "pdf",
        &[
            format!("--print-to-pdf={}", pdf.display()),
            "--no-pdf-header-footer".to_string(),
        ],
        &report,
        "chromium --print-to-pdf",
    );
    let pdf_bytes = std::fs::read(&pdf).expect("the PDF file");
    assert!(
        pdf_bytes.starts_with(b"%PDF-"),
        "--print-to-pdf wrote something that is not a PDF"
    );
    assert!(
        pdf_bytes.len() > 50_000,
        "the PDF is suspiciously small: {} bytes",
        pdf_bytes.len()
    );
    let Some(pdftotext) = required_program(&["pdftotext"], "poppler-utils") else {
        return;
    };
    let mut command = Command::new(pdftotext);
    command.arg(&pdf).arg("-");
    let text = String::from_utf8_lossy(&run(command, "pdftotext")).into_owned();
    let pages: Vec<String> = text
        .split('\u{c}')
        .map(squeeze)
        .filter(|page| !page.is_empty())
        .collect();
    println!("PDF: {} bytes, {} pages", pdf_bytes.len(), pages.len());
    let whole = squeeze(&text);
    assert_eq!(
        whole.matches("Whatwasfitted.").count(),
        titles.len(),
        "one \"What was fitted\" per analysis"
    );
    for (index, title) in titles.iter().enumerate() {
        // The template numbers analyses from 3 (after departures and subjects).
        let heading = squeeze(&format!("{}. {title}", index + 3));
        assert!(
            whole.contains(&squeeze(title)),
            "analysis title {title:?} is missing from the PDF"
        );
        assert!(
            pages.iter().any(|page| page.starts_with(&heading)),
            "the section \"{}. {title}\" does not begin a page of the PDF",
            index + 3
        );
    }

    // Printed at full size. Chromium shrinks a whole printed document to fit
    // its widest element, so a table too wide for the paper shows up not as
    // words in the margin but as smaller type everywhere. The print style
    // sets 10.5 pt body text; a word's box (ascent plus descent) is about 1.1
    // times the font size (11.6 pt for this report with Liberation Serif), so
    // a median box under 10.5 pt means the page was shrunk by more than about
    // 10%. (Giving every table a minimum width of 900 px shrinks it to 9.6 pt.)
    let mut command = Command::new(find_program(&["pdftotext"]).expect("pdftotext"));
    command.arg("-bbox").arg(&pdf).arg("-");
    let boxes = String::from_utf8_lossy(&run(command, "pdftotext -bbox")).into_owned();
    let words = word_boxes(&boxes);
    assert!(
        words.len() > 1000,
        "only {} word boxes in the PDF",
        words.len()
    );
    let mut heights: Vec<f64> = words.iter().map(|word| word.y_max - word.y_min).collect();
    heights.sort_by(f64::total_cmp);
    let median_height = heights[heights.len() / 2];
    let left_margin = words
        .iter()
        .map(|word| word.x_min)
        .fold(f64::INFINITY, f64::min);
    let right_margin = words
        .iter()
        .map(|word| word.page_width - word.x_max)
        .fold(f64::INFINITY, f64::min);
    println!(
        "PDF words: {}, median word height {median_height:.2} pt, margins left {left_margin:.1} pt, right {right_margin:.1} pt",
        words.len()
    );
    assert!(
        median_height >= 10.5,
        "the PDF's text is small (median word height {median_height:.2} pt): was the page shrunk to fit something too wide?"
    );
    assert!(
        right_margin >= left_margin - 1.0,
        "words printed in the right margin ({right_margin:.1} pt left of {left_margin:.1})"
    );
}

struct WordBox {
    page_width: f64,
    x_min: f64,
    x_max: f64,
    y_min: f64,
    y_max: f64,
}

/// Word boxes from `pdftotext -bbox` output: `<page width=".." …>` then
/// `<word xMin=".." yMin=".." xMax=".." yMax="..">text</word>` lines.
fn word_boxes(bbox_html: &str) -> Vec<WordBox> {
    let attribute = |line: &str, name: &str| -> Option<f64> {
        let start = line.find(&format!("{name}=\""))? + name.len() + 2;
        let end = start + line[start..].find('"')?;
        line[start..end].parse().ok()
    };
    let mut words = Vec::new();
    let mut page_width = f64::NAN;
    for line in bbox_html.lines().map(str::trim) {
        if line.starts_with("<page ") {
            page_width = attribute(line, "width").expect("a page width");
        } else if line.starts_with("<word ") {
            words.push(WordBox {
                page_width,
                x_min: attribute(line, "xMin").expect("xMin"),
                x_max: attribute(line, "xMax").expect("xMax"),
                y_min: attribute(line, "yMin").expect("yMin"),
                y_max: attribute(line, "yMax").expect("yMax"),
            });
        }
    }
    words
}
