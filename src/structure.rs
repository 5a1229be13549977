//! Residual structure as a comparable value: the pin file (`shunt pin`), the
//! check of a model against a pin (`shunt verify --pin`), and the alignment
//! of two block sequences that `verify` and `compare` share.
//!
//! Works on [`report::Report`]s only, so it sits downstream of the scan: a
//! pin holds what the architecture fixes (stages, shortcut kinds,
//! placements, the learned layers of each branch, nesting) and nothing an
//! exporter or optimiser changes freely (node names, tensor names, node
//! order, BatchNorm, Q/DQ pairs, casts, activations fused into a layer).
//!
//! **Invariant:** a pure function of reports and files' text; no graph, no run.

use std::fmt::Write as _;
use std::io;

use serde::{Deserialize, Serialize};

use crate::report::text::{ARROW_ASCII, layer_signature, plural, terminal_safe};
use crate::report::verify::{Difference, VERIFY_SCHEMA, VERIFY_SCHEMA_VERSION, Verification};
use crate::report::{BlockRow, Report};
use crate::vocab::{Against, DifferenceCode, Placement, ShortcutKind};

/// Identifies a pin file.
pub const PIN_SCHEMA: &str = "shunt/pin";
/// Version of the pin format.
pub const PIN_SCHEMA_VERSION: u32 = 1;

/// The residual structure of one model, as written to a pin file.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Pin<B = PinBlock> {
    /// Always [`PIN_SCHEMA`].
    pub schema: String,
    /// Always [`PIN_SCHEMA_VERSION`].
    pub schema_version: u32,
    /// Stages in order.
    #[serde(default, rename = "stage")]
    pub stages: Vec<PinStage>,
    /// Blocks in graph order.
    #[serde(default = "Vec::new", rename = "block")]
    pub blocks: Vec<B>,
}

/// One stage of a pin.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PinStage {
    /// 1-based stage number.
    pub id: usize,
    /// Output shape of its blocks past the batch axis, `x`-joined.
    pub shape: String,
    /// Number of blocks.
    pub blocks: usize,
}

/// One block of a pin; `W` is how its words are held (the vocabulary's
/// types, or text as read from the file before it is checked).
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct PinBlock<S = ShortcutKind, P = Placement> {
    /// Stage id; absent when the output shape is unknown.
    pub stage: Option<usize>,
    /// `identity`, `projection` or `resampled`.
    pub shortcut: S,
    /// `post-activation`, `pre-activation`, `pre-norm`, `post-norm` or `unactivated`.
    pub placement: P,
    /// The branch's learned layers in order ([`layer_signature`]).
    pub branch: Vec<String>,
    /// How many blocks hold this one (0 for a plain stack).
    #[serde(default)]
    pub depth: usize,
    /// 1-based number (in this file) of the innermost block holding this one.
    pub parent: Option<usize>,
}

/// The pin of a report.
pub fn pin_of(r: &Report) -> Pin {
    Pin {
        schema: PIN_SCHEMA.to_owned(),
        schema_version: PIN_SCHEMA_VERSION,
        stages: r
            .stages
            .iter()
            .map(|s| PinStage { id: s.id, shape: s.shape.join("x"), blocks: s.blocks.len() })
            .collect(),
        blocks: r
            .blocks
            .iter()
            .map(|b| PinBlock {
                stage: b.stage,
                shortcut: b.shortcut.kind,
                placement: b.placement,
                branch: b.branch.layers.iter().map(|l| layer_signature(l, ARROW_ASCII)).collect(),
                depth: b.depth,
                parent: b.parent,
            })
            .collect(),
    }
}

fn quoted(s: &str) -> String {
    toml::Value::String(s.to_owned()).to_string()
}

