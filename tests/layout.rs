//! The layering of `src/` (DEVELOPERS.md, Layout) holds: no two modules import each other, and
//! each layer imports only the layers below it (`api` < `serve` < `http` < `grpc`; `offline`
//! beside `http`). Read off
//! the source text: every `crate::a::b` path a file names, doc links included.

use std::collections::{BTreeMap, BTreeSet};
use std::path::Path;

/// Module path (`serve::config`) of every file under `src/`, with the `crate::` paths it names.
fn modules() -> BTreeMap<String, BTreeSet<String>> {
    fn walk(dir: &Path, out: &mut BTreeMap<String, BTreeSet<String>>) {
        for entry in std::fs::read_dir(dir).unwrap() {
            let path = entry.unwrap().path();
            if path.is_dir() {
                walk(&path, out);
            } else if path.extension().is_some_and(|e| e == "rs") {
                let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
                let rel = path.strip_prefix(&src).unwrap().with_extension("");
                let mut name = rel.to_string_lossy().replace('/', "::");
                if let Some(parent) = name.strip_suffix("::mod") {
                    name = parent.to_owned();
                }
                let text = std::fs::read_to_string(&path).unwrap();
                let paths = text
                    .match_indices("crate::")
                    .map(|(at, _)| {
                        text[at + 7..]
                            .chars()
                            .take_while(|c| {
                                c.is_ascii_lowercase() || c.is_ascii_digit() || *c == '_' || *c == ':'
                            })
                            .collect::<String>()
                            .trim_end_matches(':')
                            .to_owned()
                    })
                    .collect();
                out.insert(name, paths);
            }
        }
    }
    let mut out = BTreeMap::new();
    walk(&Path::new(env!("CARGO_MANIFEST_DIR")).join("src"), &mut out);
    out
}

/// The longest module of `known` that `path` names (`serve::config::Config` → `serve::config`).
fn resolve(path: &str, known: &BTreeMap<String, BTreeSet<String>>) -> Option<String> {
    let parts: Vec<&str> = path.split("::").collect();
    (1..=parts.len()).rev().map(|i| parts[..i].join("::")).find(|m| known.contains_key(m))
}

#[test]
fn no_two_modules_import_each_other_and_layers_point_inward() {
    let mods = modules();
    assert!(mods.contains_key("serve::engine") && mods.contains_key("api::wire"), "{:?}", mods.keys());
    let edges: BTreeMap<&str, BTreeSet<String>> = mods
        .iter()
        .map(|(m, paths)| {
            (m.as_str(), paths.iter().filter_map(|p| resolve(p, &mods)).filter(|d| d != m).collect())
        })
        .collect();
    for (a, deps) in &edges {
        for b in deps {
            assert!(!edges[b.as_str()].contains(*a), "{a} and {b} import each other");
        }
    }
    let layer = |m: &str| m.split("::").next().unwrap_or("").to_owned();
    let below: BTreeMap<&str, &[&str]> = [
        ("api", &[][..]),
        ("serve", &["api"][..]),
        ("http", &["api", "serve"][..]),
        ("offline", &["api", "serve"][..]),
        // The gRPC front end shares the HTTP front end's state and serving path.
        ("grpc", &["api", "serve", "http"][..]),
    ]
    .into_iter()
    .collect();
    for (a, deps) in &edges {
        let Some(allowed) = below.get(layer(a).as_str()) else { continue };
        for b in deps {
            let lb = layer(b);
            assert!(lb == layer(a) || allowed.contains(&lb.as_str()), "{a} (layer {}) imports {b}", layer(a));
        }
    }
}
