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
    ("rules", &["ingest", "settlement", "report", "records", "jobspec", "config", "metrics", "clock"]),
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