/// Writes a pin as TOML: one table per stage and per block, one line per
/// fact, so that a change of structure is a small, readable diff.
pub fn write_pin(pin: &Pin, source: &str, out: &mut dyn io::Write) -> io::Result<()> {
    let mut s = String::new();
    let _ = writeln!(s, "# Residual structure pinned by shunt from {}.", terminal_safe(source));
    let _ = writeln!(s, "# No statistics, no node names. Check a model with:");
    let _ = writeln!(s, "#   shunt verify MODEL --pin FILE");
    let _ = writeln!(s, "schema = {}", quoted(&pin.schema));
    let _ = writeln!(s, "schema_version = {}", pin.schema_version);
    for st in &pin.stages {
        let _ = writeln!(s, "\n[[stage]]");
        let _ = writeln!(s, "id = {}", st.id);
        let _ = writeln!(s, "shape = {}", quoted(&st.shape));
        let _ = writeln!(s, "blocks = {}", st.blocks);
    }
    for (i, b) in pin.blocks.iter().enumerate() {
        let _ = writeln!(s, "\n[[block]] # {}", i + 1);
        if let Some(stage) = b.stage {
            let _ = writeln!(s, "stage = {stage}");
        }
        let _ = writeln!(s, "shortcut = {}", quoted(b.shortcut.as_str()));
        let _ = writeln!(s, "placement = {}", quoted(b.placement.as_str()));
        let layers: Vec<String> = b.branch.iter().map(|l| quoted(l)).collect();
        let _ = writeln!(s, "branch = [{}]", layers.join(", "));
        let _ = writeln!(s, "depth = {}", b.depth);
        if let Some(p) = b.parent {
            let _ = writeln!(s, "parent = {p}");
        }
    }
    out.write_all(s.as_bytes())
}

/// Reads a pin file's text; the error says what is wrong (the caller adds the path).
pub fn read_pin(text: &str) -> Result<Pin, String> {
    // The words are read as text first, so that an unknown one is refused
    // with the block it is in.
    let pin: Pin<PinBlock<String, String>> =
        toml::from_str(text).map_err(|e| format!("not a pin file: {}", toml_message(text, &e)))?;
    if pin.schema != PIN_SCHEMA {
        return Err(format!("schema is '{}', expected '{PIN_SCHEMA}'", pin.schema));
    }
    if pin.schema_version != PIN_SCHEMA_VERSION {
        return Err(format!(
            "pin version {} is not supported (this shunt reads version {PIN_SCHEMA_VERSION})",
            pin.schema_version
        ));
    }
    let count = pin.blocks.len();
    let mut blocks = Vec::with_capacity(count);
    for (i, b) in pin.blocks.into_iter().enumerate() {
        // A hand-edited pin with an unknown word would only ever report a
        // difference; say what is wrong with the file instead.
        let Some(shortcut) = ShortcutKind::parse(&b.shortcut) else {
            return Err(format!(
                "block {}: shortcut '{}' is not one of {}",
                i + 1,
                b.shortcut,
                ShortcutKind::known()
            ));
        };
        let Some(placement) = Placement::parse(&b.placement) else {
            return Err(format!(
                "block {}: placement '{}' is not one of {}",
                i + 1,
                b.placement,
                Placement::known()
            ));
        };
        if let Some(s) = b.stage
            && !pin.stages.iter().any(|st| st.id == s)
        {
            return Err(format!("block {} names stage {s}, which the file does not list", i + 1));
        }
        if let Some(p) = b.parent
            && (p == 0 || p > count)
        {
            return Err(format!("block {} names parent {p}, which is not a block", i + 1));
        }
        blocks.push(PinBlock {
            stage: b.stage,
            shortcut,
            placement,
            branch: b.branch,
            depth: b.depth,
            parent: b.parent,
        });
    }
    Ok(Pin { schema: pin.schema, schema_version: pin.schema_version, stages: pin.stages, blocks })
}

/// What identifies a block across exports of one architecture.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct BlockKey {
    /// Output shape of the block's stage (`?` when unknown): the strong key.
    pub stage_shape: String,
    /// Stage id, when known.
    pub stage: Option<usize>,
    /// Shortcut kind.
    pub shortcut: ShortcutKind,
    /// Placement.
    pub placement: Placement,
    /// Signatures of the branch's learned layers.
    pub branch: Vec<String>,
    /// Nesting depth.
    pub depth: usize,
}

impl BlockKey {
    /// The key of a report's block.
    pub fn of_block(r: &Report, b: &BlockRow) -> BlockKey {
        let stage_shape = b
            .stage
            .and_then(|s| r.stages.iter().find(|st| st.id == s))
            .map_or("?".to_owned(), |st| st.shape.join("x"));
        BlockKey {
            stage_shape,
            stage: b.stage,
            shortcut: b.shortcut.kind,
            placement: b.placement,
            branch: b.branch.layers.iter().map(|l| layer_signature(l, ARROW_ASCII)).collect(),
            depth: b.depth,
        }
    }

