//! The house rules that `docs/architecture.md` states, checked on the
//! source tree: every file says what it holds, every path the architecture
//! page names exists, generated protocol types stay where they belong, and
//! the modules of each crate import each other without cycles.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

fn root() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR"))
}

/// Every `.rs` file under `dir` (relative to the repository root).
fn rust_files(dir: &Path) -> Vec<PathBuf> {
    let mut out = Vec::new();
    let Ok(rd) = std::fs::read_dir(root().join(dir)) else {
        return out;
    };
    for e in rd.flatten() {
        let p = e.path();
        let rel = p
            .strip_prefix(root())
            .expect("inside the repository")
            .to_path_buf();
        if p.is_dir() {
            if !matches!(
                p.file_name().and_then(|n| n.to_str()),
                Some("target" | "fixtures" | ".git")
            ) {
                out.extend(rust_files(&rel));
            }
        } else if p.extension().is_some_and(|x| x == "rs") {
            out.push(rel);
        }
    }
    out.sort();
    out
}

fn all_sources() -> Vec<PathBuf> {
    let mut files = Vec::new();
    for d in [
        "src",
        "tests",
        "benches",
        "proto/src",
        "models",
        "coordinator",
        "worker",
        "surrogate",
    ] {
        files.extend(rust_files(Path::new(d)));
    }
    files.retain(|f| !f.starts_with("proto/build.rs"));
    files.sort();
    files.dedup();
    files
}

fn read(rel: &Path) -> String {
    std::fs::read_to_string(root().join(rel)).expect("readable source")
}

#[test]
fn every_source_file_opens_with_a_module_comment() {
    let missing: Vec<String> = all_sources()
        .into_iter()
        .filter(|f| !read(f).trim_start().starts_with("//!"))
        .map(|f| f.display().to_string())
        .collect();
    assert!(
        missing.is_empty(),
        "files without a //! opening: {missing:?}"
    );
}

#[test]
fn every_path_named_in_the_architecture_page_exists() {
    let page = std::fs::read_to_string(root().join("docs/architecture.md")).expect("page");
    let mut named = BTreeSet::new();
    for part in page.split('`').skip(1).step_by(2) {
        let looks_like_path = part.contains('/')
            && !part.contains(' ')
            && part
                .chars()
                .all(|c| c.is_ascii_alphanumeric() || "/._-".contains(c));
        if looks_like_path {
            named.insert(part.to_string());
        }
    }
    assert!(named.len() > 20, "found only {named:?}");
    let missing: Vec<&String> = named.iter().filter(|p| !root().join(p).exists()).collect();
    assert!(
        missing.is_empty(),
        "docs/architecture.md names missing paths: {missing:?}"
    );
}

/// The files that may name generated protocol types.
const WIRE_FILES: &[&str] = &[
    "coordinator/src/wire.rs",
    "coordinator/src/service.rs",
    "coordinator/src/server.rs",
    "coordinator/src/client.rs",
    "worker/src/session.rs",
];

#[test]
fn generated_protocol_types_stay_in_the_wire_modules() {
    let mut offenders = Vec::new();
    for f in all_sources() {
        let s = f.display().to_string();
        let in_tests =
            s.starts_with("tests/") || s.contains("/tests/") || s.starts_with("benches/");
        if s.starts_with("proto/") || in_tests || WIRE_FILES.contains(&s.as_str()) {
            continue;
        }
        let text = read(&f);
        if text.contains("tessera_proto::v1") || text.contains("pb::") {
            offenders.push(s);
        }
    }
    assert!(
        offenders.is_empty(),
        "generated types named in {offenders:?}"
    );
}

/// The top-level module a file of `crate_dir/src` belongs to.
fn module_of(crate_src: &Path, file: &Path) -> Option<String> {
    let rel = file.strip_prefix(crate_src).ok()?;
    let first = rel
        .components()
        .next()?
        .as_os_str()
        .to_string_lossy()
        .into_owned();
    let name = first.trim_end_matches(".rs").to_string();
    (name != "lib" && name != "main").then_some(name)
}

/// Edges module -> modules it names through `crate::`.
fn imports(crate_src: &Path) -> BTreeMap<String, BTreeSet<String>> {
    let mut graph: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
    for f in rust_files(crate_src) {
        let Some(m) = module_of(crate_src, &f) else {
            continue;
        };
        let text = read(&f);
        // Only code, not doc comments that link other modules.
        let code: String = text
            .lines()
            .filter(|l| !l.trim_start().starts_with("//"))
            .collect::<Vec<_>>()
            .join("\n");
        let targets = graph.entry(m.clone()).or_default();
        for (i, _) in code.match_indices("crate::") {
            let rest = &code[i + "crate::".len()..];
            let name: String = rest
                .chars()
                .take_while(|c| c.is_ascii_alphanumeric() || *c == '_')
                .collect();
            if !name.is_empty() && name != m {
                targets.insert(name);
            }
        }
    }
    graph
}

fn find_cycle(graph: &BTreeMap<String, BTreeSet<String>>) -> Option<Vec<String>> {
    fn visit(
        n: &str,
        graph: &BTreeMap<String, BTreeSet<String>>,
        stack: &mut Vec<String>,
        done: &mut BTreeSet<String>,
    ) -> Option<Vec<String>> {
        if let Some(at) = stack.iter().position(|s| s == n) {
            let mut cycle = stack[at..].to_vec();
            cycle.push(n.to_string());
            return Some(cycle);
        }
        if done.contains(n) {
            return None;
        }
        stack.push(n.to_string());
        for m in graph.get(n).into_iter().flatten() {
            if let Some(c) = visit(m, graph, stack, done) {
                return Some(c);
            }
        }
        stack.pop();
        done.insert(n.to_string());
        None
    }
    let mut done = BTreeSet::new();
    for n in graph.keys() {
        if let Some(c) = visit(n, graph, &mut Vec::new(), &mut done) {
            return Some(c);
        }
    }
    None
}

#[test]
fn modules_import_each_other_without_cycles() {
    for krate in [
        "coordinator/src",
        "worker/src",
        "models/src",
        "surrogate/src",
        "src",
    ] {
        let graph = imports(Path::new(krate));
        assert!(!graph.is_empty(), "no modules found in {krate}");
        if let Some(c) = find_cycle(&graph) {
            panic!(
                "{krate}: modules import each other in a cycle: {}",
                c.join(" -> ")
            );
        }
    }
    // The pairs that once did, named explicitly.
    let c = imports(Path::new("coordinator/src"));
    for (a, b) in [("fitter", "query"), ("scheduler", "status")] {
        assert!(
            !(c[a].contains(b) && c[b].contains(a)),
            "{a} and {b} import each other"
        );
    }
    let w = imports(Path::new("worker/src"));
    assert!(!(w["runner"].contains("external") && w["external"].contains("runner")));
}

/// The cycle finder itself finds a planted cycle.
#[test]
fn the_cycle_finder_finds_a_cycle() {
    let mut g: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
    g.entry("a".into()).or_default().insert("b".into());
    g.entry("b".into()).or_default().insert("c".into());
    g.entry("c".into()).or_default().insert("a".into());
    assert_eq!(
        find_cycle(&g),
        Some(vec!["a".into(), "b".into(), "c".into(), "a".into()])
    );
    g.get_mut("c").expect("c").clear();
    assert_eq!(find_cycle(&g), None);
}
