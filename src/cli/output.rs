//! Where a report goes: standard output, or a file written atomically (a
//! temporary file in the same folder, then a rename), never over an input.

use std::fs;
use std::io::{self, BufWriter, Write};
use std::path::Path;

use anyhow::{Context, bail};

/// Renders into `path` (or standard output when `None`), refusing to
/// overwrite any of `inputs`.
pub(super) fn write(
    path: Option<&Path>,
    inputs: &[&Path],
    render: impl FnOnce(&mut dyn Write) -> io::Result<()>,
) -> anyhow::Result<()> {
    let Some(path) = path else {
        let stdout = io::stdout();
        let mut out = BufWriter::new(stdout.lock());
        render(&mut out)?;
        out.flush()?;
        return Ok(());
    };
    if let Ok(target) = fs::canonicalize(path) {
        for input in inputs {
            if fs::canonicalize(input).is_ok_and(|i| i == target) {
                bail!("{}: refusing to write the report over an input model", path.display());
            }
        }
    }
    if path.is_dir() {
        bail!("{}: is a folder; --output takes a file name", path.display());
    }
    let dir = match path.parent() {
        Some(p) if !p.as_os_str().is_empty() => p,
        _ => Path::new("."),
    };
    let name = path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
    let tmp = dir.join(format!(".{name}.shunt-{}.tmp", std::process::id()));
    let result = (|| -> anyhow::Result<()> {
        let file = fs::File::create(&tmp)
            .with_context(|| format!("{}: cannot create the output file", path.display()))?;
        let mut out = BufWriter::new(file);
        render(&mut out)?;
        let file = out.into_inner().map_err(|e| e.into_error())?;
        file.sync_all()?;
        fs::rename(&tmp, path)
            .with_context(|| format!("{}: cannot write the output file", path.display()))?;
        Ok(())
    })();
    if result.is_err() {
        let _ = fs::remove_file(&tmp);
    }
    result
}
