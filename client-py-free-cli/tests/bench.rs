//! `auspex bench --model`: the engine's cost on a user's own model, with trials drawn from it.
//! The timing itself is machine-dependent and not checked; what is checked is that the figures
//! describe the model given (its cells, its firing) and are self-consistent.

use std::process::Command;

#[test]
fn bench_times_the_users_own_model() {
    let dir = tempfile::tempdir().unwrap();
    let model = dir.path().join("demo.apxm");
    let root = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("..");
    let fit = Command::new(env!("CARGO_BIN_EXE_auspex"))
        .args(["fit", "--quiet", "--spikes"])
        .arg(root.join("demo-data/spikes.csv"))
        .arg("--trials")
        .arg(root.join("demo-data/trials.csv"))
        .arg("-o")
        .arg(&model)
        .output()
        .unwrap();
    assert!(
        fit.status.success(),
        "{}",
        String::from_utf8_lossy(&fit.stderr)
    );

    let out = Command::new(env!("CARGO_BIN_EXE_auspex"))
        .args(["bench", "--no-latency", "--json", "--model"])
        .arg(&model)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let text = String::from_utf8(out.stdout).unwrap();
    assert!(text.contains("real time"), "{text}");
    let json: serde_json::Value = serde_json::from_str(text.lines().last().unwrap()).unwrap();
    let p = &json["model"];

    // The model's own shape and cells.
    let spec = auspex_proto::model_file::load_model(&model).unwrap().0;
    let (nu, ns) = (spec.units.len(), spec.stimuli.len());
    assert_eq!(p["units"], nu);
    assert_eq!(p["stimuli"], ns);
    let cells: u64 = p["families"]
        .as_array()
        .unwrap()
        .iter()
        .map(|f| f[1].as_u64().unwrap())
        .sum();
    assert_eq!(cells as usize, nu * ns);

    // The trials were drawn from the model: the firing inside the windows matches the mean of
    // its count distributions (every stimulus equally often), within sampling error.
    let window_s = spec.n_bins as f64 * spec.bin_width_s;
    let expected: f64 = spec
        .cells
        .iter()
        .map(|c| {
            auspex_engine::CountDist::new(c.count.clone())
                .unwrap()
                .mean()
        })
        .sum::<f64>()
        / (nu * ns) as f64
        / window_s;
    let got = p["spikes_per_s"].as_f64().unwrap();
    assert!(
        (got - expected).abs() < 0.1 * expected,
        "drawn trials fire at {got} spikes/s, the model's mean is {expected}"
    );

    // Self-consistent figures.
    let us = p["us_per_bin"].as_f64().unwrap();
    assert!(us > 0.0 && p["worst_us_per_bin"].as_f64().unwrap() >= us);
    let headroom = p["headroom"].as_f64().unwrap();
    assert!((headroom - spec.bin_width_s * 1e6 / us).abs() < 1e-6 * headroom);
    assert!(p["trials"].as_u64().unwrap() >= 3);
}
