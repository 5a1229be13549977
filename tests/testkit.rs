//! The test-model builders themselves (the `shunt-testkit` crate): shape
//! inference, determinism, node reordering, the sparse large models.

use prost::Message;
use shunt::proto::ModelProto;
use shunt_testkit::builder::{Conv, Dim, ModelBuilder, reorder_nodes, reshape_dims, slice_len};
use shunt_testkit::large::{DecoderConfig, decoder};

fn tiny() -> ModelBuilder {
    let mut b = ModelBuilder::new("tiny", 17).emit_value_info(true);
    let x = b.input("x", &[Dim::batch(), 3.into(), 9.into(), 9.into()]);
    let y = b.conv("conv", &x, &Conv::new(4, 3).stride(2));
    let y = b.bn("bn", &y);
    let y = b.relu("relu", &y);
    let z = b.add("add", &y, &y);
    b.output(&z);
    b
}

#[test]
fn conv_output_size_follows_the_spec() {
    let b = tiny();
    // [O2] floor((9 + 1 + 1 - 1*(3 - 1) - 1) / 2) + 1 = 5.
    assert_eq!(
        b.shape("conv").unwrap(),
        &[Dim::batch(), Dim::Fixed(4), Dim::Fixed(5), Dim::Fixed(5)]
    );
}

#[test]
fn same_calls_give_same_bytes() {
    assert_eq!(tiny().finish().encode_to_vec(), tiny().finish().encode_to_vec());
}

#[test]
fn reshape_copies_symbolic_axes() {
    let x = [Dim::batch(), Dim::Fixed(8), Dim::Fixed(16)];
    let out = reshape_dims(&x, &[0, 0, 2, -1]).unwrap();
    assert_eq!(out, vec![Dim::batch(), Dim::Fixed(8), Dim::Fixed(2), Dim::Fixed(8)]);
}

#[test]
fn strided_slice_length() {
    assert_eq!(slice_len(16, 0, i64::MAX, 2), 8);
    assert_eq!(slice_len(15, 0, i64::MAX, 2), 8);
    assert_eq!(slice_len(8, 4, 8, 1), 4);
    assert_eq!(slice_len(8, -1, i64::MIN, -1), 8);
}

#[test]
fn reorder_keeps_a_topological_order() {
    let mut b = ModelBuilder::new("fan", 17);
    let x = b.input("x", &[Dim::Fixed(4)]);
    let parts: Vec<String> = (0..6).map(|k| b.relu(&format!("r{k}"), &x)).collect();
    let refs: Vec<&str> = parts.iter().map(String::as_str).collect();
    let s = b.sum("sum", &refs);
    b.output(&s);
    let model = b.finish();
    let mut shuffled = model.clone();
    reorder_nodes(&mut shuffled, 7);
    let names = |m: &ModelProto| {
        m.graph.as_ref().unwrap().node.iter().map(|n| n.name.clone()).collect::<Vec<_>>()
    };
    assert_ne!(names(&model), names(&shuffled));
    assert_eq!(names(&shuffled).last().unwrap(), "sum");
    let mut again = model.clone();
    reorder_nodes(&mut again, 7);
    assert_eq!(names(&again), names(&shuffled));
}

#[test]
fn external_file_holds_exactly_the_large_weights() {
    let cfg = DecoderConfig { layers: 2, hidden: 256, heads: 4, ffn: 1024, vocab: 512, seq_len: 8 };
    let (model, bytes) = decoder(&cfg, "w.bin");
    let g = model.graph.expect("a graph");
    let external: Vec<_> = g.initializer.iter().filter(|t| !t.external_data.is_empty()).collect();
    // 4 attention projections and 2 feed-forward layers per layer, the
    // embedding and the head.
    assert_eq!(external.len(), 2 * 6 + 2);
    let elements: u64 = external.iter().map(|t| t.dims.iter().product::<i64>() as u64).sum();
    assert_eq!(elements, cfg.external_parameters());
    assert!(external.iter().all(|t| t.raw_data.is_empty()));
    assert!(bytes >= elements * 4 && bytes < elements * 4 + 64 * external.len() as u64);
}

#[test]
fn seven_billion_counts() {
    // 32 * (4 * 4096^2 + 2 * 4096 * 16384) + 2 * 32000 * 4096.
    assert_eq!(DecoderConfig::seven_billion().external_parameters(), 6_704_594_944);
}
