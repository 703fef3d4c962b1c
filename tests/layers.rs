//! The service's layers point one way (DEVELOPERS.md, "Layers"): every
//! `crate::…` path in `utility-service/src` is an edge from the module that
//! writes it to the module it names, and no edge may point to a higher layer.
//! Run with `-- --nocapture` to list the edges.

use std::collections::BTreeSet;
use std::path::{Path, PathBuf};

/// Layer of each top-level module of the service, highest first. The same map
/// is in DEVELOPERS.md; a module missing here fails the test.
const LAYERS: &[(&str, &[&str])] = &[
    ("entry", &["cli", "app", "demo", "offline"]),
    ("routes", &["routes", "error"]),
    ("work", &["jobs", "committer"]),
    ("store", &["store"]),
    (
        "rules",
        &[
            "ingest",
            "settlement",
            "schedule",
            "reconcile",
            "report",
            "records",
            "jobspec",
            "config",
            "metrics",
            "clock",
        ],
    ),
];

/// Crates the rules layer may not use: it is pure, with no IO of its own.
const IMPURE: &[&str] = &["sqlx::", "axum::", "tokio::", "reqwest::", "std::fs::", "std::net::TcpStream"];

fn rank(module: &str) -> Option<usize> {
    LAYERS.iter().position(|(_, ms)| ms.contains(&module)).map(|i| LAYERS.len() - i)
}

fn layer_name(module: &str) -> &'static str {
    LAYERS.iter().find(|(_, ms)| ms.contains(&module)).map_or("?", |(n, _)| n)
}

fn sources(dir: &Path, out: &mut Vec<PathBuf>) {
    for e in std::fs::read_dir(dir).expect("source directory") {
        let p = e.expect("entry").path();
        if p.is_dir() {
            sources(&p, out);
        } else if p.extension().is_some_and(|x| x == "rs") {
            out.push(p);
        }
    }
}

/// The top-level module a source file belongs to (`jobs/worker.rs` → `jobs`).
fn module_of(src: &Path, file: &Path) -> String {
    let rel = file.strip_prefix(src).expect("under src");
    let first = rel.components().next().expect("a component").as_os_str().to_string_lossy().into_owned();
    first.trim_end_matches(".rs").to_owned()
}

/// Code without comments (line comments and doc comments; the service has no
/// block comments holding paths).
fn code_of(text: &str) -> String {
    text.lines()
        .map(|l| {
            let t = l.trim_start();
            if t.starts_with("//") {
                ""
            } else {
                l.split(" // ").next().unwrap_or("")
            }
        })
        .collect::<Vec<_>>()
        .join("\n")
}

/// The top-level modules a piece of code names with `crate::…`, including each
/// member of a `crate::{a, b::c}` group.
fn targets(code: &str) -> BTreeSet<String> {
    let mut out = BTreeSet::new();
    let ident = |s: &str| s.chars().take_while(|c| c.is_alphanumeric() || *c == '_').collect::<String>();
    for (at, _) in code.match_indices("crate::") {
        if at > 0 && code[..at].ends_with(|c: char| c.is_alphanumeric() || c == '_') {
            continue; // `meterveil_crate::`, not ours
        }
        let rest = &code[at + "crate::".len()..];
        if let Some(group) = rest.strip_prefix('{') {
            let mut depth = 1;
            let mut start = 0;
            for (i, c) in group.char_indices() {
                match c {
                    '{' => depth += 1,
                    '}' => depth -= 1,
                    ',' if depth == 1 => {
                        out.insert(ident(group[start..i].trim()));
                        start = i + 1;
                    }
                    _ => {}
                }
                if depth == 0 {
                    out.insert(ident(group[start..i].trim()));
                    break;
                }
            }
        } else {
            out.insert(ident(rest));
        }
    }
    out.remove("");
    out
}

