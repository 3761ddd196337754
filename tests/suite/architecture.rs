//! The shape of the source tree, read from its `use` lines and inline `crate::`/`super::` paths:
//! no import cycle between files, imports run one way between the rooms (the layer order in
//! `src/lib.rs` and DEVELOPERS.md), the demo uses only the foundation, the engine and
//! annotation, only `commands/` knows clap and only `app/` knows the GUI toolkit.
//!
//! A re-export (`pub use x::Y` in a `mod.rs`) is followed to the file that defines `Y`, so a
//! parent that only re-exports its children never forms a cycle with them.

use std::collections::{BTreeMap, BTreeSet};
use std::path::Path;

/// The rooms, bottom first; a file may import from its own room or from a room ranked lower.
const LAYERS: [(&str, u32); 13] = [
    ("error", 0),
    ("io", 1),
    ("numeric", 1),
    ("caution", 1),
    ("probe", 1),
    ("engine", 2),
    ("annotation", 3),
    ("analysis", 4),
    ("render", 5),
    ("demo", 5),
    ("headless", 6),
    ("app", 7),
    ("commands", 8),
];

/// What the demo may use besides itself.
const DEMO_MAY_USE: [&str; 7] = [
    "error",
    "io",
    "numeric",
    "caution",
    "probe",
    "engine",
    "annotation",
];

/// One source file: its module path and its text without comments.
struct SourceFile {
    module: Vec<String>,
    text: String,
    /// Byte offset where `#[cfg(test)]` starts, if any: `super` there means the file itself.
    test_from: Option<usize>,
}

/// A tree of source files keyed by their file name relative to `src/`.
struct Tree {
    files: BTreeMap<String, SourceFile>,
    by_module: BTreeMap<Vec<String>, String>,
}

fn strip_comments(text: &str) -> String {
    text.lines()
        .map(|l| match l.find("//") {
            Some(i) => &l[..i],
            None => l,
        })
        .collect::<Vec<_>>()
        .join("\n")
}

fn module_of(rel: &str) -> Vec<String> {
    let rel = rel.trim_end_matches(".rs");
    let mut parts: Vec<String> = rel.split('/').map(String::from).collect();
    if matches!(parts.last().map(String::as_str), Some("mod") | Some("lib")) {
        parts.pop();
    }
    parts
}

impl Tree {
    fn from_sources(sources: &[(String, String)]) -> Tree {
        let mut files = BTreeMap::new();
        let mut by_module = BTreeMap::new();
        for (rel, text) in sources {
            let text = strip_comments(text);
            let test_from = text.find("#[cfg(test)]");
            let module = module_of(rel);
            by_module.insert(module.clone(), rel.clone());
            files.insert(
                rel.clone(),
                SourceFile {
                    module,
                    text,
                    test_from,
                },
            );
        }
        Tree { files, by_module }
    }

    fn read(src: &Path) -> Tree {
        let mut sources = Vec::new();
        let mut stack = vec![src.to_path_buf()];
        while let Some(dir) = stack.pop() {
            for e in std::fs::read_dir(&dir).unwrap() {
                let p = e.unwrap().path();
                if p.is_dir() {
                    stack.push(p);
                } else if p.extension().is_some_and(|x| x == "rs") {
                    let rel = p
                        .strip_prefix(src)
                        .unwrap()
                        .to_string_lossy()
                        .replace('\\', "/");
                    if rel != "main.rs" {
                        sources.push((rel, std::fs::read_to_string(&p).unwrap()));
                    }
                }
            }
        }
        Tree::from_sources(&sources)
    }
}

