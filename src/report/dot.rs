//! The block structure in the DOT language, for users who draw graphs
//! themselves: one node per fork and merge-output tensor, each branch
//! collapsed to a box listing its learned layers, the shortcut as an edge
//! labelled with its kind, and the stretches between blocks as dotted edges
//! (red with the layer count where a run of learned layers has no shortcut).

use std::io;

use crate::report::text::terminal_safe;
use crate::report::text::{ARROW, layer_signature};
use crate::report::{BlockRow, Report};

/// A DOT quoted string: control characters made visible, then `\` and `"`
/// escaped, so a name cannot end the string or smuggle a label escape.
pub fn quote(s: &str) -> String {
    let mut out = String::with_capacity(s.len() + 2);
    out.push('"');
    for c in terminal_safe(s).chars() {
        match c {
            '"' => out.push_str("\\\""),
            '\\' => out.push_str("\\\\"),
            c => out.push(c),
        }
    }
    out.push('"');
    out
}

/// Several lines of our own making, each escaped, joined by DOT's centred
/// line break.
fn lines(parts: &[String]) -> String {
    let inner: Vec<String> = parts
        .iter()
        .map(|p| {
            let q = quote(p);
            q[1..q.len() - 1].to_owned()
        })
        .collect();
    format!("\"{}\"", inner.join("\\n"))
}

fn tensor_id(name: &str) -> String {
    quote(&format!("tensor {name}"))
}

fn codes_of<'a>(r: &'a Report, b: &BlockRow) -> Vec<&'a str> {
    r.findings.iter().filter(|f| f.block == Some(b.id)).map(|f| f.code.as_str()).collect()
}

/// Renders the block structure of `r` as one DOT digraph.
pub fn render(r: &Report, out: &mut dyn io::Write) -> io::Result<()> {
    writeln!(out, "digraph shunt {{")?;
    let title = format!("{}: {} residual blocks", r.model.graph_name, r.summary.blocks);
    writeln!(
        out,
        "  graph [rankdir=TB, labelloc=t, fontname=\"sans-serif\", label={}];",
        quote(&title)
    )?;
    writeln!(out, "  node [fontname=\"sans-serif\", fontsize=10];")?;
    writeln!(out, "  edge [fontname=\"sans-serif\", fontsize=9];")?;
    let mut tensors: Vec<&str> = Vec::new();
    for b in &r.blocks {
        for t in [b.fork.as_str(), b.output.as_str()] {
            if !tensors.contains(&t) {
                tensors.push(t);
            }
        }
    }
    for t in &tensors {
        writeln!(out, "  {} [shape=ellipse, label={}];", tensor_id(t), quote(t))?;
    }
    for b in &r.blocks {
        let codes = codes_of(r, b);
        let mut label = vec![format!("#{} branch", b.id)];
        label.extend(b.branch.layers.iter().map(|l| layer_signature(l, ARROW)));
        if b.children > 0 {
            label.push(format!("holds {} block(s)", b.children));
        }
        if !codes.is_empty() {
            label.push(codes.join(", "));
        }
        let colour = if codes.is_empty() { "" } else { ", color=\"#D55E00\", penwidth=2" };
        writeln!(
            out,
            "  \"branch {}\" [shape=box, style=rounded, label={}{colour}];",
            b.id,
            lines(&label)
        )?;
        writeln!(
            out,
            "  \"merge {}\" [shape=circle, label=\"+\", xlabel={}];",
            b.id,
            quote(&format!("{} ({})", b.merge.name, b.merge.op_type))
        )?;
        writeln!(out, "  {} -> \"branch {}\";", tensor_id(&b.fork), b.id)?;
        writeln!(out, "  \"branch {0}\" -> \"merge {0}\";", b.id)?;
        let ops: Vec<&str> = b.shortcut.ops.iter().map(|o| o.op_type.as_str()).collect();
        let kind = if ops.is_empty() {
            b.shortcut.kind.to_string()
        } else {
            format!("{} ({})", b.shortcut.kind, ops.join("→"))
        };
        writeln!(
            out,
            "  {} -> \"merge {}\" [style=dashed, label={}];",
            tensor_id(&b.fork),
            b.id,
            quote(&kind)
        )?;
        writeln!(out, "  \"merge {}\" -> {};", b.id, tensor_id(&b.output))?;
    }
    // What lies between one top-level block and the next.
    let top: Vec<&BlockRow> = r.blocks.iter().filter(|b| b.parent.is_none()).collect();
    for pair in top.windows(2) {
        let (a, b) = (pair[0], pair[1]);
        if a.output == b.fork {
            continue;
        }
        match r.bare_runs.iter().find(|x| x.after_block == a.id && x.before_block == b.id) {
            Some(run) => writeln!(
                out,
                "  {} -> {} [style=dotted, color=\"#D55E00\", label={}];",
                tensor_id(&a.output),
                tensor_id(&b.fork),
                quote(&format!("{} learned layer(s), no shortcut", run.layers.len()))
            )?,
            None => writeln!(
                out,
                "  {} -> {} [style=dotted];",
                tensor_id(&a.output),
                tensor_id(&b.fork)
            )?,
        }
    }
    writeln!(out, "}}")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_cannot_leave_their_string() {
        assert_eq!(quote("a\"b"), "\"a\\\"b\"");
        assert_eq!(quote("x\\N"), "\"x\\\\N\"");
        assert_eq!(quote("l1\n} digraph"), "\"l1\\\\u{a}} digraph\"");
        assert_eq!(lines(&["a".into(), "b\"".into()]), "\"a\\nb\\\"\"");
    }
}
