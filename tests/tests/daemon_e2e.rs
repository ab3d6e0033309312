//! The daemon end to end, driven by a libzmq-based peer (the `zmq` crate, which builds libzmq
//! from source): a session streamed into `auspexd` gives posterior frames bit-identical to
//! offline decoding; bad input leaves it running with the right counters; the recording replays.

use auspex::offline::run_dataset;
use auspex::wire::dataset_messages;
use auspex_engine::engine::{EngineConfig, EngineSink, Frame};
use auspex_engine::fit::{plan, FitOptions};
use auspex_engine::simulate::{simulate, Scenario, SimOptions};
use auspex_engine::{Dataset, Model};
use auspex_proto::v1::{self, control_reply, control_request, outbound};
use auspexd::config::{validate, FileConfig};
use prost::Message;
use std::sync::mpsc;
use std::sync::Arc;
use std::time::{Duration, Instant};

fn scenario() -> Scenario {
    let text = std::fs::read_to_string(auspex::demo_dir().join("scenario.toml")).unwrap();
    let mut s: Scenario = toml::from_str(&text).unwrap();
    s.units.truncate(10);
    s.stimuli.truncate(4);
    s
}

struct Fixture {
    _dir: tempfile::TempDir,
    model_path: std::path::PathBuf,
    model: Arc<Model>,
    data: Dataset,
    record: std::path::PathBuf,
}

fn fixture(trials: u32) -> Fixture {
    let dir = tempfile::tempdir().unwrap();
    let sc = scenario();
    let truth = Model::new(sc.true_model().unwrap()).unwrap();
    let train = simulate(
        &truth,
        &SimOptions {
            trials_per_stimulus: 10,
            ..sc.sim_options()
        },
    );
    let opts = FitOptions {
        window_s: sc.window_ms / 1000.0,
        ..FitOptions::default()
    };
    let spec = plan(&train, &opts).unwrap().fit_all();
    let model_path = dir.path().join("m.apxm");
    auspexd::model_file::save_model(&model_path, &spec, "e2e").unwrap();
    let data = simulate(
        &truth,
        &SimOptions {
            trials_per_stimulus: trials,
            seed: 99,
            ..sc.sim_options()
        },
    );
    let record = dir.path().join("session.apxs");
    Fixture {
        model: Arc::new(Model::new(spec).unwrap()),
        model_path,
        data,
        record,
        _dir: dir,
    }
}

fn config(f: &Fixture, ipc: Option<&std::path::Path>) -> auspexd::config::DaemonConfig {
    let ep = |name: &str| match ipc {
        Some(d) => format!("ipc://{}/{name}.sock", d.display()),
        None => "tcp://127.0.0.1:0".to_string(),
    };
    let fc = FileConfig {
        model: Some(f.model_path.clone()),
        ingest: Some(ep("ingest")),
        task_ingest: Some(ep("task")),
        publish: Some(ep("publish")),
        control: Some(ep("control")),
        record: Some(f.record.clone()),
        ..Default::default()
    };
    let mut c = validate(fc, &mut Vec::new()).unwrap();
    c.health_period = Duration::from_millis(100);
    c
}

#[derive(Default)]
struct Collect(Vec<(u64, u32, Vec<f64>)>);
impl EngineSink for Collect {
    fn frame(&mut self, f: &Frame<'_>) {
        self.0.push((f.trial, f.bin, f.posterior.to_vec()));
    }
}

/// A libzmq SUB collecting everything on a thread until told to stop.
fn subscriber(
    ctx: &zmq::Context,
    endpoint: &str,
) -> (
    mpsc::Sender<()>,
    std::thread::JoinHandle<Vec<(String, v1::Outbound)>>,
) {
    let sub = ctx.socket(zmq::SUB).unwrap();
    sub.set_rcvhwm(0).unwrap();
    sub.connect(endpoint).unwrap();
    sub.set_subscribe(b"").unwrap();
    let (tx, rx) = mpsc::channel();
    let h = std::thread::spawn(move || {
        let mut out = Vec::new();
        sub.set_rcvtimeo(50).unwrap();
        loop {
            if rx.try_recv().is_ok() {
                // Drain what is still queued.
                while let Ok(parts) = sub.recv_multipart(0) {
                    out.push((
                        String::from_utf8_lossy(&parts[0]).to_string(),
                        v1::Outbound::decode(parts[1].as_slice()).unwrap(),
                    ));
                }
                return out;
            }
            if let Ok(parts) = sub.recv_multipart(0) {
                out.push((
                    String::from_utf8_lossy(&parts[0]).to_string(),
                    v1::Outbound::decode(parts[1].as_slice()).unwrap(),
                ));
            }
        }
    });
    (tx, h)
}

fn control(ctx: &zmq::Context, endpoint: &str, body: control_request::Body) -> v1::ControlReply {
    let req = ctx.socket(zmq::REQ).unwrap();
    req.set_rcvtimeo(5000).unwrap();
    req.set_linger(0).unwrap();
    req.connect(endpoint).unwrap();
    req.send(v1::ControlRequest { body: Some(body) }.encode_to_vec(), 0)
        .unwrap();
    v1::ControlReply::decode(req.recv_bytes(0).unwrap().as_slice()).unwrap()
}

