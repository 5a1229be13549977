//! Helpers of `benches/peers.py`, which compares `shunt audit` end to end
//! with the programs one would run instead on the same model and inputs.
//!
//! - `peers write DIR`: writes `DIR/resnet50.onnx` (full-width ResNet-50,
//!   224x224, 1000 classes, symbolic batch, weights in `raw_data`) and
//!   `DIR/input.npy`, the 8 samples `shunt audit` feeds by default (seed 0,
//!   normal), so every program sees the same batch.
//! - `peers tract MODEL INPUT.npy [THREADS]`: tract's plain forward pass as a
//!   program: load, optimise, run once on the batch, print the logits' sum;
//!   on one thread, or with tract's multithreaded kernels on `THREADS`.
#![allow(clippy::print_stdout, clippy::print_stderr)]

use std::path::Path;

use ndarray::{ArrayD, IxDyn};
use prost::Message;
use shunt::load::ExternalData;
use shunt::open::OpenConfig;
use shunt::probe::inputs::{self, InputConfig, Values};
use shunt_testkit::zoo::{self, ImageSpec, ResNetConfig};
use tract_onnx::prelude::*;

fn write(dir: &Path) {
    std::fs::create_dir_all(dir).expect("create the folder");
    let mut cfg = ResNetConfig::resnet50();
    cfg.width_divisor = 1;
    cfg.image = ImageSpec::rgb(224);
    cfg.image.classes = 1000;
    let model = zoo::resnet(&cfg);
    std::fs::write(dir.join("resnet50.onnx"), model.encode_to_vec()).expect("write the model");
    // The inputs exactly as the audit makes them by default.
    // All eight samples in one array (the audit's passes draw the same values).
    let config = InputConfig { max_pass: None, ..InputConfig::standard(8) };
    let analysis = shunt::open::analyse(model, ExternalData::none(), &OpenConfig::standard())
        .expect("analyse the model");
    let input_plan = inputs::plan(&inputs::input_specs(&analysis.graph), &config).expect("a plan");
    let values = inputs::values(&input_plan, 0);
    let Values::F32(data) = &values[0] else { panic!("a float input") };
    let shape: Vec<usize> = input_plan.inputs[0].pass_shape.iter().map(|&d| d as usize).collect();
    let array = ArrayD::from_shape_vec(IxDyn(&shape), data.clone()).expect("an array");
    ndarray_npy::write_npy(dir.join("input.npy"), &array).expect("write the input");
}

fn tract_forward(model: &Path, input: &Path, threads: usize) -> TractResult<()> {
    let a: ArrayD<f32> = ndarray_npy::read_npy(input).expect("read the input");
    let shape = a.shape().to_vec();
    let data: Vec<f32> = a.into_iter().collect();
    let x = Tensor::from_shape(&shape, &data)?;
    // `value_info` names a symbolic batch that the concrete input contradicts.
    let plan = tract_onnx::onnx()
        .with_ignore_value_info(true)
        .model_for_path(model)?
        .with_input_fact(0, InferenceFact::dt_shape(f32::datum_type(), &shape))?
        .into_optimized()?
        .into_runnable()?;
    let executor = if threads > 1 {
        tract_onnx::tract_core::tract_linalg::multithread::Executor::multithread(threads)
    } else {
        tract_onnx::tract_core::tract_linalg::multithread::Executor::SingleThread
    };
    let out = tract_onnx::tract_core::tract_linalg::multithread::multithread_tract_scope(
        executor,
        || plan.run(tvec![x.into_tvalue()]),
    )?;
    let view = out[0].try_as_plain_ram()?;
    let logits = view.as_slice::<f32>()?;
    println!("{} logits, sum {}", logits.len(), logits.iter().map(|&v| v as f64).sum::<f64>());
    Ok(())
}

fn main() {
    let args: Vec<String> = std::env::args().skip(1).collect();
    match args.iter().map(String::as_str).collect::<Vec<_>>().as_slice() {
        ["write", dir] => write(Path::new(dir)),
        ["tract", model, input] => {
            tract_forward(Path::new(model), Path::new(input), 1).expect("run")
        }
        ["tract", model, input, threads] => {
            let threads = threads.parse().expect("a thread count");
            tract_forward(Path::new(model), Path::new(input), threads).expect("run")
        }
        _ => {
            eprintln!("usage: peers write DIR | peers tract MODEL INPUT.npy [THREADS]");
            std::process::exit(2);
        }
    }
}
