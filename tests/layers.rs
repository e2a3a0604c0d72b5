//! The modules form layers: no module of `src/` uses one that uses it back, directly or
//! through others, so each can be read (and tested) knowing only those below it. The order
//! is drawn in notebooks-free-docs/architecture.md; this test holds the code to it.

use std::collections::{BTreeMap, BTreeSet};
use std::path::Path;

/// Top-level module of a source file (`src/cluster/gmm.rs` → `cluster`).
fn module_of(path: &Path, src: &Path) -> String {
    let rel = path.strip_prefix(src).unwrap();
    let first = rel
        .components()
        .next()
        .unwrap()
        .as_os_str()
        .to_string_lossy();
    first.trim_end_matches(".rs").to_string()
}

/// The top-level modules a file's code (not its comments, not its unit tests) names
/// through `crate::`.
fn uses(text: &str) -> BTreeSet<String> {
    let code = text.split("#[cfg(test)]").next().unwrap_or("");
    let mut out = BTreeSet::new();
    for line in code.lines() {
        let line = line.split("//").next().unwrap_or("");
        for (i, _) in line.match_indices("crate::") {
            let rest = &line[i + "crate::".len()..];
            let names: Vec<&str> = match rest.strip_prefix('{') {
                Some(group) => group.split('}').next().unwrap_or("").split(',').collect(),
                None => vec![rest],
            };
            for n in names {
                let n: String = n
                    .trim()
                    .chars()
                    .take_while(|c| c.is_alphanumeric() || *c == '_')
                    .collect();
                if !n.is_empty() {
                    out.insert(n);
                }
            }
        }
    }
    out
}

fn source_files(dir: &Path, out: &mut Vec<std::path::PathBuf>) {
    for e in std::fs::read_dir(dir).unwrap() {
        let p = e.unwrap().path();
        if p.is_dir() {
            source_files(&p, out);
        } else if p.extension().is_some_and(|x| x == "rs") {
            out.push(p);
        }
    }
}

/// Module → the other top-level modules it uses.
fn graph() -> BTreeMap<String, BTreeSet<String>> {
    let src = Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    let mut files = Vec::new();
    source_files(&src, &mut files);
    let mut g: BTreeMap<String, BTreeSet<String>> = BTreeMap::new();
    for f in files {
        let m = module_of(&f, &src);
        if m == "main" || m == "lib" {
            continue;
        }
        let text = std::fs::read_to_string(&f).unwrap();
        let deps: Vec<String> = uses(&text).into_iter().filter(|d| *d != m).collect();
        g.entry(m).or_default().extend(deps);
    }
    g
}

/// A path from `from` back to `to` through `g`, if any.
fn path_between(
    g: &BTreeMap<String, BTreeSet<String>>,
    from: &str,
    to: &str,
    seen: &mut BTreeSet<String>,
) -> Option<Vec<String>> {
    if from == to {
        return Some(vec![to.to_string()]);
    }
    if !seen.insert(from.to_string()) {
        return None;
    }
    for next in g.get(from).into_iter().flatten() {
        if let Some(mut rest) = path_between(g, next, to, seen) {
            rest.insert(0, from.to_string());
            return Some(rest);
        }
    }
    None
}

#[test]
fn no_module_uses_one_that_uses_it_back() {
    let g = graph();
    assert!(g.len() > 20, "found only {:?}", g.keys());
    for (m, deps) in &g {
        for d in deps {
            if let Some(back) = path_between(&g, d, m, &mut BTreeSet::new()) {
                panic!(
                    "{m} uses {d}, and {d} leads back to it: {}",
                    back.join(" → ")
                );
            }
        }
    }
}

#[test]
fn the_scanner_sees_plain_grouped_and_nested_uses() {
    let text = "use crate::stack::MapStack;\n\
                use crate::{error, io::Limits};\n\
                // crate::comment_only is not a use\n\
                fn f() { crate::labels::interior_3x3(&[], 1, 0, 0); }\n\
                #[cfg(test)]\nmod tests { use crate::test_only; }\n";
    let got: Vec<String> = uses(text).into_iter().collect();
    assert_eq!(got, ["error", "io", "labels", "stack"]);
}

#[test]
fn the_command_line_sits_on_top_and_reports_do_not_read_fields() {
    let g = graph();
    for (m, deps) in &g {
        assert!(!deps.contains("cli"), "{m} uses the command-line module");
    }
    assert!(!g["report"].contains("fields"), "report uses fields");
}
