//! Issue 14: range statistics, headroom for a target format, and where a
//! converted model's error is born, against numpy and onnxruntime.
//!
//! Models: `fixtures/precision/` (written by `shunt_testkit::precision`,
//! listed in fixtures/precision/MANIFEST.txt); float16 copies made here by
//! tests/reference/half.py (onnxconverter-common 1.16.0,
//! `convert_float_to_float16`); the ResNet fixture's float16 and QDQ copies
//! under fixtures/transformed/ (made by onnxconverter-common and onnxruntime's
//! `quantize_static`, see its MANIFEST). Reference values come from
//! tests/reference/precision.py in the pinned venv (numpy 2.3.5, ml_dtypes
//! 0.7.0, onnxruntime 1.23.2).

use std::path::{Path, PathBuf};

use serde_json::{Value, json};
use shunt_testkit::precision::{self, OVERFLOW_BLOCK, OVERFLOW_BLOCKS};

use crate::util::{fixture, reference_python, shunt, tempdir};

const OVERFLOW: &str = "precision/overflow_stack.onnx";
const OUTLIER: &str = "precision/outlier_channel.onnx";

fn json_of(args: &[&str]) -> Value {
    let mut all = args.to_vec();
    all.extend_from_slice(&["--format", "json", "--quiet"]);
    let run = shunt(&all);
    assert!(run.code <= 1, "shunt {all:?}: {}\n{}", run.stderr, run.stdout);
    serde_json::from_str(&run.stdout).expect("shunt writes JSON")
}

