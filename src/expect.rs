//! Hand-written expectations (`shunt verify --expect FILE`): what a person
//! intends a model's residual structure to be, written before any model
//! exists, checked against a report.
//!
//! The file is TOML with our own keys (documented in docs/checking.md). Every key
//! is optional; each one present is one check. Unknown keys are refused so
//! that a typo cannot turn a check off.
//!
//! **Invariant:** a pure function of the file's text and a report.

use serde::Deserialize;

use crate::report::Report;
use crate::report::text::plural;
use crate::report::verify::{Difference, VERIFY_SCHEMA, VERIFY_SCHEMA_VERSION, Verification};
use crate::vocab::{Against, DifferenceCode, FindingCode, Placement, ShortcutKind};

/// The version of the expectation format this build reads.
pub const EXPECT_VERSION: u32 = 1;

/// A parsed expectation file.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Expectation {
    /// Format version; 1 when absent.
    pub version: Option<u32>,
    /// Number of residual blocks in the whole model.
    pub blocks: Option<usize>,
    /// Placement of every block (a stage may override it).
    pub placement: Option<Placement>,
    /// Block numbers (1-based, graph order) that have a projection shortcut;
    /// every other block must have none.
    pub projection: Option<Vec<usize>>,
    /// Deepest nesting of blocks (1 for a plain stack of blocks).
    pub nesting: Option<usize>,
    /// Stages in order; when given, the model must have exactly these.
    pub stages: Vec<StageExpectation>,
    /// Limits on findings.
    pub limits: Limits,
}

/// What one stage should hold.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct StageExpectation {
    /// Number of blocks.
    pub blocks: Option<usize>,
    /// Output shape past the batch axis, `x`-joined (`"64x8x8"`).
    pub shape: Option<String>,
    /// Positions (1-based, within the stage) of blocks with a projection shortcut.
    pub projection: Option<Vec<usize>>,
    /// Placement of every block of the stage.
    pub placement: Option<Placement>,
}

/// Limits on findings and measurements.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Limits {
    /// Finding codes that must not occur.
    pub forbid: Vec<Forbidden>,
    /// Smallest allowed mean RMS(branch)/RMS(shortcut) of any block.
    pub ratio_min: Option<f64>,
    /// Largest allowed mean RMS(branch)/RMS(shortcut) of any block.
    pub ratio_max: Option<f64>,
}

/// A finding an expectation forbids: one code, or `"any"`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Forbidden {
    /// Every finding.
    Any,
    /// This finding.
    Code(FindingCode),
}

impl Forbidden {
    fn covers(self, code: FindingCode) -> bool {
        match self {
            Forbidden::Any => true,
            Forbidden::Code(c) => c == code,
        }
    }
}

/// The file as written: our keys, its words still text until checked
/// against the vocabulary (so a wrong word gets its own message).
#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct ExpectationFile {
    version: Option<u32>,
    blocks: Option<usize>,
    placement: Option<String>,
    projection: Option<Vec<usize>>,
    nesting: Option<usize>,
    #[serde(default, rename = "stage")]
    stages: Vec<StageFile>,
    #[serde(default)]
    limits: LimitsFile,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct StageFile {
    blocks: Option<usize>,
    shape: Option<String>,
    projection: Option<Vec<usize>>,
    placement: Option<String>,
}

#[derive(Default, Deserialize)]
#[serde(deny_unknown_fields)]
struct LimitsFile {
    #[serde(default)]
    forbid: Vec<String>,
    ratio_min: Option<f64>,
    ratio_max: Option<f64>,
}

fn placement(word: Option<String>) -> Result<Option<Placement>, String> {
    word.map(|p| {
        Placement::parse(&p)
            .ok_or_else(|| format!("unknown placement '{p}' (known: {})", Placement::known()))
    })
    .transpose()
}

