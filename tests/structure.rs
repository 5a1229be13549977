//! Issue 15, real models' structure: the cases of `fixtures/structure/` are
//! what `shunt_testkit::structure` builds today, each scan gives the census
//! its manifest line states (blocks by shortcut and placement, blocks per
//! stage, merges that are not blocks by reason), and the measured statistics
//! agree with onnxruntime on the same inputs.

use std::collections::BTreeMap;

use serde_json::Value;
use shunt_testkit::structure::{self, Case};

use crate::reference_stats;
use crate::util::{fixture, python, shunt};

const REGENERATE: &str = "run `cargo run --release --example fixtures` and commit the result";

fn case(path: &str) -> Case {
    structure::all()
        .into_iter()
        .find(|c| c.path == path)
        .unwrap_or_else(|| panic!("no structure case {path}"))
}

/// `shunt scan --format json` of a committed case.
fn scan(path: &str) -> Value {
    let run = shunt(&["scan", fixture(path).to_str().unwrap(), "--format", "json"]);
    assert_eq!(run.code, 0, "{path}: {}", run.stderr);
    serde_json::from_str(&run.stdout).expect("shunt writes JSON")
}

/// `shunt audit --format json` of a committed case with `args`.
fn audit(path: &str, args: &[&str]) -> Value {
    let model = fixture(path);
    let mut all = vec!["audit", model.to_str().unwrap(), "--format", "json", "--quiet"];
    all.extend_from_slice(args);
    let run = shunt(&all);
    assert_eq!(run.code, 0, "{path} {args:?}: {}", run.stderr);
    serde_json::from_str(&run.stdout).expect("shunt writes JSON")
}

fn counts(map: &Value) -> BTreeMap<String, usize> {
    map.as_object()
        .map(|m| m.iter().map(|(k, v)| (k.clone(), v.as_u64().unwrap() as usize)).collect())
        .unwrap_or_default()
}

fn listed(items: &[(&str, usize)]) -> BTreeMap<String, usize> {
    items.iter().map(|(k, n)| ((*k).to_owned(), *n)).collect()
}

#[test]
fn committed_cases_are_current() {
    let all = structure::all();
    let mut stale = Vec::new();
    for case in &all {
        match std::fs::read(fixture(case.path)) {
            Ok(bytes) if bytes == structure::encode(case) => {}
            Ok(_) => stale.push(format!("{} differs", case.path)),
            Err(err) => stale.push(format!("{} unreadable: {err}", case.path)),
        }
    }
    match std::fs::read_to_string(fixture("structure/MANIFEST.txt")) {
        Ok(text) if text == structure::manifest(&all) => {}
        Ok(_) => stale.push("structure/MANIFEST.txt differs".to_owned()),
        Err(err) => stale.push(format!("structure/MANIFEST.txt unreadable: {err}")),
    }
    assert!(stale.is_empty(), "stale cases ({REGENERATE}):\n{}", stale.join("\n"));
}

/// Every case's scan gives the census of its manifest line; the source of
/// each census is named in that line (check-values ids, a module definition,
/// or "recalled from memory").
#[test]
fn cases_give_their_census() {
    let mut failures = Vec::new();
    for case in structure::all() {
        let e = &case.expect;
        let r =
            if e.audit_args.is_empty() { scan(case.path) } else { audit(case.path, &e.audit_args) };
        let by_shortcut = counts(&r["summary"]["by_shortcut"]);
        let by_placement = counts(&r["summary"]["by_placement"]);
        let stages: Vec<usize> = r["stages"]
            .as_array()
            .unwrap()
            .iter()
            .map(|s| s["blocks"].as_array().unwrap().len())
            .collect();
        let mut not_blocks = BTreeMap::new();
        for n in r["not_blocks"].as_array().unwrap() {
            *not_blocks.entry(n["reason"].as_str().unwrap().to_owned()).or_insert(0) += 1;
        }
        let unknown_stage = r["blocks"].as_array().unwrap().iter().any(|b| b["stage"].is_null());
        let mut problems = Vec::new();
        if by_shortcut != listed(&e.shortcuts) {
            problems.push(format!("shortcuts {by_shortcut:?}, expected {:?}", e.shortcuts));
        }
        if by_placement != listed(&e.placements) {
            problems.push(format!("placements {by_placement:?}, expected {:?}", e.placements));
        }
        if stages != e.stages {
            problems.push(format!("stages {stages:?}, expected {:?}", e.stages));
        }
        if not_blocks != listed(&e.not_blocks) {
            problems.push(format!("not_blocks {not_blocks:?}, expected {:?}", e.not_blocks));
        }
        let concats = r["concat_skips"].as_array().unwrap().len();
        if concats != e.concat_skips {
            problems.push(format!("concat_skips {concats}, expected {}", e.concat_skips));
        }
        if unknown_stage {
            problems.push("a block in stage unknown".to_owned());
        }
        if !problems.is_empty() {
            failures.push(format!("{} [{}]:\n  {}", case.path, case.source, problems.join("\n  ")));
        }
    }
    assert!(failures.is_empty(), "census mismatches:\n{}", failures.join("\n"));
}

