//! Guards for the shape of `src/` (issue 9): no file over 800 lines but declared data
//! tables, no import circles, and arrows between top-level modules pointing down the layers
//! `src/lib.rs` describes. The tree is read as text, so no parser crate is needed: every
//! `crate::…` and `super::…` path in library code (comments and `#[cfg(test)]` items left
//! out) is one arrow from its file to the deepest module file the path reaches.

use std::collections::{BTreeMap, BTreeSet};
use std::fmt::Write as _;
use std::path::{Path, PathBuf};

/// Most lines a file in `src/` may have (RULES.md; issue 9).
const MAX_LINES: usize = 800;

/// Declared data tables allowed past [`MAX_LINES`]: (path under `src/`, why). None needs it
/// today; the unit-test files `formula/tests.rs` (750) and `dynamics/ode_tests.rs` (362)
/// are under the limit as they are.
const LONG_FILES: &[(&str, &str)] = &[];

/// Top-level modules, top layer first (src/lib.rs: "http, cli → job → the estimation core
/// → formula, request, model, linalg"). An import into any lower layer is allowed.
const LAYERS: &[&[&str]] = &[
    &["http", "cli", "demo"],
    &["job"],
    &["filter", "diagnostics", "dynamics", "simulate", "identify"],
    &["formula", "request", "model", "linalg", "problem", "config"],
];

/// Imports within one layer, each allowed on purpose; the circle guard keeps them acyclic.
const SIDEWAYS: &[(&str, &str)] = &[
    ("cli", "http"),           // `tacit serve` starts the web layer
    ("cli", "demo"),           // `tacit demo` runs and renders the demo scenarios
    ("demo", "http"),          // the demo drives a local server end to end
    ("filter", "dynamics"),    // a filter step propagates through the discretised dynamics
    ("filter", "diagnostics"), // questionable: filter/run.rs gates readings with chi2 / NIS
    ("simulate", "filter"),    // questionable: truth is propagated with filter::predict::Predictor
    ("model", "formula"),      // a checked model holds its compiled formulas
    ("request", "model"),      // validation builds the checked types
    ("request", "formula"),    // validation compiles the formulas
    ("request", "linalg"),     // validation checks covariances with a Cholesky factor
    ("request", "config"),     // request size limits
    ("request", "problem"),    // the one error shape the request side shares
];

/// A module path from the crate root: `["filter", "enkf"]` for `filter/enkf/mod.rs`.
type Module = Vec<String>;

/// Edges between named nodes, each with the `src/file:line` places that make it.
type Edges = BTreeMap<(String, String), Vec<String>>;

/// One file of `src/`: its path under `src/` (with `/`), the module it holds, its text.
struct Source {
    rel: String,
    module: Module,
    text: String,
}

/// One import arrow: where the path is written and the module file it reaches.
struct Arrow {
    place: String,
    from: Module,
    to: Module,
}

fn src_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("src")
}

/// Every `.rs` file under `dir`, sorted by path.
fn read_tree(dir: &Path) -> Vec<Source> {
    let (mut todo, mut out) = (vec![dir.to_path_buf()], Vec::new());
    while let Some(d) = todo.pop() {
        for entry in std::fs::read_dir(&d).expect("src/ is readable") {
            let path = entry.expect("a directory entry").path();
            if path.is_dir() {
                todo.push(path);
            } else if path.extension().is_some_and(|e| e == "rs") {
                let rel = path
                    .strip_prefix(dir)
                    .unwrap()
                    .to_string_lossy()
                    .replace('\\', "/");
                let text = std::fs::read_to_string(&path).expect("a UTF-8 source file");
                out.push(Source {
                    module: module_of(&rel),
                    rel,
                    text,
                });
            }
        }
    }
    out.sort_by(|a, b| a.rel.cmp(&b.rel));
    out
}

/// The module a file holds: `a/b.rs` and `a/b/mod.rs` are `a::b`, `lib.rs` is the root.
fn module_of(rel: &str) -> Module {
    let mut parts: Module = rel
        .trim_end_matches(".rs")
        .split('/')
        .map(String::from)
        .collect();
    if parts.last().is_some_and(|p| p == "mod") || parts == ["lib"] {
        parts.pop();
    }
    parts
}

