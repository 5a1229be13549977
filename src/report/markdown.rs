//! Markdown for pull-request comments: the summary, the findings and the
//! block table, kept under a size limit (the rest elided, and the comment
//! says so). Written with an askama template whose values pass through
//! [`MarkdownEscaper`], so a name from the model is always literal text.

use std::fmt;
use std::io;

use askama::Template;

use crate::report::text::num;
use crate::report::text::terminal_safe;
use crate::report::{BlockRow, Report};

/// The default size limit in bytes. Comment bodies on the common code
/// hosts are limited to 65,536 characters (a figure recalled from memory);
/// 60,000 bytes leaves room below it.
pub const DEFAULT_MAX_BYTES: usize = 60_000;

/// Names longer than this are shortened (with `…`) so one name cannot take
/// the whole budget.
const NAME_CHARS: usize = 120;

/// Options of the Markdown renderer.
#[derive(Debug, Clone, Copy)]
pub struct MarkdownConfig {
    /// The document never exceeds this many bytes.
    pub max_bytes: usize,
}

/// Escapes text for CommonMark with GitHub's extensions: every character
/// with a meaning inside a line of inline Markdown or a table cell is
/// backslash-escaped (values never start a line, so list and heading markers
/// need nothing), markup characters become entities, control characters and bidirectional
/// overrides become visible `\u{..}` escapes, and `@` is followed by a zero
/// width space so a name cannot mention anyone.
#[derive(Debug, Clone, Copy)]
pub struct MarkdownEscaper;

impl askama::filters::Escaper for MarkdownEscaper {
    fn write_escaped_str<W: fmt::Write>(&self, mut dest: W, string: &str) -> fmt::Result {
        dest.write_str(&escape(string))
    }
}

/// The escaping of [`MarkdownEscaper`].
pub fn escape(s: &str) -> String {
    let visible = terminal_safe(s);
    let mut out = String::with_capacity(visible.len() + 8);
    for c in visible.chars() {
        match c {
            '<' => out.push_str("&lt;"),
            '>' => out.push_str("&gt;"),
            '&' => out.push_str("&amp;"),
            '@' => out.push_str("@\u{200b}"),
            '\\' | '`' | '*' | '_' | '[' | ']' | '|' | '#' | '~' | '$' => {
                out.push('\\');
                out.push(c);
            }
            c => out.push(c),
        }
    }
    out
}

fn short(s: &str) -> String {
    if s.chars().count() <= NAME_CHARS {
        return s.to_owned();
    }
    let mut cut: String = s.chars().take(NAME_CHARS - 1).collect();
    cut.push('…');
    cut
}

#[derive(Template)]
#[template(path = "report.md")]
struct Doc<'a> {
    head: &'a Head,
    findings: &'a [FindingLine],
    rows: &'a [Row],
    measured: bool,
    /// The headroom column's title (`headroom in fp16`), when the report
    /// has a headroom section.
    headroom: Option<String>,
    elided_findings: usize,
    elided_rows: usize,
    max_bytes: usize,
}

struct Head {
    command: String,
    model: String,
    verdict: String,
    facts: Vec<String>,
    inputs: Vec<String>,
    run_error: Option<String>,
}

struct FindingLine {
    code: String,
    place: String,
    node: String,
    message: String,
}

struct Row {
    id: usize,
    stage: String,
    merge: String,
    shortcut: String,
    placement: String,
    ratio: String,
    cosine: String,
    growth: String,
    output: String,
    /// The block's headroom in the report's target format: the ratio for a
    /// float format, the median channel's levels for int8.
    headroom: String,
    codes: String,
}

/// Renders `r` as Markdown no longer than `config.max_bytes`.
pub fn render(r: &Report, config: &MarkdownConfig, out: &mut dyn io::Write) -> io::Result<()> {
    let text = render_string(r, config)?;
    out.write_all(text.as_bytes())
}

fn render_string(r: &Report, config: &MarkdownConfig) -> io::Result<String> {
    let head = head(r);
    let findings: Vec<FindingLine> = r
        .findings
        .iter()
        .map(|f| FindingLine {
            code: f.code.to_string(),
            place: f.block.map_or("model".to_owned(), |b| format!("block {b}")),
            node: f.node.as_ref().map_or(String::new(), |n| short(&n.name)),
            message: short_message(&f.message),
        })
        .collect();
    let rows: Vec<Row> = r.blocks.iter().map(|b| row(r, b)).collect();
    let measured = r.run.is_some() && r.run_error.is_none();
    let doc = |nf: usize, nr: usize| -> io::Result<String> {
        Doc {
            head: &head,
            findings: &findings[..nf],
            rows: &rows[..nr],
            measured,
            headroom: r.headroom.as_ref().map(|h| match h.levels {
                Some(_) => format!("{} levels of the median channel", h.format),
                None => format!("headroom in {}", h.format),
            }),
            elided_findings: findings.len() - nf,
            elided_rows: rows.len() - nr,
            max_bytes: config.max_bytes,
        }
        .render()
        .map_err(|e| io::Error::other(format!("rendering Markdown: {e}")))
    };
    let fits =
        |nf: usize, nr: usize| -> io::Result<bool> { Ok(doc(nf, nr)?.len() <= config.max_bytes) };
    // Findings first, then as many table rows as still fit.
    if fits(findings.len(), rows.len())? {
        return doc(findings.len(), rows.len());
    }
    let nf = if fits(findings.len(), 0)? {
        findings.len()
    } else {
        largest(findings.len(), |k| fits(k, 0))?
    };
    let nr = largest(rows.len(), |k| fits(nf, k))?;
    let text = doc(nf, nr)?;
    if text.len() <= config.max_bytes {
        return Ok(text);
    }
    // Even the head is too long for the limit: say so and stop.
    Ok(format!(
        "The shunt report does not fit in {} bytes; see the JSON or HTML report.\n",
        config.max_bytes
    ))
}

