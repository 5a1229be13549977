//! JSON rendering: the report types serialised with serde_json, pretty
//! printed, with a trailing newline.

use std::io;

use serde::Serialize;

/// Writes any report as pretty JSON.
pub fn render<T: Serialize>(report: &T, out: &mut dyn io::Write) -> io::Result<()> {
    serde_json::to_writer_pretty(&mut *out, report).map_err(io::Error::other)?;
    out.write_all(b"\n")
}
