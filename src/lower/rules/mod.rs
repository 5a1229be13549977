//! The rules, one file per family of operators. Each family lists its
//! `(domain, op_type, rule)` entries in a `RULES` table; [`find`] looks a
//! node up in all of them.
//!
//! Which contrib operators exist, which are lowered and which are left
//! alone (and why) is recorded in DEVELOPERS.md ("Lowering").

mod conv;
mod quant;
mod transformer;

use super::Rule;

const FAMILIES: &[&[(&str, &str, Rule)]] = &[transformer::RULES, conv::RULES, quant::RULES];

/// The rule for an op, if one lowers it.
pub(crate) fn find(domain: &str, op_type: &str) -> Option<Rule> {
    let domain = if domain == "ai.onnx" { "" } else { domain };
    FAMILIES
        .iter()
        .flat_map(|family| family.iter())
        .find(|(d, op, _)| *d == domain && *op == op_type)
        .map(|(_, _, rule)| *rule)
}
