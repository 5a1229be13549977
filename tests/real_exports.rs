//! Models written by PyTorch's ONNX exporter (and onnxruntime's quantiser),
//! committed under `fixtures/torch/` with the script that made them
//! (`fixtures/torch/export.py`, versions in `fixtures/torch/VERSIONS.txt`).
//! Each test scans one file with the library and checks the census against
//! the published layout of the architecture, citing the source id of
//! `check-values.md` beside each check.

use std::path::PathBuf;

use shunt::open::OpenConfig;
use shunt::report::{BlockRow, Report};
use shunt::scan::scan_file;

fn torch_fixture(name: &str) -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("fixtures").join("torch").join(name)
}

fn scan(name: &str) -> Report {
    let path = torch_fixture(name);
    let report =
        scan_file(&path, &OpenConfig::standard()).unwrap_or_else(|e| panic!("scan {name}: {e}"));
    let warnings: Vec<_> =
        report.diagnostics.iter().filter(|d| d.severity.as_str() == "warning").collect();
    assert!(warnings.is_empty(), "{name}: warnings {warnings:?}");
    // export.py: in these modules every Add of two input-dependent operands is a
    // shortcut merge (no mask, no positional Add): nothing is rejected (decoys=0).
    assert!(report.not_blocks.is_empty(), "{name}: {:#?}", report.not_blocks);
    report
}

fn count(map: &std::collections::BTreeMap<String, usize>, key: &str) -> usize {
    map.get(key).copied().unwrap_or(0)
}

/// Per block: (shortcut kind, placement, learned layers in the branch).
fn census(report: &Report) -> Vec<(String, String, usize)> {
    report
        .blocks
        .iter()
        .map(|b| (b.shortcut.kind.to_string(), b.placement.to_string(), b.branch.layers.len()))
        .collect()
}

fn merge_names(report: &Report) -> Vec<String> {
    report.blocks.iter().map(|b| b.merge.name.clone()).collect()
}

// ------------------------------------------------------------ MobileNetV2

#[test]
fn mobilenet_v2_has_ten_identity_merges_with_nothing_after_the_add() {
    let r = scan("mobilenet_v2.onnx");
    // [M1] MobileNetV2 paper, Table 2: shortcuts only where stride 1 and widths match,
    // 0+1+2+3+2+2+0 = 10 merges, all identity.
    assert_eq!(r.summary.blocks, 10, "{:#?}", census(&r));
    assert_eq!(count(&r.summary.by_shortcut, "identity"), 10);
    // [M1] no activation follows the addition.
    assert_eq!(count(&r.summary.by_placement, "unactivated"), 10, "{:?}", r.summary.by_placement);
    assert_eq!(r.summary.concat_skips, 0);
    assert!(!r.summary.plain);

    // [M1] Table 2, rows (6,24,2,2) (6,32,3,2) (6,64,4,2) (6,96,3,1) (6,160,3,2): one stage
    // per row holding n-1 merges; rows (1,16,1,1) and (6,320,1,1) have none.
    let per_stage: Vec<usize> = r.stages.iter().map(|s| s.blocks.len()).collect();
    assert_eq!(per_stage, vec![1, 2, 3, 2, 2], "{:?}", r.stages);

    for b in &r.blocks {
        // [M1] inverted residual: 1x1 expansion (t = 6), 3x3 depthwise, 1x1 linear projection.
        assert_eq!(b.branch.layers.len(), 3, "block {}", b.id);
        let (expand, dw, project) = (&b.branch.layers[0], &b.branch.layers[1], &b.branch.layers[2]);
        assert_eq!(expand.kernel, vec![1, 1], "block {}", b.id);
        assert_eq!(expand.out_channels, expand.in_channels.map(|c| 6 * c), "block {}: t = 6", b.id);
        assert_eq!(dw.kernel, vec![3, 3], "block {}", b.id);
        assert_eq!(Some(dw.groups), dw.in_channels, "block {}: depthwise", b.id);
        assert_eq!(project.kernel, vec![1, 1], "block {}", b.id);
        assert_eq!(project.out_channels, expand.in_channels, "block {}: widths match", b.id);
        // [M1] the projection layer is linear: every activation of the branch comes before it.
        assert!(!b.branch.activations.is_empty(), "block {}", b.id);
        for a in &b.branch.activations {
            assert!(
                a.node.index < project.node.index,
                "block {}: {} after the projection",
                b.id,
                a.node.name
            );
        }
        assert!(b.shortcut.ops.is_empty(), "block {}: {:?}", b.id, b.shortcut.ops);
        assert!(!b.shortcut.projected);
    }
}

// ------------------------------------------------------------ CIFAR ResNet

