//! Many models in one command: finding the model files under folders, and
//! running one job (a scan or an audit) over each on several threads.
//!
//! One model's error never stops the others: it becomes that model's entry.
//! Entries come back in the order of the paths found, whatever order the
//! threads finished in, so the output is deterministic.

use std::fs;
use std::panic::{AssertUnwindSafe, catch_unwind};
use std::path::{Path, PathBuf};
use std::sync::Mutex;
use std::sync::atomic::{AtomicUsize, Ordering};

use crate::error::{Error, ErrorKind, Result};
use crate::report::Report;
use crate::report::batch::BatchEntry;

/// One model file to process, or a folder that could not be read.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum Found {
    /// A model file (given by name, or a `.onnx` file found under a folder).
    Model(PathBuf),
    /// A folder whose listing failed, with why.
    Unreadable(PathBuf, String),
}

impl Found {
    /// The path of the model or folder.
    pub fn path(&self) -> &Path {
        match self {
            Found::Model(p) | Found::Unreadable(p, _) => p,
        }
    }
}

/// What one job over one model gives: the report, and the error of a run
/// that failed after the structure was read (an audit whose model does not
/// run), if any.
pub type Outcome = Result<(Report, Option<Error>)>;

/// The model files named by `paths`: a file is taken as given, whatever its
/// name; a folder is searched recursively for files ending in `.onnx` (any
/// case). Symbolic links to files are followed, links to folders are not
/// (no loops). Each folder's models are sorted by path, and a model named
/// twice is kept once, at its first place.
pub fn find_models(paths: &[PathBuf]) -> Vec<Found> {
    let mut found = Vec::new();
    for p in paths {
        match fs::symlink_metadata(p) {
            Ok(m) if m.is_dir() => walk(p, &mut found),
            _ => found.push(Found::Model(p.clone())),
        }
    }
    let mut seen = std::collections::HashSet::new();
    found.retain(|f| match f {
        Found::Model(p) => seen.insert(fs::canonicalize(p).unwrap_or_else(|_| p.clone())),
        Found::Unreadable(..) => true,
    });
    found
}

fn walk(dir: &Path, found: &mut Vec<Found>) {
    let entries = match fs::read_dir(dir) {
        Ok(entries) => entries,
        Err(e) => {
            found.push(Found::Unreadable(dir.to_path_buf(), crate::load::io_message(&e)));
            return;
        }
    };
    let mut paths: Vec<PathBuf> = Vec::new();
    for entry in entries {
        match entry {
            Ok(e) => paths.push(e.path()),
            Err(e) => found.push(Found::Unreadable(dir.to_path_buf(), crate::load::io_message(&e))),
        }
    }
    paths.sort();
    for p in paths {
        let Ok(meta) = fs::symlink_metadata(&p) else { continue };
        if meta.is_dir() {
            walk(&p, found);
        } else if is_model_name(&p)
            && (meta.is_file() || fs::metadata(&p).is_ok_and(|m| m.is_file()))
        {
            found.push(Found::Model(p));
        }
    }
}

fn is_model_name(p: &Path) -> bool {
    p.extension().is_some_and(|e| e.eq_ignore_ascii_case("onnx"))
}

