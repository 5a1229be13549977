//! The dependency table in DEVELOPERS.md ("Who may use whom") is exactly the
//! set of arrows between top-level modules that the code has.
//!
//! A file's module is its first component under `src/` (`src/report/table.rs`
//! is `report`); `src/main.rs`, the binary, counts as `cli`, the command line
//! it runs. A use of
//! module `B` is any path through the crate root in code, in `use` lines or
//! inline (`crate::lower::Origin`), with groups expanded: `crate::B` in the
//! library and `shunt::B` in the binary, and the root's re-exports
//! (`crate::Error`) resolved through `src/lib.rs`. Comments (doc links
//! included), string literals and `#[cfg(test)]` items are not read: test code
//! may use any module. `super::`
//! paths are not followed; they stay inside a module's own folder.
//!
//! Table lines read `A, B → C, D (x, y), E`: the modules on the left may use
//! those on the right; `(x, y)` restricts the use of `D` to the items `D::x`
//! and `D::y`; `(krate only here)` says that the extern crate `krate` may be
//! named only by the modules on the left; `→ nothing in the crate` is no
//! arrow. The check is both ways: an arrow or item the code has that the table
//! lacks fails, and so does one the table lists that the code no longer uses.

use std::collections::{BTreeMap, BTreeSet};
use std::path::Path;

const TABLE_HEADING: &str = "Who may use whom";

/// The table: for each module, the modules it may use, each with the items
/// it may use from it (`None`: any); and each restricted extern crate's home.
#[derive(Debug, Default)]
struct Table {
    arrows: BTreeMap<String, BTreeMap<String, Option<BTreeSet<String>>>>,
    homes: BTreeMap<String, BTreeSet<String>>,
}

/// One path into another module: the file uses `to` (and `to::item`, when the
/// path names an item; `None` for the module itself or a glob).
#[derive(Debug)]
struct Use {
    to: String,
    item: Option<String>,
    place: String,
}

#[test]
fn dependency_table_matches_the_code() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let developers = std::fs::read_to_string(root.join("DEVELOPERS.md")).expect("DEVELOPERS.md");
    let table = parse_table(&developers).unwrap_or_else(|e| panic!("DEVELOPERS.md: {e}"));
    let mut files = Vec::new();
    rust_files(&root.join("src"), "", &mut files);
    // The walk found the crate: both roots, and a file for every module the
    // table names (the check itself fails on any module without a line).
    assert!(files.iter().any(|(path, _)| path == "lib.rs"), "src/lib.rs not found");
    assert!(files.iter().any(|(path, _)| path == "main.rs"), "src/main.rs not found");
    assert_eq!(table.arrows.len(), module_names(&files).len(), "modules in the table vs src/");
    let problems = check(&table, &files);
    assert!(
        problems.is_empty(),
        "the code and the dependency table in DEVELOPERS.md (\"{TABLE_HEADING}\") disagree; fix \
         the code, or the table if the new arrow is intended (a new arrow is a change to the \
         architecture: say why in DEVELOPERS.md):\n{}",
        problems.join("\n")
    );
}

