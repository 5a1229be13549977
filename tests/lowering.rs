//! Models after onnxruntime's optimisers, its quantiser and float16/bfloat16
//! conversion (fixtures/transformed, written by fixtures/transformed/make.py):
//! lowered to standard ONNX, they keep the census of the model they were
//! made from, they run, and the lowering agrees with onnxruntime.
//!
//! The reference for every rewrite is onnxruntime 1.23.2 (PyPI, pinned in
//! tests/reference/requirements.txt) running the ORIGINAL model with its
//! contrib operators; `tests/reference/lowering.py` runs the model written by
//! `shunt lower` beside it on the same inputs. The operators' semantics are
//! those of the ONNX operator specification and onnxruntime's contrib operator
//! documentation (docs/ContribOperators.md, 1.23), cited per case.

use std::path::{Path, PathBuf};

use serde_json::Value;

use crate::reference_stats;
use crate::util;

fn transformed(rel: &str) -> PathBuf {
    util::fixture("transformed").join(rel)
}

/// The options a committed model needs: the NCHWc model was saved by
/// onnxruntime on an AVX-512 machine, with block size 16
/// (fixtures/transformed/MANIFEST.txt), which its shapes do not show.
fn options(model: &Path) -> &'static [&'static str] {
    if model.ends_with("resnet_cifar_ort_all.onnx") { &["--nchwc-block", "16"] } else { &[] }
}

/// Writes `shunt lower MODEL` into `dir` and returns the lowered file.
fn lower(model: &Path, dir: &Path) -> PathBuf {
    let out = dir.join(format!("{}.lowered.onnx", model.file_stem().unwrap().to_str().unwrap()));
    let mut args = vec!["lower", model.to_str().unwrap(), "-o", out.to_str().unwrap()];
    args.extend(options(model));
    let run = util::shunt(&args);
    assert_eq!(run.code, 0, "shunt lower {}: {}", model.display(), run.stderr);
    out
}