/// Parses an expectation file's text; the error says what is wrong.
pub fn read(text: &str) -> Result<Expectation, String> {
    let e: ExpectationFile = toml::from_str(text).map_err(|e| {
        format!("not a valid expectation file: {}", crate::structure::toml_message(text, &e))
    })?;
    if let Some(v) = e.version
        && v != EXPECT_VERSION
    {
        return Err(format!(
            "expectation version {v} is not supported (this shunt reads version {EXPECT_VERSION})"
        ));
    }
    let whole = placement(e.placement)?;
    let mut stages = Vec::with_capacity(e.stages.len());
    for s in e.stages {
        stages.push(StageExpectation {
            blocks: s.blocks,
            shape: s.shape,
            projection: s.projection,
            placement: placement(s.placement)?,
        });
    }
    let mut forbid = Vec::with_capacity(e.limits.forbid.len());
    for code in &e.limits.forbid {
        forbid.push(match FindingCode::parse(code) {
            Some(c) => Forbidden::Code(c),
            None if code == "any" => Forbidden::Any,
            None => {
                return Err(format!(
                    "limits.forbid: unknown finding '{code}' (known: {}, or any)",
                    FindingCode::known()
                ));
            }
        });
    }
    let zero = e.projection.iter().chain(stages.iter().filter_map(|s| s.projection.as_ref()));
    if zero.flatten().any(|&n| n == 0) {
        return Err("projection: block numbers start at 1".to_owned());
    }
    if let (Some(lo), Some(hi)) = (e.limits.ratio_min, e.limits.ratio_max)
        && lo > hi
    {
        return Err(format!("limits: ratio_min {lo} is above ratio_max {hi}"));
    }
    Ok(Expectation {
        version: e.version,
        blocks: e.blocks,
        placement: whole,
        projection: e.projection,
        nesting: e.nesting,
        stages,
        limits: Limits { forbid, ratio_min: e.limits.ratio_min, ratio_max: e.limits.ratio_max },
    })
}

impl Expectation {
    /// Whether checking needs the model to be run (ratio bounds, or a
    /// forbidden finding that only measurements can raise).
    pub fn needs_run(&self) -> bool {
        self.limits.ratio_min.is_some()
            || self.limits.ratio_max.is_some()
            || self.limits.forbid.iter().any(|f| match f {
                Forbidden::Any => true,
                Forbidden::Code(c) => !c.is_structural(),
            })
    }
}

fn diff(
    code: DifferenceCode,
    stage: Option<usize>,
    block: Option<usize>,
    message: String,
) -> Difference {
    Difference { code, stage, block, pinned: None, message }
}

fn label(r: &Report, id: usize) -> String {
    r.blocks.get(id - 1).map_or(format!("block {id}"), |b| format!("block {id} ({})", b.merge.name))
}

fn fmt_list(v: &[usize]) -> String {
    let items: Vec<String> = v.iter().map(usize::to_string).collect();
    format!("[{}]", items.join(", "))
}

