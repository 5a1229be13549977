//! Statistics against onnxruntime on the same inputs (issue 3).
//!
//! `tests/reference/stats.py` runs each model with onnxruntime, one sample
//! at a time, and writes per-sample RMS of every graph input, every
//! `Add`/`Sum` operand and output and every tensor read twice, plus per `Add`
//! the cosine of its two operands, computed with numpy in float64. Its output
//! for the committed inputs `tests/reference/inputs/<case>.np[yz]` is committed
//! as `tests/reference/values/<case>.json`.
//!
//! Each case checks two things:
//! 1. drift: `stats.py` re-run now in the pinned venv gives the committed
//!    values within 1e-6 relative;
//! 2. shunt: `shunt audit --feed` on the same inputs gives, per block, the
//!    mean, minimum and maximum over samples of the fork, shortcut, branch and
//!    output RMS (and of ratio and growth) within 1e-4 relative of
//!    onnxruntime's, and the cosines within 1e-4 absolute.

use std::path::{Path, PathBuf};
use std::process::Command;

use serde_json::Value;

use crate::util;

/// Relative tolerance of the drift check (same libraries, same inputs). Not
/// tighter: onnxruntime picks float32 kernels by CPU, which moves sums in the
/// seventh digit from one machine to another; a change of library version or
/// inputs moves them far more.
const DRIFT: f64 = 1e-6;
/// Relative tolerance of shunt (tract, float32) against onnxruntime (float32).
const RMS_TOL: f64 = 1e-4;
/// Absolute tolerance of cosines.
const COS_TOL: f64 = 1e-4;

pub(crate) struct Case {
    /// Name of the committed values.
    pub name: &'static str,
    /// Name of the committed inputs (a model built from another's weights
    /// reuses that one's inputs).
    pub inputs: &'static str,
    /// The model, relative to `fixtures/`.
    pub model: &'static str,
    /// Extension of the inputs file.
    pub ext: &'static str,
    /// Its residual blocks: the census in fixtures/MANIFEST.txt,
    /// fixtures/torch/MANIFEST.txt or fixtures/structure/MANIFEST.txt.
    pub blocks: usize,
}

fn root() -> &'static Path {
    Path::new(env!("CARGO_MANIFEST_DIR"))
}

impl Case {
    fn model_rel(&self) -> String {
        format!("fixtures/{}", self.model)
    }
    fn inputs_rel(&self) -> String {
        format!("tests/reference/inputs/{}.{}", self.inputs, self.ext)
    }
    fn values_path(&self) -> PathBuf {
        root().join("tests/reference/values").join(format!("{}.json", self.name))
    }
}

/// Options of `stats.py` beyond the model, inputs and output: the
/// ReferenceEvaluator cross-check for resnet18_b, and the sample axis of the
/// streaming case's state.
fn stats_args(case: &Case) -> &'static [&'static str] {
    match case.name {
        "resnet18_b" => &["--check-reference"],
        "streaming_state" => &["--batch-axis", "state=1", "--check-reference"],
        "if_sample_rate" => &["--control-flow", "--check-reference"],
        "scan_recurrence" => &["--control-flow", "--batch-axis", "x=1", "--check-reference"],
        _ => &[],
    }
}

fn refresh_hint(case: &Case) -> String {
    format!(
        "to refresh after an intended change (new fixture, new inputs, new pins): \
         from the repository root run\n  target/reference-venv/bin/python tests/reference/stats.py \
         {} {} tests/reference/values/{}.json{}\nand commit the JSON (see DEVELOPERS.md, Reference checks)",
        case.model_rel(),
        case.inputs_rel(),
        case.name,
        stats_args(case).iter().map(|a| format!(" {a}")).collect::<String>(),
    )
}

