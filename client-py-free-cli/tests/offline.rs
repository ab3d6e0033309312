//! The offline path end to end: simulate → fit → decode → export, checked against an independent
//! implementation of the DESIGN.md mathematics that reads only the exported JSON and the CSV
//! tables, and against decoding with the true model.

use auspex::commands::{decode_cmd, export_cmd, fit_cmd, simulate_cmd, DecodeArgs, FitArgs};
use auspex::tables::Source;
use auspex_engine::engine::Decoder;
use std::collections::HashMap;
use std::path::Path;

fn scenario(units: usize, stimuli: usize, trials: u32) -> String {
    let mut s = String::from("description = \"test\"\nstimuli = [");
    let names: Vec<String> = (0..stimuli)
        .map(|i| format!("[\"d{i}\", {:.1}]", i as f64 * 360.0 / stimuli as f64))
        .collect();
    s += &names.join(", ");
    s += &format!(
        "]\nbin_width_ms = 1.0\nwindow_ms = 200.0\ntrials_per_stimulus = {trials}\ngap_ms = [100.0, 200.0]\nspontaneous_hz = 2.0\ntick_rate_hz = 1000000.0\nseed = 5\n"
    );
    let fams = ["poisson", "negative_binomial", "com_poisson"];
    for u in 0..units {
        let fano = [1.0, 1.8, 0.6][u % 3];
        s += &format!(
            "[[units]]\nid = {}\npreferred_deg = {}\nbaseline_count = 1.0\npeak_count = {}\ncount_family = \"{}\"\nfano = {fano}\nearly_ms = {}\nlate_ms = {}\nwidth_ms = 10.0\n",
            10 + u,
            (u * 37) % 360,
            3.0 + (u % 4) as f64,
            fams[u % 3],
            20 + u * 2,
            70 + u * 3
        );
    }
    s
}

/// ln Σ_{n≥k} P(n)·n!/(n−k)!·s^(n−k), straight from the exported count table (DESIGN.md).
fn ln_gf_deriv(pmf: &[f64], k: usize, s: f64) -> f64 {
    let mut terms = Vec::new();
    for (n, &p) in pmf.iter().enumerate().skip(k) {
        let mut ln_ff = 0.0; // ln n!/(n−k)!
        for j in (n - k + 1)..=n {
            ln_ff += (j as f64).ln();
        }
        let pow = if n == k { 0.0 } else { (n - k) as f64 * s.ln() };
        terms.push(p.ln() + ln_ff + pow);
    }
    let m = terms.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
    m + terms.iter().map(|t| (t - m).exp()).sum::<f64>().ln()
}

fn read_csv(path: &Path) -> Vec<Vec<String>> {
    std::fs::read_to_string(path)
        .unwrap()
        .lines()
        .skip(1)
        .map(|l| l.split(',').map(|s| s.to_string()).collect())
        .collect()
}

