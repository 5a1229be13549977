//! Wall-clock cost of `shunt scan` on big models, and where it goes.
//!
//! `cargo bench --bench scan`. Writes the models to `target/bench/scan/`, then
//! times, after one warm-up, ~10 runs each of decoding only (`load::load`) and
//! of the whole scan (`scan::scan_file`), and prints the median and minimum.
//! The second part checks that the cost of a scan grows linearly with depth
//! on 1001-, 2001- and 4001-layer pre-activation ResNets (333, 666 and 1332
//! blocks), step by step. The third scans a 7-billion-parameter decoder
//! whose 27 GB of weights sit in a sparse file in a temporary folder, in a
//! child process, and reports its wall time and peak memory (`VmHWM`).
//!
//! Times are wall clock: on the virtual machines this was written on, the
//! per-thread CPU clock in `/proc/thread-self/schedstat` advances in 4 ms
//! ticks, too coarse for steps of a few ms. The minimum over the runs is
//! the figure least disturbed by other processes.
#![allow(clippy::print_stdout, clippy::print_stderr)]

use std::path::Path;
use std::time::{Duration, Instant};

use prost::Message;
use shunt::classify;
use shunt::graph::{self, Dominance};
use shunt::open::OpenConfig;
use shunt::proto::ModelProto;
use shunt::proto::tensor_proto::DataType;
use shunt::residual;
use shunt::scan;
use shunt_testkit::large::{self, DecoderConfig};
use shunt_testkit::zoo::{self, ImageSpec, PreActConfig, ResNetConfig};

const RUNS: usize = 10;

/// Median and minimum wall-clock time.
struct Timing {
    wall: (Duration, Duration),
}

/// Times `runs` calls of `f` after one warm-up call.
fn time<T>(runs: usize, mut f: impl FnMut() -> T) -> Timing {
    std::hint::black_box(f());
    let mut wall: Vec<Duration> = (0..runs)
        .map(|_| {
            let start = Instant::now();
            std::hint::black_box(f());
            start.elapsed()
        })
        .collect();
    wall.sort();
    Timing { wall: (wall[runs / 2], wall[0]) }
}

fn ms(d: Duration) -> f64 {
    d.as_secs_f64() * 1e3
}

/// Number of float parameters and how many of the initializers keep their
/// payload in `raw_data` (as exporters write it) rather than `float_data`.
fn census(m: &ModelProto) -> (u64, usize, usize) {
    let g = m.graph.as_ref().expect("a graph");
    let mut params = 0u64;
    let mut raw = 0;
    for t in &g.initializer {
        if t.data_type == DataType::Float as i32 {
            params += t.dims.iter().product::<i64>() as u64;
        }
        if !t.raw_data.is_empty() {
            raw += 1;
        }
    }
    (params, raw, g.initializer.len())
}

struct Row {
    model: String,
    blocks: usize,
    nodes: usize,
    mb: f64,
    decode: Timing,
    scan: Timing,
}

fn measure(dir: &Path, name: &str, model: &ModelProto) -> Row {
    let file: String = name.split(' ').next().unwrap_or(name).to_owned();
    let path = dir.join(format!("{file}.onnx"));
    let bytes = model.encode_to_vec();
    std::fs::write(&path, &bytes).expect("write the model");
    let config = OpenConfig::standard();
    let report = scan::scan_file(&path, &config).expect("scan");
    let decode = time(RUNS, || shunt::load::load(&path, &config.load).expect("load"));
    let scan = time(RUNS, || scan::scan_file(&path, &config).expect("scan"));
    Row {
        model: name.to_owned(),
        blocks: report.blocks.len(),
        nodes: model.graph.as_ref().map_or(0, |g| g.node.len()),
        mb: bytes.len() as f64 / 1e6,
        decode,
        scan,
    }
}

