//! What `shunt audit` costs against a plain forward pass of the same model.
//!
//! `cargo bench --bench audit`. Builds a full-width ResNet-50 (224x224, 1000
//! classes, symbolic batch), writes it to `target/bench/resnet50.onnx` and the
//! audit's own first input batch (8 samples, seed 0, normal) to
//! `target/bench/resnet50_input.npy` (also read by `benches/ort_forward.py`),
//! then runs each variant in a child process of this binary so that each
//! peak memory (`VmHWM` of the child) is its own:
//!
//! - `plain`: tract's plain forward (load + optimise timed apart, then a
//!   warm-up and [`RUNS`] timed runs of the plan);
//! - `recipe`: the probe's recipe without statistics, interleaved with the
//!   plain plan in one process: watched tensors kept as outputs while
//!   optimising, outputs reset, run with an evaluation callback that only
//!   calls `eval`; isolates the cost of de-fusing and of the callback; and
//!   `audit_file` in the same loop, so that its run with statistics is
//!   compared with the plain run in the same process;
//! - `audit`: `shunt::audit::audit_file` end to end with the command line's
//!   defaults, a warm-up and [`RUNS`] timed runs, split into phases by a
//!   timing [`Progress`].
//!
//! Everything is wall clock on one thread (tract runs on one).
//!
//! `--prepare` writes the files and stops; `--child audit PATH` runs one
//! audit child, so children of two builds can be interleaved by hand
//! (benches/RESULTS.md).
#![allow(clippy::print_stdout, clippy::print_stderr)]

use std::cell::RefCell;
use std::collections::{BTreeMap, HashSet};
use std::path::{Path, PathBuf};
use std::process::Command;
use std::time::{Duration, Instant};

use ndarray::{ArrayD, IxDyn};
use prost::Message;
use serde_json::{Value, json};
use shunt::audit::{self, AuditConfig};
use shunt::load::ExternalData;
use shunt::open::OpenConfig;
use shunt::probe::Progress;
use shunt::probe::inputs::{self, InputConfig, Values};
use shunt_testkit::zoo::{self, ImageSpec, ResNetConfig};
use tract_onnx::prelude::*;
use tract_onnx::tract_core::plan::{SimpleState, eval};

const BATCH: usize = 8;
const RUNS: usize = 3;
/// Rounds of the three children, interleaved against drifts of the machine.
const ROUNDS: usize = 3;
/// The phases of an audit, in order.
const PHASES: [&str; 4] = [
    "scan (load + analyse)",
    "tract parse + optimise + plan",
    "run with statistics",
    "report and findings",
];

fn bench_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("target").join("bench")
}

/// The audit's configuration as the command line builds it by default,
/// but on one thread with the whole batch in one pass, like the plain
/// forward it is compared with (benches/peers.py and benches/threads.py
/// measure the command line's own defaults).
fn audit_config() -> AuditConfig {
    AuditConfig {
        open: OpenConfig::standard(),
        inputs: InputConfig { max_pass: None, ..InputConfig::standard(BATCH) },
        findings: shunt::findings::FindingConfig::STANDARD,
        influence: None,
        budget: shunt::parallel::Budget::ONE_THREAD,
        headroom: shunt::findings::HeadroomConfig::STANDARD,
    }
}

/// `VmHWM` and `VmRSS` of this process, in MiB.
fn memory() -> (f64, f64) {
    let status = std::fs::read_to_string("/proc/self/status").unwrap_or_default();
    let field = |key: &str| {
        status
            .lines()
            .find_map(|l| l.strip_prefix(key))
            .and_then(|v| v.trim().trim_end_matches("kB").trim().parse::<f64>().ok())
            .map_or(f64::NAN, |kb| kb / 1024.0)
    };
    (field("VmHWM:"), field("VmRSS:"))
}

/// Time this thread has spent on a CPU, in seconds (tract runs on this one
/// thread); other processes on a busy machine disturb it less than the wall
/// clock.
fn cpu() -> f64 {
    let s = std::fs::read_to_string("/proc/thread-self/schedstat").unwrap_or_default();
    s.split_whitespace().next().and_then(|v| v.parse::<f64>().ok()).unwrap_or(f64::NAN) / 1e9
}

fn secs(d: Duration) -> f64 {
    d.as_secs_f64()
}

