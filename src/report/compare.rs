//! The document of `shunt compare` (schema `shunt/compare`): two models
//! aligned by structure, and its rendering for people.

use std::fmt::Write as _;
use std::io;

use serde::{Deserialize, Serialize};

use crate::report::FedRow;
use crate::report::text::{plural, terminal_safe};
use crate::vocab::PairStatus;

/// Identifies the JSON document of a comparison.
pub const COMPARE_SCHEMA: &str = "shunt/compare";
/// Version of the `shunt/compare` JSON schema.
///
/// Version 2 added `BlockPair::error` and `Comparison::errors`: where along
/// depth B's tensors depart from A's (issue 14).
pub const COMPARE_SCHEMA_VERSION: u32 = 2;

/// The comparison of model A (the reference) with model B.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Comparison {
    /// Always [`COMPARE_SCHEMA`].
    pub schema: String,
    /// Always [`COMPARE_SCHEMA_VERSION`].
    pub schema_version: u32,
    /// The reference model.
    pub a: Side,
    /// The other model.
    pub b: Side,
    /// What was fed to both, when they were run.
    pub run: Option<FedBoth>,
    /// The alignment, in order: every block of both models appears once.
    pub blocks: Vec<BlockPair>,
    /// Pairs that differ in structure plus blocks of one model only.
    pub structural_differences: usize,
    /// Agreement of the final outputs, output by output (when run).
    pub outputs: Vec<OutputAgreement>,
    /// Why the comparison fails (structure, or numbers beyond the given
    /// tolerances); empty when A and B match.
    pub failures: Vec<String>,
    /// Where along depth B's tensors depart from A's, when both ran.
    pub errors: Option<ErrorLocalisation>,
}

/// Where B's error is born and how it grows along depth.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ErrorLocalisation {
    /// Whether the aligned blocks' tensors were compared (both models ran
    /// the same passes on the same inputs).
    pub measured: bool,
    /// Why they were not, when they were not.
    pub note: Option<String>,
    /// The error is born at the first aligned block whose merge-output
    /// error is above this (or that holds a NaN or an infinity).
    pub threshold: f64,
    /// That block, if any.
    pub born_at: Option<ErrorBirth>,
    /// Output error of the last compared pair over the first's (both
    /// finite, the first above 0): the growth along depth.
    pub growth: Option<f64>,
    /// Aligned pairs compared.
    pub pairs: usize,
}

/// The block where B's error first exceeds the threshold.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ErrorBirth {
    /// Block id in A.
    pub a: usize,
    /// Block id in B.
    pub b: usize,
    /// The merge node's name in A.
    pub merge_a: String,
    /// Its merge-output error (`null` when only non-finite values differ).
    pub output: Option<f64>,
    /// NaN or infinite values at the merge in A or B.
    pub non_finite: u64,
}

/// The difference of one aligned pair's tensors, over all samples.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BlockError {
    /// `‖B − A‖ / ‖A‖` of the merge output over the values both hold as
    /// finite numbers.
    pub output: Option<f64>,
    /// The same for the shortcut at the merge.
    pub shortcut: Option<f64>,
    /// The same for the branch at the merge (its inputs summed).
    pub branch: Option<f64>,
    /// Positions where A or B holds a NaN or an infinity (output, shortcut
    /// and branch together).
    pub non_finite: u64,
    /// This pair's output error over the previous compared pair's.
    pub growth: Option<f64>,
}

/// One of the two models.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Side {
    /// The path as given.
    pub path: String,
    /// Nodes in the main graph.
    pub nodes: usize,
    /// Total elements of all initializers.
    pub parameters: u64,
    /// `producer_name` and `producer_version`.
    pub producer: String,
    /// Residual blocks.
    pub blocks: usize,
}

/// The inputs fed to both models.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FedBoth {
    /// The inference engine.
    pub engine: String,
    /// Samples fed.
    pub samples: usize,
    /// Seed of the generator.
    pub seed: u64,
    /// Every input with the shape of one pass of A and how its values were made.
    pub inputs: Vec<FedRow>,
    /// The feed file, when one was given.
    pub feed: Option<String>,
}

