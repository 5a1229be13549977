//! Generators for the architectures shunt must understand, and for the
//! look-alikes it must not mistake for residual blocks.
//!
//! Every generator takes a config struct and returns a finished
//! [`ModelProto`]. Widths are divided down so tests stay tiny, but the
//! layouts (stage counts, block counts, where shortcuts sit and what they
//! hold) follow the papers cited beside each generator by their id in
//! `check-values.md`. Image models take an NCHW float input called `input`
//! with a symbolic batch `N` unless the config fixes it, and end in
//! GlobalAveragePool, Flatten and Gemm. Weights are He-normal and batch
//! normalisation starts at identity statistics unless a config says otherwise.

use crate::builder::{Attention, Conv, Dim, Form, Init, ModelBuilder};
use shunt::proto::ModelProto;
use shunt::proto::tensor_proto::DataType;

/// The input and head of an image model.
#[derive(Debug, Clone, PartialEq)]
pub struct ImageSpec {
    /// The batch dimension, symbolic `N` or fixed.
    pub batch: Dim,
    /// Input channels.
    pub channels: i64,
    /// Height and width.
    pub size: i64,
    /// Output classes of the classifier.
    pub classes: i64,
    /// Whether to write `value_info` for every intermediate tensor.
    pub value_info: bool,
}

impl ImageSpec {
    /// A batch of `N` RGB images of `size`x`size`, 10 classes, with `value_info`.
    pub fn rgb(size: i64) -> ImageSpec {
        ImageSpec { batch: Dim::batch(), channels: 3, size, classes: 10, value_info: true }
    }
}

/// The two block designs of [R1].
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum BlockDesign {
    /// Two 3x3 convolutions.
    Basic,
    /// 1x1 reduce, 3x3, 1x1 expand to 4x the inner width.
    Bottleneck,
}

/// Where a ResNet puts projections on its shortcuts.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Shortcut {
    /// [R2] option A: identity, with stride-2 subsampling (a strided `Slice`)
    /// and zero channels (a `Pad`) where the shape changes.
    ZeroPad,
    /// [R2] option B: a 1x1 convolution and BN only where the shape changes.
    ProjectWhereNeeded,
    /// [R2] option C: a 1x1 convolution and BN on every shortcut.
    ProjectAll,
    /// [Z2] ResNet-D: where the shape changes, a 2x2 average pool of stride 2
    /// (when downsampling) then a 1x1 convolution of stride 1 and BN.
    PoolThenProject,
}

/// An ImageNet-layout ResNet.
#[derive(Debug, Clone, PartialEq)]
pub struct ResNetConfig {
    /// Blocks per stage.
    pub stages: Vec<usize>,
    /// Block design.
    pub design: BlockDesign,
    /// Shortcut option.
    pub shortcut: Shortcut,
    /// Stage widths are 64, 128, 256, 512 divided by this.
    pub width_divisor: i64,
    /// Fold every BN into the convolution before it, as exporters do.
    pub fold_bn: bool,
    /// Input and head.
    pub image: ImageSpec,
}

impl ResNetConfig {
    /// [R1] Table 1: 18 layers, [2,2,2,2] basic blocks, option B.
    pub fn resnet18() -> ResNetConfig {
        ResNetConfig::layout(vec![2, 2, 2, 2], BlockDesign::Basic)
    }

    /// [R1] Table 1: 34 layers, [3,4,6,3] basic blocks, option B.
    pub fn resnet34() -> ResNetConfig {
        ResNetConfig::layout(vec![3, 4, 6, 3], BlockDesign::Basic)
    }

    /// [R1] Table 1: 50 layers, [3,4,6,3] bottleneck blocks, option B.
    pub fn resnet50() -> ResNetConfig {
        ResNetConfig::layout(vec![3, 4, 6, 3], BlockDesign::Bottleneck)
    }

    /// [R1] Table 1: 101 layers, [3,4,23,3] bottleneck blocks, option B.
    pub fn resnet101() -> ResNetConfig {
        ResNetConfig::layout(vec![3, 4, 23, 3], BlockDesign::Bottleneck)
    }

    /// [R1] Table 1: 152 layers, [3,8,36,3] bottleneck blocks, option B.
    pub fn resnet152() -> ResNetConfig {
        ResNetConfig::layout(vec![3, 8, 36, 3], BlockDesign::Bottleneck)
    }

    fn layout(stages: Vec<usize>, design: BlockDesign) -> ResNetConfig {
        ResNetConfig {
            stages,
            design,
            shortcut: Shortcut::ProjectWhereNeeded,
            width_divisor: 16,
            fold_bn: false,
            image: ImageSpec::rgb(32),
        }
    }
}

/// An ImageNet ResNet: a 7x7 stride-2 stem and a 3x3 stride-2 max pool, then
/// stages of post-activation blocks `relu(F(x) + shortcut(x))` [R3]; the first
/// block of stages 2 to 4 downsamples. Layouts per [R1] Table 1, shortcut
/// options per [R2]. Block `j` of stage `s` is named `layer{s}.{j}`, with
/// `conv1`, `bn1`, ..., `shortcut.conv`, `add` and `relu` under it.
pub fn resnet(cfg: &ResNetConfig) -> ModelProto {
    let (mut b, x) = image_model("resnet", 17, &cfg.image);
    let base = 64 / cfg.width_divisor;
    let y = b.conv_bn("stem.conv", "stem.bn", &x, &Conv::new(base, 7).stride(2), cfg.fold_bn);
    let y = b.relu("stem.relu", &y);
    let mut x = b.max_pool("stem.pool", &y, 3, 2, 1);
    let expansion = match cfg.design {
        BlockDesign::Basic => 1,
        BlockDesign::Bottleneck => 4,
    };
    for (stage, count) in cfg.stages.iter().enumerate() {
        let width = base << stage;
        for idx in 0..*count {
            let stride = if stage > 0 && idx == 0 { 2 } else { 1 };
            let block = ResBlock {
                prefix: format!("layer{}.{idx}", stage + 1),
                width,
                out: width * expansion,
                stride,
                design: cfg.design,
                shortcut: cfg.shortcut,
                fold_bn: cfg.fold_bn,
            };
            x = post_activation_block(&mut b, &x, &block);
        }
    }
    classifier(&mut b, &x, cfg.image.classes);
    b.finish()
}

/// [Z2] ResNet-D: `cfg`'s ResNet with every shape-changing shortcut made of a
/// 2x2 stride-2 average pool and a stride-1 1x1 convolution with BN. Only the
/// shortcut changes; the stem stays the [R1] one.
pub fn resnet_d(cfg: &ResNetConfig) -> ModelProto {
    resnet(&ResNetConfig { shortcut: Shortcut::PoolThenProject, ..cfg.clone() })
}

/// A CIFAR ResNet of 6n+2 layers.
#[derive(Debug, Clone, PartialEq)]
pub struct CifarResNetConfig {
    /// Basic blocks per stage.
    pub n: usize,
    /// Shortcut option; the paper uses [`Shortcut::ZeroPad`].
    pub shortcut: Shortcut,
    /// Stage widths are 16, 32, 64 divided by this.
    pub width_divisor: i64,
    /// Input and head.
    pub image: ImageSpec,
}