/// `mod name {` (true) or `mod name;` (false), with any `pub` / `pub(...)` in front.
fn mod_decl(line: &str) -> Option<(String, bool)> {
    let mut rest = line.trim();
    if let Some(r) = rest.strip_prefix("pub") {
        rest = r.trim_start();
        if rest.starts_with('(') {
            rest = rest[rest.find(')')? + 1..].trim_start();
        }
    }
    let rest = rest.strip_prefix("mod ")?.trim_start();
    let end = rest
        .find(|c: char| !(c.is_alphanumeric() || c == '_'))
        .unwrap_or(rest.len());
    let braced = match rest[end..].trim() {
        "{" => true,
        ";" => false,
        _ => return None,
    };
    Some((rest[..end].to_string(), braced))
}

/// The lines of `text` the library build sees, each with the inline modules it sits in:
/// `//` comments (doc comments too) cut off, every `#[cfg(test)]` item blanked up to the
/// first line at its own indentation that ends in `;` or `}` (src/ is rustfmt-formatted).
/// Also gives the out-of-line modules declared under `#[cfg(test)]` (relative paths).
fn code_lines(text: &str) -> (Vec<(String, Module)>, Vec<Module>) {
    let strip = |l: &str| l.split("//").next().unwrap_or("").trim_end().to_string();
    let lines: Vec<String> = text.lines().map(strip).collect();
    let indent = |l: &str| l.len() - l.trim_start().len();
    let (mut out, mut test_mods, mut inline) =
        (Vec::new(), Vec::new(), Vec::<(usize, String)>::new());
    let mut i = 0;
    while i < lines.len() {
        let (line, depth) = (lines[i].trim(), indent(&lines[i]));
        let here: Module = inline.iter().map(|(_, n)| n.clone()).collect();
        if line == "#[cfg(test)]" {
            let item = (i + 1..lines.len()).find(|&k| !lines[k].trim().starts_with("#["));
            let item = item.unwrap_or(lines.len());
            if let Some((name, false)) = lines.get(item).and_then(|l| mod_decl(l)) {
                test_mods.push([here.clone(), vec![name]].concat());
            }
            let ends = |k: &usize| indent(&lines[*k]) == depth && lines[*k].ends_with([';', '}']);
            let end = (item..lines.len()).find(ends).unwrap_or(lines.len() - 1);
            out.extend((i..=end).map(|_| (String::new(), here.clone())));
            i = end + 1;
            continue;
        }
        if line == "}" && inline.last().is_some_and(|(d, _)| *d == depth) {
            inline.pop();
        } else if let Some((name, true)) = mod_decl(line) {
            inline.push((depth, name));
        }
        out.push((lines[i].clone(), here));
        i += 1;
    }
    (out, test_mods)
}

fn skip_ws(s: &[u8], mut i: usize) -> usize {
    while s.get(i).is_some_and(u8::is_ascii_whitespace) {
        i += 1;
    }
    i
}

/// Reads the path starting at `s[at..]` after `prefix`, pushing each full path it names
/// with the offset where it ends: `crate::a::{b, c::{d, e as f}, self}` names `crate::a::b`,
/// `crate::a::c::d`, `crate::a::c::e` and `crate::a`; a glob `x::*` names `x`. Returns the
/// offset after the path.
fn read_paths(s: &[u8], at: usize, prefix: &[String], out: &mut Vec<(Module, usize)>) -> usize {
    let (mut path, mut i) = (prefix.to_vec(), at);
    loop {
        i = skip_ws(s, i);
        if s.get(i) == Some(&b'{') {
            i += 1;
            loop {
                i = skip_ws(s, i);
                match s.get(i) {
                    None => return i,
                    Some(b'}') => return i + 1,
                    Some(b',') => i += 1,
                    Some(_) => {
                        i = read_paths(s, i, &path, out);
                        while s.get(i).is_some_and(|c| *c != b',' && *c != b'}') {
                            i += 1; // ` as alias`
                        }
                    }
                }
            }
        }
        let start = i;
        while s
            .get(i)
            .is_some_and(|c| c.is_ascii_alphanumeric() || *c == b'_')
        {
            i += 1;
        }
        if i == start {
            break;
        }
        if &s[start..i] != b"self" {
            path.push(String::from_utf8_lossy(&s[start..i]).into_owned());
        }
        let j = skip_ws(s, i);
        if !s[j..].starts_with(b"::") {
            break;
        }
        i = j + 2;
    }
    out.push((path, i));
    i
}