fn status(ctx: &zmq::Context, endpoint: &str) -> v1::Status {
    match control(
        ctx,
        endpoint,
        control_request::Body::Status(v1::StatusQuery {}),
    )
    .body
    {
        Some(control_reply::Body::Status(s)) => s,
        other => panic!("no status: {other:?}"),
    }
}

fn wait_for(mut cond: impl FnMut() -> bool, what: &str) {
    let t0 = Instant::now();
    while !cond() {
        assert!(
            t0.elapsed() < Duration::from_secs(30),
            "timed out waiting for {what}"
        );
        std::thread::sleep(Duration::from_millis(20));
    }
}

fn stream_and_compare(ipc: bool) {
    let f = fixture(3);
    let ipc_dir = tempfile::tempdir().unwrap();
    let cfg = config(&f, ipc.then(|| ipc_dir.path()));
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    let running = rt.block_on(auspexd::service::start(cfg)).unwrap();
    let ep = running.endpoints.clone();
    let ctx = zmq::Context::new();
    let (stop_sub, sub) = subscriber(&ctx, &ep.publish);
    std::thread::sleep(Duration::from_millis(300)); // let the subscription reach the publisher

    let push = ctx.socket(zmq::PUSH).unwrap();
    push.set_sndhwm(0).unwrap();
    push.connect(&ep.ingest).unwrap();
    let bt = (f.model.bin_width_s() * f.data.tick_rate_hz).round() as i64;
    let msgs = dataset_messages(&f.data, "libzmq-acq", bt, bt * f.model.n_bins() as i64);
    for m in &msgs {
        push.send(m.encode_to_vec(), 0).unwrap();
    }
    let n = msgs.len() as u64;
    wait_for(
        || {
            status(&ctx, &ep.control)
                .senders
                .iter()
                .any(|s| s.sender == "libzmq-acq" && s.last_seq == n && s.ended)
        },
        "the daemon to take every message",
    );
    let n_trials = f.data.trials.len();
    std::thread::sleep(Duration::from_millis(300));
    let st = status(&ctx, &ep.control);
    let h = st.health.unwrap();
    assert_eq!(h.trials_completed as usize, n_trials);
    assert_eq!(h.sequence_gaps, 0);
    assert_eq!(h.malformed_messages, 0);
    stop_sub.send(()).unwrap();
    let got = sub.join().unwrap();
    let summary = rt.block_on(running.stop());
    assert_eq!(summary.recorder_errors, 0);

    // Offline decode of the same data, same engine.
    let mut offline = Collect::default();
    let counters = run_dataset(
        f.model.clone(),
        &f.data,
        EngineConfig::new(f.data.tick_rate_hz),
        &mut offline,
    )
    .unwrap();
    let live: Vec<(u64, u32, Vec<f64>)> = got
        .iter()
        .filter_map(|(t, m)| match &m.body {
            Some(outbound::Body::Posterior(p)) if t == "posterior" => {
                Some((p.trial, p.bin, p.posterior.clone()))
            }
            _ => None,
        })
        .collect();
    assert_eq!(
        live.len() as u64,
        counters.frames,
        "every frame delivered (none dropped on an idle loopback)"
    );
    let mut a = live.clone();
    let mut b = offline.0.clone();
    a.sort_by_key(|x| (x.0, x.1));
    b.sort_by_key(|x| (x.0, x.1));
    assert!(
        a == b,
        "live frames must equal offline decoding bit for bit"
    );
    let decisions = got.iter().filter(|(t, _)| t == "decision").count();
    assert_eq!(decisions, n_trials, "one decision per trial");
    assert!(
        got.iter().any(|(t, _)| t == "units"),
        "per-unit reports published"
    );
    assert!(got.iter().any(|(t, _)| t == "health"), "health published");

    // The recording holds every message, and replays to the same frames.
    let rec = auspex::wire::read_recording(&f.record).unwrap();
    assert_eq!(rec.raw.len(), msgs.len());
    assert_eq!(rec.torn_tail_bytes, 0);
    let mut replay = Collect::default();
    run_dataset(
        f.model.clone(),
        &rec.dataset,
        EngineConfig::new(rec.dataset.tick_rate_hz),
        &mut replay,
    )
    .unwrap();
    let mut c = replay.0;
    c.sort_by_key(|x| (x.0, x.1));
    assert!(c == b, "recorded session decodes to the same frames");
}

#[test]
fn libzmq_sender_over_tcp_gets_frames_identical_to_offline_decode() {
    stream_and_compare(false);
}

#[test]
fn libzmq_sender_over_ipc_gets_frames_identical_to_offline_decode() {
    stream_and_compare(true);
}