/// [R4] CIFAR ResNet: a 3x3 stem, then 3 stages of `n` post-activation basic
/// blocks of widths 16/32/64 (divided), the first block of stages 2 and 3
/// downsampling. Blocks are named `stage{s}.{j}`.
pub fn cifar_resnet(cfg: &CifarResNetConfig) -> ModelProto {
    let (mut b, x) = image_model("cifar_resnet", 17, &cfg.image);
    let base = 16 / cfg.width_divisor;
    let y = b.conv_bn("stem.conv", "stem.bn", &x, &Conv::new(base, 3), false);
    let mut x = b.relu("stem.relu", &y);
    for stage in 0..3 {
        for idx in 0..cfg.n {
            let block = ResBlock {
                prefix: format!("stage{}.{idx}", stage + 1),
                width: base << stage,
                out: base << stage,
                stride: if stage > 0 && idx == 0 { 2 } else { 1 },
                design: BlockDesign::Basic,
                shortcut: cfg.shortcut,
                fold_bn: false,
            };
            x = post_activation_block(&mut b, &x, &block);
        }
    }
    classifier(&mut b, &x, cfg.image.classes);
    b.finish()
}

/// A CIFAR pre-activation ResNet.
#[derive(Debug, Clone, PartialEq)]
pub struct PreActConfig {
    /// Units per stage.
    pub n: usize,
    /// How many of the 3 stages to build (1 to 3); with 1, every shortcut is
    /// an identity.
    pub stages: usize,
    /// Bottleneck units (9n+2 layers, [P2]) instead of basic ones (6n+2).
    pub bottleneck: bool,
    /// With `false`, every BN is left out (ReLU -> conv -> ReLU -> conv), so
    /// the He-initialised branches show the raw signal propagation of [S1].
    pub normalisation: bool,
    /// Stage widths are 16, 32, 64 divided by this.
    pub width_divisor: i64,
    /// Input and head.
    pub image: ImageSpec,
}

/// [P1] Pre-activation ResNet: units BN -> ReLU -> conv -> BN -> ReLU -> conv
/// (three of each for the [P2] bottleneck variant), then the addition with
/// nothing after it; a final BN + ReLU before the head. Where the shape
/// changes, the shortcut is a 1x1 convolution of the unit's input (some
/// implementations project the pre-activated input instead, which moves the
/// fork after the first ReLU; this one keeps the fork at the unit's input so
/// every branch opens with BN -> ReLU). Units are named `stage{s}.{j}`.
pub fn preact_resnet(cfg: &PreActConfig) -> ModelProto {
    assert!((1..=3).contains(&cfg.stages), "1 to 3 stages");
    let (mut b, x) = image_model("preact_resnet", 17, &cfg.image);
    let base = 16 / cfg.width_divisor;
    let mut x = b.conv("stem.conv", &x, &Conv::new(base, 3));
    let expansion = if cfg.bottleneck { 4 } else { 1 };
    for stage in 0..cfg.stages {
        let width = base << stage;
        let out = width * expansion;
        for idx in 0..cfg.n {
            let p = format!("stage{}.{idx}", stage + 1);
            let stride = if stage > 0 && idx == 0 { 2 } else { 1 };
            let in_channels = b.dim(&x, 1);
            let pre_act = |b: &mut ModelBuilder, y: &str, k: usize| {
                let y = match cfg.normalisation {
                    true => b.bn(&format!("{p}.bn{k}"), y),
                    false => y.to_owned(),
                };
                b.relu(&format!("{p}.relu{k}"), &y)
            };
            let first = pre_act(&mut b, &x, 1);
            let shortcut = match stride != 1 || in_channels != out {
                true => {
                    b.conv(&format!("{p}.shortcut.conv"), &x, &Conv::new(out, 1).stride(stride))
                }
                false => x.clone(),
            };
            let branch = if cfg.bottleneck {
                let y = b.conv(&format!("{p}.conv1"), &first, &Conv::new(width, 1));
                let y = pre_act(&mut b, &y, 2);
                let y = b.conv(&format!("{p}.conv2"), &y, &Conv::new(width, 3).stride(stride));
                let y = pre_act(&mut b, &y, 3);
                b.conv(&format!("{p}.conv3"), &y, &Conv::new(out, 1))
            } else {
                let y = b.conv(&format!("{p}.conv1"), &first, &Conv::new(width, 3).stride(stride));
                let y = pre_act(&mut b, &y, 2);
                b.conv(&format!("{p}.conv2"), &y, &Conv::new(width, 3))
            };
            x = b.add(&format!("{p}.add"), &branch, &shortcut);
        }
    }
    if cfg.normalisation {
        x = b.bn("final.bn", &x);
    }
    let x = b.relu("final.relu", &x);
    classifier(&mut b, &x, cfg.image.classes);
    b.finish()
}

/// A MobileNetV2.
#[derive(Debug, Clone, PartialEq)]
pub struct MobileNetV2Config {
    /// Every channel count of the paper is divided by this.
    pub width_divisor: i64,
    /// Input and head.
    pub image: ImageSpec,
}

/// [M1] Table 2 bottleneck rows `(t, c, n, s)`.
pub const MOBILENET_V2_ROWS: [(i64, i64, usize, i64); 7] = [
    (1, 16, 1, 1),
    (6, 24, 2, 2),
    (6, 32, 3, 2),
    (6, 64, 4, 2),
    (6, 96, 3, 1),
    (6, 160, 3, 2),
    (6, 320, 1, 1),
];

/// [M1] MobileNetV2: a 3x3 stride-2 stem of 32, the Table 2 bottleneck rows,
/// a 1x1 conv to 1280 and the classifier (channel counts divided). Each block
/// expands with 1x1 conv + BN + ReLU6 (skipped when t = 1), filters with a
/// depthwise 3x3 + BN + ReLU6 and projects linearly with 1x1 conv + BN; an
/// identity shortcut joins only where the stride is 1 and the widths match,
/// with no activation after the add: 10 merges. Blocks are `block{k}`, k from 1.
pub fn mobilenet_v2(cfg: &MobileNetV2Config) -> ModelProto {
    let (mut b, x) = image_model("mobilenet_v2", 17, &cfg.image);
    let div = cfg.width_divisor;
    let y = b.conv_bn("stem.conv", "stem.bn", &x, &Conv::new(32 / div, 3).stride(2), false);
    let mut x = b.relu6("stem.relu6", &y);
    let (mut block, mut merges) = (0, 0);
    for (t, c, n, s) in MOBILENET_V2_ROWS {
        for idx in 0..n {
            block += 1;
            let p = format!("block{block}");
            let stride = if idx == 0 { s } else { 1 };
            let (in_channels, out) = (b.dim(&x, 1), (c / div).max(1));
            let mut y = x.clone();
            if t != 1 {
                y = b.conv_bn(
                    &format!("{p}.expand.conv"),
                    &format!("{p}.expand.bn"),
                    &y,
                    &Conv::new(in_channels * t, 1),
                    false,
                );
                y = b.relu6(&format!("{p}.expand.relu6"), &y);
            }
            let hidden = b.dim(&y, 1);
            let dw = Conv::new(hidden, 3).stride(stride).groups(hidden);
            y = b.conv_bn(&format!("{p}.dw.conv"), &format!("{p}.dw.bn"), &y, &dw, false);
            y = b.relu6(&format!("{p}.dw.relu6"), &y);
            y = b.conv_bn(
                &format!("{p}.project.conv"),
                &format!("{p}.project.bn"),
                &y,
                &Conv::new(out, 1),
                false,
            );
            if stride == 1 && in_channels == out {
                y = b.add(&format!("{p}.add"), &y, &x);
                merges += 1;
            }
            x = y;
        }
    }
    assert_eq!(merges, 10, "the divided widths must keep the paper's shortcut pattern");
    let y = b.conv_bn("head.conv", "head.bn", &x, &Conv::new(1280 / div, 1), false);
    let y = b.relu6("head.relu6", &y);
    classifier(&mut b, &y, cfg.image.classes);
    b.finish()
}

