//! Every size that comes from outside is checked before memory is asked for. Each input below
//! is small and within the documented ranges of each field alone, yet once asked Auspex for
//! gigabytes (the process aborted: "memory allocation of N bytes failed") or panicked. Each must
//! now end with a clear refusal — exit status 1 or 2, a message naming the sizes and the memory
//! budget — under a 4 GB address-space limit (`ulimit -v 4000000`) and within 10 s. The daemon
//! cases live in `tests/tests/daemon_e2e.rs` (it must survive them).

use auspex_engine::{CellSpec, CellSummary, CountParams, ModelSpec};
use auspex_proto::v1;
use prost::Message;
use std::fmt::Write as _;
use std::path::Path;
use std::time::{Duration, Instant};

/// Runs `auspex ARGS` under a 4 GB address-space limit; its exit status, standard error and
/// how long it took.
fn limited(args: &[&str]) -> (Option<i32>, String, Duration) {
    let t0 = Instant::now();
    let out = std::process::Command::new("sh")
        .arg("-c")
        .arg("ulimit -v 4000000; exec \"$0\" \"$@\"")
        .arg(env!("CARGO_BIN_EXE_auspex"))
        .args(args)
        .output()
        .unwrap();
    (
        out.status.code(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
        t0.elapsed(),
    )
}

/// A clear refusal: exit 1 or 2, within 10 s, the message naming what is said.
fn refused(args: &[&str], says: &[&str]) {
    let (code, stderr, took) = limited(args);
    assert!(
        matches!(code, Some(1) | Some(2)),
        "auspex {args:?}: exit {code:?} (a crash or a signal?)\n{stderr}"
    );
    assert!(
        took < Duration::from_secs(10),
        "auspex {args:?} took {took:?}"
    );
    for s in says {
        assert!(
            stderr.contains(s),
            "auspex {args:?} should say {s:?}:\n{stderr}"
        );
    }
    assert!(
        stderr.lines().count() < 40,
        "a short message, not a dump:\n{stderr}"
    );
}

fn write_tables(
    dir: &Path,
    spikes: &[(u32, f64)],
    trials: &[(u64, f64, String)],
) -> (String, String) {
    let mut s = String::from("unit,time_s\n");
    for (u, t) in spikes {
        let _ = writeln!(s, "{u},{t:.6}");
    }
    let mut tr = String::from("trial,onset_s,stimulus\n");
    for (id, t, name) in trials {
        let _ = writeln!(tr, "{id},{t:.6},{name}");
    }
    let (sp, tp) = (dir.join("spikes.csv"), dir.join("trials.csv"));
    std::fs::write(&sp, s).unwrap();
    std::fs::write(&tp, tr).unwrap();
    (sp.display().to_string(), tp.display().to_string())
}

fn cell(count: CountParams, bins: usize) -> CellSpec {
    CellSpec {
        count,
        timing: vec![1.0 / bins as f64; bins],
        summary: CellSummary::default(),
    }
}

fn model_file(path: &Path, units: usize, stimuli: usize, count: CountParams) {
    let spec = ModelSpec {
        cells: (0..units * stimuli)
            .map(|_| cell(count.clone(), 1))
            .collect(),
        ..ModelSpec::numbered(units, stimuli, 1, Vec::new())
    };
    auspex_proto::model_file::save_model(path, &spec, "sizes test").unwrap();
}

/// Case 1: Two small tables (~330 KB each): 25 000 units with one spike each and 25 000 labelled
/// trials. The windows are sparse now (the reported 12 500 × 12 500 case is fitted: its windows
/// hold 12 500 spike times, see `auspex_modelling::windows`), but a fit still keeps one count
/// per unit and trial (every trial's count, zeros included, is a data point of the count
/// distribution): 25 000² × 4 bytes = 2.5 GB is over the default budget, refused up front.
#[test]
fn many_units_times_many_trials_is_refused_by_fit_and_validate() {
    let dir = tempfile::tempdir().unwrap();
    let n = 25_000u64;
    let spikes: Vec<(u32, f64)> = (0..n)
        .map(|i| (i as u32 + 1, i as f64 * 0.5 + 0.01))
        .collect();
    let trials: Vec<(u64, f64, String)> = (0..n)
        .map(|i| {
            (
                i + 1,
                i as f64 * 0.5,
                if i % 2 == 0 { "A" } else { "B" }.to_string(),
            )
        })
        .collect();
    let (sp, tp) = write_tables(dir.path(), &spikes, &trials);
    let out = dir.path().join("m.apxm").display().to_string();
    for cmd in ["fit", "validate"] {
        let mut args = vec![cmd, "--spikes", &sp, "--trials", &tp, "--quiet"];
        let vdir = dir.path().join("v").display().to_string();
        if cmd == "fit" {
            args.extend(["--out", &out]);
        } else {
            args.extend(["--out-dir", &vdir]);
        }
        refused(
            &args,
            &[
                "25000 units × 25000 trials",
                "memory budget",
                "--memory-budget-mb",
            ],
        );
    }
}

/// Case 1 (cont.): A 230 KB trial table of 12 000 distinct stimuli (units × stimuli × bins).
#[test]
fn thousands_of_stimuli_are_refused_by_fit_and_validate() {
    let dir = tempfile::tempdir().unwrap();
    let n = 12_000u64;
    let spikes: Vec<(u32, f64)> = (0..n)
        .map(|i| (1 + (i % 3) as u32, i as f64 * 0.5 + 0.01))
        .collect();
    let trials: Vec<(u64, f64, String)> = (0..n)
        .map(|i| (i + 1, i as f64 * 0.5, format!("s{i}")))
        .collect();
    let (sp, tp) = write_tables(dir.path(), &spikes, &trials);
    let out = dir.path().join("m.apxm").display().to_string();
    refused(
        &[
            "fit", "--spikes", &sp, "--trials", &tp, "--quiet", "--out", &out,
        ],
        &["12000 stimuli", "memory budget"],
    );
}

/// Case 2: A 0.7 MB model file: 15 000 units × 2 stimuli, Poisson mean 19 000, one bin (each cell a
/// ~20 000-entry count table, no bound on the total).
#[test]
fn a_model_of_huge_count_tables_is_refused_on_loading() {
    let dir = tempfile::tempdir().unwrap();
    let m = dir.path().join("big.apxm");
    model_file(&m, 15_000, 2, CountParams::Poisson { mean: 19_000.0 });
    let ms = m.display().to_string();
    refused(
        &["inspect", "--model", &ms],
        &["count tables", "memory budget"],
    );
    let (sp, tp) = write_tables(
        dir.path(),
        &[(0, 0.01)],
        &[(1, 0.0, "s0".into()), (2, 1.0, "s1".into())],
    );
    let out = dir.path().join("dec").display().to_string();
    refused(
        &[
            "decode",
            "--model",
            &ms,
            "--spikes",
            &sp,
            "--trials",
            &tp,
            "--out-dir",
            &out,
        ],
        &["count tables", "memory budget"],
    );
}

/// Case 3: One unit and 25 000 stimuli in 0.96 MB: the per-unit tally was N² × 8 bytes (5 GB).
#[test]
fn a_model_of_very_many_stimuli_is_refused_on_loading() {
    let dir = tempfile::tempdir().unwrap();
    let m = dir.path().join("wide.apxm");
    model_file(&m, 1, 25_000, CountParams::Poisson { mean: 2.0 });
    let ms = m.display().to_string();
    let (sp, tp) = write_tables(
        dir.path(),
        &[(0, 0.01)],
        &[(1, 0.0, "s0".into()), (2, 1.0, "s1".into())],
    );
    let out = dir.path().join("dec").display().to_string();
    refused(
        &[
            "decode",
            "--model",
            &ms,
            "--spikes",
            &sp,
            "--trials",
            &tp,
            "--out-dir",
            &out,
        ],
        &["1 units × 25000 stimuli", "memory budget"],
    );
    refused(
        &[
            "daemon",
            "--model",
            &ms,
            "--ingest",
            "tcp://127.0.0.1:0",
            "--publish",
            "tcp://127.0.0.1:0",
            "--control",
            "tcp://127.0.0.1:0",
            "--task-ingest",
            "",
        ],
        &["25000 stimuli", "memory budget"],
    );
}

/// Case 5: A 200 KB scenario within the documented ranges: 1300 units, 2 stimuli, 0.01 ms bins in a
/// 1000 ms window (units × stimuli × bins timing tables).
#[test]
fn a_scenario_of_huge_tables_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let mut s = String::from(
        "description = \"sizes\"\nstimuli = [[\"A\", 0.0], [\"B\", 180.0]]\nbin_width_ms = 0.01\nwindow_ms = 1000.0\ntrials_per_stimulus = 2\ngap_ms = [100.0, 200.0]\nspontaneous_hz = 1.0\ntick_rate_hz = 1000000.0\nseed = 1\n",
    );
    for u in 0..1300 {
        let _ = write!(
            s,
            "\n[[units]]\nid = {}\npreferred_deg = 0.0\nbaseline_count = 1.0\npeak_count = 2.0\ncount_family = \"poisson\"\nfano = 1.0\nearly_ms = 20.0\nlate_ms = 60.0\nwidth_ms = 10.0\n",
            u + 1
        );
    }
    let p = dir.path().join("scenario.toml");
    std::fs::write(&p, s).unwrap();
    let out = dir.path().join("sim").display().to_string();
    refused(
        &[
            "simulate",
            "--scenario",
            &p.display().to_string(),
            "--out-dir",
            &out,
        ],
        &["1300 units × 2 stimuli × 100000 bins", "memory budget"],
    );
}

