//! `auspex closed-loop-sim` as a user runs it: the defaults work (found broken once: the
//! preference spread's default was refused by its own parser), the spread is said in the
//! header and a bad one is refused naming the option, and the JSON holds one figure per seed.

mod common;

/// The real binary, in a scratch directory.
fn auspex(args: &[&str]) -> (bool, String, String) {
    let dir = tempfile::tempdir().unwrap();
    common::auspex(dir.path(), args)
}

#[test]
fn the_defaults_run_and_the_json_has_every_seed() {
    let (ok, out, err) = auspex(&[
        "closed-loop-sim",
        "--units",
        "1",
        "--stimuli",
        "8",
        "--seeds",
        "3",
        "--json",
    ]);
    assert!(ok, "{err}");
    assert!(out.contains("preferences anywhere on the circle"), "{out}");
    let json: serde_json::Value = serde_json::from_str(out.lines().last().unwrap()).unwrap();
    let policies = json[0]["policies"].as_array().unwrap();
    assert_eq!(policies.len(), 2, "{json}");
    for p in policies {
        assert_eq!(p["trials"].as_array().unwrap().len(), 3, "{p}");
    }
}

#[test]
fn a_preference_spread_is_said_and_a_bad_one_refused() {
    let (ok, out, err) = auspex(&[
        "closed-loop-sim",
        "--goal",
        "decoding",
        "--units",
        "32",
        "--stimuli",
        "8",
        "--seeds",
        "2",
        "--preference-spread",
        "0.5",
    ]);
    assert!(ok, "{err}");
    assert!(
        out.contains("preferences within 50% of the circle"),
        "{out}"
    );
    assert!(out.contains("| 32 × 8 |"), "{out}");
    let (ok, _, err) = auspex(&["closed-loop-sim", "--preference-spread", "1.5"]);
    assert!(!ok);
    assert!(
        err.contains("--preference-spread") && err.contains("not a share of the circle"),
        "{err}"
    );
}
