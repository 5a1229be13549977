//! Running the real binary, finding fixtures, and the pinned Python
//! environment with the reference libraries.

use std::path::{Path, PathBuf};
use std::process::Command;
use std::sync::OnceLock;

/// What one run of the binary did.
#[derive(Debug)]
pub struct Run {
    pub code: i32,
    pub stdout: String,
    pub stderr: String,
}

/// Runs the built `shunt` binary with `args`.
pub fn shunt(args: &[&str]) -> Run {
    let out = Command::new(env!("CARGO_BIN_EXE_shunt"))
        .args(args)
        .output()
        .expect("the shunt binary runs");
    Run {
        code: out.status.code().unwrap_or(-1),
        stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
    }
}

/// The path of a committed fixture.
pub fn fixture(rel: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("fixtures").join(rel)
}

/// A fresh temporary folder, removed when dropped.
pub fn tempdir() -> tempfile::TempDir {
    tempfile::Builder::new().prefix("shunt-test-").tempdir().expect("a temporary folder")
}

/// A Python interpreter with the pinned reference libraries of
/// `tests/reference/requirements.txt`, installed into `target/reference-venv`
/// on first use (from PyPI). Tests that compare against onnx, onnxruntime or
/// numpy call this; it never skips: if the set-up fails, the test fails.
pub fn reference_python() -> &'static Path {
    static PYTHON: OnceLock<PathBuf> = OnceLock::new();
    PYTHON.get_or_init(|| {
        let root = Path::new(env!("CARGO_MANIFEST_DIR"));
        let venv = root.join("target").join("reference-venv");
        let python = venv.join("bin").join("python");
        let requirements = root.join("tests").join("reference").join("requirements.txt");
        let stamp = venv.join("requirements.txt");
        let wanted = std::fs::read_to_string(&requirements).expect("requirements file");
        if std::fs::read_to_string(&stamp).ok().as_deref() == Some(wanted.as_str())
            && python.exists()
        {
            return python;
        }
        let base = std::env::var("SHUNT_BASE_PYTHON").unwrap_or_else(|_| "python3".to_owned());
        let ok = Command::new(&base)
            .args(["-m", "venv", "--clear"])
            .arg(&venv)
            .status()
            .is_ok_and(|s| s.success());
        assert!(ok, "could not create a Python venv at {} with {base}", venv.display());
        let ok = Command::new(&python)
            .args(["-m", "pip", "install", "--quiet", "--disable-pip-version-check", "-r"])
            .arg(&requirements)
            .status()
            .is_ok_and(|s| s.success());
        assert!(ok, "pip could not install {} into {}", requirements.display(), venv.display());
        std::fs::write(&stamp, wanted).expect("stamp file");
        python
    })
}

/// Runs a Python snippet with the reference interpreter; panics with its
/// output when it fails.
pub fn python(script: &str, args: &[&str]) -> String {
    let out = Command::new(reference_python())
        .arg("-c")
        .arg(script)
        .args(args)
        .output()
        .expect("python runs");
    assert!(
        out.status.success(),
        "python failed:\n{}\n{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).into_owned()
}
