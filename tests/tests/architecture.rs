//! The workspace's rooms, checked: no file of a crate imports another in a loop (a module and
//! the files of its own folder count as one room), the engine depends on no crate that learns
//! or does I/O, the modelling crate on no I/O crate, and the client holds no statistical
//! procedure of its own (it calls `auspex-modelling`).

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("..")
}

/// Every `.rs` file under `src`, with its room: the first path component below `src`
/// (`engine_thread.rs` and `engine_thread/…` are the room `engine_thread`).
fn rooms(src: &Path) -> BTreeMap<String, Vec<PathBuf>> {
    let mut out: BTreeMap<String, Vec<PathBuf>> = BTreeMap::new();
    let mut stack = vec![src.to_path_buf()];
    while let Some(d) = stack.pop() {
        for e in std::fs::read_dir(&d).unwrap() {
            let p = e.unwrap().path();
            if p.is_dir() {
                stack.push(p);
            } else if p.extension().is_some_and(|x| x == "rs") {
                let rel = p.strip_prefix(src).unwrap();
                let first = rel
                    .components()
                    .next()
                    .unwrap()
                    .as_os_str()
                    .to_string_lossy();
                let room = first.trim_end_matches(".rs").to_string();
                out.entry(room).or_default().push(p);
            }
        }
    }
    out
}

/// The rooms each room names as `crate::ROOM`, outside its tests.
fn imports(src: &Path) -> BTreeMap<String, BTreeSet<String>> {
    let rooms = rooms(src);
    let names: BTreeSet<String> = rooms.keys().cloned().collect();
    let mut g = BTreeMap::new();
    for (room, files) in &rooms {
        let mut to = BTreeSet::new();
        for f in files {
            let text = std::fs::read_to_string(f).unwrap();
            let text = text.split("#[cfg(test)]\nmod tests").next().unwrap();
            for (i, _) in text.match_indices("crate::") {
                let rest = &text[i + 7..];
                let name: String = rest
                    .chars()
                    .take_while(|c| c.is_ascii_alphanumeric() || *c == '_')
                    .collect();
                if names.contains(&name) && &name != room {
                    to.insert(name);
                }
            }
        }
        g.insert(room.clone(), to);
    }
    g
}

/// A cycle in `g`, if any, as the rooms along it.
fn cycle(g: &BTreeMap<String, BTreeSet<String>>) -> Option<Vec<String>> {
    fn visit(
        n: &str,
        g: &BTreeMap<String, BTreeSet<String>>,
        state: &mut BTreeMap<String, u8>,
        path: &mut Vec<String>,
    ) -> Option<Vec<String>> {
        state.insert(n.to_string(), 1);
        path.push(n.to_string());
        for m in g.get(n).into_iter().flatten() {
            match state.get(m.as_str()).copied().unwrap_or(0) {
                1 => {
                    let at = path.iter().position(|x| x == m).unwrap();
                    let mut c = path[at..].to_vec();
                    c.push(m.clone());
                    return Some(c);
                }
                0 => {
                    if let Some(c) = visit(m, g, state, path) {
                        return Some(c);
                    }
                }
                _ => {}
            }
        }
        path.pop();
        state.insert(n.to_string(), 2);
        None
    }
    let mut state = BTreeMap::new();
    for n in g.keys() {
        if state.get(n).copied().unwrap_or(0) == 0 {
            if let Some(c) = visit(n, g, &mut state, &mut Vec::new()) {
                return Some(c);
            }
        }
    }
    None
}

#[test]
fn no_crate_has_an_import_loop() {
    for krate in [
        "daemon/engine/src",
        "daemon/modelling/src",
        "daemon/src",
        "proto/src",
        "client-py-free-cli/src",
    ] {
        let g = imports(&root().join(krate));
        assert!(g.len() > 1, "{krate}: no modules found");
        if let Some(c) = cycle(&g) {
            panic!(
                "{krate}: files import each other in a loop: {}",
                c.join(" → ")
            );
        }
    }
}

/// The `[dependencies]` section of a crate's manifest, as dependency names.
fn dependencies(manifest: &str) -> Vec<String> {
    let text = std::fs::read_to_string(root().join(manifest)).unwrap();
    let mut in_deps = false;
    let mut out = Vec::new();
    for line in text.lines() {
        let l = line.trim();
        if l.starts_with('[') {
            in_deps = l == "[dependencies]";
        } else if in_deps && !l.is_empty() && !l.starts_with('#') {
            out.push(l.split(['.', '=', ' ']).next().unwrap().to_string());
        }
    }
    out
}

#[test]
fn dependencies_point_down() {
    let io = [
        "tokio",
        "zeromq",
        "prost",
        "mio",
        "socket2",
        "crossbeam-channel",
        "tracing",
    ];
    let engine = dependencies("daemon/engine/Cargo.toml");
    for d in &engine {
        assert!(
            !io.contains(&d.as_str()) && !d.starts_with("auspex"),
            "auspex-engine depends on {d}: the engine may use no I/O crate and no other Auspex crate"
        );
    }
    let modelling = dependencies("daemon/modelling/Cargo.toml");
    assert!(modelling.contains(&"auspex-engine".to_string()));
    for d in &modelling {
        assert!(
            !io.contains(&d.as_str()) && (d == "auspex-engine" || !d.starts_with("auspex")),
            "auspex-modelling depends on {d}: it may use the engine and no I/O crate"
        );
    }
}

#[test]
fn the_client_holds_no_statistical_procedure() {
    // The client asks and draws: estimators, folds, fits and nulls live in auspex-modelling.
    // These are the words of a procedure's own code (its loops over folds and shuffles, its
    // interval and information formulas), not of calling one.
    let forbidden = [
        "fn stratified_folds",
        "fn clopper_pearson",
        "fn mutual_info",
        "fn shuffle_null",
        "fn cross_validate",
        "fn fit_cell(",
        "fn learning_curve",
        "ChaCha8Rng::seed_from_u64",
        "inverse_cdf(",
        "fetch_add(1, Ordering::Relaxed)",
    ];
    for files in rooms(&root().join("client-py-free-cli/src")).values() {
        for f in files {
            let text = std::fs::read_to_string(f).unwrap();
            for w in forbidden {
                assert!(
                    !text.contains(w),
                    "{}: contains `{w}` — statistical procedures belong in auspex-modelling",
                    f.display()
                );
            }
        }
    }
}