/// Item 8: parameters held in Constant nodes are counted. The expected count
/// is numpy's: the elements of every floating-point Constant value of two or
/// more elements, counted by the onnx package (pinned reference venv); and
/// it equals the parameters of fixtures/resnet18_b.onnx, whose initializers
/// the case moved into Constant nodes.
#[test]
fn constant_node_weights_are_parameters() {
    let path = "structure/resnet18_constant_weights.onnx";
    let r = scan(path);
    let counted = python(
        "import sys, numpy as np, onnx\n\
         m = onnx.load(sys.argv[1])\n\
         floats = {1, 10, 11, 16}\n\
         n = sum(int(np.prod(a.t.dims)) for x in m.graph.node if x.op_type == 'Constant'\n\
                 for a in x.attribute if a.name == 'value' and a.t.data_type in floats\n\
                 and int(np.prod(a.t.dims)) >= 2)\n\
         print(n, len(m.graph.initializer))",
        &[fixture(path).to_str().unwrap()],
    );
    let mut parts = counted.split_whitespace().map(|w| w.parse::<u64>().unwrap());
    let (want, initializers) = (parts.next().unwrap(), parts.next().unwrap());
    assert_eq!(initializers, 0, "the case holds no initializer");
    assert!(want > 0);
    assert_eq!(r["model"]["parameters"].as_u64(), Some(want), "{path}: parameters");
    let original = scan("resnet18_b.onnx");
    assert_eq!(r["model"]["parameters"], original["model"]["parameters"]);
    // The layers are read from the Constant weights as from initializers.
    let layers = |r: &Value| -> Vec<Value> {
        r["blocks"].as_array().unwrap().iter().map(|b| b["branch"]["layers"].clone()).collect()
    };
    let strip = |v: Vec<Value>| -> Vec<Vec<(Value, Value, Value)>> {
        v.iter()
            .map(|l| {
                l.as_array()
                    .unwrap()
                    .iter()
                    .map(|x| {
                        (x["kernel"].clone(), x["in_channels"].clone(), x["out_channels"].clone())
                    })
                    .collect()
            })
            .collect()
    };
    assert_eq!(strip(layers(&r)), strip(layers(&original)));
    assert_eq!(r["stages"], original["stages"], "stages from shapes inferred through Constants");
}

/// Item 8 against onnxruntime: per-block RMS of shortcut and branch on the
/// inputs of resnet18_b (the same weights, held in Constant nodes).
#[test]
fn constant_node_weights_measured_like_onnxruntime() {
    let path = "structure/resnet18_constant_weights.onnx";
    reference_stats::check_case(&reference_stats::Case {
        name: "resnet18_constant_weights",
        inputs: "resnet18_b",
        model: path,
        ext: "npy",
        blocks: case(path).expect.blocks(),
    });
}

/// [ONNX checker, onnx==1.19.1] accepts every case, and onnxruntime loads
/// and runs each (the same check as the committed fixtures').
#[test]
fn outside_tools_accept_the_cases() {
    let paths: Vec<String> =
        structure::all().iter().map(|c| fixture(c.path).display().to_string()).collect();
    let args: Vec<&str> = paths.iter().map(String::as_str).collect();
    let stdout = python(crate::fixtures::CHECK_SCRIPT, &args);
    let expected = format!("{0} of {0} fixtures pass", paths.len());
    assert!(stdout.contains(&expected), "outside checks:\n{stdout}");
}

