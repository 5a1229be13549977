//! Text helpers shared by every renderer: names from a model made safe for
//! a terminal, counts in words, numbers for people, the signature of a
//! learned layer.

use crate::report::LayerRow;

/// The arrow of a layer signature in pin files (plain ASCII, stable).
pub const ARROW_ASCII: &str = "->";
/// The arrow of a layer signature in tables and pages.
pub const ARROW: &str = "→";

/// Makes a name from a model safe for a terminal: control characters,
/// escape sequences and bidirectional overrides become visible `\u{..}` escapes.
pub fn terminal_safe(s: &str) -> String {
    let mut out = String::with_capacity(s.len());
    for c in s.chars() {
        let bidi = matches!(c, '\u{202a}'..='\u{202e}' | '\u{2066}'..='\u{2069}' | '\u{200e}' | '\u{200f}');
        if c.is_control() || bidi {
            out.push_str(&format!("\\u{{{:x}}}", c as u32));
        } else {
            out.push(c);
        }
    }
    out
}

/// A block's place inside control flow in words, outermost first:
/// `If 'switch' then_branch › Scan 'rnn' body` (empty in the main graph).
pub fn scope_path(scope: &[super::ScopeRow]) -> String {
    let steps: Vec<String> = scope
        .iter()
        .map(|s| format!("{} '{}' {}", s.op_type, terminal_safe(&s.node), s.attribute))
        .collect();
    steps.join(" › ")
}

/// `1 block`, `3 blocks`.
pub fn plural(n: usize, word: &str) -> String {
    if n == 1 { format!("1 {word}") } else { format!("{n} {word}s") }
}

/// Three significant digits near 1, scientific notation far from it.
pub fn num(v: f64) -> String {
    if v == 0.0 {
        return "0".to_owned();
    }
    if !v.is_finite() {
        return format!("{v}");
    }
    let a = v.abs();
    if (1e-3..1e4).contains(&a) {
        let decimals = (2 - a.log10().floor() as i32).max(0) as usize;
        format!("{v:.decimals$}")
    } else {
        format!("{v:.2e}")
    }
}

/// The signature of a learned layer: kind, kernel, channels, groups, stride,
/// with `arrow` between input and output channels: `conv3x3 16->32 /2`,
/// `dw3x3 96`, `conv1x1 64->64 g4`, `fc 64->256`, `deconv2x2 32->16 /2`,
/// `lstm 64->128`. Gemm and MatMul are both `fc` (exporters and optimisers
/// turn one into the other); fused and quantised forms of a layer sign like
/// the plain one. Pins ([`ARROW_ASCII`]) and tables ([`ARROW`]) use this one
/// definition, so they name a layer the same way.
pub fn layer_signature(l: &LayerRow, arrow: &str) -> String {
    let ch = |c: Option<u64>| c.map_or("?".to_owned(), |c| c.to_string());
    let op = l.node.op_type.as_str();
    if matches!(op, "LSTM" | "GRU" | "RNN") {
        return format!("{} {}{arrow}{}", op.to_lowercase(), ch(l.in_channels), ch(l.out_channels));
    }
    if l.kernel.is_empty() {
        return format!("fc {}{arrow}{}", ch(l.in_channels), ch(l.out_channels));
    }
    let stride = l
        .strides
        .iter()
        .copied()
        .max()
        .filter(|&s| s > 1)
        .map_or(String::new(), |s| format!(" /{s}"));
    let k = l.kernel.iter().map(u64::to_string).collect::<Vec<_>>().join("x");
    let name = if op == "ConvTranspose" { "deconv" } else { "conv" };
    if l.groups > 1 && Some(l.groups) == l.in_channels {
        return format!("dw{k} {}{stride}", ch(l.in_channels));
    }
    let groups = if l.groups > 1 { format!(" g{}", l.groups) } else { String::new() };
    format!("{name}{k} {}{arrow}{}{groups}{stride}", ch(l.in_channels), ch(l.out_channels))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn signatures_name_kernel_channels_groups_and_stride() {
        let node = |op: &str| crate::report::NodeRef {
            name: "n".to_owned(),
            index: 0,
            op_type: op.to_owned(),
            lowered_from: None,
        };
        let l = |op: &str, kernel: Vec<u64>, i: u64, o: u64, s: Vec<i64>, g: u64| LayerRow {
            node: node(op),
            kernel,
            in_channels: Some(i),
            out_channels: Some(o),
            strides: s,
            groups: g,
        };
        let pin = |l: &LayerRow| layer_signature(l, ARROW_ASCII);
        assert_eq!(pin(&l("Conv", vec![3, 3], 16, 32, vec![2, 2], 1)), "conv3x3 16->32 /2");
        assert_eq!(pin(&l("QLinearConv", vec![3, 3], 16, 32, vec![2, 2], 1)), "conv3x3 16->32 /2");
        assert_eq!(pin(&l("Conv", vec![3, 3], 96, 96, vec![1, 1], 96)), "dw3x3 96");
        assert_eq!(pin(&l("Conv", vec![1, 1], 64, 64, vec![], 4)), "conv1x1 64->64 g4");
        assert_eq!(pin(&l("Gemm", vec![], 64, 256, vec![], 1)), "fc 64->256");
        assert_eq!(pin(&l("MatMul", vec![], 64, 256, vec![], 1)), "fc 64->256");
        // Tables and pins name a transposed convolution and a recurrent
        // layer alike (the table said `conv` and `fc` before they shared this).
        let up = l("ConvTranspose", vec![2, 2], 32, 16, vec![2, 2], 1);
        assert_eq!(pin(&up), "deconv2x2 32->16 /2");
        assert_eq!(layer_signature(&up, ARROW), "deconv2x2 32→16 /2");
        assert_eq!(layer_signature(&l("LSTM", vec![], 64, 128, vec![], 1), ARROW), "lstm 64→128");
    }
}
