//! Reports for people: the HTML report in headless Chromium (console,
//! network, marks, screenshot), the Markdown report and its size limit.

use std::path::{Path, PathBuf};

use shunt::report::Report;
use shunt::report::markdown::{self, MarkdownConfig};

use crate::browser::{self, count_in};
use crate::util::{fixture, shunt, tempdir};

/// Where the screenshots of a test run go (not committed).
fn shots() -> PathBuf {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("target").join("report-html");
    std::fs::create_dir_all(&dir).unwrap();
    dir
}

/// The committed reference screenshot shown in the README.
fn reference_screenshot() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("docs").join("report-demo.png")
}

fn png_size(path: &Path) -> (u32, u32) {
    let bytes = std::fs::read(path).unwrap_or_else(|e| panic!("{}: {e}", path.display()));
    assert_eq!(&bytes[..8], b"\x89PNG\r\n\x1a\n", "{} is a PNG", path.display());
    let be = |o: usize| u32::from_be_bytes(bytes[o..o + 4].try_into().unwrap());
    (be(16), be(20))
}

#[test]
fn checker_sees_planted_faults() {
    // The checks below are only worth something if they can fail: a page
    // with a console error, an uncaught exception and two external requests
    // must show all four; a clean page none.
    let dir = tempdir();
    let bad = dir.path().join("bad.html");
    std::fs::write(
        &bad,
        "<!DOCTYPE html><html><head><title>bad</title>\
         <script src=\"http://127.0.0.1:1/planted.js\"></script></head>\
         <body><p>bad</p><img src=\"http://127.0.0.1:1/planted.png\">\
         <script>console.error(\"planted console error\"); throw new Error(\"planted exception\");</script>\
         </body></html>",
    )
    .unwrap();
    let good = dir.path().join("good.html");
    std::fs::write(&good, "<!DOCTYPE html><html><head><title>good</title></head><body><p id=\"x\">fine</p></body></html>").unwrap();
    // Our report's policy forbids every fetch: an external image is refused
    // before any request, and the refusal is a console message.
    let fenced = dir.path().join("fenced.html");
    std::fs::write(
        &fenced,
        "<!DOCTYPE html><html><head><meta http-equiv=\"Content-Security-Policy\" \
         content=\"default-src 'none'; style-src 'unsafe-inline'\"><title>fenced</title></head>\
         <body><img src=\"http://127.0.0.1:1/fenced.png\"><script>console.log(1)</script></body></html>",
    )
    .unwrap();

    let shot = dir.path().join("shot.png");
    let b = browser::load(&bad, &dir.path().join("b"), &shot, (400, 300));
    let console = b.console.join("\n");
    assert!(console.contains("planted console error"), "console: {console}");
    assert!(console.contains("planted exception"), "console: {console}");
    assert!(b.requests.iter().any(|u| u.ends_with("/planted.js")), "{:?}", b.requests);
    assert!(b.requests.iter().any(|u| u.ends_with("/planted.png")), "{:?}", b.requests);

    let g = browser::load(&good, &dir.path().join("g"), &shot, (400, 300));
    assert!(g.console.is_empty(), "{:?}", g.console);
    assert!(g.requests.is_empty(), "{:?}", g.requests);
    assert!(g.dom.contains("<p id=\"x\">fine</p>"), "{}", g.dom);
    assert_eq!(png_size(&shot), (400, 300));

    let f = browser::load(&fenced, &dir.path().join("f"), &shot, (400, 300));
    assert!(f.requests.is_empty(), "the policy stops the request: {:?}", f.requests);
    let console = f.console.join("\n");
    assert!(console.contains("Content Security Policy"), "refusals are reported: {console}");
}

/// Static self-containment: nothing in the file refers to anything outside it.
fn assert_self_contained(html: &str) {
    for needle in ["<script", "<link", "src=", "url(", "@import", "<iframe", "<object", "<img"] {
        assert!(!html.contains(needle), "the report contains {needle}");
    }
    for (i, _) in html.match_indices("href=") {
        assert!(html[i..].starts_with("href=\"#"), "only in-page links: {}", &html[i..i + 40]);
    }
}