/// Case 6: A daemon configured within each field's range: a 60 s learning window in 0.001 ms bins
/// (6·10⁷ bins per window; the learner's tables once asked for 6.2 GB).
#[test]
fn a_learning_window_of_too_many_bins_is_refused_at_start() {
    refused(
        &[
            "daemon",
            "--learn-window-ms",
            "60000",
            "--learn-bin-ms",
            "0.001",
            "--ingest",
            "tcp://127.0.0.1:0",
            "--publish",
            "tcp://127.0.0.1:0",
            "--control",
            "tcp://127.0.0.1:0",
            "--task-ingest",
            "",
        ],
        &["60000000 bins", "at most 100000"],
    );
}

/// Case 7: `replay --speed 0`, and a recording whose clock is 1 tick/s with a watermark jump of
/// 9·10¹⁸ ticks at `--speed 0.4` (both panicked converting seconds to a duration).
#[test]
fn impossible_replay_pacing_is_refused() {
    refused(
        &["replay", "--session", "x.apxs", "--speed", "0"],
        &["must be above 0"],
    );
    let dir = tempfile::tempdir().unwrap();
    let rec = dir.path().join("jump.apxs");
    let mut w = auspex_proto::session::SessionWriter::new(
        std::fs::File::create(&rec).unwrap(),
        "sizes test",
        "",
        0,
    )
    .unwrap();
    let bodies = [
        v1::inbound::Body::SessionStart(v1::SessionStart {
            stimuli: Default::default(),
            tick_rate_hz: 1.0,
            units: vec![1],
            session_name: "jump".into(),
            learn_in_step: false,
        }),
        v1::inbound::Body::Heartbeat(v1::Heartbeat {
            complete_through: 1,
        }),
        v1::inbound::Body::Heartbeat(v1::Heartbeat {
            complete_through: 9_000_000_000_000_000_000,
        }),
    ];
    for (i, b) in bodies.into_iter().enumerate() {
        let m = v1::Inbound {
            sender: "acq".into(),
            seq: i as u64 + 1,
            body: Some(b),
        };
        w.append(&v1::SessionRecord {
            choice: Default::default(),
            received_unix_ns: 0,
            endpoint: 1,
            message: m.encode_to_vec(),
            header: None,
            learned: None,
        })
        .unwrap();
    }
    w.flush().unwrap();
    drop(w);
    // Something to send to: a PULL socket on a free port.
    let rt = tokio::runtime::Runtime::new().unwrap();
    let (endpoint, _pull) = rt.block_on(async {
        use zeromq::Socket;
        let mut pull = zeromq::PullSocket::new();
        let ep = pull.bind("tcp://127.0.0.1:0").await.unwrap();
        (ep.to_string(), pull)
    });
    refused(
        &[
            "replay",
            "--session",
            &rec.display().to_string(),
            "--speed",
            "0.4",
            "--to",
            &endpoint,
        ],
        &["will not wait a year", "--fast"],
    );
}