/// Expand one `use` tree (`a::{b, c::{d, e as f}}`) into its paths; `self` in a group names
/// the group's own path.
fn expand_use(tree: &str) -> Vec<(Vec<String>, Option<String>)> {
    fn split_top(s: &str) -> Vec<String> {
        let (mut depth, mut cur, mut out) = (0, String::new(), Vec::new());
        for c in s.chars() {
            match c {
                '{' => depth += 1,
                '}' => depth -= 1,
                ',' if depth == 0 => {
                    out.push(std::mem::take(&mut cur));
                    continue;
                }
                _ => {}
            }
            cur.push(c);
        }
        out.push(cur);
        out.into_iter()
            .map(|p| p.trim().to_string())
            .filter(|p| !p.is_empty())
            .collect()
    }
    fn go(prefix: &[String], s: &str, out: &mut Vec<(Vec<String>, Option<String>)>) {
        let s = s.trim();
        if let Some(open) = s.find('{') {
            let head: Vec<String> = s[..open]
                .split("::")
                .map(|p| p.trim().to_string())
                .filter(|p| !p.is_empty())
                .collect();
            let inner = &s[open + 1..s.rfind('}').unwrap_or(s.len())];
            let mut base = prefix.to_vec();
            base.extend(head);
            for part in split_top(inner) {
                go(&base, &part, out);
            }
            return;
        }
        let (path, alias) = match s.split_once(" as ") {
            Some((p, a)) => (p.trim(), Some(a.trim().to_string())),
            None => (s, None),
        };
        let mut segs = prefix.to_vec();
        for p in path.split("::").map(str::trim).filter(|p| !p.is_empty()) {
            if p != "self" {
                segs.push(p.to_string());
            }
        }
        out.push((segs, alias));
    }
    let mut out = Vec::new();
    go(&[], tree, &mut out);
    out
}

/// Every `use` statement of a text: (is it `pub use`, the tree after `use`).
fn use_statements(text: &str) -> Vec<(bool, String, usize)> {
    let mut out = Vec::new();
    let bytes = text.as_bytes();
    let mut i = 0;
    while let Some(k) = text[i..].find("use ") {
        let at = i + k;
        let before = text[..at].trim_end();
        let boundary = at == 0 || !bytes[at - 1].is_ascii_alphanumeric() && bytes[at - 1] != b'_';
        let stmt_start = before.is_empty()
            || before.ends_with(';')
            || before.ends_with('{')
            || before.ends_with('}')
            || before.ends_with(']')
            || before.ends_with("pub")
            || before.ends_with(')');
        if boundary && stmt_start {
            let end = text[at..].find(';').map_or(text.len(), |e| at + e);
            let public = before.ends_with("pub") || before.ends_with(')');
            out.push((public, text[at + 4..end].to_string(), at));
            i = end;
        } else {
            i = at + 4;
        }
    }
    out
}

/// Inline paths such as `crate::io::write_atomic(..)` outside `use` statements.
fn inline_paths(text: &str) -> Vec<(Vec<String>, usize)> {
    let mut out = Vec::new();
    for root in ["crate::", "super::"] {
        let mut i = 0;
        while let Some(k) = text[i..].find(root) {
            let at = i + k;
            let prev = text[..at].chars().last();
            if prev.is_some_and(|c| c.is_alphanumeric() || c == '_' || c == ':') {
                i = at + root.len();
                continue;
            }
            let tail: String = text[at..]
                .chars()
                .take_while(|c| c.is_alphanumeric() || *c == '_' || *c == ':')
                .collect();
            let segs: Vec<String> = tail
                .split("::")
                .filter(|p| !p.is_empty())
                .map(String::from)
                .collect();
            out.push((segs, at));
            i = at + tail.len().max(root.len());
        }
    }
    out
}

/// An import path made absolute (crate-relative segments), from inside `file` of `tree`.
fn absolute(tree: &Tree, file: &SourceFile, segs: &[String], at: usize) -> Option<Vec<String>> {
    let in_tests = file.test_from.is_some_and(|t| at >= t);
    let first = segs.first()?.as_str();
    let mut child = file.module.clone();
    child.push(first.to_string());
    if tree.by_module.contains_key(&child) {
        // `use checkpoint::Checkpoint;` in a `mod.rs`: a path relative to the module itself.
        let mut abs = file.module.clone();
        abs.extend(segs.iter().cloned());
        return Some(abs);
    }
    let mut base = match first {
        "crate" => Vec::new(),
        "super" => {
            let mut m = file.module.clone();
            if !in_tests {
                m.pop();
            }
            m
        }
        "self" => file.module.clone(),
        _ => return None, // an outside crate or a local item
    };
    let mut rest = &segs[1..];
    // `super::super::x`
    while rest.first().map(String::as_str) == Some("super") {
        base.pop();
        rest = &rest[1..];
    }
    base.extend(rest.iter().cloned());
    Some(base)
}

