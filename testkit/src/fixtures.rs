//! The models committed under `fixtures/`, each with what it isolates and
//! the census an audit of it should give.
//!
//! `cargo run --release --example fixtures` writes them with [`write_all`];
//! the integration tests rebuild them with [`all`] and compare bytes, so
//! this list is the single source of both.

use std::fmt::Write as _;
use std::io;
use std::path::{Path, PathBuf};

use prost::Message;

use crate::builder::Form;
use crate::zoo::{self, ImageSpec};
use shunt::proto::ModelProto;

/// What an audit of a fixture should find.
///
/// Every additive block is counted once by shortcut kind and once by
/// placement. `decoys` counts the `Add`/`Sum` nodes whose operands all
/// depend on a graph input but that are not residual merges (attention
/// masks, rotary embeddings, gates, an add of a tensor to itself, a feature
/// pyramid's top-down path); adds of a static operand (biases, positional
/// tables, constants) are not counted anywhere.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Default)]
pub struct Census {
    /// Blocks whose shortcut is the fork tensor itself.
    pub identity: u32,
    /// Blocks whose shortcut holds a convolution (with or without BN or pooling).
    pub projection: u32,
    /// Blocks whose shortcut only resamples (strided `Slice`, zero `Pad`).
    pub resampled: u32,
    /// Blocks with an activation right after the add [R3].
    pub post_activation: u32,
    /// Blocks whose branch starts with BN -> ReLU (or ReLU) and with nothing after the add [P1].
    pub pre_activation: u32,
    /// Blocks whose branch starts with a LayerNorm [T2].
    pub pre_norm: u32,
    /// Blocks followed by a LayerNorm [T1].
    pub post_norm: u32,
    /// Blocks with neither an activation after the add nor a norm or
    /// activation opening the branch.
    pub unactivated: u32,
    /// `Concat` nodes that join an earlier map to a later one.
    pub concat_skips: u32,
    /// Deepest nesting of skips (additive or concatenative) inside each
    /// other: 0 without skips, 1 for a plain stack; `None` when not pinned.
    pub nesting: Option<u32>,
    /// Input-dependent `Add`/`Sum` nodes that are not residual merges.
    pub decoys: u32,
}

impl Census {
    /// The number of additive residual blocks.
    pub fn additive(&self) -> u32 {
        self.identity + self.projection + self.resampled
    }
}

/// One committed fixture.
#[derive(Debug, Clone)]
pub struct Fixture {
    /// Path under `fixtures/`, with `/` separators.
    pub path: &'static str,
    /// The model.
    pub model: ModelProto,
    /// What the case isolates, in a few words.
    pub isolates: &'static str,
    /// What an audit should find.
    pub census: Census,
    /// The check-values ids the layout follows (`-` when none).
    pub source: &'static str,
}