/// Runs `tests/reference/lowering.py`; returns its JSON and whether it passed.
fn agreement(original: &Path, lowered: &Path, tol: f64) -> (Value, bool) {
    let stem = original.with_extension("");
    let inputs = format!("{}.in.npz", stem.display());
    let reference = format!("{}.out.npz", stem.display());
    let out = std::process::Command::new(util::reference_python())
        .arg(Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/lowering.py"))
        .args([original.to_str().unwrap(), lowered.to_str().unwrap(), &inputs, &reference])
        .arg(tol.to_string())
        .output()
        .expect("python runs");
    let stdout = String::from_utf8_lossy(&out.stdout);
    let json: Value =
        serde_json::from_str(stdout.lines().last().unwrap_or("null")).unwrap_or_else(|_| {
            panic!(
                "lowering.py on {}: {stdout}\n{}",
                original.display(),
                String::from_utf8_lossy(&out.stderr)
            )
        });
    (json, out.status.success())
}

/// One single-operator model of fixtures/transformed/ops and the tolerance
/// its rewrite is held to.
struct OpCase {
    stem: &'static str,
    /// Float outputs: largest difference relative to the largest |value|;
    /// quantised outputs: codes (quantisation steps of the output scale).
    /// [`REFUSED`]: a variant documented as not lowered (DEVELOPERS.md,
    /// Lowering), which must exit 2 naming the node.
    tol: f64,
}

/// A variant lowering refuses on purpose.
const REFUSED: f64 = -1.0;

/// Float rewrites reorder or re-spell float32 arithmetic: a few units in the
/// last place of the largest value (2^-24 ≈ 6e-8 each), with headroom for
/// Erf, Tanh and Exp, whose onnxruntime kernels are approximations accurate
/// to about 1e-6 relative (common practice; not from a document).
const FLOAT: f64 = 1e-5;
/// A quantised op lowered to DequantizeLinear → float op → QuantizeLinear
/// rounds once, at the end, in float32; onnxruntime's integer kernels
/// requantise with fixed-point multipliers and may round a value sitting near
/// a half step the other way: one code at most ([Q1]: round half to even).
const ONE_STEP: f64 = 1.0;

const OPS: &[OpCase] = &[
    // onnxruntime ContribOperators.md (1.23), com.microsoft.SkipLayerNormalization [Q2]
    OpCase { stem: "SkipLayerNormalization_all_outputs", tol: FLOAT },
    OpCase { stem: "SkipLayerNormalization_minimal", tol: FLOAT },
    // com.microsoft.SkipSimplifiedLayerNormalization
    OpCase { stem: "SkipSimplifiedLayerNormalization", tol: FLOAT },
    // com.microsoft.FusedConv (Z: onnxruntime's conv_add_act_fusion)
    OpCase { stem: "FusedConv_relu_z", tol: FLOAT },
    OpCase { stem: "FusedConv_leakyrelu", tol: FLOAT },
    OpCase { stem: "FusedConv_clip", tol: FLOAT },
    // com.microsoft.FusedGemm, com.microsoft.FusedMatMul
    OpCase { stem: "FusedGemm_relu", tol: FLOAT },
    OpCase { stem: "FusedGemm_leakyrelu", tol: FLOAT },
    OpCase { stem: "FusedMatMul_trans", tol: FLOAT },
    OpCase { stem: "FusedMatMul_batch", tol: FLOAT },
    // com.microsoft.BiasGelu, FastGelu, Gelu, QuickGelu, BiasAdd
    OpCase { stem: "BiasGelu", tol: FLOAT },
    OpCase { stem: "FastGelu_bias", tol: FLOAT },
    OpCase { stem: "Gelu_ms", tol: FLOAT },
    OpCase { stem: "QuickGelu", tol: FLOAT },
    OpCase { stem: "BiasAdd", tol: FLOAT },
    // com.microsoft.Attention
    OpCase { stem: "Attention_mask2d", tol: FLOAT },
    OpCase { stem: "Attention_unidirectional", tol: FLOAT },
    // ONNX Operators.md, BatchNormalization-15 with statistics computed in the graph
    OpCase { stem: "BatchNormalization_computed_stats", tol: FLOAT },
    // ONNX Operators.md QLinearConv-10, QLinearMatMul-10; contrib QLinearAdd, QLinearMul, QGemm, …
    OpCase { stem: "QLinearConv", tol: ONE_STEP },
    OpCase { stem: "QLinearAdd", tol: ONE_STEP },
    OpCase { stem: "QLinearMul", tol: ONE_STEP },
    OpCase { stem: "QLinearMatMul", tol: ONE_STEP },
    OpCase { stem: "QGemm_u8_output", tol: ONE_STEP },
    // com.microsoft.QGemm with a float output: no requantisation, float arithmetic only
    OpCase { stem: "QGemm_float_output", tol: FLOAT },
    // contrib QLinearGlobalAveragePool (channels_last 0 and 1), QLinearConcat,
    // QLinearSigmoid, QLinearLeakyRelu
    OpCase { stem: "QLinearGlobalAveragePool", tol: ONE_STEP },
    // channels_last=1: not lowered (the rank of the input is needed for a
    // rank-agnostic rewrite and onnxruntime's quantiser does not write it)
    OpCase { stem: "QLinearGlobalAveragePool_nhwc", tol: REFUSED },
    OpCase { stem: "QLinearConcat", tol: ONE_STEP },
    OpCase { stem: "QLinearSigmoid", tol: ONE_STEP },
    OpCase { stem: "QLinearLeakyRelu", tol: ONE_STEP },
    // ONNX Operators.md DynamicQuantizeLinear-11 + MatMulInteger-10 (standard ops)
    OpCase { stem: "DynamicQuantizeLinear_MatMulInteger", tol: FLOAT },
];

fn op_models() -> Vec<String> {
    let mut stems: Vec<String> = std::fs::read_dir(transformed("ops"))
        .expect("fixtures/transformed/ops")
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|e| e == "onnx"))
        .map(|p| p.file_stem().unwrap().to_str().unwrap().to_owned())
        .collect();
    stems.sort();
    stems
}

/// Every single-operator model has a case with its tolerance, and every case a model.
#[test]
fn every_op_model_has_a_case() {
    let models = op_models();
    assert!(models.len() >= 25, "fixtures/transformed/ops holds {} models", models.len());
    let cases: Vec<&str> = OPS.iter().map(|c| c.stem).collect();
    let missing: Vec<&String> = models.iter().filter(|m| !cases.contains(&m.as_str())).collect();
    assert!(missing.is_empty(), "op models without a case: {missing:?}");
    let stale: Vec<&&str> = cases.iter().filter(|c| !models.iter().any(|m| m == *c)).collect();
    assert!(stale.is_empty(), "cases without a model: {stale:?}");
}

