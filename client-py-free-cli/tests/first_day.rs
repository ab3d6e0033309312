//! A new user's mistakes, through the real `auspex` binary: every error says what is wrong once,
//! names the file, and where it can, says what the file looks like instead; decoding the
//! training trials says it is in sample.

mod common;
use common::auspex;

#[test]
fn model_file_mistakes_are_named_once_with_a_hint() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let scenario = auspex::demo_dir().join("scenario.toml");
    let (ok, _, err) = auspex(
        d,
        &[
            "simulate",
            "--scenario",
            scenario.to_str().unwrap(),
            "--out-dir",
            "data",
            "--trials",
            "6",
        ],
    );
    assert!(ok, "{err}");
    let (ok, _, err) = auspex(
        d,
        &[
            "fit",
            "--spikes",
            "data/spikes.csv",
            "--trials",
            "data/trials.csv",
            "--out",
            "m.apxm",
            "--quiet",
            "--families",
            "poisson,negative_binomial",
        ],
    );
    assert!(ok, "{err}");
    assert!(err.contains("calibration: temperature"), "{err}");

    // Decoding the training trials is flagged as in sample.
    let (ok, out, err) = auspex(
        d,
        &[
            "decode",
            "--model",
            "m.apxm",
            "--spikes",
            "data/spikes.csv",
            "--trials",
            "data/trials.csv",
            "--out-dir",
            "o",
        ],
    );
    assert!(ok, "{err}");
    assert!(out.contains("IN-SAMPLE accuracy"), "{out}");
    assert!(err.contains("note: in sample"), "{err}");

    // Not a model: said once.
    std::fs::write(d.join("bad.apxm"), "hello").unwrap();
    let (ok, _, err) = auspex(d, &["inspect", "--model", "bad.apxm"]);
    assert!(!ok);
    assert_eq!(err.matches("not an Auspex model file").count(), 1, "{err}");
    assert!(err.starts_with("auspex: error: bad.apxm: "), "{err}");

    // The exported JSON given as a model: a hint.
    let (ok, _, err) = auspex(d, &["export", "--model", "m.apxm", "--out", "m.json"]);
    assert!(ok, "{err}");
    let (ok, _, err) = auspex(d, &["inspect", "--model", "m.json"]);
    assert!(!ok);
    assert!(err.contains("looks like JSON"), "{err}");

    // A table given as a model: a hint.
    let (ok, _, err) = auspex(d, &["inspect", "--model", "data/trials.csv"]);
    assert!(!ok);
    assert!(err.contains("looks like a CSV table"), "{err}");

    // A truncated model file: the cause once, and what to check.
    let bytes = std::fs::read(d.join("m.apxm")).unwrap();
    std::fs::write(d.join("cut.apxm"), &bytes[..bytes.len() / 2]).unwrap();
    let (ok, _, err) = auspex(d, &["inspect", "--model", "cut.apxm"]);
    assert!(!ok);
    assert_eq!(err.matches("failed to decode").count(), 1, "{err}");
    assert!(err.contains("copied completely"), "{err}");

    // An unknown count family lists the valid names.
    let (ok, _, err) = auspex(
        d,
        &[
            "fit",
            "--spikes",
            "data/spikes.csv",
            "--trials",
            "data/trials.csv",
            "--out",
            "x.apxm",
            "--families",
            "poisson,bogus",
        ],
    );
    assert!(!ok);
    assert!(
        err.contains("bogus") && err.contains("negative_binomial"),
        "{err}"
    );
}