/// An EfficientNet-B0-like network.
#[derive(Debug, Clone, PartialEq)]
pub struct EfficientNetConfig {
    /// Every channel count of the paper is divided by this.
    pub width_divisor: i64,
    /// Input and head.
    pub image: ImageSpec,
}

/// [E1] Table 1 MBConv stages `(expansion, kernel, stride, channels, repeats)`.
pub const EFFICIENTNET_B0_STAGES: [(i64, i64, i64, i64, usize); 7] = [
    (1, 3, 1, 16, 1),
    (6, 3, 2, 24, 2),
    (6, 5, 2, 40, 2),
    (6, 3, 2, 80, 3),
    (6, 5, 1, 112, 3),
    (6, 5, 2, 192, 4),
    (6, 3, 1, 320, 1),
];

/// [E1] EfficientNet-B0-like: a 3x3 stride-2 stem of 32, MBConv stages
/// repeating 1,2,2,3,3,4,1 times, a 1x1 conv to 1280 and the classifier.
/// Each MBConv expands (1x1 conv + BN + swish, skipped at expansion 1),
/// filters depthwise (+ BN + swish), gates with squeeze-and-excitation
/// `x * Sigmoid(conv(Relu(conv(GlobalAveragePool(x)))))` and projects
/// linearly (1x1 conv + BN). Identity shortcuts join the repeated blocks
/// only: 9 merges. Swish is `x * Sigmoid(x)`. Blocks are `stage{s}.{j}`.
pub fn efficientnet_b0_like(cfg: &EfficientNetConfig) -> ModelProto {
    let (mut b, x) = image_model("efficientnet_b0_like", 17, &cfg.image);
    let div = cfg.width_divisor;
    let y = b.conv_bn("stem.conv", "stem.bn", &x, &Conv::new(32 / div, 3).stride(2), false);
    let mut x = b.swish("stem.swish", &y);
    let mut merges = 0;
    for (stage, (t, k, s, c, repeats)) in EFFICIENTNET_B0_STAGES.into_iter().enumerate() {
        for idx in 0..repeats {
            let p = format!("stage{}.{idx}", stage + 1);
            let stride = if idx == 0 { s } else { 1 };
            let (in_channels, out) = (b.dim(&x, 1), (c / div).max(1));
            let mut y = x.clone();
            if t != 1 {
                y = b.conv_bn(
                    &format!("{p}.expand.conv"),
                    &format!("{p}.expand.bn"),
                    &y,
                    &Conv::new(in_channels * t, 1),
                    false,
                );
                y = b.swish(&format!("{p}.expand.swish"), &y);
            }
            let hidden = b.dim(&y, 1);
            let dw = Conv::new(hidden, k).stride(stride).groups(hidden);
            y = b.conv_bn(&format!("{p}.dw.conv"), &format!("{p}.dw.bn"), &y, &dw, false);
            y = b.swish(&format!("{p}.dw.swish"), &y);
            let squeezed = b.global_avg_pool(&format!("{p}.se.pool"), &y);
            let reduced = (in_channels / 4).max(1);
            let z =
                b.conv(&format!("{p}.se.reduce"), &squeezed, &Conv::new(reduced, 1).with_bias());
            let z = b.relu(&format!("{p}.se.relu"), &z);
            let z = b.conv(&format!("{p}.se.expand"), &z, &Conv::new(hidden, 1).with_bias());
            let gate = b.sigmoid(&format!("{p}.se.sigmoid"), &z);
            y = b.mul(&format!("{p}.se.scale"), &y, &gate);
            y = b.conv_bn(
                &format!("{p}.project.conv"),
                &format!("{p}.project.bn"),
                &y,
                &Conv::new(out, 1),
                false,
            );
            if stride == 1 && in_channels == out {
                y = b.add(&format!("{p}.add"), &y, &x);
                merges += 1;
            }
            x = y;
        }
    }
    assert_eq!(merges, 9, "the divided widths must keep the paper's shortcut pattern");
    let y = b.conv_bn("head.conv", "head.bn", &x, &Conv::new(1280 / div, 1), false);
    let y = b.swish("head.swish", &y);
    classifier(&mut b, &y, cfg.image.classes);
    b.finish()
}

/// A DenseNet-like network.
#[derive(Debug, Clone, PartialEq)]
pub struct DenseNetConfig {
    /// Layers per dense block; [D1] DenseNet-121 has 6, 12, 24, 16.
    pub block_layers: Vec<usize>,
    /// Channels each layer adds.
    pub growth: i64,
    /// Input and head.
    pub image: ImageSpec,
}

/// [D1] DenseNet-like: a 7x7 stride-2 stem and max pool, dense blocks whose
/// layers (BN -> ReLU -> 1x1 conv to 4x growth -> BN -> ReLU -> 3x3 conv to
/// growth) each read the `Concat` of every earlier map of the block, and
/// transitions (BN -> ReLU -> 1x1 conv halving the channels -> 2x2 average
/// pool) between blocks. No additive merge at all; a block of L layers holds
/// L `Concat`s (L - 1 layer inputs and the block output). Layer `l` of block
/// `k` is `dense{k}.layer{l}`.
pub fn densenet_like(cfg: &DenseNetConfig) -> ModelProto {
    let (mut b, x) = image_model("densenet_like", 17, &cfg.image);
    let growth = cfg.growth;
    let y = b.conv_bn("stem.conv", "stem.bn", &x, &Conv::new(2 * growth, 7).stride(2), false);
    let y = b.relu("stem.relu", &y);
    let mut x = b.max_pool("stem.pool", &y, 3, 2, 1);
    for (block, layers) in cfg.block_layers.iter().enumerate() {
        let k = block + 1;
        let mut features = vec![x.clone()];
        for layer in 1..=*layers {
            let p = format!("dense{k}.layer{layer}");
            let input = match features.len() {
                1 => features[0].clone(),
                _ => b.concat(&format!("{p}.concat"), &refs(&features), 1),
            };
            let y = b.bn(&format!("{p}.bn1"), &input);
            let y = b.relu(&format!("{p}.relu1"), &y);
            let y = b.conv(&format!("{p}.conv1"), &y, &Conv::new(4 * growth, 1));
            let y = b.bn(&format!("{p}.bn2"), &y);
            let y = b.relu(&format!("{p}.relu2"), &y);
            features.push(b.conv(&format!("{p}.conv2"), &y, &Conv::new(growth, 3)));
        }
        x = b.concat(&format!("dense{k}.concat"), &refs(&features), 1);
        if k < cfg.block_layers.len() {
            let p = format!("transition{k}");
            let half = b.dim(&x, 1) / 2;
            let y = b.bn(&format!("{p}.bn"), &x);
            let y = b.relu(&format!("{p}.relu"), &y);
            let y = b.conv(&format!("{p}.conv"), &y, &Conv::new(half, 1));
            x = b.avg_pool(&format!("{p}.pool"), &y, 2, 2, 0);
        }
    }
    let y = b.bn("final.bn", &x);
    let y = b.relu("final.relu", &y);
    classifier(&mut b, &y, cfg.image.classes);
    b.finish()
}

