//! The cases of issue 14 (range statistics, headroom for a target format),
//! committed under `fixtures/precision/`, each with the block where its range
//! crosses a limit and why, listed in `fixtures/precision/MANIFEST.txt`.
//!
//! Both cases use a planted scale rather than trained weights, so the growth
//! along depth is analytic: a branch that is a 1x1 convolution with weight
//! `d·I` makes the merge output `(1 + d)` times the block input, channel by
//! channel, exactly (up to one float32 rounding of each product and sum).

use std::fmt::Write as _;
use std::io;
use std::path::{Path, PathBuf};

use prost::Message;

use crate::builder::{Conv, Dim, Init, ModelBuilder};
use shunt::proto::ModelProto;

/// One committed case.
#[derive(Debug, Clone)]
pub struct Case {
    /// Path under `fixtures/`, with `/` separators.
    pub path: &'static str,
    /// The model.
    pub model: ModelProto,
    /// What it isolates.
    pub isolates: &'static str,
    /// Residual blocks.
    pub blocks: usize,
    /// The expected range along depth, in words, with the block where a
    /// limit is crossed.
    pub expect: &'static str,
    /// Where the expectation comes from.
    pub source: &'static str,
}

/// Blocks of the overflow stack.
pub const OVERFLOW_BLOCKS: usize = 6;
/// Channels of the overflow stack.
pub const OVERFLOW_CHANNELS: i64 = 4;
/// The planted branch scale of the overflow stack: each block multiplies the
/// residual stream by `1 + OVERFLOW_SCALE` = 8.
pub const OVERFLOW_SCALE: f32 = 7.0;
/// The first block whose merge output exceeds float16's largest finite value
/// 65504 when the input's largest |x| lies in (2, 16): block `k`'s largest
/// |x| is 8^k times the input's, 8^4·16 = 65536 and 8^5·2 = 65536. Eight
/// standard normal samples of 4x8x8 values (2048 values) have their largest
/// |x| near 3.5, far inside the interval.
pub const OVERFLOW_BLOCK: usize = 5;

/// Channels of the outlier-channel stack.
pub const OUTLIER_CHANNELS: i64 = 8;
/// The block whose branch plants one channel 201 times the others' growth.
pub const OUTLIER_BLOCK: usize = 2;

/// Every case, in manifest order.
pub fn all() -> Vec<Case> {
    vec![
        Case {
            path: "precision/overflow_stack.onnx",
            model: overflow_stack(),
            isolates: "6 unactivated blocks x + conv1x1(x) with the weight 7·I: the residual stream grows 8-fold per block",
            blocks: OVERFLOW_BLOCKS,
            expect: "largest |x| of block k = 8^k times the input's; float16 overflows (> 65504) first at block 5 for an input whose largest |x| is in (2, 16); headroom below 16 at block 4",
            source: "analytic (planted scale); float16 limits IEEE 754-2008 binary16",
        },
        Case {
            path: "precision/outlier_channel.onnx",
            model: outlier_channel(),
            isolates: "3 unactivated blocks x + conv1x1(x) with diagonal weights 0.5, except channel 0 of block 2 at 200",
            blocks: 3,
            expect: "channel 0 grows 201/1.5 = 134 times more than the others at block 2: largest channel max / median channel max about 134 (times the input's own channel spread) from block 2 on; near 1 at block 1",
            source: "analytic (planted scale)",
        },
    ]
}

/// A stack of residual blocks `x + conv1x1(x)` whose branch weights are
/// `diag(scales[k])`.
fn diagonal_stack(name: &str, channels: i64, scales: &[Vec<f32>]) -> ModelProto {
    let mut b = ModelBuilder::new(name, 17).emit_value_info(true);
    let mut x = b.input("x", &[Dim::batch(), channels.into(), 8.into(), 8.into()]);
    for (k, d) in scales.iter().enumerate() {
        let n = channels as usize;
        let mut w = vec![0.0f32; n * n];
        for (c, &s) in d.iter().enumerate() {
            w[c * n + c] = s;
        }
        let conv = Conv::new(channels, 1).weights(Init::Values(w));
        let branch = b.conv(&format!("block{}.conv", k + 1), &x, &conv);
        x = b.add(&format!("block{}.add", k + 1), &x, &branch);
    }
    b.output(&x);
    b.finish()
}

/// [`OVERFLOW_BLOCKS`] blocks, each multiplying the stream by 8.
pub fn overflow_stack() -> ModelProto {
    let d = vec![OVERFLOW_SCALE; OVERFLOW_CHANNELS as usize];
    diagonal_stack("overflow_stack", OVERFLOW_CHANNELS, &vec![d; OVERFLOW_BLOCKS])
}

/// Three blocks; block [`OUTLIER_BLOCK`] scales channel 0 by 201.
pub fn outlier_channel() -> ModelProto {
    let n = OUTLIER_CHANNELS as usize;
    let plain = vec![0.5f32; n];
    let mut outlier = plain.clone();
    outlier[0] = 200.0;
    diagonal_stack("outlier_channel", OUTLIER_CHANNELS, &[plain.clone(), outlier, plain])
}

/// The bytes of a case as written.
pub fn encode(case: &Case) -> Vec<u8> {
    case.model.encode_to_vec()
}

/// The text of `fixtures/precision/MANIFEST.txt` for `cases`.
pub fn manifest(cases: &[Case]) -> String {
    let mut out = String::new();
    out.push_str(concat!(
        "# shunt precision cases (issue 14), written by `cargo run --release --example fixtures`;\n",
        "# do not edit by hand. Columns: file | what it isolates | blocks | expected range | source.\n",
    ));
    for case in cases {
        let _ = writeln!(
            out,
            "{} | {} | blocks={} | {} | {}",
            case.path, case.isolates, case.blocks, case.expect, case.source
        );
    }
    out
}

/// Writes every case and the manifest under `dir` (the `fixtures/` folder);
/// returns the paths written.
pub fn write_all(dir: &Path) -> io::Result<Vec<PathBuf>> {
    let cases = all();
    let mut written = Vec::new();
    for case in &cases {
        let path = dir.join(case.path);
        if let Some(parent) = path.parent() {
            std::fs::create_dir_all(parent)?;
        }
        std::fs::write(&path, encode(case))?;
        written.push(path);
    }
    let path = dir.join("precision/MANIFEST.txt");
    std::fs::write(&path, manifest(&cases))?;
    written.push(path);
    Ok(written)
}
