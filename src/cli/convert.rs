//! From parsed arguments to the library's configurations: every check of a
//! flag's value that clap cannot make, and nothing else. Each group of
//! flags has one conversion, shared by every command that takes the group.

use std::collections::BTreeMap;

use anyhow::{Context, bail};

use super::args::{
    DistArg, HeadroomArgs, InfluenceArgs, InputArgs, Limits, PrecisionArg, RunArgs, ThresholdArgs,
};
use crate::findings::{FindingConfig, HeadroomConfig, HeadroomThresholds, InfluenceThresholds};
use crate::measure::InfluenceConfig;
use crate::open::OpenConfig;
use crate::parallel::Budget;
use crate::probe::inputs::{Dist, InputConfig};
use crate::vocab::{FindingCode, Precision};

impl Limits {
    pub(super) fn config(&self) -> OpenConfig {
        let mut c = OpenConfig::STANDARD;
        c.load.max_file_bytes = self.max_file_bytes;
        c.build.max_nodes = self.max_nodes;
        c.classify.max_inspect_bytes = self.max_inspect_bytes;
        c.lower.nchwc_block = self.nchwc_block.as_deref().and_then(|b| b.parse().ok());
        c
    }
}

impl InputArgs {
    pub(super) fn config(&self) -> anyhow::Result<InputConfig> {
        Ok(InputConfig {
            samples: self.samples,
            max_pass: self.pass_batch.or(InputConfig::STANDARD.max_pass),
            seed: self.seed,
            dist: match self.dist {
                DistArg::Normal => Dist::Normal,
                DistArg::Uniform => Dist::Uniform,
            },
            scale: self.scale,
            dims: parse_pairs(&self.dims, "--dim", |v| v.parse::<u64>().ok())?,
            shapes: parse_pairs(&self.shapes, "--input", parse_shape)?,
            fills: parse_pairs(&self.fills, "--fill", |v| v.parse::<f64>().ok())?,
            batch_axes: parse_pairs(&self.batch_axes, "--batch-axis", parse_axis)?,
            feed: self.feed.clone(),
            max_input_elements: self.max_input_elements,
        })
    }
}

impl RunArgs {
    pub(super) fn config(&self) -> anyhow::Result<Budget> {
        if self.threads == Some(0) {
            bail!("--threads must be at least 1");
        }
        let memory = self.memory_budget.as_deref().map(parse_size).transpose()?;
        Ok(Budget { threads: self.threads, memory })
    }
}

/// `--memory-budget`: bytes, or a number with `K`, `M`, `G` or `T` (powers
/// of 1024, an optional `B` or `iB` after it).
fn parse_size(text: &str) -> anyhow::Result<u64> {
    let bad =
        || anyhow::anyhow!("--memory-budget {text}: expected bytes, or a number with K, M, G or T");
    let t = text.trim();
    let lower = t.to_ascii_lowercase();
    let unit_len = if lower.ends_with("ib") {
        2
    } else if lower.ends_with('b') {
        1
    } else {
        0
    };
    let t = &t[..t.len() - unit_len];
    let (number, shift) = match t.char_indices().last() {
        Some((i, c)) if c.is_ascii_alphabetic() => {
            let shift = match c.to_ascii_uppercase() {
                'K' => 10,
                'M' => 20,
                'G' => 30,
                'T' => 40,
                _ => return Err(bad()),
            };
            (&t[..i], shift)
        }
        _ => (t, 0),
    };
    let value: f64 = number.trim().parse().map_err(|_| bad())?;
    let bytes = value * (1u64 << shift) as f64;
    if !(bytes.is_finite() && bytes >= 1.0 && bytes < u64::MAX as f64) {
        return Err(bad());
    }
    Ok(bytes as u64)
}

impl ThresholdArgs {
    pub(super) fn config(&self) -> FindingConfig {
        FindingConfig {
            dead_below: self.dead_below,
            dominant_above: self.dominant_above,
            dead_channels_above: self.dead_channels_above,
            depth_factor: self.depth_factor,
        }
    }
}

impl HeadroomArgs {
    pub(super) fn config(&self) -> anyhow::Result<HeadroomConfig> {
        let positive = |v: f64, flag: &str| -> anyhow::Result<f64> {
            if v.is_finite() && v > 0.0 {
                Ok(v)
            } else {
                bail!("{flag} {v}: expected a positive number")
            }
        };
        Ok(HeadroomConfig {
            target: self.precision.map(|p| match p {
                PrecisionArg::Fp16 => Precision::Fp16,
                PrecisionArg::Bf16 => Precision::Bf16,
                PrecisionArg::Int8 => Precision::Int8,
            }),
            thresholds: HeadroomThresholds {
                margin: positive(self.headroom_below, "--headroom-below")?,
                underflow_above: positive(self.underflow_above, "--underflow-above")?,
                outlier_ratio_above: positive(self.outlier_ratio_above, "--outlier-ratio-above")?,
            },
        })
    }
}

