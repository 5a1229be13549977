//! Half-precision models: float16 and bfloat16 inputs, `.npy` feeds, and
//! per-block statistics against onnxruntime running the same model.
//!
//! The half-precision models are made from fixtures/torch/resnet_cifar_folded.onnx
//! by tests/reference/half.py in the pinned venv (onnxconverter-common for
//! float16; bfloat16 by rounding the float32 bits, to nearest even).

use std::path::{Path, PathBuf};

use serde_json::Value;
use shunt::probe::inputs::{self, InputConfig, InputSpec, Values};
use shunt::proto::tensor_proto::DataType;
use tract_onnx::prelude::tract_data::half::{bf16, f16};

use crate::util::{fixture, python, reference_python, shunt, tempdir};

const RESNET: &str = "torch/resnet_cifar_folded.onnx";

/// Runs tests/reference/half.py `kind` on the ResNet fixture into `dir`.
fn half_model(kind: &str, dir: &Path, extra: &[&str]) -> PathBuf {
    let out = dir.join(format!("resnet_{kind}.onnx"));
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/half.py");
    let status = std::process::Command::new(reference_python())
        .arg(&script)
        .arg(kind)
        .arg(fixture(RESNET))
        .arg(&out)
        .args(extra)
        .output()
        .expect("python runs");
    assert!(status.status.success(), "half.py {kind}: {}", String::from_utf8_lossy(&status.stderr));
    out
}

/// Seeded standard normal samples `[n, 3, 32, 32]` saved as `dtype` (`float16`,
/// `float32`, or `V2` for a 2-byte record like ml_dtypes' bfloat16).
fn npy(dir: &Path, name: &str, dtype: &str, n: usize) -> PathBuf {
    let path = dir.join(name);
    python(
        "import sys, numpy as np\n\
         x = np.random.default_rng(5).standard_normal((int(sys.argv[3]), 3, 32, 32)).astype(np.float32)\n\
         d = sys.argv[2]\n\
         np.save(sys.argv[1], x.astype(np.float16).view('V2') if d == 'V2' else x.astype(d))\n",
        &[path.to_str().unwrap(), dtype, &n.to_string()],
    );
    path
}

fn audit_json(args: &[&str]) -> Value {
    let mut all = vec!["audit"];
    all.extend_from_slice(args);
    all.extend_from_slice(&["--format", "json", "--quiet"]);
    let run = shunt(&all);
    assert_eq!(run.code, 0, "shunt {all:?}: {}\n{}", run.stderr, run.stdout);
    serde_json::from_str(&run.stdout).expect("shunt writes JSON")
}

fn spec(dtype: DataType) -> InputSpec {
    use shunt::graph::Dim;
    InputSpec {
        name: "x".into(),
        dtype: dtype as i32,
        shape: Some(vec![Dim::Symbol("N".into()), Dim::Known(257)]),
        vocab: None,
    }
}

// IEEE 754-2008 binary16 and bfloat16 (the upper half of binary32): a value
// is rounded to the nearest representable one, ties to even. Same seed, same
// float32 stream, so the half inputs must be exactly its rounding.
#[test]
fn half_inputs_are_the_float32_stream_rounded() {
    let config = InputConfig { seed: 3, max_pass: None, ..InputConfig::standard(4) };
    let values = |dtype| {
        let f = inputs::plan(&[spec(dtype)], &config).unwrap();
        assert_eq!(f.passes, 1);
        inputs::values(&f, 0).remove(0)
    };
    let Values::F32(wide) = values(DataType::Float) else { panic!("float32 values") };
    let Values::F16(h) = values(DataType::Float16) else { panic!("float16 values") };
    let Values::BF16(b) = values(DataType::Bfloat16) else { panic!("bfloat16 values") };
    assert_eq!(wide.len(), 4 * 257);
    let h_want: Vec<f16> = wide.iter().map(|&v| f16::from_f32(v)).collect();
    let b_want: Vec<bf16> = wide.iter().map(|&v| bf16::from_f32(v)).collect();
    assert_eq!(h, h_want);
    assert_eq!(b, b_want);
    // Rounded, not truncated: some values moved up in magnitude.
    assert!(wide.iter().zip(&b).any(|(w, b)| b.to_f32().abs() > w.abs()));
    let f = inputs::plan(&[spec(DataType::Float16)], &config).unwrap();
    assert_eq!(f.inputs[0].how, "normal(0, 1) rounded to float16");
}

