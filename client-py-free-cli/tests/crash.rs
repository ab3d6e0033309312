//! kill -9 during recording: the daemon runs as a child process (`auspex daemon`), a sender
//! streams a session into it, and the process is killed without warning mid-stream. The
//! recording must hold every message that was flushed, in order, byte for byte; a torn last
//! record is reported and skipped, never fatal; and the recording is then usable as input to
//! `fit` and `decode --session`.

use auspex::live::status;
use auspex::tables::Source;
use auspex::wire::{dataset_messages, read_recording};
use auspex_engine::Model;
use auspex_modelling::fit::{plan, FitOptions};
use auspex_modelling::simulate::{simulate, Scenario, SimOptions};
use auspex_proto::v1;
use prost::Message;
use std::time::{Duration, Instant};
use zeromq::{Socket, SocketSend};

/// The daemon-spawning tests run one at a time: each picks free ports by binding port 0 and
/// letting go, which two tests at once could pick alike.
mod common;
use common::{free_port, serial};

fn small_scenario() -> Scenario {
    let text = std::fs::read_to_string(auspex::demo_dir().join("scenario.toml")).unwrap();
    let mut s: Scenario = toml::from_str(&text).unwrap();
    s.units.truncate(6);
    s.stimuli.truncate(3);
    s
}

async fn wait_seq(control: &str, n: u64) {
    let t0 = Instant::now();
    loop {
        if let Ok(s) = status(control).await {
            if s.senders
                .iter()
                .any(|x| x.sender == "crash" && x.last_seq >= n)
            {
                return;
            }
        }
        assert!(
            t0.elapsed() < Duration::from_secs(30),
            "daemon never took message {n}"
        );
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
}

/// `auspex daemon` as a child process on free loopback ports, recording to `record`, with
/// `args` (e.g. `--model` and its path); with its ingest and control endpoints.
fn spawn_daemon(
    args: &[&std::ffi::OsStr],
    record: &std::path::Path,
) -> (std::process::Child, String, String) {
    let ep = |p: u16| format!("tcp://127.0.0.1:{p}");
    let (ingest, publish, control) = (ep(free_port()), ep(free_port()), ep(free_port()));
    let child = std::process::Command::new(env!("CARGO_BIN_EXE_auspex"))
        .arg("daemon")
        .args(args)
        .args([
            "--ingest",
            &ingest,
            "--publish",
            &publish,
            "--control",
            &control,
            "--task-ingest",
            "",
            "--record",
        ])
        .arg(record)
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::null())
        .spawn()
        .unwrap();
    (child, ingest, control)
}

/// A child daemon killed however the test ends (a failed assertion must not leave it running).
struct KillOnDrop(std::process::Child);

