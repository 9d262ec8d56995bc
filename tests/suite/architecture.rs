//! The layering of the source tree, read from the source itself: every
//! `crate::` and `super::` path in `pipeline/` is resolved to the module it
//! names, and the resulting import graph must have no circle (between files,
//! or between top-level modules) and no import from a lower layer to a
//! higher one. Run it alone with
//! `cargo test --release --test suite architecture -- --nocapture`, which
//! also prints the graph of top-level modules.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

/// Layers from the top; a module may import only from its own layer or
/// below. Within a layer the graph must still be free of circles.
const LAYERS: &[&[&str]] = &[
    &["cli"],
    &["commands"],
    &["stages"],
    &["runner", "study"],
    &[
        "config",
        "timeline",
        "images",
        "oximetry",
        "fit",
        "stats",
        "physiology",
        "simulate",
        "tables",
        "console",
    ],
];

type Module = Vec<String>;

fn layer(m: &Module) -> usize {
    let top = m.first().map(String::as_str).unwrap_or("");
    LAYERS
        .iter()
        .position(|l| l.contains(&top))
        .unwrap_or_else(|| panic!("top-level module `{top}` is in no layer: add it to LAYERS"))
}

fn show(m: &Module) -> String {
    if m.is_empty() {
        "crate".into()
    } else {
        m.join("::")
    }
}

/// Every library source file with the module it defines.
fn modules(root: &Path) -> BTreeMap<Module, PathBuf> {
    fn walk(dir: &Path, prefix: &Module, out: &mut BTreeMap<Module, PathBuf>) {
        let mut entries: Vec<_> = std::fs::read_dir(dir)
            .unwrap()
            .map(|e| e.unwrap().path())
            .collect();
        entries.sort();
        for p in entries {
            let name = p.file_stem().unwrap().to_string_lossy().to_string();
            if p.is_dir() {
                let mut m = prefix.clone();
                m.push(name);
                walk(&p, &m, out);
            } else if p.extension().is_some_and(|e| e == "rs") {
                let mut m = prefix.clone();
                match name.as_str() {
                    "mod" => {}
                    "lib" if prefix.is_empty() => {}
                    "main" if prefix.is_empty() => continue,
                    _ => m.push(name),
                }
                out.insert(m, p);
            }
        }
    }
    let mut out = BTreeMap::new();
    walk(root, &vec![], &mut out);
    out
}

#[derive(Debug, Clone, PartialEq)]
enum Tok {
    Ident(String),
    Path,
    Open,
    Close,
    Comma,
    Star,
    Other,
}

/// Tokens of a source file with comments, strings and character literals
/// removed (so that a path in a doc comment or a message is not an import).
fn tokens(src: &str) -> Vec<Tok> {
    let c: Vec<char> = src.chars().collect();
    let mut out = Vec::new();
    let mut i = 0;
    while i < c.len() {
        let ch = c[i];
        if ch == '/' && c.get(i + 1) == Some(&'/') {
            while i < c.len() && c[i] != '\n' {
                i += 1;
            }
        } else if ch == '/' && c.get(i + 1) == Some(&'*') {
            let mut depth = 0;
            while i < c.len() {
                if c[i] == '/' && c.get(i + 1) == Some(&'*') {
                    depth += 1;
                    i += 2;
                } else if c[i] == '*' && c.get(i + 1) == Some(&'/') {
                    depth -= 1;
                    i += 2;
                    if depth == 0 {
                        break;
                    }
                } else {
                    i += 1;
                }
            }
        } else if ch == '"' {
            i += 1;
            while i < c.len() && c[i] != '"' {
                i += if c[i] == '\\' { 2 } else { 1 };
            }
            i += 1;
        } else if ch == 'r' && matches!(c.get(i + 1), Some('"') | Some('#')) && {
            let mut j = i + 1;
            while c.get(j) == Some(&'#') {
                j += 1;
            }
            c.get(j) == Some(&'"')
        } {
            let mut hashes = 0;
            i += 1;
            while c[i] == '#' {
                hashes += 1;
                i += 1;
            }
            i += 1;
            loop {
                if c[i] == '"' && (1..=hashes).all(|k| c.get(i + k) == Some(&'#')) {
                    i += 1 + hashes;
                    break;
                }
                i += 1;
            }
        } else if ch == '\'' {
            // A character literal ('x', '\n', '\''), else a lifetime.
            if c.get(i + 1) == Some(&'\\') {
                i += 2;
                while i < c.len() && c[i] != '\'' {
                    i += 1;
                }
                i += 1;
            } else if c.get(i + 2) == Some(&'\'') {
                i += 3;
            } else {
                i += 1;
            }
        } else if ch.is_alphabetic() || ch == '_' {
            let s = i;
            while i < c.len() && (c[i].is_alphanumeric() || c[i] == '_') {
                i += 1;
            }
            out.push(Tok::Ident(c[s..i].iter().collect()));
        } else if ch == ':' && c.get(i + 1) == Some(&':') {
            out.push(Tok::Path);
            i += 2;
        } else {
            out.push(match ch {
                '{' => Tok::Open,
                '}' => Tok::Close,
                ',' => Tok::Comma,
                '*' => Tok::Star,
                c if c.is_whitespace() => {
                    i += 1;
                    continue;
                }
                _ => Tok::Other,
            });
            i += 1;
        }
    }
    out
}

