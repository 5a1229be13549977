//! Findings: what the measurements and the structure say is worth a look.
//! Every threshold is relative (a ratio of magnitudes, a fraction, a growth
//! factor): at random initialisation some networks carry signals of 1e-7 and
//! less, so no absolute magnitude may decide that a branch is zero.
//!
//! **Invariant:** findings are a pure function of the per-block summaries and
//! the configuration; they never look at tensors or graphs.

use crate::vocab::{FindingCode, Precision};

/// Thresholds, all relative.
#[derive(Debug, Clone)]
pub struct FindingConfig {
    /// `dead` when RMS(branch)/RMS(shortcut) is below this.
    pub dead_below: f64,
    /// `dominant` when RMS(branch)/RMS(shortcut) is above this.
    pub dominant_above: f64,
    /// `dead-channels` when more than this fraction of channels has a branch
    /// RMS below `dead_below` times the shortcut's RMS in that channel.
    pub dead_channels_above: f64,
    /// `exploding-signal` / `vanishing-signal` when the output RMS of the
    /// last block is more than this factor above / below the first block's.
    pub depth_factor: f64,
}

impl FindingConfig {
    /// The documented defaults (docs/statistics.md), the only place they are
    /// written: `dead` below 0.01, `dominant` above 10, `dead-channels` above
    /// half the channels, a depth factor of 100.
    pub const STANDARD: FindingConfig = FindingConfig {
        dead_below: 0.01,
        dominant_above: 10.0,
        dead_channels_above: 0.5,
        depth_factor: 100.0,
    };
}

/// What findings need to know of one block (block ids are 1-based).
#[derive(Debug, Clone, Default)]
pub struct BlockFacts {
    /// Mean over samples of RMS(branch)/RMS(shortcut), if measured.
    pub ratio: Option<f64>,
    /// Fraction of dead channels, if measured.
    pub dead_channel_fraction: Option<f64>,
    /// Channels measured.
    pub channels: Option<usize>,
    /// NaN plus infinite values seen.
    pub non_finite: u64,
    /// Mean output RMS, if measured.
    pub output_rms: Option<f64>,
    /// Why the branch is dead by construction, if it is.
    pub static_dead: Option<String>,
    /// Nesting depth (0 for top-level blocks).
    pub depth: usize,
    /// The graph the block is in: 0 for the main graph, another number for
    /// each body of a control-flow node. The signal across depth is judged
    /// within one graph (an `If`'s two branches are alternatives, not a
    /// sequence).
    pub scope: usize,
}

/// One finding.
#[derive(Debug, Clone, PartialEq)]
pub struct Finding {
    /// What kind.
    pub code: FindingCode,
    /// The block it is about (1-based), if any.
    pub block: Option<usize>,
    /// What was seen, with the numbers.
    pub message: String,
}

/// A bare run: learned layers between blocks `after` and `before` (1-based).
#[derive(Debug, Clone)]
pub struct BareRunFacts {
    /// Block before the run.
    pub after: usize,
    /// Block after the run.
    pub before: usize,
    /// Names of its learned layers.
    pub layers: Vec<String>,
}

