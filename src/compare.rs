//! Model-to-model comparison (`shunt compare A B`): the blocks of two models
//! aligned by structure, their structural differences, and — on the same
//! inputs fed to both — the change of each block's branch/shortcut ratio and
//! the agreement of the final outputs.
//!
//! The result, [`Comparison`], is plain data with public fields
//! (`shunt/compare` JSON) so that any renderer can use it.

use std::fmt::Write as _;
use std::io;
use std::path::Path;

use serde::{Deserialize, Serialize};

use crate::audit::{self, AuditConfig};
use crate::error::{Error, ErrorKind, Result};

use crate::probe::Progress;
use crate::probe::inputs::Feeding;
use crate::report::table::terminal_safe;
use crate::report::{FedRow, Report};
use crate::scan;
use crate::stats;
use crate::structure::{BlockKey, Step, align, plural};

/// Identifies the JSON document of a comparison.
pub const COMPARE_SCHEMA: &str = "shunt/compare";
/// Version of the `shunt/compare` JSON schema.
pub const COMPARE_SCHEMA_VERSION: u32 = 1;

/// What a comparison does.
#[derive(Debug, Clone)]
pub struct CompareConfig {
    /// Scan limits, feeding and findings, used for both models.
    pub audit: AuditConfig,
    /// Run both models (otherwise structure only).
    pub run: bool,
}

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
    pub status: String,
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

fn side(r: &Report) -> Side {
    Side {
        path: r.model.path.clone(),
        nodes: r.model.nodes,
        parameters: r.model.parameters,
        producer: r.model.producer.clone(),
        blocks: r.blocks.len(),
    }
}

fn usage(path: &Path, message: String) -> Error {
    Error::new(ErrorKind::Usage, message).at(path)
}

/// Checks that B is fed exactly what A is: the same inputs in the same
/// order, element types, shapes past the batch axis, value sources and
/// sample count. The values then agree too, because every input's values
/// are a function of the seed, the input's position, its shape and its source.
fn same_feeding(a: &Feeding, b: &Feeding, b_path: &Path) -> Result<()> {
    let names =
        |f: &Feeding| f.inputs.iter().map(|i| i.name.clone()).collect::<Vec<_>>().join(", ");
    if a.inputs.len() != b.inputs.len()
        || a.inputs.iter().zip(&b.inputs).any(|(x, y)| x.name != y.name)
    {
        return Err(usage(
            b_path,
            format!(
                "cannot feed both models the same inputs: A takes ({}), B takes ({})",
                names(a),
                names(b)
            ),
        ));
    }
    for (x, y) in a.inputs.iter().zip(&b.inputs) {
        if let Err(m) = x.same_values(y) {
            return Err(usage(
                b_path,
                format!("cannot feed both models the same input '{}': {m}", x.name),
            ));
        }
    }
    if a.samples != b.samples {
        return Err(usage(
            b_path,
            format!(
                "cannot feed both models the same samples: A runs {} (batch {}), B runs {} (batch {}); pick --batch as a multiple of both",
                a.samples, a.pass_batch, b.samples, b.pass_batch
            ),
        ));
    }
    Ok(())
}

/// Compares two model files.
pub fn compare_files(
    a_path: &Path,
    b_path: &Path,
    config: &CompareConfig,
    progress: &dyn Progress,
) -> Result<Comparison> {
    if !config.run {
        let a = scan::scan_file(a_path, &config.audit.scan)?;
        let b = scan::scan_file(b_path, &config.audit.scan)?;
        return Ok(comparison(&a, &b, None, None));
    }
    // Each model is opened once; both plans are checked before either runs.
    let oa = audit::open_file(a_path, &config.audit)?;
    let ob = audit::open_file(b_path, &config.audit)?;
    let fa = oa.plan(&config.audit.inputs).map_err(|e| e.at(a_path))?;
    let fb = ob.plan(&config.audit.inputs).map_err(|e| e.at(b_path))?;
    same_feeding(&fa, &fb, b_path)?;
    let a = audit::measure(oa, fa, &config.audit, progress)?;
    if let Some(e) = a.run_error {
        return Err(e.at(a_path));
    }
    let b = audit::measure(ob, fb, &config.audit, progress)?;
    if let Some(e) = b.run_error {
        return Err(e.at(b_path));
    }
    let fed = a.report.run.as_ref().map(|r| FedBoth {
        engine: r.engine.clone(),
        samples: r.samples,
        seed: r.seed,
        inputs: r.inputs.clone(),
        feed: r.feed.as_ref().map(|f| f.path.clone()),
    });
    let outputs = output_agreement(&a.report, &a.outputs, &b.report, &b.outputs);
    Ok(comparison(&a.report, &b.report, fed, Some(outputs)))
}

