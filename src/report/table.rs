//! The terminal table: one row per block, then a summary.

use std::io;

use comfy_table::{ContentArrangement, Table, TableComponent, presets};

use crate::report::{BlockRow, LayerRow, ScanReport};

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

/// A compact label for a learned layer: `conv3x3 8→16 /2`, `dw3x3 96`, `fc 64→256`.
pub fn layer_label(l: &LayerRow) -> String {
    let ch = |c: Option<u64>| c.map_or("?".to_owned(), |c| c.to_string());
    let stride = l.strides.iter().copied().max().filter(|&s| s > 1).map_or(String::new(), |s| format!(" /{s}"));
    if l.kernel.is_empty() {
        return format!("fc {}→{}", ch(l.in_channels), ch(l.out_channels));
    }
    let k = l.kernel.iter().map(u64::to_string).collect::<Vec<_>>().join("x");
    if l.groups > 1 && Some(l.groups) == l.in_channels {
        return format!("dw{k} {}{stride}", ch(l.in_channels));
    }
    let groups = if l.groups > 1 { format!(" g{}", l.groups) } else { String::new() };
    format!("conv{k} {}→{}{groups}{stride}", ch(l.in_channels), ch(l.out_channels))
}

fn shortcut_cell(b: &BlockRow) -> String {
    let ops: Vec<&str> = b.shortcut.ops.iter().map(|o| o.op_type.as_str()).collect();
    if ops.is_empty() { b.shortcut.kind.clone() } else { format!("{} ({})", b.shortcut.kind, ops.join("→")) }
}

fn notes_cell(b: &BlockRow) -> String {
    let mut notes = Vec::new();
    if let Some(d) = &b.static_dead {
        notes.push(format!("dead by construction: {} at {}", d.reason, terminal_safe(&d.node.name)));
    }
    if let Some(e) = &b.branch.end_scale {
        match (e.min, e.max) {
            (Some(lo), Some(hi)) if lo == hi => notes.push(format!("end scale {lo:.3e}")),
            (Some(lo), Some(hi)) => notes.push(format!("end scale {lo:.3e}..{hi:.3e}")),
            _ => notes.push("end scale (unread)".to_owned()),
        }
    }
    if b.branch.gates > 0 {
        notes.push(format!("{} gate(s)", b.branch.gates));
    }
    if let Some(p) = b.parent {
        notes.push(format!("inside #{p}"));
    }
    if b.children > 0 {
        notes.push(format!("long skip over {} block(s)", b.children));
    }
    notes.join("; ")
}

/// Renders a scan report as a table and a summary.
pub fn render_scan(r: &ScanReport, out: &mut dyn io::Write) -> io::Result<()> {
    let m = &r.model;
    writeln!(out, "{}", terminal_safe(&m.path))?;
    writeln!(
        out,
        "  graph '{}': {} nodes, {} parameters, IR {}, opset {}, made by {}",
        terminal_safe(&m.graph_name),
        m.nodes,
        m.parameters,
        m.ir_version,
        m.opsets.iter().find(|o| o.domain.is_empty() || o.domain == "ai.onnx").map_or("?".to_owned(), |o| o.version.to_string()),
        if m.producer.is_empty() { "an unnamed producer".to_owned() } else { terminal_safe(&m.producer) },
    )?;
    writeln!(out)?;
    if r.summary.plain {
        writeln!(out, "No residual merge and no concatenative skip: this is a plain network.")?;
    } else if !r.blocks.is_empty() {
        let mut t = Table::new();
        t.load_preset(presets::NOTHING).set_content_arrangement(ContentArrangement::Disabled);
        t.set_style(TableComponent::HeaderLines, '─').set_style(TableComponent::MiddleHeaderIntersections, '─');
        t.set_header(vec!["#", "stage", "merge", "shortcut", "placement", "branch", "notes"]);
        for b in &r.blocks {
            let stage = match (b.stage, &b.output_shape) {
                (Some(s), Some(shape)) => format!("{s} ({})", shape[1..].join("x")),
                _ => "unknown".to_owned(),
            };
            let layers: Vec<String> = b.branch.layers.iter().map(layer_label).collect();
            t.add_row(vec![
                b.id.to_string(),
                stage,
                terminal_safe(&b.merge.name),
                terminal_safe(&shortcut_cell(b)),
                b.placement.clone(),
                layers.join(", "),
                notes_cell(b),
            ]);
        }
        writeln!(out, "{t}")?;
    }
    let s = &r.summary;
    writeln!(out)?;
    let kinds = |m: &std::collections::BTreeMap<String, usize>| {
        if m.is_empty() { "none".to_owned() } else { m.iter().map(|(k, v)| format!("{k} {v}")).collect::<Vec<_>>().join(", ") }
    };
    writeln!(out, "residual blocks: {}", s.blocks)?;
    writeln!(out, "  shortcuts: {}", kinds(&s.by_shortcut))?;
    writeln!(out, "  placement: {}", kinds(&s.by_placement))?;
    writeln!(out, "stages: {}", r.stages.len())?;
    writeln!(out, "concatenative skips: {}", s.concat_skips)?;
    writeln!(out, "long skips: {}", s.long_skips)?;
    if s.static_dead > 0 {
        writeln!(out, "dead by construction: {}", s.static_dead)?;
    }
    for run in &r.bare_runs {
        let names: Vec<String> = run.layers.iter().map(|l| terminal_safe(&l.name)).collect();
        writeln!(
            out,
            "bare run between blocks #{} and #{}: {} learned layer(s) no shortcut spans ({}): a lost shortcut?",
            run.after_block,
            run.before_block,
            run.layers.len(),
            names.join(", ")
        )?;
    }
    if !r.not_blocks.is_empty() {
        writeln!(out, "merges that are not blocks: {}", r.not_blocks.len())?;
    }
    for d in &r.diagnostics {
        let node = d.node.as_deref().map_or(String::new(), |n| format!(" [{}]", terminal_safe(n)));
        writeln!(out, "{}{node}: {}", d.severity, terminal_safe(&d.message))?;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn control_characters_are_escaped() {
        assert_eq!(terminal_safe("a\u{1b}[31mb"), "a\\u{1b}[31mb");
        assert_eq!(terminal_safe("x\ny"), "x\\u{a}y");
        assert_eq!(terminal_safe("\u{202e}abc"), "\\u{202e}abc");
        assert_eq!(terminal_safe("layer1.0/conv"), "layer1.0/conv");
    }
}