    /// The key of a pin's block.
    pub fn of_pinned(pin: &Pin, b: &PinBlock) -> BlockKey {
        let stage_shape = b
            .stage
            .and_then(|s| pin.stages.iter().find(|st| st.id == s))
            .map_or("?".to_owned(), |st| st.shape.clone());
        BlockKey {
            stage_shape,
            stage: b.stage,
            shortcut: b.shortcut,
            placement: b.placement,
            branch: b.branch.clone(),
            depth: b.depth,
        }
    }

    /// A short description: `stage 2, identity, post-activation, [conv3x3 32->32, …]`.
    pub fn describe(&self) -> String {
        let stage = self.stage.map_or("stage unknown".to_owned(), |s| format!("stage {s}"));
        format!("{stage}, {}, {}, [{}]", self.shortcut, self.placement, self.branch.join(", "))
    }

    /// Whether the stage shapes may be the same: equal, or one unknown. A
    /// shape the static inference could not derive in one export (run-time
    /// Reshape targets) is no evidence of a different stage.
    fn same_stage_shape(&self, other: &BlockKey) -> bool {
        self.stage_shape == other.stage_shape || self.stage_shape == "?" || other.stage_shape == "?"
    }

    /// How well two keys match, or `None` when they may not be paired: the
    /// stage shapes must agree (or one be unknown) and at least two of
    /// shortcut, placement, branch and depth must agree. The branch counts
    /// double.
    pub fn score(&self, other: &BlockKey) -> Option<u32> {
        if !self.same_stage_shape(other) {
            return None;
        }
        let agree = u32::from(self.shortcut == other.shortcut)
            + u32::from(self.placement == other.placement)
            + 2 * u32::from(self.branch == other.branch)
            + u32::from(self.depth == other.depth);
        (agree >= 2).then_some(1 + agree)
    }

    /// Whether everything but the stage id agrees (an unknown stage shape
    /// agrees with any).
    pub fn same(&self, other: &BlockKey) -> bool {
        self.same_stage_shape(other)
            && self.shortcut == other.shortcut
            && self.placement == other.placement
            && self.branch == other.branch
            && self.depth == other.depth
    }
}

/// One step of an alignment: a pair, or an item of one side alone.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Step {
    /// `a[i]` is paired with `b[j]`.
    Pair(usize, usize),
    /// `a[i]` has no counterpart.
    OnlyA(usize),
    /// `b[j]` has no counterpart.
    OnlyB(usize),
}

/// Aligns two sequences in order (Needleman–Wunsch with free gaps, which is
/// a weighted longest common subsequence): the pairs maximise the sum of
/// `score`, never cross, and pair only items `score` allows. Every item of
/// both sides appears exactly once in the result. Ties prefer pairing, then
/// leaving `a`'s item alone first, so the result is deterministic.
pub fn align<A, B>(a: &[A], b: &[B], score: impl Fn(&A, &B) -> Option<u32>) -> Vec<Step> {
    let (n, m) = (a.len(), b.len());
    // best[i][j]: best total for a[i..], b[j..].
    let mut best = vec![vec![0u64; m + 1]; n + 1];
    let mut pair = vec![vec![None; m + 1]; n + 1];
    for i in (0..n).rev() {
        for j in (0..m).rev() {
            let s = score(&a[i], &b[j]);
            pair[i][j] = s;
            let with = s.map(|s| u64::from(s) + best[i + 1][j + 1]);
            let skip = best[i + 1][j].max(best[i][j + 1]);
            best[i][j] = with.map_or(skip, |w| w.max(skip));
        }
    }
    let mut steps = Vec::with_capacity(n + m);
    let (mut i, mut j) = (0, 0);
    while i < n && j < m {
        if let Some(s) = pair[i][j]
            && u64::from(s) + best[i + 1][j + 1] == best[i][j]
        {
            steps.push(Step::Pair(i, j));
            i += 1;
            j += 1;
        } else if best[i + 1][j] == best[i][j] {
            steps.push(Step::OnlyA(i));
            i += 1;
        } else {
            steps.push(Step::OnlyB(j));
            j += 1;
        }
    }
    steps.extend((i..n).map(Step::OnlyA));
    steps.extend((j..m).map(Step::OnlyB));
    steps
}

