//! Headless Chromium (Debian's `chromium` package, which `.ci/run`
//! installs) as a checker of HTML pages: what the page printed to its
//! console, which network requests it made, its DOM after loading, and a
//! screenshot.
//!
//! How each is observed:
//! - console: Chromium with `--enable-logging=stderr --v=0` writes every
//!   console message of the page (any level, and uncaught exceptions) as a
//!   `CONSOLE` line on standard error;
//! - network: `--log-net-log=FILE` records every URL request; a request made
//!   for the page carries a network isolation key of the page's `file://`
//!   origin, which tells it from the browser's own background requests (those
//!   are also sent to a closed local proxy port, so none leaves the machine);
//! - DOM: `--dump-dom` prints the document after load.
//!
//! `checker_sees_planted_faults` proves on a deliberately bad page that each
//! observation detects what it is meant to.

use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

/// What loading one page showed.
#[derive(Debug)]
pub struct Loaded {
    /// Console messages of the page (any level).
    pub console: Vec<String>,
    /// URLs the page requested (other than itself).
    pub requests: Vec<String>,
    /// The document after load.
    pub dom: String,
}

/// The Chromium binary; fails the test with instructions when missing.
pub fn chromium() -> PathBuf {
    for name in ["chromium", "chromium-browser"] {
        if let Some(dir) = std::env::var_os("PATH") {
            for d in std::env::split_paths(&dir) {
                let p = d.join(name);
                if p.is_file() {
                    return p;
                }
            }
        }
    }
    panic!(
        "headless Chromium is needed to check the HTML report and was not found on PATH: \
         install Debian's package with `apt-get install -y --no-install-recommends chromium` \
         (.ci/run does this)"
    );
}

fn run_with_deadline(mut cmd: Command, what: &str) -> (String, String) {
    let mut child = cmd
        .stdout(Stdio::piped())
        .stderr(Stdio::piped())
        .spawn()
        .unwrap_or_else(|e| panic!("{what}: chromium does not start: {e}"));
    let stdout = child.stdout.take().unwrap();
    let stderr = child.stderr.take().unwrap();
    let out = std::thread::spawn(move || std::io::read_to_string(stdout).unwrap_or_default());
    let err = std::thread::spawn(move || std::io::read_to_string(stderr).unwrap_or_default());
    let start = Instant::now();
    loop {
        if let Some(status) = child.try_wait().expect("waiting for chromium") {
            let (out, err) = (out.join().unwrap(), err.join().unwrap());
            assert!(status.success(), "{what}: chromium failed ({status}):\n{err}");
            return (out, err);
        }
        if start.elapsed() > Duration::from_secs(180) {
            let _ = child.kill();
            panic!("{what}: chromium did not finish within 180 s");
        }
        std::thread::sleep(Duration::from_millis(50));
    }
}

fn base_command(profile: &Path) -> Command {
    let mut cmd = Command::new(chromium());
    cmd.args([
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--hide-scrollbars",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--disable-extensions",
        "--disable-default-apps",
        "--disable-domain-reliability",
        "--disable-spell-checking",
        "--no-pings",
        "--mute-audio",
        // Whatever the browser itself still fetches goes to a closed local
        // port, and no name resolves: nothing leaves the machine.
        "--proxy-server=http://127.0.0.1:9",
        "--host-resolver-rules=MAP * ~NOTFOUND, EXCLUDE 127.0.0.1",
        "--enable-logging=stderr",
        "--v=0",
        "--virtual-time-budget=3000",
    ]);
    cmd.arg(format!("--user-data-dir={}", profile.display()));
    cmd
}

fn console_lines(stderr: &str) -> Vec<String> {
    stderr.lines().filter(|l| l.contains(":CONSOLE")).map(str::to_owned).collect()
}

/// Requests made for a `file://` page, from Chromium's net log.
fn page_requests(net_log: &Path) -> Vec<String> {
    let text = std::fs::read_to_string(net_log)
        .unwrap_or_else(|e| panic!("{}: no net log: {e}", net_log.display()));
    // Chromium may stop before closing the JSON; close it for the parser.
    let doc: serde_json::Value = serde_json::from_str(&text)
        .or_else(|_| serde_json::from_str(&format!("{}]}}", text.trim_end().trim_end_matches(','))))
        .unwrap_or_else(|e| panic!("{}: unreadable net log: {e}", net_log.display()));
    let mut urls = Vec::new();
    for e in doc["events"].as_array().expect("net log events") {
        let p = &e["params"];
        let (Some(url), Some(key)) = (p["url"].as_str(), p["network_isolation_key"].as_str())
        else {
            continue;
        };
        if key.starts_with("file://") && !urls.iter().any(|u| u == url) {
            urls.push(url.to_owned());
        }
    }
    urls
}

/// Loads `page` (a local file), takes a `width`×`height` screenshot into
/// `screenshot`, and returns what it showed.
pub fn load(page: &Path, work: &Path, screenshot: &Path, size: (u32, u32)) -> Loaded {
    let page = std::fs::canonicalize(page).expect("page exists");
    let url = format!("file://{}", page.display());
    std::fs::create_dir_all(work).unwrap();
    let net_log = work.join("net-log.json");
    let _ = std::fs::remove_file(&net_log);

    let mut shot = base_command(&work.join("profile-shot"));
    shot.arg(format!("--log-net-log={}", net_log.display()))
        .arg(format!("--window-size={},{}", size.0, size.1))
        .arg(format!("--screenshot={}", screenshot.display()))
        .arg(&url);
    let (_, err_shot) = run_with_deadline(shot, "screenshot");

    let mut dom = base_command(&work.join("profile-dom"));
    dom.arg("--dump-dom").arg(&url);
    let (dom, err_dom) = run_with_deadline(dom, "dump-dom");

    let mut console = console_lines(&err_shot);
    console.extend(console_lines(&err_dom));
    Loaded { console, requests: page_requests(&net_log), dom }
}

/// Counts elements with `attr="value"` inside the element whose id is `id`
/// (up to the closing tag `end` after it).
pub fn count_in(dom: &str, id: &str, end: &str, needle: &str) -> usize {
    let start = dom
        .find(&format!("id=\"{id}\""))
        .unwrap_or_else(|| panic!("no element with id {id} in the page"));
    let rest = &dom[start..];
    let stop = rest.find(end).unwrap_or_else(|| panic!("element {id} is not closed by {end}"));
    rest[..stop].matches(needle).count()
}
