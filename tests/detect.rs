//! Detection and classification: the committed fixtures give their census,
//! published layouts give the counts their papers state, and the result does
//! not depend on names, `value_info` or node order.

use shunt::open::OpenConfig;
use shunt::report::Report;
use shunt::report::text::{ARROW, layer_signature};
use shunt::scan;
use shunt_testkit::builder::{self, Form};
use shunt_testkit::fixtures::{self, Census};
use shunt_testkit::zoo;

use crate::util::{fixture, shunt};

fn scan_in_memory(model: shunt::proto::ModelProto) -> Report {
    scan::scan_model(model, "in-memory", &OpenConfig::standard()).expect("the scan succeeds")
}

fn count(r: &Report, key: &str) -> u32 {
    let s = &r.summary;
    *s.by_shortcut.get(key).or_else(|| s.by_placement.get(key)).unwrap_or(&0) as u32
}

/// The deepest nesting of skips: 1 for a plain stack of blocks.
fn nesting(r: &Report) -> u32 {
    let blocks = r.blocks.iter().map(|b| b.depth as u32 + 1);
    let concats = r.concat_skips.iter().map(|c| c.depth as u32 + 1);
    blocks.chain(concats).max().unwrap_or(0)
}

fn census_of(r: &Report) -> Census {
    Census {
        identity: count(r, "identity"),
        projection: count(r, "projection"),
        resampled: count(r, "resampled"),
        post_activation: count(r, "post-activation"),
        pre_activation: count(r, "pre-activation"),
        pre_norm: count(r, "pre-norm"),
        post_norm: count(r, "post-norm"),
        unactivated: count(r, "unactivated"),
        concat_skips: r.concat_skips.len() as u32,
        nesting: Some(nesting(r)),
        decoys: r.not_blocks.iter().filter(|n| n.node.op_type != "Concat").count() as u32,
    }
}

#[test]
fn committed_fixtures_give_their_census() {
    let mut failures = Vec::new();
    for f in fixtures::all() {
        let run = shunt(&["scan", fixture(f.path).to_str().unwrap(), "--format", "json"]);
        assert_eq!(run.code, 0, "{}: {}", f.path, run.stderr);
        let r: Report = serde_json::from_str(&run.stdout).unwrap();
        let mut got = census_of(&r);
        if f.census.nesting.is_none() {
            got.nesting = None;
        }
        if got != f.census {
            failures.push(format!("{}:\n  expected {:?}\n  got      {:?}", f.path, f.census, got));
        }
        if f.census.additive() == 0 && f.census.concat_skips == 0 {
            assert!(r.summary.plain, "{}: a model with no skip is reported as plain", f.path);
            assert!(!run.stdout.is_empty());
        }
    }
    assert!(failures.is_empty(), "census mismatches:\n{}", failures.join("\n"));
}

#[test]
fn traps_are_not_blocks() {
    for name in [
        "trap_bias_add.onnx",
        "trap_positional_add.onnx",
        "trap_attention_mask_add.onnx",
        "trap_rotary_add.onnx",
        "trap_add_self.onnx",
        "trap_gelu_tanh.onnx",
        "trap_gated_update.onnx",
        "plain_cnn.onnx",
    ] {
        let run = shunt(&["scan", fixture(name).to_str().unwrap()]);
        assert_eq!(run.code, 0, "{name}: {}", run.stderr);
        assert!(run.stdout.contains("this is a plain network"), "{name}:\n{}", run.stdout);
    }
}

fn resnet(cfg: zoo::ResNetConfig) -> Report {
    scan_in_memory(zoo::resnet(&zoo::ResNetConfig { width_divisor: 32, ..cfg }))
}

// [R1] Deep Residual Learning for Image Recognition, arXiv:1512.03385, Table 1:
// 18: [2,2,2,2] basic, 34: [3,4,6,3] basic, 50: [3,4,6,3] bottleneck,
// 101: [3,4,23,3], 152: [3,8,36,3] → 8, 16, 16, 33, 50 merges. [R2] option B:
// projections only where the shape changes: 3 for 18/34, 4 for 50/101/152.
// [R3]: ReLU after the addition.
#[test]
fn imagenet_resnets_match_table_1() {
    for (name, cfg, blocks, projections) in [
        ("ResNet-18", zoo::ResNetConfig::resnet18(), 8, 3),
        ("ResNet-34", zoo::ResNetConfig::resnet34(), 16, 3),
        ("ResNet-50", zoo::ResNetConfig::resnet50(), 16, 4),
        ("ResNet-101", zoo::ResNetConfig::resnet101(), 33, 4),
        ("ResNet-152", zoo::ResNetConfig::resnet152(), 50, 4),
    ] {
        let r = resnet(cfg);
        assert_eq!(r.summary.blocks, blocks, "{name} merges [R1]");
        assert_eq!(
            count(&r, "projection"),
            projections,
            "{name} projection shortcuts [R2 option B]"
        );
        assert_eq!(
            count(&r, "identity"),
            blocks as u32 - projections,
            "{name} identity shortcuts [R2]"
        );
        assert_eq!(count(&r, "post-activation"), blocks as u32, "{name}: ReLU after the add [R3]");
        assert_eq!(r.stages.len(), 4, "{name}: 4 stages [R1]");
        // Projections sit exactly where a stage starts.
        for s in &r.stages {
            let first = &r.blocks[s.blocks[0] - 1];
            let projected: Vec<usize> = s
                .blocks
                .iter()
                .filter(|&&id| r.blocks[id - 1].shortcut.kind.as_str() == "projection")
                .copied()
                .collect();
            assert!(
                projected.is_empty() || projected == vec![first.id],
                "{name}: projections only at stage starts"
            );
        }
    }
}

