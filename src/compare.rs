//! Model-to-model comparison (`shunt compare A B`): the blocks of two models
//! aligned by structure, their structural differences, and — on the same
//! inputs fed to both — the change of each block's branch/shortcut ratio and
//! the agreement of the final outputs.
//!
//! The result, [`Comparison`], is plain data with public fields
//! (`shunt/compare` JSON) so that any renderer can use it.

use std::path::Path;

use crate::audit::{self, AuditConfig};
use crate::error::{Error, ErrorKind, Result};
use crate::open;

use crate::probe::Progress;
use crate::probe::inputs::InputPlan;
use crate::probe::paired::PairErrors;
use crate::report::Report;
use crate::report::compare::{
    BlockError, BlockPair, COMPARE_SCHEMA, COMPARE_SCHEMA_VERSION, Comparison, ErrorBirth,
    ErrorLocalisation, FedBoth, OutputAgreement, Side,
};
use crate::report::text::plural;
use crate::scan;
use crate::stats;
use crate::structure::{BlockKey, Step, align};
use crate::vocab::PairStatus;

/// What a comparison does.
#[derive(Debug, Clone)]
pub struct CompareConfig {
    /// Limits, inputs and findings, used for both models.
    pub audit: AuditConfig,
    /// Run both models (otherwise structure only).
    pub run: bool,
    /// The error is born at the first aligned block whose merge-output
    /// relative L2 error is above this.
    pub error_above: f64,
}

/// The default of [`CompareConfig::error_above`], our choice: 1% of the
/// merge output's norm, above float16's rounding (a few 1e-4 per block) and
/// at the size int8 quantisation reaches.
pub const ERROR_ABOVE: f64 = 0.01;

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
fn same_inputs(a: &InputPlan, b: &InputPlan, b_path: &Path) -> Result<()> {
    let names =
        |f: &InputPlan| f.inputs.iter().map(|i| i.name.clone()).collect::<Vec<_>>().join(", ");
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
        let a = scan::scan_file(a_path, &config.audit.open)?;
        let b = scan::scan_file(b_path, &config.audit.open)?;
        return Ok(comparison(&a, &b, None, None));
    }
    // Each model is opened once; both plans are checked before either runs.
    let purpose = open::Purpose::Run;
    let oa = open::open_file(a_path, &config.audit.open, purpose)?;
    let ob = open::open_file(b_path, &config.audit.open, purpose)?;
    let mut fa = oa.plan(&config.audit.inputs).map_err(|e| e.at(a_path))?;
    let mut fb = ob.plan(&config.audit.inputs).map_err(|e| e.at(b_path))?;
    same_inputs(&fa, &fb, b_path)?;
    // Paired passes need the same split of the samples; values do not depend
    // on the split, so both are planned again with the smaller pass.
    if fa.pass_batch != fb.pass_batch {
        let mut inputs = config.audit.inputs.clone();
        inputs.max_pass = Some(fa.pass_batch.min(fb.pass_batch));
        fa = oa.plan(&inputs).map_err(|e| e.at(a_path))?;
        fb = ob.plan(&inputs).map_err(|e| e.at(b_path))?;
        same_inputs(&fa, &fb, b_path)?;
    }
    let pairs = |ra: &Report, rb: &Report| -> Vec<(usize, usize)> {
        let ka: Vec<BlockKey> = ra.blocks.iter().map(|x| BlockKey::of_block(ra, x)).collect();
        let kb: Vec<BlockKey> = rb.blocks.iter().map(|x| BlockKey::of_block(rb, x)).collect();
        align(&ka, &kb, |x, y| x.score(y))
            .into_iter()
            .filter_map(|s| match s {
                Step::Pair(i, j) => Some((i, j)),
                _ => None,
            })
            .collect()
    };
    let paired = audit::measured_pair(oa, &fa, ob, &fb, &config.audit, &pairs, progress)
        .map_err(|e| e.at(a_path))?;
    let (a, b) = (paired.a, paired.b);
    if let Some(e) = a.run_error {
        return Err(e.at(a_path));
    }
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
    let mut c = comparison(&a.report, &b.report, fed, Some(outputs));
    localise(&mut c, &paired.errors, config.error_above, paired.not_paired);
    Ok(c)
}

/// Puts each aligned pair's differences into the comparison, and finds
/// where the error is born and how much it grows along depth.
pub fn localise(
    c: &mut Comparison,
    errors: &[((usize, usize), PairErrors)],
    threshold: f64,
    note: Option<String>,
) {
    let mut previous: Option<f64> = None;
    let mut first: Option<f64> = None;
    let mut last: Option<f64> = None;
    let mut born_at = None;
    let mut pairs = 0;
    for p in &mut c.blocks {
        let (Some(i), Some(j)) = (p.a, p.b) else { continue };
        let Some((_, e)) = errors.iter().find(|(k, _)| *k == (i - 1, j - 1)) else { continue };
        pairs += 1;
        let output = e.output.rel_l2();
        let non_finite = e.output.non_finite + e.shortcut.non_finite + e.branch.non_finite;
        let growth = match (previous, output) {
            (Some(x), Some(y)) if x > 0.0 => Some(y / x),
            _ => None,
        };
        if let Some(o) = output {
            first.get_or_insert(o);
            last = Some(o);
        }
        previous = output;
        p.error = Some(BlockError {
            output,
            shortcut: e.shortcut.rel_l2(),
            branch: e.branch.rel_l2(),
            non_finite,
            growth,
        });
        let exceeds = output.is_some_and(|o| o > threshold) || e.output.non_finite > 0;
        if born_at.is_none() && exceeds {
            born_at = Some(ErrorBirth {
                a: i,
                b: j,
                merge_a: p.merge_a.clone().unwrap_or_default(),
                output,
                non_finite: e.output.non_finite,
            });
        }
    }
    let growth = match (first, last) {
        (Some(f), Some(l)) if f > 0.0 && pairs > 1 => Some(l / f),
        _ => None,
    };
    c.errors = Some(ErrorLocalisation {
        measured: note.is_none(),
        note,
        threshold,
        born_at,
        growth,
        pairs,
    });
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
                (Some(_), Some(_)) if differences.is_empty() => PairStatus::Same,
                (Some(_), Some(_)) => PairStatus::Changed,
                (Some(_), None) => PairStatus::OnlyA,
                _ => PairStatus::OnlyB,
            };
            let key = i.map(|i| &ka[i]).or(j.map(|j| &kb[j])).expect("a step has a side");
            let ra = i.and_then(|i| ratio(a, i));
            let rb = j.and_then(|j| ratio(b, j));
            let both = ra.zip(rb);
            BlockPair {
                a: i.map(|i| i + 1),
                b: j.map(|j| j + 1),
                status,
                merge_a: i.map(|i| a.blocks[i].merge.name.clone()),
                merge_b: j.map(|j| b.blocks[j].merge.name.clone()),
                stage: key.stage,
                structure: key.describe(),
                differences,
                ratio_a: ra,
                ratio_b: rb,
                ratio_delta: both.map(|(x, y)| y - x),
                ratio_change: both.and_then(|(x, y)| (x > 0.0).then(|| y / x - 1.0)),
                error: None,
            }
        })
        .collect();
    let structural_differences = blocks.iter().filter(|p| p.status != PairStatus::Same).count();
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
        errors: None,
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