/// All findings for a model, in block order, structure first.
pub fn findings(
    blocks: &[BlockFacts],
    runs: &[BareRunFacts],
    config: &FindingConfig,
) -> Vec<Finding> {
    let mut out = Vec::new();
    for r in runs {
        out.push(Finding {
            code: FindingCode::LostShortcut,
            block: Some(r.before),
            message: format!(
                "{} learned layer(s) between blocks #{} and #{} of one stage are spanned by no shortcut ({})",
                r.layers.len(),
                r.after,
                r.before,
                r.layers.join(", ")
            ),
        });
    }
    for (i, b) in blocks.iter().enumerate() {
        let id = i + 1;
        if let Some(reason) = &b.static_dead {
            out.push(Finding {
                code: FindingCode::StaticDead,
                block: Some(id),
                message: format!("the branch cannot depend on its input: {reason}"),
            });
        }
        if let Some(r) = b.ratio {
            if r < config.dead_below {
                out.push(Finding {
                    code: FindingCode::Dead,
                    block: Some(id),
                    message: format!(
                        "branch/shortcut RMS ratio {r:.3e} is below {}",
                        config.dead_below
                    ),
                });
            } else if r > config.dominant_above {
                out.push(Finding {
                    code: FindingCode::Dominant,
                    block: Some(id),
                    message: format!(
                        "branch/shortcut RMS ratio {r:.3e} is above {}",
                        config.dominant_above
                    ),
                });
            }
        }
        if let (Some(f), Some(c)) = (b.dead_channel_fraction, b.channels) {
            let already_dead = b.ratio.is_some_and(|r| r < config.dead_below);
            if f > config.dead_channels_above && !already_dead {
                out.push(Finding {
                    code: FindingCode::DeadChannels,
                    block: Some(id),
                    message: format!(
                        "{:.0}% of {c} channels have a branch below {} of the shortcut",
                        f * 100.0,
                        config.dead_below
                    ),
                });
            }
        }
        if b.non_finite > 0 {
            out.push(Finding {
                code: FindingCode::NonFinite,
                block: Some(id),
                message: format!("{} NaN or infinite values in the block's tensors", b.non_finite),
            });
        }
    }
    let mut scopes: Vec<usize> = blocks.iter().map(|b| b.scope).collect();
    scopes.sort_unstable();
    scopes.dedup();
    for scope in scopes {
        let top: Vec<(usize, f64)> = blocks
            .iter()
            .enumerate()
            .filter(|(_, b)| b.depth == 0 && b.scope == scope)
            .filter_map(|(i, b)| {
                b.output_rms.filter(|v| v.is_finite() && *v > 0.0).map(|v| (i + 1, v))
            })
            .collect();
        if let Some(f) = depth_finding(&top, config) {
            out.push(f);
        }
    }
    out
}

/// `exploding-signal` / `vanishing-signal` from the first to the last of
/// one graph's top-level blocks `(id, output RMS)`.
fn depth_finding(top: &[(usize, f64)], config: &FindingConfig) -> Option<Finding> {
    let (&(first_id, first), &(last_id, last)) = (top.first()?, top.last()?);
    if top.len() < 2 {
        return None;
    }
    let growth = last / first;
    if growth > config.depth_factor {
        Some(Finding {
            code: FindingCode::ExplodingSignal,
            block: None,
            message: format!(
                "output RMS grows {growth:.3e}-fold from block #{first_id} to block #{last_id} (limit {})",
                config.depth_factor
            ),
        })
    } else if growth < 1.0 / config.depth_factor {
        Some(Finding {
            code: FindingCode::VanishingSignal,
            block: None,
            message: format!(
                "output RMS shrinks to {growth:.3e} of its value from block #{first_id} to block #{last_id} (limit 1/{})",
                config.depth_factor
            ),
        })
    } else {
        None
    }
}

/// Thresholds of the knockout and gain findings, both relative.
#[derive(Debug, Clone)]
pub struct InfluenceThresholds {
    /// `low-impact` when the knockout changes the outputs by less than this
    /// (relative L2).
    pub low_impact_below: f64,
    /// `exploding-gain` / `vanishing-gain` when the end-to-end gain up to a
    /// top-level block is above this / below its inverse.
    pub gain_factor: f64,
}

impl InfluenceThresholds {
    /// The documented defaults (docs/statistics.md): `low-impact` below 0.01,
    /// a gain factor of 100.
    pub const STANDARD: InfluenceThresholds =
        InfluenceThresholds { low_impact_below: 0.01, gain_factor: 100.0 };
}

/// What the knockout and gain findings need to know of one block.
#[derive(Debug, Clone, Default)]
pub struct InfluenceFacts {
    /// Relative change of the outputs with the branch knocked out.
    pub knockout: Option<f64>,
    /// End-to-end gain up to this block (top-level blocks only).
    pub gain_to_here: Option<f64>,
}