/// Item 6: the sums of two heads on one map are merges that are not blocks,
/// with their reason; the arithmetic on slices of one head output stays a
/// merge without a learned layer. Each of the `sum-of-heads` merges was a
/// `projection` block before the rule (a 1x1 classifier of the fork as its
/// "shortcut").
#[test]
fn sums_of_heads_are_not_blocks() {
    for (path, merges) in [
        (
            "structure/segmentation_head_sum.onnx",
            vec![("fuse2", "sum-of-heads"), ("fuse1", "sum-of-heads")],
        ),
        (
            "structure/detector_box_decode.onnx",
            vec![("decode.max", "sum-of-heads"), ("decode2.corner", "no-learned-layer")],
        ),
    ] {
        let r = scan(path);
        let got: Vec<(&str, &str)> = r["not_blocks"]
            .as_array()
            .unwrap()
            .iter()
            .map(|n| (n["node"]["name"].as_str().unwrap(), n["reason"].as_str().unwrap()))
            .collect();
        assert_eq!(got, merges, "{path}");
        for n in r["not_blocks"].as_array().unwrap() {
            if n["reason"] == "sum-of-heads" {
                assert!(n["detail"].as_str().unwrap().contains("two heads"), "{n}");
            }
        }
        // No block is a projection: the real blocks are the backbone's.
        assert!(
            r["blocks"].as_array().unwrap().iter().all(|b| b["shortcut"]["kind"] == "identity")
        );
    }
    // A feature pyramid's top-down sums are read by the 3x3 smoothing convs:
    // still blocks (fixtures/MANIFEST.txt, fpn_topdown).
    let fpn = scan("fpn_topdown.onnx");
    assert_eq!(fpn["summary"]["by_shortcut"]["projection"], 2);
}

/// Item 6 against onnxruntime: the backbone's blocks of the detector.
#[test]
fn detector_blocks_measured_like_onnxruntime() {
    let path = "structure/detector_box_decode.onnx";
    reference_stats::check_case(&reference_stats::Case {
        name: "detector_box_decode",
        inputs: "detector_box_decode",
        model: path,
        ext: "npy",
        blocks: case(path).expect.blocks(),
    });
}

/// Item 5: the class-attention layer's merge into the learned class token
/// is a block of its own shortcut kind, forking at the expanded token; the
/// second layer's stream forks at its own class token although the branch
/// also reads the patches ([K1]).
#[test]
fn class_token_shortcut_is_a_parameter() {
    let r = scan("structure/cait_class_attention.onnx");
    let blocks = r["blocks"].as_array().unwrap();
    assert_eq!(blocks.len(), 8, "the census of fixtures/structure/MANIFEST.txt");
    let by_name = |name: &str| blocks.iter().find(|b| b["merge"]["name"] == name).unwrap();
    let first = by_name("cls_blocks.0.add1");
    assert_eq!(first["shortcut"]["kind"], "parameter");
    assert_eq!(first["fork"], "cls_token.expand");
    assert_eq!(first["placement_node"]["op_type"], "LayerNormalization");
    let second = by_name("cls_blocks.1.add1");
    assert_eq!(second["shortcut"]["kind"], "identity");
    assert_eq!(second["fork"], "cls_blocks.0.add2");
    for b in blocks {
        let scale = b["branch"]["end_scale"]["max"].as_f64().expect("a LayerScale end scale");
        assert!((scale - 0.1).abs() < 1e-6, "LayerScale {scale}");
    }
    // A bias or positional add is still not a merge: the constant must also
    // be read by the branch (fixtures/trap_positional_add.onnx stays plain).
    let trap = scan("trap_positional_add.onnx");
    assert_eq!(trap["summary"]["blocks"], 0);
}

