//! The models of issue 15 (real models' structure): weights held in
//! Constant nodes, sums that are not blocks, shortcuts from a learned
//! constant, branches of unusual form, regular unspanned layers, batch axes
//! that are not the first, stages of changing layout and blocks inside
//! control flow. Each is committed under `fixtures/structure/` with what an
//! audit of it should find, listed in `fixtures/structure/MANIFEST.txt`.
//!
//! The census of each case is richer than [`crate::fixtures::Census`]: the
//! blocks by shortcut kind and placement as the report names them, the blocks
//! of each stage in order, and the merges that are not blocks by reason.

use std::fmt::Write as _;
use std::io;
use std::path::{Path, PathBuf};

use prost::Message;

use shunt::proto::attribute_proto::AttributeType;
use shunt::proto::{AttributeProto, GraphProto, ModelProto, NodeProto, ValueInfoProto};

use crate::builder::{Attention, Conv, Dim, Form, Init, ModelBuilder};
use crate::zoo::{self, BlockDesign, ImageSpec, ResBlock, Shortcut};

/// What a scan of a case should find.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct Expect {
    /// Blocks by shortcut kind (`identity`, `projection`, …), kinds with
    /// no block left out.
    pub shortcuts: Vec<(&'static str, usize)>,
    /// Blocks by placement (`post-activation`, `pre-norm`, …).
    pub placements: Vec<(&'static str, usize)>,
    /// The number of blocks of each stage, in order.
    pub stages: Vec<usize>,
    /// Merges that are not blocks, by reason (`no-learned-layer`, …).
    pub not_blocks: Vec<(&'static str, usize)>,
    /// Concatenative skips.
    pub concat_skips: usize,
    /// Empty: the census is a scan's. Otherwise the arguments of the
    /// `audit` whose measured shapes give the stages (static shape
    /// inference stops in this model).
    pub audit_args: Vec<&'static str>,
}

impl Expect {
    /// The number of residual blocks.
    pub fn blocks(&self) -> usize {
        self.shortcuts.iter().map(|s| s.1).sum()
    }
}

/// One committed case.
#[derive(Debug, Clone)]
pub struct Case {
    /// Path under `fixtures/`, with `/` separators.
    pub path: &'static str,
    /// The model.
    pub model: ModelProto,
    /// The item of issue 15 it belongs to and what it isolates.
    pub isolates: &'static str,
    /// What a scan should find.
    pub expect: Expect,
    /// Where the expected census comes from: check-values ids, a module
    /// definition, or "recalled from memory".
    pub source: &'static str,
}

/// Every case, in manifest order.
pub fn all() -> Vec<Case> {
    let r18 = zoo::ResNetConfig { width_divisor: 32, ..zoo::ResNetConfig::resnet18() };
    vec![
        Case {
            path: "structure/resnet18_constant_weights.onnx",
            model: weights_as_constants(zoo::resnet(&r18)),
            isolates: "item 8: fixtures/resnet18_b.onnx with every initializer a Constant node and no value_info",
            expect: Expect {
                shortcuts: vec![("identity", 5), ("projection", 3)],
                placements: vec![("post-activation", 8)],
                stages: vec![2, 2, 2, 2],
                not_blocks: Vec::new(),
                concat_skips: 0,
                audit_args: Vec::new(),
            },
            source: "R1 R2 R3",
        },
        Case {
            path: "structure/segmentation_head_sum.onnx",
            model: segmentation_head_sum(),
            isolates: "item 6: FCN-style head, 1x1 classifiers of three backbone maps summed coarse to fine; two real blocks",
            expect: Expect {
                shortcuts: vec![("identity", 2)],
                placements: vec![("post-activation", 2)],
                stages: vec![1, 1],
                not_blocks: vec![("sum-of-heads", 2)],
                concat_skips: 0,
                audit_args: Vec::new(),
            },
            source: "FCN skip architecture (Long et al., arXiv:1411.4038, Fig. 3), recalled from memory; torchvision's FCN upsamples by interpolation",
        },
        Case {
            path: "structure/detector_box_decode.onnx",
            model: detector_box_decode(),
            isolates: "item 6: centre + size/2 from an offset and a size head on one map; corner from two slices of one head output",
            expect: Expect {
                shortcuts: vec![("identity", 2)],
                placements: vec![("post-activation", 2)],
                stages: vec![1, 1],
                not_blocks: vec![("no-learned-layer", 1), ("sum-of-heads", 1)],
                concat_skips: 0,
                audit_args: Vec::new(),
            },
            source: "CenterNet (Objects as Points, arXiv:1904.07850) offset and size heads, recalled from memory",
        },
        Case {
            path: "structure/cait_class_attention.onnx",
            model: cait_class_attention(),
            isolates: "item 5: CaiT layout, 2 self-attention then 2 class-attention layers; the first adds its branch to the learned class token expanded to the batch; no value_info",
            expect: Expect {
                shortcuts: vec![("identity", 7), ("parameter", 1)],
                placements: vec![("pre-norm", 8)],
                stages: vec![4, 4],
                not_blocks: Vec::new(),
                // The second class-attention layer joins the patches with the
                // class token computed from them: a Concat of a tensor and a
                // path from it with learned layers, as in DenseNet.
                concat_skips: 1,
                audit_args: Vec::new(),
            },
            source: "K1 (CaiT: class-attention layers update only the class token, pre-norm, LayerScale)",
        },
        Case {
            path: "structure/poolformer_s12_like.onnx",
            model: poolformer_s12_like(),
            isolates: "item 4: PoolFormer-S12 layout, token mixer pool(n) - n with no learned layer, GroupNorm(1) spelled Reshape -> InstanceNormalization -> Reshape -> scale/shift, LayerScale; no value_info",
            expect: Expect {
                shortcuts: vec![("identity", 24)],
                placements: vec![("pre-norm", 24)],
                stages: vec![4, 4, 12, 4],
                not_blocks: Vec::new(),
                concat_skips: 0,
                audit_args: Vec::new(),
            },
            source: "F1 (PoolFormer-S12: stages of 2, 2, 6, 2 blocks, two pre-norm residual sub-layers each)",
        },
        Case {
            path: "structure/nf_scaled_preact.onnx",
            model: nf_scaled_preact(),
            isolates: "item 4: normaliser-free blocks h + 0.2 * f(h * (1/beta)): a scalar Mul between the block input and the branch's first ReLU",
            expect: Expect {
                shortcuts: vec![("identity", 3)],
                placements: vec![("pre-activation", 3)],
                stages: vec![3],
                not_blocks: Vec::new(),
                concat_skips: 0,
                audit_args: Vec::new(),
            },
            source: "N1 (recalled from memory: x + alpha * f(x / beta), the activation first in f)",
        },
        Case {
            path: "structure/convmixer_like.onnx",
            model: convmixer_like(None),
            isolates: "item 7: ConvMixer layout, a residual around each depthwise conv only, then an unspanned pointwise conv: one stage pattern, no lost shortcut",
            expect: Expect {
                shortcuts: vec![("identity", 6)],
                placements: vec![("unactivated", 6)],
                stages: vec![6],
                not_blocks: Vec::new(),
                concat_skips: 0,
                audit_args: Vec::new(),
            },
            source: "ConvMixer (Patches Are All You Need?, arXiv:2201.09792), recalled from memory",
        },
        Case {
            path: "structure/convmixer_lost_shortcut.onnx",
            model: convmixer_like(Some(3)),
            isolates: "item 7: convmixer_like with block 3's shortcut removed: the one gap that breaks the stage's pattern",
            expect: Expect {
                shortcuts: vec![("identity", 5)],
                placements: vec![("unactivated", 5)],
                stages: vec![5],
                not_blocks: Vec::new(),
                concat_skips: 0,
                audit_args: Vec::new(),
            },
            source: "ConvMixer (arXiv:2201.09792), recalled from memory; one shortcut removed",
        },
        Case {
            path: "structure/streaming_state.onnx",
            model: streaming_state(),
            isolates: "item 2: inputs input [batch, samples], state [2, batch, 16] (batch on axis 1) and a scalar int64 sr; two post-activation blocks",
            expect: Expect {
                shortcuts: vec![("identity", 2)],
                placements: vec![("post-activation", 2)],
                stages: vec![2],
                not_blocks: Vec::new(),
                concat_skips: 0,
                audit_args: Vec::new(),
            },
            source: "hand-built (a streaming audio model's inputs as the issue describes them); R3 for the blocks",
        },
        Case {
            path: "structure/swin_like.onnx",
            model: swin_like(),
            isolates: "item 3: Swin-T layout, the residual stream [B, H, W, C] at the attention merges and [B, H*W, C] at the MLP merges, Reshape targets computed from Shape; no value_info",
            expect: Expect {
                shortcuts: vec![("identity", 24)],
                placements: vec![("pre-norm", 24)],
                stages: vec![4, 4, 12, 4],
                // The Concat of patch merging joins four slices of one map:
                // no learned layer between its fork and it, not a skip.
                not_blocks: vec![("no-learned-layer", 3)],
                concat_skips: 0,
                audit_args: Vec::new(),
            },
            source: "W1 (recalled from memory: Swin-T stages of 2, 2, 6, 2 blocks, two pre-norm sub-layers each, patch merging between stages)",
        },
        Case {
            path: "structure/resnet18_dynamic_size.onnx",
            model: dynamic_size(zoo::resnet(&r18)),
            isolates: "item 3: fixtures/resnet18_b.onnx with a symbolic input height and width and no value_info: static shapes stop at the first strided conv; stages from the shapes the audit measures",
            expect: Expect {
                shortcuts: vec![("identity", 5), ("projection", 3)],
                placements: vec![("post-activation", 8)],
                stages: vec![2, 2, 2, 2],
                not_blocks: Vec::new(),
                concat_skips: 0,
                audit_args: vec!["--dim", "height=32", "--dim", "width=32", "--batch", "2"],
            },
            source: "R1 R2 R3",
        },
        Case {
            path: "structure/if_sample_rate.onnx",
            model: if_sample_rate(),
            isolates: "item 1: the whole network inside an If on a scalar int64 sample rate sr (sr == 16000): then_branch a stem and 3 post-activation blocks, else_branch a stem and 2; both read the outer input [batch, samples]",
            expect: Expect {
                shortcuts: vec![("identity", 5)],
                placements: vec![("post-activation", 5)],
                stages: vec![3, 2],
                not_blocks: Vec::new(),
                concat_skips: 0,
                audit_args: Vec::new(),
            },
            source: "hand-built (a sample-rate switch as the issue describes it); the census from the module definition, testkit::structure::if_sample_rate",
        },
        Case {
            path: "structure/scan_recurrence.onnx",
            model: scan_recurrence(),
            isolates: "item 1: a residual recurrent cell in a Scan over x [steps, batch, 8] from h0 [batch, 8]: h' = two pre-norm residual MLP blocks on tanh(W [h; x_t])",
            expect: Expect {
                shortcuts: vec![("identity", 2)],
                placements: vec![("pre-norm", 2)],
                stages: vec![2],
                // The cell's Concat of the state and the step: two inputs
                // and no learned layer between them and it.
                not_blocks: vec![("no-learned-layer", 1)],
                concat_skips: 0,
                audit_args: Vec::new(),
            },
            source: "hand-built (no exporter of the pinned set writes Scan); the census from the module definition, testkit::structure::scan_recurrence",
        },
        Case {
            path: "structure/loop_recurrence.onnx",
            model: loop_recurrence(),
            isolates: "item 1: the cell of scan_recurrence in a Loop of trip count steps, driven by the outer x [batch, 8]; tract-onnx 0.23.9 has no Loop, so the audit reports the structure and the run's error",
            expect: Expect {
                shortcuts: vec![("identity", 2)],
                placements: vec![("pre-norm", 2)],
                stages: vec![2],
                // The cell's Concat of the state and the step: two inputs
                // and no learned layer between them and it.
                not_blocks: vec![("no-learned-layer", 1)],
                concat_skips: 0,
                audit_args: Vec::new(),
            },
            source: "hand-built (torch.jit.script loops export as Loop); the census from the module definition, testkit::structure::loop_recurrence",
        },
    ]
}

/// `model` with its image input's height and width made symbolic (`height`,
/// `width`) and its `value_info` dropped, as an export with dynamic spatial
/// axes leaves it.
pub fn dynamic_size(mut model: ModelProto) -> ModelProto {
    use shunt::proto::tensor_shape_proto::dimension::Value;
    let graph = model.graph.as_mut().expect("a built model has a graph");
    graph.value_info.clear();
    let shape = graph.input[0]
        .r#type
        .as_mut()
        .and_then(|t| match t.value.as_mut()? {
            shunt::proto::type_proto::Value::TensorType(t) => t.shape.as_mut(),
            _ => None,
        })
        .expect("the image input has a shape");
    for (axis, name) in [(2, "height"), (3, "width")] {
        shape.dim[axis].value = Some(Value::DimParam(name.to_owned()));
    }
    model
}

/// A Reshape of `x` whose target PyTorch computes at run time: the batch
/// from `Shape(of)`, then `rest` (a number, or the product of two axes of
/// `of` read from its shape, as `view(B, H * W, C)` exports). The builder is
/// told the output shape `dims`.
fn reshape_computed(
    b: &mut ModelBuilder,
    name: &str,
    x: &str,
    of: &str,
    rest: &[Part],
    dims: &[Dim],
) -> String {
    let shape = b.node("Shape", &format!("{name}.shape"), &[of], &[]);
    let axis = |b: &mut ModelBuilder, k: i64| {
        let index = b.init_i64(&format!("{name}.index{k}"), &[], vec![k]);
        b.node("Gather", &format!("{name}.dim{k}"), &[&shape, &index], &[])
    };
    let batch = axis(b, 0);
    let mut parts = vec![b.unsqueeze(&format!("{name}.batch"), &batch, &[0])];
    for (i, part) in rest.iter().enumerate() {
        parts.push(match part {
            Part::Fixed(v) => b.init_i64(&format!("{name}.fixed{i}"), &[1], vec![*v]),
            Part::Product(p, q) => {
                let (p, q) = (axis(b, *p), axis(b, *q));
                let product = b.mul(&format!("{name}.product{i}"), &p, &q);
                b.unsqueeze(&format!("{name}.part{i}"), &product, &[0])
            }
        });
    }
    let parts: Vec<&str> = parts.iter().map(String::as_str).collect();
    let target = b.concat(&format!("{name}.target"), &parts, 0);
    let out = b.node("Reshape", name, &[x, &target], &[]);
    b.declare_shape(&out, dims);
    out
}

/// One entry of a computed Reshape target.
enum Part {
    /// A constant size.
    Fixed(i64),
    /// The product of two axes of the reshaped tensor.
    Product(i64, i64),
}

/// Item 3: a Swin-T-like network ([W1], recalled from memory): a 4x4
/// stride-4 patch embedding (8x8 tokens at width 4, Swin-T's 96 divided by
/// 24) and LayerNorm, stages of 2, 2, 6, 2 blocks joined by patch merging
/// (four strided slices concatenated, LayerNorm, a linear layer to twice the
/// width). A block keeps its stream as `[B, H, W, C]` for window attention
/// (`x = x + WA(LN(x))`, windows of 2x2 tokens, one head, no shift) and as
/// `[B, H·W, C]` for the MLP (`t = t + MLP(LN(t))`), with the Reshapes
/// between the two computed from `Shape` as PyTorch exports `view`. No
/// `value_info`, so every stage shape comes from shape inference.
pub fn swin_like() -> ModelProto {
    let image = ImageSpec { value_info: false, ..ImageSpec::rgb(32) };
    let (mut b, x) = zoo::image_model("swin_like", 17, &image);
    let n = || Dim::batch();
    let patches = b.conv("patch_embed", &x, &Conv::new(4, 4).stride(4).pad(0).with_bias());
    let x = b.transpose("patch_embed.nhwc", &patches, &[0, 2, 3, 1]);
    let mut x = b.layer_norm("patch_embed.norm", &x, Form::Fused);
    let (mut size, mut width) = (8i64, 4i64);
    for (stage, &depth) in [2usize, 2, 6, 2].iter().enumerate() {
        if stage > 0 {
            let p = format!("merge{stage}");
            let picks = [(0, 0), (1, 0), (0, 1), (1, 1)];
            let parts: Vec<String> = picks
                .iter()
                .map(|&(r, c)| {
                    let name = format!("{p}.x{r}{c}");
                    b.slice(&name, &x, &[r, c], &[i64::MAX, i64::MAX], &[1, 2], &[2, 2])
                })
                .collect();
            let parts: Vec<&str> = parts.iter().map(String::as_str).collect();
            let joined = b.concat(&format!("{p}.concat"), &parts, -1);
            let joined = b.layer_norm(&format!("{p}.norm"), &joined, Form::Fused);
            width *= 2;
            size /= 2;
            x = b.linear(&format!("{p}.reduction"), &joined, width, &Init::HeNormal, false);
        }
        let ws = size.min(2);
        for j in 0..depth {
            let p = format!("stage{}.{j}", stage + 1);
            let nx = b.layer_norm(&format!("{p}.norm1"), &x, Form::Fused);
            let grid = [size / ws, ws, size / ws, ws, width].map(Part::Fixed);
            let grid_dims =
                [n(), (size / ws).into(), ws.into(), (size / ws).into(), ws.into(), width.into()];
            let split =
                reshape_computed(&mut b, &format!("{p}.window.split"), &nx, &nx, &grid, &grid_dims);
            let split = b.transpose(&format!("{p}.window.order"), &split, &[0, 1, 3, 2, 4, 5]);
            let tokens = b.reshape(&format!("{p}.window.tokens"), &split, &[-1, ws * ws, width]);
            b.declare_shape(
                &tokens,
                &[Dim::Sym("windows".to_owned()), (ws * ws).into(), width.into()],
            );
            let spec = Attention { heads: 1, mask: None, rotary: None };
            let a = b.attention(&format!("{p}.attn"), &tokens, &spec);
            let back = [size / ws, size / ws, ws, ws, width].map(Part::Fixed);
            let back_dims =
                [n(), (size / ws).into(), (size / ws).into(), ws.into(), ws.into(), width.into()];
            let a =
                reshape_computed(&mut b, &format!("{p}.window.merge"), &a, &x, &back, &back_dims);
            let a = b.transpose(&format!("{p}.window.unorder"), &a, &[0, 1, 3, 2, 4, 5]);
            let map = [size, size, width].map(Part::Fixed);
            let map_dims = [n(), size.into(), size.into(), width.into()];
            let a = reshape_computed(&mut b, &format!("{p}.window.map"), &a, &x, &map, &map_dims);
            x = b.add(&format!("{p}.add1"), &x, &a);
            let flat = [Part::Product(1, 2), Part::Fixed(width)];
            let flat_dims = [n(), (size * size).into(), width.into()];
            let t = reshape_computed(&mut b, &format!("{p}.tokens"), &x, &x, &flat, &flat_dims);
            let nt = b.layer_norm(&format!("{p}.norm2"), &t, Form::Fused);
            let h = b.linear(&format!("{p}.mlp.fc1"), &nt, 4 * width, &Init::HeNormal, true);
            let h = b.gelu(&format!("{p}.mlp.act"), &h, Form::Decomposed);
            let h = b.linear(&format!("{p}.mlp.fc2"), &h, width, &Init::HeNormal, true);
            let t = b.add(&format!("{p}.add2"), &t, &h);
            let map = [size, size, width].map(Part::Fixed);
            x = reshape_computed(&mut b, &format!("{p}.map"), &t, &t, &map, &map_dims);
        }
    }
    let x = b.layer_norm("norm", &x, Form::Fused);
    let pooled = b.reduce_mean("pool", &x, &[1, 2]);
    let flat = b.reshape("head.flatten", &pooled, &[0, width]);
    let logits = b.gemm("head.fc", &flat, image.classes, &Init::HeNormal);
    b.output(&logits);
    b.finish()
}

/// Item 2: a streaming audio model's inputs: `input [batch, samples]`
/// (float), a recurrent `state [2, batch, 16]` whose batch is its second
/// axis, and a scalar int64 sample rate `sr`. The waveform is unsqueezed to
/// `[batch, 1, 1, samples]`, a 3x3 conv to 8 channels and ReLU, scaled by
/// `sr / 16000` and by `sigmoid(Gemm(state as [batch, 32]))` per channel,
/// then two post-activation basic blocks `relu(x + conv(relu(conv(x))))`
/// and a 3x3 conv to one channel. A second output is `state / 2`.
pub fn streaming_state() -> ModelProto {
    let mut b = ModelBuilder::new("streaming_state", 17);
    let batch = || Dim::Sym("batch".to_owned());
    let input = b.input("input", &[batch(), Dim::Sym("samples".to_owned())]);
    let state = b.input("state", &[2.into(), batch(), 16.into()]);
    let sr = b.typed_input("sr", shunt::proto::tensor_proto::DataType::Int64, &[]);
    let x = b.unsqueeze("wave", &input, &[1, 2]);
    let x = b.conv("stem", &x, &Conv::new(8, 3).with_bias());
    let x = b.relu("stem.relu", &x);
    let rate = b.node("Cast", "sr.float", &[&sr], &[("to", crate::builder::Attr::Int(1))]);
    b.declare_shape(&rate, &[]);
    let reference = b.scalar("sr.reference", 16000.0);
    let gain = b.node("Div", "sr.gain", &[&rate, &reference], &[]);
    let x = b.mul("sr.scale", &x, &gain);
    let per_sample = b.transpose("state.samples", &state, &[1, 0, 2]);
    let flat = b.reshape("state.flat", &per_sample, &[0, 32]);
    let cond = b.gemm("state.fc", &flat, 8, &Init::HeNormal);
    let cond = b.sigmoid("state.gate", &cond);
    let cond = b.unsqueeze("state.channels", &cond, &[2, 3]);
    let mut x = b.mul("state.scale", &x, &cond);
    for i in 0..2 {
        let p = format!("block{i}");
        let y = b.conv(&format!("{p}.conv1"), &x, &Conv::new(8, 3).with_bias());
        let y = b.relu(&format!("{p}.relu1"), &y);
        let y = b.conv(&format!("{p}.conv2"), &y, &Conv::new(8, 3).with_bias());
        let y = b.add(&format!("{p}.add"), &y, &x);
        x = b.relu(&format!("{p}.relu"), &y);
    }
    let out = b.conv("out", &x, &Conv::new(1, 3).with_bias());
    b.output(&out);
    let next = b.mul_const("state.next", &state, &[], vec![0.5]);
    b.output(&next);
    b.finish()
}

/// Item 7: a ConvMixer-like network (Trockman and Kolter, arXiv:2201.09792,
/// recalled from memory): a 2x2 stride-2 patch embedding to 8 channels, GELU
/// and BN, then 6 layers of `x = x + BN(GELU(depthwise 5x5 conv(x)))`
/// followed by `x = BN(GELU(pointwise conv(x)))`, which no shortcut spans
/// by design. With `lost`, block `lost`'s shortcut is removed (its `Add`
/// becomes an `Identity` of the branch).
pub fn convmixer_like(lost: Option<usize>) -> ModelProto {
    let image = ImageSpec::rgb(16);
    let (mut b, x) = zoo::image_model("convmixer_like", 17, &image);
    let h = 8;
    let y = b.conv("patch", &x, &Conv::new(h, 2).stride(2).pad(0).with_bias());
    let y = b.gelu("patch.act", &y, Form::Decomposed);
    let mut x = b.bn("patch.bn", &y);
    for i in 0..6 {
        let p = format!("layer{i}");
        let y = b.conv(&format!("{p}.depthwise"), &x, &Conv::new(h, 5).groups(h).with_bias());
        let y = b.gelu(&format!("{p}.act1"), &y, Form::Decomposed);
        let y = b.bn(&format!("{p}.bn1"), &y);
        let y = b.add(&format!("{p}.add"), &y, &x);
        let y = b.conv(&format!("{p}.pointwise"), &y, &Conv::new(h, 1).with_bias());
        let y = b.gelu(&format!("{p}.act2"), &y, Form::Decomposed);
        x = b.bn(&format!("{p}.bn2"), &y);
    }
    zoo::classifier(&mut b, &x, image.classes);
    let mut model = b.finish();
    if let Some(i) = lost {
        let shortcut = if i == 0 { "patch.bn".to_owned() } else { format!("layer{}.bn2", i - 1) };
        let removed =
            crate::surgery::remove_shortcut(&mut model, &format!("layer{i}.add"), &shortcut);
        assert!(removed, "layer{i}.add has the shortcut {shortcut}");
    }
    model
}

/// Item 4: a PoolFormer-S12-like network ([F1]): a 7x7 stride-4 patch
/// embedding, stages of 2, 2, 6, 2 blocks at widths 64, 128, 320, 512
/// divided by 16, joined by 3x3 stride-2 patch embeddings. Each block is
/// `x = x + γ1 · (pool(n) − n)` with `n = GN(x)` and a 3x3 average pool of
/// stride 1 that does not count the padding, then `x = x + γ2 · MLP(GN(x))`
/// with 1x1 convolutions (ratio 4) and GELU. The group norm has one group,
/// spelled as PyTorch exports `nn.GroupNorm` below opset 18: `Reshape` to
/// `[N, 1, -1]`, `InstanceNormalization` with unit scale, `Reshape` back,
/// then the per-channel scale and shift. LayerScale starts at 0.1.
pub fn poolformer_s12_like() -> ModelProto {
    let image = ImageSpec { value_info: false, ..ImageSpec::rgb(32) };
    let (mut b, x) = zoo::image_model("poolformer_s12_like", 17, &image);
    let group_norm = |b: &mut ModelBuilder, p: &str, x: &str| {
        let c = b.dim(x, 1);
        let grouped = b.reshape(&format!("{p}.group"), x, &[0, 1, -1]);
        let one = b.init(&format!("{p}.instance.scale"), &[1], vec![1.0]);
        let zero = b.init(&format!("{p}.instance.bias"), &[1], vec![0.0]);
        let normed = b.node(
            "InstanceNormalization",
            &format!("{p}.instance"),
            &[&grouped, &one, &zero],
            &[("epsilon", crate::builder::Attr::Float(1e-5))],
        );
        let grouped_dims = b.shape(&grouped).expect("a known shape").to_vec();
        b.declare_shape(&normed, &grouped_dims);
        let (h, w) = (b.dim(x, 2), b.dim(x, 3));
        let back = b.reshape(&format!("{p}.ungroup"), &normed, &[0, c, h, w]);
        let scaled = b.mul_const(&format!("{p}.weight"), &back, &[c, 1, 1], vec![1.0; c as usize]);
        let shift = b.init(&format!("{p}.bias"), &[c, 1, 1], vec![0.0; c as usize]);
        b.add(&format!("{p}.shift"), &scaled, &shift)
    };
    let layer_scale = |b: &mut ModelBuilder, name: &str, y: &str| {
        let c = b.dim(y, 1);
        b.mul_const(name, y, &[c, 1, 1], vec![0.1; c as usize])
    };
    let widths = [64 / 16, 128 / 16, 320 / 16, 512 / 16];
    let mut x = b.conv("patch_embed.0", &x, &Conv::new(widths[0], 7).stride(4).pad(2).with_bias());
    for (stage, &blocks) in [2usize, 2, 6, 2].iter().enumerate() {
        let width = widths[stage];
        if stage > 0 {
            let conv = Conv::new(width, 3).stride(2).pad(1).with_bias();
            x = b.conv(&format!("patch_embed.{stage}"), &x, &conv);
        }
        for j in 0..blocks {
            let p = format!("stage{}.{j}", stage + 1);
            let n = group_norm(&mut b, &format!("{p}.norm1"), &x);
            let pooled = b.avg_pool(&format!("{p}.mixer.pool"), &n, 3, 1, 1);
            let mixed = b.sub(&format!("{p}.mixer.sub"), &pooled, &n);
            let mixed = layer_scale(&mut b, &format!("{p}.gamma1"), &mixed);
            x = b.add(&format!("{p}.add1"), &x, &mixed);
            let n = group_norm(&mut b, &format!("{p}.norm2"), &x);
            let h = b.conv(&format!("{p}.mlp.fc1"), &n, &Conv::new(4 * width, 1).with_bias());
            let h = b.gelu(&format!("{p}.mlp.act"), &h, Form::Decomposed);
            let h = b.conv(&format!("{p}.mlp.fc2"), &h, &Conv::new(width, 1).with_bias());
            let h = layer_scale(&mut b, &format!("{p}.gamma2"), &h);
            x = b.add(&format!("{p}.add2"), &x, &h);
        }
    }
    let n = group_norm(&mut b, "norm", &x);
    zoo::classifier(&mut b, &n, image.classes);
    b.finish()
}

/// Item 4: normaliser-free residual blocks ([N1], from memory) `h + α ·
/// f(h · (1/β))` with `α = 0.2` and `β = sqrt(1 + i α²)` the expected
/// standard deviation of block `i`'s input, `f` = ReLU → 3x3 conv → ReLU →
/// 3x3 conv; the scalar `Mul` sits between the block input and the
/// branch's first activation. A 3x3 stem to 8 channels, three blocks at
/// 16x16, the usual head.
pub fn nf_scaled_preact() -> ModelProto {
    let (mut b, x) = zoo::image_model("nf_scaled_preact", 17, &ImageSpec::rgb(16));
    let alpha: f32 = 0.2;
    let mut h = b.conv("stem", &x, &Conv::new(8, 3).with_bias());
    for i in 0..3 {
        let p = format!("block{i}");
        let beta = (1.0 + i as f32 * alpha * alpha).sqrt();
        let y = b.mul_const(&format!("{p}.inv_beta"), &h, &[], vec![1.0 / beta]);
        let y = b.relu(&format!("{p}.relu1"), &y);
        let y = b.conv(&format!("{p}.conv1"), &y, &Conv::new(8, 3).with_bias());
        let y = b.relu(&format!("{p}.relu2"), &y);
        let y = b.conv(&format!("{p}.conv2"), &y, &Conv::new(8, 3).with_bias());
        let y = b.mul_const(&format!("{p}.alpha"), &y, &[], vec![alpha]);
        h = b.add(&format!("{p}.add"), &h, &y);
    }
    zoo::classifier(&mut b, &h, 10);
    b.finish()
}

/// Item 5: a CaiT-like network ([K1]): a 4x4 stride-4 patch embedding to 8
/// channels (16 tokens), two pre-norm self-attention layers, then two
/// class-attention layers that update only the class token: `cls = cls +
/// γ1 · CA(LN(concat(cls, x)))`, `cls = cls + γ2 · MLP(LN(cls))`, where the
/// first layer's `cls` is the learned `[1, 1, 8]` token expanded to the
/// batch (`Expand` to `concat(Shape(x)[0:1], [1, 8])`, as PyTorch exports
/// `cls_token.expand(B, -1, -1)`). Every branch ends in a per-channel
/// LayerScale of 0.1. No `value_info`: the expanded shape is inferred.
pub fn cait_class_attention() -> ModelProto {
    let d = 8;
    let image = ImageSpec { value_info: false, ..ImageSpec::rgb(16) };
    let (mut b, x) = zoo::image_model("cait_class_attention", 17, &image);
    let patches = b.conv("patch_embed", &x, &Conv::new(d, 4).stride(4).pad(0).with_bias());
    let tokens = b.reshape("patch_embed.flatten", &patches, &[0, d, 16]);
    let mut x = b.transpose("patch_embed.tokens", &tokens, &[0, 2, 1]);
    let gamma =
        |b: &mut ModelBuilder, name: &str, y: &str| b.mul_const(name, y, &[d], vec![0.1; 8]);
    let mlp = |b: &mut ModelBuilder, p: &str, y: &str| {
        let n = b.layer_norm(&format!("{p}.norm2"), y, Form::Fused);
        let h = b.linear(&format!("{p}.mlp.fc1"), &n, 4 * d, &Init::HeNormal, true);
        let h = b.gelu(&format!("{p}.mlp.act"), &h, Form::Decomposed);
        let h = b.linear(&format!("{p}.mlp.fc2"), &h, d, &Init::HeNormal, true);
        gamma(b, &format!("{p}.gamma2"), &h)
    };
    for i in 0..2 {
        let p = format!("blocks.{i}");
        let n = b.layer_norm(&format!("{p}.norm1"), &x, Form::Fused);
        let spec = Attention { heads: 2, mask: None, rotary: None };
        let a = b.attention(&format!("{p}.attn"), &n, &spec);
        let a = gamma(&mut b, &format!("{p}.gamma1"), &a);
        x = b.add(&format!("{p}.add1"), &x, &a);
        let h = mlp(&mut b, &p, &x);
        x = b.add(&format!("{p}.add2"), &x, &h);
    }
    // The class token, expanded to the batch of x.
    let token = b.init_filled("cls_token", &[1, 1, d], &Init::Normal(1.0), 1);
    let shape = b.node("Shape", "cls_token.shape", &[&x], &[]);
    let batch = b.slice("cls_token.batch", &shape, &[0], &[1], &[0], &[1]);
    let rest = b.init_i64("cls_token.rest", &[2], vec![1, d]);
    let target = b.concat("cls_token.target", &[&batch, &rest], 0);
    let mut cls = b.node("Expand", "cls_token.expand", &[&token, &target], &[]);
    b.declare_shape(&cls, &[Dim::batch(), 1.into(), d.into()]);
    let init = Init::Normal(1.0 / (d as f32).sqrt());
    for i in 0..2 {
        let p = format!("cls_blocks.{i}");
        let u = b.concat(&format!("{p}.concat"), &[&cls, &x], 1);
        let n = b.layer_norm(&format!("{p}.norm1"), &u, Form::Fused);
        let first = b.slice(&format!("{p}.attn.cls"), &n, &[0], &[1], &[1], &[1]);
        let q = b.linear(&format!("{p}.attn.q"), &first, d, &init, true);
        let k = b.linear(&format!("{p}.attn.k"), &n, d, &init, true);
        let v = b.linear(&format!("{p}.attn.v"), &n, d, &init, true);
        let k_t = b.transpose(&format!("{p}.attn.k.t"), &k, &[0, 2, 1]);
        let scores = b.matmul(&format!("{p}.attn.scores"), &q, &k_t);
        let scaled =
            b.mul_const(&format!("{p}.attn.scale"), &scores, &[], vec![1.0 / (d as f32).sqrt()]);
        let probs = b.softmax(&format!("{p}.attn.softmax"), &scaled, -1);
        let context = b.matmul(&format!("{p}.attn.context"), &probs, &v);
        let a = b.linear(&format!("{p}.attn.proj"), &context, d, &init, true);
        let a = gamma(&mut b, &format!("{p}.gamma1"), &a);
        cls = b.add(&format!("{p}.add1"), &cls, &a);
        let h = mlp(&mut b, &p, &cls);
        cls = b.add(&format!("{p}.add2"), &cls, &h);
    }
    let n = b.layer_norm("norm", &cls, Form::Fused);
    let flat = b.reshape("head.flatten", &n, &[0, d]);
    let logits = b.gemm("head.fc", &flat, image.classes, &Init::HeNormal);
    b.output(&logits);
    b.finish()
}

/// A small backbone for the head cases: a stride-2 stem, an identity basic
/// block `layer1.0` at 16x16, a stride-2 stage `down2` and an identity
/// block `layer2.0` at 8x8. Returns the two block outputs.
fn backbone(b: &mut ModelBuilder, x: &str) -> (String, String) {
    let stem = b.conv_bn("stem.conv", "stem.bn", x, &Conv::new(4, 3).stride(2), false);
    let stem = b.relu("stem.relu", &stem);
    let basic = |prefix: &str, width| ResBlock {
        prefix: prefix.to_owned(),
        width,
        out: width,
        stride: 1,
        design: BlockDesign::Basic,
        shortcut: Shortcut::ProjectWhereNeeded,
        fold_bn: false,
    };
    let c1 = zoo::post_activation_block(b, &stem, &basic("layer1.0", 4));
    let down = b.conv_bn("down2.conv", "down2.bn", &c1, &Conv::new(8, 3).stride(2), false);
    let down = b.relu("down2.relu", &down);
    let c2 = zoo::post_activation_block(b, &down, &basic("layer2.0", 8));
    (c1, c2)
}

/// Item 6: a segmentation head that sums the predictions of 1x1 classifiers
/// on three maps, coarse to fine (FCN's skip architecture, as torchvision's
/// FCN spells upsampling: interpolation, no learned layer), then upsamples
/// to the input size. `fuse3` and `fuse2` each add a classifier of a map to
/// a prediction computed further down from the same map: the sum of two
/// heads, read by no learned layer.
pub fn segmentation_head_sum() -> ModelProto {
    let image = ImageSpec { classes: 5, ..ImageSpec::rgb(32) };
    let (mut b, x) = zoo::image_model("segmentation_head_sum", 17, &image);
    let (c1, c2) = backbone(&mut b, &x);
    let c3 = b.conv_bn("down3.conv", "down3.bn", &c2, &Conv::new(16, 3).stride(2), false);
    let c3 = b.relu("down3.relu", &c3);
    let classifier = Conv::new(image.classes, 1).with_bias();
    let score3 = b.conv("score3", &c3, &classifier);
    let up3 = b.upsample2x("score3.up", &score3);
    let score2 = b.conv("score2", &c2, &classifier);
    let fuse2 = b.add("fuse2", &score2, &up3);
    let up2 = b.upsample2x("fuse2.up", &fuse2);
    let score1 = b.conv("score1", &c1, &classifier);
    let fuse1 = b.add("fuse1", &score1, &up2);
    let out = b.upsample2x("out", &fuse1);
    b.output(&out);
    b.finish()
}

/// Item 6: a detector head on the backbone's 8x8 map: a shared 3x3 conv,
/// then an offset head and a size head (1x1 convs to 2 channels) decoded as
/// `centre = offset + grid`, `max = centre + size / 2` (the sum of two
/// heads) and `min = centre - size / 2`; and a box head of 4 channels whose
/// two slices are decoded as `corner = xy + wh / 2` (arithmetic on one head
/// output, no learned layer between its fork and the sum).
pub fn detector_box_decode() -> ModelProto {
    let (mut b, x) = zoo::image_model("detector_box_decode", 17, &ImageSpec::rgb(32));
    let (_, c2) = backbone(&mut b, &x);
    let h = b.conv("head.conv", &c2, &Conv::new(8, 3).with_bias());
    let h = b.relu("head.relu", &h);
    let offset = b.conv("head.offset", &h, &Conv::new(2, 1).with_bias());
    let size = b.conv("head.size", &h, &Conv::new(2, 1).with_bias());
    // Channel 0 holds each cell's column, channel 1 its row.
    let grid: Vec<f32> =
        (0..2 * 64).map(|i| if i < 64 { i % 8 } else { (i - 64) / 8 } as f32).collect();
    let grid = b.init("decode.grid", &[1, 2, 8, 8], grid);
    let centre = b.add("decode.centre", &offset, &grid);
    let half = b.mul_const("decode.half", &size, &[], vec![0.5]);
    let max = b.add("decode.max", &centre, &half);
    let min = b.sub("decode.min", &centre, &half);
    let boxes = b.conv("head.box", &h, &Conv::new(4, 1).with_bias());
    let xy = b.slice("decode2.xy", &boxes, &[0], &[2], &[1], &[1]);
    let wh = b.slice("decode2.wh", &boxes, &[2], &[4], &[1], &[1]);
    let half_wh = b.mul_const("decode2.half", &wh, &[], vec![0.5]);
    let corner = b.add("decode2.corner", &xy, &half_wh);
    for out in [&min, &max, &corner] {
        b.output(out);
    }
    b.finish()
}

/// A graph attribute named `name`.
fn graph_attr(name: &str, g: GraphProto) -> AttributeProto {
    AttributeProto {
        name: name.to_owned(),
        r#type: AttributeType::Graph as i32,
        g: Some(g),
        ..AttributeProto::default()
    }
}

/// An integer attribute named `name`.
fn int_attr(name: &str, i: i64) -> AttributeProto {
    AttributeProto {
        name: name.to_owned(),
        r#type: AttributeType::Int as i32,
        i,
        ..AttributeProto::default()
    }
}

/// `vi` under another name.
fn renamed(vi: &ValueInfoProto, name: &str) -> ValueInfoProto {
    ValueInfoProto { name: name.to_owned(), ..vi.clone() }
}

/// Item 1: a network wrapped whole in an `If` on a sample-rate input, as
/// streaming audio models switch between their 16 kHz and 8 kHz networks:
/// inputs `input [batch, samples]` and a scalar int64 `sr`; the condition is
/// `sr == 16000`. Each branch reads the outer `input`, unsqueezes it to
/// `[batch, 1, 1, samples]`, and runs a 3x3 stem conv to 8 channels with a
/// ReLU, then post-activation blocks `relu(x + conv(relu(conv(x))))` (3 in
/// `then_branch`, 2 in `else_branch`, each with weights of its own), then a
/// conv to one channel. The branches' initializers stay inside them.
pub fn if_sample_rate() -> ModelProto {
    let batch = || Dim::Sym("batch".to_owned());
    let samples = || Dim::Sym("samples".to_owned());
    let branch = |prefix: &str, blocks: usize| -> GraphProto {
        let mut b = ModelBuilder::new(prefix, 17);
        let input = b.input("input", &[batch(), samples()]);
        let x = b.unsqueeze(&format!("{prefix}.wave"), &input, &[1, 2]);
        let x = b.conv(&format!("{prefix}.stem"), &x, &Conv::new(8, 3).with_bias());
        let mut x = b.relu(&format!("{prefix}.stem.relu"), &x);
        for i in 0..blocks {
            let p = format!("{prefix}.block{i}");
            let y = b.conv(&format!("{p}.conv1"), &x, &Conv::new(8, 3).with_bias());
            let y = b.relu(&format!("{p}.relu1"), &y);
            let y = b.conv(&format!("{p}.conv2"), &y, &Conv::new(8, 3).with_bias());
            let y = b.add(&format!("{p}.add"), &y, &x);
            x = b.relu(&format!("{p}.relu"), &y);
        }
        let out = b.conv(&format!("{prefix}.out"), &x, &Conv::new(1, 3).with_bias());
        b.output(&out);
        let mut g = b.finish().graph.expect("a built model has a graph");
        // `input` is the outer graph's: the branch reads it from there.
        g.input.clear();
        g
    };
    let then_branch = branch("sr16k", 3);
    let else_branch = branch("sr8k", 2);
    let mut b = ModelBuilder::new("if_sample_rate", 17);
    b.input("input", &[batch(), samples()]);
    let sr = b.typed_input("sr", shunt::proto::tensor_proto::DataType::Int64, &[]);
    let rate = b.init_i64("sr.16k", &[], vec![16000]);
    let cond = b.node("Equal", "sr.is_16k", &[&sr, &rate], &[]);
    let mut model = b.finish();
    let graph = model.graph.as_mut().expect("a built model has a graph");
    graph.output.push(renamed(&then_branch.output[0], "out"));
    graph.node.push(NodeProto {
        op_type: "If".to_owned(),
        name: "sr.switch".to_owned(),
        input: vec![cond],
        output: vec!["out".to_owned()],
        attribute: vec![
            graph_attr("then_branch", then_branch),
            graph_attr("else_branch", else_branch),
        ],
        ..NodeProto::default()
    });
    model
}

/// The residual recurrent cell of [`scan_recurrence`] and
/// [`loop_recurrence`]: `z = tanh(Gemm([h; x]))` to 8 features, then two
/// pre-norm blocks `z + fc2(relu(fc1(LN(z))))` (16 hidden features); returns
/// the builder and the new state.
fn residual_cell(b: &mut ModelBuilder, h: &str, x: &str) -> String {
    let c = b.concat("cell.cat", &[h, x], 1);
    let z = b.gemm("cell.in", &c, 8, &Init::HeNormal);
    let mut z = b.tanh("cell.act", &z);
    for i in 0..2 {
        let p = format!("cell.block{i}");
        let n = b.layer_norm(&format!("{p}.norm"), &z, Form::Fused);
        let y = b.gemm(&format!("{p}.fc1"), &n, 16, &Init::HeNormal);
        let y = b.relu(&format!("{p}.relu"), &y);
        let y = b.gemm(&format!("{p}.fc2"), &y, 8, &Init::HeNormal);
        z = b.add(&format!("{p}.add"), &z, &y);
    }
    z
}

/// Item 1: a recurrence in a `Scan`: inputs `x [steps, batch, 8]` and the
/// initial state `h0 [batch, 8]`; the body takes the state `h [batch, 8]`
/// and one step `x_t [batch, 8]`, runs [`residual_cell`], and returns the
/// new state and (through an `Identity`) the step's output, stacked into
/// `ys [steps, batch, 8]`; `h_last` is the final state.
pub fn scan_recurrence() -> ModelProto {
    let batch = || Dim::Sym("batch".to_owned());
    let mut cell = ModelBuilder::new("cell", 17);
    let h = cell.input("cell.h", &[batch(), 8.into()]);
    let x = cell.input("cell.x", &[batch(), 8.into()]);
    let z = residual_cell(&mut cell, &h, &x);
    let y = cell.node("Identity", "cell.y", &[&z], &[]);
    cell.output(&z);
    cell.output(&y);
    let body = cell.finish().graph.expect("a built model has a graph");
    let mut b = ModelBuilder::new("scan_recurrence", 17);
    b.input("x", &[Dim::Sym("steps".to_owned()), batch(), 8.into()]);
    b.input("h0", &[batch(), 8.into()]);
    let mut model = b.finish();
    let graph = model.graph.as_mut().expect("a built model has a graph");
    graph.output.push(renamed(&body.output[0], "h_last"));
    let mut ys = renamed(&graph.input[0], "ys");
    ys.doc_string.clear();
    graph.output.push(ys);
    graph.node.push(NodeProto {
        op_type: "Scan".to_owned(),
        name: "rnn".to_owned(),
        input: vec!["h0".to_owned(), "x".to_owned()],
        output: vec!["h_last".to_owned(), "ys".to_owned()],
        attribute: vec![graph_attr("body", body), int_attr("num_scan_inputs", 1)],
        ..NodeProto::default()
    });
    model
}

/// Item 1: the cell of [`scan_recurrence`] in a `Loop` of `steps` trips
/// (an int64 scalar input), its state from `h0 [batch, 8]`, each trip
/// driven by the outer `x [batch, 8]` (read from inside the body); outputs
/// the final state and the stacked states.
pub fn loop_recurrence() -> ModelProto {
    let batch = || Dim::Sym("batch".to_owned());
    let int64 = shunt::proto::tensor_proto::DataType::Int64;
    let mut cell = ModelBuilder::new("loop_cell", 17);
    cell.typed_input("cell.iteration", int64, &[]);
    let cond = cell.typed_input("cell.cond", shunt::proto::tensor_proto::DataType::Bool, &[]);
    let h = cell.input("cell.h", &[batch(), 8.into()]);
    let x = cell.input("x", &[batch(), 8.into()]);
    let z = residual_cell(&mut cell, &h, &x);
    let keep = cell.node("Identity", "cell.keep", &[&cond], &[]);
    let y = cell.node("Identity", "cell.y", &[&z], &[]);
    cell.output(&keep);
    cell.output(&z);
    cell.output(&y);
    let mut body = cell.finish().graph.expect("a built model has a graph");
    // `x` is the outer graph's.
    body.input.retain(|i| i.name != "x");
    let mut b = ModelBuilder::new("loop_recurrence", 17);
    b.input("x", &[batch(), 8.into()]);
    b.input("h0", &[batch(), 8.into()]);
    b.typed_input("steps", int64, &[]);
    let mut model = b.finish();
    let graph = model.graph.as_mut().expect("a built model has a graph");
    graph.output.push(renamed(&body.output[1], "h_last"));
    let mut hs = renamed(&body.output[1], "hs");
    if let Some(shunt::proto::TypeProto {
        value: Some(shunt::proto::type_proto::Value::TensorType(t)),
        ..
    }) = hs.r#type.as_mut()
    {
        // [trips, batch, 8]: the trips are known only when it runs.
        if let Some(shape) = t.shape.as_mut() {
            shape.dim.insert(
                0,
                shunt::proto::tensor_shape_proto::Dimension {
                    value: Some(shunt::proto::tensor_shape_proto::dimension::Value::DimParam(
                        "trips".to_owned(),
                    )),
                    ..Default::default()
                },
            );
        }
    }
    graph.output.push(hs);
    graph.node.push(NodeProto {
        op_type: "Loop".to_owned(),
        name: "recur".to_owned(),
        input: vec!["steps".to_owned(), String::new(), "h0".to_owned()],
        output: vec!["h_last".to_owned(), "hs".to_owned()],
        attribute: vec![graph_attr("body", body)],
        ..NodeProto::default()
    });
    model
}

/// A converter's output: every initializer of `model` becomes a Constant
/// node at the head of the graph (same tensor, same name), and `value_info`
/// is dropped, as converters that fold every weight into the graph leave it.
pub fn weights_as_constants(mut model: ModelProto) -> ModelProto {
    let graph = model.graph.as_mut().expect("a built model has a graph");
    let initializers = std::mem::take(&mut graph.initializer);
    let mut nodes: Vec<NodeProto> = initializers
        .into_iter()
        .map(|t| NodeProto {
            output: vec![t.name.clone()],
            name: format!("{}.constant", t.name),
            op_type: "Constant".to_owned(),
            attribute: vec![AttributeProto {
                name: "value".to_owned(),
                r#type: AttributeType::Tensor as i32,
                t: Some(Box::new(t)),
                ..AttributeProto::default()
            }],
            ..NodeProto::default()
        })
        .collect();
    nodes.append(&mut graph.node);
    graph.node = nodes;
    graph.value_info.clear();
    model
}

/// The encoded bytes of a case's model.
pub fn encode(case: &Case) -> Vec<u8> {
    case.model.encode_to_vec()
}

/// The text of `fixtures/structure/MANIFEST.txt` for `cases`.
pub fn manifest(cases: &[Case]) -> String {
    let mut out = String::new();
    out.push_str(concat!(
        "# shunt structure cases (issue 15), written by `cargo run --release --example fixtures`;\n",
        "# do not edit by hand. Columns: file | item and what it isolates | expected census | source.\n",
        "# Census: blocks by shortcut kind and by placement, blocks per stage in order, and merges\n",
        "# that are not blocks by reason, and concatenative skips.\n",
    ));
    let list = |items: &[(&str, usize)]| {
        items.iter().map(|(k, n)| format!("{k}={n}")).collect::<Vec<_>>().join(" ")
    };
    for case in cases {
        let e = &case.expect;
        let stages: Vec<String> = e.stages.iter().map(usize::to_string).collect();
        let _ = writeln!(
            out,
            "{} | {} | blocks={} ({}; {}) stages=[{}]{} not-blocks=({}) concat={} | {}",
            case.path,
            case.isolates,
            e.blocks(),
            list(&e.shortcuts),
            list(&e.placements),
            stages.join(","),
            if e.audit_args.is_empty() {
                String::new()
            } else {
                format!(" (measured: audit {})", e.audit_args.join(" "))
            },
            list(&e.not_blocks),
            e.concat_skips,
            case.source,
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
    let path = dir.join("structure/MANIFEST.txt");
    std::fs::write(&path, manifest(&cases))?;
    written.push(path);
    Ok(written)
}