/// Each rewrite, alone: the lowered model holds only standard operators and
/// gives onnxruntime's outputs of the original within the case's tolerance.
#[test]
fn each_rewrite_agrees_with_onnxruntime() {
    assert!(OPS.len() >= 25, "{} cases", OPS.len());
    let dir = util::tempdir();
    let mut failures = Vec::new();
    for case in OPS {
        let original = transformed(&format!("ops/{}.onnx", case.stem));
        if case.tol == REFUSED {
            let out = dir.path().join("refused.onnx");
            let run =
                util::shunt(&["lower", original.to_str().unwrap(), "-o", out.to_str().unwrap()]);
            let named =
                run.stderr.contains(&format!("'{}#0'", case.stem.split('_').next().unwrap()));
            if run.code != 2 || run.stderr.lines().count() != 1 || !named || out.exists() {
                failures
                    .push(format!("{}: expected a refusal naming the node: {run:?}", case.stem));
            }
            continue;
        }
        let lowered = lower(&original, dir.path());
        let (json, ok) = agreement(&original, &lowered, case.tol);
        if !ok {
            failures.push(format!("{}: {json}", case.stem));
        }
    }
    assert!(
        failures.is_empty(),
        "rewrites that disagree with onnxruntime:\n{}",
        failures.join("\n")
    );
}

/// A transformed whole model and the model it was made from.
struct ModelCase {
    file: &'static str,
    /// The untransformed model, relative to fixtures/.
    source: &'static str,
}

const MODELS: &[ModelCase] = &[
    ModelCase { file: "encoder_postnorm_ortopt.onnx", source: "torch/encoder_postnorm.onnx" },
    ModelCase {
        file: "encoder_prenorm_ortopt.onnx",
        source: "torch/encoder_prenorm_decomposed.onnx",
    },
    ModelCase { file: "bert_postnorm_ortopt.onnx", source: "transformed/bert_postnorm.onnx" },
    ModelCase {
        file: "bert_postnorm_ortopt_noattn.onnx",
        source: "transformed/bert_postnorm.onnx",
    },
    ModelCase { file: "resnet_cifar_ort_extended.onnx", source: "torch/resnet_cifar_bn.onnx" },
    ModelCase { file: "resnet_cifar_ort_all_nonchwc.onnx", source: "torch/resnet_cifar_bn.onnx" },
    ModelCase { file: "resnet_cifar_ort_all.onnx", source: "torch/resnet_cifar_folded.onnx" },
    ModelCase { file: "resnet_cifar_qop.onnx", source: "torch/resnet_cifar_folded.onnx" },
    ModelCase { file: "resnet_cifar_qdq_ort.onnx", source: "torch/resnet_cifar_folded.onnx" },
    ModelCase { file: "encoder_postnorm_dynq.onnx", source: "torch/encoder_postnorm.onnx" },
    ModelCase { file: "resnet_cifar_fp16.onnx", source: "torch/resnet_cifar_folded.onnx" },
    ModelCase { file: "resnet_cifar_fp16_io32.onnx", source: "torch/resnet_cifar_folded.onnx" },
    ModelCase { file: "encoder_postnorm_fp16.onnx", source: "torch/encoder_postnorm.onnx" },
    ModelCase { file: "resnet_cifar_bf16.onnx", source: "torch/resnet_cifar_folded.onnx" },
];

fn scan_json(model: &Path) -> Value {
    let mut args = vec!["scan", model.to_str().unwrap(), "--format", "json", "--quiet"];
    args.extend(options(model));
    let run = util::shunt(&args);
    assert_eq!(run.code, 0, "shunt scan {}: {}", model.display(), run.stderr);
    serde_json::from_str(&run.stdout).expect("scan JSON")
}

/// The census a transformation must keep: blocks, shortcut kinds,
/// placements, concatenative skips and stage shapes.
fn census(report: &Value) -> Value {
    let s = &report["summary"];
    serde_json::json!({
        "blocks": s["blocks"],
        "by_shortcut": s["by_shortcut"],
        "by_placement": s["by_placement"],
        "concat_skips": s["concat_skips"],
    })
}

/// Stage shapes and their blocks, when the static shape inference knows them.
fn stages(report: &Value) -> Vec<Value> {
    report["stages"]
        .as_array()
        .unwrap()
        .iter()
        .map(|st| serde_json::json!([st["shape"], st["blocks"]]))
        .collect()
}