/// The paths of a path tree starting at `toks[*i]` (after `crate::` or
/// `super::`): `a::b`, `a::{b, c::{d, e}}`, `a::*`.
fn tree(toks: &[Tok], i: &mut usize, prefix: Vec<String>, out: &mut Vec<Vec<String>>) {
    let mut path = prefix;
    loop {
        match toks.get(*i) {
            Some(Tok::Ident(s)) => {
                path.push(s.clone());
                *i += 1;
                if toks.get(*i) == Some(&Tok::Path) {
                    *i += 1;
                    continue;
                }
                out.push(path);
                return;
            }
            Some(Tok::Open) => {
                *i += 1;
                loop {
                    match toks.get(*i) {
                        Some(Tok::Close) => {
                            *i += 1;
                            return;
                        }
                        Some(Tok::Comma) => *i += 1,
                        Some(Tok::Ident(_)) | Some(Tok::Open) | Some(Tok::Star) => {
                            tree(toks, i, path.clone(), out);
                            // `x as y`: skip the alias.
                            while let Some(Tok::Ident(s)) = toks.get(*i) {
                                if s == "as" {
                                    *i += 2;
                                } else {
                                    break;
                                }
                            }
                        }
                        _ => return,
                    }
                }
            }
            Some(Tok::Star) => {
                *i += 1;
                out.push(path);
                return;
            }
            _ => {
                out.push(path);
                return;
            }
        }
    }
}

/// Every module path a file refers to through `crate::` or `super::`,
/// resolved against the file's module (and the inline modules it opens).
fn references(module: &Module, src: &str) -> Vec<Vec<String>> {
    let toks = tokens(src);
    let mut out = Vec::new();
    // Inline modules (`mod tests { … }`) open a scope for `super`.
    let mut inline: Vec<(String, usize)> = Vec::new();
    let mut depth = 0usize;
    let mut i = 0;
    while i < toks.len() {
        match &toks[i] {
            Tok::Open => depth += 1,
            Tok::Close => {
                depth -= 1;
                if inline.last().is_some_and(|(_, d)| *d == depth) {
                    inline.pop();
                }
            }
            Tok::Ident(k) if k == "mod" => {
                if let (Some(Tok::Ident(name)), Some(Tok::Open)) =
                    (toks.get(i + 1), toks.get(i + 2))
                {
                    inline.push((name.clone(), depth));
                }
            }
            Tok::Ident(k)
                if (k == "crate" || k == "super") && toks.get(i + 1) == Some(&Tok::Path) =>
            {
                let preceded_by_path = i > 0 && toks[i - 1] == Tok::Path;
                if !preceded_by_path {
                    let mut base: Vec<String> = module.clone();
                    base.extend(inline.iter().map(|(n, _)| n.clone()));
                    let mut j = i;
                    if k == "crate" {
                        base.clear();
                        j += 2;
                    } else {
                        while toks.get(j) == Some(&Tok::Ident("super".into()))
                            && toks.get(j + 1) == Some(&Tok::Path)
                        {
                            base.pop();
                            j += 2;
                        }
                    }
                    let mut paths = Vec::new();
                    tree(&toks, &mut j, base, &mut paths);
                    out.extend(paths);
                    i = j;
                    continue;
                }
            }
            _ => {}
        }
        i += 1;
    }
    out
}

struct Graph {
    /// File-level edges: module → modules it imports from.
    edges: BTreeMap<Module, BTreeSet<Module>>,
}