// A float16 model's run row says float16 and how it ran; a float32 model's
// JSON has no precision field at all (its schema-4 JSON is unchanged).
#[test]
fn run_row_names_the_half_type_and_the_precision() {
    let dir = tempdir();
    let model = half_model("float16", dir.path(), &[]);
    let r = audit_json(&[model.to_str().unwrap(), "--batch", "2"]);
    let run = &r["run"];
    assert_eq!(run["inputs"][0]["dtype"], "float16");
    assert_eq!(run["inputs"][0]["values"], "normal(0, 1) rounded to float16");
    assert_eq!(run["precision"]["model"], "float16");
    assert_eq!(run["precision"]["ran"], "float16");
    assert!(run["precision"]["note"].as_str().unwrap().contains("1 Gemm with a bias"), "{run}");
    let plain = audit_json(&[fixture(RESNET).to_str().unwrap(), "--batch", "2"]);
    assert!(plain["run"].as_object().unwrap().get("precision").is_none(), "{}", plain["run"]);
}

// Feeds: `<f2` is read for a float16 input and widened exactly for a float32
// one (said in the run row); ml_dtypes' bfloat16 `<V2` is refused, naming the file.
#[test]
fn float16_npy_feeds() {
    let dir = tempdir();
    let model = half_model("float16", dir.path(), &[]);
    let x16 = npy(dir.path(), "x16.npy", "float16", 2);
    let r = audit_json(&[model.to_str().unwrap(), "--feed", x16.to_str().unwrap()]);
    let values = r["run"]["inputs"][0]["values"].as_str().unwrap();
    assert_eq!(values, format!("from {}", x16.display()));
    // A float16 array for the float32 model: widened exactly, and said.
    let r = audit_json(&[fixture(RESNET).to_str().unwrap(), "--feed", x16.to_str().unwrap()]);
    let values = r["run"]["inputs"][0]["values"].as_str().unwrap();
    assert_eq!(values, format!("from {} (float16 widened to float32)", x16.display()));
    // float32 for the float16 model: rounded, and said.
    let x32 = npy(dir.path(), "x32.npy", "float32", 2);
    let r = audit_json(&[model.to_str().unwrap(), "--feed", x32.to_str().unwrap()]);
    let values = r["run"]["inputs"][0]["values"].as_str().unwrap();
    assert_eq!(values, format!("from {} (float32 rounded to float16)", x32.display()));
    // The float16 feed and the float32 feed rounded are the same tensors.
    let a = audit_json(&[model.to_str().unwrap(), "--feed", x16.to_str().unwrap()]);
    assert_eq!(a["blocks"], r["blocks"]);
    let v2 = npy(dir.path(), "xv2.npy", "V2", 2);
    let run = shunt(&["audit", model.to_str().unwrap(), "--feed", v2.to_str().unwrap()]);
    assert_eq!(run.code, 2, "{}", run.stderr);
    assert!(run.stderr.contains("xv2.npy") && run.stderr.contains("'<V2'"), "{}", run.stderr);
    assert!(run.stderr.contains("as float32"), "{}", run.stderr);
}