/// Lowered, every transformed model has the census of the model it was made
/// from (fixtures/transformed/MANIFEST.txt; the sources' census is in
/// fixtures/torch/MANIFEST.txt, checked against [R4] [R2] [R3] [T1] [T2] in
/// real_exports).
#[test]
fn transformed_models_keep_the_census_of_their_source() {
    assert_eq!(MODELS.len(), 14);
    let mut failures = Vec::new();
    for case in MODELS {
        let got = scan_json(&transformed(case.file));
        let want = scan_json(&util::fixture(case.source));
        assert!(want["summary"]["blocks"].as_u64().unwrap() > 0, "{}: no blocks", case.source);
        // Stages are compared where both sides know them: exporters differ
        // in the value_info they write (onnxruntime's tools add it), and a
        // stage the inference cannot derive is "unknown", not different.
        let (sg, sw) = (stages(&got), stages(&want));
        let stages_differ = !sg.is_empty() && !sw.is_empty() && sg != sw;
        if census(&got) != census(&want) || stages_differ {
            failures.push(format!(
                "{}: {} {:?}\n  source {}: {} {:?}",
                case.file,
                census(&got),
                sg,
                case.source,
                census(&want),
                sw
            ));
        }
    }
    assert!(failures.is_empty(), "census changed by a transformation:\n{}", failures.join("\n"));
}

/// `compare` of each source with its transformed model, both run on the
/// same inputs (rounded to float16 or bfloat16 for the half-precision ones),
/// reports no structural difference and a ratio change for every block.
#[test]
fn compare_finds_no_structural_difference() {
    let mut failures = Vec::new();
    for case in MODELS {
        let a = util::fixture(case.source);
        let b = transformed(case.file);
        let mut args = vec![
            "compare",
            a.to_str().unwrap(),
            b.to_str().unwrap(),
            "--format",
            "json",
            "--quiet",
        ];
        args.extend(options(&b));
        let run = util::shunt(&args);
        let json: Value = match serde_json::from_str(&run.stdout) {
            Ok(j) => j,
            Err(_) => {
                failures.push(format!("{}: exit {} {}", case.file, run.code, run.stderr));
                continue;
            }
        };
        if json["structural_differences"] != 0 || run.code != 0 {
            failures.push(format!("{}: exit {}: {}", case.file, run.code, json["blocks"]));
            continue;
        }
        let blocks = json["blocks"].as_array().unwrap();
        let measured = blocks.iter().filter(|b| b["ratio_change"].is_number()).count();
        if blocks.is_empty() || measured != blocks.len() {
            failures.push(format!(
                "{}: ratio changes for {measured} of {} blocks",
                case.file,
                blocks.len()
            ));
        }
    }
    assert!(failures.is_empty(), "structural differences:\n{}", failures.join("\n"));
}

/// Every transformed model is audited (run on its committed inputs).
#[test]
fn transformed_models_run() {
    let mut failures = Vec::new();
    for case in MODELS {
        let model = transformed(case.file);
        let stem = model.with_extension("");
        let feed = format!("{}.in.npz", stem.display());
        let mut args =
            vec!["audit", model.to_str().unwrap(), "--feed", &feed, "--format", "json", "--quiet"];
        args.extend(options(&model));
        let run = util::shunt(&args);
        let report: Option<Value> = serde_json::from_str(&run.stdout).ok();
        let run_error = report.as_ref().map(|r| r["run_error"].clone());
        if run.code != 0 || run_error != Some(Value::Null) {
            failures
                .push(format!("{}: exit {}, {run_error:?} {}", case.file, run.code, run.stderr));
        }
    }
    assert!(failures.is_empty(), "transformed models that do not run:\n{}", failures.join("\n"));
}

/// The whole lowered models give onnxruntime's outputs of the originals.
#[test]
fn lowered_models_agree_with_onnxruntime() {
    // (file, tolerance): float models as FLOAT; the QOperator ResNet's logits
    // are dequantised floats after many requantisations, so one code of
    // difference anywhere can move them by a few steps of their scale; held
    // to 2% of the largest logit (derived: 15 layers, each at most one step
    // of ~1% of its range apart, mostly cancelling).
    let cases: &[(&str, f64)] = &[
        ("encoder_postnorm_ortopt.onnx", FLOAT),
        ("encoder_prenorm_ortopt.onnx", FLOAT),
        ("bert_postnorm_ortopt.onnx", FLOAT),
        ("bert_postnorm_ortopt_noattn.onnx", FLOAT),
        ("resnet_cifar_ort_extended.onnx", FLOAT),
        ("resnet_cifar_ort_all_nonchwc.onnx", FLOAT),
        ("resnet_cifar_ort_all.onnx", FLOAT),
        ("resnet_cifar_qop.onnx", 0.02),
        ("nf_resnet_ws.onnx", FLOAT),
    ];
    let dir = util::tempdir();
    let mut failures = Vec::new();
    for (file, tol) in cases {
        let original = transformed(file);
        let lowered = lower(&original, dir.path());
        let (json, ok) = agreement(&original, &lowered, *tol);
        if !ok {
            failures.push(format!("{file}: {json}"));
        }
    }
    assert!(failures.is_empty(), "lowered models that disagree:\n{}", failures.join("\n"));
}