/// Every `crate::` / `super::` path in `code`, with the offset where each ends.
fn paths_in(code: &str) -> Vec<(Module, usize)> {
    let (s, mut out, mut i) = (code.as_bytes(), Vec::new(), 0);
    while i < s.len() {
        let starts = (s[i..].starts_with(b"crate") || s[i..].starts_with(b"super"))
            && (i == 0 || !(s[i - 1].is_ascii_alphanumeric() || b"_:".contains(&s[i - 1])))
            && s[skip_ws(s, i + 5)..].starts_with(b"::");
        i = if starts {
            read_paths(s, i, &[], &mut out)
        } else {
            i + 1
        };
    }
    out
}

/// The deepest module file `path` reaches from module `here`: `crate` is the root, each
/// leading `super` one level up. `None` when it reaches no file below the root.
fn resolve(path: &[String], here: &[String], files: &BTreeSet<Module>) -> Option<Module> {
    let (mut full, mut rest) = match path.split_first()? {
        (first, rest) if first == "crate" => (vec![], rest),
        _ => (here.to_vec(), path),
    };
    while rest.first().is_some_and(|s| s == "super") {
        full.pop();
        rest = &rest[1..];
    }
    full.extend_from_slice(rest);
    (1..=full.len())
        .rev()
        .map(|k| full[..k].to_vec())
        .find(|m| files.contains(m))
}

/// Every import arrow in the library's non-test code. Left out: `main.rs` (the binary, a
/// crate of its own), test files (`tests.rs`, `*_tests.rs`, modules declared under
/// `#[cfg(test)]`) and arrows from a file to itself.
fn arrows(tree: &[Source]) -> Vec<Arrow> {
    let cleaned: Vec<_> = tree.iter().map(|f| code_lines(&f.text)).collect();
    let mut test_mods = tree
        .iter()
        .zip(&cleaned)
        .flat_map(|(f, (_, t))| t.iter().map(|m| [&f.module[..], m].concat()));
    let test_mods: Vec<Module> = test_mods.by_ref().collect();
    let is_test = |f: &Source| {
        let name = f.rel.rsplit('/').next().unwrap_or_default();
        name == "tests.rs"
            || name.ends_with("_tests.rs")
            || f.rel == "main.rs"
            || test_mods.iter().any(|t| f.module.starts_with(t))
    };
    let keep: Vec<_> = tree
        .iter()
        .zip(&cleaned)
        .filter(|(f, _)| !is_test(f))
        .collect();
    let files: BTreeSet<Module> = keep.iter().map(|(f, _)| f.module.clone()).collect();
    let mut out = Vec::new();
    for (f, (lines, _)) in keep {
        let code: String = lines.iter().map(|(l, _)| format!("{l}\n")).collect();
        let mut starts = vec![0]; // byte offset where each line starts
        starts.extend(code.match_indices('\n').map(|(at, _)| at + 1));
        for (path, end) in paths_in(&code) {
            let line = starts.partition_point(|&s| s < end); // 1-based: `end` follows a segment
            let here = [&f.module[..], &lines[line - 1].1].concat();
            let place = format!("src/{}:{line}", f.rel);
            match resolve(&path, &here, &files) {
                Some(to) if to != f.module => out.push(Arrow {
                    place,
                    from: f.module.clone(),
                    to,
                }),
                _ => {}
            }
        }
    }
    out.dedup_by(|a, b| (&a.place, &a.to) == (&b.place, &b.to));
    out
}