#[test]
fn posteriors_agree_with_an_independent_implementation_of_the_json_export() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    std::fs::write(d.join("sc.toml"), scenario(12, 5, 12)).unwrap();
    simulate_cmd(
        Some(&d.join("sc.toml")),
        None,
        &d.join("train"),
        None,
        None,
        1e6,
        None,
    )
    .unwrap();
    simulate_cmd(
        Some(&d.join("sc.toml")),
        None,
        &d.join("test"),
        Some(4),
        Some(77),
        1e6,
        None,
    )
    .unwrap();
    let t = d.join("train");
    fit_cmd(
        &Source::tables(&t.join("spikes.csv"), &t.join("trials.csv")),
        &d.join("m.apxm"),
        &FitArgs {
            window_ms: 200.0,
            families: "all".into(),
            quiet: true,
            ..Default::default()
        },
    )
    .unwrap();
    export_cmd(&d.join("m.apxm"), Some(&d.join("m.json"))).unwrap();
    let args = DecodeArgs {
        decoder: Decoder::OrderStats,
        threshold: 0.9,
        min_time_ms: 20.0,
        prior: None,
        ..Default::default()
    };
    let te = d.join("test");
    decode_cmd(
        &d.join("m.apxm"),
        &Source::tables(&te.join("spikes.csv"), &te.join("trials.csv")),
        &d.join("out"),
        &args,
    )
    .unwrap();

    // Independent implementation: only the JSON and the CSV tables.
    let j: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(d.join("m.json")).unwrap()).unwrap();
    let bw = j["bin_width_s"].as_f64().unwrap();
    let nb = (j["window_s"].as_f64().unwrap() / bw).round() as usize;
    let stimuli: Vec<String> = j["stimuli"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s.as_str().unwrap().to_string())
        .collect();
    let units: Vec<u64> = j["units"]
        .as_array()
        .unwrap()
        .iter()
        .map(|u| u.as_u64().unwrap())
        .collect();
    let prior: Vec<f64> = j["prior"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| p.as_f64().unwrap())
        .collect();
    // Calibration: posterior = softmax(ln prior + β(b)·log L(b)), README "Model interchange JSON".
    let beta: Vec<f64> = j["calibration_factors"]
        .as_array()
        .unwrap()
        .iter()
        .map(|p| p.as_f64().unwrap())
        .collect();
    assert_eq!(beta.len(), nb);
    assert_eq!(
        j["calibration_method"], "temperature",
        "fit calibrates by default"
    );
    assert!(
        beta.iter().all(|&b| b != 1.0),
        "a fitted factor is never exactly 1"
    );
    let mut cells: HashMap<(u64, String), (Vec<f64>, Vec<f64>)> = HashMap::new();
    for c in j["cells"].as_array().unwrap() {
        let f = |k: &str| -> Vec<f64> {
            c[k].as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_f64().unwrap())
                .collect()
        };
        let q = f("timing");
        assert!(
            (q.iter().sum::<f64>() - 1.0).abs() < 1e-9,
            "timing sums to 1"
        );
        let pmf = f("count_pmf");
        assert!(
            1.0 - pmf.iter().sum::<f64>() < 1e-12,
            "count table leaves out < 1e-12"
        );
        cells.insert(
            (
                c["unit"].as_u64().unwrap(),
                c["stimulus"].as_str().unwrap().to_string(),
            ),
            (pmf, q),
        );
    }
    // Spikes in ticks (1 µs), binned from each trial's onset.
    let tick = |s: &str| (s.parse::<f64>().unwrap() * 1e6).round() as i64;
    let spikes: Vec<(u64, i64)> = read_csv(&te.join("spikes.csv"))
        .iter()
        .map(|r| (r[0].parse().unwrap(), tick(&r[1])))
        .collect();
    let trials: Vec<(u64, i64)> = read_csv(&te.join("trials.csv"))
        .iter()
        .map(|r| (r[0].parse().unwrap(), tick(&r[1])))
        .collect();
    let bin_ticks = (bw * 1e6).round() as i64;
    let mut want: HashMap<(u64, usize, String), f64> = HashMap::new();
    for &(trial, onset) in &trials {
        // counts[u][b]
        let mut counts = vec![vec![0usize; nb]; units.len()];
        for &(u, t) in &spikes {
            if t >= onset && t < onset + bin_ticks * nb as i64 {
                if let Some(ui) = units.iter().position(|&x| x == u) {
                    counts[ui][((t - onset) / bin_ticks) as usize] += 1;
                }
            }
        }
        for b in 0..nb {
            let mut logp: Vec<f64> = prior.iter().map(|p| p.ln()).collect();
            for (si, s) in stimuli.iter().enumerate() {
                let mut log_l = 0.0;
                for (ui, &u) in units.iter().enumerate() {
                    let (pmf, q) = &cells[&(u, s.clone())];
                    let k: usize = counts[ui][..=b].iter().sum();
                    let spike_term: f64 =
                        (0..=b).map(|bb| counts[ui][bb] as f64 * q[bb].ln()).sum();
                    let surv: f64 = q[b + 1..].iter().sum();
                    log_l += spike_term + ln_gf_deriv(pmf, k, surv);
                }
                logp[si] += beta[b] * log_l;
            }
            let m = logp.iter().cloned().fold(f64::NEG_INFINITY, f64::max);
            let z: f64 = logp.iter().map(|l| (l - m).exp()).sum();
            for (si, s) in stimuli.iter().enumerate() {
                want.insert((trial, b, s.clone()), (logp[si] - m).exp() / z);
            }
        }
    }
    let rows = read_csv(&d.join("out").join("posteriors.csv"));
    assert_eq!(
        rows.len(),
        trials.len() * nb * stimuli.len(),
        "one row per trial, bin and stimulus"
    );
    let mut max_diff = 0.0f64;
    for r in rows {
        let key = (
            r[0].parse::<u64>().unwrap(),
            r[1].parse::<usize>().unwrap(),
            r[2].clone(),
        );
        let got: f64 = r[3].parse().unwrap();
        max_diff = max_diff.max((got - want[&key]).abs());
    }
    assert!(max_diff < 1e-4, "max abs difference {max_diff}");
}

