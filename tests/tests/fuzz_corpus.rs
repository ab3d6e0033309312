//! The fuzz targets on stable, as ordinary tests: every saved input under
//! `tests/fuzz/regressions/<target>/` (minimised crashes found by cargo-fuzz, kept so each
//! finding stays fixed) and `tests/fuzz/seeds/<target>/` goes through the target's function, and
//! so do 400 inputs per target drawn from a fixed-seed generator (a short smoke run of each
//! target without nightly). A panic here is a defect in the code under test.

use auspex_e2e::fuzzing::TARGETS;
use std::path::Path;

fn saved_inputs(kind: &str, target: &str) -> Vec<(String, Vec<u8>)> {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fuzz")
        .join(kind)
        .join(target);
    let Ok(entries) = std::fs::read_dir(&dir) else {
        return Vec::new();
    };
    let mut v: Vec<(String, Vec<u8>)> = entries
        .filter_map(|e| e.ok())
        .filter(|e| e.path().is_file())
        .map(|e| {
            (
                e.path().display().to_string(),
                std::fs::read(e.path()).unwrap(),
            )
        })
        .collect();
    v.sort();
    v
}

#[test]
fn every_saved_fuzz_input_runs_without_a_panic() {
    let mut ran = 0;
    for (name, f) in TARGETS {
        for kind in ["regressions", "seeds"] {
            for (path, bytes) in saved_inputs(kind, name) {
                eprintln!("{path}");
                f(&bytes);
                ran += 1;
            }
        }
    }
    assert!(
        ran >= TARGETS.len(),
        "every target has at least one seed ({ran} inputs ran)"
    );
}

#[test]
fn every_target_survives_a_seeded_smoke_run() {
    for (name, f) in TARGETS {
        let seeds = saved_inputs("seeds", name);
        let mut x: u64 = 0x9E37_79B9_7F4A_7C15;
        for i in 0..400 {
            // Half the inputs are mutated seeds (so structured formats get past their first
            // check), half plain random bytes.
            let mut bytes: Vec<u8> = if i % 2 == 0 && !seeds.is_empty() {
                seeds[i / 2 % seeds.len()].1.clone()
            } else {
                Vec::new()
            };
            let extra = (i * 7) % 300;
            for _ in 0..extra {
                x ^= x << 13;
                x ^= x >> 7;
                x ^= x << 17;
                if !bytes.is_empty() && x.is_multiple_of(3) {
                    let at = (x >> 8) as usize % bytes.len();
                    bytes[at] = (x >> 32) as u8;
                } else {
                    bytes.push((x >> 24) as u8);
                }
            }
            let r = std::panic::catch_unwind(|| f(&bytes));
            assert!(r.is_ok(), "target {name} panicked on input {bytes:?}");
        }
    }
}