/// A U-Net.
#[derive(Debug, Clone, PartialEq)]
pub struct UNetConfig {
    /// Poolings on the contracting path; the paper has 4.
    pub depth: usize,
    /// Width of the first level; each level below doubles it.
    pub base_width: i64,
    /// Input (its size must be divisible by 2^depth); `classes` is the number
    /// of output maps.
    pub image: ImageSpec,
}

/// [U1] U-Net: a contracting path of (3x3 conv + ReLU) x 2 and a 2x2 max pool
/// per level, a bottom level, and an expanding path that up-samples
/// (`Resize` nearest x2), halves the channels with a 3x3 conv, then
/// `Concat`s the contracting-path map of the same level before (3x3 conv +
/// ReLU) x 2: one concatenative long skip per level, nested inside each
/// other. Unlike the paper the convolutions are padded, so no cropping is
/// needed, and the up-convolution is a Resize then a 3x3 conv. Levels are
/// `down{k}`, `bottom`, `up{k}`.
pub fn unet(cfg: &UNetConfig) -> ModelProto {
    let (mut b, mut x) = image_model("unet", 17, &cfg.image);
    let conv_pair = |b: &mut ModelBuilder, p: &str, x: &str, width: i64| {
        let y = b.conv(&format!("{p}.conv1"), x, &Conv::new(width, 3).with_bias());
        let y = b.relu(&format!("{p}.relu1"), &y);
        let y = b.conv(&format!("{p}.conv2"), &y, &Conv::new(width, 3).with_bias());
        b.relu(&format!("{p}.relu2"), &y)
    };
    let mut skips = Vec::new();
    for level in 0..cfg.depth {
        let p = format!("down{}", level + 1);
        let y = conv_pair(&mut b, &p, &x, cfg.base_width << level);
        x = b.max_pool(&format!("{p}.pool"), &y, 2, 2, 0);
        skips.push(y);
    }
    x = conv_pair(&mut b, "bottom", &x, cfg.base_width << cfg.depth);
    for level in (0..cfg.depth).rev() {
        let p = format!("up{}", level + 1);
        let width = cfg.base_width << level;
        let y = b.upsample2x(&format!("{p}.resize"), &x);
        let y = b.conv(&format!("{p}.upconv"), &y, &Conv::new(width, 3).with_bias());
        let y = b.concat(&format!("{p}.concat"), &[&skips[level], &y], 1);
        x = conv_pair(&mut b, &p, &y, width);
    }
    let y = b.conv("head.conv", &x, &Conv::new(cfg.image.classes, 1).with_bias());
    b.output(&y);
    b.finish()
}

/// A feature pyramid on a small backbone.
#[derive(Debug, Clone, PartialEq)]
pub struct FpnConfig {
    /// Width of the first backbone stage; later stages double it.
    pub width: i64,
    /// Width of every pyramid level.
    pub pyramid_width: i64,
    /// Input (the classifier is not used).
    pub image: ImageSpec,
}

/// A feature pyramid's top-down path: a backbone of a stride-2 stem and
/// stages `c2` (stride 1), `c3` and `c4` (stride 2), the deepest holding one
/// post-activation basic residual block (`c4.block`); 1x1 lateral convs
/// `lateral{k}`; and `topdown{k}` = lateral k + `Resize` x2 of level k+1. The
/// three 3x3-smoothed levels `smooth{k}` are the graph outputs. The two
/// top-down `Add`s join maps of different stages, not a shortcut.
pub fn fpn_topdown(cfg: &FpnConfig) -> ModelProto {
    let (mut b, x) = image_model("fpn_topdown", 17, &cfg.image);
    let w = cfg.width;
    let stage = |b: &mut ModelBuilder, p: &str, x: &str, width: i64, stride: i64| {
        let y = b.conv_bn(
            &format!("{p}.conv"),
            &format!("{p}.bn"),
            x,
            &Conv::new(width, 3).stride(stride),
            false,
        );
        b.relu(&format!("{p}.relu"), &y)
    };
    let stem = stage(&mut b, "stem", &x, w, 2);
    let c2 = stage(&mut b, "c2", &stem, w, 1);
    let c3 = stage(&mut b, "c3", &c2, 2 * w, 2);
    let c4 = stage(&mut b, "c4", &c3, 4 * w, 2);
    let block = ResBlock {
        prefix: "c4.block".to_owned(),
        width: 4 * w,
        out: 4 * w,
        stride: 1,
        design: BlockDesign::Basic,
        shortcut: Shortcut::ProjectWhereNeeded,
        fold_bn: false,
    };
    let c4 = post_activation_block(&mut b, &c4, &block);
    let lateral = Conv::new(cfg.pyramid_width, 1).with_bias();
    let l2 = b.conv("lateral2", &c2, &lateral);
    let l3 = b.conv("lateral3", &c3, &lateral);
    let p4 = b.conv("lateral4", &c4, &lateral);
    let up4 = b.upsample2x("topdown3.resize", &p4);
    let p3 = b.add("topdown3", &l3, &up4);
    let up3 = b.upsample2x("topdown2.resize", &p3);
    let p2 = b.add("topdown2", &l2, &up3);
    for (k, level) in [(2, p2), (3, p3), (4, p4)] {
        let out =
            b.conv(&format!("smooth{k}"), &level, &Conv::new(cfg.pyramid_width, 3).with_bias());
        b.output(&out);
    }
    b.finish()
}

/// A ConvNeXt-like network.
#[derive(Debug, Clone, PartialEq)]
pub struct ConvNeXtConfig {
    /// Blocks per stage; ConvNeXt-T has 3, 3, 9, 3.
    pub depths: Vec<usize>,
    /// Stage widths are 96, 192, 384, 768 divided by this.
    pub width_divisor: i64,
    /// Initial value of every layer-scale entry.
    pub layer_scale: f32,
    /// Layer normalisation as one op or spelled out.
    pub layer_norm: Form,
    /// GELU as one op (opset 20) or spelled out.
    pub gelu: Form,
    /// Input and head.
    pub image: ImageSpec,
}