/// `low-impact` per knocked-out block, then at most one of `exploding-gain`
/// and `vanishing-gain`, placed at the first block whose end-to-end gain
/// crosses the factor.
pub fn influence(blocks: &[InfluenceFacts], t: &InfluenceThresholds) -> Vec<Finding> {
    let mut out = Vec::new();
    for (i, b) in blocks.iter().enumerate() {
        if let Some(k) = b.knockout
            && k < t.low_impact_below
        {
            out.push(Finding {
                code: FindingCode::LowImpact,
                block: Some(i + 1),
                message: format!(
                    "knocking out the branch changes the outputs by {k:.3e} relative (below {}): a candidate for pruning",
                    t.low_impact_below
                ),
            });
        }
    }
    let gains: Vec<(usize, f64)> = blocks
        .iter()
        .enumerate()
        .filter_map(|(i, b)| b.gain_to_here.filter(|g| g.is_finite()).map(|g| (i + 1, g)))
        .collect();
    let last = gains.last().map(|&(_, g)| g);
    if let Some(&(id, g)) = gains.iter().find(|(_, g)| *g > t.gain_factor) {
        out.push(Finding {
            code: FindingCode::ExplodingGain,
            block: Some(id),
            message: format!(
                "a small input change grows {g:.3e}-fold from the first block to this one (limit {}); {:.3e}-fold at the last block",
                t.gain_factor,
                last.unwrap_or(g)
            ),
        });
    } else if let Some(&(id, g)) = gains.iter().find(|(_, g)| *g < 1.0 / t.gain_factor) {
        out.push(Finding {
            code: FindingCode::VanishingGain,
            block: Some(id),
            message: format!(
                "a small input change shrinks to {g:.3e} of its size from the first block to this one (limit 1/{}); {:.3e} at the last block",
                t.gain_factor,
                last.unwrap_or(g)
            ),
        });
    }
    out
}

/// The limits of a number format.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FormatLimits {
    /// Largest finite value (`None` for int8, whose scale follows the range).
    pub largest: Option<f64>,
    /// Smallest normal magnitude.
    pub smallest_normal: Option<f64>,
    /// Smallest subnormal magnitude.
    pub smallest_subnormal: Option<f64>,
    /// Magnitude levels of a symmetric per-tensor scale (int8: 127).
    pub levels: Option<u32>,
}

impl FormatLimits {
    /// IEEE 754-2008 binary16: (2 − 2^-10)·2^15 = 65504, 2^-14, 2^-24;
    /// bfloat16 (8 exponent and 8 significand bits): (2 − 2^-7)·2^127, 2^-126,
    /// 2^-133; int8 with a symmetric scale: 127 levels. The tests check the
    /// floats against numpy's `finfo` (ml_dtypes' for bfloat16).
    pub fn of(p: Precision) -> FormatLimits {
        match p {
            Precision::Fp16 => FormatLimits {
                largest: Some((2.0 - 2f64.powi(-10)) * 2f64.powi(15)),
                smallest_normal: Some(2f64.powi(-14)),
                smallest_subnormal: Some(2f64.powi(-24)),
                levels: None,
            },
            Precision::Bf16 => FormatLimits {
                largest: Some((2.0 - 2f64.powi(-7)) * 2f64.powi(127)),
                smallest_normal: Some(2f64.powi(-126)),
                smallest_subnormal: Some(2f64.powi(-133)),
                levels: None,
            },
            Precision::Int8 => FormatLimits {
                largest: None,
                smallest_normal: None,
                smallest_subnormal: None,
                levels: Some(127),
            },
        }
    }
}

/// Thresholds of the headroom findings, all relative.
#[derive(Debug, Clone)]
pub struct HeadroomThresholds {
    /// `overflow-risk` when the format's largest value over a block's
    /// largest |x| is below this factor.
    pub margin: f64,
    /// `underflow-risk` when more than this fraction of a merge output
    /// would be zero or subnormal in the format.
    pub underflow_above: f64,
    /// `int8-outlier-channels` when the largest channel's max |x| is more
    /// than this factor above the median channel's.
    pub outlier_ratio_above: f64,
}

