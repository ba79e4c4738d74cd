//! The house rules of the source, checked on every test run: no source file over 700 lines,
//! no function over 150 lines, and no import circle between the modules of `stages/src`
//! (ingest using neither clean nor plots, no stage using the trial configuration). They keep
//! a file readable at a sitting and every module's place in the house (what it may use)
//! clear.

use crate::common::*;
use std::collections::{BTreeMap, BTreeSet};

/// The most lines of a source file.
const MAX_FILE_LINES: usize = 700;
/// The most lines of a function, from its `fn` line to its closing brace.
const MAX_FN_LINES: usize = 150;

/// Every `.rs` file under the two crates and the integration tests, with its text.
fn sources() -> Vec<(String, String)> {
    let root = repo();
    let mut out = Vec::new();
    let mut stack: Vec<PathBuf> = [
        "stages/src",
        "pipeline/src",
        "pipeline/benches",
        "tests/cli",
    ]
    .iter()
    .map(|d| root.join(d))
    .collect();
    while let Some(d) = stack.pop() {
        let Ok(entries) = std::fs::read_dir(&d) else {
            continue;
        };
        for e in entries.flatten() {
            let p = e.path();
            if p.is_dir() {
                stack.push(p);
            } else if p.extension().is_some_and(|x| x == "rs") {
                let rel = p.strip_prefix(&root).unwrap().to_string_lossy().to_string();
                out.push((rel, std::fs::read_to_string(&p).unwrap()));
            }
        }
    }
    out.sort();
    out
}

/// Functions longer than `max` lines: (lines, file, name). A function ends at the first
/// line that is its `fn` line's indentation followed by `}` (rustfmt's layout).
fn long_functions(path: &str, text: &str, max: usize) -> Vec<(usize, String, String)> {
    let lines: Vec<&str> = text.lines().collect();
    let mut out = Vec::new();
    for (i, l) in lines.iter().enumerate() {
        let t = l.trim_start();
        let indent = &l[..l.len() - t.len()];
        let t = ["pub(crate) ", "pub(super) ", "pub "]
            .iter()
            .find_map(|p| t.strip_prefix(p))
            .unwrap_or(t);
        let Some(rest) = t.strip_prefix("fn ") else {
            continue;
        };
        let name: String = rest
            .chars()
            .take_while(|c| c.is_alphanumeric() || *c == '_')
            .collect();
        let close = format!("{indent}}}");
        if let Some(j) = lines[i + 1..].iter().position(|m| *m == close) {
            if j + 2 > max {
                out.push((j + 2, path.to_string(), name));
            }
        }
    }
    out
}

/// The top-level modules of `stages/src` each module's non-test code names (`crate::x`).
fn module_imports(files: &[(String, String)]) -> BTreeMap<String, BTreeSet<String>> {
    let module_of = |path: &str| -> Option<String> {
        let rest = path.strip_prefix("stages/src/")?;
        let first = rest.split('/').next()?;
        Some(first.trim_end_matches(".rs").to_string())
    };
    let modules: BTreeSet<String> = files.iter().filter_map(|(p, _)| module_of(p)).collect();
    let mut edges: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
    for (path, text) in files {
        let Some(m) = module_of(path) else {
            continue;
        };
        if path.ends_with("tests.rs") || path.ends_with("robustness.rs") {
            continue;
        }
        let code = text.split("#[cfg(test)]").next().unwrap_or_default();
        for line in code.lines().filter(|l| !l.trim_start().starts_with("//")) {
            for part in line.split("crate::").skip(1) {
                let name: String = part
                    .chars()
                    .take_while(|c| c.is_alphanumeric() || *c == '_')
                    .collect();
                if name != m && modules.contains(&name) {
                    edges.entry(m.clone()).or_default().insert(name);
                }
            }
        }
    }
    edges
}

/// A circle in a graph, if there is one (as the list of its nodes).
fn a_circle(edges: &BTreeMap<String, BTreeSet<String>>) -> Option<Vec<String>> {
    // Depth-first search with the path kept: an edge back onto the path closes a circle.
    fn visit(
        n: &str,
        edges: &BTreeMap<String, BTreeSet<String>>,
        path: &mut Vec<String>,
        done: &mut BTreeSet<String>,
    ) -> Option<Vec<String>> {
        if let Some(k) = path.iter().position(|p| p == n) {
            return Some(path[k..].to_vec());
        }
        if done.contains(n) {
            return None;
        }
        path.push(n.to_string());
        for m in edges.get(n).into_iter().flatten() {
            if let Some(c) = visit(m, edges, path, done) {
                return Some(c);
            }
        }
        path.pop();
        done.insert(n.to_string());
        None
    }
    let mut done = BTreeSet::new();
    edges
        .keys()
        .find_map(|n| visit(n, edges, &mut Vec::new(), &mut done))
}

#[test]
fn no_file_over_700_lines_and_no_function_over_150() {
    let files = sources();
    assert!(files.len() > 100, "found only {} source files", files.len());
    let long_files: Vec<String> = files
        .iter()
        .filter(|(_, t)| t.lines().count() > MAX_FILE_LINES)
        .map(|(p, t)| format!("{p}: {} lines", t.lines().count()))
        .collect();
    assert!(
        long_files.is_empty(),
        "files over {MAX_FILE_LINES} lines: {long_files:?}"
    );
    let long_fns: Vec<_> = files
        .iter()
        .flat_map(|(p, t)| long_functions(p, t, MAX_FN_LINES))
        .collect();
    assert!(
        long_fns.is_empty(),
        "functions over {MAX_FN_LINES} lines: {long_fns:?}"
    );
}

#[test]
fn the_function_measure_finds_a_long_function() {
    // The measure itself, on a made-up file: a 152-line function is found, a 150-line one
    // is not, and a nested function ends at its own closing brace.
    let body = |n: usize| "    let x = 1;\n".repeat(n);
    let text = format!(
        "fn long() {{\n{}}}\n\nfn fits() {{\n{}    fn inner() {{\n    }}\n}}\n",
        body(150),
        body(145)
    );
    let found = long_functions("x.rs", &text, MAX_FN_LINES);
    assert_eq!(found, vec![(152, "x.rs".to_string(), "long".to_string())]);
}

#[test]
fn no_import_circle_between_the_modules_of_the_stages_crate() {
    let edges = module_imports(&sources());
    // The stages sit on their shared tables: ingest uses neither clean nor plots, and no
    // stage uses the trial configuration (only its own settings).
    for (from, to) in [
        ("ingest", "clean"),
        ("ingest", "plots"),
        ("ingest", "config"),
    ] {
        assert!(
            !edges.get(from).is_some_and(|e| e.contains(to)),
            "{from} imports {to}"
        );
    }
    assert!(
        edges["config"].contains("ingest"),
        "the measure misses imports"
    );
    assert_eq!(
        a_circle(&edges),
        None,
        "modules importing each other: {edges:?}"
    );
    // And the circle finder finds one.
    let mut e = edges.clone();
    e.entry("table".into()).or_default().insert("config".into());
    assert!(a_circle(&e).is_some());
}