/// [C1] ConvNeXt-like: a 4x4 stride-4 patchify stem and LayerNorm, stages
/// joined by LayerNorm + 2x2 stride-2 conv, and blocks of 7x7 depthwise conv
/// -> (to channels-last `Transpose`) LayerNorm -> pointwise `MatMul` to 4x ->
/// GELU -> pointwise `MatMul` back -> layer-scale `Mul` by a per-channel
/// gamma (1e-6 by default) -> (`Transpose` back) -> `Add` of the identity.
/// Blocks are `stage{s}.{j}`.
pub fn convnext_like(cfg: &ConvNeXtConfig) -> ModelProto {
    let opset = if cfg.gelu == Form::Fused { 20 } else { 17 };
    let (mut b, x) = image_model("convnext_like", opset, &cfg.image);
    let channels_last_norm = |b: &mut ModelBuilder, p: &str, x: &str| {
        let y = b.transpose(&format!("{p}.to_nhwc"), x, &[0, 2, 3, 1]);
        let y = b.layer_norm(&format!("{p}.norm"), &y, cfg.layer_norm);
        b.transpose(&format!("{p}.to_nchw"), &y, &[0, 3, 1, 2])
    };
    let widths: Vec<i64> = [96, 192, 384, 768].iter().map(|w| w / cfg.width_divisor).collect();
    let y = b.conv("stem.conv", &x, &Conv::new(widths[0], 4).stride(4).pad(0).with_bias());
    let mut x = channels_last_norm(&mut b, "stem", &y);
    for (stage, depth) in cfg.depths.iter().enumerate() {
        let width = widths[stage];
        if stage > 0 {
            let p = format!("downsample{stage}");
            let y = channels_last_norm(&mut b, &p, &x);
            x = b.conv(&format!("{p}.conv"), &y, &Conv::new(width, 2).stride(2).pad(0).with_bias());
        }
        for idx in 0..*depth {
            let p = format!("stage{}.{idx}", stage + 1);
            let y =
                b.conv(&format!("{p}.dwconv"), &x, &Conv::new(width, 7).groups(width).with_bias());
            let y = b.transpose(&format!("{p}.to_nhwc"), &y, &[0, 2, 3, 1]);
            let y = b.layer_norm(&format!("{p}.norm"), &y, cfg.layer_norm);
            let y = b.linear(&format!("{p}.pwconv1"), &y, 4 * width, &Init::HeNormal, true);
            let y = b.gelu(&format!("{p}.gelu"), &y, cfg.gelu);
            let y = b.linear(&format!("{p}.pwconv2"), &y, width, &Init::HeNormal, true);
            let y = b.mul_const(
                &format!("{p}.layer_scale"),
                &y,
                &[width],
                vec![cfg.layer_scale; width as usize],
            );
            let y = b.transpose(&format!("{p}.to_nchw"), &y, &[0, 3, 1, 2]);
            x = b.add(&format!("{p}.add"), &y, &x);
        }
    }
    let y = b.global_avg_pool("head.pool", &x);
    let y = b.flatten("head.flatten", &y, 1);
    let y = b.layer_norm("head.norm", &y, cfg.layer_norm);
    let y = b.gemm("head.fc", &y, cfg.image.classes, &Init::HeNormal);
    b.output(&y);
    b.finish()
}

/// How a ReZero-style network silences its branches at initialisation.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ZeroBranch {
    /// [Z1] `x + alpha * F(x)` with a scalar `alpha` initialised to 0.
    ScalarGate,
    /// `x + F(x)` where the last conv of `F` has all-zero weights and bias.
    ZeroLastConv,
}

/// A ReZero-style network.
#[derive(Debug, Clone, PartialEq)]
pub struct RezeroConfig {
    /// Residual blocks after the stem.
    pub blocks: usize,
    /// Channels everywhere.
    pub width: i64,
    /// How the branches are silenced.
    pub variant: ZeroBranch,
    /// Input and head.
    pub image: ImageSpec,
}

/// [Z1] ReZero: a 3x3 stem + ReLU, then blocks `x + alpha * F(x)` with
/// `F` = conv -> ReLU -> conv (no normalisation) and nothing after the add,
/// so every branch is exactly zero at initialisation. Blocks are `block{j}`;
/// the add takes the shortcut first, `Add(x, branch)`.
pub fn rezero(cfg: &RezeroConfig) -> ModelProto {
    let (mut b, x) = image_model("rezero", 17, &cfg.image);
    let y = b.conv("stem.conv", &x, &Conv::new(cfg.width, 3).with_bias());
    let mut x = b.relu("stem.relu", &y);
    for idx in 0..cfg.blocks {
        let p = format!("block{idx}");
        let y = b.conv(&format!("{p}.conv1"), &x, &Conv::new(cfg.width, 3).with_bias());
        let y = b.relu(&format!("{p}.relu"), &y);
        let last = match cfg.variant {
            ZeroBranch::ScalarGate => Conv::new(cfg.width, 3).with_bias(),
            ZeroBranch::ZeroLastConv => Conv::new(cfg.width, 3).weights(Init::Zeros).with_bias(),
        };
        let mut y = b.conv(&format!("{p}.conv2"), &y, &last);
        if cfg.variant == ZeroBranch::ScalarGate {
            let alpha = b.scalar(&format!("{p}.alpha"), 0.0);
            y = b.mul(&format!("{p}.gate"), &y, &alpha);
        }
        x = b.add(&format!("{p}.add"), &x, &y);
    }
    classifier(&mut b, &x, cfg.image.classes);
    b.finish()
}

/// A text transformer encoder.
#[derive(Debug, Clone, PartialEq)]
pub struct TransformerConfig {
    /// Encoder layers, each with an attention and a feed-forward sub-layer.
    pub layers: usize,
    /// Model width.
    pub d_model: i64,
    /// Attention heads.
    pub heads: i64,
    /// Feed-forward inner width.
    pub ffn: i64,
    /// Vocabulary size of the token embedding.
    pub vocab: i64,
    /// Fixed sequence length T.
    pub seq_len: i64,
    /// Pre-norm [T2] when set, post-norm [T1] otherwise.
    pub norm_first: bool,
    /// Layer normalisation as one op or spelled out.
    pub layer_norm: Form,
    /// GELU as one op (opset 20) or spelled out.
    pub gelu: Form,
    /// Rotary position embedding of queries and keys in every layer.
    pub rotary: bool,
    /// The batch dimension.
    pub batch: Dim,
    /// Whether to write `value_info` for every intermediate tensor.
    pub value_info: bool,
}

impl TransformerConfig {
    /// 2 layers, width 16, 2 heads, FFN 32, vocabulary 50, T = 8, post-norm,
    /// fused ops, no rotary embedding, symbolic batch.
    pub fn tiny() -> TransformerConfig {
        TransformerConfig {
            layers: 2,
            d_model: 16,
            heads: 2,
            ffn: 32,
            vocab: 50,
            seq_len: 8,
            norm_first: false,
            layer_norm: Form::Fused,
            gelu: Form::Fused,
            rotary: false,
            batch: Dim::batch(),
            value_info: true,
        }
    }
}