fn reference(args: &[&str]) -> String {
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/precision.py");
    let out = std::process::Command::new(reference_python())
        .arg(&script)
        .args(args)
        .output()
        .expect("python runs");
    assert!(
        out.status.success(),
        "precision.py {args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).into_owned()
}

fn read_json(path: &Path) -> Value {
    serde_json::from_str(&std::fs::read_to_string(path).expect("the file")).expect("JSON")
}

/// A float16 copy of `model` by onnxconverter-common (tests/reference/half.py).
fn float16_copy(model: &Path, dir: &Path) -> PathBuf {
    let out = dir.join("fp16.onnx");
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/half.py");
    let run = std::process::Command::new(reference_python())
        .arg(&script)
        .arg("float16")
        .arg(model)
        .arg(&out)
        .output()
        .expect("python runs");
    assert!(run.status.success(), "half.py: {}", String::from_utf8_lossy(&run.stderr));
    out
}

/// Eight seeded standard normal samples of `shape` (one sample's), float32.
fn inputs(dir: &Path, shape: &[usize]) -> PathBuf {
    let path = dir.join("x.npy");
    let dims: Vec<String> = shape.iter().map(usize::to_string).collect();
    crate::util::python(
        "import sys, numpy as np\n\
         shape = [8] + [int(d) for d in sys.argv[2].split(',')]\n\
         np.save(sys.argv[1], np.random.default_rng(14).standard_normal(shape).astype(np.float32))\n",
        &[path.to_str().unwrap(), &dims.join(",")],
    );
    path
}

fn blocks(report: &Value) -> &Vec<Value> {
    report["blocks"].as_array().expect("blocks")
}

fn findings(report: &Value, code: &str) -> Vec<u64> {
    report["findings"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|f| f["code"] == code)
        .map(|f| f["block"].as_u64().unwrap())
        .collect()
}

#[test]
fn committed_cases_are_what_the_testkit_writes() {
    let all = precision::all();
    assert_eq!(all.len(), 2);
    for case in &all {
        let committed = std::fs::read(fixture(case.path)).expect("a committed case");
        assert!(
            committed == precision::encode(case),
            "{} is stale: run `cargo run --release --example fixtures`",
            case.path
        );
    }
    let manifest = std::fs::read_to_string(fixture("precision/MANIFEST.txt")).unwrap();
    assert_eq!(manifest, precision::manifest(&all), "fixtures/precision/MANIFEST.txt is stale");
}

// IEEE 754-2008 binary16 and bfloat16 limits: numpy 2.3.5's finfo(float16)
// and ml_dtypes 0.7.0's finfo(bfloat16) (tests/reference/precision.py limits).
#[test]
fn format_limits_are_numpys() {
    let numpy: Value = serde_json::from_str(&reference(&["limits"])).expect("JSON");
    for (format, key) in [("fp16", "fp16"), ("bf16", "bf16")] {
        let report =
            json_of(&["audit", &fixture(OVERFLOW).to_string_lossy(), "--precision", format]);
        let h = &report["headroom"];
        assert_eq!(h["format"], format);
        for field in ["largest", "smallest_normal", "smallest_subnormal"] {
            let ours = h[field].as_f64().unwrap();
            let theirs = numpy[key][field].as_f64().unwrap();
            assert_eq!(ours, theirs, "{format} {field}: ours {ours}, numpy {theirs}");
        }
    }
}

// The planted scale makes block k's largest |x| exactly 8^k times the
// input's (testkit::precision): float16 overflows first at block 5, the
// headroom is below 16 at block 4, and the ratio of consecutive maxima is 8.
#[test]
fn the_overflow_stack_is_flagged_at_its_block_before_conversion() {
    let report = json_of(&["audit", &fixture(OVERFLOW).to_string_lossy(), "--precision", "fp16"]);
    let b = blocks(&report);
    assert_eq!(b.len(), OVERFLOW_BLOCKS, "census of fixtures/precision/MANIFEST.txt");
    assert_eq!(findings(&report, "overflow"), vec![OVERFLOW_BLOCK as u64, 6]);
    assert_eq!(findings(&report, "overflow-risk"), vec![4]);
    let h = report["headroom"]["blocks"].as_array().unwrap();
    for k in 1..b.len() {
        let ratio = h[k]["max_abs"].as_f64().unwrap() / h[k - 1]["max_abs"].as_f64().unwrap();
        assert!((ratio - 8.0).abs() < 8.0 * 1e-6, "block {}: {ratio}", k + 1);
        let s = &b[k]["stats"];
        // Crest factor of a stream that only scales: the input's, unchanged.
        let crest = s["crest_factor"]["mean"].as_f64().unwrap();
        let first = b[0]["stats"]["crest_factor"]["mean"].as_f64().unwrap();
        assert!((crest / first - 1.0).abs() < 1e-5, "{crest} {first}");
        // A branch 7 times its shortcut, elementwise.
        let (sc, br) = (
            s["shortcut_max_abs"]["mean"].as_f64().unwrap(),
            s["branch_max_abs"]["mean"].as_f64().unwrap(),
        );
        assert!((br / sc - 7.0).abs() < 7.0 * 1e-6);
    }
    let largest = report["headroom"]["largest"].as_f64().unwrap();
    let at = |k: usize| h[k - 1]["max_abs"].as_f64().unwrap();
    assert!(at(OVERFLOW_BLOCK - 1) < largest && at(OVERFLOW_BLOCK) > largest);
    // Without --precision a float32 model gets no headroom section.
    let plain = json_of(&["audit", &fixture(OVERFLOW).to_string_lossy()]);
    assert!(plain["headroom"].is_null());
    assert!(findings(&plain, "overflow").is_empty());
}

/// The Markdown report carries the headroom as a column of its blocks table:
/// below 1 exactly from the block the JSON flags as overflowing.
#[test]
fn the_markdown_blocks_table_shows_the_headroom() {
    let path = fixture(OVERFLOW).to_string_lossy().into_owned();
    let run = shunt(&["audit", &path, "--precision", "fp16", "--format", "markdown", "--quiet"]);
    assert!(run.code <= 1, "{}", run.stderr);
    let header = run.stdout.lines().find(|l| l.starts_with("| # |")).expect("a blocks table");
    let column = header.split('|').position(|c| c.trim() == "headroom in fp16");
    let column = column.expect("a headroom column");
    let rows: Vec<f64> = run
        .stdout
        .lines()
        .filter(|l| l.split('|').nth(1).is_some_and(|c| c.trim().parse::<usize>().is_ok()))
        .map(|l| l.split('|').nth(column).unwrap().trim().parse::<f64>().unwrap())
        .collect();
    assert_eq!(rows.len(), OVERFLOW_BLOCKS);
    for (k, headroom) in rows.iter().enumerate() {
        assert_eq!(*headroom < 1.0, k + 1 >= OVERFLOW_BLOCK, "block {}: {headroom}", k + 1);
    }
    // Without a target format the table has no such column.
    let plain = shunt(&["audit", &path, "--format", "markdown", "--quiet"]);
    assert!(!plain.stdout.contains("headroom in"));
}

// Converted by onnxconverter-common 1.16.0 and run by onnxruntime 1.23.2
// (tests/reference/precision.py tensors): the merge outputs of blocks 1-4
// are finite and block 5's holds infinities; shunt's audit of the float16
// model (its own format's headroom) reports non-finite values there first.
#[test]
fn the_converted_stack_is_infinite_from_that_block_in_onnxruntime_and_in_the_audit() {
    let dir = tempdir();
    let fp16 = float16_copy(&fixture(OVERFLOW), dir.path());
    let x = inputs(dir.path(), &[4, 8, 8]);
    let report = json_of(&["audit", &fp16.to_string_lossy(), "--feed", &x.to_string_lossy()]);
    let b = blocks(&report);
    assert_eq!(b.len(), OVERFLOW_BLOCKS);
    let names: Vec<String> = b.iter().map(|b| b["output"].as_str().unwrap().to_owned()).collect();
    let names_path = dir.path().join("names.json");
    std::fs::write(&names_path, serde_json::to_string(&names).unwrap()).unwrap();
    let out = dir.path().join("tensors.json");
    reference(&[
        "tensors",
        &fp16.to_string_lossy(),
        &x.to_string_lossy(),
        &names_path.to_string_lossy(),
        &out.to_string_lossy(),
    ]);
    let ort = read_json(&out);
    let ort_infinite: Vec<bool> =
        names.iter().map(|n| ort["tensors"][n]["non_finite"].as_u64().unwrap() > 0).collect();
    let expected: Vec<bool> = (1..=OVERFLOW_BLOCKS).map(|k| k >= OVERFLOW_BLOCK).collect();
    assert_eq!(ort_infinite, expected, "onnxruntime's infinities by block");
    let ours: Vec<bool> = b
        .iter()
        .map(|b| b["stats"]["nan"].as_u64().unwrap() + b["stats"]["inf"].as_u64().unwrap() > 0)
        .collect();
    assert_eq!(ours, expected, "shunt's non-finite values by block");
    assert_eq!(findings(&report, "non-finite").first(), Some(&(OVERFLOW_BLOCK as u64)));
    let h = &report["headroom"];
    assert_eq!(h["format"], "fp16");
    assert!(h["chosen_by"].as_str().unwrap().contains("own element type"));
    assert_eq!(findings(&report, "overflow").first(), Some(&(OVERFLOW_BLOCK as u64)));
    // The finite blocks' largest |x| agree with onnxruntime's (both float16).
    for (k, n) in names.iter().enumerate().take(OVERFLOW_BLOCK - 1) {
        let ours = h["blocks"][k]["max_abs"].as_f64().unwrap();
        let theirs = ort["tensors"][n]["max_abs"].as_f64().unwrap();
        assert!((ours / theirs - 1.0).abs() < 1e-3, "block {}: {ours} {theirs}", k + 1);
    }
}

#[test]
fn outlier_channels_cost_int8_resolution_from_their_block() {
    let report = json_of(&["audit", &fixture(OUTLIER).to_string_lossy(), "--precision", "int8"]);
    let b = blocks(&report);
    assert_eq!(b.len(), 3, "census of fixtures/precision/MANIFEST.txt");
    assert_eq!(findings(&report, "int8-outlier-channels"), vec![2, 3]);
    // Channel 0 grows 201/1.5 = 134 times more than the others at block 2:
    // the ratio of maxima is 134 times what it was at block 1, exactly up to
    // float32 rounding (the median channel is one of the others).
    let r = |k: usize| b[k]["stats"]["channel_max_ratio"].as_f64().unwrap();
    assert_eq!(b[1]["stats"]["outlier_channel"], 0);
    assert!(r(0) < 16.0, "{}", r(0));
    let h = &report["headroom"];
    assert_eq!(h["levels"], 127);
    assert!(h["largest"].is_null());
    let levels = h["blocks"][1]["median_channel_levels"].as_f64().unwrap();
    assert!((levels - 127.0 / r(1)).abs() < 1e-9);
    assert!(r(1) > 100.0, "{}", r(1));
}

/// The tensors compared per aligned pair, by name in each model's report:
/// the merge output, the shortcut, the branch inputs (summed).
fn pair_names(a: &Value, b: &Value, i: usize, j: usize) -> [Value; 3] {
    let (x, y) = (&blocks(a)[i], &blocks(b)[j]);
    [
        json!({"a": [x["output"]], "b": [y["output"]]}),
        json!({"a": [x["shortcut"]["input"]], "b": [y["shortcut"]["input"]]}),
        json!({"a": x["branch"]["inputs"], "b": y["branch"]["inputs"]}),
    ]
}

/// `compare A B` on seeded inputs against onnxruntime computing the same
/// relative L2 errors on the same inputs: the comparison, and per compared
/// pair and tensor (output, shortcut, branch) shunt's error and
/// onnxruntime's (`None` when not finite).
fn errors_against_onnxruntime(
    a: &Path,
    b: &Path,
    sample: &[usize],
    blocks: usize,
) -> (Value, Vec<Row>) {
    let dir = tempdir();
    let x = inputs(dir.path(), sample);
    let (a_s, b_s, x_s) = (a.to_string_lossy(), b.to_string_lossy(), x.to_string_lossy());
    let c = json_of(&["compare", &a_s, &b_s, "--feed", &x_s]);
    let ra = json_of(&["audit", &a_s, "--feed", &x_s]);
    let rb = json_of(&["audit", &b_s, "--feed", &x_s]);
    let pairs: Vec<&Value> =
        c["blocks"].as_array().unwrap().iter().filter(|p| !p["error"].is_null()).collect();
    assert_eq!(pairs.len(), blocks, "the census: every block aligned");
    let mut list = Vec::new();
    for p in &pairs {
        let (i, j) = (p["a"].as_u64().unwrap() as usize - 1, p["b"].as_u64().unwrap() as usize - 1);
        list.extend(pair_names(&ra, &rb, i, j));
    }
    let pairs_path = dir.path().join("pairs.json");
    std::fs::write(&pairs_path, serde_json::to_string(&list).unwrap()).unwrap();
    let out = dir.path().join("errors.json");
    reference(&["errors", &a_s, &b_s, &x_s, &pairs_path.to_string_lossy(), &out.to_string_lossy()]);
    let ort = read_json(&out);
    let ort = ort["pairs"].as_array().unwrap();
    let values = pairs
        .iter()
        .enumerate()
        .map(|(k, p)| {
            let mut row = [(None, None); 3];
            for (m, field) in ["output", "shortcut", "branch"].iter().enumerate() {
                row[m] = (p["error"][field].as_f64(), ort[3 * k + m]["rel_l2"].as_f64());
            }
            row
        })
        .collect();
    (c, values)
}

/// Per tensor (output, shortcut, branch) of one pair: shunt's error and onnxruntime's.
type Row = [(Option<f64>, Option<f64>); 3];

/// Every error agrees within `tolerance` relative.
#[track_caller]
fn agree(values: &[Row], tolerance: f64) {
    for (k, row) in values.iter().enumerate() {
        for (m, (ours, theirs)) in row.iter().enumerate() {
            let (ours, theirs) = (ours.expect("shunt's error"), theirs.expect("onnxruntime's"));
            assert!(
                (ours / theirs - 1.0).abs() < tolerance,
                "pair {} tensor {m}: shunt {ours:.4e}, onnxruntime {theirs:.4e}; all: {values:?}",
                k + 1
            );
        }
    }
}

// Per-block errors of a float16 copy against onnxruntime on the same
// inputs, where float16 arithmetic is the same in both engines: in the
// overflow stack every op rounds one exact product or sum to float16 (the
// branch weight 7·I has one nonzero term per output), so tract and
// onnxruntime compute the same float16 values, and the errors before the
// overflow agree to float64 rounding; from block 5 both hold infinities.
#[test]
fn float16_errors_along_depth_agree_with_onnxruntime() {
    let dir = tempdir();
    let a = fixture(OVERFLOW);
    let fp16 = float16_copy(&a, dir.path());
    let (c, values) = errors_against_onnxruntime(&a, &fp16, &[4, 8, 8], OVERFLOW_BLOCKS);
    agree(&values[..OVERFLOW_BLOCK - 1], 1e-6);
    let e = &c["errors"];
    assert_eq!(e["measured"], true);
    assert_eq!(e["born_at"]["a"], OVERFLOW_BLOCK);
}

// The ResNet's float16 copy: here the two engines' float16 convolutions
// differ. onnxruntime 1.23.2's errors against float32 stay near 3.5e-4 at
// every block (half a float16 step: each op computed wider and rounded
// once), tract 0.23.9's grow from 9.7e-4 to 1.8e-3 (measured: 1.8 to 5.9
// times onnxruntime's), so each engine's error is its own. Both stay of one
// order (within a factor of 8), below 1%, and shunt's grows along depth.
#[test]
fn float16_errors_of_a_resnet_are_of_onnxruntimes_order() {
    let a = fixture("torch/resnet_cifar_folded.onnx");
    let b = fixture("transformed/resnet_cifar_fp16.onnx");
    let (c, values) = errors_against_onnxruntime(&a, &b, &[3, 32, 32], 6);
    for row in &values {
        for (ours, theirs) in row {
            let (ours, theirs) = (ours.unwrap(), theirs.unwrap());
            assert!((0.125..8.0).contains(&(ours / theirs)), "{values:?}");
            assert!(ours < 0.01 && theirs < 0.01, "{values:?}");
        }
    }
    let e = &c["errors"];
    assert!(e["born_at"].is_null(), "float16's error stays below 1%: {e}");
    assert!(e["growth"].as_f64().unwrap() > 1.0);
}

// Per-block errors of the QDQ copy (onnxruntime's quantize_static) against
// onnxruntime running it as written (optimisations off: DequantizeLinear ->
// float op -> QuantizeLinear): both compute the same values except where a
// float sum lands next to a rounding boundary of a quantisation.
#[test]
fn qdq_errors_along_depth_agree_with_onnxruntime() {
    let a = fixture("torch/resnet_cifar_folded.onnx");
    let b = fixture("transformed/resnet_cifar_qdq_ort.onnx");
    let (c, values) = errors_against_onnxruntime(&a, &b, &[3, 32, 32], 6);
    agree(&values, 0.02);
    let born = &c["errors"]["born_at"];
    assert_eq!(born["a"], 1, "int8 quantisation costs more than 1% at the first block: {born}");
}

#[test]
fn compare_names_the_block_where_float16_overflows() {
    let dir = tempdir();
    let fp16 = float16_copy(&fixture(OVERFLOW), dir.path());
    let c = json_of(&["compare", &fixture(OVERFLOW).to_string_lossy(), &fp16.to_string_lossy()]);
    let born = &c["errors"]["born_at"];
    assert_eq!(born["a"], OVERFLOW_BLOCK, "{born}");
    assert!(born["non_finite"].as_u64().unwrap() > 0);
    // Every earlier block's float16 error is a rounding error, far below 1%.
    for p in c["blocks"].as_array().unwrap().iter().take(OVERFLOW_BLOCK - 1) {
        assert!(p["error"]["output"].as_f64().unwrap() < 1e-3, "{p}");
        assert_eq!(p["error"]["non_finite"], 0);
    }
    // The table, Markdown and HTML say the same.
    let table =
        shunt(&["compare", &fixture(OVERFLOW).to_string_lossy(), &fp16.to_string_lossy(), "-q"]);
    assert!(table.stdout.contains("born at block 5 of A (block5.add)"), "{}", table.stdout);
    let md = shunt(&[
        "compare",
        &fixture(OVERFLOW).to_string_lossy(),
        &fp16.to_string_lossy(),
        "-q",
        "--format",
        "markdown",
    ]);
    assert!(md.stdout.contains("born at block 5 of A (block5.add)"), "{}", md.stdout);
    let page = dir.path().join("c.html");
    let html = shunt(&[
        "compare",
        &fixture(OVERFLOW).to_string_lossy(),
        &fp16.to_string_lossy(),
        "-q",
        "--format",
        "html",
        "-o",
        &page.to_string_lossy(),
    ]);
    assert_eq!(html.code, 0, "{}", html.stderr);
    let text = std::fs::read_to_string(&page).unwrap();
    assert!(text.contains("id=\"plot-errors\" data-blocks=\"6\""));
    assert_eq!(text.matches("data-kind=\"non-finite\"").count(), 2, "blocks 5 and 6");
    assert!(text.contains("#5 error born here"));
}

#[test]
fn the_audit_page_draws_the_headroom_against_the_limits() {
    let dir = tempdir();
    let page = dir.path().join("r.html");
    let run = shunt(&[
        "audit",
        &fixture(OVERFLOW).to_string_lossy(),
        "--precision",
        "fp16",
        "-q",
        "--format",
        "html",
        "-o",
        &page.to_string_lossy(),
    ]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let text = std::fs::read_to_string(&page).unwrap();
    assert!(text.contains("id=\"plot-range\" data-blocks=\"6\""));
    let start = text.find("id=\"plot-range\"").expect("the headroom plot");
    let figure = &text[start..start + text[start..].find("</figure>").unwrap()];
    assert!(figure.contains("fp16 largest 6.55e4"), "the limit line is labelled");
    assert_eq!(figure.matches("data-kind=\"range\"").count(), 3, "blocks 4, 5 and 6");
    assert_eq!(figure.matches("data-kind=\"ok\"").count(), 3, "blocks 1, 2 and 3");
}