/// Runs `job` over every model of `found` on up to `threads` threads and
/// returns one entry per element of `found`, in its order. `done` is called
/// after each model (from the worker thread) with the model's path. A panic
/// inside `job` becomes that model's error.
pub fn run(
    found: &[Found],
    threads: usize,
    job: &(dyn Fn(&Path) -> Outcome + Sync),
    done: &(dyn Fn(&Path) + Sync),
) -> Vec<BatchEntry> {
    let slots: Vec<Mutex<Option<BatchEntry>>> = found.iter().map(|_| Mutex::new(None)).collect();
    let next = AtomicUsize::new(0);
    let work = || {
        loop {
            let i = next.fetch_add(1, Ordering::Relaxed);
            let Some(item) = found.get(i) else { break };
            let entry = match item {
                Found::Unreadable(p, why) => BatchEntry::new(
                    p.display().to_string(),
                    None,
                    Some(format!("{}: cannot list the folder: {why}", p.display())),
                ),
                Found::Model(p) => entry_of(p, job),
            };
            *slots[i].lock().unwrap_or_else(|e| e.into_inner()) = Some(entry);
            done(item.path());
        }
    };
    let threads = threads.clamp(1, found.len().max(1));
    std::thread::scope(|s| {
        for _ in 1..threads {
            s.spawn(work);
        }
        work();
    });
    slots
        .into_iter()
        .map(|m| {
            m.into_inner()
                .unwrap_or_else(|e| e.into_inner())
                .expect("every slot is filled before the scope ends")
        })
        .collect()
}

fn entry_of(path: &Path, job: &(dyn Fn(&Path) -> Outcome + Sync)) -> BatchEntry {
    let name = path.display().to_string();
    let outcome = catch_unwind(AssertUnwindSafe(|| job(path))).unwrap_or_else(|panic| {
        let what = panic
            .downcast_ref::<String>()
            .map(String::as_str)
            .or_else(|| panic.downcast_ref::<&str>().copied())
            .unwrap_or("unknown cause");
        Err(Error::new(ErrorKind::Probe, format!("internal error: {what}")).at(path))
    });
    match outcome {
        Ok((report, run_error)) => {
            BatchEntry::new(name, Some(report), run_error.map(|e| e.at(path).to_string()))
        }
        Err(e) => BatchEntry::new(name, None, Some(e.at(path).to_string())),
    }
}

/// Threads for a batch: as many as the machine offers, at most `models`.
pub fn default_threads(models: usize) -> usize {
    std::thread::available_parallelism().map_or(1, |n| n.get()).min(models).max(1)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn folders_are_searched_recursively_in_sorted_order() {
        let dir = tempfile::tempdir().unwrap();
        let root = dir.path();
        fs::create_dir_all(root.join("b/deeper")).unwrap();
        fs::create_dir_all(root.join("a")).unwrap();
        for f in ["b/deeper/z.onnx", "b/y.ONNX", "a/x.onnx", "a/notes.txt", "top.onnx"] {
            fs::write(root.join(f), b"").unwrap();
        }
        let found = find_models(&[root.to_path_buf(), root.join("a/x.onnx")]);
        let rel: Vec<String> = found
            .iter()
            .map(|f| f.path().strip_prefix(root).unwrap().display().to_string())
            .collect();
        // Sorted by path component by component; x.onnx named twice is kept once.
        assert_eq!(rel, ["a/x.onnx", "b/deeper/z.onnx", "b/y.ONNX", "top.onnx"]);
    }

    #[test]
    fn entries_keep_their_order_and_a_panic_is_one_error() {
        let found: Vec<Found> =
            (0..9).map(|i| Found::Model(PathBuf::from(format!("m{i}.onnx")))).collect();
        let job = |p: &Path| -> Outcome {
            if p.ends_with("m4.onnx") {
                panic!("boom");
            }
            Err(Error::new(ErrorKind::Io, "no such file"))
        };
        let count = AtomicUsize::new(0);
        let entries = run(&found, 3, &job, &|_| {
            count.fetch_add(1, Ordering::Relaxed);
        });
        assert_eq!(count.load(Ordering::Relaxed), 9);
        let paths: Vec<&str> = entries.iter().map(|e| e.path.as_str()).collect();
        assert_eq!(paths, (0..9).map(|i| format!("m{i}.onnx")).collect::<Vec<_>>());
        assert!(entries.iter().all(|e| e.status == crate::vocab::EntryStatus::Error));
        assert!(entries[4].error.as_deref().unwrap().contains("internal error: boom"));
        assert!(entries[3].error.as_deref().unwrap().contains("m3.onnx: no such file"));
    }
}
