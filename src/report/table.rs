//! The terminal table: one row per block, then a summary.

use std::io;

use comfy_table::{ContentArrangement, Table, TableComponent, presets};

use crate::report::text::{ARROW, layer_signature, terminal_safe};
use crate::report::{BlockRow, Report};
use crate::vocab::Placement;

fn shortcut_cell(b: &BlockRow) -> String {
    let ops: Vec<&str> = b.shortcut.ops.iter().map(|o| o.op_type.as_str()).collect();
    if ops.is_empty() {
        b.shortcut.kind.to_string()
    } else {
        format!("{} ({})", b.shortcut.kind, ops.join("→"))
    }
}

/// The merge node; a merge a rewrite emitted names the model's own node it
/// was inside.
fn merge_cell(b: &BlockRow) -> String {
    match &b.merge.lowered_from {
        Some(o) => terminal_safe(&format!("inside {} '{}'", o.op_type, o.name)),
        None => terminal_safe(&b.merge.name),
    }
}

fn notes_cell(b: &BlockRow) -> String {
    let mut notes = Vec::new();
    if !b.scope.is_empty() {
        notes.push(format!("in {}", super::text::scope_path(&b.scope)));
    }
    if let Some(d) = &b.static_dead {
        notes.push(format!(
            "dead by construction: {} at {}",
            d.reason,
            terminal_safe(&d.node.name)
        ));
    }
    if let Some(e) = &b.branch.end_scale {
        match (e.min, e.max) {
            (Some(lo), Some(hi)) if lo == hi => notes.push(format!("end scale {lo:.3e}")),
            (Some(lo), Some(hi)) => notes.push(format!("end scale {lo:.3e}..{hi:.3e}")),
            _ => notes.push("end scale (unread)".to_owned()),
        }
    }
    if b.placement == Placement::PostActivation
        && let Some(n) = b.placement_node.as_ref().filter(|n| n.op_type == "QuantizeLinear")
    {
        notes.push(format!("activation implicit in quantisation at {}", terminal_safe(&n.name)));
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

/// Renders a report: the structure table for a scan, the measurement table
/// for an audit, then the summary and the findings.
pub fn render(r: &Report, out: &mut dyn io::Write) -> io::Result<()> {
    header(r, out)?;
    if r.summary.plain {
        writeln!(out, "No residual merge and no concatenative skip: this is a plain network.")?;
    } else if !r.blocks.is_empty() {
        let t = if r.run.is_some() && r.run_error.is_none() {
            measurement_table(r)
        } else {
            structure_table(r)
        };
        writeln!(out, "{t}")?;
    }
    if r.run.is_some() && r.run_error.is_none() {
        scopes(r, out)?;
        not_measured(r, out)?;
        profile(r, out)?;
    }
    if r.run_error.is_none()
        && let Some(h) = &r.headroom
    {
        headroom(h, out)?;
    }
    if r.run_error.is_none()
        && let Some(inf) = &r.influence
    {
        influence(inf, out)?;
    }
    summary(r, out)?;
    findings(r, out)
}

fn header(r: &Report, out: &mut dyn io::Write) -> io::Result<()> {
    let m = &r.model;
    writeln!(out, "{}", terminal_safe(&m.path))?;
    writeln!(
        out,
        "  graph '{}': {} nodes, {} parameters, IR {}, opset {}, made by {}",
        terminal_safe(&m.graph_name),
        m.nodes,
        m.parameters,
        m.ir_version,
        m.opsets
            .iter()
            .find(|o| o.domain.is_empty() || o.domain == "ai.onnx")
            .map_or("?".to_owned(), |o| o.version.to_string()),
        if m.producer.is_empty() {
            "an unnamed producer".to_owned()
        } else {
            terminal_safe(&m.producer)
        },
    )?;
    if let Some(run) = &r.run {
        writeln!(
            out,
            "  ran {} sample(s) in {} pass(es) of {} with {}, seed {}",
            run.samples, run.passes, run.pass_batch, run.engine, run.seed
        )?;
        if let Some(p) = &run.precision {
            writeln!(out, "  precision: {}", terminal_safe(&p.note))?;
        }
        for i in &run.inputs {
            let shape: Vec<String> = i.shape.iter().map(u64::to_string).collect();
            writeln!(
                out,
                "  input '{}' {} [{}]: {}",
                terminal_safe(&i.name),
                i.dtype,
                shape.join("x"),
                terminal_safe(&i.values)
            )?;
        }
        if let Some(f) = &run.feed {
            writeln!(out, "  fed from {} (sha256 {})", terminal_safe(&f.path), f.sha256)?;
        }
    }
    writeln!(out)
}

fn new_table(columns: &[&str]) -> Table {
    let mut t = Table::new();
    t.load_preset(presets::NOTHING).set_content_arrangement(ContentArrangement::Disabled);
    t.set_style(TableComponent::HeaderLines, '─')
        .set_style(TableComponent::MiddleHeaderIntersections, '─');
    t.set_header(columns.to_vec());
    t
}

fn stage_cell(b: &BlockRow) -> String {
    match (b.stage, &b.output_shape) {
        (Some(s), Some(shape)) => format!("{s} ({})", shape[1..].join("x")),
        _ => "unknown".to_owned(),
    }
}

fn structure_table(r: &Report) -> Table {
    {
        let mut t = new_table(&["#", "stage", "merge", "shortcut", "placement", "branch", "notes"]);
        for b in &r.blocks {
            let stage = stage_cell(b);
            let layers: Vec<String> =
                b.branch.layers.iter().map(|l| layer_signature(l, ARROW)).collect();
            t.add_row(vec![
                b.id.to_string(),
                stage,
                merge_cell(b),
                terminal_safe(&shortcut_cell(b)),
                b.placement.to_string(),
                layers.join(", "),
                notes_cell(b),
            ]);
        }
        t
    }
}

/// Under the measurement table (which has no notes column): the blocks
/// inside control flow, consecutive blocks of one body on one line.
fn scopes(r: &Report, out: &mut dyn io::Write) -> io::Result<()> {
    let mut groups: Vec<(usize, usize, String)> = Vec::new();
    for b in r.blocks.iter().filter(|b| !b.scope.is_empty()) {
        let path = super::text::scope_path(&b.scope);
        match groups.last_mut() {
            Some(g) if g.2 == path && g.1 + 1 == b.id => g.1 = b.id,
            _ => groups.push((b.id, b.id, path)),
        }
    }
    for (first, last, path) in groups {
        let ids = if first == last { format!("#{first}") } else { format!("#{first}-#{last}") };
        writeln!(out, "in {path}: {ids}")?;
    }
    Ok(())
}

/// Blocks the run did not measure, with why; consecutive blocks with one
/// reason on one line.
fn not_measured(r: &Report, out: &mut dyn io::Write) -> io::Result<()> {
    let mut groups: Vec<(usize, usize, &str)> = Vec::new();
    for b in &r.blocks {
        let Some(why) = b.not_measured.as_deref() else { continue };
        match groups.last_mut() {
            Some(g) if g.2 == why && g.1 + 1 == b.id => g.1 = b.id,
            _ => groups.push((b.id, b.id, why)),
        }
    }
    for (first, last, why) in groups {
        let ids = if first == last { format!("#{first}") } else { format!("#{first}-#{last}") };
        writeln!(out, "not measured: {ids}: {}", terminal_safe(why))?;
    }
    Ok(())
}

fn block_findings(r: &Report, id: usize) -> String {
    let codes: Vec<&str> =
        r.findings.iter().filter(|f| f.block == Some(id)).map(|f| f.code.as_str()).collect();
    codes.join(", ")
}

fn measurement_table(r: &Report) -> Table {
    let mut t = new_table(&[
        "#",
        "stage",
        "merge",
        "shortcut",
        "placement",
        "rms short",
        "rms branch",
        "ratio (±sd)",
        "cos",
        "growth",
        "findings",
    ]);
    for b in &r.blocks {
        let s = b.stats.as_ref();
        let num = |v: Option<f64>| v.map_or("-".to_owned(), |v| format!("{v:.3e}"));
        let ratio = s
            .and_then(|s| s.ratio)
            .map_or("-".to_owned(), |r| format!("{:.3e} (±{:.1e})", r.mean, r.std));
        t.add_row(vec![
            b.id.to_string(),
            stage_cell(b),
            merge_cell(b),
            b.shortcut.kind.to_string(),
            b.placement.to_string(),
            num(s.and_then(|s| s.shortcut_rms).map(|x| x.mean)),
            num(s.and_then(|s| s.branch_rms).map(|x| x.mean)),
            ratio,
            s.and_then(|s| s.cosine).map_or("-".to_owned(), |c| format!("{:+.2}", c.mean)),
            s.and_then(|s| s.growth).map_or("-".to_owned(), |g| format!("{:.2}", g.mean)),
            block_findings(r, b.id),
        ]);
    }
    t
}

/// One character per block: the log of `values` scaled between their extremes.
pub fn sparkline(values: &[f64]) -> String {
    const BARS: [char; 8] = ['▁', '▂', '▃', '▄', '▅', '▆', '▇', '█'];
    let logs: Vec<Option<f64>> =
        values.iter().map(|&v| (v > 0.0 && v.is_finite()).then(|| v.log10())).collect();
    let known: Vec<f64> = logs.iter().flatten().copied().collect();
    let (lo, hi) = known
        .iter()
        .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &v| (lo.min(v), hi.max(v)));
    logs.iter()
        .map(|l| match l {
            None => '·',
            Some(_) if hi - lo < 1e-12 => BARS[3],
            Some(v) => BARS[(((v - lo) / (hi - lo)) * 7.0).round() as usize],
        })
        .collect()
}

fn profile(r: &Report, out: &mut dyn io::Write) -> io::Result<()> {
    let pick = |f: fn(&crate::report::StatsRow) -> Option<crate::report::Spread>| -> Vec<f64> {
        r.blocks.iter().map(|b| b.stats.as_ref().and_then(f).map_or(f64::NAN, |s| s.mean)).collect()
    };
    let output = pick(|s| s.output_rms);
    let max_abs = pick(|s| s.output_max_abs);
    let ratio = pick(|s| s.ratio);
    let ends = |v: &[f64]| {
        let known: Vec<f64> = v.iter().copied().filter(|x| x.is_finite()).collect();
        match (known.first(), known.last()) {
            (Some(a), Some(b)) => format!("{a:.2e} → {b:.2e}"),
            _ => "-".to_owned(),
        }
    };
    writeln!(out)?;
    writeln!(out, "signal profile across depth (log scale, one mark per block):")?;
    writeln!(out, "  output RMS  {}  {}", sparkline(&output), ends(&output))?;
    writeln!(out, "  max |x|     {}  {}", sparkline(&max_abs), ends(&max_abs))?;
    writeln!(out, "  ratio       {}  {}", sparkline(&ratio), ends(&ratio))?;
    Ok(())
}

/// Every block's range against the target format.
fn headroom(h: &crate::report::HeadroomReport, out: &mut dyn io::Write) -> io::Result<()> {
    let num = |v: Option<f64>| v.map_or("-".to_owned(), |v| format!("{v:.3e}"));
    writeln!(out)?;
    let limits = match (h.largest, h.smallest_normal, h.levels) {
        (Some(l), Some(n), _) => format!("largest {l:.5e}, smallest normal {n:.4e}"),
        (_, _, Some(levels)) => format!("{levels} levels each side of a per-tensor scale"),
        _ => String::new(),
    };
    writeln!(out, "headroom in {} ({}; {limits}):", h.format, terminal_safe(&h.chosen_by))?;
    let last = if h.levels.is_some() { "median-channel levels" } else { "zero or subnormal" };
    let mut t = new_table(&["#", "max |x|", "rms", "headroom", "bits", last]);
    for b in &h.blocks {
        let last = if h.levels.is_some() {
            b.median_channel_levels.map_or("-".to_owned(), |v| format!("{v:.1}"))
        } else {
            b.underflow.map_or("-".to_owned(), |u| format!("{:.2}%", u * 100.0))
        };
        t.add_row(vec![
            b.block.to_string(),
            b.max_abs.map_or("non-finite".to_owned(), |v| format!("{v:.3e}")),
            num(b.rms),
            num(b.headroom),
            b.headroom_bits.map_or("-".to_owned(), |v| format!("{v:.1}")),
            last,
        ]);
    }
    writeln!(out, "{t}")
}

/// Which blocks matter: knockout, gain and effective depth.
fn influence(inf: &crate::report::InfluenceReport, out: &mut dyn io::Write) -> io::Result<()> {
    let k = inf.knockout.as_ref();
    let mut t = new_table(&[
        "#",
        "knockout Δ",
        "cos",
        "top-1",
        "rank",
        "no-shortcut Δ",
        "gain",
        "via branch",
        "gain so far",
        "notes",
    ]);
    let num = |v: Option<f64>| v.map_or("-".to_owned(), |v| format!("{v:.3e}"));
    for b in &inf.blocks {
        let mut notes = Vec::new();
        if b.low_impact {
            notes.push("low impact");
        }
        if b.changes_resolution {
            notes.push("changes resolution");
        }
        t.add_row(vec![
            b.block.to_string(),
            num(b.knockout.map(|a| a.rel_l2)),
            b.knockout.and_then(|a| a.cosine).map_or("-".to_owned(), |c| format!("{c:+.4}")),
            b.knockout
                .and_then(|a| a.top1)
                .map_or("-".to_owned(), |c| format!("{:.0}%", c * 100.0)),
            b.rank.map_or("-".to_owned(), |r| r.to_string()),
            num(b.shortcut_knockout.map(|a| a.rel_l2)),
            b.gain.map_or("-".to_owned(), |g| format!("{:.3}", g.mean)),
            b.branch_share.map_or("-".to_owned(), |s| format!("{:.0}%", s * 100.0)),
            num(b.gain_to_here),
            notes.join(", "),
        ]);
    }
    writeln!(out)?;
    writeln!(
        out,
        "which blocks matter (knockout: relative change of the outputs with the branch removed):"
    )?;
    writeln!(out, "{t}")?;
    if let Some(k) = k {
        writeln!(
            out,
            "  knockout of {} block(s){}: {} forward passes, one model preparation",
            k.blocks.len(),
            if k.shortcuts { " and of their shortcuts" } else { "" },
            k.forward_passes
        )?;
    }
    if let Some(g) = &inf.gain {
        writeln!(
            out,
            "  perturbation gain: step {:.1e} of the input RMS; end to end {}",
            g.step,
            num(g.end_to_end)
        )?;
    }
    if let Some(e) = &inf.effective_depth {
        writeln!(
            out,
            "  effective depth: mean path length {:.2} of {} blocks (sd {:.2}, median {}, central 80% {}..{}){}",
            e.mean_path_length,
            e.blocks,
            e.path_length_sd,
            e.median_path_length,
            e.central_80[0],
            e.central_80[1],
            e.carrying.map_or(String::new(), |c| format!("; {c} block(s) carry signal"))
        )?;
    }
    for s in &inf.skipped {
        writeln!(out, "  block #{} not knocked out: {}", s.block, terminal_safe(&s.reason))?;
    }
    Ok(())
}

fn findings(r: &Report, out: &mut dyn io::Write) -> io::Result<()> {
    if let Some(e) = &r.run_error {
        writeln!(
            out,
            "the model could not be run, so only its structure is reported: {}",
            terminal_safe(e)
        )?;
    }
    if r.findings.is_empty() {
        writeln!(out, "findings: none")?;
        return Ok(());
    }
    writeln!(out, "findings: {}", r.findings.len())?;
    for f in &r.findings {
        let place = match (&f.block, &f.node) {
            (Some(id), Some(n)) => format!("block #{id} ({})", terminal_safe(&n.name)),
            (Some(id), None) => format!("block #{id}"),
            _ => "model".to_owned(),
        };
        writeln!(out, "  {:<17} {place}: {}", f.code, terminal_safe(&f.message))?;
    }
    Ok(())
}

fn summary(r: &Report, out: &mut dyn io::Write) -> io::Result<()> {
    let s = &r.summary;
    writeln!(out)?;
    let kinds = |m: &std::collections::BTreeMap<String, usize>| {
        if m.is_empty() {
            "none".to_owned()
        } else {
            m.iter().map(|(k, v)| format!("{k} {v}")).collect::<Vec<_>>().join(", ")
        }
    };
    writeln!(out, "residual blocks: {}", s.blocks)?;
    writeln!(out, "  shortcuts: {}", kinds(&s.by_shortcut))?;
    writeln!(out, "  placement: {}", kinds(&s.by_placement))?;
    writeln!(out, "stages: {}", r.stages.len())?;
    writeln!(out, "concatenative skips: {}", s.concat_skips)?;
    writeln!(out, "long skips: {}", s.long_skips)?;
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