/// The edges `node` draws between named nodes (arrows it maps to `None` are left out).
fn edges(arrows: &[Arrow], node: impl Fn(&Arrow) -> Option<(String, String)>) -> Edges {
    let mut out = Edges::new();
    for a in arrows {
        if let Some(key) = node(a) {
            let places = out.entry(key).or_default();
            if !places.contains(&a.place) {
                places.push(a.place.clone());
            }
        }
    }
    out
}

/// The circles of a graph: its strongly connected components with two or more nodes, by
/// Tarjan's algorithm (R. Tarjan, "Depth-first search and linear graph algorithms", SIAM
/// J. Computing 1(2), 1972; common practice).
fn circles(edges: &Edges) -> Vec<Vec<String>> {
    let mut next: BTreeMap<&str, Vec<&str>> = BTreeMap::new();
    for (a, b) in edges.keys() {
        next.entry(a).or_default().push(b);
        next.entry(b).or_default();
    }
    struct Walk<'a> {
        next: &'a BTreeMap<&'a str, Vec<&'a str>>,
        seen: BTreeMap<&'a str, (usize, usize)>, // (visit index, lowest index reachable)
        stack: Vec<&'a str>,
        out: Vec<Vec<String>>,
    }
    fn visit<'a>(w: &mut Walk<'a>, v: &'a str) {
        let at = w.seen.len();
        w.seen.insert(v, (at, at));
        w.stack.push(v);
        let next = w.next;
        for &u in &next[v] {
            let reach = if !w.seen.contains_key(u) {
                visit(w, u);
                w.seen[u].1
            } else if w.stack.contains(&u) {
                w.seen[u].0 // a back edge into the component being built
            } else {
                continue; // `u` already sits in a finished component
            };
            let low = reach.min(w.seen[v].1);
            w.seen.get_mut(v).unwrap().1 = low;
        }
        if w.seen[v].0 == w.seen[v].1 {
            let from = w.stack.iter().rposition(|&x| x == v).unwrap();
            let comp: Vec<String> = w.stack.drain(from..).map(String::from).collect();
            if comp.len() > 1 {
                w.out.push(comp);
            }
        }
    }
    let mut walk = Walk {
        next: &next,
        seen: BTreeMap::new(),
        stack: Vec::new(),
        out: Vec::new(),
    };
    for &v in next.keys() {
        if !walk.seen.contains_key(v) {
            visit(&mut walk, v);
        }
    }
    walk.out
}

/// Each circle with its edges and the places that make them, or nothing.
fn describe(level: &str, edges: &Edges) -> String {
    let mut out = String::new();
    for mut comp in circles(edges) {
        comp.sort();
        writeln!(out, "import circle among {level}: {}", comp.join(" <-> ")).unwrap();
        for ((a, b), places) in edges
            .iter()
            .filter(|((a, b), _)| comp.contains(a) && comp.contains(b))
        {
            writeln!(out, "    {a} -> {b}   at {}", places.join(", ")).unwrap();
        }
    }
    out
}

/// The top-level module a module sits in (`lib` for the root).
fn top(m: &[String]) -> String {
    m.first().cloned().unwrap_or_else(|| "lib".into())
}

#[test]
fn src_files_stay_under_800_lines() {
    let tree = read_tree(&src_dir());
    let mut bad = Vec::new();
    for f in &tree {
        let (n, declared) = (
            f.text.lines().count(),
            LONG_FILES.iter().any(|(p, _)| *p == f.rel),
        );
        if n > MAX_LINES && !declared {
            bad.push(format!("src/{} has {n} lines (at most {MAX_LINES})", f.rel));
        } else if n <= MAX_LINES && declared {
            bad.push(format!(
                "src/{} is in LONG_FILES but has only {n} lines",
                f.rel
            ));
        }
    }
    for (p, _) in LONG_FILES
        .iter()
        .filter(|(p, _)| !tree.iter().any(|f| f.rel == *p))
    {
        bad.push(format!("src/{p} is in LONG_FILES but does not exist"));
    }
    let bad = bad.join("\n");
    assert!(
        bad.is_empty(),
        "split these or declare them data tables in LONG_FILES:\n{bad}"
    );
}

