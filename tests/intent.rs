//! `shunt pin`, `shunt verify` and `shunt compare` on pairs of models made by
//! real transformations: PyTorch's exporter with BatchNorm kept and folded
//! (`fixtures/torch/resnet_cifar_bn.onnx`, `resnet_cifar_folded.onnx`),
//! onnxruntime's `quantize_static` in QDQ form (`resnet_cifar_qdq.onnx`;
//! all three written by `fixtures/torch/export.py`), and copies changed by
//! graph surgery (`shunt_testkit::surgery`) in each test.

use std::path::{Path, PathBuf};

use prost::Message;

use shunt::proto::ModelProto;
use shunt_testkit::surgery;

use crate::util::{Run, fixture, shunt, tempdir};

fn torch(name: &str) -> String {
    fixture(&format!("torch/{name}")).display().to_string()
}

fn decode(path: &str) -> ModelProto {
    ModelProto::decode(std::fs::read(path).expect("fixture").as_slice()).expect("decodes")
}

fn save(dir: &Path, name: &str, m: &ModelProto) -> String {
    let p = dir.join(name);
    std::fs::write(&p, m.encode_to_vec()).expect("write");
    p.display().to_string()
}

fn json(run: &Run) -> serde_json::Value {
    serde_json::from_str(&run.stdout)
        .unwrap_or_else(|e| panic!("not JSON ({e}): {}\n{}", run.stdout, run.stderr))
}