/// The CIFAR ResNet of export.py: 3 stages of n = 2 basic blocks, 16/32/64 wide.
fn check_cifar_resnet(r: &Report) {
    // [R4] 3 stages of n basic blocks (n = 2 here): 6 merges.
    assert_eq!(r.summary.blocks, 6, "{:#?}", census(r));
    assert_eq!(r.stages.len(), 3, "{:?}", r.stages);
    // [R4] stage widths 16/32/64; 32x32 input, halved at stages 2 and 3.
    let shapes: Vec<Vec<String>> = r.stages.iter().map(|s| s.shape.clone()).collect();
    let want: Vec<Vec<String>> = [["16", "32", "32"], ["32", "16", "16"], ["64", "8", "8"]]
        .iter()
        .map(|s| s.iter().map(|d| d.to_string()).collect())
        .collect();
    assert_eq!(shapes, want);
    for s in &r.stages {
        assert_eq!(s.blocks.len(), 2, "stage {}", s.id);
    }
    // [R3] ReLU after the addition: post-activation everywhere.
    assert_eq!(
        count(&r.summary.by_placement, "post-activation"),
        6,
        "{:?}",
        r.summary.by_placement
    );
    for b in &r.blocks {
        assert_eq!(
            b.placement_node.as_ref().map(|n| n.op_type.as_str()),
            Some("Relu"),
            "block {}",
            b.id
        );
        assert!(b.placement_node.as_ref().unwrap().index > b.merge.index, "block {}", b.id);
        // Basic block: two 3x3 convolutions.
        let kernels: Vec<Vec<u64>> = b.branch.layers.iter().map(|l| l.kernel.clone()).collect();
        assert_eq!(kernels, vec![vec![3, 3], vec![3, 3]], "block {}", b.id);
    }
    // [R2] option B: a projection exactly where the shape changes (first block of
    // stages 2 and 3), identity elsewhere.
    assert_eq!(count(&r.summary.by_shortcut, "projection"), 2, "{:?}", r.summary.by_shortcut);
    assert_eq!(count(&r.summary.by_shortcut, "identity"), 4, "{:?}", r.summary.by_shortcut);
    for b in &r.blocks {
        assert_eq!(
            b.shortcut.kind.as_str() == "projection",
            changes_shape(b),
            "block {}: {:?}",
            b.id,
            b.shortcut
        );
        assert_eq!(
            b.shortcut.projected,
            b.shortcut.kind.as_str() == "projection",
            "block {}",
            b.id
        );
    }
    let projections: Vec<usize> = r
        .blocks
        .iter()
        .filter(|b| b.shortcut.kind.as_str() == "projection")
        .map(|b| b.id)
        .collect();
    assert_eq!(projections, vec![3, 5]);
    assert_eq!(r.summary.concat_skips, 0);
}

/// Whether the block's output shape differs from its input's: a strided first
/// layer or a change of width across the branch.
fn changes_shape(b: &BlockRow) -> bool {
    let first = b.branch.layers.first().expect("a learned layer");
    let last = b.branch.layers.last().unwrap();
    first.strides.iter().any(|&s| s != 1) || first.in_channels != last.out_channels
}

#[test]
fn cifar_resnet_with_bn_folded_into_conv() {
    let r = scan("resnet_cifar_folded.onnx");
    check_cifar_resnet(&r);
    // [R2] option B: the projection is a 1x1 convolution (BN folded into it).
    let projections: Vec<&BlockRow> =
        r.blocks.iter().filter(|b| b.shortcut.kind.as_str() == "projection").collect();
    // fixtures/torch/MANIFEST.txt: projection=2.
    assert_eq!(projections.len(), 2);
    for b in projections {
        let ops: Vec<&str> = b.shortcut.ops.iter().map(|o| o.op_type.as_str()).collect();
        assert_eq!(ops, vec!["Conv"], "block {}", b.id);
    }
}

#[test]
fn cifar_resnet_with_batchnorm_nodes_kept() {
    let r = scan("resnet_cifar_bn.onnx");
    check_cifar_resnet(&r);
    // [R2] option B projection: 1x1 convolution, here followed by its BatchNormalization.
    let projections: Vec<&BlockRow> =
        r.blocks.iter().filter(|b| b.shortcut.kind.as_str() == "projection").collect();
    // fixtures/torch/MANIFEST.txt: projection=2.
    assert_eq!(projections.len(), 2);
    for b in projections {
        let ops: Vec<&str> = b.shortcut.ops.iter().map(|o| o.op_type.as_str()).collect();
        assert_eq!(ops, vec!["Conv", "BatchNormalization"], "block {}", b.id);
    }
    for b in &r.blocks {
        assert_eq!(b.branch.norms.len(), 2, "block {}: conv-BN-relu-conv-BN", b.id);
    }
}

