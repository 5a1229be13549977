//! Size: a model whose weights are far larger than memory is scanned from
//! its metadata alone.

use std::fs;

use shunt::open::OpenConfig;
use shunt::scan;
use shunt_testkit::large::{self, DecoderConfig};

use crate::util;

/// Bytes this thread has read through `read`-family system calls, from
/// Linux's per-thread I/O accounting (`rchar` in `/proc/thread-self/io`).
fn bytes_read_by_this_thread() -> u64 {
    let io = fs::read_to_string("/proc/thread-self/io").expect("Linux per-thread I/O accounting");
    io.lines()
        .find_map(|l| l.strip_prefix("rchar:"))
        .and_then(|v| v.trim().parse().ok())
        .expect("an rchar line")
}

#[test]
fn seven_billion_parameter_decoder_is_scanned_without_reading_its_weights() {
    let dir = util::tempdir();
    let cfg = DecoderConfig::seven_billion();
    let (model, weight_bytes) = large::write_decoder(dir.path(), "decoder", &cfg).unwrap();
    assert!(weight_bytes > 26_000_000_000, "{weight_bytes}");
    let model_bytes = fs::metadata(&model).unwrap().len();

    // The binary: every block found and classified from the graph.
    let run = util::shunt(&["scan", "--format", "json", model.to_str().unwrap()]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let report: serde_json::Value = serde_json::from_str(&run.stdout).unwrap();
    let blocks = report["blocks"].as_array().unwrap();
    assert_eq!(blocks.len(), 2 * cfg.layers);
    assert!(blocks.iter().all(|b| b["placement"] == "pre-norm"), "{blocks:?}");
    // The payload sizes come from the external-data entries, not the file.
    assert_eq!(report["model"]["external_bytes"].as_u64(), Some(4 * cfg.external_parameters()));

    // In this thread: the scan reads the model file and nothing of the
    // 27 GB weight file (a few KB of slack for the folder and metadata).
    let before = bytes_read_by_this_thread();
    let report = scan::scan_file(&model, &OpenConfig::standard()).unwrap();
    let read = bytes_read_by_this_thread() - before;
    assert_eq!(report.blocks.len(), 2 * cfg.layers);
    assert!(
        read < model_bytes + 64 * 1024,
        "the scan read {read} bytes; the model file has {model_bytes}"
    );
}