/// The largest `k` in `0..=n` for which `ok(k)` holds, given that it holds
/// for every smaller `k` once it holds for one (0 if none).
fn largest(n: usize, ok: impl Fn(usize) -> io::Result<bool>) -> io::Result<usize> {
    let (mut lo, mut hi) = (0usize, n);
    while lo < hi {
        let mid = (lo + hi).div_ceil(2);
        if ok(mid)? {
            lo = mid;
        } else {
            hi = mid - 1;
        }
    }
    Ok(lo)
}

fn short_message(m: &str) -> String {
    if m.chars().count() <= 4 * NAME_CHARS { m.to_owned() } else { short_n(m, 4 * NAME_CHARS) }
}

fn short_n(s: &str, n: usize) -> String {
    let mut cut: String = s.chars().take(n - 1).collect();
    cut.push('…');
    cut
}

fn head(r: &Report) -> Head {
    let m = &r.model;
    let model = std::path::Path::new(&m.path)
        .file_name()
        .map_or_else(|| m.path.clone(), |n| n.to_string_lossy().into_owned());
    let verdict = match (r.findings.len(), &r.run_error) {
        (_, Some(_)) => "the model could not be run; structure only".to_owned(),
        (0, None) => "no findings".to_owned(),
        (1, None) => "1 finding".to_owned(),
        (n, None) => format!("{n} findings"),
    };
    let mut facts = vec![
        format!("{} residual blocks in {} stages", r.summary.blocks, r.stages.len()),
        format!("{} nodes", m.nodes),
        format!("{} parameters", m.parameters),
    ];
    if let Some(run) = &r.run {
        facts.push(format!("{} samples, seed {}, {}", run.samples, run.seed, short(&run.engine)));
    }
    let inputs = r.run.as_ref().map_or(Vec::new(), |run| {
        run.inputs
            .iter()
            .take(16)
            .map(|i| {
                let dims: Vec<String> = i.shape.iter().map(u64::to_string).collect();
                format!("{} {} [{}]: {}", short(&i.name), i.dtype, dims.join("×"), short(&i.values))
            })
            .collect()
    });
    Head {
        command: r.command.to_string(),
        model: short(&model),
        verdict,
        facts,
        inputs,
        run_error: r.run_error.as_deref().map(short_message),
    }
}

fn row(r: &Report, b: &BlockRow) -> Row {
    let s = b.stats.as_ref();
    let spread = |v: Option<crate::report::Spread>| v.map_or("–".to_owned(), |v| num(v.mean));
    let codes: Vec<&str> =
        r.findings.iter().filter(|f| f.block == Some(b.id)).map(|f| f.code.as_str()).collect();
    let room = r.headroom.as_ref().and_then(|h| {
        let row = h.blocks.iter().find(|x| x.block == b.id)?;
        Some(match h.levels {
            Some(_) => row.median_channel_levels.map_or("–".to_owned(), |v| format!("{v:.1}")),
            None => match (row.max_abs, row.headroom) {
                (None, _) => "non-finite".to_owned(),
                (_, Some(x)) => num(x),
                _ => "–".to_owned(),
            },
        })
    });
    Row {
        id: b.id,
        stage: b.stage.map_or("?".to_owned(), |s| s.to_string()),
        merge: short(&b.merge.name),
        shortcut: b.shortcut.kind.to_string(),
        placement: b.placement.to_string(),
        ratio: s
            .and_then(|s| s.ratio)
            .map_or("–".to_owned(), |v| format!("{} ± {}", num(v.mean), num(v.std))),
        cosine: s.and_then(|s| s.cosine).map_or("–".to_owned(), |c| format!("{:+.2}", c.mean)),
        growth: spread(s.and_then(|s| s.growth)),
        output: spread(s.and_then(|s| s.output_rms)),
        headroom: room.unwrap_or_else(|| "–".to_owned()),
        codes: codes.join(", "),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn markup_in_names_is_literal() {
        assert_eq!(escape("<script>alert(1)</script>"), "&lt;script&gt;alert(1)&lt;/script&gt;");
        assert_eq!(escape("a|b"), "a\\|b");
        assert_eq!(escape("**x** [l](u)"), "\\*\\*x\\*\\* \\[l\\](u)");
        assert_eq!(escape("x\ny"), "x\\\\u{a}y");
        assert_eq!(escape("@team"), "@\u{200b}team");
        assert_eq!(escape("stage1.0.add"), "stage1.0.add");
    }

    #[test]
    fn the_largest_fitting_count_is_found() {
        assert_eq!(largest(10, |k| Ok(k <= 7)).unwrap(), 7);
        assert_eq!(largest(10, |_| Ok(false)).unwrap(), 0);
        assert_eq!(largest(10, |_| Ok(true)).unwrap(), 10);
        assert_eq!(largest(0, |_| Ok(true)).unwrap(), 0);
    }

    #[test]
    fn long_names_are_shortened() {
        let long = "n".repeat(500);
        assert_eq!(short(&long).chars().count(), NAME_CHARS);
        assert!(short(&long).ends_with('…'));
        assert_eq!(short("abc"), "abc");
    }
}