/// A transformer encoder on int64 token ids `input_ids [N, T]` with a float
/// `attention_mask [N, T]` (1 keeps a token, 0 pads it). The token embedding
/// (`Gather`) gets a learned positional table added (`embed.add_positions`:
/// an `Add` of a static initializer, not a merge). The mask becomes an
/// additive `[N, 1, 1, T]` term, `(1 - mask) * -10000`, added to every
/// layer's attention scores (`layer{l}.attn.mask_add`: an independent input,
/// not a merge). Each layer `layer{l}` has `attn_add` and `ffn_add`:
/// post-norm `LayerNorm(x + Sublayer(x))` [T1] or pre-norm
/// `x + Sublayer(LayerNorm(x))` with a final LayerNorm [T2]. With `rotary`,
/// queries and keys get `q * cos + rotate_half(q) * sin` with static tables
/// (`layer{l}.attn.q.rotary` and `.k.rotary`: not merges either).
pub fn transformer_encoder(cfg: &TransformerConfig) -> ModelProto {
    let opset = if cfg.gelu == Form::Fused { 20 } else { 17 };
    let mut b = ModelBuilder::new("transformer_encoder", opset).emit_value_info(cfg.value_info);
    let (d, t) = (cfg.d_model, cfg.seq_len);
    let ids = b.typed_input("input_ids", DataType::Int64, &[cfg.batch.clone(), t.into()]);
    let mask = b.input("attention_mask", &[cfg.batch.clone(), t.into()]);
    let tokens = b.embedding("embed.tokens", &ids, cfg.vocab, d);
    let positions = b.init_filled("embed.positions", &[t, d], &Init::Normal(0.02), 1);
    let mut x = b.add("embed.add_positions", &tokens, &positions);
    let additive_mask = additive_mask(&mut b, "mask", &mask);
    let rotary = cfg.rotary.then(|| rotary_tables(&mut b, "rotary", t, d / cfg.heads));
    let spec = Attention { heads: cfg.heads, mask: Some(additive_mask), rotary };
    for layer in 0..cfg.layers {
        let p = format!("layer{layer}");
        let attention = |b: &mut ModelBuilder, x: &str| b.attention(&format!("{p}.attn"), x, &spec);
        let feed_forward = |b: &mut ModelBuilder, x: &str| {
            let y = b.linear(&format!("{p}.ffn.fc1"), x, cfg.ffn, &Init::HeNormal, true);
            let y = b.gelu(&format!("{p}.ffn.gelu"), &y, cfg.gelu);
            b.linear(
                &format!("{p}.ffn.fc2"),
                &y,
                d,
                &Init::Normal(1.0 / (cfg.ffn as f32).sqrt()),
                true,
            )
        };
        if cfg.norm_first {
            let h = b.layer_norm(&format!("{p}.attn_norm"), &x, cfg.layer_norm);
            let a = attention(&mut b, &h);
            x = b.add(&format!("{p}.attn_add"), &x, &a);
            let h = b.layer_norm(&format!("{p}.ffn_norm"), &x, cfg.layer_norm);
            let f = feed_forward(&mut b, &h);
            x = b.add(&format!("{p}.ffn_add"), &x, &f);
        } else {
            let a = attention(&mut b, &x);
            let y = b.add(&format!("{p}.attn_add"), &x, &a);
            x = b.layer_norm(&format!("{p}.attn_norm"), &y, cfg.layer_norm);
            let f = feed_forward(&mut b, &x);
            let y = b.add(&format!("{p}.ffn_add"), &x, &f);
            x = b.layer_norm(&format!("{p}.ffn_norm"), &y, cfg.layer_norm);
        }
    }
    if cfg.norm_first {
        x = b.layer_norm("final_norm", &x, cfg.layer_norm);
    }
    b.output(&x);
    b.finish()
}

/// A VGG-like network.
#[derive(Debug, Clone, PartialEq)]
pub struct PlainConfig {
    /// Width of each stage; each stage ends in a 2x2 max pool.
    pub widths: Vec<i64>,
    /// 3x3 conv + BN + ReLU layers per stage.
    pub convs_per_stage: usize,
    /// Input and head.
    pub image: ImageSpec,
}

/// A plain VGG-like stack of conv + BN + ReLU and max pools, with no
/// shortcut of any kind. Layers are `stage{s}.conv{k}`.
pub fn plain_cnn(cfg: &PlainConfig) -> ModelProto {
    let (mut b, mut x) = image_model("plain_cnn", 17, &cfg.image);
    for (stage, width) in cfg.widths.iter().enumerate() {
        let p = format!("stage{}", stage + 1);
        for k in 1..=cfg.convs_per_stage {
            let y = b.conv_bn(
                &format!("{p}.conv{k}"),
                &format!("{p}.bn{k}"),
                &x,
                &Conv::new(*width, 3),
                false,
            );
            x = b.relu(&format!("{p}.relu{k}"), &y);
        }
        x = b.max_pool(&format!("{p}.pool"), &x, 2, 2, 0);
    }
    classifier(&mut b, &x, cfg.image.classes);
    b.finish()
}

/// Two post-activation basic blocks written the way static quantisation
/// tools leave them: every activation goes through a `QuantizeLinear` /
/// `DequantizeLinear` pair, including both inputs of each `Add` (the
/// shortcut is the dequantized block input). Blocks are `block{j}`.
pub fn qdq_resnet_blocks(image: &ImageSpec, width: i64) -> ModelProto {
    let (mut b, x) = image_model("qdq_resnet_blocks", 17, image);
    let x = b.qdq("input.qdq", &x, 0.02);
    let y = b.conv_bn("stem.conv", "stem.bn", &x, &Conv::new(width, 3), false);
    let y = b.relu("stem.relu", &y);
    let mut x = b.qdq("stem.qdq", &y, 0.05);
    for idx in 0..2 {
        let p = format!("block{idx}");
        let y =
            b.conv_bn(&format!("{p}.conv1"), &format!("{p}.bn1"), &x, &Conv::new(width, 3), false);
        let y = b.relu(&format!("{p}.relu1"), &y);
        let y = b.qdq(&format!("{p}.relu1.qdq"), &y, 0.05);
        let y =
            b.conv_bn(&format!("{p}.conv2"), &format!("{p}.bn2"), &y, &Conv::new(width, 3), false);
        let y = b.qdq(&format!("{p}.bn2.qdq"), &y, 0.05);
        let y = b.add(&format!("{p}.add"), &y, &x);
        let y = b.relu(&format!("{p}.relu"), &y);
        x = b.qdq(&format!("{p}.qdq"), &y, 0.05);
    }
    classifier(&mut b, &x, image.classes);
    b.finish()
}

/// Trap: a conv without bias followed by an `Add` of a bias initializer
/// reshaped to `[1, C, 1, 1]` by a `Reshape` node, then ReLU. The added
/// operand is static: no merge.
pub fn trap_bias_add() -> ModelProto {
    let (mut b, x) = image_model("trap_bias_add", 17, &trap_image());
    let y = b.conv("conv", &x, &Conv::new(4, 3));
    let bias = b.init("conv.bias", &[4], vec![0.1, -0.1, 0.2, -0.2]);
    let bias = b.reshape("bias.reshape", &bias, &[1, 4, 1, 1]);
    let y = b.add("bias_add", &y, &bias);
    let y = b.relu("relu", &y);
    b.output(&y);
    b.finish()
}