/// `data-kind` of block `id`'s mark inside the element `id`.
fn kind_of(dom: &str, section: &str, end: &str, block: usize) -> String {
    let start = dom.find(&format!("id=\"{section}\"")).unwrap();
    let rest = &dom[start..start + dom[start..].find(end).unwrap()];
    let at = rest
        .find(&format!("data-block=\"{block}\" data-kind=\""))
        .unwrap_or_else(|| panic!("block {block} has no mark in {section}"));
    let tail = &rest[at..];
    let open = tail.find("data-kind=\"").unwrap() + "data-kind=\"".len();
    tail[open..open + tail[open..].find('"').unwrap()].to_owned()
}

#[test]
fn demo_html_report_in_chromium() {
    let dir = tempdir();
    let html = dir.path().join("report.html");
    // Run from the repository root with the model path as a user would type
    // it, so the page (and the reference screenshot) shows that path.
    let run = std::process::Command::new(env!("CARGO_BIN_EXE_shunt"))
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .args(["audit", "fixtures/demo/tile_grader.onnx", "--format", "html", "--output"])
        .arg(&html)
        .arg("--quiet")
        .output()
        .unwrap();
    // exploding-signal is planted too (the dominant block), but no --fail-on: 0.
    assert!(run.status.success(), "{}", String::from_utf8_lossy(&run.stderr));
    let text = std::fs::read_to_string(&html).unwrap();
    assert_self_contained(&text);
    assert!(text.contains("shunt audit ") && text.contains("--format html"), "the command line");

    let shot = shots().join("tile_grader.png");
    let page = browser::load(&html, &dir.path().join("chromium"), &shot, (1200, 2300));
    assert!(page.console.is_empty(), "console messages: {:#?}", page.console);
    assert!(page.requests.is_empty(), "network requests: {:#?}", page.requests);
    assert_eq!(png_size(&shot), (1200, 2300));
    let shot_bytes = std::fs::metadata(&shot).unwrap().len();
    assert!(shot_bytes > 50_000, "a blank page would be a few KB, got {shot_bytes} bytes");

    // One mark per block in each plot and in the block map (the demo has 8
    // blocks: fixtures/MANIFEST.txt).
    let dom = &page.dom;
    for plot in ["plot-ratio", "plot-rms"] {
        assert_eq!(count_in(dom, plot, "</figure>", "class=\"mark "), 8, "{plot}");
        assert_eq!(count_in(dom, plot, "</figure>", "data-block="), 8, "{plot}");
    }
    assert_eq!(count_in(dom, "block-map", "</section>", "class=\"tile "), 8);
    assert_eq!(count_in(dom, "block-map", "</section>", "data-kind=\"bare-run\""), 1);

    // The planted defects stand out the same way everywhere: stage1.1's lost
    // shortcut (before block 2), stage2.2's dead branch (block 5), stage3.1's
    // ×40 branch (block 7); every other block is plain.
    for (section, end) in
        [("plot-ratio", "</figure>"), ("plot-rms", "</figure>"), ("block-map", "</section>")]
    {
        for block in 1..=8 {
            let want = match block {
                2 => "lost-shortcut",
                5 => "dead",
                7 => "dominant",
                _ => "ok",
            };
            assert_eq!(kind_of(dom, section, end, block), want, "block {block} in {section}");
        }
    }
    // Flagged marks carry words too, not only shape and colour.
    for label in ["#2 lost-shortcut", "#5 static-dead, dead (0)", "#7 dominant"] {
        assert!(count_in(dom, "plot-ratio", "</figure>", label) == 1, "label {label}");
    }
    // The dead block's ratio is 0: drawn on the axis floor, and said so.
    assert!(dom.contains("data-block=\"5\" data-kind=\"dead\" data-floor=\"true\""));
    // Findings name the ONNX nodes and tensors.
    let findings = &dom[dom.find("id=\"findings\"").unwrap()..];
    for name in
        ["stage2.2.add", "stage2.2.conv2", "stage3.1.add", "stage1.1.conv1", "stage2.1.relu"]
    {
        assert!(findings.contains(name), "findings name {name}");
    }

    if std::env::var_os("SHUNT_UPDATE_SCREENSHOT").is_some() {
        std::fs::create_dir_all(reference_screenshot().parent().unwrap()).unwrap();
        std::fs::copy(&shot, reference_screenshot()).unwrap();
    }
    // The README shows the committed reference screenshot (looked at by
    // people, not compared pixel by pixel).
    assert_eq!(png_size(&reference_screenshot()), (1200, 2300));
    let readme =
        std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("README.md")).unwrap();
    assert!(readme.contains("docs/report-demo.png"), "the README shows the screenshot");
}

