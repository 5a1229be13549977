//! Quantised operators (the QOperator format: QLinear* and QGemm, dynamic
//! quantisation), lowered to DequantizeLinear → float op → QuantizeLinear,
//! the form of the QDQ format.

use crate::lower::Rule;

pub(super) const RULES: &[(&str, &str, Rule)] = &[];