impl Tree {
    /// Names a file re-exports, each with the absolute path it stands for.
    fn reexports(&self, rel: &str) -> BTreeMap<String, Vec<String>> {
        let file = &self.files[rel];
        let mut out = BTreeMap::new();
        for (public, tree, at) in use_statements(&file.text) {
            if !public {
                continue;
            }
            for (segs, alias) in expand_use(&tree) {
                if let Some(abs) = absolute(self, file, &segs, at) {
                    if let Some(name) = alias.or_else(|| abs.last().cloned()) {
                        out.insert(name, abs);
                    }
                }
            }
        }
        out
    }

    /// The file an absolute path lands in, following re-exports.
    fn resolve(&self, path: &[String], depth: usize) -> Option<String> {
        let mut n = path.len();
        while n > 0 && !self.by_module.contains_key(&path[..n]) {
            n -= 1;
        }
        let rel = self.by_module.get(&path[..n])?.clone();
        if n < path.len() && depth < 16 {
            if let Some(target) = self.reexports(&rel).get(&path[n]) {
                let mut t = target.clone();
                t.extend(path[n + 1..].iter().cloned());
                if let Some(f) = self.resolve(&t, depth + 1) {
                    return Some(f);
                }
            }
        }
        Some(rel)
    }

    /// File-to-file import edges (self-edges dropped).
    fn edges(&self) -> BTreeMap<String, BTreeSet<String>> {
        let mut edges: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
        // The crate root only declares the rooms.
        for (rel, file) in self.files.iter().filter(|(rel, _)| *rel != "lib.rs") {
            let mut paths = Vec::new();
            // Inline paths are read from the text with its `use` statements blanked out.
            let mut rest = file.text.clone().into_bytes();
            for (_, tree, at) in use_statements(&file.text) {
                for (segs, _) in expand_use(&tree) {
                    paths.push((segs, at));
                }
                for b in &mut rest[at..at + 4 + tree.len()] {
                    *b = b' ';
                }
            }
            paths.extend(inline_paths(&String::from_utf8(rest).unwrap()));
            let entry = edges.entry(rel.clone()).or_default();
            for (segs, at) in paths {
                // `use super::*` and the like name a module, not an item.
                let segs: Vec<String> = segs.into_iter().filter(|s| s != "*").collect();
                let Some(abs) = absolute(self, file, &segs, at) else {
                    continue;
                };
                if let Some(target) = self.resolve(&abs, 0) {
                    if &target != rel && target != "lib.rs" {
                        entry.insert(target);
                    }
                }
            }
        }
        edges
    }
}

/// A cycle of files, if the graph has one.
fn find_cycle(edges: &BTreeMap<String, BTreeSet<String>>) -> Option<Vec<String>> {
    fn visit(
        n: &str,
        edges: &BTreeMap<String, BTreeSet<String>>,
        state: &mut BTreeMap<String, u8>,
        stack: &mut Vec<String>,
    ) -> Option<Vec<String>> {
        state.insert(n.to_string(), 1);
        stack.push(n.to_string());
        for m in edges.get(n).into_iter().flatten() {
            match state.get(m.as_str()).copied().unwrap_or(0) {
                1 => {
                    let from = stack.iter().position(|s| s == m).unwrap();
                    let mut cycle = stack[from..].to_vec();
                    cycle.push(m.clone());
                    return Some(cycle);
                }
                0 => {
                    if let Some(c) = visit(m, edges, state, stack) {
                        return Some(c);
                    }
                }
                _ => {}
            }
        }
        stack.pop();
        state.insert(n.to_string(), 2);
        None
    }
    let mut state = BTreeMap::new();
    for n in edges.keys() {
        if state.get(n.as_str()).copied().unwrap_or(0) == 0 {
            let mut stack = Vec::new();
            if let Some(c) = visit(n, edges, &mut state, &mut stack) {
                return Some(c);
            }
        }
    }
    None
}

