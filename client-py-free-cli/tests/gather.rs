//! `auspex gather` through the real binary: two sessions validated one process each (as a job
//! array would), merged into one CSV whose rows carry each session's own figures; an unreadable
//! file is named and fails the command after the readable rows are written.

mod common;
use common::auspex;

#[test]
fn sessions_validated_apart_merge_into_one_table() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let scenario = auspex::demo_dir().join("scenario.toml");
    for s in ["1", "2"] {
        let data = format!("data/s{s}");
        let (ok, _, err) = auspex(
            d,
            &[
                "simulate",
                "--scenario",
                scenario.to_str().unwrap(),
                "--out-dir",
                &data,
                "--trials",
                "6",
                "--seed",
                s,
            ],
        );
        assert!(ok, "{err}");
        let (ok, _, err) = auspex(
            d,
            &[
                "validate",
                "--spikes",
                &format!("{data}/spikes.csv"),
                "--trials",
                &format!("{data}/trials.csv"),
                "--out-dir",
                &format!("results/s{s}"),
                "--shuffles",
                "10",
                "--quiet",
            ],
        );
        assert!(ok, "{err}");
    }
    let (ok, _, err) = auspex(d, &["gather", "results", "--out", "all.csv"]);
    assert!(ok, "{err}");
    assert!(err.contains("gathered 2 sessions"), "{err}");
    let csv = std::fs::read_to_string(d.join("all.csv")).unwrap();
    let lines: Vec<&str> = csv.lines().collect();
    assert_eq!(lines.len(), 3, "{csv}");
    assert!(lines[0].starts_with("session,source,trials,units,stimuli"));
    // Each row holds its own session's window-end accuracy, as its validation.json says.
    for (line, s) in lines[1..].iter().zip(["s1", "s2"]) {
        let v: serde_json::Value = serde_json::from_str(
            &std::fs::read_to_string(d.join(format!("results/{s}/validation.json"))).unwrap(),
        )
        .unwrap();
        let os = v["decoders"]
            .as_array()
            .unwrap()
            .iter()
            .find(|x| x["decoder"] == "order-stats")
            .unwrap();
        let fields: Vec<&str> = line.split(',').collect();
        assert_eq!(fields[0], s);
        let acc: f64 = fields[fields.len() - 14].parse().unwrap();
        assert_eq!(acc, os["accuracy_end"]["accuracy"].as_f64().unwrap());
        assert_eq!(fields[fields.len() - 18], "48", "6 trials × 8 stimuli");
    }
    // A truncated file is named, the others still written, the command fails.
    std::fs::create_dir_all(d.join("results/s3")).unwrap();
    std::fs::write(d.join("results/s3/validation.json"), "{\"decoders\": [").unwrap();
    let (ok, _, err) = auspex(d, &["gather", "results", "--out", "all.csv"]);
    assert!(!ok);
    assert!(err.contains("s3/validation.json: not JSON"), "{err}");
    assert_eq!(
        std::fs::read_to_string(d.join("all.csv"))
            .unwrap()
            .lines()
            .count(),
        3
    );
    // Absurd figures in a readable file are refused with the field named, never tabled.
    std::fs::remove_dir_all(d.join("results/s3")).unwrap();
    let good = std::fs::read_to_string(d.join("results/s1/validation.json")).unwrap();
    for (field, bad) in [("trials", "18446744073709551615.0"), ("chance", "7.0")] {
        let mut v: serde_json::Value = serde_json::from_str(&good).unwrap();
        v[field] = serde_json::from_str(bad).unwrap();
        std::fs::create_dir_all(d.join("results/s4")).unwrap();
        std::fs::write(d.join("results/s4/validation.json"), v.to_string()).unwrap();
        let (ok, _, err) = auspex(d, &["gather", "results", "--out", "all.csv"]);
        assert!(
            !ok && err.contains("s4/validation.json") && err.contains(field),
            "{err}"
        );
        assert!(!std::fs::read_to_string(d.join("all.csv"))
            .unwrap()
            .contains("18446744073709551615"));
    }
    let (ok, _, err) = auspex(d, &["gather", "nowhere"]);
    assert!(
        !ok && err.contains("nowhere: no such file or directory"),
        "{err}"
    );
}