#[test]
fn imports_form_no_circles() {
    let arrows = arrows(&read_tree(&src_dir()));
    // Whole top-level modules; imports inside one are its own business.
    let modules = edges(&arrows, |a| {
        (top(&a.from) != top(&a.to)).then(|| (top(&a.from), top(&a.to)))
    });
    // Files; a module file and its direct children (re-exports, `use super::X`) are one unit.
    let child = |a: &[String], b: &[String]| b.len() == a.len() + 1 && b.starts_with(a);
    let files = edges(&arrows, |a| {
        (!child(&a.from, &a.to) && !child(&a.to, &a.from))
            .then(|| (a.from.join("::"), a.to.join("::")))
    });
    let report = describe("top-level modules", &modules) + &describe("files", &files);
    assert!(
        report.is_empty(),
        "imports in src/ must form no circles:\n{report}"
    );
}

#[test]
fn arrows_point_down() {
    let layer = |m: &str| LAYERS.iter().position(|l| l.contains(&m));
    let mut bad = Vec::new();
    for a in arrows(&read_tree(&src_dir())) {
        let (from, to) = (top(&a.from), top(&a.to));
        let why = match (layer(&from), layer(&to)) {
            _ if from == to || SIDEWAYS.contains(&(&from, &to)) => continue,
            (Some(f), Some(t)) if f < t => continue,
            (Some(_), Some(_)) => "points up or sideways",
            _ => "involves a module missing from LAYERS",
        };
        let (f, t) = (a.from.join("::"), a.to.join("::"));
        bad.push(format!(
            "{}: forbidden arrow {from} -> {to} ({f} -> {t}) {why}",
            a.place
        ));
    }
    let bad = bad.join("\n");
    assert!(
        bad.is_empty(),
        "imports must point down LAYERS or be in SIDEWAYS:\n{bad}"
    );
}

#[test]
fn scanner_sees_groups_supers_and_circles() {
    let code = "use crate::a::{b, c::{d, e as f}, self};\n// crate::z\nuse super::super::g::*;\n";
    let (lines, _) = code_lines(code);
    let found: Vec<_> = lines
        .iter()
        .flat_map(|(l, _)| paths_in(l))
        .map(|(p, _)| p.join("::"))
        .collect();
    assert_eq!(
        found,
        [
            "crate::a::b",
            "crate::a::c::d",
            "crate::a::c::e",
            "crate::a",
            "super::super::g"
        ]
    );
    let files: BTreeSet<Module> = [vec!["x".to_string()], vec!["x".into(), "y".into()]].into();
    let here = ["x".to_string(), "y".into(), "z".into()];
    let path = ["super".to_string(), "y".into(), "Item".into()];
    assert_eq!(resolve(&path, &here, &files).as_deref(), Some(&here[..2]));
    let tested =
        "use crate::p;\n#[cfg(test)]\nmod tests {\n    use crate::q;\n}\n#[cfg(test)]\nmod aid;\n";
    let (lines, test_mods) = code_lines(tested);
    assert_eq!(lines.iter().filter(|(l, _)| !l.is_empty()).count(), 1);
    assert_eq!(test_mods, [["aid"]]);
    let graph = |pairs: &[(&str, &str)]| -> Edges {
        pairs
            .iter()
            .map(|(a, b)| ((a.to_string(), b.to_string()), vec![]))
            .collect()
    };
    let mut found = circles(&graph(&[
        ("a", "b"),
        ("b", "c"),
        ("c", "a"),
        ("c", "d"),
        ("d", "d2"),
    ]));
    found.iter_mut().for_each(|c| c.sort());
    assert_eq!(found, [["a", "b", "c"]]);
    assert!(circles(&graph(&[("a", "b"), ("b", "c"), ("a", "c")])).is_empty());
}