/// Item 5 against onnxruntime: every block, the parameter shortcut measured
/// as the expanded class token.
#[test]
fn class_attention_measured_like_onnxruntime() {
    let path = "structure/cait_class_attention.onnx";
    reference_stats::check_case(&reference_stats::Case {
        name: "cait_class_attention",
        inputs: "cait_class_attention",
        model: path,
        ext: "npy",
        blocks: case(path).expect.blocks(),
    });
}

/// Item 4: branches of unusual form keep their blocks and placements. The
/// PoolFormer token mixer holds no learned layer, only the spelled-out group
/// norm and `pool(n) - n` ([F1]): a block, pre-norm, decided at the
/// InstanceNormalization; the normaliser-free blocks scale their input by
/// 1/β before the first ReLU ([N1]): pre-activation, decided at that ReLU.
#[test]
fn unusual_branches_keep_their_placement() {
    let r = scan("structure/poolformer_s12_like.onnx");
    let blocks = r["blocks"].as_array().unwrap();
    assert_eq!(blocks.len(), 24, "the census of fixtures/structure/MANIFEST.txt");
    for b in blocks {
        let name = b["merge"]["name"].as_str().unwrap();
        assert_eq!(b["placement_node"]["op_type"], "InstanceNormalization", "{name}");
        let norms: Vec<&str> = b["branch"]["norms"]
            .as_array()
            .unwrap()
            .iter()
            .map(|n| n["label"].as_str().unwrap())
            .collect();
        assert_eq!(norms, ["GroupNormalization (spelled out)"], "{name}");
        let scale = b["branch"]["end_scale"]["max"].as_f64().expect("LayerScale");
        assert!((scale - 0.1).abs() < 1e-6, "{name}: LayerScale {scale}");
        let layers = b["branch"]["layers"].as_array().unwrap().len();
        assert_eq!(layers, if name.ends_with("add1") { 0 } else { 2 }, "{name}");
    }
    let r = scan("structure/nf_scaled_preact.onnx");
    for b in r["blocks"].as_array().unwrap() {
        assert_eq!(b["placement_node"]["op_type"], "Relu");
        assert_eq!(
            b["placement_node"]["name"].as_str().unwrap(),
            format!("{}.relu1", &b["merge"]["name"].as_str().unwrap()[..6])
        );
    }
}

/// Item 4 against onnxruntime: every block of both cases.
#[test]
fn unusual_branches_measured_like_onnxruntime() {
    for (name, path) in [
        ("poolformer_s12_like", "structure/poolformer_s12_like.onnx"),
        ("nf_scaled_preact", "structure/nf_scaled_preact.onnx"),
    ] {
        reference_stats::check_case(&reference_stats::Case {
            name,
            inputs: name,
            model: path,
            ext: "npy",
            blocks: case(path).expect.blocks(),
        });
    }
}

fn findings(r: &Value) -> Vec<(String, u64)> {
    r["findings"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| (f["code"].as_str().unwrap().to_owned(), f["block"].as_u64().unwrap_or(0)))
        .collect()
}

fn notes(r: &Value) -> Vec<String> {
    r["diagnostics"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|d| d["severity"] == "note")
        .map(|d| d["message"].as_str().unwrap().to_owned())
        .collect()
}

/// Item 7: ConvMixer's pointwise layer after every residual depthwise conv
/// is the stage's pattern: one note and no `lost-shortcut`; removing one
/// shortcut leaves a gap that breaks the pattern, and only that gap is a
/// `lost-shortcut`. The demo's lost shortcut (a stage of two blocks, too few
/// gaps to show a pattern) is still found.
#[test]
fn lost_shortcut_only_where_the_pattern_breaks() {
    let r = scan("structure/convmixer_like.onnx");
    assert_eq!(r["blocks"].as_array().unwrap().len(), 6, "fixtures/structure/MANIFEST.txt");
    assert_eq!(findings(&r), []);
    assert!(r["bare_runs"].as_array().unwrap().is_empty());
    let pattern: Vec<String> = notes(&r).into_iter().filter(|n| n.contains("pattern")).collect();
    assert_eq!(pattern.len(), 1, "{pattern:?}");
    assert!(pattern[0].starts_with("stage 1: 5 of its gaps"), "{}", pattern[0]);

    let r = scan("structure/convmixer_lost_shortcut.onnx");
    assert_eq!(r["blocks"].as_array().unwrap().len(), 5, "fixtures/structure/MANIFEST.txt");
    assert_eq!(findings(&r), [("lost-shortcut".to_owned(), 4)]);
    let runs = r["bare_runs"].as_array().unwrap();
    assert_eq!(runs.len(), 1);
    let layers: Vec<&str> =
        runs[0]["layers"].as_array().unwrap().iter().map(|l| l["name"].as_str().unwrap()).collect();
    assert_eq!(layers, ["layer2.pointwise", "layer3.depthwise", "layer3.pointwise"]);
    assert!(notes(&r).iter().any(|n| n.starts_with("stage 1: 3 of its gaps")));

    let demo = scan("demo/tile_grader.onnx");
    assert!(findings(&demo).iter().any(|(code, _)| code == "lost-shortcut"));
}

