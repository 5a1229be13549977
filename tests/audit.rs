//! `shunt audit`: measurements against signal-propagation theory, the
//! planted defects of the demo, determinism, exit codes and failure modes.

use shunt::audit::{self, AuditConfig};
use shunt::probe::Silent;
use shunt::report::Report;
use shunt_testkit::builder::{Dim, Form, Init, ModelBuilder};

use crate::util::{fixture, shunt, tempdir};

fn audit_in_memory(model: shunt::proto::ModelProto, samples: usize, seed: u64) -> Report {
    let mut config = AuditConfig::standard();
    config.inputs.samples = samples;
    config.inputs.seed = seed;
    let outcome = audit::audit_model(model, "in-memory", &config, &Silent).expect("the audit runs");
    assert!(outcome.run_error.is_none(), "{:?}", outcome.run_error);
    outcome.report
}

fn ratio(r: &Report, block: usize) -> f64 {
    r.blocks[block].stats.as_ref().and_then(|s| s.ratio).expect("a measured ratio").mean
}

/// `x + W2 relu(W1 relu(x))` blocks on `[N, width]` features, He-initialised
/// fully connected layers (no padding, so no border effects), no normalisation.
fn preact_mlp(blocks: usize, width: i64) -> shunt::proto::ModelProto {
    let mut b = ModelBuilder::new("preact_mlp", 17).seed(11);
    let mut x = b.input("x", &[Dim::batch(), Dim::Fixed(width)]);
    for i in 0..blocks {
        let a = b.relu(&format!("b{i}.relu1"), &x);
        let h = b.gemm(&format!("b{i}.fc1"), &a, width, &Init::HeNormal);
        let h = b.relu(&format!("b{i}.relu2"), &h);
        let f = b.gemm(&format!("b{i}.fc2"), &h, width, &Init::HeNormal);
        x = b.add(&format!("b{i}.add"), &x, &f);
    }
    b.output(&x);
    b.finish()
}

// [S1] Delving Deep into Rectifiers, arXiv:1502.01852, Section 2.2: weights of
// variance 2/fan_in keep the second moment through a linear layer followed by
// ReLU. Derivation for one pre-activation block without normalisation: for a
// zero-mean symmetric input of second moment s, relu halves it (s/2); a layer
// with weight variance 2/fan_in multiplies it by fan_in * 2/fan_in = 2 (s);
// relu halves it again and the second layer doubles it: the branch returns
// second moment s, so RMS(branch)/RMS(shortcut) = 1. The branch is
// uncorrelated with x in expectation, so the output has second moment 2s:
// RMS grows by sqrt(2) per block.
//
// Tolerance: these are expectations over the weights; one draw of a 1024-wide
// layer deviates from them by about sqrt(2/1024) ≈ 4% in second moment
// (mostly through the non-zero mean of ReLU outputs), so about 2-3% per block
// in RMS, and the 32 samples add about 1%. We allow 10% per block and 3% for
// the average over 8 blocks: a wrong ratio (the inverse, or a branch
// measured after the merge) is off by 30% or more.
#[test]
fn he_initialised_preact_blocks_keep_ratio_one_and_grow_by_sqrt2() {
    let r = audit_in_memory(preact_mlp(8, 1024), 32, 1);
    assert_eq!(r.blocks.len(), 8);
    let mut ratios = Vec::new();
    let mut growths = Vec::new();
    for (i, b) in r.blocks.iter().enumerate() {
        let s = b.stats.as_ref().unwrap();
        let q = s.ratio.unwrap().mean;
        let g = s.growth.unwrap().mean;
        assert!((q - 1.0).abs() < 0.10, "block {i}: ratio {q}, expected 1 [S1]");
        assert!(
            (g - 2f64.sqrt()).abs() / 2f64.sqrt() < 0.10,
            "block {i}: growth {g}, expected sqrt(2) [S1]"
        );
        ratios.push(q);
        growths.push(g);
    }
    let mean_ratio = ratios.iter().sum::<f64>() / ratios.len() as f64;
    let geo_growth = (growths.iter().map(|g| g.ln()).sum::<f64>() / growths.len() as f64).exp();
    assert!((mean_ratio - 1.0).abs() < 0.03, "mean ratio {mean_ratio} [S1]");
    assert!((geo_growth / 2f64.sqrt() - 1.0).abs() < 0.03, "mean growth {geo_growth} [S1]");
}