fn pin(dir: &Path, model: &str) -> String {
    let out = dir.join("pin.toml").display().to_string();
    let run = shunt(&["pin", model, "-o", &out]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    out
}

/// The block table of a model as `(merge output, shortcut input, fork)`.
fn blocks(model: &str) -> Vec<(String, String, String)> {
    let run = shunt(&["scan", model, "--format", "json"]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    json(&run)["blocks"]
        .as_array()
        .expect("blocks")
        .iter()
        .map(|b| {
            let s = |v: &serde_json::Value| v.as_str().expect("string").to_owned();
            (s(&b["output"]), s(&b["shortcut"]["input"]), s(&b["fork"]))
        })
        .collect()
}

/// resnet_cifar_folded with the shortcut of its fourth block (second of stage 2) removed.
fn shortcut_removed(dir: &Path) -> String {
    let src = torch("resnet_cifar_folded.onnx");
    let b = blocks(&src);
    let mut m = decode(&src);
    assert!(surgery::remove_shortcut(&mut m, &b[3].0, &b[3].1));
    save(dir, "shortcut_removed.onnx", &m)
}

/// resnet_cifar_folded with its first two blocks (stage 1) in swapped order.
fn swapped(dir: &Path) -> String {
    let src = torch("resnet_cifar_folded.onnx");
    let b = blocks(&src);
    let mut m = decode(&src);
    // Block k's input is its fork; block 3's fork is block 2's output after the ReLU.
    assert!(surgery::swap_blocks(&mut m, &b[0].2, &b[1].2, &b[2].2));
    save(dir, "swapped.onnx", &m)
}

#[test]
fn pin_then_verify_the_same_model_matches() {
    let dir = tempdir();
    let model = torch("resnet_cifar_bn.onnx");
    let pin = pin(dir.path(), &model);
    let text = std::fs::read_to_string(&pin).unwrap();
    // No statistics and no node names: nothing an exporter renames.
    assert!(!text.contains("/blocks"), "{text}");
    assert!(!text.contains("Add"), "{text}");
    assert_eq!(text.matches("[[block]]").count(), 6, "{text}");
    assert_eq!(text.matches("[[stage]]").count(), 3, "{text}");
    let run = shunt(&["verify", &model, "--pin", &pin]);
    assert_eq!(run.code, 0, "{}{}", run.stdout, run.stderr);
    assert!(run.stdout.contains("matches"), "{}", run.stdout);
    // Pinning is deterministic: the same model gives the same bytes.
    let again = dir.path().join("again.toml").display().to_string();
    assert_eq!(shunt(&["pin", &model, "-o", &again]).code, 0);
    assert_eq!(std::fs::read(&pin).unwrap(), std::fs::read(&again).unwrap());
}

#[test]
fn batchnorm_folded_and_quantised_exports_match_the_pin() {
    let dir = tempdir();
    let pin = pin(dir.path(), &torch("resnet_cifar_bn.onnx"));
    // export.py: the same module and weights, BN folded (TrainingMode.EVAL), and
    // the folded model through onnxruntime quantize_static (QDQ).
    for other in ["resnet_cifar_folded.onnx", "resnet_cifar_qdq.onnx"] {
        let run = shunt(&["verify", &torch(other), "--pin", &pin, "--format", "json"]);
        assert_eq!(run.code, 0, "{other}: {}{}", run.stdout, run.stderr);
        let v = json(&run);
        assert_eq!(v["schema"], "shunt/verify");
        assert_eq!(v["schema_version"], 1);
        assert_eq!(v["differences"].as_array().unwrap().len(), 0);
    }
}

#[test]
fn a_removed_shortcut_is_named() {
    let dir = tempdir();
    let pin = pin(dir.path(), &torch("resnet_cifar_bn.onnx"));
    let broken = shortcut_removed(dir.path());
    let run = shunt(&["verify", &broken, "--pin", &pin]);
    assert_eq!(run.code, 1, "{}{}", run.stdout, run.stderr);
    assert!(run.stdout.contains("missing-block"), "{}", run.stdout);
    assert!(run.stdout.contains("pinned block 4"), "{}", run.stdout);
    // Where it was expected: after the stage's projection block (the third merge).
    assert!(run.stdout.contains("/blocks/blocks.2/Add"), "{}", run.stdout);
    let v = json(&shunt(&["verify", &broken, "--pin", &pin, "--format", "json"]));
    let codes: Vec<(&str, Option<u64>)> = v["differences"]
        .as_array()
        .unwrap()
        .iter()
        .map(|d| (d["code"].as_str().unwrap(), d["pinned"].as_u64().or(d["stage"].as_u64())))
        .collect();
    assert_eq!(codes, vec![("missing-block", Some(4)), ("stage-blocks", Some(2))], "{v:#}");
}

#[test]
fn swapped_twin_blocks_keep_the_architecture_and_reordered_pins_are_caught() {
    let dir = tempdir();
    let pin = pin(dir.path(), &torch("resnet_cifar_folded.onnx"));
    // Blocks 1 and 2 have the same structure: swapping them changes the
    // weights each position holds, not the architecture.
    let twins = swapped(dir.path());
    let run = shunt(&["verify", &twins, "--pin", &pin]);
    assert_eq!(run.code, 0, "{}{}", run.stdout, run.stderr);
    // Blocks 3 (projection) and 4 (identity) differ: a pin that lists them
    // in the other order is a swap, reported once.
    let text = std::fs::read_to_string(&pin).unwrap();
    let parts: Vec<&str> = text.split("\n[[block]]").collect();
    let mut order = parts.clone();
    order.swap(3, 4);
    let reordered = dir.path().join("reordered.toml");
    std::fs::write(&reordered, order.join("\n[[block]]")).unwrap();
    let reordered = reordered.display().to_string();
    let run = shunt(&["verify", &torch("resnet_cifar_folded.onnx"), "--pin", &reordered]);
    assert_eq!(run.code, 1, "{}{}", run.stdout, run.stderr);
    let v = json(&shunt(&[
        "verify",
        &torch("resnet_cifar_folded.onnx"),
        "--pin",
        &reordered,
        "--format",
        "json",
    ]));
    let codes: Vec<&str> =
        v["differences"].as_array().unwrap().iter().map(|d| d["code"].as_str().unwrap()).collect();
    assert_eq!(codes, vec!["swapped-blocks"], "{v:#}");
}

#[test]
fn a_changed_shortcut_kind_and_placement_are_reported() {
    let dir = tempdir();
    let pin = pin(dir.path(), &torch("resnet_cifar_folded.onnx"));
    let text = std::fs::read_to_string(&pin).unwrap();
    // Edit the pin as a reviewer would: block 4 was meant to be a projection,
    // block 6 pre-activation.
    let mut parts: Vec<String> = text.split("\n[[block]]").map(str::to_owned).collect();
    parts[4] = parts[4].replace("shortcut = \"identity\"", "shortcut = \"projection\"");
    parts[6] = parts[6].replace("post-activation", "pre-activation");
    let edited = dir.path().join("edited.toml");
    std::fs::write(&edited, parts.join("\n[[block]]")).unwrap();
    let edited = edited.display().to_string();
    let v = json(&shunt(&[
        "verify",
        &torch("resnet_cifar_folded.onnx"),
        "--pin",
        &edited,
        "--format",
        "json",
    ]));
    let codes: Vec<(&str, u64)> = v["differences"]
        .as_array()
        .unwrap()
        .iter()
        .map(|d| (d["code"].as_str().unwrap(), d["block"].as_u64().unwrap()))
        .collect();
    assert_eq!(codes, vec![("shortcut-changed", 4), ("placement-changed", 6)], "{v:#}");
}

#[test]
fn bad_pin_files_are_errors() {
    let dir = tempdir();
    let model = torch("resnet_cifar_folded.onnx");
    let bad = dir.path().join("bad.toml");
    std::fs::write(&bad, "schema = \"shunt/pin\"\nschema_version = 9\n").unwrap();
    let bad = bad.display().to_string();
    let run = shunt(&["verify", &model, "--pin", &bad]);
    assert_eq!(run.code, 2);
    assert!(run.stderr.contains("bad.toml") && run.stderr.contains("version 9"), "{}", run.stderr);
    let missing = dir.path().join("none.toml").display().to_string();
    let run = shunt(&["verify", &model, "--pin", &missing]);
    assert_eq!(run.code, 2);
    assert!(run.stderr.contains("none.toml"), "{}", run.stderr);
    assert!(!run.stderr.contains("panicked"));
    // Neither --pin nor --expect.
    assert_eq!(shunt(&["verify", &model]).code, 2);
    // pin never writes over its model.
    let run = shunt(&["pin", &model, "-o", &model]);
    assert_eq!(run.code, 2);
    let _ = PathBuf::from(&model);
}

/// The fenced code blocks of the README and the pages under `docs/` with the
/// given info string.
pub(crate) fn doc_blocks(info: &str) -> Vec<String> {
    crate::docs::blocks(info).into_iter().map(|(_, block)| block).collect()
}

#[test]
fn the_readme_expectation_examples_hold_on_their_models_only() {
    let examples: Vec<(String, String)> = doc_blocks("toml")
        .into_iter()
        .filter_map(|b| {
            let model = b.lines().next()?.strip_prefix("# checks ")?.trim().to_owned();
            Some((model, b))
        })
        .collect();
    assert_eq!(examples.len(), 3, "the README shows three expectation examples");
    let dir = tempdir();
    for (i, (model, text)) in examples.iter().enumerate() {
        let file = dir.path().join(format!("example{i}.toml"));
        std::fs::write(&file, text).unwrap();
        let file = file.display().to_string();
        let model_path = Path::new(env!("CARGO_MANIFEST_DIR")).join(model).display().to_string();
        let run = shunt(&["verify", &model_path, "--expect", &file, "--quiet"]);
        assert_eq!(run.code, 0, "README example for {model}:\n{}{}", run.stdout, run.stderr);
        // Each example has teeth: the other examples' models fail it.
        for (other, _) in examples.iter().filter(|(m, _)| m != model) {
            let other_path =
                Path::new(env!("CARGO_MANIFEST_DIR")).join(other).display().to_string();
            let run = shunt(&["verify", &other_path, "--expect", &file, "--quiet"]);
            assert_eq!(
                run.code, 1,
                "{other} against {model}'s example:\n{}{}",
                run.stdout, run.stderr
            );
        }
    }
}

#[test]
fn the_readme_pin_excerpt_is_real_pin_output() {
    let dir = tempdir();
    let real = std::fs::read_to_string(pin(dir.path(), &torch("resnet_cifar_bn.onnx"))).unwrap();
    let excerpt = doc_blocks("toml")
        .into_iter()
        .find(|b| b.contains("schema = \"shunt/pin\""))
        .expect("a pin excerpt in the README");
    for line in excerpt.lines().filter(|l| !l.starts_with("# …")) {
        assert!(real.lines().any(|r| r == line), "README pin line not in real output: {line}");
    }
}

#[test]
fn expectation_differences_name_what_was_meant() {
    let dir = tempdir();
    let file = dir.path().join("e.toml");
    std::fs::write(
        &file,
        "blocks = 7\nplacement = \"pre-activation\"\nprojection = [3]\n[[stage]]\nblocks = 2\n[[stage]]\nblocks = 3\n",
    )
    .unwrap();
    let file = file.display().to_string();
    let v = json(&shunt(&[
        "verify",
        &torch("resnet_cifar_folded.onnx"),
        "--expect",
        &file,
        "--format",
        "json",
    ]));
    let codes: Vec<&str> =
        v["differences"].as_array().unwrap().iter().map(|d| d["code"].as_str().unwrap()).collect();
    // 7 blocks expected, 6 found; 6 blocks not pre-activation; projections at 3 and 5, not 3;
    // 3 stages, not 2; the second stage has 2 blocks, not 3.
    let mut want = vec!["block-count"];
    want.extend(["placement"; 6]);
    want.extend(["projection", "stage-count", "stage-blocks"]);
    assert_eq!(codes, want, "{v:#}");
    assert_eq!(v["against"], "expect");
    // A typo is an error, not a check silently skipped.
    std::fs::write(dir.path().join("typo.toml"), "blcks = 6\n").unwrap();
    let run = shunt(&[
        "verify",
        &torch("resnet_cifar_folded.onnx"),
        "--expect",
        &dir.path().join("typo.toml").display().to_string(),
    ]);
    assert_eq!(run.code, 2);
    assert!(run.stderr.contains("typo.toml") && run.stderr.contains("blcks"), "{}", run.stderr);
}

fn compare_json(a: &str, b: &str, extra: &[&str]) -> (i32, serde_json::Value) {
    let mut args = vec!["compare", a, b, "--format", "json", "--quiet"];
    args.extend_from_slice(extra);
    let run = shunt(&args);
    assert!(run.code == 0 || run.code == 1, "{}{}", run.stdout, run.stderr);
    (run.code, json(&run))
}

fn statuses(v: &serde_json::Value) -> Vec<(Option<u64>, Option<u64>, String)> {
    v["blocks"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| (p["a"].as_u64(), p["b"].as_u64(), p["status"].as_str().unwrap().to_owned()))
        .collect()
}

fn same_six() -> Vec<(Option<u64>, Option<u64>, String)> {
    (1..=6).map(|i| (Some(i), Some(i), "same".to_owned())).collect()
}

#[test]
fn float_and_quantised_exports_align_block_by_block() {
    let (code, v) =
        compare_json(&torch("resnet_cifar_folded.onnx"), &torch("resnet_cifar_qdq.onnx"), &[]);
    assert_eq!(code, 0, "{v:#}");
    assert_eq!(v["schema"], "shunt/compare");
    assert_eq!(v["schema_version"], 2);
    assert_eq!(statuses(&v), same_six());
    for p in v["blocks"].as_array().unwrap() {
        let (a, b) = (p["ratio_a"].as_f64().unwrap(), p["ratio_b"].as_f64().unwrap());
        assert!((p["ratio_delta"].as_f64().unwrap() - (b - a)).abs() < 1e-12);
        // int8 QDQ moves a ratio a little, never to another regime (common practice:
        // per-tensor int8 keeps activations within a few percent).
        assert!((b / a - 1.0).abs() < 0.05, "{p:#}");
    }
    let out = &v["outputs"][0];
    assert_eq!(out["classes"], 10);
    assert!(out["rel_l2"].as_f64().unwrap() > 0.0, "quantisation changes the logits");
    assert!(out["rel_l2"].as_f64().unwrap() < 0.1, "{out:#}");
    assert!(out["cosine"].as_f64().unwrap() > 0.99, "{out:#}");
    assert!(out["top1"].as_f64().is_some());
    // The same inputs went to both: what was fed is recorded once.
    assert_eq!(v["run"]["inputs"][0]["values"], "normal(0, 1)");
    assert_eq!(v["run"]["samples"], 8);
}

#[test]
fn folding_batchnorm_changes_nothing_measurable() {
    let (code, v) =
        compare_json(&torch("resnet_cifar_bn.onnx"), &torch("resnet_cifar_folded.onnx"), &[]);
    assert_eq!(code, 0, "{v:#}");
    assert_eq!(statuses(&v), same_six());
    // Folding BN into the convolution is exact up to float rounding.
    for p in v["blocks"].as_array().unwrap() {
        assert!(p["ratio_change"].as_f64().unwrap().abs() < 1e-4, "{p:#}");
    }
    assert!(v["outputs"][0]["rel_l2"].as_f64().unwrap() < 1e-4, "{v:#}");
    assert_eq!(v["outputs"][0]["top1"].as_f64(), Some(1.0));
}

#[test]
fn a_removed_shortcut_is_an_unaligned_block_and_fails_the_comparison() {
    let dir = tempdir();
    let broken = shortcut_removed(dir.path());
    let src = torch("resnet_cifar_folded.onnx");
    let (code, v) = compare_json(&src, &broken, &[]);
    assert_eq!(code, 1, "{v:#}");
    let mut want = same_six();
    want.truncate(3);
    want.push((Some(4), None, "only-a".to_owned()));
    want.push((Some(5), Some(4), "same".to_owned()));
    want.push((Some(6), Some(5), "same".to_owned()));
    assert_eq!(statuses(&v), want);
    assert_eq!(v["structural_differences"], 1);
    // Blocks before the cut see the same signal; the block after it does not.
    let blocks = v["blocks"].as_array().unwrap();
    assert!(blocks[0]["ratio_change"].as_f64().unwrap().abs() < 1e-6);
    assert!(blocks[4]["ratio_change"].as_f64().unwrap().abs() > 0.01);
    let table = shunt(&["compare", &src, &broken, "--quiet"]);
    assert_eq!(table.code, 1);
    assert!(table.stdout.contains("only in A"), "{}", table.stdout);
    assert!(table.stdout.contains("/blocks/blocks.3/Add"), "{}", table.stdout);
}

#[test]
fn swapped_twin_blocks_align_but_their_numbers_move() {
    let dir = tempdir();
    let twins = swapped(dir.path());
    let src = torch("resnet_cifar_folded.onnx");
    let (code, v) = compare_json(&src, &twins, &[]);
    assert_eq!(code, 0, "structure is unchanged: {v:#}");
    assert_eq!(statuses(&v), same_six());
    let out = v["outputs"][0]["rel_l2"].as_f64().unwrap();
    assert!(out > 1e-3, "different weights at blocks 1 and 2 change the output: {out}");
    let blocks = v["blocks"].as_array().unwrap();
    assert!(blocks[0]["ratio_change"].as_f64().unwrap().abs() > 1e-3, "{v:#}");
    // A tolerance on outputs turns the numeric change into a failed comparison.
    let (code, v) = compare_json(&src, &twins, &["--max-rel-l2", "1e-4"]);
    assert_eq!(code, 1);
    assert!(v["failures"][0].as_str().unwrap().contains("--max-rel-l2"), "{v:#}");
}

#[test]
fn comparisons_are_deterministic_and_refuse_different_inputs() {
    let a = torch("resnet_cifar_folded.onnx");
    let b = torch("resnet_cifar_qdq.onnx");
    let one = shunt(&["compare", &a, &b, "--format", "json", "--quiet", "--seed", "3"]);
    let two = shunt(&["compare", &a, &b, "--format", "json", "--quiet", "--seed", "3"]);
    assert_eq!(one.code, 0);
    assert_eq!(one.stdout, two.stdout);
    // A different input shape (mobilenet_v2 takes 3x64x64) cannot get the same tensors.
    let run = shunt(&["compare", &a, &torch("mobilenet_v2.onnx"), "--quiet"]);
    assert_eq!(run.code, 2);
    assert!(
        run.stderr.contains("mobilenet_v2.onnx") && run.stderr.contains("sample shape"),
        "{}",
        run.stderr
    );
    // Structure only: no run, no outputs, still aligned.
    let (code, v) = compare_json(&a, &b, &["--no-run"]);
    assert_eq!(code, 0);
    assert!(v["run"].is_null());
    assert_eq!(v["outputs"].as_array().unwrap().len(), 0);
    assert_eq!(statuses(&v), same_six());
}

/// Whether two output texts agree: every token equal, except numbers, which
/// may differ in the last printed digit (tract's kernels differ by CPU).
pub(crate) fn same_text(real: &str, shown: &str) -> Result<(), String> {
    let (r, s): (Vec<&str>, Vec<&str>) = (real.lines().collect(), shown.lines().collect());
    if r.len() != s.len() {
        return Err(format!("{} lines, the page shows {}", r.len(), s.len()));
    }
    for (a, b) in r.iter().zip(&s) {
        let (ta, tb): (Vec<&str>, Vec<&str>) =
            (a.split_whitespace().collect(), b.split_whitespace().collect());
        let number = |t: &str| t.trim_end_matches([',', '%', ')']).parse::<f64>().ok();
        let ok = ta.len() == tb.len()
            && ta.iter().zip(&tb).all(|(x, y)| match (number(x), number(y)) {
                (Some(p), Some(q)) => (p - q).abs() <= 2e-3 + 2e-3 * q.abs(),
                _ => x == y,
            });
        if !ok {
            return Err(format!("real:   {a}\nshown:  {b}"));
        }
    }
    Ok(())
}