/// The last axis when an output is `[batch, classes]` with `classes` ≥ 2.
fn classes_of(r: &Report, i: usize) -> Option<usize> {
    let shape = r.model.outputs.get(i)?.shape.as_ref()?;
    if shape.len() != 2 {
        return None;
    }
    shape[1].parse::<usize>().ok().filter(|&c| c >= 2)
}

fn output_agreement(
    a: &Report,
    a_out: &[Vec<f32>],
    b: &Report,
    b_out: &[Vec<f32>],
) -> Vec<OutputAgreement> {
    let n = a.model.outputs.len().max(b.model.outputs.len());
    (0..n)
        .map(|i| {
            let name =
                |r: &Report| r.model.outputs.get(i).map_or("-".to_owned(), |t| t.name.clone());
            let classes = classes_of(a, i);
            let (x, y) = (a_out.get(i), b_out.get(i));
            let agreement = match (x, y) {
                (Some(x), Some(y)) => stats::agreement(x, y, classes),
                _ => None,
            };
            let note = match (x, y) {
                _ if agreement.is_some() => None,
                (Some(x), Some(y)) if x.len() != y.len() => {
                    Some(format!("A has {} values, B has {}", x.len(), y.len()))
                }
                (Some(x), Some(_)) if x.is_empty() => Some("not a float output".to_owned()),
                (None, _) => Some("A has no output at this position".to_owned()),
                (_, None) => Some("B has no output at this position".to_owned()),
                _ => Some("not comparable".to_owned()),
            };
            OutputAgreement {
                a: name(a),
                b: name(b),
                elements: x.map_or(0, Vec::len),
                classes,
                rel_l2: agreement.map(|g| g.rel_l2),
                cosine: agreement.and_then(|g| g.cosine),
                top1: agreement.and_then(|g| g.top1),
                note,
            }
        })
        .collect()
}

fn ratio(r: &Report, i: usize) -> Option<f64> {
    r.blocks.get(i)?.stats.as_ref()?.ratio.map(|s| s.mean)
}

fn key_differences(x: &BlockKey, y: &BlockKey) -> Vec<String> {
    let mut d = Vec::new();
    if x.shortcut != y.shortcut {
        d.push(format!("shortcut {} -> {}", x.shortcut, y.shortcut));
    }
    if x.placement != y.placement {
        d.push(format!("placement {} -> {}", x.placement, y.placement));
    }
    if x.branch != y.branch {
        d.push(format!("branch [{}] -> [{}]", x.branch.join(", "), y.branch.join(", ")));
    }
    if x.depth != y.depth {
        d.push(format!("depth {} -> {}", x.depth, y.depth));
    }
    d
}

