//! The HTML report: one self-contained file (inline styles and SVG, no
//! script, no font, no request of any kind), written with an askama template
//! that escapes every value for HTML.
//!
//! Everything the model can name goes through [`terminal_safe`] first (so
//! control characters and bidirectional overrides show as visible escapes)
//! and then through the template's HTML escaping. The page's
//! Content-Security-Policy forbids every fetch and every script as a second
//! line of defence.

use std::collections::BTreeMap;
use std::io;

use askama::Template;

use crate::report::marks::{self, Mark};
use crate::report::plot::{self, Plot, PlotSpec, StageSpan, Threshold};
use crate::report::text::{ARROW, layer_signature, num, terminal_safe};
use crate::report::{BlockRow, FindingRow, Report};
use crate::vocab::FindingCode;

/// What the page needs besides the report.
#[derive(Debug, Clone)]
pub struct HtmlContext {
    /// The command line that produced the report, as the program received
    /// it (the first element, the program path, is shown as `shunt`).
    pub argv: Vec<String>,
}

/// Renders `r` as one HTML page.
pub fn render(r: &Report, ctx: &HtmlContext, out: &mut dyn io::Write) -> io::Result<()> {
    let page = Page::new(r, ctx)?;
    let text = page.render().map_err(|e| io::Error::other(format!("rendering HTML: {e}")))?;
    out.write_all(text.as_bytes())
}

/// A value for the page: model text made visible-safe (the template escapes HTML).
fn t(s: &str) -> String {
    terminal_safe(s)
}

/// The command line as a POSIX shell would take it back.
fn command_line(argv: &[String]) -> String {
    let mut words = vec!["shunt".to_owned()];
    words.extend(argv.iter().skip(1).cloned());
    words
        .iter()
        .map(|w| {
            let w = t(w);
            shlex::try_quote(&w).map_or_else(|_| w.clone(), |q| q.into_owned())
        })
        .collect::<Vec<_>>()
        .join(" ")
}