#[test]
fn bad_input_is_counted_and_never_stops_the_daemon() {
    let f = fixture(1);
    let cfg = config(&f, None);
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    let running = rt.block_on(auspexd::service::start(cfg)).unwrap();
    let ep = running.endpoints.clone();
    let ctx = zmq::Context::new();
    let push = ctx.socket(zmq::PUSH).unwrap();
    push.connect(&ep.ingest).unwrap();
    let unit = f.model.units()[0];
    let mk = |seq: u64, body: v1::inbound::Body| {
        v1::Inbound {
            sender: "bad".into(),
            seq,
            body: Some(body),
        }
        .encode_to_vec()
    };
    use v1::inbound::Body as B;
    // Garbage bytes and an empty message.
    push.send(&b"\xff\x00garbage\x13\x37"[..], 0).unwrap();
    push.send(&b""[..], 0).unwrap();
    push.send(
        mk(
            1,
            B::SessionStart(v1::SessionStart {
                tick_rate_hz: 1e6,
                units: vec![unit, 999_999],
                session_name: "bad".into(),
            }),
        ),
        0,
    )
    .unwrap();
    push.send(
        mk(
            2,
            B::Onset(v1::TrialOnset {
                trial: 1,
                onset_tick: 1_000_000,
                stimulus: f.model.stimuli()[0].clone(),
            }),
        ),
        0,
    )
    .unwrap();
    push.send(
        mk(
            3,
            B::Onset(v1::TrialOnset {
                trial: 1,
                onset_tick: 1_000_500,
                stimulus: String::new(),
            }),
        ),
        0,
    )
    .unwrap(); // duplicate
    push.send(
        mk(
            4,
            B::Spikes(v1::SpikeBatch {
                units: vec![unit, 999_999],
                ticks: vec![1_000_100, 1_000_200],
                complete_through: 1_000_300,
            }),
        ),
        0,
    )
    .unwrap(); // unknown unit
    push.send(
        mk(
            5,
            B::Spikes(v1::SpikeBatch {
                units: vec![unit],
                ticks: vec![1_000_100],
                complete_through: 1_000_400,
            }),
        ),
        0,
    )
    .unwrap(); // late
    push.send(
        mk(
            6,
            B::Heartbeat(v1::Heartbeat {
                complete_through: 5,
            }),
        ),
        0,
    )
    .unwrap(); // backwards
    push.send(
        mk(
            8,
            B::Spikes(v1::SpikeBatch {
                units: vec![unit, unit],
                ticks: vec![1_000_500],
                complete_through: 1_000_600,
            }),
        ),
        0,
    )
    .unwrap(); // gap + malformed lengths
    push.send(
        mk(
            9,
            B::Onset(v1::TrialOnset {
                trial: 2,
                onset_tick: -5_000_000,
                stimulus: String::new(),
            }),
        ),
        0,
    )
    .unwrap(); // stale onset
    push.send(
        mk(
            10,
            B::Label(v1::TrialLabel {
                trial: 77,
                stimulus: f.model.stimuli()[0].clone(),
            }),
        ),
        0,
    )
    .unwrap(); // unknown trial
    push.send(
        mk(
            11,
            B::Onset(v1::TrialOnset {
                trial: 3,
                onset_tick: 1_000_700,
                stimulus: "no-such-stimulus".into(),
            }),
        ),
        0,
    )
    .unwrap();
    push.send(vec![0u8; 17 << 20], 0).unwrap(); // oversized
    push.send(
        v1::Inbound {
            sender: "bad".into(),
            seq: 12,
            body: None,
        }
        .encode_to_vec(),
        0,
    )
    .unwrap(); // unknown kind
    wait_for(
        || {
            status(&ctx, &ep.control)
                .senders
                .iter()
                .any(|s| s.last_seq == 12)
        },
        "bad input to be processed",
    );
    let h = status(&ctx, &ep.control).health.unwrap();
    assert_eq!(
        h.malformed_messages,
        3 + 1,
        "garbage, empty (no body), mismatched lengths, no body: {h:?}"
    );
    assert_eq!(h.duplicate_trials, 1);
    assert_eq!(h.unknown_unit_spikes, 1);
    assert_eq!(h.late_spikes, 1);
    assert_eq!(h.watermark_backwards, 1);
    assert_eq!(h.sequence_gaps, 1);
    assert_eq!(h.stale_onsets, 1);
    assert_eq!(h.unknown_trials, 1);
    assert_eq!(h.unknown_stimuli, 1);
    assert_eq!(h.oversized_batches, 1);
    assert_eq!(h.model_mismatches, (f.model.n_units() - 1 + 1) as u64);
    // Still decoding: finish trial 1 and see it complete.
    push.send(
        mk(
            13,
            B::Heartbeat(v1::Heartbeat {
                complete_through: 3_000_000,
            }),
        ),
        0,
    )
    .unwrap();
    wait_for(
        || status(&ctx, &ep.control).health.unwrap().trials_completed >= 2,
        "trials to complete after bad input",
    );
    rt.block_on(running.stop());
}