fn graph() -> Graph {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("pipeline");
    let mods = modules(&root);
    let mut edges: BTreeMap<Module, BTreeSet<Module>> = BTreeMap::new();
    for (m, file) in &mods {
        let src = std::fs::read_to_string(file).unwrap();
        let e = edges.entry(m.clone()).or_default();
        for path in references(m, &src) {
            // The longest prefix that is a module file.
            let target = (0..=path.len())
                .rev()
                .map(|n| path[..n].to_vec())
                .find(|p| mods.contains_key(p))
                .unwrap();
            if target != *m && !target.is_empty() {
                e.insert(target);
            }
        }
    }
    Graph { edges }
}

/// Strongly connected components with more than one member (Tarjan).
fn circles<N: Ord + Clone>(edges: &BTreeMap<N, BTreeSet<N>>) -> Vec<Vec<N>> {
    struct State<N> {
        index: BTreeMap<N, usize>,
        low: BTreeMap<N, usize>,
        stack: Vec<N>,
        on: BTreeSet<N>,
        next: usize,
        out: Vec<Vec<N>>,
    }
    fn visit<N: Ord + Clone>(v: &N, edges: &BTreeMap<N, BTreeSet<N>>, s: &mut State<N>) {
        s.index.insert(v.clone(), s.next);
        s.low.insert(v.clone(), s.next);
        s.next += 1;
        s.stack.push(v.clone());
        s.on.insert(v.clone());
        for w in edges.get(v).into_iter().flatten() {
            if !s.index.contains_key(w) {
                visit(w, edges, s);
                let l = s.low[w].min(s.low[v]);
                s.low.insert(v.clone(), l);
            } else if s.on.contains(w) {
                let l = s.index[w].min(s.low[v]);
                s.low.insert(v.clone(), l);
            }
        }
        if s.low[v] == s.index[v] {
            let mut comp = Vec::new();
            loop {
                let w = s.stack.pop().unwrap();
                s.on.remove(&w);
                comp.push(w.clone());
                if w == *v {
                    break;
                }
            }
            if comp.len() > 1 {
                s.out.push(comp);
            }
        }
    }
    let mut s = State {
        index: BTreeMap::new(),
        low: BTreeMap::new(),
        stack: vec![],
        on: BTreeSet::new(),
        next: 0,
        out: vec![],
    };
    for v in edges.keys() {
        if !s.index.contains_key(v) {
            visit(v, edges, &mut s);
        }
    }
    s.out
}

#[test]
fn the_reader_sees_paths_not_prose() {
    let src = r#"
        //! See crate::stages for more.
        use crate::config::{diag::{Findings, Mark}, study::Study as S};
        use super::epochs::EpochTables;
        fn f() { let _ = "crate::cli"; let c = '"'; crate::tables::write(); }
        mod tests { use super::*; use super::super::x::Y; }
    "#;
    let refs = references(&vec!["stages".into(), "fits".into()], src);
    let got: Vec<String> = refs.iter().map(|p| p.join("::")).collect();
    assert_eq!(
        got,
        [
            "config::diag::Findings",
            "config::diag::Mark",
            "config::study::Study",
            "stages::epochs::EpochTables",
            "tables::write",
            "stages::fits",
            "stages::x::Y",
        ]
    );
}

#[test]
fn no_circle_and_no_upward_import() {
    let g = graph();
    // Sanity: the reader found the imports it must find.
    assert!(
        g.edges[&vec!["stages".to_string(), "fits".to_string()]]
            .contains(&vec!["stages".to_string(), "transmissions".to_string()])
    );
    assert!(
        g.edges[&vec!["commands".to_string(), "run".to_string()]]
            .contains(&vec!["study".to_string()])
    );

    let mut problems = Vec::new();
    for (from, tos) in &g.edges {
        for to in tos {
            if layer(to) < layer(from) {
                problems.push(format!(
                    "upward import: `{}` uses `{}`",
                    show(from),
                    show(to)
                ));
            }
        }
    }
    for c in circles(&g.edges) {
        let names: Vec<String> = c.iter().map(show).collect();
        problems.push(format!("circle between files: {}", names.join(" ↔ ")));
    }
    // The same between top-level modules.
    let mut top: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
    for (from, tos) in &g.edges {
        let Some(f) = from.first() else { continue };
        let e = top.entry(f.clone()).or_default();
        for t in tos {
            if t[0] != *f {
                e.insert(t[0].clone());
            }
        }
    }
    for c in circles(&top) {
        problems.push(format!(
            "circle between top-level modules: {}",
            c.join(" ↔ ")
        ));
    }
    println!("top-level imports:");
    for (f, ts) in &top {
        println!(
            "  {f} → {}",
            ts.iter().cloned().collect::<Vec<_>>().join(", ")
        );
    }
    assert!(problems.is_empty(), "{}", problems.join("\n"));
}