/// The checker finds every kind of disagreement in a made-up crate, and
/// reads neither comments, strings nor test code.
#[test]
fn checker_finds_planted_faults() {
    let text = "Who may use whom:\n\n```\n\
        cli (bin) → app, model (Thing, Other, Gone)\n\
        app       → model (Thing), unused, store\n\
        store     → model        (fastlib only here)\n\
        model, unused, ghost → nothing in the crate\n\
        ```\n";
    let table = parse_table(text).expect("the made-up table parses");
    assert_eq!(table.arrows.len(), 6, "{table:?}");
    assert_eq!(table.arrows["app"].len(), 3);
    assert_eq!(table.homes["fastlib"], BTreeSet::from(["store".to_owned()]));

    let file = |path: &str, text: &str| (path.to_owned(), text.to_owned());
    let files = vec![
        file("lib.rs", "pub mod app;\npub use model::{Thing as T, Error};\n"),
        // The binary reaches the library as `shunt::`; its own `crate::` is not the library.
        file(
            "main.rs",
            "use shunt::{app, model::{Thing, Other}};\nuse crate::x;\n\
             fn main() { shunt::Error::new(); shunt::cli::run() }\n",
        ),
        file("cli/mod.rs", "use crate::cli::x;\n"),
        file(
            "app.rs",
            "use crate::model::{Thing, Hidden};\n\
             // crate::secret::Thing in a comment is not a use\n\
             const S: &str = \"crate::secret::Thing\";\n\
             const R: &str = r#\"crate::secret \"quoted\"\"#;\n\
             fn f<'a>(c: char) -> bool { c == '\"' && crate::store::open() }\n\
             #[cfg(test)]\nmod tests {\n    use crate::secret::Thing;\n    fn g() { let x = [1; 2]; }\n}\n\
             fn h() { fastlib::go(); crate::model::Thing::new(); }\n",
        ),
        file("store/mod.rs", "use fastlib::go;\n"),
        // A re-export of the root (`Thing as T`) is a use of its module.
        file("store/deep.rs", "fn k() -> crate::T { T }\n"),
        file("model.rs", "/* crate::app /* nested */ crate::app */ pub struct Thing;\n"),
        file("unused.rs", "\n"),
        file("extra.rs", "use crate::model;\n"),
    ];
    let problems = check(&table, &files);
    let expected = [
        // The binary: `shunt::Error` resolves through lib.rs to `model`.
        "cli → model (Error): the table allows only (Gone, Other, Thing) [src/main.rs:3]",
        // Grouped use: the item outside the detail.
        "app → model (Hidden): the table allows only (Thing) [src/app.rs:1]",
        // An extern crate outside its home.
        "fastlib is named outside its home (store) [src/app.rs:11]",
        // A module with no line, and its arrow.
        "extra: no line in the table [src/extra.rs]",
        "extra → model: not in the table [src/extra.rs:1]",
        // Listed but not in the code: an arrow, an item, a module.
        "app → unused: in the table, not in the code",
        "cli → model (Gone): in the table, not in the code",
        "ghost: in the table, not a module in src/",
    ];
    for want in expected {
        assert!(
            problems.iter().any(|p| p == want),
            "missing {want:?} in:\n{}",
            problems.join("\n")
        );
    }
    // Nothing else: no `secret` (comments, strings, test code), no `model →
    // app` (a nested comment), no `app → store` (allowed), no `store → model`
    // (used through the re-export), nothing about `crate::cli` in the binary.
    assert_eq!(problems.len(), expected.len(), "{}", problems.join("\n"));
}

/// Reads the fenced block under [`TABLE_HEADING`].
fn parse_table(text: &str) -> Result<Table, String> {
    let start = text.find(TABLE_HEADING).ok_or(format!("no \"{TABLE_HEADING}\" table"))?;
    let mut lines = text[start..].lines().skip_while(|l| !l.starts_with("```")).skip(1);
    let mut table = Table::default();
    let mut closed = false;
    for line in lines.by_ref() {
        if line.starts_with("```") {
            closed = true;
            break;
        }
        let (left, right) = line.split_once('→').ok_or(format!("no arrow in {line:?}"))?;
        let froms: Vec<String> =
            left.split(',').map(|m| m.trim().trim_end_matches("(bin)").trim().to_owned()).collect();
        if let Some(bad) = froms.iter().find(|m| !is_ident(m)) {
            return Err(format!("{bad:?} is not a module name in {line:?}"));
        }
        let mut arrows = BTreeMap::new();
        let mut homes = Vec::new();
        let right = right.trim();
        if right != "nothing in the crate" {
            for entry in split_outside_parens(right) {
                let entry = entry.trim();
                let name_end = entry.find(|c: char| !is_ident_char(c)).unwrap_or(entry.len());
                let (to, mut rest) = entry.split_at(name_end);
                if !is_ident(to) {
                    return Err(format!("{entry:?} does not start with a module in {line:?}"));
                }
                let mut items = None;
                loop {
                    rest = rest.trim();
                    if rest.is_empty() {
                        break;
                    }
                    let inner = rest
                        .strip_prefix('(')
                        .and_then(|r| r.split_once(')'))
                        .ok_or(format!("{entry:?}: expected `(…)` in {line:?}"))?;
                    rest = inner.1;
                    if let Some(krate) = inner.0.strip_suffix(" only here") {
                        homes.push(krate.trim().to_owned());
                        continue;
                    }
                    let listed: BTreeSet<String> =
                        inner.0.split(',').map(|i| i.trim().to_owned()).collect();
                    if let Some(bad) = listed.iter().find(|i| !is_ident(i)) {
                        return Err(format!(
                            "{bad:?} in {entry:?} is not an item name (a detail lists the items \
                             used, as `(x, y)`) in {line:?}"
                        ));
                    }
                    items = Some(listed);
                }
                if arrows.insert(to.to_owned(), items).is_some() {
                    return Err(format!("{to} twice in {line:?}"));
                }
            }
        }
        for from in froms {
            for krate in &homes {
                table.homes.entry(krate.clone()).or_default().insert(from.clone());
            }
            if table.arrows.insert(from.clone(), arrows.clone()).is_some() {
                return Err(format!("{from} has two lines"));
            }
        }
    }
    if !closed || table.arrows.is_empty() {
        return Err(format!("no fenced block of arrows under \"{TABLE_HEADING}\""));
    }
    Ok(table)
}