// [R2] option A (identity with zero-padding and stride-2 subsampling) and
// option C (projection everywhere) on the ResNet-18 layout.
#[test]
fn shortcut_options_a_and_c() {
    let a = resnet(zoo::ResNetConfig {
        shortcut: zoo::Shortcut::ZeroPad,
        ..zoo::ResNetConfig::resnet18()
    });
    assert_eq!(
        (count(&a, "identity"), count(&a, "resampled"), count(&a, "projection")),
        (5, 3, 0),
        "[R2] option A"
    );
    let c = resnet(zoo::ResNetConfig {
        shortcut: zoo::Shortcut::ProjectAll,
        ..zoo::ResNetConfig::resnet18()
    });
    assert_eq!(count(&c, "projection"), 8, "[R2] option C");
    // [Z2] ResNet-D: where it downsamples, the shortcut pools before its 1x1 conv.
    let d = scan_in_memory(zoo::resnet_d(&zoo::ResNetConfig {
        width_divisor: 32,
        ..zoo::ResNetConfig::resnet50()
    }));
    assert_eq!(count(&d, "resampled"), 3, "[Z2] pooled projections in stages 2-4");
    assert!(
        d.blocks
            .iter()
            .filter(|b| b.shortcut.kind.as_str() == "resampled")
            .all(|b| b.shortcut.projected)
    );
}

// [R4] same paper, Section 4.2: CIFAR ResNets have 6n+2 layers; n = 18 gives
// ResNet-110 with 54 merges, 2 of which change size (option A shortcuts).
#[test]
fn cifar_resnet_110() {
    let r = scan_in_memory(zoo::cifar_resnet(&zoo::CifarResNetConfig {
        n: 18,
        shortcut: zoo::Shortcut::ZeroPad,
        width_divisor: 4,
        image: zoo::ImageSpec::rgb(32),
    }));
    assert_eq!(r.summary.blocks, 54, "[R4] 3 stages of 18 blocks");
    assert_eq!(count(&r, "resampled"), 2, "[R4] two size changes");
    assert_eq!(r.stages.len(), 3);
}

// [P1] Identity Mappings in Deep Residual Networks, arXiv:1603.05027: the
// pre-activation unit has nothing after the addition. [P2] (from memory,
// re-derived here: 9n+2 layers = 3 stages of n three-layer units + 2) n = 18
// gives ResNet-164 with 54 merges.
#[test]
fn preact_resnet_164() {
    let r = scan_in_memory(zoo::preact_resnet(&zoo::PreActConfig {
        n: 18,
        stages: 3,
        bottleneck: true,
        normalisation: true,
        width_divisor: 4,
        image: zoo::ImageSpec::rgb(32),
    }));
    assert_eq!(r.summary.blocks, 54, "[P2] 9n+2 with n = 18");
    assert_eq!(count(&r, "pre-activation"), 54, "[P1] every unit is pre-activation");
}

// [M1] MobileNetV2, arXiv:1801.04381, Table 2: shortcuts only where stride is
// 1 and widths match: 10 identity merges, no activation after the add.
#[test]
fn mobilenet_v2_layout() {
    let r = scan_in_memory(zoo::mobilenet_v2(&zoo::MobileNetV2Config {
        width_divisor: 8,
        image: zoo::ImageSpec::rgb(32),
    }));
    assert_eq!((r.summary.blocks, count(&r, "identity")), (10, 10), "[M1]");
    assert_eq!(count(&r, "unactivated"), 10, "[M1] linear bottleneck, nothing after the add");
}

// [E1] EfficientNet, arXiv:1905.11946, Table 1: 9 identity merges; the
// squeeze-and-excitation gate is a multiplication inside the branch.
#[test]
fn efficientnet_b0_layout() {
    let r = scan_in_memory(zoo::efficientnet_b0_like(&zoo::EfficientNetConfig {
        width_divisor: 16,
        image: zoo::ImageSpec::rgb(32),
    }));
    assert_eq!((r.summary.blocks, count(&r, "identity")), (9, 9), "[E1]");
    assert!(r.blocks.iter().all(|b| b.branch.gates == 1), "[E1] one gate per MBConv branch");
}