/// Trap: token embedding plus a learned positional table (an initializer):
/// a static `Add` named `add_positions`, no merge.
pub fn trap_positional_add() -> ModelProto {
    let mut b = ModelBuilder::new("trap_positional_add", 17).emit_value_info(true);
    let ids = b.typed_input("input_ids", DataType::Int64, &[Dim::batch(), 8.into()]);
    let tokens = b.embedding("tokens", &ids, 50, 16);
    let positions = b.init_filled("positions", &[8, 16], &Init::Normal(0.02), 1);
    let y = b.add("add_positions", &tokens, &positions);
    b.output(&y);
    b.finish()
}

/// Trap: one attention sub-layer on `x [N, 8, 16]` whose scores get an
/// additive mask that is a separate graph input `mask [N, 1, 1, 8]`
/// (`attn.mask_add`): the mask does not flow from `x`, so no merge.
pub fn trap_attention_mask_add() -> ModelProto {
    let mut b = ModelBuilder::new("trap_attention_mask_add", 17).emit_value_info(true);
    let x = b.input("x", &[Dim::batch(), 8.into(), 16.into()]);
    let mask = b.input("mask", &[Dim::batch(), 1.into(), 1.into(), 8.into()]);
    let y = b.attention("attn", &x, &Attention { heads: 2, mask: Some(mask), rotary: None });
    b.output(&y);
    b.finish()
}

/// Trap: a query projection with a rotary embedding,
/// `q * cos + rotate_half(q) * sin` (`q.rotary`): both operands of the add
/// are transforms of `q`, neither a shortcut, so no merge.
pub fn trap_rotary_add() -> ModelProto {
    let mut b = ModelBuilder::new("trap_rotary_add", 17).emit_value_info(true);
    let x = b.input("x", &[Dim::batch(), 8.into(), 16.into()]);
    let q = b.linear("q", &x, 16, &Init::HeNormal, false);
    let q = b.reshape("q.split", &q, &[0, 0, 2, 8]);
    let q = b.transpose("q.heads", &q, &[0, 2, 1, 3]);
    let (cos, sin) = rotary_tables(&mut b, "rotary", 8, 8);
    let y = b.rotary("q.rotary", &q, &cos, &sin);
    b.output(&y);
    b.finish()
}

/// Trap: `Add(y, y)` of a conv output with itself (`double`), then ReLU: a
/// fork whose two paths are the same tensor, so no merge.
pub fn trap_add_self() -> ModelProto {
    let (mut b, x) = image_model("trap_add_self", 17, &trap_image());
    let y = b.conv("conv", &x, &Conv::new(4, 3));
    let y = b.add("double", &y, &y);
    let y = b.relu("relu", &y);
    b.output(&y);
    b.finish()
}

/// Trap: a linear layer followed by the tanh approximation of GELU spelled
/// out, whose `gelu.add_cube` is `Add(x, 0.044715 * x^3)`: an activation
/// function's polynomial, not a residual block.
pub fn trap_gelu_tanh() -> ModelProto {
    let mut b = ModelBuilder::new("trap_gelu_tanh", 17).emit_value_info(true);
    let x = b.input("x", &[Dim::batch(), 16.into()]);
    let y = b.linear("fc", &x, 16, &Init::HeNormal, true);
    let y = b.gelu_tanh("gelu", &y);
    b.output(&y);
    b.finish()
}

/// Trap: a GRU-style gated update `h' = z * h + (1 - z) * n` on inputs
/// `x [N, 8]` and `h [N, 8]`, with `z = Sigmoid(x Wz + h Uz)` and
/// `n = Tanh(x Wn + h Un)` (`MatMul` weights). Three `Add`s of two computed
/// tensors (`z.add`, `n.add`, `update`), none of them a shortcut.
pub fn trap_gated_update() -> ModelProto {
    let mut b = ModelBuilder::new("trap_gated_update", 17).emit_value_info(true);
    let x = b.input("x", &[Dim::batch(), 8.into()]);
    let h = b.input("h", &[Dim::batch(), 8.into()]);
    let gate_input = |b: &mut ModelBuilder, p: &str| {
        let from_x = b.linear(&format!("{p}.x"), &x, 8, &Init::HeNormal, false);
        let from_h = b.linear(&format!("{p}.h"), &h, 8, &Init::HeNormal, false);
        b.add(&format!("{p}.add"), &from_x, &from_h)
    };
    let z = gate_input(&mut b, "z");
    let z = b.sigmoid("z.sigmoid", &z);
    let n = gate_input(&mut b, "n");
    let n = b.tanh("n.tanh", &n);
    let keep = b.mul("keep", &z, &h);
    let one = b.scalar("one", 1.0);
    let inverse = b.sub("one_minus_z", &one, &z);
    let fresh = b.mul("fresh", &inverse, &n);
    let y = b.add("update", &keep, &fresh);
    b.output(&y);
    b.finish()
}

/// The block names of the three defects planted in [`demo_tile_grader`].
pub const TILE_GRADER_DEFECTS: [(&str, &str); 3] = [
    ("stage1.1", "shortcut lost: no Add, the branch output goes straight into the ReLU"),
    ("stage2.2", "dead branch: conv2 weights are all zero"),
    ("stage3.1", "dominating branch: the branch ends in a constant Mul by 40"),
];

/// The README demo: a small CNN that grades glaze defects on ceramic tiles
/// from `crop [N, 1, 32, 32]` grayscale crops of a kiln-exit camera into 4
/// classes (ok, crawling, pinholes, crazing; also in the model metadata
/// `classes`). Post-activation ResNet-style: a 3x3 stem of 8, then 3 stages
/// `stage1..3` of 3 basic blocks of widths 8/16/32, option-B projections on
/// `stage2.0` and `stage3.0`, and the classifier `head.fc`.
///
/// Planted defects, for the audit to find:
/// - `stage1.1` lost its shortcut: no `Add`, the branch output goes
///   straight into `stage1.1.relu`, so the block is a plain conv pair in the
///   middle of stage 1;
/// - `stage2.2` has a dead branch: `stage2.2.conv2` weights are all zero;
/// - `stage3.1` has a branch that dominates its shortcut: it ends in
///   `stage3.1.scale`, a constant `Mul` by 40, before `stage3.1.add`.
///
/// That leaves 8 additive blocks: 6 identity and 2 projection shortcuts.
pub fn demo_tile_grader() -> ModelProto {
    let image =
        ImageSpec { batch: Dim::batch(), channels: 1, size: 32, classes: 4, value_info: true };
    let mut b = ModelBuilder::new("tile_grader", 17).seed(0x711e).emit_value_info(true);
    b.doc("Grades glaze defects on ceramic tiles from 32x32 grayscale kiln-exit crops");
    b.metadata("classes", "ok,crawling,pinholes,crazing");
    let x = b.input("crop", &[image.batch.clone(), 1.into(), 32.into(), 32.into()]);
    let y = b.conv_bn("stem.conv", "stem.bn", &x, &Conv::new(8, 3), false);
    let mut x = b.relu("stem.relu", &y);
    for (stage, width) in [8i64, 16, 32].into_iter().enumerate() {
        for idx in 0..3 {
            let p = format!("stage{}.{idx}", stage + 1);
            let stride = if stage > 0 && idx == 0 { 2 } else { 1 };
            let in_channels = b.dim(&x, 1);
            let conv1 = Conv::new(width, 3).stride(stride);
            let y = b.conv_bn(&format!("{p}.conv1"), &format!("{p}.bn1"), &x, &conv1, false);
            let y = b.relu(&format!("{p}.relu1"), &y);
            let conv2 = match p.as_str() {
                "stage2.2" => Conv::new(width, 3).weights(Init::Zeros),
                _ => Conv::new(width, 3),
            };
            let mut y = b.conv_bn(&format!("{p}.conv2"), &format!("{p}.bn2"), &y, &conv2, false);
            if p == "stage3.1" {
                y = b.mul_const(&format!("{p}.scale"), &y, &[], vec![40.0]);
            }
            if p != "stage1.1" {
                let shortcut = match stride != 1 || in_channels != width {
                    true => b.conv_bn(
                        &format!("{p}.shortcut.conv"),
                        &format!("{p}.shortcut.bn"),
                        &x,
                        &Conv::new(width, 1).stride(stride),
                        false,
                    ),
                    false => x.clone(),
                };
                y = b.add(&format!("{p}.add"), &y, &shortcut);
            }
            x = b.relu(&format!("{p}.relu"), &y);
        }
    }
    classifier(&mut b, &x, image.classes);
    b.finish()
}

