//! What `shunt audit --knockout` costs against plain forward passes.
//!
//! `cargo bench --bench knockout`. Builds a full-width ResNet-50 (224x224,
//! 1000 classes, 16 blocks, symbolic batch) into `target/bench/`, then runs
//! in separate child processes of this binary (so each peak memory is its
//! own):
//!
//! - `plain`: tract's plain forward at batch 8: load + optimise + plan timed
//!   once, then a warm-up and [`RUNS`] timed runs;
//! - `knockout`: `audit_file` with `--knockout` (every block, the
//!   perturbation gain, no converse) at batch 8, split into its steps by a
//!   timing [`Progress`]: scan, preparation of the gated model (once), the
//!   intact and perturbed passes, and the knockout passes (one per block).
//!
//! The claim checked: knockout of all blocks costs about (blocks + 1) plain
//! forward passes (+ 1 for the gain) plus one preparation. Wall clock and
//! CPU time on one thread (tract runs on one).
#![allow(clippy::print_stdout, clippy::print_stderr)]

use std::cell::RefCell;
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::Instant;

use prost::Message;
use serde_json::{Value, json};
use shunt::audit::{self, AuditConfig};
use shunt::measure::InfluenceConfig;
use shunt::probe::Progress;
use shunt_testkit::zoo::{self, ImageSpec, ResNetConfig};
use tract_onnx::prelude::*;

const BATCH: usize = 8;
const RUNS: usize = 3;

fn bench_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("target").join("bench")
}

fn memory_hwm() -> f64 {
    let status = std::fs::read_to_string("/proc/self/status").unwrap_or_default();
    status
        .lines()
        .find_map(|l| l.strip_prefix("VmHWM:"))
        .and_then(|v| v.trim().trim_end_matches("kB").trim().parse::<f64>().ok())
        .map_or(f64::NAN, |kb| kb / 1024.0)
}

fn cpu() -> f64 {
    let s = std::fs::read_to_string("/proc/thread-self/schedstat").unwrap_or_default();
    s.split_whitespace().next().and_then(|v| v.parse::<f64>().ok()).unwrap_or(f64::NAN) / 1e9
}

fn median(v: &[f64]) -> f64 {
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    s[s.len() / 2]
}

/// A step's name, when it started (wall, CPU) and how many units it counted.
#[derive(Default)]
struct Clock {
    marks: RefCell<Vec<(String, Instant, f64, u64)>>,
}

impl Progress for Clock {
    fn step(&self, message: &str, _: u64) {
        self.marks.borrow_mut().push((message.to_owned(), Instant::now(), cpu(), 0));
    }
    fn advance(&self) {
        if let Some(m) = self.marks.borrow_mut().last_mut() {
            m.3 += 1;
        }
    }
    fn finish(&self) {
        self.marks.borrow_mut().push(("finished".to_owned(), Instant::now(), cpu(), 0));
    }
}

fn child_plain(path: &Path) -> Value {
    let (start, c) = (Instant::now(), cpu());
    let fact = InferenceFact::dt_shape(f32::datum_type(), [BATCH, 3, 224, 224]);
    let plan = tract_onnx::onnx()
        .with_ignore_value_info(true)
        .model_for_path(path)
        .and_then(|m| m.with_input_fact(0, fact))
        .and_then(|m| m.into_optimized())
        .and_then(|m| m.into_runnable())
        .expect("a plain plan");
    let (prepare, prepare_cpu) = (start.elapsed().as_secs_f64(), cpu() - c);
    let input: Tensor = Tensor::zero::<f32>(&[BATCH, 3, 224, 224]).expect("a tensor");
    let mut state = tract_onnx::tract_core::plan::SimpleState::new(&plan).expect("a state");
    let (mut wall, mut cpus) = (Vec::new(), Vec::new());
    for i in 0..=RUNS {
        let (t, c) = (Instant::now(), cpu());
        std::hint::black_box(state.run(tvec![input.clone().into_tvalue()]).expect("run"));
        if i > 0 {
            wall.push(t.elapsed().as_secs_f64());
            cpus.push(cpu() - c);
        }
    }
    json!({"prepare_s": prepare, "prepare_cpu_s": prepare_cpu, "run_s": wall, "run_cpu_s": cpus,
           "hwm_mib": memory_hwm()})
}