fn merge_label(r: &Report, id: usize) -> String {
    r.blocks.get(id - 1).map_or(format!("block {id}"), |b| format!("block {id} ({})", b.merge.name))
}

/// Checks a model's report against a pin.
pub fn verify_pin(pin: &Pin, r: &Report, file: &str) -> Verification {
    let want: Vec<BlockKey> = pin.blocks.iter().map(|b| BlockKey::of_pinned(pin, b)).collect();
    let have: Vec<BlockKey> = r.blocks.iter().map(|b| BlockKey::of_block(r, b)).collect();
    let steps = align(&want, &have, |a, b| a.score(b));
    let mut to_model: Vec<Option<usize>> = vec![None; want.len()];
    for s in &steps {
        if let Step::Pair(i, j) = *s {
            to_model[i] = Some(j);
        }
    }
    let mut diffs = Vec::new();
    // Pairs whose keys cross-match exactly are a swap, not two changes.
    let changed: Vec<(usize, usize)> = steps
        .iter()
        .filter_map(|s| match *s {
            Step::Pair(i, j) if !want[i].same(&have[j]) => Some((i, j)),
            _ => None,
        })
        .collect();
    let mut swapped = vec![false; want.len()];
    for (x, &(i1, j1)) in changed.iter().enumerate() {
        for &(i2, j2) in &changed[x + 1..] {
            if !swapped[i1] && !swapped[i2] && want[i1].same(&have[j2]) && want[i2].same(&have[j1])
            {
                swapped[i1] = true;
                swapped[i2] = true;
                diffs.push(Difference {
                    code: DifferenceCode::SwappedBlocks,
                    stage: have[j1].stage,
                    block: Some(j1 + 1),
                    pinned: Some(i1 + 1),
                    message: format!(
                        "pinned blocks {} and {} appear in swapped order: {} is like pinned block {} and {} like pinned block {}",
                        i1 + 1,
                        i2 + 1,
                        merge_label(r, j1 + 1),
                        i2 + 1,
                        merge_label(r, j2 + 1),
                        i1 + 1
                    ),
                });
            }
        }
    }
    // The model block just before a position, to say where a missing block was expected.
    let mut last_model: Option<usize> = None;
    let mut next_model_after: Vec<Option<usize>> = vec![None; steps.len()];
    let mut upcoming: Option<usize> = None;
    for (k, s) in steps.iter().enumerate().rev() {
        next_model_after[k] = upcoming;
        if let Step::Pair(_, j) | Step::OnlyB(j) = *s {
            upcoming = Some(j);
        }
    }
    for (k, s) in steps.iter().enumerate() {
        match *s {
            Step::Pair(i, j) => {
                last_model = Some(j);
                if swapped[i] {
                    continue;
                }
                let (w, h) = (&want[i], &have[j]);
                let at = merge_label(r, j + 1);
                let mut d = |code: DifferenceCode, message: String| {
                    diffs.push(Difference {
                        code,
                        stage: h.stage,
                        block: Some(j + 1),
                        pinned: Some(i + 1),
                        message,
                    })
                };
                if w.shortcut != h.shortcut {
                    d(
                        DifferenceCode::ShortcutChanged,
                        format!(
                            "{at}: the shortcut is {}, pinned block {} had {}",
                            h.shortcut,
                            i + 1,
                            w.shortcut
                        ),
                    );
                }
                if w.placement != h.placement {
                    d(
                        DifferenceCode::PlacementChanged,
                        format!(
                            "{at}: placement is {}, pinned block {} was {}",
                            h.placement,
                            i + 1,
                            w.placement
                        ),
                    );
                }
                if w.branch != h.branch {
                    d(
                        DifferenceCode::BranchChanged,
                        format!(
                            "{at}: the branch holds [{}], pinned block {} held [{}]",
                            h.branch.join(", "),
                            i + 1,
                            w.branch.join(", ")
                        ),
                    );
                }
                let model_parent = r.blocks[j].parent;
                let pinned_parent = pin.blocks[i].parent;
                let mapped = pinned_parent.and_then(|p| to_model[p - 1]).map(|m| m + 1);
                if w.depth != h.depth || mapped != model_parent {
                    let inside = |p: Option<usize>| {
                        p.map_or("at the top level".to_owned(), |p| format!("inside block {p}"))
                    };
                    d(
                        DifferenceCode::NestingChanged,
                        format!(
                            "{at}: is {} (depth {}), pinned block {} was {} of the pin (depth {})",
                            inside(model_parent),
                            h.depth,
                            i + 1,
                            inside(pinned_parent),
                            w.depth
                        ),
                    );
                }
            }
            Step::OnlyA(i) => {
                let place = match (last_model, next_model_after[k]) {
                    (Some(a), Some(b)) => {
                        format!("between {} and {}", merge_label(r, a + 1), merge_label(r, b + 1))
                    }
                    (Some(a), None) => format!("after {}", merge_label(r, a + 1)),
                    (None, Some(b)) => format!("before {}", merge_label(r, b + 1)),
                    (None, None) => "somewhere in the model".to_owned(),
                };
                diffs.push(Difference {
                    code: DifferenceCode::MissingBlock,
                    stage: want[i].stage,
                    block: None,
                    pinned: Some(i + 1),
                    message: format!(
                        "pinned block {} ({}) has no merge in the model; expected {place}",
                        i + 1,
                        want[i].describe()
                    ),
                });
            }
            Step::OnlyB(j) => {
                last_model = Some(j);
                diffs.push(Difference {
                    code: DifferenceCode::ExtraBlock,
                    stage: have[j].stage,
                    block: Some(j + 1),
                    pinned: None,
                    message: format!(
                        "{} ({}) is not in the pin",
                        merge_label(r, j + 1),
                        have[j].describe()
                    ),
                });
            }
        }
    }
    diffs.extend(stage_differences(pin, r));
    Verification {
        schema: VERIFY_SCHEMA.to_owned(),
        schema_version: VERIFY_SCHEMA_VERSION,
        model: r.model.path.clone(),
        against: Against::Pin,
        file: file.to_owned(),
        blocks: r.blocks.len(),
        checks: pin.blocks.len() + pin.stages.len(),
        differences: diffs,
    }
}