/// Per-block RMS of shortcut and branch (and fork, output, ratio, growth,
/// cosine) of each lowered float model: shunt (tract) against onnxruntime
/// running the lowered model on the same inputs. With the previous test
/// (lowered = original in onnxruntime), this ties shunt's numbers to
/// onnxruntime's on the transformed models themselves.
#[test]
fn block_statistics_agree_with_onnxruntime() {
    // Quantised models: both engines compute DequantizeLinear -> float op ->
    // QuantizeLinear, and may round a value next to a half step the other
    // way. If m of N elements differ by one step s, RMS moves by at most
    // s * sqrt(m / N); onnxruntime against the lowered model differs in about
    // 1 element in 10^6 per op (measured while writing the rules), and an
    // 8-bit step is at most ~5% of these tensors' RMS, so 1e-3 relative holds
    // with room for a few layers of such flips. Cosines: the same bound.
    // The fork is measured dequantised, which onnxruntime's list does not name.
    let quantised = reference_stats::Tolerance { rms: 1e-3, cos: 1e-3, fork: false };
    // Residual blocks: the census in fixtures/transformed/MANIFEST.txt (`additive=`).
    let cases = [
        ("encoder_postnorm_ortopt.onnx", reference_stats::FLOAT32, 4),
        ("encoder_prenorm_ortopt.onnx", reference_stats::FLOAT32, 4),
        ("bert_postnorm_ortopt.onnx", reference_stats::FLOAT32, 4),
        ("resnet_cifar_ort_extended.onnx", reference_stats::FLOAT32, 6),
        ("resnet_cifar_ort_all_nonchwc.onnx", reference_stats::FLOAT32, 6),
        ("resnet_cifar_ort_all.onnx", reference_stats::FLOAT32, 6),
        ("nf_resnet_ws.onnx", reference_stats::FLOAT32, 3),
        ("resnet_cifar_qop.onnx", quantised, 6),
        ("resnet_cifar_qdq_ort.onnx", quantised, 6),
        ("encoder_postnorm_dynq.onnx", quantised, 4),
    ];
    let dir = util::tempdir();
    for (file, tol, blocks) in cases {
        let original = transformed(file);
        let lowered = lower(&original, dir.path());
        let feed = format!("{}.in.npz", original.with_extension("").display());
        let reference = reference_stats::run_stats(lowered.to_str().unwrap(), &feed, &[]);
        let report = reference_stats::audit(lowered.to_str().unwrap(), &feed);
        reference_stats::check_blocks_within(file, &report, &reference, tol, blocks);
    }
}

/// The NCHWc layout depends on the CPU onnxruntime ran on, so the committed
/// model says little about this machine's: make one here with the pinned
/// onnxruntime (`make.py --only ort_all`), lower it with this machine's block
/// size (the default), and check census and outputs against onnxruntime.
#[test]
fn nchwc_model_made_on_this_machine() {
    let dir = util::tempdir();
    let model = dir.path().join("resnet_cifar_ort_all.onnx");
    let make = std::process::Command::new(util::reference_python())
        .current_dir(env!("CARGO_MANIFEST_DIR"))
        .args(["fixtures/transformed/make.py", "--only", "ort_all", "--out"])
        .arg(&model)
        .output()
        .expect("python runs");
    assert!(make.status.success(), "make.py: {}", String::from_utf8_lossy(&make.stderr));
    let got = scan_json(&model);
    let want = scan_json(&util::fixture("torch/resnet_cifar_folded.onnx"));
    assert_eq!(census(&got), census(&want), "census of the NCHWc model made here");
    assert_eq!(stages(&got), stages(&want));
    let nchwc: usize = got["lowered"]
        .as_array()
        .expect("lowered")
        .iter()
        .filter(|r| r["domain"] == "com.microsoft.nchwc")
        .map(|r| r["nodes"].as_u64().unwrap() as usize)
        .sum();
    assert!(nchwc >= 15, "nchwc nodes lowered: {}", got["lowered"]);
    // Inputs: those committed beside the fixture (same graph inputs).
    let committed = transformed("resnet_cifar_ort_all.in.npz");
    std::fs::copy(&committed, dir.path().join("resnet_cifar_ort_all.in.npz")).unwrap();
    std::fs::copy(
        transformed("resnet_cifar_ort_all.out.npz"),
        dir.path().join("resnet_cifar_ort_all.out.npz"),
    )
    .unwrap();
    let lowered = lower(&model, dir.path());
    let (json, ok) = agreement(&model, &lowered, FLOAT);
    assert!(ok, "NCHWc model made here: {json}");
}