/// Runs `stats.py` on `model` and `inputs` (paths relative to the repository
/// root, so the JSON names them the same way on every machine).
pub(crate) fn run_stats(model: &str, inputs: &str, extra: &[&str]) -> Value {
    let dir = util::tempdir();
    let out = dir.path().join("values.json");
    let run = Command::new(util::reference_python())
        .current_dir(root())
        .arg("tests/reference/stats.py")
        .args([model, inputs])
        .arg(&out)
        .args(extra)
        .output()
        .expect("python runs");
    assert!(
        run.status.success(),
        "stats.py failed on {model}:\n{}\n{}",
        String::from_utf8_lossy(&run.stdout),
        String::from_utf8_lossy(&run.stderr)
    );
    serde_json::from_str(&std::fs::read_to_string(&out).expect("stats.py output"))
        .expect("stats.py writes JSON")
}

fn committed(case: &Case) -> Value {
    let path = case.values_path();
    let text = std::fs::read_to_string(&path)
        .unwrap_or_else(|e| panic!("{}: {e}\n{}", path.display(), refresh_hint(case)));
    serde_json::from_str(&text).expect("committed values are JSON")
}

/// |a - b| / max(|a|, |b|), 0 when equal (so two zeros agree exactly).
fn rel(a: f64, b: f64) -> f64 {
    if a == b { 0.0 } else { (a - b).abs() / a.abs().max(b.abs()) }
}

/// Walks two JSON trees and returns the paths where numbers differ by more
/// than `tol` relative, or where anything else differs.
fn differences(path: &str, a: &Value, b: &Value, tol: f64, out: &mut Vec<String>) {
    match (a, b) {
        (Value::Number(x), Value::Number(y)) => {
            let (x, y) = (x.as_f64().unwrap(), y.as_f64().unwrap());
            if rel(x, y) > tol {
                out.push(format!("{path}: committed {x}, now {y}"));
            }
        }
        (Value::Array(x), Value::Array(y)) if x.len() == y.len() => {
            for (i, (p, q)) in x.iter().zip(y).enumerate() {
                differences(&format!("{path}[{i}]"), p, q, tol, out);
            }
        }
        (Value::Object(x), Value::Object(y)) => {
            for k in x.keys().chain(y.keys().filter(|k| !x.contains_key(*k))) {
                match (x.get(k), y.get(k)) {
                    (Some(p), Some(q)) => differences(&format!("{path}.{k}"), p, q, tol, out),
                    (p, q) => out.push(format!("{path}.{k}: committed {p:?}, now {q:?}")),
                }
            }
        }
        _ if a == b => {}
        _ => out.push(format!("{path}: committed {a}, now {b}")),
    }
}

/// Check 1: the committed values are what the pinned libraries compute today.
fn check_drift(case: &Case, committed: &Value) {
    let fresh = run_stats(&case.model_rel(), &case.inputs_rel(), stats_args(case));
    let mut diffs = Vec::new();
    // The interpreter's patch version is recorded but is not pinned.
    for key in ["model", "inputs", "samples", "tensors", "adds"] {
        differences(key, &committed[key], &fresh[key], DRIFT, &mut diffs);
    }
    for lib in ["numpy", "onnx", "onnxruntime"] {
        let key = format!("versions.{lib}");
        differences(&key, &committed["versions"][lib], &fresh["versions"][lib], 0.0, &mut diffs);
    }
    assert!(
        diffs.is_empty(),
        "{}: the reference values drifted ({} differences):\n{}\n{}",
        case.name,
        diffs.len(),
        diffs.iter().take(20).cloned().collect::<Vec<_>>().join("\n"),
        refresh_hint(case)
    );
    if let Some(r) = fresh.get("reference_evaluator") {
        // onnx.reference.ReferenceEvaluator agrees with onnxruntime (stats.py
        // fails above 1e-5 already; this keeps the numbers honest).
        assert!(r["max_relative_difference_rms"].as_f64().unwrap() < 1e-5, "{r}");
        assert!(r["max_absolute_difference_cosine"].as_f64().unwrap() < 1e-5, "{r}");
    }
}

