//! Wall-clock cost of `shunt scan` on big models, and where it goes.
//!
//! `cargo bench --bench scan`. Writes the models to `target/bench/scan/`, then
//! times, after one warm-up, ~10 runs each of decoding only (`load::load`) and
//! of the whole scan (`scan::scan_file`), and prints the median and minimum.
//! The second half checks that the cost of a scan grows linearly with depth
//! on 1001- and 2001-layer pre-activation ResNets.
#![allow(clippy::print_stdout, clippy::print_stderr)]

use std::path::Path;
use std::time::{Duration, Instant};

use prost::Message;
use shunt::proto::ModelProto;
use shunt::proto::tensor_proto::DataType;
use shunt::scan::{self, ScanConfig};
use shunt::testkit::zoo::{self, ImageSpec, PreActConfig, ResNetConfig};

const RUNS: usize = 10;

/// Time this thread has spent on a CPU (the scan runs on one thread), which
/// other processes on a busy machine disturb less than the wall clock.
fn cpu_time() -> Duration {
    let s = std::fs::read_to_string("/proc/thread-self/schedstat").unwrap_or_default();
    Duration::from_nanos(s.split_whitespace().next().and_then(|v| v.parse().ok()).unwrap_or(0))
}

/// Median and minimum of wall-clock and of CPU time.
struct Timing {
    wall: (Duration, Duration),
    cpu: (Duration, Duration),
}

/// Times `runs` calls of `f` after one warm-up call.
fn time<T>(runs: usize, mut f: impl FnMut() -> T) -> Timing {
    std::hint::black_box(f());
    let (mut wall, mut cpu): (Vec<Duration>, Vec<Duration>) = (0..runs)
        .map(|_| {
            let (start, cpu) = (Instant::now(), cpu_time());
            std::hint::black_box(f());
            (start.elapsed(), cpu_time() - cpu)
        })
        .unzip();
    wall.sort();
    cpu.sort();
    Timing { wall: (wall[runs / 2], wall[0]), cpu: (cpu[runs / 2], cpu[0]) }
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
    let config = ScanConfig::standard();
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
        "| model | blocks | nodes | file MB | decode wall median / min (ms) | scan wall median / min (ms) \
         | decode CPU median (ms) | scan CPU median / min (ms) | decode share of scan (CPU) |"
    );
    println!("|---|---:|---:|---:|---:|---:|---:|---:|---:|");
    for r in &rows {
        println!(
            "| {} | {} | {} | {:.1} | {:.1} / {:.1} | {:.1} / {:.1} | {:.1} | {:.1} / {:.1} | {:.0}% |",
            r.model,
            r.blocks,
            r.nodes,
            r.mb,
            ms(r.decode.wall.0),
            ms(r.decode.wall.1),
            ms(r.scan.wall.0),
            ms(r.scan.wall.1),
            ms(r.decode.cpu.0),
            ms(r.scan.cpu.0),
            ms(r.scan.cpu.1),
            100.0 * r.decode.cpu.0.as_secs_f64() / r.scan.cpu.0.as_secs_f64(),
        );
    }
    println!();
    for w in rows[1..].windows(2) {
        let (a, b) = (&w[0], &w[1]);
        let ratio = |f: fn(&Row) -> Duration| f(b).as_secs_f64() / f(a).as_secs_f64();
        println!(
            "depth x{:.2} (blocks {} -> {}): scan CPU median x{:.2}, min x{:.2}; \
             decode CPU median x{:.2}; wall median x{:.2} (2.00 = linear)",
            b.nodes as f64 / a.nodes as f64,
            a.blocks,
            b.blocks,
            ratio(|r| r.scan.cpu.0),
            ratio(|r| r.scan.cpu.1),
            ratio(|r| r.decode.cpu.0),
            ratio(|r| r.scan.wall.0),
        );
    }
}