impl InfluenceArgs {
    /// `None` when neither a knockout nor the gain is asked for.
    pub(super) fn config(&self) -> anyhow::Result<Option<InfluenceConfig>> {
        let knockout = self.knockout || self.knockout_shortcuts;
        if self.blocks.is_some() && !knockout {
            bail!("--blocks selects blocks to knock out: add --knockout");
        }
        if !knockout && !self.gain {
            return Ok(None);
        }
        if !(self.gain_step.is_finite() && self.gain_step > 0.0 && self.gain_step < 1.0) {
            bail!("--gain-step {}: expected a number between 0 and 1", self.gain_step);
        }
        let blocks = self.blocks.as_deref().map(parse_blocks).transpose()?;
        Ok(Some(InfluenceConfig {
            knockout,
            shortcuts: self.knockout_shortcuts,
            blocks,
            gain_step: Some(self.gain_step),
            thresholds: InfluenceThresholds {
                low_impact_below: self.low_impact_below,
                gain_factor: self.gain_factor,
            },
        }))
    }
}

/// `1,4,6-9` → [1, 4, 6, 7, 8, 9].
fn parse_blocks(list: &str) -> anyhow::Result<Vec<usize>> {
    let mut out = Vec::new();
    for item in list.split(',').map(str::trim).filter(|s| !s.is_empty()) {
        let bad = || anyhow::anyhow!("--blocks: '{item}' is not a block id or a range like 3-7");
        match item.split_once('-') {
            Some((a, b)) => {
                let a: usize = a.trim().parse().map_err(|_| bad())?;
                let b: usize = b.trim().parse().map_err(|_| bad())?;
                if a == 0 || b < a {
                    return Err(bad());
                }
                out.extend(a..=b);
            }
            None => {
                let id: usize = item.parse().map_err(|_| bad())?;
                if id == 0 {
                    return Err(bad());
                }
                out.push(id);
            }
        }
    }
    if out.is_empty() {
        bail!("--blocks: no block ids in '{list}'");
    }
    Ok(out)
}

/// `--fail-on`: a comma-separated list of finding codes, or `any`.
pub(super) fn fail_on(list: Option<&str>) -> anyhow::Result<Vec<FindingCode>> {
    let Some(list) = list else { return Ok(Vec::new()) };
    let mut codes = Vec::new();
    for item in list.split(',').map(str::trim).filter(|s| !s.is_empty()) {
        if item == "any" {
            return Ok(FindingCode::ALL.to_vec());
        }
        match FindingCode::parse(item) {
            Some(c) => codes.push(c),
            None => {
                bail!(
                    "--fail-on: unknown finding '{item}' (known: {}, or any)",
                    FindingCode::known()
                )
            }
        }
    }
    Ok(codes)
}

fn parse_pairs<T>(
    items: &[String],
    flag: &str,
    value: impl Fn(&str) -> Option<T>,
) -> anyhow::Result<BTreeMap<String, T>> {
    let mut out = BTreeMap::new();
    for item in items {
        let (name, v) =
            item.split_once('=').with_context(|| format!("{flag} {item}: expected NAME=VALUE"))?;
        let parsed = value(v.trim())
            .with_context(|| format!("{flag} {item}: '{v}' is not a valid value"))?;
        out.insert(name.trim().to_owned(), parsed);
    }
    Ok(out)
}

/// A sample axis: a number, or `none` for an input without samples.
fn parse_axis(s: &str) -> Option<Option<usize>> {
    if s.eq_ignore_ascii_case("none") { Some(None) } else { s.parse::<usize>().ok().map(Some) }
}

fn parse_shape(s: &str) -> Option<Vec<u64>> {
    s.split(['x', 'X', ',']).map(|d| d.trim().parse::<u64>().ok().filter(|&d| d > 0)).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn memory_sizes_parse_with_binary_units() {
        assert_eq!(parse_size("4096").unwrap(), 4096);
        assert_eq!(parse_size("512M").unwrap(), 512 << 20);
        assert_eq!(parse_size("1.5G").unwrap(), 3 << 29);
        assert_eq!(parse_size("2GiB").unwrap(), 2 << 30);
        assert_eq!(parse_size("64kb").unwrap(), 64 << 10);
        for bad in ["", "0", "-1G", "12Q", "G", "nan"] {
            assert!(parse_size(bad).is_err(), "{bad}");
        }
    }
}
