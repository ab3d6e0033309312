//! The command line on NWB files written by the standard's reference API (pynwb 4.2.0,
//! `tests/nwb/make_test_files.py`): `fit --nwb` writes the model `fit` writes from the same data
//! as CSV tables — the same bytes, but for the one field that names the source — and `decode`
//! and `validate` give the same results; `inspect --nwb` shows what the options can choose.

use std::path::{Path, PathBuf};

fn nwb_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../tests/nwb")
}

mod common;

/// The real binary (every path given is absolute).
fn auspex(args: &[&str]) -> (bool, String, String) {
    common::auspex(Path::new(env!("CARGO_MANIFEST_DIR")), args)
}

/// A model file's bytes with its training-data field (the source's name) cleared.
fn model_without_source(path: &Path) -> Vec<u8> {
    let mut m = auspex_proto::decode_model_file(&std::fs::read(path).unwrap()).unwrap();
    assert!(!m.training_data.is_empty());
    m.training_data.clear();
    auspex_proto::encode_model_file(&m)
}

fn s(p: &Path) -> &str {
    p.to_str().unwrap()
}

#[test]
fn fit_decode_and_validate_from_nwb_equal_the_same_data_as_tables() {
    let d = nwb_dir();
    let tmp = tempfile::tempdir().unwrap();
    let cases: [(&str, &[&str], &str); 3] = [
        ("string_stimulus.nwb", &[], "string_stimulus"),
        (
            "numeric_stimulus.nwb",
            &["--nwb-stimulus", "direction_deg"],
            "numeric_stimulus",
        ),
        (
            "two_tables.nwb",
            &["--nwb-trials", "flashes", "--nwb-stimulus", "luminance"],
            "two_tables_flashes",
        ),
    ];
    for (file, opts, stem) in cases {
        let nwb = d.join(file);
        let spikes = d.join(format!("{stem}.spikes.csv"));
        let trials = d.join(format!("{stem}.trials.csv"));
        let (a, b) = (
            tmp.path().join(format!("{stem}-nwb.apxm")),
            tmp.path().join(format!("{stem}-csv.apxm")),
        );
        let mut args = vec!["fit", "--quiet", "--nwb", s(&nwb), "-o", s(&a)];
        args.extend_from_slice(opts);
        let (ok, _, err) = auspex(&args);
        assert!(ok, "{file}: {err}");
        let (ok, _, err) = auspex(&[
            "fit",
            "--quiet",
            "--spikes",
            s(&spikes),
            "--trials",
            s(&trials),
            "-o",
            s(&b),
        ]);
        assert!(ok, "{err}");
        assert!(
            model_without_source(&a) == model_without_source(&b),
            "{file}: the model fitted from NWB differs from the one fitted from the same data as CSV"
        );
        // The model records where it came from.
        let m = auspex_proto::decode_model_file(&std::fs::read(&a).unwrap()).unwrap();
        assert!(m.training_data.contains(file), "{}", m.training_data);

        // decode: identical posteriors and decisions.
        let (da, db) = (
            tmp.path().join(format!("{stem}-dn")),
            tmp.path().join(format!("{stem}-dc")),
        );
        let mut args = vec![
            "decode",
            "--model",
            s(&b),
            "--nwb",
            s(&nwb),
            "--out-dir",
            s(&da),
        ];
        args.extend_from_slice(opts);
        assert!(auspex(&args).0);
        assert!(
            auspex(&[
                "decode",
                "--model",
                s(&b),
                "--spikes",
                s(&spikes),
                "--trials",
                s(&trials),
                "--out-dir",
                s(&db)
            ])
            .0
        );
        for f in ["posteriors.csv", "decisions.csv"] {
            assert!(
                std::fs::read(da.join(f)).unwrap() == std::fs::read(db.join(f)).unwrap(),
                "{file}: decode's {f} differs between NWB and CSV"
            );
        }
    }
    // validate (held-out figures, shuffles): the same JSON but for the source's name.
    let nwb = d.join("numeric_stimulus.nwb");
    let (va, vb) = (tmp.path().join("vn"), tmp.path().join("vc"));
    let (ok, _, err) = auspex(&[
        "validate",
        "--nwb",
        s(&nwb),
        "--nwb-stimulus",
        "direction_deg",
        "--shuffles",
        "20",
        "--out-dir",
        s(&va),
    ]);
    assert!(ok, "{err}");
    assert!(
        auspex(&[
            "validate",
            "--spikes",
            s(&d.join("numeric_stimulus.spikes.csv")),
            "--trials",
            s(&d.join("numeric_stimulus.trials.csv")),
            "--shuffles",
            "20",
            "--out-dir",
            s(&vb)
        ])
        .0
    );
    let json = |p: &Path| {
        let mut v: serde_json::Value =
            serde_json::from_slice(&std::fs::read(p.join("validation.json")).unwrap()).unwrap();
        // The source's name and the time it took are all that may differ.
        v.as_object_mut().unwrap().remove("source");
        v.as_object_mut().unwrap().remove("seconds");
        v
    };
    assert!(
        json(&va) == json(&vb),
        "validate differs between NWB and CSV"
    );
}

