//! The README's main command, end to end in plain mode: fit, daemon as a child process, replay,
//! monitor, and the live-equals-offline check.

#[test]
fn demo_runs_end_to_end_in_plain_mode() {
    let dir = tempfile::tempdir().unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_auspex"))
        .args(["demo", "--fast", "--plain", "--quiet", "--out-dir"])
        .arg(dir.path())
        .output()
        .unwrap();
    let stdout = String::from_utf8_lossy(&out.stdout);
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(out.status.success(), "demo failed:\n{stderr}");
    assert!(
        stdout.contains("decision trial=1 "),
        "plain decision lines: {stdout}"
    );
    assert!(stderr.contains("the daemon decoded 320 trials"), "{stderr}");
    assert!(
        stderr.contains("live decisions are identical to offline decoding"),
        "{stderr}"
    );
    assert!(dir.path().join("demo-session.apxs").exists());
    assert!(dir
        .path()
        .join("order-stats")
        .join("posteriors.csv")
        .exists());
    // The recording replays to the same offline frames (replay determinism).
    let rec = auspex::wire::read_recording(&dir.path().join("demo-session.apxs")).unwrap();
    assert_eq!(rec.torn_tail_bytes, 0);
    assert_eq!(rec.dataset.trials.len(), 320);
    // The validation step wrote its report and summary; timing beats count-only on the demo,
    // where opposite directions share their counts.
    assert!(dir.path().join("validation/report.html").exists());
    let v: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string(dir.path().join("validation/validation.json")).unwrap(),
    )
    .unwrap();
    let acc = |i: usize| {
        v["decoders"][i]["accuracy_end"]["accuracy"]
            .as_f64()
            .unwrap()
    };
    assert_eq!(v["decoders"][2]["decoder"], "count-only");
    assert!(acc(0) > 0.9 && acc(2) < 0.7, "{} vs {}", acc(0), acc(2));
    assert!(v["information"]["p_value"].as_f64().unwrap() < 0.01);
}