/// Every committed fixture, in manifest order.
pub fn all() -> Vec<Fixture> {
    let stack = Some(1);
    let post = |identity, projection, resampled| Census {
        identity,
        projection,
        resampled,
        post_activation: identity + projection + resampled,
        nesting: stack,
        ..Census::default()
    };
    let plain = |decoys| Census { nesting: Some(0), decoys, ..Census::default() };
    let small = ImageSpec::rgb(32);
    let r18 = zoo::ResNetConfig { width_divisor: 32, ..zoo::ResNetConfig::resnet18() };
    let r50 = zoo::ResNetConfig { width_divisor: 32, ..zoo::ResNetConfig::resnet50() };
    let text = zoo::TransformerConfig::tiny();
    let fixture =
        |path, model, isolates, census, source| Fixture { path, model, isolates, census, source };
    vec![
        fixture(
            "resnet18_b.onnx",
            zoo::resnet(&r18),
            "ImageNet ResNet-18 layout, option B projections where the shape changes",
            post(5, 3, 0),
            "R1 R2 R3",
        ),
        fixture(
            "resnet18_a.onnx",
            zoo::resnet(&zoo::ResNetConfig { shortcut: zoo::Shortcut::ZeroPad, ..r18.clone() }),
            "option A shortcuts: strided Slice + zero channel Pad where the shape changes",
            post(5, 0, 3),
            "R1 R2 R3",
        ),
        fixture(
            "resnet18_c.onnx",
            zoo::resnet(&zoo::ResNetConfig { shortcut: zoo::Shortcut::ProjectAll, ..r18.clone() }),
            "option C: a 1x1 conv + BN projection on every shortcut",
            post(0, 8, 0),
            "R1 R2 R3",
        ),
        fixture(
            "resnet18_folded.onnx",
            zoo::resnet(&zoo::ResNetConfig { fold_bn: true, ..r18.clone() }),
            "BN folded into conv weights and bias, as exporters leave it (no BatchNormalization)",
            post(5, 3, 0),
            "R1 R2 R3",
        ),
        fixture(
            "resnet50_b.onnx",
            zoo::resnet(&r50),
            "bottleneck blocks; the first block of stage 1 projects at stride 1 (64 -> 256, divided)",
            post(12, 4, 0),
            "R1 R2 R3",
        ),
        fixture(
            "resnet50_d.onnx",
            zoo::resnet_d(&r50),
            "ResNet-D shortcuts: AvgPool 2x2 s2 then 1x1 conv s1 + BN (stage 1: conv only)",
            // Pooling then a projection is a resampled shortcut (stages 2-4).
            post(12, 1, 3),
            "Z2 R1 R3",
        ),
        fixture(
            "cifar_resnet14_a.onnx",
            zoo::cifar_resnet(&zoo::CifarResNetConfig {
                n: 2,
                shortcut: zoo::Shortcut::ZeroPad,
                width_divisor: 4,
                image: small.clone(),
            }),
            "CIFAR 6n+2 layout, n = 2, widths 16/32/64 divided by 4, option A",
            post(4, 0, 2),
            "R4 R2 R3",
        ),
        fixture(
            "preact_resnet14.onnx",
            zoo::preact_resnet(&preact(2, 3, false, true)),
            "pre-activation basic units, nothing after the add, final BN + ReLU",
            Census {
                identity: 4,
                projection: 2,
                pre_activation: 6,
                nesting: stack,
                ..Census::default()
            },
            "P1",
        ),
        fixture(
            "preact_bottleneck20.onnx",
            zoo::preact_resnet(&preact(2, 3, true, true)),
            "pre-activation bottleneck units, 9n+2 layout with n = 2",
            Census {
                identity: 3,
                projection: 3,
                pre_activation: 6,
                nesting: stack,
                ..Census::default()
            },
            "P1 P2",
        ),
        fixture(
            "preact_nonorm.onnx",
            zoo::preact_resnet(&preact(4, 1, false, false)),
            "pre-activation units without normalisation (ReLU -> conv -> ReLU -> conv), He init",
            Census { identity: 4, pre_activation: 4, nesting: stack, ..Census::default() },
            "P1 S1",
        ),
        fixture(
            "mobilenet_v2.onnx",
            zoo::mobilenet_v2(&zoo::MobileNetV2Config { width_divisor: 8, image: small.clone() }),
            "inverted residuals: linear projection, no activation after the add, depthwise convs",
            Census { identity: 10, unactivated: 10, nesting: stack, ..Census::default() },
            "M1",
        ),
        fixture(
            "efficientnet_b0_like.onnx",
            zoo::efficientnet_b0_like(&zoo::EfficientNetConfig {
                width_divisor: 16,
                image: small.clone(),
            }),
            "MBConv with a squeeze-and-excitation Mul inside the branch, swish activations",
            Census { identity: 9, unactivated: 9, nesting: stack, ..Census::default() },
            "E1",
        ),
        fixture(
            "densenet_like.onnx",
            zoo::densenet_like(&zoo::DenseNetConfig {
                block_layers: vec![6, 12, 24, 16],
                growth: 2,
                image: small.clone(),
            }),
            "dense blocks of 6/12/24/16 layers at growth 2 joined by Concat: no additive merge",
            Census { concat_skips: 58, ..Census::default() },
            "D1",
        ),
        fixture(
            "unet.onnx",
            zoo::unet(&zoo::UNetConfig {
                depth: 4,
                base_width: 2,
                image: ImageSpec { channels: 1, classes: 2, ..small.clone() },
            }),
            "4 concatenative long skips, nested, between contracting and expanding paths",
            Census { concat_skips: 4, nesting: Some(4), ..Census::default() },
            "U1",
        ),
        fixture(
            "fpn_topdown.onnx",
            zoo::fpn_topdown(&zoo::FpnConfig { width: 4, pyramid_width: 8, image: small.clone() }),
            "top-down Adds of a lateral 1x1 conv and an upsampled coarser level; one real block in c4",
            // Each top-down Add forks at its level's backbone map: the lateral
            // 1x1 conv is a projection shortcut, the path through the coarser
            // levels and the upsampling is its branch, so the two top-down
            // merges are long skips holding the deeper levels.
            Census { projection: 2, unactivated: 2, nesting: Some(3), ..post(1, 0, 0) },
            "-",
        ),
        fixture(
            "convnext_like.onnx",
            zoo::convnext_like(&zoo::ConvNeXtConfig {
                depths: vec![3, 3, 9, 3],
                width_divisor: 32,
                layer_scale: 1e-6,
                layer_norm: Form::Fused,
                gelu: Form::Fused,
                image: small.clone(),
            }),
            "layer scale 1e-6 on every branch; channels-last LayerNorm via Transpose; Gelu op",
            Census { identity: 18, unactivated: 18, nesting: stack, ..Census::default() },
            "C1",
        ),
        fixture(
            "text_postnorm.onnx",
            zoo::transformer_encoder(&text),
            "post-norm encoder, LayerNormalization and Gelu ops, mask Add on scores, positional Add",
            Census { identity: 4, post_norm: 4, nesting: stack, decoys: 2, ..Census::default() },
            "T1",
        ),
        fixture(
            "text_prenorm_decomposed.onnx",
            zoo::transformer_encoder(&zoo::TransformerConfig {
                norm_first: true,
                layer_norm: Form::Decomposed,
                gelu: Form::Decomposed,
                ..text.clone()
            }),
            "pre-norm encoder with final LayerNorm; LayerNorm and GELU spelled out in elementary ops",
            Census { identity: 4, pre_norm: 4, nesting: stack, decoys: 2, ..Census::default() },
            "T2",
        ),
        fixture(
            "rezero.onnx",
            zoo::rezero(&rezero(zoo::ZeroBranch::ScalarGate)),
            "x + alpha * F(x) with a scalar alpha = 0: every branch exactly zero",
            Census { identity: 3, unactivated: 3, nesting: stack, ..Census::default() },
            "Z1",
        ),
        fixture(
            "zero_branch.onnx",
            zoo::rezero(&rezero(zoo::ZeroBranch::ZeroLastConv)),
            "x + F(x) whose last conv has all-zero weights and bias",
            Census { identity: 3, unactivated: 3, nesting: stack, ..Census::default() },
            "Z1",
        ),
        fixture(
            "qdq_resnet_blocks.onnx",
            zoo::qdq_resnet_blocks(&ImageSpec::rgb(16), 4),
            "QuantizeLinear/DequantizeLinear pairs on every activation, both Add inputs included",
            post(2, 0, 0),
            "R3",
        ),
        fixture(
            "plain_cnn.onnx",
            zoo::plain_cnn(&plain_cfg()),
            "VGG-like stack, no shortcut",
            plain(0),
            "-",
        ),
        fixture(
            "trap_bias_add.onnx",
            zoo::trap_bias_add(),
            "Add of a conv output and a Reshape of a bias initializer: static",
            plain(0),
            "-",
        ),
        fixture(
            "trap_positional_add.onnx",
            zoo::trap_positional_add(),
            "Add of a token embedding and a positional initializer: static",
            plain(0),
            "-",
        ),
        fixture(
            "trap_attention_mask_add.onnx",
            zoo::trap_attention_mask_add(),
            "attention scores plus a mask from a separate graph input",
            plain(1),
            "-",
        ),
        fixture(
            "trap_rotary_add.onnx",
            zoo::trap_rotary_add(),
            "rotary embedding q * cos + rotate_half(q) * sin",
            plain(1),
            "-",
        ),
        fixture(
            "trap_add_self.onnx",
            zoo::trap_add_self(),
            "Add(x, x) after a conv",
            plain(1),
            "-",
        ),
        fixture(
            "trap_gelu_tanh.onnx",
            zoo::trap_gelu_tanh(),
            "tanh-GELU spelled out, holding Add(x, 0.044715 * x^3)",
            plain(1),
            "-",
        ),
        fixture(
            "trap_gated_update.onnx",
            zoo::trap_gated_update(),
            "GRU-style z * h + (1 - z) * n with MatMul weights",
            plain(3),
            "-",
        ),
        fixture(
            "demo/tile_grader.onnx",
            zoo::demo_tile_grader(),
            "README demo; defects: stage1.1 shortcut lost, stage2.2 dead branch (conv2 all zero), stage3.1 branch x40",
            post(6, 2, 0),
            "R3 R2",
        ),
    ]
}