/// One post-activation residual block of a ResNet.
pub(crate) struct ResBlock {
    pub(crate) prefix: String,
    pub(crate) width: i64,
    pub(crate) out: i64,
    pub(crate) stride: i64,
    pub(crate) design: BlockDesign,
    pub(crate) shortcut: Shortcut,
    pub(crate) fold_bn: bool,
}

/// [R3] `relu(F(x) + shortcut(x))`, the branch first in the `Add`.
pub(crate) fn post_activation_block(b: &mut ModelBuilder, x: &str, block: &ResBlock) -> String {
    let p = &block.prefix;
    let fold = block.fold_bn;
    let conv_bn = |b: &mut ModelBuilder, k: usize, x: &str, conv: Conv| {
        b.conv_bn(&format!("{p}.conv{k}"), &format!("{p}.bn{k}"), x, &conv, fold)
    };
    let in_channels = b.dim(x, 1);
    let branch = match block.design {
        BlockDesign::Basic => {
            let y = conv_bn(b, 1, x, Conv::new(block.width, 3).stride(block.stride));
            let y = b.relu(&format!("{p}.relu1"), &y);
            conv_bn(b, 2, &y, Conv::new(block.out, 3))
        }
        // The stride sits on the 3x3 conv; [R1] only says which stage
        // downsamples, not which conv of the bottleneck.
        BlockDesign::Bottleneck => {
            let y = conv_bn(b, 1, x, Conv::new(block.width, 1));
            let y = b.relu(&format!("{p}.relu1"), &y);
            let y = conv_bn(b, 2, &y, Conv::new(block.width, 3).stride(block.stride));
            let y = b.relu(&format!("{p}.relu2"), &y);
            conv_bn(b, 3, &y, Conv::new(block.out, 1))
        }
    };
    let changes = block.stride != 1 || in_channels != block.out;
    let project = |b: &mut ModelBuilder, x: &str, stride: i64| {
        let conv = Conv::new(block.out, 1).stride(stride);
        b.conv_bn(&format!("{p}.shortcut.conv"), &format!("{p}.shortcut.bn"), x, &conv, fold)
    };
    let shortcut = match block.shortcut {
        Shortcut::ZeroPad if changes => {
            let mut y = x.to_owned();
            if block.stride != 1 {
                let s = block.stride;
                y = b.slice(
                    &format!("{p}.shortcut.slice"),
                    &y,
                    &[0, 0],
                    &[i64::MAX, i64::MAX],
                    &[2, 3],
                    &[s, s],
                );
            }
            let extra = block.out - in_channels;
            let (begin, end) = (extra / 2, extra - extra / 2);
            b.pad(&format!("{p}.shortcut.pad"), &y, &[0, begin, 0, 0, 0, end, 0, 0])
        }
        Shortcut::ProjectWhereNeeded if changes => project(b, x, block.stride),
        Shortcut::ProjectAll => project(b, x, block.stride),
        Shortcut::PoolThenProject if changes => {
            let pooled = match block.stride {
                1 => x.to_owned(),
                s => b.avg_pool(&format!("{p}.shortcut.pool"), x, s, s, 0),
            };
            project(b, &pooled, 1)
        }
        _ => x.to_owned(),
    };
    let y = b.add(&format!("{p}.add"), &branch, &shortcut);
    b.relu(&format!("{p}.relu"), &y)
}

pub(crate) fn image_model(name: &str, opset: i64, image: &ImageSpec) -> (ModelBuilder, String) {
    let mut b = ModelBuilder::new(name, opset).emit_value_info(image.value_info);
    let dims = [image.batch.clone(), image.channels.into(), image.size.into(), image.size.into()];
    let x = b.input("input", &dims);
    (b, x)
}

/// GlobalAveragePool -> Flatten -> Gemm, marked as the graph output.
pub(crate) fn classifier(b: &mut ModelBuilder, x: &str, classes: i64) {
    let y = b.global_avg_pool("head.pool", x);
    let y = b.flatten("head.flatten", &y, 1);
    let y = b.gemm("head.fc", &y, classes, &Init::HeNormal);
    b.output(&y);
}

fn trap_image() -> ImageSpec {
    ImageSpec { batch: Dim::batch(), channels: 3, size: 8, classes: 4, value_info: true }
}

/// `(1 - mask) * -10000`, unsqueezed to `[N, 1, 1, T]`.
fn additive_mask(b: &mut ModelBuilder, p: &str, mask: &str) -> String {
    let m = b.unsqueeze(&format!("{p}.unsqueeze"), mask, &[1, 2]);
    let one = b.scalar(&format!("{p}.one"), 1.0);
    let inverse = b.sub(&format!("{p}.invert"), &one, &m);
    b.mul_const(&format!("{p}.scale"), &inverse, &[], vec![-10000.0])
}

/// Static `[T, head_dim]` cosine and sine tables, the frequency of column `j`
/// being `10000^(-2 (j mod head_dim/2) / head_dim)`. Computed in f64 and
/// rounded once, so a last-bit difference between platform maths libraries
/// almost never reaches the stored f32 (the fixtures must regenerate to the
/// same bytes everywhere).
pub(crate) fn rotary_tables(
    b: &mut ModelBuilder,
    p: &str,
    seq_len: i64,
    head_dim: i64,
) -> (String, String) {
    let half = head_dim / 2;
    let angles: Vec<f64> = (0..seq_len)
        .flat_map(|pos| {
            (0..head_dim).map(move |j| {
                let freq = 10000f64.powf(-2.0 * (j % half) as f64 / head_dim as f64);
                pos as f64 * freq
            })
        })
        .collect();
    let cos = angles.iter().map(|a| a.cos() as f32).collect();
    let sin = angles.iter().map(|a| a.sin() as f32).collect();
    let cos = b.init(&format!("{p}.cos"), &[seq_len, head_dim], cos);
    let sin = b.init(&format!("{p}.sin"), &[seq_len, head_dim], sin);
    (cos, sin)
}

fn refs(names: &[String]) -> Vec<&str> {
    names.iter().map(String::as_str).collect()
}