/// `tests/reference/stats.py` on `model` and `inputs`: per-sample RMS of every
/// tensor an audit watches, by onnxruntime in float64 from the model's tensors.
fn onnxruntime_stats(model: &Path, inputs: &Path, dir: &Path) -> Value {
    let out = dir.join("reference.json");
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/stats.py");
    let run = std::process::Command::new(reference_python())
        .arg(&script)
        .arg(model)
        .arg(inputs)
        .arg(&out)
        .output()
        .expect("python runs");
    assert!(run.status.success(), "stats.py: {}", String::from_utf8_lossy(&run.stderr));
    serde_json::from_str(&std::fs::read_to_string(&out).unwrap()).unwrap()
}

fn rms_of(reference: &Value, tensor: &str) -> Vec<f64> {
    let v = reference["tensors"][tensor]["rms"].as_array();
    v.unwrap_or_else(|| panic!("onnxruntime has no tensor '{tensor}'"))
        .iter()
        .map(|x| x.as_f64().unwrap())
        .collect()
}

/// The largest relative difference, over every block, between shunt's
/// mean per-block RMS (fork, shortcut, branch, output) and onnxruntime's.
fn worst_rms_difference(report: &Value, reference: &Value) -> f64 {
    let blocks = report["blocks"].as_array().unwrap();
    // RESNET's census in fixtures/torch/MANIFEST.txt: additive=6.
    assert_eq!(blocks.len(), 6, "residual blocks of {RESNET}");
    assert!(report["run_error"].is_null(), "{}", report["run_error"]);
    let mut worst = 0f64;
    for b in blocks {
        let st = &b["stats"];
        let branch = b["branch"]["inputs"][0].as_str().unwrap();
        for (field, tensor) in [
            ("fork_rms", b["fork"].as_str().unwrap()),
            ("shortcut_rms", b["shortcut"]["input"].as_str().unwrap()),
            ("branch_rms", branch),
            ("output_rms", b["output"].as_str().unwrap()),
        ] {
            let want = rms_of(reference, tensor);
            let want = want.iter().sum::<f64>() / want.len() as f64;
            let got = st[field]["mean"].as_f64().unwrap();
            worst = worst.max((got - want).abs() / want.abs().max(1e-30));
        }
    }
    worst
}

// Agreement with onnxruntime 1.23.2 (PyPI) running the same float16 model
// on the same float16 inputs, RMS computed in float64 by numpy.
//
// Tolerance: both engines round every op's result to float16 (relative error
// up to u = 2^-11 ≈ 4.9e-4), but they accumulate differently (onnxruntime's
// MLAS in float32, tract's float16 kernels partly in float16), so one element
// of the last block, 15 layers deep, may differ by a few 1e-3 relative (we
// measured 7.8e-4 of the largest output). The RMS of a tensor of n elements
// averages these zero-mean differences: its relative change is about
// d/sqrt(n) plus d^2, i.e. below 1e-4 for the 16·32·32 = 16,384-element maps
// of this model. We allow 1e-3 relative, twice u, which a measurement taken
// on the wrong tensor or in the wrong type (a float32 twin instead of float16
// differs by ~u per op, growing with depth) would not meet for every block.
const HALF_RMS_TOL: f64 = 1e-3;

#[test]
fn float16_block_statistics_agree_with_onnxruntime() {
    let dir = tempdir();
    for extra in [&[][..], &["--keep-io-types"][..]] {
        let model = half_model("float16", dir.path(), extra);
        let dtype = if extra.is_empty() { "float16" } else { "float32" };
        let x = npy(dir.path(), &format!("x_{dtype}.npy"), dtype, 4);
        let report = audit_json(&[model.to_str().unwrap(), "--feed", x.to_str().unwrap()]);
        assert_eq!(report["run"]["precision"]["ran"], "float16", "{extra:?}");
        let reference = onnxruntime_stats(&model, &x, dir.path());
        let worst = worst_rms_difference(&report, &reference);
        // Reference: onnxruntime 1.23.2, numpy 2.3.5, onnxconverter-common 1.16.0 (PyPI)
        assert!(worst < HALF_RMS_TOL, "{extra:?}: worst relative RMS difference {worst:e}");
    }
}