fn child_knockout(path: &Path) -> Value {
    let mut config = AuditConfig::standard();
    config.inputs.samples = BATCH;
    // One pass of the batch on one thread, like the plain forward (the
    // command line's threaded figures: benches/threads.py).
    config.inputs.max_pass = None;
    config.budget = shunt::parallel::Budget::ONE_THREAD;
    config.influence = Some(InfluenceConfig::standard());
    let clock = Clock::default();
    let (start, c0) = (Instant::now(), cpu());
    let outcome = audit::audit_file(path, &config, &clock).expect("audit");
    let (total, total_cpu) = (start.elapsed().as_secs_f64(), cpu() - c0);
    assert!(outcome.run_error.is_none(), "{:?}", outcome.run_error);
    let marks = clock.marks.borrow();
    let at = |name: &str| marks.iter().find(|m| m.0 == name).expect("a step");
    let (prep, run, knock, done) =
        (at("preparing the model"), at("running"), at("knocking out"), at("finished"));
    let inf = outcome.report.influence.as_ref().expect("influence");
    json!({
        "blocks": outcome.report.blocks.len(),
        "forward_passes": inf.knockout.as_ref().map(|k| k.forward_passes),
        "total_s": total,
        "total_cpu_s": total_cpu,
        "scan_s": (prep.1 - start).as_secs_f64(),
        "prepare_s": (run.1 - prep.1).as_secs_f64(),
        "prepare_cpu_s": run.2 - prep.2,
        "intact_and_perturbed_s": (knock.1 - run.1).as_secs_f64(),
        "intact_and_perturbed_cpu_s": knock.2 - run.2,
        "knockout_passes": knock.3,
        "knockout_s": (done.1 - knock.1).as_secs_f64(),
        "knockout_cpu_s": done.2 - knock.2,
        "hwm_mib": memory_hwm(),
    })
}

fn spawn(variant: &str, path: &Path) -> Value {
    let exe = std::env::current_exe().expect("this binary");
    let out =
        Command::new(exe).arg("--child").arg(variant).arg(path).output().expect("run a child");
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(out.status.success(), "child {variant}: {}", String::from_utf8_lossy(&out.stderr));
    let line = stdout.lines().find_map(|l| l.strip_prefix("RESULT ")).expect("a result line");
    serde_json::from_str(line).expect("a JSON result")
}

fn f(v: &Value, key: &str) -> f64 {
    v[key].as_f64().unwrap_or(f64::NAN)
}

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    if let Some(i) = args.iter().position(|a| a == "--child") {
        let path = PathBuf::from(&args[i + 2]);
        let result = match args[i + 1].as_str() {
            "plain" => child_plain(&path),
            "knockout" => child_knockout(&path),
            other => panic!("unknown variant {other}"),
        };
        println!("RESULT {result}");
        return;
    }
    let dir = bench_dir();
    std::fs::create_dir_all(&dir).expect("create target/bench");
    let mut cfg = ResNetConfig::resnet50();
    cfg.width_divisor = 1;
    cfg.image = ImageSpec::rgb(224);
    cfg.image.classes = 1000;
    let path = dir.join("resnet50_knockout.onnx");
    std::fs::write(&path, zoo::resnet(&cfg).encode_to_vec()).expect("write the model");

    let plain = spawn("plain", &path);
    let knock = spawn("knockout", &path);
    let run = |key: &str| {
        median(&plain[key].as_array().unwrap().iter().filter_map(Value::as_f64).collect::<Vec<_>>())
    };
    let (run_s, run_cpu) = (run("run_s"), run("run_cpu_s"));
    let blocks = f(&knock, "blocks");
    let passes = f(&knock, "forward_passes");
    println!("ResNet-50 224x224, batch {BATCH}, one thread, {blocks} blocks");
    println!("| what | wall (s) | CPU (s) |");
    println!("|---|---:|---:|");
    println!("| tract plain forward (median of {RUNS}) | {run_s:.3} | {run_cpu:.3} |");
    println!(
        "| tract load + optimise + plan (plain model) | {:.3} | {:.3} |",
        f(&plain, "prepare_s"),
        f(&plain, "prepare_cpu_s")
    );
    println!(
        "| knockout: preparation of the gated model (once) | {:.3} | {:.3} |",
        f(&knock, "prepare_s"),
        f(&knock, "prepare_cpu_s")
    );
    println!(
        "| knockout: intact pass with statistics + perturbed pass | {:.3} | {:.3} |",
        f(&knock, "intact_and_perturbed_s"),
        f(&knock, "intact_and_perturbed_cpu_s")
    );
    let kp = f(&knock, "knockout_passes");
    println!(
        "| knockout: {kp} knockout passes | {:.3} ({:.3} per pass) | {:.3} ({:.3} per pass) |",
        f(&knock, "knockout_s"),
        f(&knock, "knockout_s") / kp,
        f(&knock, "knockout_cpu_s"),
        f(&knock, "knockout_cpu_s") / kp
    );
    println!(
        "| knockout: audit_file end to end ({passes} forward passes) | {:.3} | {:.3} |",
        f(&knock, "total_s"),
        f(&knock, "total_cpu_s")
    );
    let budget = (blocks + 2.0) * run_s + f(&plain, "prepare_s");
    let budget_cpu = (blocks + 2.0) * run_cpu + f(&plain, "prepare_cpu_s");
    println!(
        "\n(blocks + 2) plain forwards + one plain preparation: {budget:.3} s wall, {budget_cpu:.3} s CPU; \
         knockout end to end / that: {:.2}x wall, {:.2}x CPU",
        f(&knock, "total_s") / budget,
        f(&knock, "total_cpu_s") / budget_cpu
    );
    println!(
        "knockout pass / plain forward: {:.2}x CPU; peak memory: plain {:.0} MiB, knockout {:.0} MiB",
        f(&knock, "knockout_cpu_s") / kp / run_cpu,
        f(&plain, "hwm_mib"),
        f(&knock, "hwm_mib")
    );
    println!("\nraw: plain {plain}\nknockout {knock}");
}