#[test]
fn inspect_shows_tables_columns_and_units_and_bad_choices_say_what_there_is() {
    let d = nwb_dir();
    let (ok, out, err) = auspex(&["inspect", "--nwb", s(&d.join("two_tables.nwb"))]);
    assert!(ok, "{err}");
    for want in [
        "intervals/flashes (TimeIntervals, 24 rows)",
        "--nwb-trials flashes",
        // Examples are the distinct values in order of first appearance.
        "luminance            text   e.g. bright, dim  (2 distinct)",
        "intervals/trials (TimeIntervals, 24 rows)",
        "3 units with 1711 spikes in all",
    ] {
        assert!(out.contains(want), "missing {want:?} in\n{out}");
    }
    let (ok, out, _) = auspex(&["inspect", "--nwb", s(&d.join("units_partway.nwb"))]);
    assert!(ok);
    assert!(
        out.contains("quality              text   e.g. good, noise  (2 distinct)"),
        "{out}"
    );
    // Every line but the first (it names the file as given) fits an 80-column terminal.
    for f in [
        "two_tables.nwb",
        "units_partway.nwb",
        "string_stimulus.nwb",
        "numeric_stimulus.nwb",
    ] {
        let (ok, out, err) = auspex(&["inspect", "--nwb", s(&d.join(f))]);
        assert!(ok, "{err}");
        for line in out.lines().skip(1) {
            assert!(line.chars().count() <= 80, "{f}: {line:?} is wider than 80");
        }
    }

    let (ok, _, err) = auspex(&[
        "fit",
        "--nwb",
        s(&d.join("numeric_stimulus.nwb")),
        "-o",
        "/dev/null",
    ]);
    assert!(!ok);
    assert!(
        err.contains("numeric_stimulus.nwb: intervals/trials: has no column named `stimulus`; say which column names the stimulus with --nwb-stimulus (its columns: direction_deg)"),
        "{err}"
    );
    let (ok, _, err) = auspex(&[
        "fit",
        "--nwb",
        s(&d.join("units_partway.nwb")),
        "--nwb-units",
        "quality",
        "-o",
        "/dev/null",
    ]);
    assert!(!ok);
    assert!(
        err.contains(
            "column `quality` is not true/false; give the value to keep: --nwb-units quality=VALUE"
        ),
        "{err}"
    );
    let (ok, _, err) = auspex(&[
        "fit",
        "--nwb",
        s(&d.join("string_stimulus.spikes.csv")),
        "-o",
        "/dev/null",
    ]);
    assert!(!ok);
    assert!(err.contains("is not an HDF5 file"), "{err}");
    // --nwb with the tables is refused by the argument parser.
    let (ok, _, err) = auspex(&[
        "fit", "--nwb", "x.nwb", "--spikes", "a.csv", "--trials", "b.csv",
    ]);
    assert!(!ok && err.contains("cannot be used with"), "{err}");
}