// [D1] DenseNet, arXiv:1608.06993, Table 1: DenseNet-121's dense blocks of 6,
// 12, 24, 16 layers join by concatenation: no additive shortcut at all.
#[test]
fn densenet_121_has_no_additive_merge() {
    let r = scan_in_memory(zoo::densenet_like(&zoo::DenseNetConfig {
        block_layers: vec![6, 12, 24, 16],
        growth: 2,
        image: zoo::ImageSpec::rgb(32),
    }));
    assert_eq!(r.summary.blocks, 0, "[D1]");
    assert_eq!(r.concat_skips.len(), 6 + 12 + 24 + 16, "[D1] one concatenation per dense layer");
}

// [U1] U-Net, arXiv:1505.04597, Fig. 1: 4 long skips by concatenation, nested.
#[test]
fn unet_has_four_nested_concatenative_skips() {
    let r = scan_in_memory(zoo::unet(&zoo::UNetConfig {
        depth: 4,
        base_width: 2,
        image: zoo::ImageSpec::rgb(32),
    }));
    assert_eq!(r.summary.blocks, 0);
    assert_eq!(r.concat_skips.len(), 4, "[U1]");
    assert_eq!(nesting(&r), 4, "[U1] each skip holds the next deeper one");
}

// [C1] ConvNeXt, arXiv:2201.03545: ConvNeXt-T stage depths 3,3,9,3 give 18
// identity merges.
#[test]
fn convnext_t_layout() {
    let r = scan_in_memory(zoo::convnext_like(&zoo::ConvNeXtConfig {
        depths: vec![3, 3, 9, 3],
        width_divisor: 16,
        layer_scale: 1e-6,
        layer_norm: Form::Fused,
        gelu: Form::Fused,
        image: zoo::ImageSpec::rgb(32),
    }));
    assert_eq!((r.summary.blocks, count(&r, "identity")), (18, 18), "[C1]");
    for b in &r.blocks {
        let scale = b.branch.end_scale.as_ref().expect("a layer scale at the branch end [C1]");
        assert!((scale.max.unwrap() - 1e-6).abs() < 1e-12, "[C1] layer scale 1e-6");
    }
}

// [T1] Attention Is All You Need, arXiv:1706.03762, Section 3.1: each encoder
// layer has 2 sub-layers, each LayerNorm(x + Sublayer(x)); the base model has
// 6 encoder layers: 12 merges, post-norm. [T2] arXiv:2002.04745: pre-norm is
// x + Sublayer(LayerNorm(x)). Both with the normalisation as one op and spelled out.
#[test]
fn transformer_encoders() {
    for (norm_first, form, placement) in [
        (false, Form::Fused, "post-norm"),
        (false, Form::Decomposed, "post-norm"),
        (true, Form::Fused, "pre-norm"),
        (true, Form::Decomposed, "pre-norm"),
    ] {
        let cfg = zoo::TransformerConfig {
            layers: 6,
            norm_first,
            layer_norm: form,
            gelu: form,
            ..zoo::TransformerConfig::tiny()
        };
        let r = scan_in_memory(zoo::transformer_encoder(&cfg));
        assert_eq!(
            r.summary.blocks, 12,
            "[T1] 2 merges per layer, 6 layers ({placement}, {form:?})"
        );
        assert_eq!(count(&r, placement), 12, "[T1]/[T2] {placement} ({form:?})");
        assert_eq!(count(&r, "identity"), 12);
    }
}

/// What must not change when names, `value_info` or node order change.
fn signature(r: &Report) -> (Vec<String>, usize, usize, Vec<Vec<String>>) {
    let mut blocks: Vec<String> = r
        .blocks
        .iter()
        .map(|b| {
            // Graph order of independent layers may change with the node order.
            let mut layers: Vec<String> =
                b.branch.layers.iter().map(|l| layer_signature(l, ARROW)).collect();
            layers.sort();
            format!(
                "{} {} [{}] stage={:?} depth={}",
                b.shortcut.kind,
                b.placement,
                layers.join(", "),
                b.output_shape,
                b.depth
            )
        })
        .collect();
    blocks.sort();
    let stages = r.stages.iter().map(|s| s.shape.clone()).collect();
    (blocks, r.concat_skips.len(), r.stages.len(), stages)
}

#[test]
fn result_does_not_depend_on_names_value_info_or_order() {
    for f in fixtures::all() {
        let base = signature(&scan_in_memory(f.model.clone()));
        let mut stripped = f.model.clone();
        builder::strip_node_names(&mut stripped);
        assert_eq!(signature(&scan_in_memory(stripped)), base, "{}: node names stripped", f.path);
        let mut bare = f.model.clone();
        builder::strip_value_info(&mut bare);
        assert_eq!(signature(&scan_in_memory(bare)), base, "{}: value_info removed", f.path);
        for seed in [1, 2] {
            let mut shuffled = f.model.clone();
            builder::reorder_nodes(&mut shuffled, seed);
            assert_eq!(
                signature(&scan_in_memory(shuffled)),
                base,
                "{}: nodes reordered (seed {seed})",
                f.path
            );
        }
        let mut all = f.model.clone();
        builder::strip_node_names(&mut all);
        builder::strip_value_info(&mut all);
        builder::reorder_nodes(&mut all, 3);
        assert_eq!(signature(&scan_in_memory(all)), base, "{}: all three at once", f.path);
    }
}