/// Stages are matched in order by shape; each pinned stage must be there
/// with as many blocks.
fn stage_differences(pin: &Pin, r: &Report) -> Vec<Difference> {
    let have: Vec<(usize, String, usize)> =
        r.stages.iter().map(|s| (s.id, s.shape.join("x"), s.blocks.len())).collect();
    let steps = align(&pin.stages, &have, |a, b| (a.shape == b.1).then_some(1));
    let mut diffs = Vec::new();
    for s in steps {
        match s {
            Step::Pair(i, j) => {
                let (p, h) = (&pin.stages[i], &have[j]);
                if p.blocks != h.2 {
                    let verb = if h.2 < p.blocks { "lost" } else { "gained" };
                    let mut d = Difference::new(
                        DifferenceCode::StageBlocks,
                        format!(
                            "stage {} ({}) {verb} {}: it has {}, the pin has {} (pinned stage {})",
                            h.0,
                            h.1,
                            plural(p.blocks.abs_diff(h.2), "block"),
                            plural(h.2, "block"),
                            p.blocks,
                            p.id
                        ),
                    );
                    d.stage = Some(h.0);
                    diffs.push(d);
                }
            }
            Step::OnlyA(i) => {
                let p = &pin.stages[i];
                diffs.push(Difference::new(
                    DifferenceCode::MissingStage,
                    format!(
                        "pinned stage {} ({}, {}) is not in the model",
                        p.id,
                        p.shape,
                        plural(p.blocks, "block")
                    ),
                ));
            }
            Step::OnlyB(j) => {
                let h = &have[j];
                let mut d = Difference::new(
                    DifferenceCode::ExtraStage,
                    format!("stage {} ({}, {}) is not in the pin", h.0, h.1, plural(h.2, "block")),
                );
                d.stage = Some(h.0);
                diffs.push(d);
            }
        }
    }
    diffs
}

