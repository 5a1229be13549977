//! JSON rendering: the report types serialised with serde_json, pretty
//! printed, with a trailing newline.

use std::io;

use serde::Serialize;

/// Writes any report as pretty JSON.
pub fn render<T: Serialize>(report: &T, out: &mut dyn io::Write) -> io::Result<()> {
    // An I/O error keeps its kind, so a closed pipe is still recognised.
    serde_json::to_writer_pretty(&mut *out, report)
        .map_err(|e| e.io_error_kind().map_or_else(|| io::Error::other(e), io::Error::from))?;
    out.write_all(b"\n")
}