/// Everything the code disagrees with the table on, one line each.
fn check(table: &Table, files: &[(String, String)]) -> Vec<String> {
    let mut problems = Vec::new();
    let modules = module_names(files);
    let reexports = root_reexports(files);
    let mut used: BTreeMap<(String, String), BTreeSet<Option<String>>> = BTreeMap::new();
    for (path, text) in files {
        let Some(from) = module_of(path) else { continue };
        let tokens = tokens(&code_only(text));
        if !table.arrows.contains_key(&from) {
            problems.push(format!("{from}: no line in the table [src/{path}]"));
        }
        for (krate, home) in &table.homes {
            for (i, token) in tokens.iter().enumerate() {
                let qualified = i > 0 && matches!(tokens[i - 1].0.as_str(), "::" | ".");
                if token.0 == *krate && !qualified && !home.contains(&from) {
                    let home: Vec<&str> = home.iter().map(String::as_str).collect();
                    problems.push(format!(
                        "{krate} is named outside its home ({}) [src/{path}:{}]",
                        home.join(", "),
                        token.1
                    ));
                }
            }
        }
        for found in uses(path, &tokens, &modules, &reexports, &mut problems) {
            if found.to == from {
                continue;
            }
            let allowed = table.arrows.get(&from).and_then(|a| a.get(&found.to));
            match (allowed, &found.item) {
                (None, _) => problems
                    .push(format!("{from} → {}: not in the table [{}]", found.to, found.place)),
                (Some(Some(items)), item) if !item.as_ref().is_some_and(|i| items.contains(i)) => {
                    let items: Vec<&str> = items.iter().map(String::as_str).collect();
                    let what = item.as_deref().unwrap_or("the module itself");
                    problems.push(format!(
                        "{from} → {} ({what}): the table allows only ({}) [{}]",
                        found.to,
                        items.join(", "),
                        found.place
                    ));
                }
                _ => {}
            }
            used.entry((from.clone(), found.to)).or_default().insert(found.item);
        }
    }
    for (from, arrows) in &table.arrows {
        if !modules.contains(from) {
            problems.push(format!("{from}: in the table, not a module in src/"));
        }
        for (to, items) in arrows {
            let Some(seen) = used.get(&(from.clone(), to.clone())) else {
                problems.push(format!("{from} → {to}: in the table, not in the code"));
                continue;
            };
            for item in items.iter().flatten() {
                if !seen.contains(&Some(item.clone())) {
                    problems.push(format!("{from} → {to} ({item}): in the table, not in the code"));
                }
            }
        }
    }
    // One line per place: `use crate::m::{self, A}` is two uses on one line.
    let mut seen = BTreeSet::new();
    problems.retain(|p| seen.insert(p.clone()));
    problems
}

