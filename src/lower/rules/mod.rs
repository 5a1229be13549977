//! The rules, one file per family of operators. Each family lists its
//! `(domain, op_type, rule)` entries in a `RULES` table; [`find`] looks a
//! node up in all of them.
//!
//! Which contrib operators exist, which are lowered and which are left
//! alone (and why) is recorded in DEVELOPERS.md ("Lowering").

mod conv;
mod quant;
mod transformer;

use std::collections::HashMap;

use super::Rule;

const FAMILIES: &[&[(&str, &str, Rule)]] = &[transformer::RULES, conv::RULES, quant::RULES];

/// The rule for an op, if one lowers it: one hash look-up per node.
pub(crate) fn find(domain: &str, op_type: &str) -> Option<Rule> {
    static TABLE: std::sync::LazyLock<HashMap<(&'static str, &'static str), Rule>> =
        std::sync::LazyLock::new(|| {
            FAMILIES.iter().flat_map(|f| f.iter()).map(|&(d, op, rule)| ((d, op), rule)).collect()
        });
    let domain = if domain == "ai.onnx" { "" } else { domain };
    TABLE.get(&(domain, op_type)).copied()
}

#[cfg(test)]
mod tests {
    use super::*;

    /// No two families claim the same operator, and every entry is found.
    #[test]
    fn one_rule_per_operator() {
        let all: Vec<(&str, &str)> =
            FAMILIES.iter().flat_map(|f| f.iter()).map(|&(d, op, _)| (d, op)).collect();
        let unique: std::collections::HashSet<_> = all.iter().collect();
        assert_eq!(unique.len(), all.len(), "an operator with two rules");
        assert!(all.len() >= 30, "{} rules", all.len());
        for (d, op) in all {
            assert!(find(d, op).is_some(), "{d}.{op}");
        }
        assert!(find("", "Conv").is_none() && find("com.microsoft", "Add").is_none());
        assert!(find("ai.onnx", "QLinearConv").is_some(), "ai.onnx is the default domain");
    }
}