#[test]
fn cifar_resnet_folded_and_bn_kept_agree_block_by_block() {
    let folded = scan("resnet_cifar_folded.onnx");
    let kept = scan("resnet_cifar_bn.onnx");
    // Same module, same weights: BN folding must not change the census [R2][R3][R4].
    assert_eq!(census(&folded), census(&kept));
    assert_eq!(merge_names(&folded), merge_names(&kept));
    let stage_of = |r: &Report| r.blocks.iter().map(|b| b.stage).collect::<Vec<_>>();
    assert_eq!(stage_of(&folded), stage_of(&kept));
}

#[test]
fn cifar_resnet_quantised_qdq_keeps_the_float_blocks() {
    let float = scan("resnet_cifar_folded.onnx");
    let q = scan("resnet_cifar_qdq.onnx");
    check_cifar_resnet(&q);
    // Quantisation inserts Q/DQ pairs but adds no merge and removes none [R2][R3].
    let kind_place = |r: &Report| -> Vec<(String, String)> {
        r.blocks.iter().map(|b| (b.shortcut.kind.to_string(), b.placement.to_string())).collect()
    };
    assert_eq!(kind_place(&q), kind_place(&float));
    assert_eq!(census(&q), census(&float));
    assert_eq!(merge_names(&q), merge_names(&float));
    for b in &q.blocks {
        let ops: Vec<&str> = b.shortcut.ops.iter().map(|o| o.op_type.as_str()).collect();
        if b.shortcut.kind.as_str() == "identity" {
            // A dedicated Q/DQ pair on the shortcut is still an identity shortcut.
            assert_eq!(ops, vec!["QuantizeLinear", "DequantizeLinear"], "block {}", b.id);
        } else {
            assert!(
                ops.contains(&"Conv") && ops.contains(&"QuantizeLinear"),
                "block {}: {ops:?}",
                b.id
            );
        }
    }
}

// ------------------------------------------------------------ Transformer encoders

fn check_encoder(r: &Report, placement: &str) {
    // [T1] an encoder layer has 2 sub-layers (attention, feed-forward): 2 layers, 4 merges.
    assert_eq!(r.summary.blocks, 4, "{:#?}", census(r));
    assert_eq!(count(&r.summary.by_shortcut, "identity"), 4, "{:?}", r.summary.by_shortcut);
    assert_eq!(count(&r.summary.by_placement, placement), 4, "{:?}", r.summary.by_placement);
    assert_eq!(r.summary.concat_skips, 0);
    let layer_of: Vec<&str> = r
        .blocks
        .iter()
        .map(|b| {
            if b.merge.name.contains("layers.0/") {
                "0"
            } else if b.merge.name.contains("layers.1/") {
                "1"
            } else {
                "?"
            }
        })
        .collect();
    assert_eq!(layer_of, vec!["0", "0", "1", "1"], "{:?}", merge_names(r));
    for b in &r.blocks {
        assert!(b.shortcut.ops.is_empty(), "block {}: {:?}", b.id, b.shortcut.ops);
        // Attention: in-projection and out-projection; feed-forward: two linear layers.
        assert_eq!(b.branch.layers.len(), 2, "block {}: {:?}", b.id, b.branch.layers);
    }
}

#[test]
fn encoder_post_norm_with_layernormalization_ops() {
    let r = scan("encoder_postnorm.onnx");
    // [T1] post-norm: LayerNorm(x + Sublayer(x)).
    check_encoder(&r, "post-norm");
    for b in &r.blocks {
        let n = b.placement_node.as_ref().expect("the norm after the merge");
        assert_eq!(n.op_type, "LayerNormalization", "block {}", b.id);
        assert!(n.index > b.merge.index, "block {}: [T1] the norm follows the addition", b.id);
        assert!(b.branch.norms.is_empty(), "block {}: {:?}", b.id, b.branch.norms);
    }
}

#[test]
fn encoder_pre_norm_with_decomposed_layernorm() {
    let r = scan("encoder_prenorm_decomposed.onnx");
    // [T2] pre-norm: x + Sublayer(LayerNorm(x)), final LayerNorm after the last layer
    // (opset 16: every LayerNorm spelled out as ReduceMean/Sub/Pow/.../Div).
    check_encoder(&r, "pre-norm");
    for b in &r.blocks {
        let n = b.placement_node.as_ref().expect("the norm opening the branch");
        assert_ne!(n.op_type, "LayerNormalization", "block {}: opset 16 has no such op", b.id);
        assert!(n.index < b.merge.index, "block {}: [T2] the norm opens the branch", b.id);
        assert_eq!(b.branch.norms.len(), 1, "block {}: {:?}", b.id, b.branch.norms);
    }
}