/// Item 7 against onnxruntime: the ConvMixer blocks.
#[test]
fn convmixer_measured_like_onnxruntime() {
    let path = "structure/convmixer_like.onnx";
    reference_stats::check_case(&reference_stats::Case {
        name: "convmixer_like",
        inputs: "convmixer_like",
        model: path,
        ext: "npy",
        blocks: case(path).expect.blocks(),
    });
}

/// `shunt audit` of the streaming case with `args`, as JSON.
fn audit_streaming(args: &[&str]) -> Value {
    let model = fixture("structure/streaming_state.onnx");
    let mut all = vec!["audit", model.to_str().unwrap(), "--format", "json", "--quiet"];
    all.extend_from_slice(args);
    let run = shunt(&all);
    assert_eq!(run.code, 0, "{args:?}: {}", run.stderr);
    serde_json::from_str(&run.stdout).expect("shunt writes JSON")
}

fn fed_shapes(r: &Value) -> Vec<(String, Vec<u64>)> {
    r["run"]["inputs"]
        .as_array()
        .unwrap()
        .iter()
        .map(|i| {
            let shape =
                i["shape"].as_array().unwrap().iter().map(|d| d.as_u64().unwrap()).collect();
            (i["name"].as_str().unwrap().to_owned(), shape)
        })
        .collect()
}

/// Item 2: the batch axis is found per input (`state [2, batch, 16]` has it
/// second), scalars are never batched, explicit whole shapes are fed as
/// given, and the batch symbol's value fixes the samples per pass. The
/// scalar integer `sr` is fed 1 with a warning naming `--fill`.
#[test]
fn batch_axes_per_input() {
    let shapes = |v: &[(&str, &[u64])]| -> Vec<(String, Vec<u64>)> {
        v.iter().map(|(n, s)| ((*n).to_owned(), s.to_vec())).collect()
    };
    let r = audit_streaming(&["--dim", "samples=64", "--batch", "3", "--pass-batch", "3"]);
    assert_eq!(fed_shapes(&r), shapes(&[("input", &[3, 64]), ("state", &[2, 3, 16]), ("sr", &[])]));
    let warnings: Vec<&str> = r["diagnostics"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|d| d["severity"] == "warning")
        .map(|d| d["message"].as_str().unwrap())
        .collect();
    assert!(
        warnings.iter().any(|w| w.contains("'sr'") && w.contains("--fill sr=VALUE")),
        "{warnings:?}"
    );
    let r = audit_streaming(&["--input", "state=2x1x16", "--input", "input=1x64", "--batch", "2"]);
    assert_eq!(fed_shapes(&r), shapes(&[("input", &[1, 64]), ("state", &[2, 1, 16]), ("sr", &[])]));
    assert_eq!((r["run"]["pass_batch"].as_u64(), r["run"]["passes"].as_u64()), (Some(1), Some(2)));
    let r = audit_streaming(&["--dim", "batch=1", "--dim", "samples=64", "--fill", "sr=16000"]);
    assert_eq!(fed_shapes(&r), shapes(&[("input", &[1, 64]), ("state", &[2, 1, 16]), ("sr", &[])]));
    assert!(r["diagnostics"].as_array().unwrap().iter().all(|d| d["severity"] != "warning"));
}

