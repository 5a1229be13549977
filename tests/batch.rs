//! Several models in one command: folders searched, one report, errors
//! listed without stopping the others, exit codes.

use std::fs;
use std::path::Path;

use serde_json::Value;

use crate::util;

/// A folder with two good models (one with structural findings), one broken
/// file in a sub-folder, and a file that is not a model.
fn model_folder() -> tempfile::TempDir {
    let dir = util::tempdir();
    let root = dir.path();
    fs::create_dir_all(root.join("runs/late")).unwrap();
    fs::copy(util::fixture("resnet18_b.onnx"), root.join("resnet18_b.onnx")).unwrap();
    fs::copy(util::fixture("rezero.onnx"), root.join("runs/rezero.onnx")).unwrap();
    fs::write(root.join("runs/late/broken.onnx"), b"not a model").unwrap();
    fs::write(root.join("runs/notes.txt"), b"not searched").unwrap();
    dir
}

fn listing(root: &Path) -> Vec<(String, u64)> {
    let mut out = Vec::new();
    let mut stack = vec![root.to_path_buf()];
    while let Some(d) = stack.pop() {
        for e in fs::read_dir(&d).unwrap() {
            let p = e.unwrap().path();
            if p.is_dir() {
                stack.push(p);
            } else {
                out.push((p.display().to_string(), fs::metadata(&p).unwrap().len()));
            }
        }
    }
    out.sort();
    out
}

fn json(run: &util::Run) -> Value {
    serde_json::from_str(&run.stdout).unwrap_or_else(|e| panic!("{e}: {}", run.stdout))
}

#[test]
fn a_folder_is_scanned_recursively_and_a_broken_file_is_listed() {
    let dir = model_folder();
    let root = dir.path().to_str().unwrap();
    let before = listing(dir.path());
    let run = util::shunt(&["scan", "--format", "json", root]);
    // A model that could not be read makes the exit code 2, after the others.
    assert_eq!(run.code, 2, "{}", run.stderr);
    let batch = json(&run);
    assert_eq!(batch["schema"], "shunt/batch");
    assert_eq!(batch["schema_version"], 1);
    assert_eq!(batch["command"], "scan");
    let models = batch["models"].as_array().unwrap();
    let names: Vec<&str> =
        models.iter().map(|m| m["path"].as_str().unwrap().strip_prefix(root).unwrap()).collect();
    assert_eq!(names, ["/resnet18_b.onnx", "/runs/late/broken.onnx", "/runs/rezero.onnx"]);
    let status: Vec<&str> = models.iter().map(|m| m["status"].as_str().unwrap()).collect();
    assert_eq!(status, ["ok", "error", "findings"]);
    let error = models[1]["error"].as_str().unwrap();
    assert!(error.contains("broken.onnx") && error.contains("not an ONNX model"), "{error}");
    assert!(models[1]["report"].is_null());
    assert!(run.stderr.contains("broken.onnx"), "{}", run.stderr);
    // Each report inside is the one the model gets alone.
    let alone = util::shunt(&["scan", "--format", "json", &format!("{root}/runs/rezero.onnx")]);
    assert_eq!(models[2]["report"], json(&alone));
    let s = &batch["summary"];
    assert_eq!((s["models"].as_u64(), s["ok"].as_u64()), (Some(3), Some(1)));
    assert_eq!((s["with_findings"].as_u64(), s["errors"].as_u64()), (Some(1), Some(1)));
    assert_eq!(s["blocks"].as_u64(), Some(8 + 3));
    assert_eq!(s["findings"]["static-dead"].as_u64(), Some(3));
    // Nothing was written beside the models.
    assert_eq!(listing(dir.path()), before);
}

#[test]
fn several_files_exit_with_the_worst_outcome() {
    let dir = model_folder();
    let good = dir.path().join("resnet18_b.onnx");
    let dead = dir.path().join("runs/rezero.onnx");
    let (good, dead) = (good.to_str().unwrap(), dead.to_str().unwrap());
    let run = util::shunt(&["scan", good, dead]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    assert!(run.stdout.contains("2 models: 1 ok, 1 with findings, 0 failed"), "{}", run.stdout);
    let run = util::shunt(&["scan", "--fail-on", "static-dead", good, dead]);
    assert_eq!(run.code, 1, "{}", run.stderr);
    let run = util::shunt(&["scan", "--fail-on", "static-dead", good]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let empty = util::tempdir();
    let run = util::shunt(&["scan", empty.path().to_str().unwrap()]);
    assert_eq!(run.code, 2);
    assert!(run.stderr.contains("no .onnx model file found"), "{}", run.stderr);
}

#[test]
fn a_parallel_audit_gives_the_same_document_as_a_serial_one() {
    let dir = model_folder();
    let root = dir.path().to_str().unwrap();
    let serial = util::shunt(&["audit", "--format", "json", "--batch", "2", "-j", "1", root]);
    let parallel = util::shunt(&["audit", "--format", "json", "--batch", "2", "-j", "3", root]);
    assert_eq!(serial.code, 2, "{}", serial.stderr);
    assert_eq!(parallel.code, 2, "{}", parallel.stderr);
    assert_eq!(serial.stdout, parallel.stdout);
    let batch = json(&parallel);
    assert_eq!(batch["command"], "audit");
    let report = &batch["models"][0]["report"];
    assert_eq!(report["run"]["samples"], 2);
    assert_eq!(report["blocks"].as_array().unwrap().len(), 8);
}

#[test]
fn the_batch_report_is_never_written_over_a_model() {
    let dir = model_folder();
    let root = dir.path().to_str().unwrap();
    let target = dir.path().join("runs/rezero.onnx");
    let before = fs::read(&target).unwrap();
    let run = util::shunt(&["scan", "-o", target.to_str().unwrap(), root]);
    assert_eq!(run.code, 2);
    assert!(
        run.stderr.contains("refusing to write the report over an input model"),
        "{}",
        run.stderr
    );
    assert_eq!(fs::read(&target).unwrap(), before);
}
