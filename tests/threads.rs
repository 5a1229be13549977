//! Threads (issue 16): passes, sample chunks, knockout runs and perturbed
//! passes spread over `--threads`, and the report does not depend on it:
//! the same seed gives byte-identical JSON for any thread count, with
//! passes on separate threads, with tract's multithreaded kernels inside one
//! pass, and with the memory budget forcing one pass at a time.

use std::cell::RefCell;
use std::path::Path;

use crate::util::{fixture, shunt, tempdir};

/// `shunt audit MODEL --format json` with `args`, as text.
fn audit_json(model: &Path, args: &[&str]) -> String {
    let mut all = vec!["audit", model.to_str().unwrap(), "--format", "json", "--quiet"];
    all.extend_from_slice(args);
    let run = shunt(&all);
    assert!(run.code == 0 || run.code == 1, "{all:?}: {}", run.stderr);
    assert!(run.stdout.starts_with('{'), "{all:?}: {}", run.stdout);
    run.stdout
}

/// The same JSON at 1, 2 and 4 threads; returns it.
#[track_caller]
fn same_for_every_thread_count(model: &Path, args: &[&str]) -> String {
    let with = |threads: &str| {
        let mut a = args.to_vec();
        a.extend_from_slice(&["--threads", threads]);
        audit_json(model, &a)
    };
    let one = with("1");
    for threads in ["2", "4"] {
        assert!(one == with(threads), "{model:?} {args:?}: --threads {threads} differs from 1");
    }
    one
}

#[test]
fn thread_counts_give_identical_json_for_the_demo() {
    let demo = fixture("demo/tile_grader.onnx");
    // Eight passes of one sample (passes on threads), with the knockout and
    // the gain (their runs on threads too).
    let json = same_for_every_thread_count(&demo, &["--knockout", "--seed", "3"]);
    let r: serde_json::Value = serde_json::from_str(&json).unwrap();
    assert_eq!((r["run"]["pass_batch"].as_u64(), r["run"]["passes"].as_u64()), (Some(1), Some(8)));
    assert!(r["influence"]["knockout"]["forward_passes"].as_u64() > Some(16), "{}", r["influence"]);
    // One pass of all eight samples: the threads go to tract's kernels.
    let json = same_for_every_thread_count(&demo, &["--pass-batch", "8"]);
    let r: serde_json::Value = serde_json::from_str(&json).unwrap();
    assert_eq!(r["run"]["passes"].as_u64(), Some(1));
    // Three passes of three (the eight samples round up to nine).
    same_for_every_thread_count(&demo, &["--pass-batch", "3", "--gain"]);
}

#[test]
fn thread_counts_give_identical_json_for_a_fixed_batch_model() {
    // Exported by PyTorch with the batch fixed at 1 (fixtures/torch/MANIFEST.txt):
    // every sample is a pass of its own.
    let model = fixture("torch/resnet_cifar_bn.onnx");
    let json = same_for_every_thread_count(&model, &["--batch", "5", "--knockout"]);
    let r: serde_json::Value = serde_json::from_str(&json).unwrap();
    assert_eq!((r["run"]["pass_batch"].as_u64(), r["run"]["passes"].as_u64()), (Some(1), Some(5)));
}

#[test]
fn a_memory_budget_below_one_pass_still_runs_every_pass() {
    let demo = fixture("demo/tile_grader.onnx");
    let free = audit_json(&demo, &["--threads", "4", "--gain"]);
    let tight = audit_json(&demo, &["--threads", "4", "--gain", "--memory-budget", "1K"]);
    assert!(free == tight, "a memory budget changed the report");
}

#[test]
fn thread_and_memory_flags_are_checked() {
    let demo = fixture("demo/tile_grader.onnx");
    let demo = demo.to_str().unwrap();
    for (flag, value, says) in [
        ("--threads", "0", "--threads must be at least 1"),
        ("--memory-budget", "lots", "--memory-budget lots: expected bytes"),
    ] {
        let run = shunt(&["audit", demo, flag, value, "--quiet"]);
        assert_eq!(run.code, 2, "{flag} {value}: {}", run.stderr);
        assert!(run.stderr.contains(says), "{flag} {value}: {}", run.stderr);
    }
}

#[test]
fn folders_share_the_thread_budget_and_keep_their_report() {
    let dir = tempdir();
    for name in ["a.onnx", "b.onnx", "c.onnx"] {
        std::fs::copy(fixture("demo/tile_grader.onnx"), dir.path().join(name)).unwrap();
    }
    let folder = dir.path().to_str().unwrap();
    let run = |args: &[&str]| {
        let mut all = vec!["audit", folder, "--format", "json", "--quiet", "--gain"];
        all.extend_from_slice(args);
        let r = shunt(&all);
        assert!(r.code == 0 || r.code == 1, "{args:?}: {}", r.stderr);
        r.stdout
    };
    let one = run(&["--threads", "1"]);
    // Two models at once with two threads each; more jobs than threads are
    // cut to the thread budget.
    assert!(one == run(&["--threads", "4", "--jobs", "2"]), "--jobs 2 --threads 4");
    assert!(one == run(&["--threads", "2", "--jobs", "8"]), "--jobs 8 --threads 2");
}

/// Records the progress a run reports.
#[derive(Default)]
struct Recorded {
    steps: RefCell<Vec<(String, u64, u64)>>,
}

impl shunt::probe::Progress for Recorded {
    fn step(&self, message: &str, total: u64) {
        self.steps.borrow_mut().push((message.to_owned(), total, 0));
    }
    fn advance(&self) {
        if let Some(last) = self.steps.borrow_mut().last_mut() {
            last.2 += 1;
        }
    }
    fn finish(&self) {}
}

#[test]
fn progress_counts_every_pass_once_with_threads() {
    use shunt::audit::{AuditConfig, audit_file};
    let demo = fixture("demo/tile_grader.onnx");
    for threads in [1, 3] {
        let config = AuditConfig {
            influence: Some(shunt::measure::InfluenceConfig::standard()),
            budget: shunt::parallel::Budget { threads: Some(threads), memory: None },
            ..AuditConfig::standard()
        };
        let progress = Recorded::default();
        let audit = audit_file(&demo, &config, &progress).unwrap();
        assert!(audit.run_error.is_none());
        let steps = progress.steps.into_inner();
        let names: Vec<&str> = steps.iter().map(|s| s.0.as_str()).collect();
        assert_eq!(names, ["preparing the model", "running", "knocking out"], "{threads}");
        // 8 passes, each intact and perturbed; 8 blocks knocked out over 8 passes.
        assert_eq!(steps[1].1, 16);
        assert!(steps[2].1 > 0 && steps[2].1 % 8 == 0, "{steps:?}");
        for (name, total, done) in &steps {
            assert_eq!(done, total, "{name} at {threads} threads");
        }
    }
}
