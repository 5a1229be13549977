//! Models too large to hold in memory, for measuring what the scan reads:
//! their big weights live in an external data file that is created sparse,
//! so it takes no disk space and nothing has to be drawn or written.

use std::fs;
use std::io;
use std::path::{Path, PathBuf};

use prost::Message;

use crate::builder::{Attention, Dim, Form, Init, ModelBuilder};
use crate::zoo;
use shunt::proto::ModelProto;
use shunt::proto::tensor_proto::DataType;

/// A decoder-only (causal) transformer language model.
#[derive(Debug, Clone, PartialEq)]
pub struct DecoderConfig {
    /// Decoder layers, each an attention and a feed-forward sub-layer.
    pub layers: usize,
    /// Model width.
    pub hidden: i64,
    /// Attention heads.
    pub heads: i64,
    /// Feed-forward inner width.
    pub ffn: i64,
    /// Vocabulary size of the token embedding and of the output head.
    pub vocab: i64,
    /// Fixed sequence length T.
    pub seq_len: i64,
}

impl DecoderConfig {
    /// 32 layers at width 4096 with 32 heads, a 4x feed-forward (16384)
    /// and a 32000-token vocabulary: 6.7 billion float32 parameters, 26.9
    /// GB of weights. The layout of the common 7-billion-parameter decoders
    /// (recalled from memory, not checked against a paper: 32 layers, width
    /// 4096, 32 heads), with a plain GELU feed-forward.
    pub fn seven_billion() -> DecoderConfig {
        DecoderConfig { layers: 32, hidden: 4096, heads: 32, ffn: 16384, vocab: 32000, seq_len: 16 }
    }

    /// Float parameters in the weights kept outside the model file (the
    /// projections, the embedding and the output head).
    pub fn external_parameters(&self) -> u64 {
        let (d, f, v) = (self.hidden as u64, self.ffn as u64, self.vocab as u64);
        self.layers as u64 * (4 * d * d + 2 * d * f) + 2 * v * d
    }
}

/// Weights of at least this many elements go to the external file; the
/// small ones (biases, normalisation, rotary tables, mask) stay inline.
const EXTERNAL_MIN_ELEMENTS: usize = 1 << 16;

/// The model, with every large weight in the external file `location`, and
/// the size that file must have.
///
/// Token ids `input_ids [N, T]` (int64) are embedded (`Gather`), then each
/// layer `layer{l}` is pre-norm: `attn_add = x + Attention(LayerNorm(x))`
/// with rotary queries and keys and a static causal mask added to the
/// scores, and `ffn_add = x + FC2(GELU(FC1(LayerNorm(x))))`; a final
/// LayerNorm and a linear head give the logits. 2 blocks per layer, every
/// one pre-norm with an identity shortcut.
pub fn decoder(cfg: &DecoderConfig, location: &str) -> (ModelProto, u64) {
    let mut b = ModelBuilder::new("decoder", 20)
        .emit_value_info(true)
        .external_weights(location, EXTERNAL_MIN_ELEMENTS);
    let (d, t) = (cfg.hidden, cfg.seq_len);
    let ids = b.typed_input("input_ids", DataType::Int64, &[Dim::batch(), t.into()]);
    let mut x = b.embedding("embed.tokens", &ids, cfg.vocab, d);
    let causal: Vec<f32> = (0..t)
        .flat_map(|row| (0..t).map(move |col| if col > row { -10000.0 } else { 0.0 }))
        .collect();
    let mask = b.init("causal_mask", &[1, 1, t, t], causal);
    let rotary = Some(zoo::rotary_tables(&mut b, "rotary", t, d / cfg.heads));
    let spec = Attention { heads: cfg.heads, mask: Some(mask), rotary };
    for layer in 0..cfg.layers {
        let p = format!("layer{layer}");
        let h = b.layer_norm(&format!("{p}.attn_norm"), &x, Form::Fused);
        let a = b.attention(&format!("{p}.attn"), &h, &spec);
        x = b.add(&format!("{p}.attn_add"), &x, &a);
        let h = b.layer_norm(&format!("{p}.ffn_norm"), &x, Form::Fused);
        let y = b.linear(&format!("{p}.ffn.fc1"), &h, cfg.ffn, &Init::HeNormal, false);
        let y = b.gelu(&format!("{p}.ffn.gelu"), &y, Form::Fused);
        let init = Init::Normal(1.0 / (cfg.ffn as f32).sqrt());
        let y = b.linear(&format!("{p}.ffn.fc2"), &y, d, &init, false);
        x = b.add(&format!("{p}.ffn_add"), &x, &y);
    }
    let x = b.layer_norm("final_norm", &x, Form::Fused);
    let logits = b.linear("lm_head", &x, cfg.vocab, &Init::Normal(0.02), false);
    b.output(&logits);
    let bytes = b.external_bytes();
    (b.finish(), bytes)
}

/// Writes `{stem}.onnx` and its weight file `{stem}.weights` into `dir`,
/// the weight file sparse (its length set, nothing written); returns the
/// model's path and the weight file's length.
pub fn write_decoder(dir: &Path, stem: &str, cfg: &DecoderConfig) -> io::Result<(PathBuf, u64)> {
    let location = format!("{stem}.weights");
    let (model, bytes) = decoder(cfg, &location);
    let weights = fs::File::create(dir.join(&location))?;
    weights.set_len(bytes)?;
    let path = dir.join(format!("{stem}.onnx"));
    fs::write(&path, model.encode_to_vec())?;
    Ok((path, bytes))
}