/// The uses of other modules in one file's tokens.
fn uses(
    path: &str,
    tokens: &[(String, usize)],
    modules: &BTreeSet<String>,
    reexports: &BTreeMap<String, String>,
    problems: &mut Vec<String>,
) -> Vec<Use> {
    let bin = path == "main.rs";
    let mut found = Vec::new();
    for (i, (token, line)) in tokens.iter().enumerate() {
        let root = token == "crate" || (bin && token == "shunt");
        let qualified = i > 0 && tokens[i - 1].0 == "::";
        if !root || qualified || tokens.get(i + 1).map(|t| t.0.as_str()) != Some("::") {
            continue;
        }
        // In the binary, `crate::` is the binary itself.
        if bin && token == "crate" {
            continue;
        }
        let place = format!("src/{path}:{line}");
        for segments in use_tree(tokens, i + 2).0 {
            let Some(first) = segments.first() else { continue };
            let second = segments.get(1).filter(|s| !matches!(s.as_str(), "self" | "*"));
            let (to, item) = if modules.contains(first) {
                (first.clone(), second.cloned())
            } else if let Some(module) = reexports.get(first) {
                (module.clone(), Some(first.clone()))
            } else {
                problems.push(format!("{token}::{first}: not a module or re-export [{place}]"));
                continue;
            };
            found.push(Use { to, item, place: place.clone() });
        }
    }
    found
}

/// Expands the use tree starting at `tokens[at]` into its paths (a path
/// expression is a tree without braces): `a::{b, c::d}` is `a::b`, `a::c::d`.
fn use_tree(tokens: &[(String, usize)], mut at: usize) -> (Vec<Vec<String>>, usize) {
    let token = |i: usize| tokens.get(i).map_or("", |t| t.0.as_str());
    if token(at) == "{" {
        let mut paths = Vec::new();
        at += 1;
        while !matches!(token(at), "}" | "") {
            let (inner, next) = use_tree(tokens, at);
            paths.extend(inner);
            at = if token(next) == "," { next + 1 } else { next };
            if next == at && token(at) != "}" {
                break;
            }
        }
        return (paths, at + 1);
    }
    if token(at) == "*" {
        return (vec![vec!["*".to_owned()]], at + 1);
    }
    if !is_ident(token(at)) {
        return (vec![Vec::new()], at);
    }
    let segment = token(at).to_owned();
    at += 1;
    let continues = token(at + 1) == "{" || token(at + 1) == "*" || is_ident(token(at + 1));
    if token(at) == "::" && continues {
        let (inner, next) = use_tree(tokens, at + 1);
        let paths = inner
            .into_iter()
            .map(|rest| std::iter::once(segment.clone()).chain(rest).collect())
            .collect();
        return (paths, next);
    }
    if token(at) == "as" {
        at += 2;
    }
    (vec![vec![segment]], at)
}

/// The crate root's re-exports (`pub use error::{Error, Result}` in lib.rs):
/// exported name → module.
fn root_reexports(files: &[(String, String)]) -> BTreeMap<String, String> {
    let mut names = BTreeMap::new();
    let Some((_, text)) = files.iter().find(|(path, _)| path == "lib.rs") else { return names };
    let tokens = tokens(&code_only(text));
    for i in 0..tokens.len() {
        if tokens[i].0 != "use" || i == 0 || tokens[i - 1].0 != "pub" {
            continue;
        }
        let end = (i..tokens.len()).find(|&k| tokens[k].0 == ";").unwrap_or(tokens.len());
        let renamed = rename_aliases(&tokens[i + 1..end]);
        for path in use_tree(&renamed, 0).0 {
            if let (Some(module), Some(name)) = (path.first(), path.last())
                && path.len() > 1
            {
                names.insert(name.clone(), module.clone());
            }
        }
    }
    names
}