pub(crate) fn audit(model: &str, inputs: &str) -> Value {
    let model = root().join(model);
    let inputs = root().join(inputs);
    let run = util::shunt(&[
        "audit",
        model.to_str().unwrap(),
        "--feed",
        inputs.to_str().unwrap(),
        "--format",
        "json",
        "--quiet",
    ]);
    assert_eq!(run.code, 0, "shunt audit {}: {}\n{}", model.display(), run.stderr, run.stdout);
    serde_json::from_str(&run.stdout).expect("shunt writes JSON")
}

fn floats(v: &Value) -> Vec<Option<f64>> {
    v.as_array().expect("a list").iter().map(Value::as_f64).collect()
}

/// (mean, min, max) of the defined values.
fn spread(values: &[f64]) -> Option<(f64, f64, f64)> {
    if values.is_empty() {
        return None;
    }
    let mean = values.iter().sum::<f64>() / values.len() as f64;
    let min = values.iter().copied().fold(f64::INFINITY, f64::min);
    let max = values.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    Some((mean, min, max))
}

fn per_sample_rms(reference: &Value, tensor: &str, what: &str) -> Vec<f64> {
    let entry = &reference["tensors"][tensor]["rms"];
    assert!(entry.is_array(), "{what}: onnxruntime's values have no tensor '{tensor}'");
    floats(entry).into_iter().map(|v| v.expect("RMS is a number")).collect()
}

/// Compares shunt's spread `got` ({mean, min, max, …}) with the spread of
/// onnxruntime's per-sample `want`; `tol` relative or, with `absolute`, absolute.
fn check_spread(what: &str, got: &Value, want: &[f64], tol: f64, absolute: bool) {
    let (mean, min, max) = spread(want).expect("samples");
    for (field, w) in [("mean", mean), ("min", min), ("max", max)] {
        let g = got[field]
            .as_f64()
            .unwrap_or_else(|| panic!("{what}: shunt gives no {field} ({got}), onnxruntime {w}"));
        let d = if absolute { (g - w).abs() } else { rel(g, w) };
        // Reference: onnxruntime 1.23.2 (PyPI), numpy 2.3.5; values in tests/reference/values
        assert!(
            d < tol,
            "{what}.{field}: shunt {g}, onnxruntime {w} ({} difference {d:e}, limit {tol:e})",
            if absolute { "absolute" } else { "relative" }
        );
    }
}

fn ratios(num: &[f64], den: &[f64]) -> Vec<f64> {
    num.iter().zip(den).filter(|(_, d)| **d > 0.0).map(|(n, d)| n / d).collect()
}

/// How closely shunt's block statistics must match onnxruntime's.
#[derive(Clone, Copy)]
pub(crate) struct Tolerance {
    /// Relative, for RMS, ratio and growth.
    pub rms: f64,
    /// Absolute, for cosines.
    pub cos: f64,
    /// Whether the fork (and growth) is compared: a quantised fork is
    /// measured dequantised, a tensor onnxruntime's list does not name.
    pub fork: bool,
}

/// Float32 against float32.
pub(crate) const FLOAT32: Tolerance = Tolerance { rms: RMS_TOL, cos: COS_TOL, fork: true };

/// Check 2: shunt's block statistics equal onnxruntime's on the same inputs.
///
/// Returns the number of blocks whose branch is exactly zero.
pub(crate) fn check_blocks(case: &str, report: &Value, reference: &Value, count: usize) -> usize {
    check_blocks_within(case, report, reference, FLOAT32, count)
}