/// Case 8: The demo's spikes with a 200 KB trial table of 6000 distinct stimuli × 2 trials: the
/// per-unit confusion matrices were units × S² × 8 bytes (6.9 GB).
#[test]
fn validate_of_thousands_of_stimuli_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    let trials: Vec<(u64, f64, String)> = (0..12_000u64)
        .map(|i| (i + 1, i as f64 * 0.015, format!("s{}", i % 6000)))
        .collect();
    let mut tr = String::from("trial,onset_s,stimulus\n");
    for (id, t, name) in &trials {
        let _ = writeln!(tr, "{id},{t:.6},{name}");
    }
    let tp = dir.path().join("trials.csv");
    std::fs::write(&tp, tr).unwrap();
    let sp = auspex::demo_dir().join("spikes.csv");
    let out = dir.path().join("v").display().to_string();
    refused(
        &[
            "validate",
            "--spikes",
            &sp.display().to_string(),
            "--trials",
            &tp.display().to_string(),
            "--out-dir",
            &out,
            "--quiet",
            "--trust-times",
        ],
        &["6000 stimuli", "memory budget"],
    );
}

/// A model whose stimulus names hold escape sequences: `inspect` prints them escaped, so a
/// damaged or hostile file cannot drive the terminal.
#[test]
fn stimulus_names_with_escape_sequences_are_printed_escaped() {
    let dir = tempfile::tempdir().unwrap();
    let m = dir.path().join("names.apxm");
    let mut spec = ModelSpec {
        cells: (0..2)
            .map(|_| cell(CountParams::Poisson { mean: 2.0 }, 1))
            .collect(),
        ..ModelSpec::numbered(1, 2, 1, Vec::new())
    };
    spec.stimuli = vec!["\u{1b}[2J\u{1b}[31mred".into(), "plain\u{7}".into()];
    auspex_proto::model_file::save_model(&m, &spec, "sizes test").unwrap();
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_auspex"))
        .arg("inspect")
        .arg(&m) // the positional form
        .output()
        .unwrap();
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert!(
        !text.contains('\u{1b}') && !text.contains('\u{7}'),
        "{text:?}"
    );
    assert!(
        text.contains("\\u{1b}[2J\\u{1b}[31mred") && text.contains("plain\\u{7}"),
        "{text}"
    );
}