/// `a::b as c` becomes `a::c`, so a tree's last segment is the exported name.
fn rename_aliases(tokens: &[(String, usize)]) -> Vec<(String, usize)> {
    let mut out: Vec<(String, usize)> = Vec::new();
    let mut i = 0;
    while i < tokens.len() {
        if tokens[i].0 == "as" && i + 1 < tokens.len() {
            out.pop();
            out.push(tokens[i + 1].clone());
            i += 2;
        } else {
            out.push(tokens[i].clone());
            i += 1;
        }
    }
    out
}

/// `src/scan.rs` → `scan`, `src/report/table.rs` → `report`, `src/main.rs`
/// (the binary) and `src/cli/…` → `cli`; `src/lib.rs` (the root) → none.
fn module_of(path: &str) -> Option<String> {
    let first = path.split('/').next()?;
    match first.trim_end_matches(".rs") {
        "lib" if first == "lib.rs" => None,
        "main" if first == "main.rs" => Some("cli".to_owned()),
        name => Some(name.to_owned()),
    }
}

fn module_names(files: &[(String, String)]) -> BTreeSet<String> {
    files.iter().filter_map(|(path, _)| module_of(path)).collect()
}

/// Every `.rs` file under `dir`, as (path relative to `src/`, text), sorted.
fn rust_files(dir: &Path, prefix: &str, out: &mut Vec<(String, String)>) {
    let mut entries: Vec<_> = std::fs::read_dir(dir)
        .unwrap_or_else(|e| panic!("{}: {e}", dir.display()))
        .map(|e| e.expect("a directory entry").path())
        .collect();
    entries.sort();
    for entry in entries {
        let name = entry.file_name().and_then(|n| n.to_str()).expect("a UTF-8 file name");
        let rel = format!("{prefix}{name}");
        if entry.is_dir() {
            rust_files(&entry, &format!("{rel}/"), out);
        } else if name.ends_with(".rs") {
            let text = std::fs::read_to_string(&entry).expect("a UTF-8 source file");
            out.push((rel, text));
        }
    }
}

/// The text with comments and string and character literals blanked
/// (newlines kept, so line numbers hold), and `#[cfg(test)]` items removed
/// at the token stage (see [`tokens`]).
fn code_only(text: &str) -> String {
    let c: Vec<char> = text.chars().collect();
    let at = |i: usize| c.get(i).copied().unwrap_or('\0');
    let mut out = String::with_capacity(text.len());
    let blank = |out: &mut String, ch: char| out.push(if ch == '\n' { '\n' } else { ' ' });
    let mut i = 0;
    while i < c.len() {
        let word_start = i == 0 || !is_ident_char(c[i - 1]);
        if at(i) == '/' && at(i + 1) == '/' {
            while i < c.len() && c[i] != '\n' {
                i += 1;
            }
            continue;
        }
        if at(i) == '/' && at(i + 1) == '*' {
            let mut depth = 0;
            loop {
                if i >= c.len() {
                    break;
                }
                if at(i) == '/' && at(i + 1) == '*' {
                    depth += 1;
                    i += 2;
                } else if at(i) == '*' && at(i + 1) == '/' {
                    depth -= 1;
                    i += 2;
                    if depth == 0 {
                        break;
                    }
                } else {
                    blank(&mut out, c[i]);
                    i += 1;
                }
            }
            continue;
        }
        // Raw strings: r"…", r#"…"#, with an optional b or c prefix.
        let prefix = usize::from(word_start && matches!(at(i), 'b' | 'c') && at(i + 1) == 'r');
        if word_start && at(i + prefix) == 'r' && matches!(at(i + prefix + 1), '"' | '#') {
            let mut j = i + prefix + 1;
            let mut hashes = 0;
            while at(j) == '#' {
                hashes += 1;
                j += 1;
            }
            if at(j) == '"' {
                j += 1;
                while j < c.len() && !(c[j] == '"' && (1..=hashes).all(|k| at(j + k) == '#')) {
                    blank(&mut out, c[j]);
                    j += 1;
                }
                i = j + 1 + hashes;
                out.push(' ');
                continue;
            }
        }
        if at(i) == '"' {
            i += 1;
            while i < c.len() && c[i] != '"' {
                if c[i] == '\\' {
                    i += 1;
                }
                if i < c.len() {
                    blank(&mut out, c[i]);
                }
                i += 1;
            }
            i += 1;
            out.push(' ');
            continue;
        }
        // A character literal ('x', '\n', '\u{…}'); otherwise a lifetime.
        if at(i) == '\'' && (at(i + 1) == '\\' || at(i + 2) == '\'') {
            let mut j = i + 2;
            while j < c.len() && c[j] != '\'' && c[j] != '\n' {
                j += 1;
            }
            i = j + 1;
            out.push(' ');
            continue;
        }
        out.push(c[i]);
        i += 1;
    }
    out
}