fn demo_report() -> Report {
    let model = fixture("demo/tile_grader.onnx");
    let run = shunt(&["audit", model.to_str().unwrap(), "--format", "json", "--quiet"]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    serde_json::from_str(&run.stdout).expect("the JSON report reads back")
}

#[test]
fn demo_markdown_report() {
    let model = fixture("demo/tile_grader.onnx");
    let run = shunt(&["audit", model.to_str().unwrap(), "--format", "markdown", "--quiet"]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let md = &run.stdout;
    assert!(md.len() <= markdown::DEFAULT_MAX_BYTES);
    assert!(md.contains("**5 findings**"), "{md}");
    for row in ["| 5 | 2 | stage2.2.add |", "| 7 | 3 | stage3.1.add |", "| 8 | 3 | stage3.2.add |"]
    {
        assert!(md.contains(row), "{row} in\n{md}");
    }
    for finding in ["| dead | block 5 |", "| dominant | block 7 |", "| lost-shortcut | block 2 |"] {
        assert!(md.contains(finding), "{finding} in\n{md}");
    }
    assert!(!md.contains("elided"), "nothing elided at the default limit");
}

#[test]
fn markdown_stays_under_its_limit_and_says_what_it_left_out() {
    let report = demo_report();
    let mut full = Vec::new();
    markdown::render(&report, &MarkdownConfig { max_bytes: 1 << 20 }, &mut full).unwrap();
    let full = String::from_utf8(full).unwrap();
    for limit in [full.len() - 1, full.len() / 2, 1500, 900, 100] {
        let mut out = Vec::new();
        markdown::render(&report, &MarkdownConfig { max_bytes: limit }, &mut out).unwrap();
        let md = String::from_utf8(out).unwrap();
        assert!(md.len() <= limit, "{} bytes over a limit of {limit}", md.len());
        assert!(
            md.contains("elided") || md.contains("does not fit"),
            "limit {limit}: says what is missing:\n{md}"
        );
    }
    // Just under the full size the findings are all there and only table rows go.
    let mut out = Vec::new();
    markdown::render(&report, &MarkdownConfig { max_bytes: full.len() - 100 }, &mut out).unwrap();
    let md = String::from_utf8(out).unwrap();
    assert!(md.contains("| dominant | block 7 |"), "{md}");
    assert!(md.contains("| exploding-signal | model |"), "{md}");
    assert!(md.contains("more block row(s) elided"), "{md}");
    assert!(!md.contains("more finding(s) elided"), "{md}");
}

/// Unescaped double quotes in a line of DOT (an even count means every
/// string is closed on its line).
fn dot_quotes(line: &str) -> usize {
    let b = line.as_bytes();
    let mut n = 0;
    let mut i = 0;
    while i < b.len() {
        match b[i] {
            b'\\' => i += 1,
            b'"' => n += 1,
            _ => {}
        }
        i += 1;
    }
    n
}

/// Every line of `dot` closes its strings, and braces balance.
pub fn assert_dot_well_formed(dot: &str) {
    assert!(dot.starts_with("digraph shunt {\n") && dot.ends_with("}\n"), "{dot}");
    for line in dot.lines() {
        assert_eq!(dot_quotes(line) % 2, 0, "an open string: {line}");
    }
}

#[test]
fn demo_dot_structure() {
    let model = fixture("demo/tile_grader.onnx");
    let run = shunt(&["audit", model.to_str().unwrap(), "--format", "dot", "--quiet"]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let dot = &run.stdout;
    assert_dot_well_formed(dot);
    // 8 blocks: one branch box and one merge each, two edges into each merge.
    assert_eq!(dot.matches("[shape=box").count(), 8);
    assert_eq!(dot.matches("[shape=circle").count(), 8);
    assert_eq!(dot.matches("-> \"merge ").count(), 16);
    assert!(
        dot.contains("label=\"#5 branch\\nconv3x3 16→16\\nconv3x3 16→16\\nstatic-dead, dead\"")
    );
    assert!(dot.contains("[style=dashed, label=\"projection (Conv→BatchNormalization)\"]"));
    // The planted lost shortcut: stage1.1's two layers between blocks 1 and 2.
    assert!(
        dot.contains("\"tensor stage1.0.add\" -> \"tensor stage1.1.relu\" [style=dotted, color=\"#D55E00\", label=\"2 learned layer(s), no shortcut\"];"),
        "{dot}"
    );
}