/// A TOML error on one line: "line L, column C: what" (the parser's own
/// rendering spans several lines and quotes the file).
pub(crate) fn toml_message(text: &str, e: &toml::de::Error) -> String {
    let what = e.message().trim_end();
    let Some(span) = e.span() else { return what.to_owned() };
    let before = text.get(..span.start).unwrap_or(text);
    let line = before.matches('\n').count() + 1;
    let column = before.rsplit('\n').next().map_or(0, |l| l.chars().count()) + 1;
    format!("line {line}, column {column}: {what}")
}

#[cfg(test)]
mod tests {
    use super::*;

    fn key(stage: &str, shortcut: ShortcutKind, branch: &[&str]) -> BlockKey {
        BlockKey {
            stage_shape: stage.to_owned(),
            stage: Some(1),
            shortcut,
            placement: Placement::PostActivation,
            branch: branch.iter().map(|s| (*s).to_owned()).collect(),
            depth: 1,
        }
    }

    #[test]
    fn alignment_leaves_out_the_removed_item_and_keeps_every_item() {
        let a = ["x", "y", "y", "z"];
        let b = ["x", "y", "z"];
        let steps = align(&a, &b, |p, q| (p == q).then_some(1));
        assert_eq!(
            steps,
            vec![Step::Pair(0, 0), Step::Pair(1, 1), Step::OnlyA(2), Step::Pair(3, 2)]
        );
        let steps = align(&b, &a, |p, q| (p == q).then_some(1));
        assert_eq!(steps.iter().filter(|s| matches!(s, Step::OnlyB(_))).count(), 1);
        assert_eq!(steps.len(), 4);
    }

    #[test]
    fn alignment_never_pairs_what_score_forbids() {
        let steps = align(&[1, 2], &[3], |_, _| None);
        assert_eq!(steps, vec![Step::OnlyA(0), Step::OnlyA(1), Step::OnlyB(0)]);
        assert!(align::<u8, u8>(&[], &[], |_, _| Some(1)).is_empty());
    }

    #[test]
    fn keys_pair_within_a_stage_shape_only() {
        let a = key("16x8x8", ShortcutKind::Identity, &["conv3x3 16->16"]);
        let b = key("32x4x4", ShortcutKind::Identity, &["conv3x3 16->16"]);
        assert_eq!(a.score(&b), None);
        let c = key("16x8x8", ShortcutKind::Projection, &["conv3x3 16->16"]);
        assert_eq!(a.score(&c), Some(5));
        assert_eq!(a.score(&a), Some(6));
    }

    #[test]
    fn a_pin_reads_back_and_bad_pins_are_refused() {
        let pin = Pin {
            schema: PIN_SCHEMA.to_owned(),
            schema_version: 1,
            stages: vec![PinStage { id: 1, shape: "8x4x4".to_owned(), blocks: 2 }],
            blocks: vec![
                PinBlock {
                    stage: Some(1),
                    shortcut: ShortcutKind::Identity,
                    placement: Placement::PreNorm,
                    branch: vec!["fc 8->\"8\"".to_owned()],
                    depth: 1,
                    parent: None,
                },
                PinBlock {
                    stage: None,
                    shortcut: ShortcutKind::Projection,
                    placement: Placement::Unactivated,
                    branch: vec![],
                    depth: 2,
                    parent: Some(1),
                },
            ],
        };
        let mut text = Vec::new();
        write_pin(&pin, "m.onnx", &mut text).unwrap();
        let text = String::from_utf8(text).unwrap();
        assert_eq!(read_pin(&text).unwrap(), pin);
        assert!(
            read_pin("schema = \"shunt/pin\"\nschema_version = 2\n")
                .unwrap_err()
                .contains("version 2")
        );
        assert!(
            read_pin("schema = \"other\"\nschema_version = 1\n").unwrap_err().contains("other")
        );
        assert!(read_pin("[[block]]\nshortcut = 1\n").is_err());
        let bad = text.replace("parent = 1", "parent = 7");
        assert!(read_pin(&bad).unwrap_err().contains("parent 7"));
        let bad = text.replace("\"pre-norm\"", "\"pre-normal\"");
        assert!(
            read_pin(&bad)
                .unwrap_err()
                .starts_with("block 1: placement 'pre-normal' is not one of post-activation, ")
        );
    }
}
