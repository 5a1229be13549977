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