#[derive(Template)]
#[template(path = "report.html")]
struct Page {
    title: String,
    model_name: String,
    verdict: String,
    verdict_class: &'static str,
    chips: Vec<Chip>,
    model_rows: Vec<(&'static str, String)>,
    model_inputs: Vec<String>,
    model_outputs: Vec<String>,
    run: Option<RunView>,
    run_error: Option<String>,
    not_run: Option<&'static str>,
    plots: Vec<PlotView>,
    stages: Vec<StageView>,
    legend: Vec<Mark>,
    findings: Vec<FindingView>,
    model_findings: Vec<(Mark, String)>,
    rows: Vec<RowView>,
    measured: bool,
    influence: Option<InfluenceView>,
    not_blocks: Vec<(String, String)>,
    diagnostics: Vec<(String, String)>,
    command: String,
    version: &'static str,
}

struct Chip {
    code: String,
    count: usize,
    mark: Mark,
}

struct RunView {
    rows: Vec<(&'static str, String)>,
    inputs: Vec<[String; 4]>,
}

struct PlotView {
    plot: Plot,
    title: &'static str,
    caption: String,
    banner: Vec<(Mark, String)>,
}

struct StageView {
    label: String,
    detail: String,
    items: Vec<TileView>,
}

enum TileView {
    Block {
        id: usize,
        mark: Mark,
        name: String,
        kind: String,
        value: String,
        codes: String,
        title: String,
    },
    BareRun {
        layers: usize,
        title: String,
    },
}

struct FindingView {
    code: String,
    mark: Mark,
    place: String,
    node: String,
    op: String,
    output: String,
    fork: String,
    message: String,
}

struct InfluenceView {
    facts: Vec<(&'static str, String)>,
    rows: Vec<Vec<String>>,
    skipped: Vec<String>,
}

struct RowView {
    id: usize,
    mark: Mark,
    cells: Vec<String>,
    codes: String,
}

fn codes_of(r: &Report, id: usize) -> Vec<FindingCode> {
    r.findings.iter().filter(|f| f.block == Some(id)).map(|f| f.code).collect()
}

fn words(codes: &[FindingCode]) -> String {
    codes.iter().map(|c| c.as_str()).collect::<Vec<_>>().join(", ")
}

fn mark_of(r: &Report, id: usize) -> Mark {
    marks::for_codes(codes_of(r, id))
}

fn mark_for_code(code: FindingCode) -> Mark {
    match code {
        FindingCode::ExplodingSignal => marks::EXPLODING,
        FindingCode::VanishingSignal => marks::VANISHING,
        _ => marks::for_codes([code]),
    }
}

fn shape(s: &[String]) -> String {
    if s.is_empty() { "scalar".to_owned() } else { t(&s.join("×")) }
}

fn tensor_shape(s: &Option<Vec<String>>) -> String {
    s.as_deref().map_or("rank unknown".to_owned(), |s| format!("[{}]", t(&s.join("×"))))
}

impl Page {
    fn new(r: &Report, ctx: &HtmlContext) -> io::Result<Page> {
        let measured = r.run.is_some() && r.run_error.is_none();
        let model_name = std::path::Path::new(&r.model.path)
            .file_name()
            .map_or_else(|| r.model.path.clone(), |n| n.to_string_lossy().into_owned());
        let block_findings = r.findings.iter().filter(|f| f.block.is_some()).count();
        let (verdict, verdict_class) = match (r.findings.len(), &r.run_error) {
            (_, Some(_)) => ("the model could not be run; structure only".to_owned(), "bad"),
            (0, None) => (format!("no findings in {} blocks", r.summary.blocks), "good"),
            (n, None) => (
                format!(
                    "{n} finding{} ({} on blocks) in {} blocks",
                    if n == 1 { "" } else { "s" },
                    block_findings,
                    r.summary.blocks
                ),
                "bad",
            ),
        };
        // Chips in the order of their words.
        let mut counts: BTreeMap<&str, (FindingCode, usize)> = BTreeMap::new();
        for f in &r.findings {
            counts.entry(f.code.as_str()).or_insert((f.code, 0)).1 += 1;
        }
        let chips = counts
            .into_values()
            .map(|(code, count)| Chip {
                code: code.as_str().to_owned(),
                count,
                mark: mark_for_code(code),
            })
            .collect();
        Ok(Page {
            title: format!("shunt {} · {}", r.command.as_str(), t(&model_name)),
            model_name: t(&model_name),
            verdict,
            verdict_class,
            chips,
            model_rows: model_rows(r),
            model_inputs: r
                .model
                .inputs
                .iter()
                .map(|i| format!("{} {} {}", t(&i.name), t(&i.dtype), tensor_shape(&i.shape)))
                .collect(),
            model_outputs: r
                .model
                .outputs
                .iter()
                .map(|i| format!("{} {} {}", t(&i.name), t(&i.dtype), tensor_shape(&i.shape)))
                .collect(),
            run: r.run.as_ref().map(|run| RunView {
                rows: {
                    let mut rows = vec![("engine", t(&run.engine))];
                    if let Some(p) = &run.precision {
                        rows.push(("precision", t(&p.note)));
                    }
                    rows.extend([
                        (
                            "samples",
                            format!(
                                "{} in {} pass{} of {}",
                                run.samples,
                                run.passes,
                                if run.passes == 1 { "" } else { "es" },
                                run.pass_batch
                            ),
                        ),
                        ("seed", run.seed.to_string()),
                        (
                            "thresholds",
                            format!(
                                "dead below {}, dominant above {}, dead channels above {}, depth factor {}",
                                run.thresholds.dead_below,
                                run.thresholds.dominant_above,
                                run.thresholds.dead_channels_above,
                                run.thresholds.depth_factor
                            ),
                        ),
                    ]);
                    if let Some(f) = &run.feed {
                        rows.push(("feed", format!("{} (sha256 {})", t(&f.path), t(&f.sha256))));
                    }
                    rows
                },
                inputs: run
                    .inputs
                    .iter()
                    .map(|i| {
                        let dims: Vec<String> = i.shape.iter().map(u64::to_string).collect();
                        [t(&i.name), t(&i.dtype), dims.join("×"), t(&i.values)]
                    })
                    .collect(),
            }),
            run_error: r.run_error.as_deref().map(t),
            not_run: match (&r.run, &r.run_error) {
                (_, Some(_)) => Some("The model could not be run, so there is nothing to plot."),
                (None, None) => Some(
                    "The model was not run (a structural report), so there is nothing to plot.",
                ),
                _ => None,
            },
            plots: if measured && !r.blocks.is_empty() { plots(r)? } else { Vec::new() },
            stages: stage_views(r),
            legend: marks::ALL.to_vec(),
            findings: r.findings.iter().filter(|f| f.block.is_some()).map(|f| finding_view(r, f)).collect(),
            model_findings: model_findings(r),
            rows: r.blocks.iter().map(|b| row_view(r, b)).collect(),
            measured,
            influence: r.influence.as_ref().map(influence_view),
            not_blocks: r
                .not_blocks
                .iter()
                .map(|n| (t(&n.node.name), format!("{}: {}", n.reason.as_str(), t(&n.detail))))
                .collect(),
            diagnostics: r
                .diagnostics
                .iter()
                .map(|d| {
                    let node = d.node.as_deref().map_or(String::new(), |n| format!(" [{}]", t(n)));
                    (d.severity.as_str().to_owned(), format!("{}{node}", t(&d.message)))
                })
                .collect(),
            command: command_line(&ctx.argv),
            version: env!("CARGO_PKG_VERSION"),
        })
    }
}

fn model_findings(r: &Report) -> Vec<(Mark, String)> {
    r.findings
        .iter()
        .filter(|f| f.block.is_none())
        .map(|f| (mark_for_code(f.code), format!("{}: {}", f.code, t(&f.message))))
        .collect()
}

fn model_rows(r: &Report) -> Vec<(&'static str, String)> {
    let m = &r.model;
    let s = &r.summary;
    let kinds = |m: &BTreeMap<String, usize>| {
        if m.is_empty() {
            "none".to_owned()
        } else {
            m.iter().map(|(k, v)| format!("{} {v}", t(k))).collect::<Vec<_>>().join(", ")
        }
    };
    let opsets = m
        .opsets
        .iter()
        .map(|o| {
            let d = if o.domain.is_empty() { "ai.onnx".to_owned() } else { t(&o.domain) };
            format!("{d} {}", o.version)
        })
        .collect::<Vec<_>>()
        .join(", ");
    let mut rows = vec![
        ("file", format!("{} ({} bytes)", t(&m.path), m.file_bytes)),
        ("producer", if m.producer.is_empty() { "unnamed".to_owned() } else { t(&m.producer) }),
        ("graph", t(&m.graph_name)),
        ("IR version, opsets", format!("{}; {opsets}", m.ir_version)),
        (
            "size",
            format!(
                "{} nodes, {} initializers, {} parameters",
                m.nodes, m.initializers, m.parameters
            ),
        ),
    ];
    if m.external_tensors > 0 {
        rows.push((
            "external data",
            format!("{} tensors, {} bytes", m.external_tensors, m.external_bytes),
        ));
    }
    rows.push(("residual blocks", format!("{} in {} stages", s.blocks, r.stages.len())));
    rows.push(("shortcuts", kinds(&s.by_shortcut)));
    rows.push(("placement", kinds(&s.by_placement)));
    rows.push((
        "other",
        format!(
            "{} concatenative skips, {} long skips, {} dead by construction, {} bare runs",
            s.concat_skips, s.long_skips, s.static_dead, s.bare_runs
        ),
    ));
    rows
}

fn stage_label(b: &BlockRow) -> String {
    b.stage.map_or("stage ?".to_owned(), |s| format!("stage {s}"))
}

/// Runs of consecutive blocks with the same stage.
fn stage_spans(r: &Report) -> Vec<(Option<usize>, usize, usize)> {
    let mut spans: Vec<(Option<usize>, usize, usize)> = Vec::new();
    for b in &r.blocks {
        match spans.last_mut() {
            Some((s, _, last)) if *s == b.stage => *last = b.id,
            _ => spans.push((b.stage, b.id, b.id)),
        }
    }
    spans
}

fn block_title(b: &BlockRow, codes: &[FindingCode], extra: &str) -> String {
    let mut s =
        format!("#{} {} ({}) → {}", b.id, t(&b.merge.name), t(&b.merge.op_type), t(&b.output));
    if !extra.is_empty() {
        s.push('\n');
        s.push_str(extra);
    }
    if !codes.is_empty() {
        s.push_str("\nfindings: ");
        s.push_str(&words(codes));
    }
    s
}

fn plots(r: &Report) -> io::Result<Vec<PlotView>> {
    let stages: Vec<StageSpan> = stage_spans(r)
        .into_iter()
        .map(|(s, first, last)| StageSpan {
            first,
            last,
            label: s.map_or("stage ?".to_owned(), |s| format!("stage {s}")),
        })
        .collect();
    let thresholds = r.run.as_ref().map(|run| run.thresholds.clone());
    let mean = |b: &BlockRow, f: fn(&crate::report::StatsRow) -> Option<crate::report::Spread>| {
        b.stats.as_ref().and_then(f).map(|s| s.mean)
    };
    let points = |value: &dyn Fn(&BlockRow) -> Option<f64>, what: &str| -> Vec<plot::Point> {
        r.blocks
            .iter()
            .map(|b| {
                let codes = codes_of(r, b.id);
                let v = value(b);
                let shown = match v {
                    Some(v) if v > 0.0 && v.is_finite() => format!("{what} {}", num(v)),
                    Some(v) => format!("{what} {} (drawn on the axis floor)", num(v)),
                    None => format!("{what} not measured (drawn on the axis floor)"),
                };
                let mark = marks::for_codes(codes.iter().copied());
                let label = if mark == marks::OK {
                    String::new()
                } else {
                    let zero = if v == Some(0.0) { " (0)" } else { "" };
                    format!("#{} {}{zero}", b.id, words(&codes))
                };
                plot::Point {
                    block: b.id,
                    value: v,
                    mark,
                    label,
                    title: block_title(b, &codes, &shown),
                }
            })
            .collect()
    };
    const VERMILLION: plotters::style::RGBColor = plotters::style::RGBColor(0xD5, 0x5E, 0x00);
    const ORANGE: plotters::style::RGBColor = plotters::style::RGBColor(0xB0, 0x78, 0x00);
    let ratio_spec = PlotSpec {
        id: "ratio",
        y_desc: "RMS(branch) / RMS(shortcut)",
        points: points(&|b| mean(b, |s| s.ratio), "ratio"),
        thresholds: thresholds
            .as_ref()
            .map(|th| {
                vec![
                    Threshold {
                        value: th.dead_below,
                        label: format!("dead below {}", th.dead_below),
                        colour: VERMILLION,
                        below: true,
                    },
                    Threshold {
                        value: th.dominant_above,
                        label: format!("dominant above {}", th.dominant_above),
                        colour: ORANGE,
                        below: false,
                    },
                ]
            })
            .unwrap_or_default(),
        stages: stages.clone(),
        companion: None,
    };
    let rms_spec = PlotSpec {
        id: "rms",
        y_desc: "RMS of the block output",
        points: points(&|b| mean(b, |s| s.output_rms), "output RMS"),
        thresholds: Vec::new(),
        stages: stages.clone(),
        companion: None,
    };
    // The largest |x| over samples (the headroom's, when a format is named)
    // and the RMS, against the format's limits.
    let largest = |b: &BlockRow| -> Option<f64> {
        let from_headroom = r
            .headroom
            .as_ref()
            .and_then(|h| h.blocks.iter().find(|x| x.block == b.id))
            .and_then(|x| x.max_abs);
        from_headroom.or_else(|| b.stats.as_ref().and_then(|s| s.output_max_abs).map(|s| s.max))
    };
    const BLUISH_GREEN: plotters::style::RGBColor = plotters::style::RGBColor(0x00, 0x9E, 0x73);
    let limits = r
        .headroom
        .as_ref()
        .map(|h| {
            let mut lines = Vec::new();
            if let Some(l) = h.largest {
                lines.push(Threshold {
                    value: l,
                    label: format!("{} largest {}", h.format, num(l)),
                    colour: VERMILLION,
                    below: false,
                });
            }
            if let Some(n) = h.smallest_normal {
                lines.push(Threshold {
                    value: n,
                    label: format!("{} smallest normal {}", h.format, num(n)),
                    colour: BLUISH_GREEN,
                    below: true,
                });
            }
            lines
        })
        .unwrap_or_default();
    let range_spec = PlotSpec {
        id: "range",
        y_desc: "|x| of the block output",
        points: points(&largest, "largest |x|"),
        thresholds: limits,
        stages,
        companion: Some(plot::Companion {
            label: "RMS",
            main_label: "largest |x| over samples",
            values: r.blocks.iter().map(|b| mean(b, |s| s.output_rms)).collect(),
        }),
    };
    let range_caption = match &r.headroom {
        Some(h) => format!(
            "The largest |x| of each merge output over all samples (marks, solid line) and its \
             RMS (dashed), log scale, against {}'s limits ({}). A value beyond the upper line \
             would be infinite in {}; below the lower line it loses precision as a subnormal.",
            h.format,
            t(&h.chosen_by),
            h.format
        ),
        None => "The largest |x| of each merge output over all samples (marks, solid line) and \
                 its RMS (dashed), log scale. With --precision fp16, bf16 or int8 the format's \
                 limits are drawn here and each block's headroom is reported."
            .to_owned(),
    };
    let banner = model_findings(r);
    Ok(vec![
        PlotView {
            plot: plot::draw(&ratio_spec)?,
            title: "Branch against shortcut across depth",
            caption:
                "The mean over samples of RMS(branch)/RMS(shortcut) at each merge, log scale. \
                      Below the lower line a branch adds almost nothing; above the upper line it \
                      drowns the shortcut. A ratio of 0 is drawn on the axis floor."
                    .to_owned(),
            banner: Vec::new(),
        },
        PlotView {
            plot: plot::draw(&rms_spec)?,
            title: "Signal profile across depth",
            caption: "The mean over samples of the RMS of each merge output, log scale: how the \
                      signal's size changes from the first block to the last."
                .to_owned(),
            banner,
        },
        PlotView {
            plot: plot::draw(&range_spec)?,
            title: "Headroom across depth",
            caption: range_caption,
            banner: Vec::new(),
        },
    ])
}

fn stage_views(r: &Report) -> Vec<StageView> {
    let mut views = Vec::new();
    for (stage, first, last) in stage_spans(r) {
        let blocks: Vec<&BlockRow> =
            r.blocks.iter().filter(|b| (first..=last).contains(&b.id)).collect();
        let shape = stage
            .and_then(|s| r.stages.iter().find(|x| x.id == s))
            .map_or("shape unknown".to_owned(), |s| shape(&s.shape));
        let mut items = Vec::new();
        for b in &blocks {
            for run in r.bare_runs.iter().filter(|x| x.before_block == b.id) {
                let names: Vec<String> = run.layers.iter().map(|l| t(&l.name)).collect();
                items.push(TileView::BareRun {
                    layers: run.layers.len(),
                    title: format!(
                        "{} learned layer(s) between blocks #{} and #{} that no shortcut spans: {}",
                        run.layers.len(),
                        run.after_block,
                        run.before_block,
                        names.join(", ")
                    ),
                });
            }
            let codes = codes_of(r, b.id);
            let ratio = b.stats.as_ref().and_then(|s| s.ratio).map(|s| s.mean);
            let value = ratio.map_or(String::new(), |v| format!("ratio {}", num(v)));
            let kind = format!("{} · {}", b.shortcut.kind, b.placement);
            items.push(TileView::Block {
                id: b.id,
                mark: mark_of(r, b.id),
                name: t(&b.merge.name),
                kind: kind.clone(),
                value: value.clone(),
                codes: words(&codes),
                title: block_title(b, &codes, &kind),
            });
        }
        views.push(StageView {
            label: blocks.first().map_or("stage ?".to_owned(), |b| stage_label(b)),
            detail: format!(
                "{shape} · block{} {}",
                if first == last { "" } else { "s" },
                if first == last { first.to_string() } else { format!("{first}–{last}") }
            ),
            items,
        });
    }
    views
}

fn influence_view(inf: &crate::report::InfluenceReport) -> InfluenceView {
    let opt = |v: Option<f64>| v.map_or("–".to_owned(), num);
    let mut facts = Vec::new();
    if let Some(k) = &inf.knockout {
        facts.push((
            "knockout",
            format!(
                "{} blocks knocked out{}, {} forward passes; low impact below a relative change of {}",
                k.blocks.len(),
                if k.shortcuts { " (and their shortcuts)" } else { "" },
                k.forward_passes,
                k.low_impact_below
            ),
        ));
        let outs: Vec<String> = k.outputs.iter().map(|o| t(&o.name)).collect();
        facts.push(("outputs compared", outs.join(", ")));
    }
    if let Some(g) = &inf.gain {
        facts.push((
            "perturbation gain",
            format!(
                "input change {} of the input RMS; end to end {}; limit ×{}",
                num(g.step),
                opt(g.end_to_end),
                g.gain_factor
            ),
        ));
    }
    if let Some(d) = &inf.effective_depth {
        facts.push((
            "effective depth",
            format!(
                "mean path length {} ± {} of {} blocks (median {}, central 80% {}–{}){}",
                num(d.mean_path_length),
                num(d.path_length_sd),
                d.blocks,
                d.median_path_length,
                d.central_80[0],
                d.central_80[1],
                d.carrying.map_or(String::new(), |c| format!("; {c} blocks carry the outputs"))
            ),
        ));
    }
    let rows = inf
        .blocks
        .iter()
        .map(|b| {
            let k = b.knockout.as_ref();
            vec![
                b.block.to_string(),
                if b.changes_resolution { "yes".to_owned() } else { String::new() },
                k.map_or("–".to_owned(), |a| num(a.rel_l2)),
                opt(k.and_then(|a| a.cosine)),
                opt(k.and_then(|a| a.top1)),
                b.rank.map_or("–".to_owned(), |r| r.to_string()),
                if b.low_impact { "low impact".to_owned() } else { String::new() },
                b.gain.map_or("–".to_owned(), |g| num(g.mean)),
                opt(b.branch_share),
                opt(b.gain_to_here),
            ]
        })
        .collect();
    InfluenceView {
        facts,
        rows,
        skipped: inf.skipped.iter().map(|s| format!("#{}: {}", s.block, t(&s.reason))).collect(),
    }
}

fn finding_view(r: &Report, f: &FindingRow) -> FindingView {
    let block = f.block.and_then(|id| r.blocks.iter().find(|b| b.id == id));
    FindingView {
        code: f.code.as_str().to_owned(),
        mark: mark_for_code(f.code),
        place: f.block.map_or("model".to_owned(), |id| format!("block #{id}")),
        node: f.node.as_ref().map_or(String::new(), |n| t(&n.name)),
        op: f
            .node
            .as_ref()
            .map_or(String::new(), |n| format!("{} node {}", t(&n.op_type), n.index)),
        output: block.map_or(String::new(), |b| t(&b.output)),
        fork: block.map_or(String::new(), |b| t(&b.fork)),
        message: t(&f.message),
    }
}

fn row_view(r: &Report, b: &BlockRow) -> RowView {
    let codes = codes_of(r, b.id);
    let s = b.stats.as_ref();
    let spread = |v: Option<crate::report::Spread>| v.map_or("–".to_owned(), |v| num(v.mean));
    let shortcut = if b.shortcut.ops.is_empty() {
        b.shortcut.kind.to_string()
    } else {
        let ops: Vec<String> = b.shortcut.ops.iter().map(|o| t(&o.op_type)).collect();
        format!("{} ({})", b.shortcut.kind, ops.join("→"))
    };
    let layers: Vec<String> =
        b.branch.layers.iter().map(|l| t(&layer_signature(l, ARROW))).collect();
    let mut cells = vec![
        b.stage.map_or("?".to_owned(), |s| s.to_string()),
        t(&b.merge.name),
        t(&b.output),
        t(&b.fork),
        shortcut,
        b.placement.to_string(),
        layers.join(", "),
    ];
    if r.run.is_some() {
        let ratio = s.and_then(|s| s.ratio);
        cells.extend([
            spread(s.and_then(|s| s.shortcut_rms)),
            spread(s.and_then(|s| s.branch_rms)),
            ratio.map_or("–".to_owned(), |v| format!("{} ± {}", num(v.mean), num(v.std))),
            ratio.map_or("–".to_owned(), |v| format!("{} – {}", num(v.min), num(v.max))),
            s.and_then(|s| s.cosine).map_or("–".to_owned(), |c| format!("{:+.2}", c.mean)),
            spread(s.and_then(|s| s.growth)),
            spread(s.and_then(|s| s.output_rms)),
            s.and_then(|s| s.dead_channel_fraction).map_or("–".to_owned(), num),
            s.map_or("–".to_owned(), |s| format!("{}/{}", s.nan, s.inf)),
        ]);
    }
    RowView { id: b.id, mark: mark_of(r, b.id), cells, codes: words(&codes) }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn numbers_keep_three_significant_digits() {
        assert_eq!(num(0.0), "0");
        assert_eq!(num(31.91), "31.9");
        assert_eq!(num(0.6306), "0.631");
        assert_eq!(num(1.0), "1.00");
        assert_eq!(num(0.01), "0.0100");
        assert_eq!(num(1.5e-7), "1.50e-7");
        assert_eq!(num(123456.0), "1.23e5");
    }

    #[test]
    fn the_command_line_is_quoted_for_a_shell() {
        let argv = ["/x/target/release/shunt", "audit", "my model.onnx", "-o", "r.html"];
        let argv: Vec<String> = argv.iter().map(|s| s.to_string()).collect();
        assert_eq!(command_line(&argv), "shunt audit 'my model.onnx' -o r.html");
    }
}