impl HeadroomThresholds {
    /// The documented defaults (docs/statistics.md), our choice: a margin of
    /// 16 (4 bits of exponent range, since real inputs may reach further
    /// than the audit's), underflow above 1% of the values, outlier channels
    /// above 16 (the median channel keeps fewer than 8 of 127 levels).
    pub const STANDARD: HeadroomThresholds =
        HeadroomThresholds { margin: 16.0, underflow_above: 0.01, outlier_ratio_above: 16.0 };
}

/// What `--precision` asks for: a target format (or none: a half-precision
/// model's own), and the thresholds of its findings.
#[derive(Debug, Clone)]
pub struct HeadroomConfig {
    /// The format named by `--precision`; `None`: the model's own half
    /// type, if it has one, else no headroom section.
    pub target: Option<Precision>,
    /// Thresholds of the headroom findings.
    pub thresholds: HeadroomThresholds,
}

impl HeadroomConfig {
    /// No target named, the standard thresholds.
    pub const STANDARD: HeadroomConfig =
        HeadroomConfig { target: None, thresholds: HeadroomThresholds::STANDARD };
}

/// What the headroom findings need to know of one block.
#[derive(Debug, Clone, Default)]
pub struct HeadroomFacts {
    /// The format's largest value over the block's largest |x| (0 when a
    /// value is not finite), if measured.
    pub headroom: Option<f64>,
    /// The block's largest |x| (infinite when a value is), if measured.
    pub max_abs: Option<f64>,
    /// Fraction of values zero or subnormal in the format, if measured.
    pub underflow: Option<f64>,
    /// Largest channel's max |x| over the median channel's, if measured.
    pub channel_max_ratio: Option<f64>,
}