/// One step of the alignment.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BlockPair {
    /// Block id in A, or `null` when only B has the block.
    pub a: Option<usize>,
    /// Block id in B, or `null` when only A has the block.
    pub b: Option<usize>,
    /// `same`, `changed`, `only-a` or `only-b`.
    pub status: PairStatus,
    /// The merge node's name in A and in B.
    pub merge_a: Option<String>,
    /// See `merge_a`.
    pub merge_b: Option<String>,
    /// Stage id in A (in B for a block of B only).
    pub stage: Option<usize>,
    /// The block's structure (A's, or B's for a block of B only):
    /// `stage, shortcut, placement, [branch signature]`.
    pub structure: String,
    /// What differs in structure between the pair, in words.
    pub differences: Vec<String>,
    /// Mean RMS(branch)/RMS(shortcut) in A.
    pub ratio_a: Option<f64>,
    /// Mean RMS(branch)/RMS(shortcut) in B.
    pub ratio_b: Option<f64>,
    /// `ratio_b - ratio_a`.
    pub ratio_delta: Option<f64>,
    /// `ratio_b / ratio_a - 1`.
    pub ratio_change: Option<f64>,
    /// The difference of B's tensors from A's, when they were compared.
    pub error: Option<BlockError>,
}

/// How closely one output of B follows the same output of A.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct OutputAgreement {
    /// Output name in A.
    pub a: String,
    /// Output name in B (outputs are paired by position).
    pub b: String,
    /// Float values compared (all samples).
    pub elements: usize,
    /// Length of the last axis when the output looks like class scores
    /// (`[batch, classes]`), else `null`.
    pub classes: Option<usize>,
    /// `‖B − A‖ / ‖A‖`.
    pub rel_l2: Option<f64>,
    /// Cosine similarity of A and B.
    pub cosine: Option<f64>,
    /// Fraction of samples whose top class agrees (class scores only).
    pub top1: Option<f64>,
    /// Why the output could not be compared, if it could not.
    pub note: Option<String>,
}

/// Where the error is born and its growth, in one line.
pub fn error_summary(e: &ErrorLocalisation) -> String {
    if !e.measured {
        return format!(
            "error along depth: not measured: {}",
            terminal_safe(e.note.as_deref().unwrap_or("unknown reason"))
        );
    }
    let born = match &e.born_at {
        Some(b) => {
            let what = match (b.output, b.non_finite) {
                (_, n) if n > 0 => format!("{n} non-finite value(s)"),
                (Some(o), _) => format!("merge-output error {o:.3e}"),
                (None, _) => "an error".to_owned(),
            };
            format!(
                "born at block {} of A ({}) -> {} of B: {what}, above {}",
                b.a,
                terminal_safe(&b.merge_a),
                b.b,
                e.threshold
            )
        }
        None => format!("no aligned block's merge-output error is above {}", e.threshold),
    };
    let growth = e.growth.map_or(String::new(), |g| {
        format!("; grows x{g:.3} from the first compared block to the last")
    });
    format!("error along depth ({} pairs): {born}{growth}", e.pairs)
}

fn opt(x: Option<usize>) -> String {
    x.map_or("-".to_owned(), |x| x.to_string())
}

fn num4(x: Option<f64>) -> String {
    x.map_or("-".to_owned(), |x| format!("{x:.4}"))
}