fn room(rel: &str) -> &str {
    rel.split('/').next().unwrap().trim_end_matches(".rs")
}

fn rank(room: &str) -> Option<u32> {
    LAYERS.iter().find(|l| l.0 == room).map(|l| l.1)
}

/// Every edge that runs against the layer order.
fn layer_violations(edges: &BTreeMap<String, BTreeSet<String>>) -> Vec<String> {
    let mut bad = Vec::new();
    for (from, tos) in edges {
        let a = room(from);
        for to in tos {
            let b = room(to);
            if a == b {
                continue;
            }
            let ok = match (rank(a), rank(b)) {
                _ if a == "demo" => DEMO_MAY_USE.contains(&b),
                (Some(ra), Some(rb)) => rb < ra,
                _ => false,
            };
            if !ok {
                bad.push(format!("{from} -> {to}"));
            }
        }
    }
    bad
}

fn real_tree() -> Tree {
    Tree::read(&crate::common::root().join("src"))
}

#[test]
fn no_import_cycle_between_source_files() {
    let edges = real_tree().edges();
    assert!(
        edges.len() > 30,
        "the tree was read ({} files)",
        edges.len()
    );
    if let Some(c) = find_cycle(&edges) {
        panic!("import cycle: {}", c.join(" -> "));
    }
}

#[test]
fn imports_run_one_way_between_the_rooms() {
    let tree = real_tree();
    for rel in tree.files.keys() {
        let r = room(rel);
        assert!(
            r == "lib" || rank(r).is_some(),
            "{rel}: room '{r}' is not in the layer list (add it to LAYERS, lib.rs and DEVELOPERS.md)"
        );
    }
    let bad = layer_violations(&tree.edges());
    assert!(
        bad.is_empty(),
        "imports against the layer order:\n{}",
        bad.join("\n")
    );
}

#[test]
fn only_the_command_line_knows_clap_and_only_the_window_knows_egui() {
    let tree = real_tree();
    for (rel, f) in &tree.files {
        let uses = |krate: &str| {
            f.text.contains(&format!("use {krate}")) || f.text.contains(&format!("{krate}::"))
        };
        if room(rel) != "commands" {
            assert!(!uses("clap"), "{rel} uses clap");
        }
        if room(rel) != "app" {
            for k in ["egui", "eframe", "rfd"] {
                assert!(!uses(k), "{rel} uses {k}");
            }
        }
    }
}

/// The checker itself, on a small tree: it must see a cycle through a re-export-free parent, not
/// see one where a parent only re-exports, and flag an import against the layer order.
#[test]
fn the_checker_finds_cycles_and_layer_breaks() {
    let src = |files: &[(&str, &str)]| {
        Tree::from_sources(
            &files
                .iter()
                .map(|(a, b)| (a.to_string(), b.to_string()))
                .collect::<Vec<_>>(),
        )
    };
    let ok = src(&[
        (
            "engine/mod.rs",
            "pub mod a;\npub mod b;\npub use a::Thing;\n",
        ),
        ("engine/a.rs", "pub struct Thing;\n"),
        (
            "engine/b.rs",
            "use super::Thing;\nuse crate::io::{self, write};\n",
        ),
        ("io.rs", "pub fn write() {}\n"),
    ]);
    let e = ok.edges();
    assert_eq!(
        e["engine/b.rs"],
        BTreeSet::from(["engine/a.rs".to_string(), "io.rs".to_string()])
    );
    assert_eq!(find_cycle(&e), None);
    assert!(layer_violations(&e).is_empty());

    let cyclic = src(&[
        ("engine/mod.rs", "pub mod a;\npub mod b;\n"),
        ("engine/a.rs", "use super::b::f;\npub fn g() {}\n"),
        ("engine/b.rs", "pub fn f() { super::a::g() }\n"),
        ("io.rs", "use crate::engine::a::g;\n"),
    ]);
    let e = cyclic.edges();
    let c = find_cycle(&e).expect("a -> b -> a");
    assert!(c.contains(&"engine/a.rs".to_string()) && c.contains(&"engine/b.rs".to_string()));
    assert_eq!(layer_violations(&e), ["io.rs -> engine/a.rs"]);
}
