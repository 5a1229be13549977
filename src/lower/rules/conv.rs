//! Fused and blocked-layout convolutions (onnxruntime's `com.microsoft`
//! FusedConv, the `com.microsoft.nchwc` domain) and normalisations whose
//! statistics are computed in the graph.

use crate::lower::Rule;

pub(super) const RULES: &[(&str, &str, Rule)] = &[];