/// The encoded bytes of a fixture's model.
pub fn encode(fixture: &Fixture) -> Vec<u8> {
    fixture.model.encode_to_vec()
}

/// The text of `fixtures/MANIFEST.txt` for `fixtures`.
pub fn manifest(fixtures: &[Fixture]) -> String {
    let mut out = String::new();
    out.push_str(concat!(
        "# shunt fixtures, written by `cargo run --release --example fixtures`; do not edit by hand.\n",
        "# Columns: file | what it isolates | expected census | check-values ids.\n",
        "# Census: additive blocks by shortcut (identity, projection, resampled) and by placement\n",
        "# (post-activation, pre-activation, pre-norm, post-norm, unactivated); concat = concatenative\n",
        "# skips; nesting = deepest skips-inside-skips (- when not pinned); decoys = input-dependent\n",
        "# Add/Sum nodes that are not residual merges. Adds of a static operand are not counted.\n",
    ));
    for fixture in fixtures {
        let c = &fixture.census;
        let nesting = c.nesting.map_or("-".to_owned(), |n| n.to_string());
        let _ = writeln!(
            out,
            "{} | {} | additive={} (identity={} projection={} resampled={}; post-act={} pre-act={} \
             pre-norm={} post-norm={} unactivated={}) concat={} nesting={} decoys={} | {}",
            fixture.path,
            fixture.isolates,
            c.additive(),
            c.identity,
            c.projection,
            c.resampled,
            c.post_activation,
            c.pre_activation,
            c.pre_norm,
            c.post_norm,
            c.unactivated,
            c.concat_skips,
            nesting,
            c.decoys,
            fixture.source,
        );
    }
    out
}