/// `x + LN(W2 relu(W1 x))`: every branch ends in a normalisation to unit
/// variance (LayerNormalization with unit scale and zero shift).
fn normalised_branches(blocks: usize, width: i64) -> shunt::proto::ModelProto {
    let mut b = ModelBuilder::new("normalised_branches", 17).seed(12);
    let mut x = b.input("x", &[Dim::batch(), Dim::Fixed(width)]);
    for i in 0..blocks {
        let h = b.gemm(&format!("b{i}.fc1"), &x, width, &Init::HeNormal);
        let h = b.relu(&format!("b{i}.relu"), &h);
        let h = b.gemm(&format!("b{i}.fc2"), &h, width, &Init::HeNormal);
        let f = b.layer_norm(&format!("b{i}.norm"), &h, Form::Fused);
        x = b.add(&format!("b{i}.add"), &x, &f);
    }
    b.output(&x);
    b.finish()
}

// [S2] Batch Normalization Biases Residual Blocks Towards the Identity
// Function in Deep Networks, arXiv:2002.10444: with a branch normalised to
// unit variance and identity shortcuts, Var(x_{l+1}) = Var(x_l) + 1, so
// Var(x_l) = Var(x_0) + l and the ratio at block l is 1/sqrt(Var(x_0) + l).
// Here Var(x_0) = 1 (standard normal input) and the layer norm makes every
// branch exactly unit RMS per sample.
//
// Tolerance: the recursion assumes branch and shortcut uncorrelated; one draw
// of 1024-wide weights leaves a correlation of order 1/sqrt(1024) ≈ 3%, which
// moves Var(x_l) by a few percent (and the ratio by half that); 32 samples
// of 1024 features estimate Var(x_0) to about 1%. We allow 6% per block: a
// ratio of the wrong tensors (1/(1+l), or sqrt(1+l)) misses by far more.
#[test]
fn normalised_branches_follow_one_over_sqrt_depth() {
    let blocks = 12;
    let r = audit_in_memory(normalised_branches(blocks, 1024), 32, 2);
    assert_eq!(r.blocks.len(), blocks);
    for l in 0..blocks {
        let expected = 1.0 / (1.0 + l as f64).sqrt();
        let q = ratio(&r, l);
        assert!(
            (q / expected - 1.0).abs() < 0.06,
            "block {l}: ratio {q}, expected {expected} [S2]"
        );
        let branch = r.blocks[l].stats.as_ref().unwrap().branch_rms.unwrap().mean;
        assert!(
            (branch - 1.0).abs() < 1e-3,
            "block {l}: a layer-normalised branch has RMS 1, got {branch}"
        );
    }
}