/// Item 2 against onnxruntime: a `.npz` feed whose state holds its samples
/// on axis 1 and whose `sr` is a 0-d array; onnxruntime runs each sample
/// sliced along each input's own sample axis (stats.py --batch-axis state=1).
#[test]
fn streaming_inputs_measured_like_onnxruntime() {
    let path = "structure/streaming_state.onnx";
    reference_stats::check_case(&reference_stats::Case {
        name: "streaming_state",
        inputs: "streaming_state",
        model: path,
        ext: "npz",
        blocks: case(path).expect.blocks(),
    });
}

/// Item 3: stages by resolution and width, not layout. The Swin-like
/// stream is `[B, H, W, C]` at its attention merges and `[B, H·W, C]` at its
/// MLP merges: 4 stages of 4, 4, 12, 4 merges ([W1]), each holding both
/// layouts, known from static shape inference through Reshape targets
/// computed from `Shape`. With dynamic spatial sizes, the scan leaves the
/// stages unknown and the audit takes the shapes it measured.
#[test]
fn stages_by_resolution_and_width() {
    let r = scan("structure/swin_like.onnx");
    let stages = r["stages"].as_array().unwrap();
    assert_eq!(stages.len(), 4);
    let blocks = r["blocks"].as_array().unwrap();
    assert_eq!(blocks.len(), 24, "fixtures/structure/MANIFEST.txt");
    for b in blocks {
        let name = b["merge"]["name"].as_str().unwrap();
        let rank = b["output_shape"].as_array().expect("a static shape").len();
        assert_eq!(rank, if name.ends_with("add1") { 4 } else { 3 }, "{name}");
    }
    let scanned = scan("structure/resnet18_dynamic_size.onnx");
    assert!(scanned["blocks"].as_array().unwrap().iter().all(|b| b["stage"].is_null()));
    assert_eq!(scanned["stages"].as_array().unwrap().len(), 0);
    let audited = audit(
        "structure/resnet18_dynamic_size.onnx",
        &["--dim", "height=32", "--dim", "width=32", "--batch", "2"],
    );
    let original = scan("resnet18_b.onnx");
    assert_eq!(
        audited["stages"], original["stages"],
        "the measured stages are the static ones of resnet18_b"
    );
}

/// Item 3 against onnxruntime: every Swin-like block, in both layouts.
#[test]
fn swin_measured_like_onnxruntime() {
    let path = "structure/swin_like.onnx";
    reference_stats::check_case(&reference_stats::Case {
        name: "swin_like",
        inputs: "swin_like",
        model: path,
        ext: "npy",
        blocks: case(path).expect.blocks(),
    });
}

/// Item 1: blocks inside control flow. The `If` model's blocks are in its
/// two branches (3 in `then_branch`, 2 in `else_branch`, from the module
/// definition in `testkit::structure::if_sample_rate`), each with its scope;
/// the recurrent cell's in the `Scan` and `Loop` bodies. The `If` node
/// lists its bodies with the blocks found in each and the outer tensor they
/// read.
#[test]
fn blocks_inside_control_flow_have_their_scope() {
    let r = scan("structure/if_sample_rate.onnx");
    let blocks = r["blocks"].as_array().unwrap();
    assert_eq!(blocks.len(), 5, "fixtures/structure/MANIFEST.txt");
    for b in blocks {
        let scope = b["scope"].as_array().expect("a block inside the If");
        assert_eq!(scope.len(), 1);
        assert_eq!(scope[0]["node"], "sr.switch");
        assert_eq!(scope[0]["op_type"], "If");
        let name = b["merge"]["name"].as_str().unwrap();
        let branch = if name.starts_with("sr16k") { "then_branch" } else { "else_branch" };
        assert_eq!(scope[0]["attribute"], branch, "{name}");
    }
    let subgraphs = r["subgraphs"].as_array().unwrap();
    assert_eq!(subgraphs.len(), 1);
    let bodies = subgraphs[0]["bodies"].as_array().unwrap();
    let listed: Vec<(&str, Vec<u64>)> = bodies
        .iter()
        .map(|b| {
            let ids = b["blocks"].as_array().unwrap().iter().map(|i| i.as_u64().unwrap()).collect();
            (b["attribute"].as_str().unwrap(), ids)
        })
        .collect();
    assert_eq!(listed, [("then_branch", vec![1, 2, 3]), ("else_branch", vec![4, 5])]);
    assert!(bodies.iter().all(|b| b["captured"] == serde_json::json!(["input"])));
    // The stages of each branch are their own.
    assert_eq!(r["stages"][0]["blocks"], serde_json::json!([1, 2, 3]));
    assert_eq!(r["stages"][1]["blocks"], serde_json::json!([4, 5]));
    // The table names the body of each block.
    let model = fixture("structure/if_sample_rate.onnx");
    let table = shunt(&["scan", model.to_str().unwrap()]);
    assert!(table.stdout.contains("in If 'sr.switch' then_branch"), "{}", table.stdout);

    for (path, node, op) in [
        ("structure/scan_recurrence.onnx", "rnn", "Scan"),
        ("structure/loop_recurrence.onnx", "recur", "Loop"),
    ] {
        let r = scan(path);
        let blocks = r["blocks"].as_array().unwrap();
        assert_eq!(blocks.len(), 2, "{path}: fixtures/structure/MANIFEST.txt");
        for b in blocks {
            assert_eq!(b["scope"][0]["node"], node, "{path}");
            assert_eq!(b["scope"][0]["op_type"], op, "{path}");
            assert_eq!(b["scope"][0]["attribute"], "body", "{path}");
        }
        assert!(!notes(&r).iter().any(|n| n.contains("not searched")), "{path}");
    }
}