/// Writes every fixture and the manifest under `dir`; returns the paths
/// written.
pub fn write_all(dir: &Path) -> io::Result<Vec<PathBuf>> {
    let fixtures = all();
    let mut written = Vec::new();
    for fixture in &fixtures {
        let path = dir.join(fixture.path);
        if let Some(parent) = path.parent() {
            std::fs::create_dir_all(parent)?;
        }
        std::fs::write(&path, encode(fixture))?;
        written.push(path);
    }
    let path = dir.join("MANIFEST.txt");
    std::fs::write(&path, manifest(&fixtures))?;
    written.push(path);
    Ok(written)
}

fn preact(n: usize, stages: usize, bottleneck: bool, normalisation: bool) -> zoo::PreActConfig {
    zoo::PreActConfig {
        n,
        stages,
        bottleneck,
        normalisation,
        width_divisor: 4,
        image: ImageSpec::rgb(32),
    }
}

fn rezero(variant: zoo::ZeroBranch) -> zoo::RezeroConfig {
    zoo::RezeroConfig { blocks: 3, width: 4, variant, image: ImageSpec::rgb(16) }
}

fn plain_cfg() -> zoo::PlainConfig {
    zoo::PlainConfig { widths: vec![4, 8, 16], convs_per_stage: 2, image: ImageSpec::rgb(32) }
}