fn median(v: &[f64]) -> f64 {
    let mut s = v.to_vec();
    s.sort_by(f64::total_cmp);
    s[s.len() / 2]
}

fn input_tensor() -> TValue {
    let a: ArrayD<f32> =
        ndarray_npy::read_npy(bench_dir().join("resnet50_input.npy")).expect("read the input");
    let shape = a.shape().to_vec();
    let data: Vec<f32> = a.into_iter().collect();
    Tensor::from_shape(&shape, &data).expect("a tensor").into_tvalue()
}

fn input_fact() -> InferenceFact {
    InferenceFact::dt_shape(f32::datum_type(), [BATCH, 3, 224, 224])
}

type Plan = Arc<TypedRunnableModel>;

/// tract's ONNX loader as the probe sets it up: `value_info` names a symbolic
/// batch that the concrete input fact contradicts, so tract infers shapes.
fn onnx() -> tract_onnx::Onnx {
    tract_onnx::onnx().with_ignore_value_info(true)
}

fn plain_plan(path: &Path) -> TractResult<Plan> {
    onnx().model_for_path(path)?.with_input_fact(0, input_fact())?.into_optimized()?.into_runnable()
}

/// The probe's recipe (see `src/probe/mod.rs`) without any statistics.
fn recipe_plan(path: &Path, names: &[String]) -> TractResult<(Plan, HashSet<(usize, usize)>)> {
    let onnx = onnx();
    let proto = onnx.proto_model_for_path(path)?;
    let dir = path.parent().and_then(Path::to_str);
    let parsed = onnx.parse(&proto, dir)?;
    drop(proto);
    let mut model = parsed.model;
    model.set_input_fact(0, input_fact())?;
    let originals = model.output_outlets()?.to_vec();
    let mut outs = originals.clone();
    for n in names {
        outs.push(*parsed.outlets_by_name.get(n).expect("a watched tensor"));
    }
    model.select_output_outlets(&outs)?;
    let mut typed = model.into_optimized()?;
    let finals = typed.output_outlets()?.to_vec();
    let watched = finals[originals.len()..].iter().map(|o| (o.node, o.slot)).collect();
    typed.select_output_outlets(&finals[..originals.len()])?;
    Ok((typed.into_runnable()?, watched))
}

/// Names of every watched tensor of the model, as the audit picks them.
fn watched_names(path: &Path) -> Vec<String> {
    let cfg = OpenConfig::standard();
    let loaded = shunt::load::load(path, &cfg.load).expect("load");
    let analysis = shunt::open::analyse(loaded.model, loaded.external, &cfg).expect("analyse");
    let mut names: Vec<String> = Vec::new();
    for w in shunt::measure::watches(&analysis) {
        names.push(w.fork);
        names.push(w.shortcut);
        names.extend(w.branch);
        names.push(w.output);
    }
    names
}

fn run_eval_noop(
    state: &mut SimpleState<TypedFact, Box<dyn TypedOp>>,
    watched: &HashSet<(usize, usize)>,
    input: TValue,
) {
    let out = state
        .run_plan_with_eval(tvec![input], |ctx, op_state, node, ins| -> TractResult<TVec<TValue>> {
            let out = eval(ctx, op_state, node, ins)?;
            for (slot, value) in out.iter().enumerate() {
                if watched.contains(&(node.id, slot)) {
                    std::hint::black_box(value);
                }
            }
            Ok(out)
        })
        .expect("run");
    std::hint::black_box(out);
}

fn child_plain(path: &Path) -> Value {
    let (start, c) = (Instant::now(), cpu());
    let plan = plain_plan(path).expect("a plain plan");
    let prepare = secs(start.elapsed());
    let prepare_cpu = cpu() - c;
    let (hwm_prepared, rss_prepared) = memory();
    let input = input_tensor();
    let mut state = SimpleState::new(&plan).expect("a state");
    let (mut runs, mut runs_cpu) = (Vec::new(), Vec::new());
    let mut hwm_first_run = 0.0;
    for i in 0..=RUNS {
        let t = input.clone();
        let (start, c) = (Instant::now(), cpu());
        std::hint::black_box(state.run(tvec![t]).expect("run"));
        if i == 0 {
            hwm_first_run = memory().0;
        } else {
            runs.push(secs(start.elapsed()));
            runs_cpu.push(cpu() - c);
        }
    }
    json!({
        "prepare_s": prepare,
        "prepare_cpu_s": prepare_cpu,
        "run_s": runs,
        "run_cpu_s": runs_cpu,
        "rss_prepared_mib": rss_prepared,
        "hwm_prepared_mib": hwm_prepared,
        "hwm_first_run_mib": hwm_first_run,
        "hwm_end_mib": memory().0,
    })
}