/// Wall time of each step of one scan, minimum over `RUNS` runs (after a
/// warm-up), so a step whose cost grows faster than the graph shows.
fn phases(path: &Path) -> Vec<(&'static str, Duration)> {
    let config = OpenConfig::standard();
    let mut samples: Vec<Vec<(&'static str, Duration)>> = Vec::new();
    for _ in 0..=RUNS {
        let mut row = Vec::new();
        let mut mark = Instant::now();
        let mut lap = |row: &mut Vec<(&'static str, Duration)>, name: &'static str| {
            let now = Instant::now();
            row.push((name, now - mark));
            mark = now;
        };
        let loaded = shunt::load::load(path, &config.load).expect("load");
        lap(&mut row, "read + decode");
        let lowered =
            shunt::lower::lower(loaded.model, &loaded.external, &config.lower).expect("lower");
        lap(&mut row, "lower (nothing to rewrite)");
        let (g, _) = graph::build(lowered.model, loaded.external, &config.build).expect("build");
        lap(&mut row, "graph build");
        let dom = Dominance::compute(&g);
        lap(&mut row, "dominators");
        let detection = residual::find_blocks(&g, &dom);
        lap(&mut row, "find blocks");
        let kinds = classify::classify_all(&g, &detection.blocks, &config.classify);
        lap(&mut row, "classify");
        let (stages, stage_of) = classify::stages(&g, &detection.blocks);
        let runs = classify::bare_runs(&g, &detection.blocks, &stage_of);
        lap(&mut row, "stages + bare runs");
        drop((g, dom, detection, kinds, stages, stage_of, runs));
        lap(&mut row, "drop");
        samples.push(row);
    }
    samples.remove(0);
    (0..samples[0].len())
        .map(|i| {
            let least = samples.iter().map(|r| r[i].1).min().expect("runs");
            (samples[0][i].0, least)
        })
        .collect()
}

fn preact(n: usize) -> ModelProto {
    zoo::preact_resnet(&PreActConfig {
        n,
        stages: 3,
        bottleneck: true,
        normalisation: true,
        width_divisor: 4,
        image: ImageSpec::rgb(32),
    })
}

fn main() {
    let args: Vec<String> = std::env::args().collect();
    if let Some(i) = args.iter().position(|a| a == "--child-scan") {
        child_scan(Path::new(&args[i + 1]));
        return;
    }
    // Kept after the run so a model can be scanned again by hand, e.g.
    // `target/release/shunt scan target/bench/scan/preact-2001.onnx`.
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("target/bench/scan");
    std::fs::create_dir_all(&dir).expect("create target/bench/scan");

    let mut cfg = ResNetConfig::resnet50();
    cfg.width_divisor = 1;
    cfg.image = ImageSpec::rgb(224);
    cfg.image.classes = 1000;
    let resnet50 = zoo::resnet(&cfg);
    let (params, raw, inits) = census(&resnet50);
    println!(
        "ResNet-50 (full width, 224x224, 1000 classes): {:.3}M float parameters ({:.1} MB float32); \
         {raw} of {inits} initializers in raw_data",
        params as f64 / 1e6,
        params as f64 * 4.0 / 1e6,
    );

    let mut rows = vec![measure(&dir, "resnet50", &resnet50)];
    drop(resnet50);
    rows.push(measure(&dir, "preact-1001 (n=111)", &preact(111)));
    rows.push(measure(&dir, "preact-2001 (n=222)", &preact(222)));
    rows.push(measure(&dir, "preact-4001 (n=444)", &preact(444)));

    println!();
    println!(
        "| model | blocks | nodes | file MB | decode median / min (ms) | scan median / min (ms) \
         | decode share of scan (min) |"
    );
    println!("|---|---:|---:|---:|---:|---:|---:|");
    for r in &rows {
        println!(
            "| {} | {} | {} | {:.1} | {:.1} / {:.1} | {:.1} / {:.1} | {:.0}% |",
            r.model,
            r.blocks,
            r.nodes,
            r.mb,
            ms(r.decode.wall.0),
            ms(r.decode.wall.1),
            ms(r.scan.wall.0),
            ms(r.scan.wall.1),
            100.0 * r.decode.wall.1.as_secs_f64() / r.scan.wall.1.as_secs_f64(),
        );
    }
    println!();
    for w in rows[1..].windows(2) {
        let (a, b) = (&w[0], &w[1]);
        let ratio = |f: fn(&Row) -> Duration| f(b).as_secs_f64() / f(a).as_secs_f64();
        println!(
            "depth x{:.2} (blocks {} -> {}): scan min x{:.2}, median x{:.2}; decode min x{:.2} \
             (2.00 = linear)",
            b.nodes as f64 / a.nodes as f64,
            a.blocks,
            b.blocks,
            ratio(|r| r.scan.wall.1),
            ratio(|r| r.scan.wall.0),
            ratio(|r| r.decode.wall.1),
        );
    }

    println!();
    println!("Wall time per step of a scan (minimum of {RUNS}, ms):");
    let deep: Vec<(String, Vec<(&str, Duration)>)> = ["preact-1001", "preact-2001", "preact-4001"]
        .iter()
        .map(|f| (f.to_string(), phases(&dir.join(format!("{f}.onnx")))))
        .collect();
    let total: Vec<f64> =
        deep.iter().map(|(_, p)| p.iter().map(|s| ms(s.1)).sum::<f64>()).collect();
    print!("| step |");
    for (name, _) in &deep {
        print!(" {name} |");
    }
    println!(" x per doubling |");
    println!("|---|{}---:|", "---:|".repeat(deep.len()));
    for i in 0..deep[0].1.len() {
        print!("| {} |", deep[0].1[i].0);
        for (_, p) in &deep {
            print!(" {:.1} |", ms(p[i].1));
        }
        let ratios: Vec<String> = deep
            .windows(2)
            .map(|w| format!("{:.2}", w[1].1[i].1.as_secs_f64() / w[0].1[i].1.as_secs_f64()))
            .collect();
        println!(" {} |", ratios.join(", "));
    }
    print!("| sum of steps |");
    for t in &total {
        print!(" {t:.1} |");
    }
    let ratios: Vec<String> = total.windows(2).map(|w| format!("{:.2}", w[1] / w[0])).collect();
    println!(" {} |", ratios.join(", "));

    lowering_every_activation(&dir);
    decoder_7b();
}

/// The lowering step when it has the most to do: every ReLU of the deepest
/// model turned into a contrib `QuickGelu` (not the same function; only the
/// rewrite's cost is timed), so every block gets rewritten nodes.
fn lowering_every_activation(dir: &Path) {
    let config = OpenConfig::standard();
    let loaded = shunt::load::load(&dir.join("preact-4001.onnx"), &config.load).expect("load");
    let mut model = loaded.model;
    let mut rewritten = 0;
    for n in &mut model.graph.as_mut().expect("a graph").node {
        if n.op_type == "Relu" {
            n.op_type = "QuickGelu".to_owned();
            n.domain = "com.microsoft".to_owned();
            rewritten += 1;
        }
    }
    let t = time(RUNS, || {
        shunt::lower::lower(model.clone(), &loaded.external, &config.lower).expect("lower")
    });
    let copy = time(RUNS, || model.clone());
    println!();
    println!(
        "Lowering preact-4001 with all {rewritten} ReLUs as com.microsoft.QuickGelu: median {:.1} ms, \
         minimum {:.1} ms (of which cloning the model for the timing loop: minimum {:.1} ms)",
        ms(t.wall.0),
        ms(t.wall.1),
        ms(copy.wall.1)
    );
}

/// Scans the 7-billion-parameter decoder in child processes of this binary;
/// each prints its wall time and `VmHWM`.
fn decoder_7b() {
    let dir = tempfile::Builder::new().prefix("shunt-bench-").tempdir().expect("a temp folder");
    let cfg = DecoderConfig::seven_billion();
    let (path, weights) = large::write_decoder(dir.path(), "decoder-7b", &cfg).expect("write");
    let model_bytes = std::fs::metadata(&path).expect("model file").len();
    println!();
    println!(
        "decoder, 32 layers, width 4096: {:.2}G float parameters, weight file {:.1} GB (sparse), \
         model file {:.1} MB",
        cfg.external_parameters() as f64 / 1e9,
        weights as f64 / 1e9,
        model_bytes as f64 / 1e6
    );
    let exe = std::env::current_exe().expect("this binary");
    let mut rows: Vec<(f64, f64, u64)> = (0..RUNS)
        .map(|_| {
            let out = std::process::Command::new(&exe)
                .arg("--child-scan")
                .arg(&path)
                .output()
                .expect("the child runs");
            let text = String::from_utf8_lossy(&out.stdout);
            let mut it = text.split_whitespace().map(|v| v.parse::<f64>().expect("a number"));
            let (wall, hwm, blocks) = (
                it.next().expect("wall"),
                it.next().expect("hwm"),
                it.next().expect("blocks") as u64,
            );
            (wall, hwm, blocks)
        })
        .collect();
    rows.sort_by(|a, b| a.0.total_cmp(&b.0));
    let hwm = rows.iter().map(|r| r.1).fold(0.0, f64::max);
    println!(
        "scan in a child process, {RUNS} runs: wall median {:.1} ms, min {:.1} ms; \
         peak memory (VmHWM, largest) {hwm:.1} MiB; {} blocks",
        rows[RUNS / 2].0 * 1e3,
        rows[0].0 * 1e3,
        rows[0].2
    );
}

/// The child of [`decoder_7b`]: scans, then prints its wall time (s), its
/// `VmHWM` (MiB) and the number of blocks found.
fn child_scan(path: &Path) {
    let start = Instant::now();
    let report = scan::scan_file(path, &OpenConfig::standard()).expect("scan");
    let wall = start.elapsed().as_secs_f64();
    let status = std::fs::read_to_string("/proc/self/status").unwrap_or_default();
    let hwm_kb: f64 = status
        .lines()
        .find_map(|l| l.strip_prefix("VmHWM:"))
        .and_then(|v| v.trim().trim_end_matches("kB").trim().parse().ok())
        .unwrap_or(f64::NAN);
    println!("{wall} {} {}", hwm_kb / 1024.0, report.blocks.len());
}