/// Renders a comparison for people.
pub fn render(c: &Comparison, out: &mut dyn io::Write) -> io::Result<()> {
    let mut s = String::new();
    let model = |m: &Side| {
        format!(
            "{} ({}, {} nodes, made by {})",
            terminal_safe(&m.path),
            plural(m.blocks, "block"),
            m.nodes,
            if m.producer.is_empty() {
                "an unnamed producer".to_owned()
            } else {
                terminal_safe(&m.producer)
            }
        )
    };
    let _ = writeln!(s, "A: {}", model(&c.a));
    let _ = writeln!(s, "B: {}", model(&c.b));
    if let Some(r) = &c.run {
        let _ = writeln!(
            s,
            "  both ran the same {} sample(s) with {}, seed {}",
            r.samples, r.engine, r.seed
        );
        for i in &r.inputs {
            let shape: Vec<String> = i.shape.iter().map(u64::to_string).collect();
            let _ = writeln!(
                s,
                "  input '{}' {} [{}]: {}",
                terminal_safe(&i.name),
                i.dtype,
                shape.join("x"),
                terminal_safe(&i.values)
            );
        }
    }
    let mut t = comfy_table::Table::new();
    t.load_preset(comfy_table::presets::NOTHING);
    let mut header = vec!["A", "B", "stage", "merge in A", "structure"];
    if c.run.is_some() {
        header.extend(["ratio A", "ratio B", "change"]);
    }
    let errors = c.errors.as_ref().is_some_and(|e| e.measured);
    if errors {
        header.extend(["error out", "short", "branch", "growth"]);
    }
    t.set_header(header);
    for p in &c.blocks {
        let structure = match p.status {
            PairStatus::Same => "same".to_owned(),
            PairStatus::Changed => p.differences.join("; "),
            PairStatus::OnlyA => format!("only in A: {}", p.structure),
            PairStatus::OnlyB => format!("only in B: {}", p.structure),
        };
        let merge = p.merge_a.clone().or_else(|| p.merge_b.clone().map(|m| format!("(B) {m}")));
        let mut row = vec![
            opt(p.a),
            opt(p.b),
            opt(p.stage),
            terminal_safe(&merge.unwrap_or_default()),
            terminal_safe(&structure),
        ];
        if c.run.is_some() {
            row.push(num4(p.ratio_a));
            row.push(num4(p.ratio_b));
            row.push(p.ratio_change.map_or("-".to_owned(), |x| format!("{:+.1}%", x * 100.0)));
        }
        if errors {
            let e = p.error.as_ref();
            let sci = |v: Option<f64>| v.map_or("-".to_owned(), |v| format!("{v:.2e}"));
            let mut out = sci(e.and_then(|e| e.output));
            if e.is_some_and(|e| e.non_finite > 0) {
                out.push_str(" (non-finite)");
            }
            row.push(out);
            row.push(sci(e.and_then(|e| e.shortcut)));
            row.push(sci(e.and_then(|e| e.branch)));
            row.push(e.and_then(|e| e.growth).map_or("-".to_owned(), |g| format!("x{g:.2}")));
        }
        t.add_row(row);
    }
    let _ = writeln!(s, "\n{t}\n");
    let aligned = c.blocks.iter().filter(|p| p.a.is_some() && p.b.is_some()).count();
    let _ = writeln!(
        s,
        "aligned: {} of A's {} and B's {}; structural differences: {}",
        aligned,
        c.a.blocks,
        c.b.blocks,
        if c.structural_differences == 0 {
            "none".to_owned()
        } else {
            c.structural_differences.to_string()
        }
    );
    if let Some(worst) = c
        .blocks
        .iter()
        .filter_map(|p| p.ratio_change.map(|x| (x.abs(), p)))
        .max_by(|x, y| x.0.total_cmp(&y.0))
    {
        let _ = writeln!(
            s,
            "largest ratio change: {:+.1}% at block {} of A",
            worst.1.ratio_change.unwrap_or(0.0) * 100.0,
            opt(worst.1.a)
        );
    }
    if let Some(e) = &c.errors {
        let _ = writeln!(s, "{}", error_summary(e));
    }
    for o in &c.outputs {
        let _ = writeln!(s, "{}", output_line(o, str::to_owned));
    }
    if c.failures.is_empty() {
        let _ = writeln!(s, "verdict: match");
    } else {
        for f in &c.failures {
            let _ = writeln!(s, "verdict: {}", terminal_safe(f));
        }
    }
    out.write_all(s.as_bytes())
}

/// The table's cells of every pair, twelve per row: ids, stage, merge,
/// structure, ratios and change, the three errors and the growth.
fn cells(c: &Comparison) -> Vec<(bool, Vec<String>)> {
    let born = c.errors.as_ref().and_then(|e| e.born_at.as_ref()).map(|b| (b.a, b.b));
    let sci = |v: Option<f64>| v.map_or("-".to_owned(), |v| format!("{v:.2e}"));
    c.blocks
        .iter()
        .map(|p| {
            let structure = match p.status {
                PairStatus::Same => "same".to_owned(),
                PairStatus::Changed => p.differences.join("; "),
                PairStatus::OnlyA => format!("only in A: {}", p.structure),
                PairStatus::OnlyB => format!("only in B: {}", p.structure),
            };
            let merge = p.merge_a.clone().or_else(|| p.merge_b.clone().map(|m| format!("(B) {m}")));
            let e = p.error.as_ref();
            let mut out = sci(e.and_then(|e| e.output));
            if e.is_some_and(|e| e.non_finite > 0) {
                out.push_str(" (non-finite)");
            }
            let is_born = born.is_some() && p.a.zip(p.b) == born;
            (
                is_born,
                vec![
                    opt(p.a),
                    opt(p.b),
                    opt(p.stage),
                    terminal_safe(&merge.unwrap_or_default()),
                    terminal_safe(&structure),
                    num4(p.ratio_a),
                    num4(p.ratio_b),
                    p.ratio_change.map_or("-".to_owned(), |x| format!("{:+.1}%", x * 100.0)),
                    out,
                    sci(e.and_then(|e| e.shortcut)),
                    sci(e.and_then(|e| e.branch)),
                    e.and_then(|e| e.growth).map_or("-".to_owned(), |g| format!("x{g:.2}")),
                ],
            )
        })
        .collect()
}