fn child_recipe(path: &Path) -> Value {
    let names = watched_names(path);
    let plain = plain_plan(path).expect("a plain plan");
    let start = Instant::now();
    let (recipe, watched) = recipe_plan(path, &names).expect("the recipe's plan");
    let prepare = secs(start.elapsed());
    let mut plain_state = SimpleState::new(&plain).expect("a state");
    let mut recipe_state = SimpleState::new(&recipe).expect("a state");
    let none = HashSet::new();
    let input = input_tensor();
    let config = audit_config();
    let (mut a, mut b, mut c) = (Vec::new(), Vec::new(), Vec::new());
    let (mut d, mut e) = (Vec::new(), Vec::new());
    for i in 0..=RUNS {
        let t0 = cpu();
        std::hint::black_box(plain_state.run(tvec![input.clone()]).expect("run"));
        let t1 = cpu();
        run_eval_noop(&mut plain_state, &none, input.clone());
        let t2 = cpu();
        run_eval_noop(&mut recipe_state, &watched, input.clone());
        let t3 = cpu();
        let clock = Clock::default();
        std::hint::black_box(audit::audit_file(path, &config, &clock).expect("audit"));
        let t4 = cpu();
        if i > 0 {
            a.push(t1 - t0);
            b.push(t2 - t1);
            c.push(t3 - t2);
            d.push(t4 - t3);
            let marks = clock.marks.borrow();
            let at = |name: &str| marks.iter().find(|m| m.0 == name).expect("a step").2;
            e.push(at("finished") - at("running"));
        }
    }
    json!({
        "watched_names": names.len(),
        "watched_outlets": watched.len(),
        "recipe_prepare_s": prepare,
        "plain_run_cpu_s": a,
        "plain_eval_noop_cpu_s": b,
        "recipe_eval_noop_cpu_s": c,
        "audit_cpu_s": d,
        "audit_run_cpu_s": e,
    })
}

/// A step's name, when it started (wall and CPU), and `VmHWM`, `VmRSS` then.
type Mark = (String, Instant, f64, f64, f64);

/// A [`Progress`] that records when each step starts, and the memory then.
#[derive(Default)]
struct Clock {
    marks: RefCell<Vec<Mark>>,
}

impl Progress for Clock {
    fn step(&self, message: &str, _: u64) {
        let (hwm, rss) = memory();
        self.marks.borrow_mut().push((message.to_owned(), Instant::now(), cpu(), hwm, rss));
    }
    fn advance(&self) {}
    fn finish(&self) {
        let (hwm, rss) = memory();
        self.marks.borrow_mut().push(("finished".to_owned(), Instant::now(), cpu(), hwm, rss));
    }
}

fn child_audit(path: &Path) -> Value {
    let config = audit_config();
    let (mut totals, mut totals_cpu) = (Vec::new(), Vec::new());
    let mut phases: BTreeMap<&str, Vec<f64>> = BTreeMap::new();
    let mut phases_cpu: BTreeMap<&str, Vec<f64>> = BTreeMap::new();
    let mut memory_marks = Value::Null;
    let mut hwm_first = 0.0;
    for i in 0..=RUNS {
        let clock = Clock::default();
        let (start, start_cpu) = (Instant::now(), cpu());
        let outcome = audit::audit_file(path, &config, &clock).expect("audit");
        let (end, end_cpu) = (Instant::now(), cpu());
        assert!(outcome.run_error.is_none(), "the run failed: {:?}", outcome.run_error);
        std::hint::black_box(&outcome);
        let marks = clock.marks.borrow();
        let at = |name: &str| {
            let m = marks.iter().find(|m| m.0 == name).expect("a step");
            (m.1, m.2)
        };
        let steps = [at("preparing the model"), at("running"), at("finished")];
        if i == 0 {
            hwm_first = memory().0;
            memory_marks = marks
                .iter()
                .map(|(m, _, _, hwm, rss)| json!({"at": m, "hwm_mib": hwm, "rss_mib": rss}))
                .collect();
            continue;
        }
        totals.push(secs(end - start));
        totals_cpu.push(end_cpu - start_cpu);
        let bounds_wall = [start, steps[0].0, steps[1].0, steps[2].0, end];
        let bounds_cpu = [start_cpu, steps[0].1, steps[1].1, steps[2].1, end_cpu];
        for (k, name) in PHASES.iter().enumerate() {
            phases.entry(name).or_default().push(secs(bounds_wall[k + 1] - bounds_wall[k]));
            phases_cpu.entry(name).or_default().push(bounds_cpu[k + 1] - bounds_cpu[k]);
        }
    }
    json!({
        "total_s": totals,
        "total_cpu_s": totals_cpu,
        "phases_s": phases,
        "phases_cpu_s": phases_cpu,
        "hwm_first_audit_mib": hwm_first,
        "hwm_end_mib": memory().0,
        "memory_at_steps": memory_marks,
    })
}