/// `overflow` (the largest |x| is beyond the format's largest value) or
/// else `overflow-risk` (headroom below the margin), for fp16
/// `underflow-risk`, and for int8 `int8-outlier-channels`, per block.
pub fn headroom(
    blocks: &[HeadroomFacts],
    format: Precision,
    t: &HeadroomThresholds,
) -> Vec<Finding> {
    let limits = FormatLimits::of(format);
    let mut out = Vec::new();
    for (i, b) in blocks.iter().enumerate() {
        let block = Some(i + 1);
        if let (Some(h), Some(largest)) = (b.headroom, limits.largest) {
            let max = b.max_abs.map_or("a non-finite value".to_owned(), |m| {
                if m.is_finite() { format!("{m:.4e}") } else { "a non-finite value".to_owned() }
            });
            if h < 1.0 {
                out.push(Finding {
                    code: FindingCode::Overflow,
                    block,
                    message: format!(
                        "largest |x| {max} is beyond {format}'s largest finite value {largest}: it would be infinite"
                    ),
                });
            } else if h < t.margin {
                out.push(Finding {
                    code: FindingCode::OverflowRisk,
                    block,
                    message: format!(
                        "largest |x| {max} leaves a headroom of {h:.3e} ({:.1} bits) below {format}'s largest value, under the margin {}",
                        h.log2(),
                        t.margin
                    ),
                });
            }
        }
        // Only float16 narrows the exponent range below float32's.
        if let Some(u) = b.underflow.filter(|_| format == Precision::Fp16)
            && u > t.underflow_above
        {
            out.push(Finding {
                code: FindingCode::UnderflowRisk,
                block,
                message: format!(
                    "{:.2}% of the merge output would be zero or subnormal in {format} (above {}%)",
                    u * 100.0,
                    t.underflow_above * 100.0
                ),
            });
        }
        if let (Some(levels), Some(r)) = (limits.levels, b.channel_max_ratio)
            && r > t.outlier_ratio_above
        {
            out.push(Finding {
                code: FindingCode::Int8OutlierChannels,
                block,
                message: format!(
                    "the largest channel's max |x| is {r:.3e} times the median channel's (above {}): a per-tensor int8 scale leaves the median channel {:.1} of {levels} levels",
                    t.outlier_ratio_above,
                    f64::from(levels) / r
                ),
            });
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn config() -> FindingConfig {
        FindingConfig {
            dead_below: 0.01,
            dominant_above: 10.0,
            dead_channels_above: 0.5,
            depth_factor: 100.0,
        }
    }

    #[test]
    fn thresholds_are_relative_and_strict() {
        let blocks = vec![
            BlockFacts { ratio: Some(1e-7), output_rms: Some(1e-9), ..Default::default() },
            BlockFacts { ratio: Some(0.01), output_rms: Some(1e-9), ..Default::default() },
            BlockFacts { ratio: Some(40.0), output_rms: Some(1e-9), ..Default::default() },
        ];
        let f = findings(&blocks, &[], &config());
        let codes: Vec<(FindingCode, Option<usize>)> =
            f.iter().map(|f| (f.code, f.block)).collect();
        // Tiny absolute magnitudes decide nothing; only the ratios do.
        assert_eq!(codes, vec![(FindingCode::Dead, Some(1)), (FindingCode::Dominant, Some(3))]);
    }

    #[test]
    fn depth_profile() {
        let mut blocks: Vec<BlockFacts> = (0..5)
            .map(|i| BlockFacts {
                ratio: Some(1.0),
                output_rms: Some(10f64.powi(i)),
                ..Default::default()
            })
            .collect();
        let f = findings(&blocks, &[], &config());
        assert_eq!(
            f.iter().map(|f| f.code).collect::<Vec<_>>(),
            vec![FindingCode::ExplodingSignal]
        );
        blocks.reverse();
        let f = findings(&blocks, &[], &config());
        assert_eq!(
            f.iter().map(|f| f.code).collect::<Vec<_>>(),
            vec![FindingCode::VanishingSignal]
        );
    }

    #[test]
    fn headroom_thresholds() {
        let t = HeadroomThresholds::STANDARD;
        let fp16 = 65504.0;
        let facts = [
            HeadroomFacts {
                headroom: Some(fp16 / 100.0),
                max_abs: Some(100.0),
                ..Default::default()
            },
            HeadroomFacts {
                headroom: Some(fp16 / 5000.0),
                max_abs: Some(5000.0),
                ..Default::default()
            },
            HeadroomFacts {
                headroom: Some(0.0),
                max_abs: Some(f64::INFINITY),
                underflow: Some(0.02),
                channel_max_ratio: Some(200.0),
            },
        ];
        let codes = |f: Vec<Finding>| f.into_iter().map(|f| (f.code, f.block)).collect::<Vec<_>>();
        assert_eq!(
            codes(headroom(&facts, Precision::Fp16, &t)),
            vec![
                (FindingCode::OverflowRisk, Some(2)),
                (FindingCode::Overflow, Some(3)),
                (FindingCode::UnderflowRisk, Some(3))
            ]
        );
        // int8 has no overflow (its scale follows the range); outliers count.
        assert_eq!(
            codes(headroom(&facts, Precision::Int8, &t)),
            vec![(FindingCode::Int8OutlierChannels, Some(3))]
        );
        let l = FormatLimits::of(Precision::Fp16);
        assert_eq!(l.largest, Some(65504.0));
    }

    #[test]
    fn influence_thresholds() {
        let t = InfluenceThresholds { low_impact_below: 0.01, gain_factor: 100.0 };
        let facts = [
            InfluenceFacts { knockout: Some(0.0), gain_to_here: Some(2.0) },
            InfluenceFacts { knockout: Some(0.01), gain_to_here: Some(150.0) },
            InfluenceFacts { knockout: None, gain_to_here: Some(400.0) },
        ];
        let f = influence(&facts, &t);
        let codes: Vec<(FindingCode, Option<usize>)> =
            f.iter().map(|f| (f.code, f.block)).collect();
        // Strict: 0.01 is not below 0.01; the explosion is placed where it first crosses.
        assert_eq!(
            codes,
            vec![(FindingCode::LowImpact, Some(1)), (FindingCode::ExplodingGain, Some(2))]
        );
        let facts = [
            InfluenceFacts { knockout: None, gain_to_here: Some(0.5) },
            InfluenceFacts { knockout: None, gain_to_here: Some(1e-3) },
        ];
        let f = influence(&facts, &t);
        assert_eq!(
            f.iter().map(|f| (f.code, f.block)).collect::<Vec<_>>(),
            vec![(FindingCode::VanishingGain, Some(2))]
        );
    }
}