// ------------------------------------------------------------ concatenative nets

#[test]
fn unet_has_one_concatenative_skip_per_level_and_no_merge() {
    let r = scan("unet_small.onnx");
    // [U1] long skips are concatenations, not additions: no residual block.
    assert_eq!(r.summary.blocks, 0, "{:#?}", census(&r));
    // [U1] one skip per level (4 in the paper; this U-Net has 3 levels).
    assert_eq!(r.summary.concat_skips, 3, "{:#?}", r.concat_skips);
    assert_eq!(r.concat_skips.len(), 3);
    assert!(!r.summary.plain);
    // The levels nest: the outer skip's branch holds the inner ones.
    let mut depths: Vec<usize> = r.concat_skips.iter().map(|c| c.depth).collect();
    depths.sort_unstable();
    assert_eq!(depths, vec![0, 1, 2]);
    assert_eq!(r.summary.long_skips, 2);
    for c in &r.concat_skips {
        // Padded convolutions: the contracting-path map needs no crop.
        assert!(c.skip_ops.is_empty(), "skip {}: {:?}", c.id, c.skip_ops);
        assert!(c.branch_layers >= 3, "skip {}: down convs, up-convolution", c.id);
    }
}

#[test]
fn densenet_has_concatenative_joins_and_no_additive_shortcut() {
    let r = scan("densenet_tiny.onnx");
    // [D1] dense blocks are joined by concatenation: no additive shortcut at all.
    assert_eq!(r.summary.blocks, 0, "{:#?}", census(&r));
    assert!(r.summary.by_shortcut.is_empty());
    // export.py: 2 dense blocks of 3 layers, each layer x = cat([x, H(x)]).
    assert_eq!(r.summary.concat_skips, 6, "{:#?}", r.concat_skips);
    for c in &r.concat_skips {
        // [D1] DenseNet-B layer: BN-ReLU-Conv1x1-BN-ReLU-Conv3x3.
        assert_eq!(c.branch_layers, 2, "join {}", c.id);
        assert!(c.skip_ops.is_empty(), "join {}", c.id);
        assert_eq!(c.depth, 0, "join {}", c.id);
    }
    assert!(!r.summary.plain);
}

// ------------------------------------------------------------ the manifest

/// `fixtures/torch/MANIFEST.txt` (written by export.py) states the census the
/// tests above derive from the sources; the summary of every scan matches it.
#[test]
fn torch_manifest_matches_every_scan() {
    let text = std::fs::read_to_string(torch_fixture("MANIFEST.txt"))
        .expect("fixtures/torch/MANIFEST.txt");
    let mut files = 0;
    for line in text.lines().filter(|l| !l.starts_with('#') && !l.trim().is_empty()) {
        let cols: Vec<&str> = line.split(" | ").collect();
        assert_eq!(cols.len(), 4, "{line}");
        let r = scan(cols[0]);
        let field = |key: &str| -> usize {
            let start =
                cols[2].find(&format!("{key}=")).unwrap_or_else(|| panic!("{key} in {line}"))
                    + key.len()
                    + 1;
            let digits: String =
                cols[2][start..].chars().take_while(char::is_ascii_digit).collect();
            digits.parse().unwrap_or_else(|_| panic!("{key} in {line}"))
        };
        let s = &r.summary;
        assert_eq!(s.blocks, field("additive"), "{}", cols[0]);
        for kind in ["identity", "projection", "resampled"] {
            assert_eq!(count(&s.by_shortcut, kind), field(kind), "{} {kind}", cols[0]);
        }
        for (key, placement) in [
            ("post-act", "post-activation"),
            ("pre-act", "pre-activation"),
            ("pre-norm", "pre-norm"),
            ("post-norm", "post-norm"),
            ("unactivated", "unactivated"),
        ] {
            assert_eq!(count(&s.by_placement, placement), field(key), "{} {placement}", cols[0]);
        }
        assert_eq!(s.concat_skips, field("concat"), "{}", cols[0]);
        assert_eq!(r.not_blocks.len(), field("decoys"), "{}", cols[0]);
        let deepest = r
            .blocks
            .iter()
            .map(|b| b.depth)
            .chain(r.concat_skips.iter().map(|c| c.depth))
            .max()
            .map_or(0, |d| d + 1);
        assert_eq!(deepest, field("nesting"), "{}", cols[0]);
        files += 1;
    }
    // The eight exports of export.py and the trained digits model of train_digits.py.
    assert_eq!(files, 9);
}
