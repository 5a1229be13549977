//! Every command shown in the README and under `docs/` is real: each fenced
//! block that starts with `$ shunt` is run, command by command, and its output
//! must be what the page shows (numbers may differ in the last printed digit,
//! see `intent::same_text`).
//!
//! The convention of such a block: a line `$ shunt ARGS` starts a command; the
//! lines up to the next `$` line are its standard output; a last line `exit N`
//! is its exit code (otherwise 0). The commands of one block run in order in
//! one fresh folder that holds `fixtures/` (a link to the committed fixtures)
//! and the two files the pages use as a story: `resnet_cifar_bn.onnx` (a copy
//! of the fixture) and `shortcut_removed.onnx` (that copy with its fourth
//! shortcut removed by graph surgery), so that `-o FILE` writes there and a
//! later command of the block reads it.

use std::path::{Path, PathBuf};

use prost::Message;
use shunt::proto::ModelProto;
use shunt_testkit::surgery;

use crate::intent::same_text;
use crate::util::{fixture, tempdir};

/// One command of a documented block.
#[derive(Debug)]
struct Shown {
    args: Vec<String>,
    output: String,
    code: i32,
}

/// The pages checked: the README, then every page under `docs/`.
pub(crate) fn pages() -> Vec<PathBuf> {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let mut docs: Vec<PathBuf> = std::fs::read_dir(root.join("docs"))
        .expect("docs/")
        .map(|e| e.expect("a docs entry").path())
        .filter(|p| p.extension().is_some_and(|e| e == "md"))
        .collect();
    docs.sort();
    let mut all = vec![root.join("README.md")];
    all.extend(docs);
    all
}

/// The fenced blocks of every page with the given info string, in page order.
pub(crate) fn blocks(info: &str) -> Vec<(PathBuf, String)> {
    let mut out = Vec::new();
    for page in pages() {
        let text = std::fs::read_to_string(&page).expect("a documentation page");
        // (info string, text) of the block being read.
        let mut current: Option<(String, String)> = None;
        for line in text.lines() {
            match &mut current {
                None => {
                    if let Some(tag) = line.trim_end().strip_prefix("```") {
                        current = Some((tag.to_owned(), String::new()));
                    }
                }
                Some(_) if line.trim_end() == "```" => {
                    let (tag, block) = current.take().expect("open");
                    if tag == info {
                        out.push((page.clone(), block));
                    }
                }
                Some((_, block)) => {
                    block.push_str(line);
                    block.push('\n');
                }
            }
        }
    }
    out
}

/// The commands of one block, with their shown output and exit code.
fn commands(block: &str) -> Vec<Shown> {
    let mut out: Vec<Shown> = Vec::new();
    for line in block.lines() {
        if let Some(rest) = line.strip_prefix("$ shunt ") {
            let args = shlex::split(rest).expect("a command line that splits");
            out.push(Shown { args, output: String::new(), code: 0 });
            continue;
        }
        let current = out.last_mut().expect("output after a command");
        if let Some(code) = line.strip_prefix("exit ").and_then(|c| c.parse().ok()) {
            current.code = code;
        } else {
            current.output.push_str(line);
            current.output.push('\n');
        }
    }
    out
}

/// The folder a block runs in.
fn stage() -> tempfile::TempDir {
    let dir = tempdir();
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    std::os::unix::fs::symlink(root.join("fixtures"), dir.path().join("fixtures")).unwrap();
    let bn = fixture("torch/resnet_cifar_bn.onnx");
    std::fs::copy(&bn, dir.path().join("resnet_cifar_bn.onnx")).unwrap();
    // The fourth block's merge output and shortcut input, from the scan.
    let run = crate::util::shunt(&["scan", &bn.display().to_string(), "--format", "json"]);
    assert_eq!(run.code, 0, "{}", run.stderr);
    let report: serde_json::Value = serde_json::from_str(&run.stdout).unwrap();
    let blocks = report["blocks"].as_array().expect("blocks");
    assert_eq!(blocks.len(), 6, "resnet_cifar_bn has six blocks");
    let (merge, shortcut) =
        (blocks[3]["output"].as_str().unwrap(), blocks[3]["shortcut"]["input"].as_str().unwrap());
    let mut model = ModelProto::decode(std::fs::read(&bn).unwrap().as_slice()).unwrap();
    assert!(surgery::remove_shortcut(&mut model, merge, shortcut));
    std::fs::write(dir.path().join("shortcut_removed.onnx"), model.encode_to_vec()).unwrap();
    dir
}

/// Runs the binary in `dir`.
fn run_in(dir: &Path, args: &[String]) -> crate::util::Run {
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_shunt"))
        .args(args)
        .current_dir(dir)
        .output()
        .expect("the shunt binary runs");
    crate::util::Run {
        code: out.status.code().unwrap_or(-1),
        stdout: String::from_utf8_lossy(&out.stdout).into_owned(),
        stderr: String::from_utf8_lossy(&out.stderr).into_owned(),
    }
}

#[test]
fn every_documented_command_gives_the_output_shown() {
    let shown: Vec<(PathBuf, Vec<Shown>)> = blocks("")
        .into_iter()
        .filter(|(_, b)| b.starts_with("$ shunt "))
        .map(|(page, b)| (page, commands(&b)))
        .collect();
    // The README's tour shows each command; the pages add more.
    let readme: Vec<&str> = shown
        .iter()
        .filter(|(p, _)| p.ends_with("README.md"))
        .flat_map(|(_, cs)| cs.iter().map(|c| c.args[0].as_str()))
        .collect();
    for command in ["scan", "audit", "pin", "verify", "compare"] {
        assert!(readme.contains(&command), "the README's tour shows `{command}`: {readme:?}");
    }
    let total: usize = shown.iter().map(|(_, cs)| cs.len()).sum();
    assert!(total >= 10, "{total} documented commands");
    for (page, commands) in &shown {
        let dir = stage();
        for c in commands {
            let run = run_in(dir.path(), &c.args);
            let line = format!("{}: $ shunt {}", page.display(), c.args.join(" "));
            assert_eq!(run.code, c.code, "{line}\n{}{}", run.stdout, run.stderr);
            if let Err(e) = same_text(&run.stdout, &c.output) {
                panic!("{line}: the page drifted:\n{e}\n--- real output:\n{}", run.stdout);
            }
        }
    }
}