// The bfloat16 model runs as its float32 twin, whose numbers are those of the
// float32 model with bfloat16-rounded weights on bfloat16-rounded inputs:
// onnxruntime runs exactly that model (tests/reference/half.py
// bfloat16-weights) on the rounded inputs, so the agreement is float32's
// (1e-4, as in reference_stats).
#[test]
fn bfloat16_runs_as_its_float32_twin() {
    let dir = tempdir();
    let model = half_model("bfloat16", dir.path(), &[]);
    let twin = half_model("bfloat16-weights", dir.path(), &[]);
    let x = npy(dir.path(), "x32.npy", "float32", 4);
    let report = audit_json(&[model.to_str().unwrap(), "--feed", x.to_str().unwrap()]);
    let run = &report["run"];
    assert_eq!(run["inputs"][0]["dtype"], "bfloat16");
    assert_eq!(run["precision"]["ran"], "float32");
    assert!(run["precision"]["note"].as_str().unwrap().contains("no bfloat16"), "{run}");
    // The same inputs rounded to bfloat16 (to nearest even, as shunt does).
    let xr = dir.path().join("x_bf16_rounded.npy");
    python(
        "import sys, numpy as np\n\
         x = np.load(sys.argv[1]).astype(np.float32)\n\
         b = x.view(np.uint32).astype(np.uint64)\n\
         b = ((b + 0x7FFF + ((b >> 16) & 1)) >> 16) << 16\n\
         np.save(sys.argv[2], b.astype(np.uint32).view(np.float32))\n",
        &[x.to_str().unwrap(), xr.to_str().unwrap()],
    );
    let reference = onnxruntime_stats(&twin, &xr, dir.path());
    let worst = worst_rms_difference(&report, &reference);
    // Reference: onnxruntime 1.23.2, numpy 2.3.5 (PyPI)
    assert!(worst < 1e-4, "worst relative RMS difference {worst:e}");
}

// A float16 model tract cannot prepare (a Gemm whose operands all come from
// nodes without declared types, so the Gemm split cannot see it is float16,
// and tract's float16 Gemm bias bug remains) runs as its float32 twin on the
// second try, and says why.
#[test]
fn float16_falls_back_to_the_float32_twin_and_says_why() {
    let dir = tempdir();
    let model = dir.path().join("gemm_const_bias.onnx");
    python(
        "import sys, numpy as np, onnx\n\
         from onnx import helper as h, TensorProto as T, numpy_helper as nh\n\
         r = np.random.default_rng(0)\n\
         k = lambda name, a: h.make_node('Constant', [], [name], value=nh.from_array(a.astype(np.float16), name + 'v'))\n\
         w = k('w', r.standard_normal((16, 16)) * 0.3)\n\
         c = k('c', np.full(16, 0.1))\n\
         relu = h.make_node('Relu', ['x'], ['a'], name='relu')\n\
         fc = h.make_node('Gemm', ['a', 'w', 'c'], ['f'], name='fc', transB=1)\n\
         add = h.make_node('Add', ['x', 'f'], ['y'], name='add')\n\
         g = h.make_graph([w, c, relu, fc, add], 'g', [h.make_tensor_value_info('x', T.FLOAT16, ['N', 16])],\n\
                          [h.make_tensor_value_info('y', T.FLOAT16, ['N', 16])])\n\
         onnx.save(h.make_model(g, opset_imports=[h.make_opsetid('', 17)]), sys.argv[1])\n",
        &[model.to_str().unwrap()],
    );
    let r = audit_json(&[model.to_str().unwrap(), "--batch", "4"]);
    let p = &r["run"]["precision"];
    assert_eq!(p["ran"], "float32", "{p}");
    let note = p["note"].as_str().unwrap();
    assert!(note.contains("could not run it in float16") && note.contains("Gemm"), "{note}");
    assert!(r["blocks"][0]["stats"]["ratio"]["mean"].as_f64().unwrap() > 0.0, "{}", r["blocks"]);
}
