//! The report of one command over many models (`shunt scan DIR`, `shunt
//! audit a.onnx b.onnx`): one entry per model file with its own report or
//! its error, and the counts over all of them; a summary table for people.

use std::collections::BTreeMap;
use std::io;

use comfy_table::{ContentArrangement, Table, presets};
use serde::{Deserialize, Serialize};

use crate::report::Report;
use crate::report::text::terminal_safe;
use crate::vocab::{Command, EntryStatus};

/// Identifies the JSON document of a batch.
pub const BATCH_SCHEMA: &str = "shunt/batch";
/// Version of the batch JSON schema; bumped on every change of its fields
/// (the reports inside carry their own `shunt/report` version).
pub const BATCH_SCHEMA_VERSION: u32 = 1;

/// `scan` or `audit` over several model files.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BatchReport {
    /// Always [`BATCH_SCHEMA`].
    pub schema: String,
    /// Always [`BATCH_SCHEMA_VERSION`].
    pub schema_version: u32,
    /// `scan` or `audit`.
    pub command: Command,
    /// One entry per model file, sorted by path.
    pub models: Vec<BatchEntry>,
    /// Counts over all entries.
    pub summary: BatchSummary,
}

/// One model file of a batch.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BatchEntry {
    /// The model file, as found.
    pub path: String,
    /// `ok` (no finding), `findings` (at least one finding) or `error`.
    pub status: EntryStatus,
    /// Why the model could not be analysed or run.
    pub error: Option<String>,
    /// The model's report; absent when nothing could be analysed, present
    /// with an `error` when the structure was read but the run failed.
    pub report: Option<Report>,
}

/// Counts over a batch.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct BatchSummary {
    /// Model files.
    pub models: usize,
    /// Entries with status `ok`.
    pub ok: usize,
    /// Entries with status `findings`.
    pub with_findings: usize,
    /// Entries with status `error`.
    pub errors: usize,
    /// Residual blocks over all reports.
    pub blocks: usize,
    /// Findings over all reports, by code.
    pub findings: BTreeMap<String, usize>,
}

impl BatchReport {
    /// A batch of `command` from its entries (kept in the order given).
    pub fn new(command: Command, models: Vec<BatchEntry>) -> BatchReport {
        let mut summary = BatchSummary {
            models: models.len(),
            ok: 0,
            with_findings: 0,
            errors: 0,
            blocks: 0,
            findings: BTreeMap::new(),
        };
        for m in &models {
            match m.status {
                EntryStatus::Error => summary.errors += 1,
                EntryStatus::Findings => summary.with_findings += 1,
                EntryStatus::Ok => summary.ok += 1,
            }
            if let Some(r) = &m.report {
                summary.blocks += r.blocks.len();
                for f in &r.findings {
                    *summary.findings.entry(f.code.as_str().to_owned()).or_default() += 1;
                }
            }
        }
        BatchReport {
            schema: BATCH_SCHEMA.to_owned(),
            schema_version: BATCH_SCHEMA_VERSION,
            command,
            models,
            summary,
        }
    }
}

impl BatchEntry {
    /// The entry of a model with its report and, when its run failed, the
    /// error; the status follows from both.
    pub fn new(path: String, report: Option<Report>, error: Option<String>) -> BatchEntry {
        let status = match (&report, &error) {
            (_, Some(_)) | (None, None) => EntryStatus::Error,
            (Some(r), None) if !r.findings.is_empty() => EntryStatus::Findings,
            (Some(_), None) => EntryStatus::Ok,
        };
        BatchEntry { path, status, error, report }
    }
}

/// The summary table: one row per model, then the counts.
pub fn render_table(b: &BatchReport, out: &mut dyn io::Write) -> io::Result<()> {
    let mut t = Table::new();
    t.load_preset(presets::NOTHING).set_content_arrangement(ContentArrangement::Disabled);
    t.set_header(["#", "model", "status", "blocks", "shortcuts", "findings / error"]);
    for (i, m) in b.models.iter().enumerate() {
        let (blocks, shortcuts, findings) = match &m.report {
            Some(r) => {
                let shortcuts: Vec<String> =
                    r.summary.by_shortcut.iter().map(|(k, n)| format!("{k} {n}")).collect();
                let mut codes: BTreeMap<&str, usize> = BTreeMap::new();
                for f in &r.findings {
                    *codes.entry(f.code.as_str()).or_default() += 1;
                }
                let codes: Vec<String> = codes
                    .iter()
                    .map(|(c, n)| if *n == 1 { (*c).to_owned() } else { format!("{c} x{n}") })
                    .collect();
                (r.blocks.len().to_string(), shortcuts.join(", "), codes.join(", "))
            }
            None => ("-".to_owned(), "-".to_owned(), String::new()),
        };
        // The model column already names the file.
        let error = m.error.as_deref().map(|e| {
            e.strip_prefix(m.path.as_str()).and_then(|e| e.strip_prefix(": ")).unwrap_or(e)
        });
        let detail = match error {
            Some(e) if findings.is_empty() => e.to_owned(),
            Some(e) => format!("{findings}; {e}"),
            None => findings,
        };
        t.add_row([
            (i + 1).to_string(),
            terminal_safe(&m.path),
            m.status.to_string(),
            blocks,
            shortcuts,
            terminal_safe(&detail),
        ]);
    }
    writeln!(out, "{t}")?;
    let s = &b.summary;
    writeln!(
        out,
        "\n{} {}: {} ok, {} with findings, {} failed; {} residual blocks",
        s.models,
        if s.models == 1 { "model" } else { "models" },
        s.ok,
        s.with_findings,
        s.errors,
        s.blocks
    )?;
    if !s.findings.is_empty() {
        let codes: Vec<String> = s.findings.iter().map(|(c, n)| format!("{c} {n}")).collect();
        writeln!(out, "findings: {}", codes.join(", "))?;
    }
    Ok(())
}