// [C1] A ConvNet for the 2020s, arXiv:2201.03545: layer scale initialised to
// 1e-6 makes every branch about 1e-6 of its shortcut at initialisation.
#[test]
fn layer_scale_branches_are_flagged_dead() {
    let run = shunt(&[
        "audit",
        fixture("convnext_like.onnx").to_str().unwrap(),
        "--format",
        "json",
        "--quiet",
    ]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let r: Report = serde_json::from_str(&run.stdout).unwrap();
    assert_eq!(r.blocks.len(), 18, "[C1] ConvNeXt-T depths 3,3,9,3");
    for b in &r.blocks {
        let q = b.stats.as_ref().unwrap().ratio.unwrap().mean;
        // About 1e-6 times the branch before the scale, which is of order 1.
        assert!(q > 1e-8 && q < 1e-4, "block {}: ratio {q} [C1]", b.id);
        assert!(
            r.findings.iter().any(|f| f.block == Some(b.id) && f.code.as_str() == "dead"),
            "block {} dead [C1]",
            b.id
        );
    }
    // Tiny magnitudes do not make the whole signal vanish: it is the shortcut.
    assert!(!r.findings.iter().any(|f| f.code.as_str() == "vanishing-signal"));
}

// [Z1] ReZero is All You Need, arXiv:2003.04887: alpha = 0 makes every branch
// exactly zero at initialisation.
#[test]
fn zero_initialised_branches_measure_exactly_zero() {
    for name in ["rezero.onnx", "zero_branch.onnx"] {
        let run = shunt(&["audit", fixture(name).to_str().unwrap(), "--format", "json", "--quiet"]);
        assert_eq!(run.code, 0, "{name}: {}", run.stderr);
        let r: Report = serde_json::from_str(&run.stdout).unwrap();
        // fixtures/MANIFEST.txt: additive=3 for both.
        assert_eq!(r.blocks.len(), 3, "{name}");
        for b in &r.blocks {
            let s = b.stats.as_ref().unwrap();
            assert_eq!(
                s.branch_rms.unwrap().max,
                0.0,
                "{name} block {}: branch exactly 0 [Z1]",
                b.id
            );
            assert_eq!(s.ratio.unwrap().max, 0.0, "{name} block {}: ratio exactly 0 [Z1]", b.id);
            assert!(b.static_dead.is_some(), "{name} block {}: dead by construction", b.id);
        }
    }
}

#[test]
fn demo_shows_its_planted_defects() {
    let demo = fixture("demo/tile_grader.onnx");
    let demo = demo.to_str().unwrap();
    let run = shunt(&["audit", demo, "--format", "json", "--quiet"]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let r: Report = serde_json::from_str(&run.stdout).unwrap();
    let found = |code: &str| -> Vec<String> {
        r.findings
            .iter()
            .filter(|f| f.code.as_str() == code)
            .filter_map(|f| f.node.as_ref().map(|n| n.name.clone()))
            .collect()
    };
    // The planted defects (see fixtures/MANIFEST.txt): a zeroed branch, a
    // branch scaled by 40, a lost shortcut in stage 1.
    assert_eq!(found("dead"), vec!["stage2.2.add"]);
    assert_eq!(found("static-dead"), vec!["stage2.2.add"]);
    assert_eq!(found("dominant"), vec!["stage3.1.add"]);
    let lost: Vec<&shunt::report::FindingRow> =
        r.findings.iter().filter(|f| f.code.as_str() == "lost-shortcut").collect();
    assert_eq!(lost.len(), 1);
    assert!(lost[0].message.contains("stage1.1.conv1"), "{}", lost[0].message);
    // The dead branch measures exactly zero; the scaled one about 40x its peers.
    assert_eq!(ratio(&r, 4), 0.0);
    assert!(ratio(&r, 6) > 10.0);
    // --fail-on turns findings into exit code 1; the table shows them too.
    assert_eq!(shunt(&["audit", demo, "--quiet", "--fail-on", "dominant"]).code, 1);
    assert_eq!(shunt(&["audit", demo, "--quiet", "--fail-on", "non-finite"]).code, 0);
    assert_eq!(shunt(&["scan", demo, "--fail-on", "lost-shortcut"]).code, 1);
    assert_eq!(shunt(&["audit", demo, "--quiet", "--fail-on", "bogus"]).code, 2);
    let table = shunt(&["audit", demo, "--quiet"]);
    assert!(
        table.stdout.contains("dominant") && table.stdout.contains("lost-shortcut"),
        "{}",
        table.stdout
    );
}

#[test]
fn same_seed_gives_byte_identical_json() {
    let demo = fixture("demo/tile_grader.onnx");
    let demo = demo.to_str().unwrap();
    let a = shunt(&["audit", demo, "--format", "json", "--seed", "5", "--quiet"]);
    let b = shunt(&["audit", demo, "--format", "json", "--seed", "5", "--quiet"]);
    let c = shunt(&["audit", demo, "--format", "json", "--seed", "6", "--quiet"]);
    assert_eq!(a.code, 0, "{}", a.stderr);
    assert_eq!(a.stdout, b.stdout, "same seed, same bytes");
    assert_ne!(a.stdout, c.stdout, "another seed, other inputs");
}

#[test]
fn no_run_gives_the_structural_audit() {
    let demo = fixture("demo/tile_grader.onnx");
    let run = shunt(&["audit", demo.to_str().unwrap(), "--no-run", "--format", "json"]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let r: Report = serde_json::from_str(&run.stdout).unwrap();
    assert!(r.run.is_none());
    assert!(r.blocks.iter().all(|b| b.stats.is_none()));
    let codes: Vec<&str> = r.findings.iter().map(|f| f.code.as_str()).collect();
    assert_eq!(codes, vec!["lost-shortcut", "static-dead"]);
}

#[test]
fn records_what_was_fed() {
    let run = shunt(&[
        "audit",
        fixture("text_postnorm.onnx").to_str().unwrap(),
        "--format",
        "json",
        "--quiet",
        "--batch",
        "3",
    ]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let r: Report = serde_json::from_str(&run.stdout).unwrap();
    let fed = r.run.expect("a run section");
    assert_eq!(fed.samples, 3);
    assert_eq!(fed.seed, 0);
    let how: Vec<&str> = fed.inputs.iter().map(|i| i.values.as_str()).collect();
    assert!(how.iter().any(|h| h.starts_with("token ids uniform in [0, ")), "{how:?}");
    assert!(r.blocks.iter().all(|b| b.stats.is_some()));
}

#[test]
fn symbolic_dimensions_must_be_given() {
    let mut b = ModelBuilder::new("seq", 17);
    let x = b.input("x", &[Dim::batch(), Dim::Sym("seq".into()), Dim::Fixed(8)]);
    let h = b.linear("fc", &x, 8, &Init::HeNormal, false);
    let y = b.add("add", &x, &h);
    b.output(&y);
    let dir = tempdir();
    let path = dir.path().join("seq.onnx");
    std::fs::write(&path, prost::Message::encode_to_vec(&b.finish())).unwrap();
    let p = path.to_str().unwrap();
    let run = shunt(&["audit", p, "--quiet"]);
    assert_eq!(run.code, 2);
    assert!(
        run.stderr.contains("'seq'") && run.stderr.contains("--dim seq=VALUE"),
        "{}",
        run.stderr
    );
    let run = shunt(&["audit", p, "--quiet", "--dim", "seq=5"]);
    assert_eq!(run.code, 0, "{}", run.stderr);
}

#[test]
fn an_op_tract_cannot_run_still_gives_the_structure() {
    let mut b = ModelBuilder::new("custom", 17);
    let x = b.input("x", &[Dim::batch(), Dim::Fixed(8)]);
    let h = b.linear("fc", &x, 8, &Init::HeNormal, false);
    let h = b.node("Frobnicate", "mystery", &[&h], &[]);
    let y = b.add("add", &x, &h);
    b.output(&y);
    let mut model = b.finish();
    model
        .graph
        .as_mut()
        .unwrap()
        .node
        .iter_mut()
        .filter(|n| n.op_type == "Frobnicate")
        .for_each(|n| n.domain = "com.example".into());
    model
        .opset_import
        .push(shunt::proto::OperatorSetIdProto { domain: "com.example".into(), version: 1 });
    let dir = tempdir();
    let path = dir.path().join("custom.onnx");
    std::fs::write(&path, prost::Message::encode_to_vec(&model)).unwrap();
    let p = path.to_str().unwrap();
    let scan = shunt(&["scan", p]);
    assert_eq!(scan.code, 0, "structure analysis never depends on tract: {}", scan.stderr);
    let run = shunt(&["audit", p, "--quiet"]);
    assert_eq!(run.code, 2);
    assert!(
        run.stdout.contains("residual blocks: 1"),
        "the structure still comes out: {}",
        run.stdout
    );
    assert!(
        run.stderr.contains("Frobnicate") || run.stderr.contains("mystery"),
        "names the op or node: {}",
        run.stderr
    );
    assert_eq!(run.stderr.lines().count(), 1, "{}", run.stderr);
    assert!(!run.stderr.contains("panicked"));
    assert_eq!(shunt(&["audit", p, "--no-run"]).code, 0);
}

#[test]
fn out_of_range_token_ids_are_an_error_not_a_panic() {
    let model = fixture("text_postnorm.onnx");
    let dir = tempdir();
    let feed = dir.path().join("ids.npz");
    // Token ids far past the vocabulary: tract is known to panic on these.
    let script = "import numpy as np, sys\nids = np.full((2, 8), 10**6, dtype=np.int64)\nmask = np.ones((2, 8), dtype=np.float32)\nnp.savez(sys.argv[1], input_ids=ids, attention_mask=mask)\n";
    let names = crate::util::python(
        "import onnx, sys\nm = onnx.load(sys.argv[1])\ninits = {i.name for i in m.graph.initializer}\nprint(','.join(i.name for i in m.graph.input if i.name not in inits))",
        &[model.to_str().unwrap()],
    );
    let names: Vec<&str> = names.trim().split(',').collect();
    assert_eq!(names.len(), 2, "{names:?}");
    let script = script.replace("input_ids", names[0]).replace("attention_mask", names[1]);
    crate::util::python(&script, &[feed.to_str().unwrap()]);
    let run =
        shunt(&["audit", model.to_str().unwrap(), "--feed", feed.to_str().unwrap(), "--quiet"]);
    assert_eq!(run.code, 2, "{}\n{}", run.stdout, run.stderr);
    assert!(!run.stderr.contains("panicked at"), "{}", run.stderr);
    assert!(run.stderr.starts_with("shunt: error:"), "{}", run.stderr);
}

#[test]
fn passes_of_any_size_measure_the_same_samples() {
    let demo = fixture("demo/tile_grader.onnx");
    let demo = demo.to_str().unwrap();
    let whole = shunt(&["audit", demo, "--format", "json", "--quiet", "--pass-batch", "8"]);
    let split = shunt(&["audit", demo, "--format", "json", "--quiet", "--pass-batch", "2"]);
    assert_eq!(split.code, 0, "{}", split.stderr);
    let whole: Report = serde_json::from_str(&whole.stdout).unwrap();
    let split: Report = serde_json::from_str(&split.stdout).unwrap();
    assert_eq!((whole.run.as_ref().unwrap().passes, split.run.as_ref().unwrap().passes), (1, 4));
    // fixtures/MANIFEST.txt: demo/tile_grader.onnx additive=8.
    assert_eq!((whole.blocks.len(), split.blocks.len()), (8, 8));
    for (a, b) in whole.blocks.iter().zip(&split.blocks) {
        let (a, b) = (a.stats.as_ref().unwrap(), b.stats.as_ref().unwrap());
        assert_eq!(a.samples, b.samples);
        let (x, y) = (a.output_rms.unwrap(), b.output_rms.unwrap());
        // Only the order of float32 sums inside the engine may differ.
        for (p, q) in [(x.mean, y.mean), (x.min, y.min), (x.max, y.max)] {
            assert!((p - q).abs() <= 1e-5 * p.abs(), "{p} vs {q}");
        }
    }
}

#[test]
fn non_finite_values_are_findings_not_crashes() {
    // The branch takes the log of a signal that is negative half the time.
    let mut b = ModelBuilder::new("nan", 17);
    let x = b.input("x", &[Dim::batch(), Dim::Fixed(16)]);
    let h = b.linear("fc", &x, 16, &Init::HeNormal, false);
    let h = b.node("Log", "log", &[&h], &[]);
    let y = b.add("add", &x, &h);
    b.output(&y);
    let r = audit_in_memory(b.finish(), 4, 0);
    let s = r.blocks[0].stats.as_ref().unwrap();
    assert!(s.nan > 0, "NaN counted");
    assert!(
        r.findings.iter().any(|f| f.code.as_str() == "non-finite" && f.block == Some(1)),
        "{:?}",
        r.findings
    );
}

#[test]
fn subgraphs_are_reported() {
    use shunt::proto::{AttributeProto, attribute_proto::AttributeType};
    let mut then_b = ModelBuilder::new("then", 17);
    let t = then_b.input("t_in", &[Dim::Fixed(1)]);
    then_b.output(&t);
    let then_g = then_b.finish().graph.unwrap();
    let mut b = ModelBuilder::new("with_if", 17);
    let x = b.input("x", &[Dim::batch(), Dim::Fixed(8)]);
    let h = b.linear("fc", &x, 8, &Init::HeNormal, false);
    let y = b.add("add", &x, &h);
    b.output(&y);
    let mut model = b.finish();
    let graph = model.graph.as_mut().unwrap();
    graph.initializer.push(shunt::proto::TensorProto {
        name: "cond".into(),
        data_type: 9,
        int32_data: vec![1],
        ..Default::default()
    });
    graph.node.push(shunt::proto::NodeProto {
        op_type: "If".into(),
        name: "branchy".into(),
        input: vec!["cond".into()],
        output: vec!["if_out".into()],
        attribute: vec![
            AttributeProto {
                name: "then_branch".into(),
                r#type: AttributeType::Graph as i32,
                g: Some(then_g.clone()),
                ..Default::default()
            },
            AttributeProto {
                name: "else_branch".into(),
                r#type: AttributeType::Graph as i32,
                g: Some(then_g),
                ..Default::default()
            },
        ],
        ..Default::default()
    });
    let r = shunt::scan::scan_model(model, "if", &shunt::open::OpenConfig::standard()).unwrap();
    assert_eq!(r.subgraphs.len(), 1);
    assert_eq!((r.subgraphs[0].node.name.as_str(), r.subgraphs[0].subgraphs), ("branchy", 2));
    // Both bodies are searched (issue 15, item 1); they hold no block.
    let bodies: Vec<&str> = r.subgraphs[0].bodies.iter().map(|b| b.attribute.as_str()).collect();
    assert_eq!(bodies, ["then_branch", "else_branch"]);
    assert!(r.subgraphs[0].bodies.iter().all(|b| b.blocks.is_empty()));
    assert!(!r.diagnostics.iter().any(|d| d.message.contains("not searched")));
    assert_eq!(r.summary.blocks, 1);
}
