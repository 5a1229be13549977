//! Builders for small ONNX models used by tests, fixtures and benchmarks.
//!
//! [`builder`] writes graphs op by op on the prost types of [`crate::proto`],
//! and [`zoo`] assembles whole architectures from it.
//! Everything here is deterministic: the same calls give the same bytes.

pub mod builder;
pub mod zoo;

pub use builder::{
    Attention, Attr, BatchNorm, Conv, Dim, Form, Init, ModelBuilder, reorder_nodes, strip_node_names,
    strip_value_info,
};