/// The tokens of comment-free code with their line numbers: identifiers
/// (and numbers), `::`, and single punctuation characters; the items under
/// `#[cfg(test)]` are left out.
fn tokens(code: &str) -> Vec<(String, usize)> {
    let mut all = Vec::new();
    let mut line = 1;
    let mut chars = code.chars().peekable();
    while let Some(ch) = chars.next() {
        if ch == '\n' {
            line += 1;
        } else if is_ident_char(ch) {
            let mut word = String::from(ch);
            while let Some(&next) = chars.peek().filter(|c| is_ident_char(**c)) {
                word.push(next);
                chars.next();
            }
            all.push((word, line));
        } else if ch == ':' && chars.peek() == Some(&':') {
            chars.next();
            all.push(("::".to_owned(), line));
        } else if !ch.is_whitespace() {
            all.push((ch.to_string(), line));
        }
    }
    without_test_items(all)
}

/// Drops every item under `#[cfg(test)]`, and everything after `#![cfg(test)]`.
fn without_test_items(tokens: Vec<(String, usize)>) -> Vec<(String, usize)> {
    let text = |i: usize| tokens.get(i).map_or("", |t| t.0.as_str());
    let is_cfg_test = |i: usize| {
        let inner = usize::from(text(i + 1) == "!");
        let words = ["[", "cfg", "(", "test", ")", "]"];
        text(i) == "#" && words.iter().enumerate().all(|(k, w)| text(i + 1 + inner + k) == *w)
    };
    let mut kept = Vec::new();
    let mut i = 0;
    while i < tokens.len() {
        if !is_cfg_test(i) {
            kept.push(tokens[i].clone());
            i += 1;
            continue;
        }
        if text(i + 1) == "!" {
            break;
        }
        // Skip the attribute, the item's other attributes, then the item: to
        // its `;` or the end of its first brace block, at bracket depth 0.
        i += 7;
        let mut depth = 0i32;
        while i < tokens.len() {
            match text(i) {
                "(" | "[" => depth += 1,
                ")" | "]" => depth -= 1,
                ";" if depth == 0 => break,
                "{" if depth == 0 => {
                    let mut braces = 0;
                    while i < tokens.len() {
                        match text(i) {
                            "{" => braces += 1,
                            "}" => braces -= 1,
                            _ => {}
                        }
                        if braces == 0 {
                            break;
                        }
                        i += 1;
                    }
                    break;
                }
                _ => {}
            }
            i += 1;
        }
        i += 1;
    }
    kept
}

fn is_ident_char(c: char) -> bool {
    c.is_alphanumeric() || c == '_'
}

fn is_ident(s: &str) -> bool {
    s.chars().next().is_some_and(|c| c.is_alphabetic() || c == '_') && s.chars().all(is_ident_char)
}

/// Splits at commas outside parentheses.
fn split_outside_parens(s: &str) -> Vec<&str> {
    let mut parts = Vec::new();
    let mut depth = 0;
    let mut start = 0;
    for (i, c) in s.char_indices() {
        match c {
            '(' => depth += 1,
            ')' => depth -= 1,
            ',' if depth == 0 => {
                parts.push(&s[start..i]);
                start = i + 1;
            }
            _ => {}
        }
    }
    parts.push(&s[start..]);
    parts
}
