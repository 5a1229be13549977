//! Builders for small ONNX models used by shunt's tests, fixtures,
//! benchmarks and fuzz targets. A workspace member of its own, used only as a
//! dev-dependency: none of it ships in the `shunt` library.
//!
//! [`builder`] writes graphs op by op on the prost types of [`shunt::proto`],
//! [`zoo`] assembles whole architectures from it, and [`fixtures`] lists the
//! models committed under `fixtures/` with the census each one should give
//! ([`structure`]: the cases of issue 15, under `fixtures/structure/`;
//! [`precision`]: the range cases of issue 14, under `fixtures/precision/`).
//! Everything here is deterministic: the same calls give the same bytes.

pub mod builder;
pub mod fixtures;
pub mod large;
pub mod precision;
pub mod structure;
pub mod surgery;
pub mod zoo;

pub use builder::{
    Attention, Attr, BatchNorm, Conv, Dim, Form, Init, ModelBuilder, reorder_nodes,
    strip_node_names, strip_value_info,
};