/// The lines under the table: outputs' agreement and the verdict.
fn closing_lines(c: &Comparison) -> Vec<String> {
    let mut lines = Vec::new();
    for o in &c.outputs {
        lines.push(output_line(o, terminal_safe));
    }
    for f in &c.failures {
        lines.push(format!("fails: {}", terminal_safe(f)));
    }
    lines
}

/// One output's agreement between A and B, its note written by `note`.
fn output_line(o: &OutputAgreement, note: impl Fn(&str) -> String) -> String {
    let mut parts = vec![];
    if let Some(e) = o.rel_l2 {
        parts.push(format!("relative L2 {e:.3e}"));
    }
    if let Some(x) = o.cosine {
        parts.push(format!("cosine {x:.6}"));
    }
    if let (Some(t1), Some(k)) = (o.top1, o.classes) {
        parts.push(format!("top-1 agreement {:.1}% (over {k} classes)", t1 * 100.0));
    }
    if let Some(n) = &o.note {
        parts.push(note(n));
    }
    format!("output '{}' vs '{}': {}", terminal_safe(&o.a), terminal_safe(&o.b), parts.join(", "))
}

fn verdict(c: &Comparison) -> (String, &'static str) {
    if c.failures.is_empty() {
        ("match".to_owned(), "good")
    } else {
        (format!("{} reason(s) to fail", c.failures.len()), "bad")
    }
}

fn summary(c: &Comparison) -> String {
    c.errors.as_ref().map_or_else(
        || "error along depth: not measured (the models were not run)".to_owned(),
        error_summary,
    )
}

struct PageRow {
    born: bool,
    cells: Vec<String>,
}