/// Aligns the blocks of two reports and measures what changed.
pub fn comparison(
    a: &Report,
    b: &Report,
    run: Option<FedBoth>,
    outputs: Option<Vec<OutputAgreement>>,
) -> Comparison {
    let ka: Vec<BlockKey> = a.blocks.iter().map(|x| BlockKey::of_block(a, x)).collect();
    let kb: Vec<BlockKey> = b.blocks.iter().map(|x| BlockKey::of_block(b, x)).collect();
    let steps = align(&ka, &kb, |x, y| x.score(y));
    let blocks: Vec<BlockPair> = steps
        .iter()
        .map(|s| {
            let (i, j) = match *s {
                Step::Pair(i, j) => (Some(i), Some(j)),
                Step::OnlyA(i) => (Some(i), None),
                Step::OnlyB(j) => (None, Some(j)),
            };
            let differences = match (i, j) {
                (Some(i), Some(j)) => key_differences(&ka[i], &kb[j]),
                _ => Vec::new(),
            };
            let status = match (i, j) {
                (Some(_), Some(_)) if differences.is_empty() => "same",
                (Some(_), Some(_)) => "changed",
                (Some(_), None) => "only-a",
                _ => "only-b",
            };
            let key = i.map(|i| &ka[i]).or(j.map(|j| &kb[j])).expect("a step has a side");
            let ra = i.and_then(|i| ratio(a, i));
            let rb = j.and_then(|j| ratio(b, j));
            let both = ra.zip(rb);
            BlockPair {
                a: i.map(|i| i + 1),
                b: j.map(|j| j + 1),
                status: status.to_owned(),
                merge_a: i.map(|i| a.blocks[i].merge.name.clone()),
                merge_b: j.map(|j| b.blocks[j].merge.name.clone()),
                stage: key.stage,
                structure: key.describe(),
                differences,
                ratio_a: ra,
                ratio_b: rb,
                ratio_delta: both.map(|(x, y)| y - x),
                ratio_change: both.and_then(|(x, y)| (x > 0.0).then(|| y / x - 1.0)),
            }
        })
        .collect();
    let structural_differences = blocks.iter().filter(|p| p.status != "same").count();
    Comparison {
        schema: COMPARE_SCHEMA.to_owned(),
        schema_version: COMPARE_SCHEMA_VERSION,
        a: side(a),
        b: side(b),
        run,
        blocks,
        structural_differences,
        outputs: outputs.unwrap_or_default(),
        failures: Vec::new(),
    }
}

/// Configured reasons to fail a comparison on its numbers.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Tolerance {
    /// Fail when any output's relative L2 error is above this.
    pub max_rel_l2: Option<f64>,
    /// Fail when any paired block's ratio changes by more than this fraction.
    pub max_ratio_change: Option<f64>,
}

/// Why a comparison fails: structural differences, or numbers beyond the
/// tolerance. Empty when A and B match.
pub fn failures(c: &Comparison, t: &Tolerance) -> Vec<String> {
    let mut out = Vec::new();
    if c.structural_differences > 0 {
        let verb = if c.structural_differences == 1 { "differs" } else { "differ" };
        out.push(format!(
            "{} {verb} in structure or {} no counterpart",
            plural(c.structural_differences, "block"),
            if c.structural_differences == 1 { "has" } else { "have" }
        ));
    }
    if let Some(max) = t.max_rel_l2 {
        for o in &c.outputs {
            match o.rel_l2 {
                Some(e) if e <= max => {}
                Some(e) => out.push(format!(
                    "output '{}': relative L2 {e:.4e} is above --max-rel-l2 {max}",
                    o.a
                )),
                None => out.push(format!("output '{}' could not be compared", o.a)),
            }
        }
    }
    if let Some(max) = t.max_ratio_change {
        for p in &c.blocks {
            if let Some(ch) = p.ratio_change
                && ch.abs() > max
            {
                out.push(format!(
                    "block {} -> {}: ratio changed by {:+.1}%, more than --max-ratio-change {max}",
                    p.a.unwrap_or(0),
                    p.b.unwrap_or(0),
                    ch * 100.0
                ));
            }
        }
    }
    out
}

fn opt(x: Option<usize>) -> String {
    x.map_or("-".to_owned(), |x| x.to_string())
}

fn num(x: Option<f64>) -> String {
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
    t.set_header(header);
    for p in &c.blocks {
        let structure = match p.status.as_str() {
            "same" => "same".to_owned(),
            "changed" => p.differences.join("; "),
            "only-a" => format!("only in A: {}", p.structure),
            _ => format!("only in B: {}", p.structure),
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
            row.push(num(p.ratio_a));
            row.push(num(p.ratio_b));
            row.push(p.ratio_change.map_or("-".to_owned(), |x| format!("{:+.1}%", x * 100.0)));
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
    for o in &c.outputs {
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
            parts.push(n.clone());
        }
        let _ = writeln!(
            s,
            "output '{}' vs '{}': {}",
            terminal_safe(&o.a),
            terminal_safe(&o.b),
            parts.join(", ")
        );
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