impl Drop for KillOnDrop {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

async fn wait_started(control: &str) {
    let t0 = Instant::now();
    while status(control).await.is_err() {
        assert!(
            t0.elapsed() < Duration::from_secs(20),
            "daemon did not start"
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
}

/// Ctrl-C on `auspex send` mid-session: the sender ends its stream and says so (exit status
/// 130), the daemon ends the session, and the same lines sent again are a new session with a
/// recording of its own — nothing merged, no duplicate trial, no late spike.
#[test]
fn ctrl_c_on_send_ends_the_session_and_a_rerun_is_a_new_one() {
    let _serial = serial();
    use std::io::Write;
    let dir = tempfile::tempdir().unwrap();
    let (daemon, ingest, control) =
        spawn_daemon(&["--learn-window-ms".as_ref(), "100".as_ref()], dir.path());
    let _daemon = KillOnDrop(daemon);
    let rt = tokio::runtime::Runtime::new().unwrap();
    rt.block_on(wait_started(&control));
    let run = |n_trials: u64| {
        let mut send = std::process::Command::new(env!("CARGO_BIN_EXE_auspex"))
            .args(["send", "--to", &ingest, "--sender", "rig"])
            .stdin(std::process::Stdio::piped())
            .stderr(std::process::Stdio::piped())
            .spawn()
            .unwrap();
        let mut input = send.stdin.take().unwrap();
        writeln!(input, "session 1000 1 name=interrupted").unwrap();
        for i in 1..=n_trials {
            let t = i * 300;
            writeln!(
                input,
                "onset {i} {t} A\nspike 1 {}\nthrough {}",
                t + 10,
                t + 299
            )
            .unwrap();
        }
        input.flush().unwrap();
        // Wait until the daemon has every line, then interrupt (the input stays open).
        rt.block_on(async {
            let t0 = Instant::now();
            loop {
                let s = status(&control).await.unwrap();
                // (Not ended: the last run's sender stays listed, ended, until this one starts.)
                let all_taken = |x: &v1::SenderState| {
                    x.sender == "rig" && !x.ended && x.last_seq > 2 * n_trials
                };
                if s.senders.iter().any(all_taken) {
                    break;
                }
                assert!(
                    t0.elapsed() < Duration::from_secs(30),
                    "the daemon never took the lines"
                );
                tokio::time::sleep(Duration::from_millis(20)).await;
            }
        });
        // SAFETY: the id is of a child this test spawned and has not yet waited for.
        unsafe { libc::kill(send.id() as libc::pid_t, libc::SIGINT) };
        let out = send.wait_with_output().unwrap();
        drop(input);
        (
            out.status.code(),
            String::from_utf8_lossy(&out.stderr).into_owned(),
        )
    };
    for round in 1..=2 {
        let (code, stderr) = run(6);
        assert_eq!(code, Some(130), "stderr: {stderr}");
        assert!(
            stderr.contains("interrupted") && stderr.contains("end of stream"),
            "{stderr}"
        );
        rt.block_on(async {
            let t0 = Instant::now();
            while status(&control).await.unwrap().ended_sessions.len() < round {
                assert!(
                    t0.elapsed() < Duration::from_secs(30),
                    "the session never ended"
                );
                tokio::time::sleep(Duration::from_millis(20)).await;
            }
        });
    }
    let s = rt.block_on(status(&control)).unwrap();
    assert!(
        s.session_name.is_empty() && s.open_trials.is_empty(),
        "no session left open"
    );
    for e in &s.ended_sessions {
        assert_eq!(e.reason, "every sender ended");
        assert_eq!(e.trials_learned, 6, "each run learned alone: {e:?}");
    }
    assert_ne!(
        s.ended_sessions[0].recording_path,
        s.ended_sessions[1].recording_path
    );
    let h = s.health.unwrap();
    assert_eq!((h.duplicate_trials, h.late_spikes), (0, 0), "{h:?}");
}

#[test]
fn kill_9_during_recording_loses_only_the_unflushed_tail() {
    let _serial = serial();
    let dir = tempfile::tempdir().unwrap();
    let sc = small_scenario();
    let truth = Model::new(sc.true_model().unwrap()).unwrap();
    let train = simulate(
        &truth,
        &SimOptions {
            trials_per_stimulus: 8,
            ..sc.sim_options()
        },
    );
    let opts = FitOptions {
        window_s: sc.window_ms / 1000.0,
        ..FitOptions::default()
    };
    let spec = plan(&train, &opts).unwrap().fit_all();
    let model_path = dir.path().join("m.apxm");
    auspex_proto::model_file::save_model(&model_path, &spec, "crash test").unwrap();
    let data = simulate(
        &truth,
        &SimOptions {
            trials_per_stimulus: 30,
            seed: 4242,
            ..sc.sim_options()
        },
    );
    let msgs = dataset_messages(&data, "crash", 1000, 250_000);
    let half = msgs.len() / 2;

    let recording = dir.path().join("s.apxs");
    let (mut child, ingest, control) =
        spawn_daemon(&["--model".as_ref(), model_path.as_os_str()], &recording);

    let rt = tokio::runtime::Runtime::new().unwrap();
    let sent_before_kill = rt.block_on(async {
        wait_started(&control).await;
        let mut push = zeromq::PushSocket::new();
        push.connect(&ingest).await.unwrap();
        for m in &msgs[..half] {
            push.send(m.encode_to_vec().into()).await.unwrap();
        }
        wait_seq(&control, half as u64).await;
        // Longer than the recorder's 100 ms flush period: the first half is on disk now.
        tokio::time::sleep(Duration::from_millis(400)).await;
        // Keep streaming and kill the process in the middle of it.
        let mut sent = half;
        for m in &msgs[half..half + (msgs.len() - half) / 2] {
            push.send(m.encode_to_vec().into()).await.unwrap();
            sent += 1;
        }
        tokio::time::sleep(Duration::from_millis(30)).await;
        child.kill().unwrap(); // SIGKILL on Unix: no chance to flush
        child.wait().unwrap();
        sent
    });

    let rec = read_recording(&recording).expect("a killed daemon's recording must be readable");
    assert_eq!(rec.undecodable, 0);
    let n = rec.raw.len();
    assert!(
        n >= half,
        "every message acknowledged and flushed before the kill is on disk: {n} < {half}"
    );
    assert!(n <= sent_before_kill);
    for (i, raw) in rec.raw.iter().enumerate() {
        assert_eq!(
            raw,
            &msgs[i].encode_to_vec(),
            "record {i} is the {i}-th message sent, byte for byte"
        );
    }

    // Cut the file inside its last record, as a crash mid-write would: the reader reports the
    // torn tail and keeps every complete record before it.
    let bytes = std::fs::read(&recording).unwrap();
    let torn = dir.path().join("torn.apxs");
    std::fs::write(&torn, &bytes[..bytes.len() - 3]).unwrap();
    let t = read_recording(&torn).unwrap();
    assert_eq!(t.raw.len(), n - 1);
    assert!(t.torn_tail_bytes > 0);

    // The recording is input for decode and fit, through the command line.
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_auspex"))
        .args(["decode", "--model"])
        .arg(&model_path)
        .arg("--session")
        .arg(&torn)
        .arg("--out-dir")
        .arg(dir.path().join("dec"))
        .output()
        .unwrap();
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(out.status.success(), "decode --session failed: {stderr}");
    assert!(stderr.contains("the last record is torn"), "{stderr}");
    let decisions = std::fs::read_to_string(dir.path().join("dec/decisions.csv")).unwrap();
    let expect = t
        .messages
        .iter()
        .filter(|(_, m)| matches!(m.body, Some(v1::inbound::Body::Onset(_))))
        .count();
    assert_eq!(
        decisions.lines().count() - 1,
        expect,
        "one decision per recorded onset"
    );
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_auspex"))
        .args(["fit", "--quiet", "--window-ms", "250", "--session"])
        .arg(&recording)
        .arg("--out")
        .arg(dir.path().join("refit.apxm"))
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "fit --session failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    let (_, refit) = auspex_proto::model_file::load_model(&dir.path().join("refit.apxm")).unwrap();
    assert_eq!(refit.units(), truth.units());

    // The library path agrees: Source::Session reads the same trials.
    let (d, _) = Source::Session(recording.clone()).load(0.25).unwrap();
    assert!(d.trials.len() >= expect);
    for (a, b) in d.trials.iter().zip(&data.trials) {
        assert_eq!((a.id, a.onset, &a.stimulus), (b.id, b.onset, &b.stimulus));
    }
}

/// `auspex send` ends with what the daemon made of its lines: spikes of units the model does
/// not have are counted by the daemon, reported by the sender, and — when nothing matched —
/// make it exit non-zero (it printed "sent 82 messages" and exited 0).
#[test]
fn send_reports_what_the_daemon_made_of_the_lines() {
    let _serial = serial();
    use std::io::Write;
    let dir = tempfile::tempdir().unwrap();
    let sc = small_scenario();
    let model_path = dir.path().join("m.apxm");
    auspex_proto::model_file::save_model(&model_path, &sc.true_model().unwrap(), "send test")
        .unwrap();
    let (daemon, ingest, control) = spawn_daemon(
        &["--model".as_ref(), model_path.as_os_str()],
        &dir.path().join("r.apxs"),
    );
    let _daemon = KillOnDrop(daemon);
    let rt = tokio::runtime::Runtime::new().unwrap();
    rt.block_on(wait_started(&control));
    let mut send = std::process::Command::new(env!("CARGO_BIN_EXE_auspex"))
        .args(["send", "--to", &ingest, "--control", &control])
        .stdin(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .unwrap();
    let mut input = send.stdin.take().unwrap();
    writeln!(input, "session 1000000 name=mismatch").unwrap();
    for i in 1..=20u64 {
        let t = i * 300_000;
        writeln!(
            input,
            "onset {i} {t}\nspike 99999 {}\nthrough {}",
            t + 10_000,
            t + 299_999
        )
        .unwrap();
    }
    writeln!(input, "end").unwrap();
    drop(input);
    let out = send.wait_with_output().unwrap();
    let err = String::from_utf8_lossy(&out.stderr);
    assert_eq!(out.status.code(), Some(1), "{err}");
    assert!(
        err.contains("the daemon counted 20 spikes of units its model does not have"),
        "{err}"
    );
    assert!(err.contains("do not fit the daemon's model"), "{err}");
}