/// [`check_blocks`] with a tolerance of the caller's.
pub(crate) fn check_blocks_within(
    case: &str,
    report: &Value,
    reference: &Value,
    tol: Tolerance,
    count: usize,
) -> usize {
    let blocks = report["blocks"].as_array().expect("blocks");
    assert_eq!(blocks.len(), count, "{case}: residual blocks (the fixture's census)");
    assert!(report["run_error"].is_null(), "{case}: {}", report["run_error"]);
    let samples = reference["samples"].as_u64().unwrap();
    let mut dead = 0;
    for b in blocks {
        let what = format!("{case} {}", b["merge"]["name"].as_str().unwrap());
        let st = &b["stats"];
        assert_eq!(st["samples"].as_u64(), Some(samples), "{what}: samples");
        let output = b["output"].as_str().unwrap();
        let shortcut = b["shortcut"]["input"].as_str().unwrap();
        let branch: Vec<&str> =
            b["branch"]["inputs"].as_array().unwrap().iter().map(|v| v.as_str().unwrap()).collect();
        // shunt's branch RMS of several branch inputs is that of their sum, a
        // tensor onnxruntime does not name; the cases are chosen without such merges.
        assert_eq!(branch.len(), 1, "{what}: one branch input expected, got {branch:?}");
        // Which tensor is which: the merge's operands are the shortcut and the branch.
        let add = &reference["adds"][output];
        let mut operands: Vec<&str> =
            add["inputs"].as_array().unwrap().iter().map(|v| v.as_str().unwrap()).collect();
        let mut sides = vec![shortcut, branch[0]];
        operands.sort_unstable();
        sides.sort_unstable();
        assert_eq!(operands, sides, "{what}: the merge's operands are not shortcut + branch");

        let sc = per_sample_rms(reference, shortcut, &what);
        let br = per_sample_rms(reference, branch[0], &what);
        let out = per_sample_rms(reference, output, &what);
        check_spread(&format!("{what} shortcut_rms"), &st["shortcut_rms"], &sc, tol.rms, false);
        check_spread(&format!("{what} branch_rms"), &st["branch_rms"], &br, tol.rms, false);
        check_spread(&format!("{what} output_rms"), &st["output_rms"], &out, tol.rms, false);
        check_spread(&format!("{what} ratio"), &st["ratio"], &ratios(&br, &sc), tol.rms, false);
        if tol.fork {
            let fork = per_sample_rms(reference, b["fork"].as_str().unwrap(), &what);
            check_spread(&format!("{what} fork_rms"), &st["fork_rms"], &fork, tol.rms, false);
            let growth = ratios(&out, &fork);
            check_spread(&format!("{what} growth"), &st["growth"], &growth, tol.rms, false);
        }

        let cos: Vec<f64> = add["cosine"]
            .as_array()
            .map(|a| a.iter().filter_map(Value::as_f64).collect())
            .unwrap_or_default();
        if br.iter().all(|&v| v == 0.0) {
            // A zero-valued branch: exactly 0 in both, and no cosine in either.
            dead += 1;
            // Reference: onnxruntime 1.23.2 (PyPI), numpy 2.3.5; values in tests/reference/values
            for field in ["mean", "min", "max"] {
                assert_eq!(st["branch_rms"][field].as_f64(), Some(0.0), "{what}: branch_rms");
            }
            assert!(cos.is_empty() && st["cosine"].is_null(), "{what}: cosine of a zero branch");
        } else {
            assert_eq!(cos.len() as u64, samples, "{what}: onnxruntime cosines {add}");
            check_spread(&format!("{what} cosine"), &st["cosine"], &cos, tol.cos, true);
        }
    }
    dead
}

pub(crate) fn check_case(case: &Case) -> usize {
    let reference = committed(case);
    check_drift(case, &reference);
    let report = audit(&case.model_rel(), &case.inputs_rel());
    check_blocks(case.name, &report, &reference, case.blocks)
}

/// [`check_case`] for a model some of whose blocks the run does not
/// measure (a branch not taken): `measured` of its `case.blocks` blocks
/// are checked, the others must say why they were not measured. Returns
/// the report.
pub(crate) fn check_case_measured(case: &Case, measured: usize) -> Value {
    let reference = committed(case);
    check_drift(case, &reference);
    let report = audit(&case.model_rel(), &case.inputs_rel());
    let blocks = report["blocks"].as_array().expect("blocks");
    assert_eq!(blocks.len(), case.blocks, "{}: residual blocks (the fixture's census)", case.name);
    let (with, without): (Vec<Value>, Vec<Value>) =
        blocks.iter().cloned().partition(|b| !b["stats"].is_null());
    for b in &without {
        assert!(b["not_measured"].is_string(), "{}: {b} has neither stats nor a reason", case.name);
    }
    let mut only = report.clone();
    only["blocks"] = Value::Array(with);
    check_blocks(case.name, &only, &reference, measured);
    report
}