#[test]
fn service_layers_point_one_way() {
    let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    let mut files = Vec::new();
    sources(&src, &mut files);
    files.sort();
    let (mut edges, mut upward, mut unmapped, mut impure) = (BTreeSet::new(), Vec::new(), BTreeSet::new(), Vec::new());
    for f in &files {
        let from = module_of(&src, f);
        if from == "main" || from == "lib" {
            continue; // the binary's root and the module list
        }
        let code = code_of(&std::fs::read_to_string(f).expect("readable source"));
        let Some(rf) = rank(&from) else {
            unmapped.insert(from);
            continue;
        };
        if layer_name(&from) == "rules" {
            for bad in IMPURE {
                if code.contains(bad) {
                    impure.push(format!("{} uses {bad}", f.display()));
                }
            }
        }
        for to in targets(&code) {
            if to == from {
                continue;
            }
            let Some(rt) = rank(&to) else {
                unmapped.insert(to);
                continue;
            };
            edges.insert((from.clone(), to.clone()));
            if rt > rf {
                upward.push(format!(
                    "{} ({}) -> {to} ({})",
                    f.strip_prefix(&src).unwrap_or(f).display(),
                    layer_name(&from),
                    layer_name(&to)
                ));
            }
        }
    }
    for (a, b) in &edges {
        println!("{a} ({}) -> {b} ({})", layer_name(a), layer_name(b));
    }
    assert!(unmapped.is_empty(), "modules missing from the layer map: {unmapped:?}");
    assert!(upward.is_empty(), "edges pointing up the layer map:\n{}", upward.join("\n"));
    assert!(impure.is_empty(), "the rules layer does IO:\n{}", impure.join("\n"));
    assert!(edges.len() > 20, "too few edges found ({}): is the parser reading the sources?", edges.len());
}

#[test]
fn the_parser_finds_grouped_and_nested_paths() {
    let code = "use crate::{a, b::{c, d}, e::F};\nlet x = crate::g::h();\nuse meterveil_crate::z;";
    let got: Vec<String> = targets(code).into_iter().collect();
    assert_eq!(got, ["a", "b", "e", "g"]);
}

/// `shared` stays pure: no async runtime, database or HTTP in its dependencies.
#[test]
fn shared_depends_on_no_runtime_database_or_http() {
    let toml = std::fs::read_to_string(Path::new(env!("CARGO_MANIFEST_DIR")).join("../shared/Cargo.toml"))
        .expect("shared/Cargo.toml");
    let deps = toml.split("[dependencies]").nth(1).unwrap_or("").split("\n[").next().unwrap_or("");
    for bad in ["tokio", "sqlx", "axum", "reqwest", "hyper"] {
        assert!(!deps.lines().any(|l| l.trim_start().starts_with(bad)), "shared/Cargo.toml depends on {bad}");
    }
}

/// The served binary does not link the edge: the gateway crate is an optional
/// dependency that only the `demo` feature enables, and only the demo module
/// (`src/demo/`, compiled with that feature) names it.
#[test]
fn only_the_demo_links_the_gateway() {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let toml = std::fs::read_to_string(root.join("Cargo.toml")).expect("Cargo.toml");
    let section = |name: &str| -> String {
        let head = format!("\n[{name}]\n");
        toml.split(head.as_str()).nth(1).unwrap_or("").split("\n[").next().unwrap_or("").to_owned()
    };
    let deps = section("dependencies");
    let gateway: Vec<&str> = deps.lines().filter(|l| l.trim_start().starts_with("meterveil-gateway")).collect();
    assert_eq!(gateway.len(), 1, "meterveil-gateway in [dependencies]: {gateway:?}");
    assert!(gateway[0].contains("optional = true"), "the gateway must be optional: {}", gateway[0]);
    let features = section("features");
    let enabling: Vec<&str> = features.lines().filter(|l| l.contains("dep:meterveil-gateway")).collect();
    assert_eq!(enabling.len(), 1, "features enabling the gateway: {enabling:?}");
    assert!(enabling[0].trim_start().starts_with("demo ="), "{}", enabling[0]);
    assert!(!features.lines().any(|l| l.trim_start().starts_with("default")), "no default features: {features}");
    let lib = std::fs::read_to_string(root.join("src/lib.rs")).expect("lib.rs");
    assert!(
        lib.contains("#[cfg(feature = \"demo\")]\npub mod demo;"),
        "demo.rs must be compiled only with the feature"
    );
    let mut files = Vec::new();
    sources(&root.join("src"), &mut files);
    for f in files {
        let code = code_of(&std::fs::read_to_string(&f).expect("source"));
        if code.contains("meterveil_gateway") {
            let in_demo = f.strip_prefix(root.join("src")).is_ok_and(|r| r.starts_with("demo"));
            assert!(in_demo, "{} names the gateway crate", f.display());
        }
    }
}