fn child(args: &[String]) {
    let path = PathBuf::from(&args[1]);
    let result = match args[0].as_str() {
        "plain" => child_plain(&path),
        "recipe" => child_recipe(&path),
        "audit" => child_audit(&path),
        other => panic!("unknown variant {other}"),
    };
    println!("RESULT {result}");
}

fn spawn(variant: &str, path: &Path) -> Value {
    let exe = std::env::current_exe().expect("this binary");
    let out =
        Command::new(exe).arg("--child").arg(variant).arg(path).output().expect("run a child");
    let stdout = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "child {variant} failed: {}\n{stdout}",
        String::from_utf8_lossy(&out.stderr)
    );
    let line = stdout.lines().find_map(|l| l.strip_prefix("RESULT ")).expect("a result line");
    serde_json::from_str(line).expect("a JSON result")
}

fn floats(v: &Value) -> Vec<f64> {
    v.as_array().map(|a| a.iter().filter_map(Value::as_f64).collect()).unwrap_or_default()
}

fn f(v: &Value, key: &str) -> f64 {
    v[key].as_f64().unwrap_or(f64::NAN)
}

/// Writes the model and the audit's own input batch; returns the model's path.
fn prepare_files() -> PathBuf {
    let dir = bench_dir();
    std::fs::create_dir_all(&dir).expect("create target/bench");
    let mut cfg = ResNetConfig::resnet50();
    cfg.width_divisor = 1;
    cfg.image = ImageSpec::rgb(224);
    cfg.image.classes = 1000;
    let model = zoo::resnet(&cfg);
    let bytes = model.encode_to_vec();
    let path = dir.join("resnet50.onnx");
    std::fs::write(&path, &bytes).expect("write the model");

    let config = audit_config();
    let analysis =
        shunt::open::analyse(model, ExternalData::none(), &config.open).expect("analyse the model");
    let specs = inputs::input_specs(&analysis.graph);
    let input_plan = inputs::plan(&specs, &config.inputs).expect("an input plan");
    assert_eq!(
        (input_plan.passes, input_plan.pass_batch),
        (1, BATCH),
        "one pass of the whole batch"
    );
    let values = inputs::values(&input_plan, 0);
    let Values::F32(data) = &values[0] else { panic!("a float input") };
    let shape: Vec<usize> = input_plan.inputs[0].pass_shape.iter().map(|&d| d as usize).collect();
    let array = ArrayD::from_shape_vec(IxDyn(&shape), data.clone()).expect("an array");
    ndarray_npy::write_npy(dir.join("resnet50_input.npy"), &array).expect("write the input");
    println!(
        "model: {} ({:.1} MB), {} blocks watched; input {:?} written beside it",
        path.display(),
        bytes.len() as f64 / 1e6,
        analysis.detection.blocks.len(),
        shape,
    );
    path
}

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    if let Some(i) = args.iter().position(|a| a == "--child") {
        child(&args[i + 1..]);
        return;
    }
    let path = prepare_files();
    if args.iter().any(|a| a == "--prepare") {
        // Only the files, for interleaving children of two builds by hand.
        println!("{}", path.display());
        return;
    }

    let (mut plain, mut recipe, mut audits) = (Vec::new(), Vec::new(), Vec::new());
    for round in 0..ROUNDS {
        eprintln!("round {} of {ROUNDS}: plain, recipe, audit", round + 1);
        plain.push(spawn("plain", &path));
        recipe.push(spawn("recipe", &path));
        audits.push(spawn("audit", &path));
    }
    let all = |v: &[Value], key: &str| v.iter().flat_map(|r| floats(&r[key])).collect::<Vec<_>>();
    let one = |v: &[Value], key: &str| median(&v.iter().map(|r| f(r, key)).collect::<Vec<_>>());

    let min = |v: &[f64]| v.iter().copied().fold(f64::INFINITY, f64::min);
    let plain_run = median(&all(&plain, "run_s"));
    let plain_run_cpu = median(&all(&plain, "run_cpu_s"));
    let plain_prepare = one(&plain, "prepare_s");
    let plain_prepare_cpu = one(&plain, "prepare_cpu_s");
    let audit_total = median(&all(&audits, "total_s"));
    let audit_total_cpu = median(&all(&audits, "total_cpu_s"));
    println!(
        "\nResNet-50, batch {BATCH}, 224x224, one thread; medians over {ROUNDS} child processes x {RUNS} runs"
    );
    println!(
        "\n| variant | wall median (s) | wall min (s) | CPU median (s) | peak memory, VmHWM (MiB) |"
    );
    println!("|---|---:|---:|---:|---:|");
    println!(
        "| tract plain forward (run only) | {:.3} | {:.3} | {:.3} | {:.0} |",
        plain_run,
        min(&all(&plain, "run_s")),
        plain_run_cpu,
        one(&plain, "hwm_first_run_mib"),
    );
    println!(
        "| tract load + optimise + plan | {:.3} | | {:.3} | {:.0} (after preparing) |",
        plain_prepare,
        plain_prepare_cpu,
        one(&plain, "hwm_prepared_mib"),
    );
    println!(
        "| shunt audit_file end to end | {:.3} | {:.3} | {:.3} | {:.0} |",
        audit_total,
        min(&all(&audits, "total_s")),
        audit_total_cpu,
        one(&audits, "hwm_first_audit_mib"),
    );
    println!(
        "\naudit / plain forward (run only): {:.2}x wall, {:.2}x CPU; \
         audit / (load + optimise + run): {:.2}x wall, {:.2}x CPU",
        audit_total / plain_run,
        audit_total_cpu / plain_run_cpu,
        audit_total / (plain_run + plain_prepare),
        audit_total_cpu / (plain_run_cpu + plain_prepare_cpu),
    );

    println!("\naudit phases (median s, wall / CPU):");
    let phase = |key: &str, k: &str| {
        median(&audits.iter().flat_map(|r| floats(&r[key][k])).collect::<Vec<_>>())
    };
    for k in PHASES {
        println!("  {k:32} {:.3} / {:.3}", phase("phases_s", k), phase("phases_cpu_s", k));
    }
    let run_stats = phase("phases_cpu_s", PHASES[2]);
    println!("  run with statistics / plain run (CPU): {:.2}x", run_stats / plain_run_cpu);
    println!("  memory at the audit's steps (first audit): {}", audits[0]["memory_at_steps"]);

    let pr = median(&all(&recipe, "plain_run_cpu_s"));
    let pe = median(&all(&recipe, "plain_eval_noop_cpu_s"));
    let re = median(&all(&recipe, "recipe_eval_noop_cpu_s"));
    println!(
        "\nin one process, interleaved, CPU time ({} watched names on {} outlets):",
        recipe[0]["watched_names"], recipe[0]["watched_outlets"]
    );
    println!("  plain plan, state.run                 {pr:.3} s");
    println!(
        "  plain plan, eval callback (no-op)     {pe:.3} s ({:+.1}%)",
        100.0 * (pe / pr - 1.0)
    );
    println!(
        "  recipe plan, eval callback (no-op)    {re:.3} s ({:+.1}%)",
        100.0 * (re / pr - 1.0)
    );
    let ad = median(&all(&recipe, "audit_cpu_s"));
    let ar = median(&all(&recipe, "audit_run_cpu_s"));
    println!(
        "  audit_file, its run with statistics   {ar:.3} s ({:+.1}%)",
        100.0 * (ar / pr - 1.0)
    );
    println!("  audit_file end to end                 {ad:.3} s ({:.2}x the plain run)", ad / pr);
    println!("  recipe load + optimise + plan (wall)  {:.3} s", one(&recipe, "recipe_prepare_s"));
    println!("\nraw results: plain {plain:?}\nrecipe {recipe:?}\naudit {audits:?}");
}