/// Checks a report against an expectation.
pub fn check(e: &Expectation, r: &Report, file: &str) -> Verification {
    let mut checks = 0;
    let mut d = Vec::new();
    if let Some(n) = e.blocks {
        checks += 1;
        if r.blocks.len() != n {
            d.push(diff(
                DifferenceCode::BlockCount,
                None,
                None,
                format!("the model has {}, expected {n}", plural(r.blocks.len(), "residual block")),
            ));
        }
    }
    if let Some(p) = &e.placement {
        checks += 1;
        for b in r.blocks.iter().filter(|b| b.placement != *p) {
            d.push(diff(
                DifferenceCode::Placement,
                b.stage,
                Some(b.id),
                format!("{} is {}, expected {p}", label(r, b.id), b.placement),
            ));
        }
    }
    if let Some(list) = &e.projection {
        checks += 1;
        let have: Vec<usize> = r
            .blocks
            .iter()
            .filter(|b| b.shortcut.kind == ShortcutKind::Projection)
            .map(|b| b.id)
            .collect();
        if &have != list {
            d.push(diff(
                DifferenceCode::Projection,
                None,
                None,
                format!(
                    "blocks with a projection shortcut are {}, expected {}",
                    fmt_list(&have),
                    fmt_list(list)
                ),
            ));
        }
    }
    if let Some(n) = e.nesting {
        checks += 1;
        let deepest = r.blocks.iter().map(|b| b.depth + 1).max().unwrap_or(0);
        if deepest != n {
            d.push(diff(
                DifferenceCode::Nesting,
                None,
                None,
                format!("blocks nest {deepest} deep, expected {n}"),
            ));
        }
    }
    if !e.stages.is_empty() {
        checks += 1;
        if r.stages.len() != e.stages.len() {
            let counts: Vec<usize> = r.stages.iter().map(|s| s.blocks.len()).collect();
            d.push(diff(
                DifferenceCode::StageCount,
                None,
                None,
                format!(
                    "the model has {} with {} block(s), expected {}",
                    plural(r.stages.len(), "stage"),
                    fmt_list(&counts),
                    plural(e.stages.len(), "stage")
                ),
            ));
        }
        for (want, have) in e.stages.iter().zip(&r.stages) {
            let sid = Some(have.id);
            if let Some(n) = want.blocks {
                checks += 1;
                if have.blocks.len() != n {
                    d.push(diff(
                        DifferenceCode::StageBlocks,
                        sid,
                        None,
                        format!(
                            "stage {} ({}) has {}, expected {n}",
                            have.id,
                            have.shape.join("x"),
                            plural(have.blocks.len(), "block")
                        ),
                    ));
                }
            }
            if let Some(shape) = &want.shape {
                checks += 1;
                let got = have.shape.join("x");
                if &got != shape {
                    d.push(diff(
                        DifferenceCode::StageShape,
                        sid,
                        None,
                        format!("stage {} has shape {got}, expected {shape}", have.id),
                    ));
                }
            }
            if let Some(list) = &want.projection {
                checks += 1;
                let got: Vec<usize> = have
                    .blocks
                    .iter()
                    .enumerate()
                    .filter(|(_, id)| {
                        r.blocks
                            .get(**id - 1)
                            .is_some_and(|b| b.shortcut.kind == ShortcutKind::Projection)
                    })
                    .map(|(pos, _)| pos + 1)
                    .collect();
                if &got != list {
                    d.push(diff(
                        DifferenceCode::Projection,
                        sid,
                        None,
                        format!(
                            "stage {}: positions with a projection shortcut are {}, expected {}",
                            have.id,
                            fmt_list(&got),
                            fmt_list(list)
                        ),
                    ));
                }
            }
            if let Some(p) = &want.placement {
                checks += 1;
                for &id in &have.blocks {
                    let b = &r.blocks[id - 1];
                    if b.placement != *p {
                        d.push(diff(
                            DifferenceCode::Placement,
                            sid,
                            Some(id),
                            format!("{} is {}, expected {p}", label(r, id), b.placement),
                        ));
                    }
                }
            }
        }
    }
    let l = &e.limits;
    if !l.forbid.is_empty() {
        checks += 1;
        for f in r.findings.iter().filter(|f| l.forbid.iter().any(|x| x.covers(f.code))) {
            let block = f.block;
            let stage = block.and_then(|id| r.blocks.get(id - 1)).and_then(|b| b.stage);
            d.push(diff(
                DifferenceCode::Finding,
                stage,
                block,
                format!("{}: {}", f.code, f.message),
            ));
        }
    }
    if l.ratio_min.is_some() || l.ratio_max.is_some() {
        checks += 1;
        for b in &r.blocks {
            let ratio = b.stats.as_ref().and_then(|s| s.ratio).map(|s| s.mean);
            let Some(ratio) = ratio else {
                d.push(diff(
                    DifferenceCode::Ratio,
                    b.stage,
                    Some(b.id),
                    format!("{}: no ratio was measured", label(r, b.id)),
                ));
                continue;
            };
            if let Some(lo) = l.ratio_min
                && ratio < lo
            {
                d.push(diff(
                    DifferenceCode::Ratio,
                    b.stage,
                    Some(b.id),
                    format!("{}: mean ratio {ratio:.4} is below ratio_min {lo}", label(r, b.id)),
                ));
            }
            if let Some(hi) = l.ratio_max
                && ratio > hi
            {
                d.push(diff(
                    DifferenceCode::Ratio,
                    b.stage,
                    Some(b.id),
                    format!("{}: mean ratio {ratio:.4} is above ratio_max {hi}", label(r, b.id)),
                ));
            }
        }
    }
    Verification {
        schema: VERIFY_SCHEMA.to_owned(),
        schema_version: VERIFY_SCHEMA_VERSION,
        model: r.model.path.clone(),
        against: Against::Expect,
        file: file.to_owned(),
        blocks: r.blocks.len(),
        checks,
        differences: d,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn unknown_keys_placements_and_codes_are_refused() {
        assert!(read("blocks = 3\nblokcs = 4\n").unwrap_err().contains("blokcs"));
        assert!(read("placement = \"sideways\"\n").unwrap_err().contains("sideways"));
        assert!(read("[limits]\nforbid = [\"deadish\"]\n").unwrap_err().contains("deadish"));
        assert!(read("version = 2\n").unwrap_err().contains("version 2"));
        assert!(read("projection = [0]\n").is_err());
        assert!(read("[limits]\nratio_min = 2.0\nratio_max = 1.0\n").is_err());
        assert_eq!(read("").unwrap(), Expectation::default());
    }

    #[test]
    fn only_measured_limits_need_a_run() {
        assert!(!read("blocks = 2\n[limits]\nforbid = [\"static-dead\"]\n").unwrap().needs_run());
        assert!(read("[limits]\nforbid = [\"dead\"]\n").unwrap().needs_run());
        assert!(read("[limits]\nratio_max = 4.0\n").unwrap().needs_run());
    }
}