/// Lines of each function in `code` (from its `fn` line to its closing brace),
/// by brace counting outside comments, strings and character literals.
fn function_lengths(code: &str) -> Vec<(String, usize, usize)> {
    let lines: Vec<&str> = code.lines().collect();
    let strip = |l: &str| -> String {
        let mut out = String::new();
        let mut chars = l.chars().peekable();
        let mut in_str = false;
        while let Some(c) = chars.next() {
            match c {
                '\\' if in_str => {
                    chars.next();
                }
                '"' => in_str = !in_str,
                '/' if !in_str && chars.peek() == Some(&'/') => break,
                '\'' if !in_str => {
                    // A character literal such as '{' (not a lifetime): skip it whole.
                    let rest: String = chars.clone().take(3).collect();
                    if rest.chars().nth(1) == Some('\'') {
                        chars.next();
                        chars.next();
                    } else if rest.starts_with('\\') && rest.chars().nth(2) == Some('\'') {
                        chars.next();
                        chars.next();
                        chars.next();
                    }
                }
                _ if !in_str => out.push(c),
                _ => {}
            }
        }
        out
    };
    let mut out = Vec::new();
    for (i, l) in lines.iter().enumerate() {
        let t = l.trim_start();
        let t = t.strip_prefix("pub(crate) ").or_else(|| t.strip_prefix("pub(super) ")).unwrap_or(t);
        let t = t.strip_prefix("pub ").unwrap_or(t);
        let t = t.strip_prefix("async ").unwrap_or(t);
        let Some(rest) = t.strip_prefix("fn ") else { continue };
        let name: String = rest.chars().take_while(|c| c.is_alphanumeric() || *c == '_').collect();
        let (mut depth, mut started) = (0i64, false);
        for (j, l2) in lines.iter().enumerate().skip(i) {
            let code = strip(l2);
            if !started && code.trim_end().ends_with(';') {
                break; // a declaration without a body
            }
            for c in code.chars() {
                match c {
                    '{' => {
                        depth += 1;
                        started = true;
                    }
                    '}' => depth -= 1,
                    _ => {}
                }
            }
            if started && depth == 0 {
                out.push((name.clone(), i + 1, j - i + 1));
                break;
            }
        }
    }
    out
}

/// No source file over about 600 lines and no function over about 80, in the
/// three crates' `src/` (tests and benches excepted).
#[test]
fn sources_and_functions_stay_small() {
    const MAX_FILE: usize = 620;
    const MAX_FN: usize = 85;
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("..");
    let mut files = Vec::new();
    for krate in ["shared", "gateway", "utility-service"] {
        sources(&root.join(krate).join("src"), &mut files);
    }
    let mut too_big = Vec::new();
    for f in &files {
        let text = std::fs::read_to_string(f).expect("source");
        let n = text.lines().count();
        if n > MAX_FILE {
            too_big.push(format!("{}: {n} lines", f.display()));
        }
        for (name, line, len) in function_lengths(&text) {
            if len > MAX_FN {
                too_big.push(format!("{}:{line} fn {name}: {len} lines", f.display()));
            }
        }
    }
    assert!(files.len() > 50, "too few sources found ({})", files.len());
    assert!(too_big.is_empty(), "over the size limits (files {MAX_FILE}, functions {MAX_FN}):\n{}", too_big.join("\n"));
}

#[test]
fn function_lengths_count_braces_outside_strings() {
    let code = "fn a() {\n    let s = \"{{\";\n    let c = '{';\n    // }\n}\nfn b();\npub async fn c(x: u8) -> u8 {\n    x\n}\n";
    assert_eq!(function_lengths(code), vec![("a".to_owned(), 1, 5), ("c".to_owned(), 7, 3)]);
}
