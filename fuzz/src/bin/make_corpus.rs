//! Writes the seed corpus of the fuzz targets into `fuzz/corpus/`:
//! `cargo run --release --bin make_corpus` from `fuzz/`. The seeds are the
//! small committed fixtures, the single-operator models of the lowering
//! rules, tiny models built with the testkit (one per shape of dataflow the
//! scan knows), and small `.npy`/`.npz` feeds.
#![allow(clippy::print_stdout)]

// Linked for the coverage runtime that `cargo fuzz build` instruments every
// binary of this package with; its `main` is not used.
use libfuzzer_sys as _;
use std::fs;
use std::path::Path;

use ndarray::{ArrayD, IxDyn};
use ndarray_npy::{NpzWriter, WriteNpyExt};
use prost::Message;
use shunt::proto::ModelProto;
use shunt_testkit::builder::{Attr, Conv, Dim, ModelBuilder};

fn main() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let models = root.join("corpus/decode_scan");
    let feeds = root.join("corpus/npy_feed");
    fs::create_dir_all(&models).expect("corpus folder");
    fs::create_dir_all(&feeds).expect("corpus folder");

    let fixtures = root.join("../fixtures");
    let mut names: Vec<_> = fs::read_dir(&fixtures)
        .expect("fixtures")
        .filter_map(|e| e.ok())
        .filter(|e| e.path().extension().is_some_and(|x| x == "onnx"))
        .filter(|e| e.metadata().is_ok_and(|m| m.len() <= 12 * 1024))
        .map(|e| e.path())
        .collect();
    names.sort();
    for path in names {
        let name = path.file_stem().expect("a file name").to_string_lossy().into_owned();
        fs::copy(&path, models.join(format!("seed-fixture-{name}.onnx"))).expect("copy");
    }
    // One model per lowered operator (fixtures/transformed/ops): the
    // lowering rules see a node of their kind from the first input on.
    let ops = root.join("../fixtures/transformed/ops");
    let mut lowered: Vec<_> = fs::read_dir(&ops)
        .expect("fixtures/transformed/ops")
        .filter_map(|e| e.ok())
        .map(|e| e.path())
        .filter(|p| p.extension().is_some_and(|x| x == "onnx"))
        .collect();
    lowered.sort();
    for path in lowered {
        let name = path.file_stem().expect("a file name").to_string_lossy().into_owned();
        fs::copy(&path, models.join(format!("seed-lowered-{name}.onnx"))).expect("copy");
    }
    for (name, model) in tiny_models() {
        fs::write(models.join(format!("seed-{name}.onnx")), model.encode_to_vec()).expect("write");
    }

    let f32s = ArrayD::from_shape_vec(IxDyn(&[2, 3]), vec![0.5f32, -1.0, 2.0, 0.0, 1e-3, 7.0])
        .expect("shape");
    let i64s = ArrayD::from_shape_vec(IxDyn(&[2, 2]), vec![1i64, 0, 3, 9]).expect("shape");
    let bools = ArrayD::from_shape_vec(IxDyn(&[2, 1]), vec![true, false]).expect("shape");
    let f64s = ArrayD::from_shape_vec(IxDyn(&[1, 2]), vec![1.5f64, -2.5]).expect("shape");
    let npy = |name: &str, write: &dyn Fn(&mut Vec<u8>)| {
        let mut buf = Vec::new();
        write(&mut buf);
        fs::write(feeds.join(format!("seed-{name}.npy")), buf).expect("write");
    };
    npy("f32", &|b| f32s.write_npy(b).expect("npy"));
    npy("i64", &|b| i64s.write_npy(b).expect("npy"));
    npy("bool", &|b| bools.write_npy(b).expect("npy"));
    npy("f64", &|b| f64s.write_npy(b).expect("npy"));
    for compressed in [false, true] {
        let mut cursor = std::io::Cursor::new(Vec::new());
        {
            let mut npz = if compressed {
                NpzWriter::new_compressed(&mut cursor)
            } else {
                NpzWriter::new(&mut cursor)
            };
            npz.add_array("x", &f32s).expect("npz");
            npz.add_array("mask", &i64s).expect("npz");
            npz.finish().expect("npz");
        }
        let name = if compressed { "compressed" } else { "stored" };
        fs::write(feeds.join(format!("seed-{name}.npz")), cursor.into_inner()).expect("write");
    }
    println!("corpus written to {}", root.join("corpus").display());
}

/// Tiny models: two channels, 4x4 images, so every seed is a few hundred bytes.
fn tiny_models() -> Vec<(&'static str, ModelProto)> {
    let image =
        |b: &mut ModelBuilder| b.input("input", &[Dim::batch(), 2.into(), 4.into(), 4.into()]);
    let mut out = Vec::new();

    let mut b = ModelBuilder::new("identity_block", 17);
    let x = image(&mut b);
    let y = b.conv("conv1", &x, &Conv::new(2, 3));
    let y = b.relu("relu1", &y);
    let y = b.conv("conv2", &y, &Conv::new(2, 3));
    let y = b.add("add", &x, &y);
    let y = b.relu("relu2", &y);
    b.output(&y);
    out.push(("identity_block", b.finish()));

    let mut b = ModelBuilder::new("projection_block", 17);
    let x = image(&mut b);
    let s = b.conv("proj", &x, &Conv::new(4, 1).stride(2));
    let y = b.conv("conv1", &x, &Conv::new(4, 3).stride(2));
    let y = b.relu("relu1", &y);
    let y = b.add("add", &s, &y);
    b.output(&y);
    out.push(("projection_block", b.finish()));

    let mut b = ModelBuilder::new("concat_skip", 17);
    let x = image(&mut b);
    let y = b.conv("conv", &x, &Conv::new(2, 3));
    let y = b.concat("cat", &[&x, &y], 1);
    b.output(&y);
    out.push(("concat_skip", b.finish()));

    let mut b = ModelBuilder::new("gemm_block", 17);
    let x = b.input("x", &[Dim::batch(), 4.into()]);
    let y = b.gemm("fc", &x, 4, &shunt_testkit::builder::Init::HeNormal);
    let y = b.mul("gate", &x, &y);
    let y = b.add("add", &x, &y);
    b.output(&y);
    out.push(("gemm_block", b.finish()));

    let mut b = ModelBuilder::new("sum_two_branches", 17);
    let x = image(&mut b);
    let p = b.conv("a", &x, &Conv::new(2, 1));
    let q = b.conv("b", &x, &Conv::new(2, 3));
    let y = b.sum("sum", &[&x, &p, &q]);
    b.output(&y);
    out.push(("sum_two_branches", b.finish()));

    let mut b = ModelBuilder::new("unknown_op", 17);
    let x = image(&mut b);
    let y = b.conv("conv", &x, &Conv::new(2, 3));
    let z = b.node("Frobnicate", "frob", &[&y], &[("level", Attr::Int(3))]);
    let z = b.add("add", &x, &z);
    b.output(&z);
    out.push(("unknown_op", b.finish()));
    out
}