#[test]
fn fitted_model_decodes_like_the_true_model_and_timing_beats_count_only() {
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    let sc = auspex::demo_dir().join("scenario.toml");
    simulate_cmd(
        Some(&sc),
        None,
        &d.join("train"),
        None,
        None,
        1e6,
        Some(&d.join("true.apxm")),
    )
    .unwrap();
    simulate_cmd(
        Some(&sc),
        None,
        &d.join("test"),
        None,
        Some(4242),
        1e6,
        None,
    )
    .unwrap();
    let (t, te) = (d.join("train"), d.join("test"));
    fit_cmd(
        &Source::tables(&t.join("spikes.csv"), &t.join("trials.csv")),
        &d.join("fit.apxm"),
        &FitArgs {
            window_ms: 250.0,
            families: "all".into(),
            quiet: true,
            ..Default::default()
        },
    )
    .unwrap();
    let acc = |model: &str, dec: Decoder| {
        // Threshold 1: every decision is the maximum a posteriori at the window end.
        let args = DecodeArgs {
            decoder: dec,
            threshold: 1.0,
            min_time_ms: 20.0,
            prior: None,
            ..Default::default()
        };
        decode_cmd(
            &d.join(model),
            &Source::tables(&te.join("spikes.csv"), &te.join("trials.csv")),
            &d.join("o"),
            &args,
        )
        .unwrap()
    };
    let (fit_os, true_os) = (
        acc("fit.apxm", Decoder::OrderStats),
        acc("true.apxm", Decoder::OrderStats),
    );
    assert!(
        true_os - fit_os <= 0.05,
        "fitted {fit_os} vs true {true_os}"
    );
    let count_only = acc("fit.apxm", Decoder::CountOnly);
    // The scenario gives opposite directions equal mean counts: count-only must confuse them.
    assert!(
        fit_os > count_only + 0.25,
        "order-stats {fit_os} vs count-only {count_only}"
    );
}

#[test]
fn fitted_parameters_recover_the_scenario() {
    use auspex_engine::count::CountParams;
    let dir = tempfile::tempdir().unwrap();
    let d = dir.path();
    std::fs::write(d.join("sc.toml"), scenario(3, 2, 300)).unwrap();
    simulate_cmd(
        Some(&d.join("sc.toml")),
        None,
        d,
        None,
        None,
        1e6,
        Some(&d.join("true.apxm")),
    )
    .unwrap();
    fit_cmd(
        &Source::tables(&d.join("spikes.csv"), &d.join("trials.csv")),
        &d.join("fit.apxm"),
        &FitArgs {
            window_ms: 200.0,
            families: "poisson,nb,com".into(),
            quiet: true,
            ..Default::default()
        },
    )
    .unwrap();
    let (truth, _) = auspex_proto::model_file::load_model(&d.join("true.apxm")).unwrap();
    let (fit, fm) = auspex_proto::model_file::load_model(&d.join("fit.apxm")).unwrap();
    let tm = auspex_engine::Model::new(truth.clone()).unwrap();
    for u in 0..3 {
        for s in 0..2 {
            let (a, b) = (tm.count(u, s), fm.count(u, s));
            assert!(
                (a.mean() - b.mean()).abs() < 0.12 * a.mean() + 0.1,
                "unit {u} stim {s}: mean {} vs {}",
                b.mean(),
                a.mean()
            );
            let (fa, fb) = (a.variance() / a.mean(), b.variance() / b.mean());
            assert!(
                (fa - fb).abs() < 0.3 * fa,
                "unit {u} stim {s}: Fano {fb} vs {fa}"
            );
            // The over-dispersed units must not be fitted as Poisson.
            if matches!(
                truth.cells[u * 2 + s].count,
                CountParams::NegativeBinomial { .. }
            ) {
                assert!(!matches!(
                    fit.cells[u * 2 + s].count,
                    CountParams::Poisson { .. }
                ));
            }
            // Timing: the fitted density puts its mass where the true one does (L1 distance).
            let l1: f64 = tm
                .timing(u, s)
                .iter()
                .zip(fm.timing(u, s))
                .map(|(x, y)| (x - y).abs())
                .sum();
            assert!(l1 < 0.35, "unit {u} stim {s}: timing L1 {l1}");
        }
    }
}

#[test]
fn no_panic_on_arbitrary_table_bytes() {
    use auspex::tables::read_dataset;
    let dir = tempfile::tempdir().unwrap();
    let mut seed = 1u64;
    for i in 0..300 {
        let mut bytes = Vec::new();
        let head: &[u8] = if i % 2 == 0 { b"unit,time_s\n" } else { b"" };
        bytes.extend_from_slice(head);
        for _ in 0..(i % 40) {
            seed = seed
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            let alphabet = b"0123456789,.-e\n\"naifx \r\xff";
            bytes.push(alphabet[(seed >> 33) as usize % alphabet.len()]);
        }
        std::fs::write(dir.path().join("s.csv"), &bytes).unwrap();
        std::fs::write(
            dir.path().join("t.csv"),
            b"trial,onset_s,stimulus\n1,0.1,a\n",
        )
        .unwrap();
        let _ = read_dataset(
            &dir.path().join("s.csv"),
            &dir.path().join("t.csv"),
            1e6,
            0.25,
        );
    }
}
