//! Writes every committed fixture model and `fixtures/MANIFEST.txt`.
//!
//! Run `cargo run --release --example fixtures` from the repository root, or
//! pass another target folder as the only argument. The list of fixtures
//! lives in `shunt_testkit::fixtures` (and `::structure`, `::precision`), so the integration tests rebuild the
//! same bytes in memory and fail when a committed file is stale.

use std::io::Write;
use std::path::PathBuf;
use std::process::ExitCode;

fn main() -> ExitCode {
    let dir = match std::env::args_os().nth(1) {
        Some(dir) => PathBuf::from(dir),
        None => PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("fixtures"),
    };
    let mut stdout = std::io::stdout().lock();
    let written = shunt_testkit::fixtures::write_all(&dir).and_then(|mut paths| {
        paths.extend(shunt_testkit::structure::write_all(&dir)?);
        paths.extend(shunt_testkit::precision::write_all(&dir)?);
        Ok(paths)
    });
    match written {
        Ok(paths) => {
            for path in paths {
                let size = std::fs::metadata(&path).map_or(0, |m| m.len());
                let _ = writeln!(stdout, "{size:>8}  {}", path.display());
            }
            ExitCode::SUCCESS
        }
        Err(err) => {
            let _ =
                writeln!(std::io::stderr(), "fixtures: cannot write to {}: {err}", dir.display());
            ExitCode::FAILURE
        }
    }
}