/// Item 1, the `If` against onnxruntime: with `sr` = 16000 the run takes
/// `then_branch`, whose 3 blocks are measured (stats.py --control-flow
/// inlines the branch onnxruntime's condition picks, and checks the inlined
/// model's outputs against the original's); `else_branch`'s 2 blocks are
/// not measured, and say why. With `sr` fed 1 (the default, with its
/// warning), the other branch runs.
#[test]
fn if_branch_taken_is_measured_like_onnxruntime() {
    let path = "structure/if_sample_rate.onnx";
    let report = reference_stats::check_case_measured(
        &reference_stats::Case {
            name: "if_sample_rate",
            inputs: "if_sample_rate",
            model: path,
            ext: "npz",
            blocks: case(path).expect.blocks(),
        },
        3,
    );
    for b in &report["blocks"].as_array().unwrap()[3..] {
        let why = b["not_measured"].as_str().unwrap();
        assert!(
            why.contains("takes then_branch") && why.contains("else_branch does not run"),
            "{why}"
        );
    }
    let r = audit(path, &["--dim", "samples=64", "--batch", "2"]);
    let measured: Vec<bool> =
        r["blocks"].as_array().unwrap().iter().map(|b| !b["stats"].is_null()).collect();
    assert_eq!(measured, [false, false, false, true, true]);
}

/// Item 1, the `Scan` against onnxruntime: each block of the recurrent cell
/// measured over all 5 steps of each sample (stats.py --control-flow exposes
/// the body's tensors as scan outputs), 4 samples in one pass, the samples
/// on axis 1 of `x`.
#[test]
fn scan_body_measured_like_onnxruntime() {
    let path = "structure/scan_recurrence.onnx";
    reference_stats::check_case(&reference_stats::Case {
        name: "scan_recurrence",
        inputs: "scan_recurrence",
        model: path,
        ext: "npz",
        blocks: case(path).expect.blocks(),
    });
}

/// Item 1: tract-onnx 0.23.9 has no `Loop`; the audit reports the
/// structure, with the blocks of the body, and the run's error.
#[test]
fn loop_body_is_reported_when_the_run_fails() {
    let model = fixture("structure/loop_recurrence.onnx");
    let run = shunt(&["audit", model.to_str().unwrap(), "--format", "json", "--quiet"]);
    assert_eq!(run.code, 2, "{}", run.stderr);
    let r: Value = serde_json::from_str(&run.stdout).expect("the structure is written first");
    assert!(r["run_error"].as_str().unwrap().contains("Loop"), "{}", r["run_error"]);
    assert_eq!(r["blocks"].as_array().unwrap().len(), 2);
}