#[derive(askama::Template)]
#[template(path = "compare.html")]
struct Page {
    title: String,
    verdict: String,
    verdict_class: &'static str,
    summary: String,
    facts: Vec<(&'static str, String)>,
    plot: Option<crate::report::plot::Plot>,
    caption: String,
    header: Vec<&'static str>,
    rows: Vec<PageRow>,
    lines: Vec<String>,
    version: &'static str,
}

const HEADER: [&str; 12] = [
    "A",
    "B",
    "stage",
    "merge in A",
    "structure",
    "ratio A",
    "ratio B",
    "change",
    "error out",
    "short",
    "branch",
    "growth",
];

/// The error along depth: one point per block of A, the merge-output
/// error (marks) and the branch error (dashed), against the threshold.
fn error_plot(c: &Comparison) -> io::Result<Option<crate::report::plot::Plot>> {
    use crate::report::marks;
    use crate::report::plot::{self, Companion, PlotSpec, Point, Threshold};
    let Some(e) = c.errors.as_ref().filter(|e| e.measured && e.pairs > 0) else {
        return Ok(None);
    };
    let by_a = |id: usize| c.blocks.iter().find(|p| p.a == Some(id));
    let points: Vec<Point> = (1..=c.a.blocks)
        .map(|id| {
            let p = by_a(id);
            let err = p.and_then(|p| p.error.as_ref());
            let value = err.and_then(|e| e.output);
            let non_finite = err.is_some_and(|e| e.non_finite > 0);
            let born = e.born_at.as_ref().is_some_and(|b| b.a == id);
            let mark = if non_finite {
                marks::NON_FINITE
            } else if value.is_some_and(|v| v > e.threshold) {
                marks::RANGE
            } else {
                marks::OK
            };
            let shown = match (value, err) {
                (Some(v), _) => format!("merge-output error {v:.3e}"),
                (None, Some(_)) => "merge-output error not comparable".to_owned(),
                (None, None) => "not paired with a block of B".to_owned(),
            };
            let name = p.and_then(|p| p.merge_a.as_deref()).unwrap_or("");
            Point {
                block: id,
                value: err.and(value),
                mark,
                label: if born { format!("#{id} error born here") } else { String::new() },
                title: format!(
                    "#{id} {}\n{shown}{}",
                    terminal_safe(name),
                    if non_finite { "; non-finite values" } else { "" }
                ),
            }
        })
        .collect();
    let spec = PlotSpec {
        id: "errors",
        y_desc: "relative L2 error, B against A",
        points,
        thresholds: vec![Threshold {
            value: e.threshold,
            label: format!("born above {}", e.threshold),
            colour: plotters::style::RGBColor(0xD5, 0x5E, 0x00),
            below: false,
        }],
        stages: Vec::new(),
        companion: Some(Companion {
            label: "branch error",
            main_label: "merge-output error",
            values: (1..=c.a.blocks)
                .map(|id| by_a(id).and_then(|p| p.error.as_ref()).and_then(|e| e.branch))
                .collect(),
        }),
    };
    plot::draw(&spec).map(Some)
}

/// Renders a comparison as one self-contained HTML page with the error
/// along depth.
pub fn render_html(c: &Comparison, out: &mut dyn io::Write) -> io::Result<()> {
    use askama::Template;
    let (verdict, verdict_class) = verdict(c);
    let mut facts = vec![
        ("A", format!("{} ({} blocks)", terminal_safe(&c.a.path), c.a.blocks)),
        ("B", format!("{} ({} blocks)", terminal_safe(&c.b.path), c.b.blocks)),
    ];
    if let Some(r) = &c.run {
        facts.push((
            "run",
            format!(
                "the same {} sample(s) with {}, seed {}",
                r.samples,
                terminal_safe(&r.engine),
                r.seed
            ),
        ));
    }
    facts.push(("structural differences", c.structural_differences.to_string()));
    let plot = error_plot(c)?;
    let caption = match &c.errors {
        Some(e) if e.measured => format!(
            "‖B − A‖ / ‖A‖ of each aligned block's merge output over all samples (marks, solid \
             line) and of its branch (dashed), log scale, by block of A. The error is born at \
             the first block above {} or holding non-finite values.",
            e.threshold
        ),
        Some(e) => format!("Not measured: {}", terminal_safe(e.note.as_deref().unwrap_or(""))),
        None => "Not measured: the models were not run.".to_owned(),
    };
    let page = Page {
        title: format!(
            "shunt compare · {} → {}",
            terminal_safe(&file_name(&c.a.path)),
            terminal_safe(&file_name(&c.b.path))
        ),
        verdict,
        verdict_class,
        summary: summary(c),
        facts,
        plot,
        caption,
        header: HEADER.to_vec(),
        rows: cells(c).into_iter().map(|(born, cells)| PageRow { born, cells }).collect(),
        lines: closing_lines(c),
        version: env!("CARGO_PKG_VERSION"),
    };
    let text = page.render().map_err(|e| io::Error::other(format!("rendering HTML: {e}")))?;
    out.write_all(text.as_bytes())
}

fn file_name(path: &str) -> String {
    std::path::Path::new(path)
        .file_name()
        .map_or_else(|| path.to_owned(), |n| n.to_string_lossy().into_owned())
}

#[derive(askama::Template)]
#[template(path = "compare.md")]
struct Doc<'a> {
    a: String,
    b: String,
    verdict: String,
    summary: String,
    rows: &'a [PageRow],
    elided: usize,
    max_bytes: usize,
    lines: Vec<String>,
}

/// Renders a comparison as Markdown for a pull-request comment, at most
/// `max_bytes` long (rows elided from the end, and the comment says so).
pub fn render_markdown(
    c: &Comparison,
    max_bytes: usize,
    out: &mut dyn io::Write,
) -> io::Result<()> {
    use askama::Template;
    let rows: Vec<PageRow> =
        cells(c).into_iter().map(|(born, cells)| PageRow { born, cells }).collect();
    let mut keep = rows.len();
    loop {
        let doc = Doc {
            a: file_name(&c.a.path),
            b: file_name(&c.b.path),
            verdict: verdict(c).0,
            summary: summary(c),
            rows: &rows[..keep],
            elided: rows.len() - keep,
            max_bytes,
            lines: closing_lines(c),
        };
        let text =
            doc.render().map_err(|e| io::Error::other(format!("rendering Markdown: {e}")))?;
        if text.len() <= max_bytes || keep == 0 {
            return out.write_all(text.as_bytes());
        }
        keep = keep.saturating_sub((keep / 8).max(1));
    }
}