#[test]
fn resnet18_b() {
    check_case(&Case {
        name: "resnet18_b",
        inputs: "resnet18_b",
        model: "resnet18_b.onnx",
        ext: "npy",
        blocks: 8,
    });
}

#[test]
fn preact_resnet14() {
    check_case(&Case {
        name: "preact_resnet14",
        inputs: "preact_resnet14",
        model: "preact_resnet14.onnx",
        ext: "npy",
        blocks: 6,
    });
}

#[test]
fn mobilenet_v2() {
    check_case(&Case {
        name: "mobilenet_v2",
        inputs: "mobilenet_v2",
        model: "mobilenet_v2.onnx",
        ext: "npy",
        blocks: 10,
    });
}

#[test]
fn text_postnorm_with_mask() {
    check_case(&Case {
        name: "text_postnorm",
        inputs: "text_postnorm",
        model: "text_postnorm.onnx",
        ext: "npz",
        blocks: 4,
    });
}

#[test]
fn tile_grader_dead_block_is_exactly_zero() {
    let dead = check_case(&Case {
        name: "tile_grader",
        inputs: "tile_grader",
        model: "demo/tile_grader.onnx",
        ext: "npy",
        blocks: 8,
    });
    // The demo has one block whose branch ends in a zero scale (stage2.2).
    assert_eq!(dead, 1, "tile_grader: blocks with a zero branch");
}

#[test]
fn torch_resnet_cifar_folded() {
    check_case(&Case {
        name: "resnet_cifar_folded",
        inputs: "resnet_cifar_folded",
        model: "torch/resnet_cifar_folded.onnx",
        ext: "npy",
        blocks: 6,
    });
}

/// The exporter's encoder declares a fixed batch of 1 (its Reshape targets
/// are constants computed for batch 1), so it only runs sample by sample.
#[test]
fn torch_encoder_postnorm() {
    check_case(&Case {
        name: "encoder_postnorm",
        inputs: "encoder_postnorm",
        model: "torch/encoder_postnorm.onnx",
        ext: "npy",
        blocks: 4,
    });
}

/// The same encoder fed one sample per file: checks tract's numbers sample by
/// sample, whatever shunt's batching of a multi-sample feed does.
#[test]
fn torch_encoder_postnorm_one_sample_per_feed() {
    let case = Case {
        name: "encoder_postnorm",
        inputs: "encoder_postnorm",
        model: "torch/encoder_postnorm.onnx",
        ext: "npy",
        blocks: 4,
    };
    let reference = committed(&case);
    let dir = util::tempdir();
    let samples = reference["samples"].as_u64().unwrap() as usize;
    let prefix = dir.path().join("sample");
    util::python(
        "import sys, numpy as np\nx = np.load(sys.argv[1])\n\
         for s in range(x.shape[0]): np.save(f'{sys.argv[2]}{s}.npy', x[s:s+1])",
        &[root().join(case.inputs_rel()).to_str().unwrap(), prefix.to_str().unwrap()],
    );
    for s in 0..samples {
        let one = dir.path().join(format!("sample{s}.npy"));
        let report = audit(&case.model_rel(), one.to_str().unwrap());
        // onnxruntime's values of sample s alone.
        let mut single = reference.clone();
        single["samples"] = 1.into();
        for t in single["tensors"].as_object_mut().unwrap().values_mut() {
            t["rms"] = Value::Array(vec![t["rms"][s].clone()]);
        }
        for a in single["adds"].as_object_mut().unwrap().values_mut() {
            if a["cosine"].is_array() {
                a["cosine"] = Value::Array(vec![a["cosine"][s].clone()]);
            }
        }
        check_blocks(&format!("encoder_postnorm sample {s}"), &report, &single, case.blocks);
    }
}
