//! The daemon end to end, driven by a libzmq-based peer (the `zmq` crate, which builds libzmq
//! from source): a session streamed into `auspexd` gives posterior frames bit-identical to
//! offline decoding; bad input leaves it running with the right counters; the recording replays.

use auspex::offline::run_dataset;
use auspex::wire::dataset_messages;
use auspex_engine::engine::{EngineConfig, EngineSink, Frame};
use auspex_engine::{Dataset, Model};
use auspex_modelling::fit::{plan, FitOptions};
use auspex_modelling::simulate::{simulate, Scenario, SimOptions};
use auspex_proto::v1::{self, control_request, outbound};
use auspexd::config::{validate, FileConfig};

mod common;
use common::{control, frames_of, runtime, serial, status, subscriber, wait_for};
use prost::Message;
use std::sync::Arc;
use std::time::{Duration, Instant};

fn scenario() -> Scenario {
    common::demo_scenario(10, 4)
}

struct Fixture {
    _dir: tempfile::TempDir,
    model_path: std::path::PathBuf,
    model: Arc<Model>,
    data: Dataset,
    record: std::path::PathBuf,
}

fn fixture(trials: u32) -> Fixture {
    fixture_of(trials, scenario())
}

fn fixture_of(trials: u32, sc: Scenario) -> Fixture {
    let dir = tempfile::tempdir().unwrap();
    let truth = Model::new(sc.true_model().unwrap()).unwrap();
    let (model_path, spec) = common::fitted_model(&sc, 10, dir.path());
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
/// How the peer connects: transport, ingest pattern, and whether trial onsets and labels come
/// from a separate task-control program on the task endpoint.
#[derive(Clone, Copy)]
struct Peer {
    ipc: bool,
    sub_ingest: bool,
    split_task: bool,
    /// Engine threads (`--threads`), and units in the model (several blocks of units when > 64).
    threads: u32,
    units: usize,
    /// Halfway through, the same session is announced again with another clock: refused and
    /// counted, the first clock kept (live and in the recording).
    clock_change: bool,
}

impl Peer {
    const TCP: Peer = Peer {
        ipc: false,
        sub_ingest: false,
        split_task: false,
        threads: 1,
        units: 10,
        clock_change: false,
    };
}

/// Renumbers messages for one sender.
fn as_sender(msgs: Vec<v1::Inbound>, name: &str) -> Vec<v1::Inbound> {
    msgs.into_iter()
        .enumerate()
        .map(|(i, mut m)| {
            m.sender = name.into();
            m.seq = i as u64 + 1;
            m
        })
        .collect()
}

fn stream_and_compare(peer: Peer) {
    let f = fixture_of(3, common::many_units_scenario(peer.units, 4));
    let ipc_dir = tempfile::tempdir().unwrap();
    let mut cfg = config(&f, peer.ipc.then(|| ipc_dir.path()));
    cfg.threads = peer.threads;
    if peer.sub_ingest {
        cfg.ingest_pattern = auspexd::config::IngestPattern::Sub;
    }
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap();
    let running = rt.block_on(auspexd::service::start(cfg)).unwrap();
    let ep = running.endpoints.clone();
    let ctx = zmq::Context::new();
    let (stop_sub, sub) = subscriber(&ctx, &ep.publish);

    let acq = ctx
        .socket(if peer.sub_ingest { zmq::PUB } else { zmq::PUSH })
        .unwrap();
    acq.set_sndhwm(0).unwrap();
    acq.connect(&ep.ingest).unwrap();
    let task = ctx.socket(zmq::PUSH).unwrap();
    task.set_sndhwm(0).unwrap();
    task.connect(ep.task_ingest.as_deref().unwrap()).unwrap();
    // Let the subscriptions (ours and, for SUB ingest, the daemon's) reach the publishers.
    std::thread::sleep(Duration::from_millis(300));
    let bt = (f.model.bin_width_s() * f.data.tick_rate_hz).round() as i64;
    let mut msgs = dataset_messages(&f.data, "libzmq-acq", bt, bt * f.model.n_bins() as i64);
    if peer.clock_change {
        let Some(v1::inbound::Body::SessionStart(first)) = msgs[0].body.clone() else {
            panic!("a session starts with its SessionStart");
        };
        let again = v1::Inbound {
            body: Some(v1::inbound::Body::SessionStart(v1::SessionStart {
                tick_rate_hz: first.tick_rate_hz * 4.0 / 3.0,
                ..first
            })),
            ..Default::default()
        };
        msgs.insert(msgs.len() / 2, again);
        msgs = as_sender(msgs, "libzmq-acq");
    }
    let n = if peer.split_task {
        // Acquisition sends spikes and watermarks; the task program sends each onset without
        // its stimulus and then the label. Both are sent in time order from this thread.
        let mut acq_msgs = Vec::new();
        let mut task_msgs = Vec::new();
        let mut order = Vec::new();
        for m in msgs {
            match &m.body {
                Some(v1::inbound::Body::Onset(o)) => {
                    let mut o2 = o.clone();
                    let label = v1::TrialLabel {
                        trial: o.trial,
                        stimulus: std::mem::take(&mut o2.stimulus),
                    };
                    task_msgs.push(v1::Inbound {
                        body: Some(v1::inbound::Body::Onset(o2)),
                        ..Default::default()
                    });
                    task_msgs.push(v1::Inbound {
                        body: Some(v1::inbound::Body::Label(label)),
                        ..Default::default()
                    });
                    order.extend([true, true]);
                }
                _ => {
                    acq_msgs.push(m);
                    order.push(false);
                }
            }
        }
        let (acq_msgs, task_msgs) = (
            as_sender(acq_msgs, "libzmq-acq"),
            as_sender(task_msgs, "libzmq-task"),
        );
        let (mut a, mut t) = (acq_msgs.iter(), task_msgs.iter());
        for is_task in order {
            if is_task {
                let m = t.next().unwrap();
                task.send(m.encode_to_vec(), 0).unwrap();
                // Sending flat out, the acquisition stream would run seconds of session time
                // ahead of the task program's socket; on a rig both run in real time. Wait for
                // each task message so the onset arrives within the engine's spike history.
                wait_for(
                    || {
                        status(&ctx, &ep.control)
                            .senders
                            .iter()
                            .any(|s| s.sender == "libzmq-task" && s.last_seq == m.seq)
                    },
                    "a task message",
                );
            } else {
                acq.send(a.next().unwrap().encode_to_vec(), 0).unwrap();
            }
        }
        let nt = task_msgs.len() as u64;
        wait_for(
            || {
                status(&ctx, &ep.control)
                    .senders
                    .iter()
                    .any(|s| s.sender == "libzmq-task" && s.last_seq == nt)
            },
            "the task program's messages",
        );
        acq_msgs.len() as u64
    } else {
        for m in &msgs {
            acq.send(m.encode_to_vec(), 0).unwrap();
        }
        msgs.len() as u64
    };
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
    if h.trials_completed as usize != n_trials {
        let rec = auspex::wire::read_recording(&f.record).unwrap();
        for (i, r) in rec.raw.iter().enumerate() {
            match v1::Inbound::decode(r.as_slice()) {
                Ok(m) if !matches!(m.body, Some(v1::inbound::Body::Heartbeat(_))) => {
                    eprintln!("{i}: {m:?}")
                }
                Ok(_) => {}
                Err(e) => eprintln!("{i}: undecodable {e}: {r:?}"),
            }
        }
    }
    assert_eq!(h.trials_completed as usize, n_trials, "{h:?}");
    assert_eq!(h.sequence_gaps, 0);
    assert_eq!(h.malformed_messages, u64::from(peer.clock_change));
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
    if let Some(i) = (0..a.len()).find(|&i| a[i] != b[i]) {
        panic!(
            "live frames must equal offline decoding bit for bit; first difference at {i}: live {:?} vs offline {:?}",
            a[i], b[i]
        );
    }
    let decisions = got.iter().filter(|(t, _)| t == "decision").count();
    assert_eq!(decisions, n_trials, "one decision per trial");
    assert!(
        got.iter().any(|(t, _)| t == "units"),
        "per-unit reports published"
    );
    assert!(got.iter().any(|(t, _)| t == "health"), "health published");

    // The recording holds every message, and replays to the same frames.
    let rec = auspex::wire::read_recording(&f.record).unwrap();
    let recorded_expected = n as usize + if peer.split_task { 2 * n_trials } else { 0 };
    assert_eq!(rec.raw.len(), recorded_expected);
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
fn a_conflicting_clock_mid_session_is_refused_and_counted() {
    let _serial = serial();
    stream_and_compare(Peer {
        clock_change: true,
        ..Peer::TCP
    });
}

#[test]
fn libzmq_sender_over_tcp_gets_frames_identical_to_offline_decode() {
    let _serial = serial();
    stream_and_compare(Peer {
        ipc: false,
        sub_ingest: false,
        split_task: false,
        ..Peer::TCP
    });
}

/// `--threads 1, 2, 3` on a model of 150 units (three blocks): the same frames as offline decode,
/// bit for bit, whichever thread computed which block.
#[test]
fn every_thread_count_gives_frames_identical_to_offline_decode() {
    let _serial = serial();
    for threads in [1, 2, 3] {
        stream_and_compare(Peer {
            threads,
            units: 150,
            ..Peer::TCP
        });
    }
}

#[test]
fn libzmq_pub_sender_into_sub_ingest_gets_identical_frames() {
    let _serial = serial();
    stream_and_compare(Peer {
        ipc: false,
        sub_ingest: true,
        split_task: false,
        ..Peer::TCP
    });
}

#[test]
fn onsets_and_labels_from_a_separate_task_program_give_identical_frames() {
    let _serial = serial();
    stream_and_compare(Peer {
        ipc: true,
        sub_ingest: false,
        split_task: true,
        ..Peer::TCP
    });
}

#[test]
fn libzmq_sender_over_ipc_gets_frames_identical_to_offline_decode() {
    let _serial = serial();
    stream_and_compare(Peer {
        ipc: true,
        sub_ingest: false,
        split_task: false,
        ..Peer::TCP
    });
}

#[test]
fn bad_input_is_counted_and_never_stops_the_daemon() {
    let _serial = serial();
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
                stimuli: Default::default(),
                tick_rate_hz: 1e6,
                units: vec![unit, 999_999],
                session_name: "bad".into(),
                learn_in_step: false,
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

fn offline_frames(
    model: Arc<Model>,
    data: &Dataset,
    keep: impl Fn(u64) -> bool,
) -> Vec<(u64, u32, Vec<f64>)> {
    let mut d = data.clone();
    d.trials.retain(|t| keep(t.id));
    let mut c = Collect::default();
    run_dataset(model, &d, EngineConfig::new(d.tick_rate_hz), &mut c).unwrap();
    c.0.sort_by_key(|x| (x.0, x.1));
    c.0
}

#[test]
fn hot_reload_through_control_applies_at_the_trial_boundary() {
    let _serial = serial();
    let f = fixture(2);
    // A second model, fitted on other trials, so its posteriors differ from the first's.
    let sc = scenario();
    let truth = Model::new(sc.true_model().unwrap()).unwrap();
    let train = simulate(
        &truth,
        &SimOptions {
            trials_per_stimulus: 6,
            seed: 777,
            ..sc.sim_options()
        },
    );
    let spec_b = plan(
        &train,
        &FitOptions {
            window_s: sc.window_ms / 1000.0,
            ..FitOptions::default()
        },
    )
    .unwrap()
    .fit_all();
    let path_b = f.model_path.with_file_name("b.apxm");
    auspex_proto::model_file::save_model(&path_b, &spec_b, "e2e b").unwrap();
    let model_b = Arc::new(Model::new(spec_b).unwrap());

    let rt = runtime();
    let running = rt
        .block_on(auspexd::service::start(config(&f, None)))
        .unwrap();
    let ep = running.endpoints.clone();
    let ctx = zmq::Context::new();
    let (stop_sub, sub) = subscriber(&ctx, &ep.publish);
    std::thread::sleep(Duration::from_millis(300));
    let push = ctx.socket(zmq::PUSH).unwrap();
    push.set_sndhwm(0).unwrap();
    push.connect(&ep.ingest).unwrap();
    let bt = (f.model.bin_width_s() * f.data.tick_rate_hz).round() as i64;
    let window = bt * f.model.n_bins() as i64;
    let msgs = dataset_messages(&f.data, "reloader", bt, window);
    let first = &f.data.trials[0];
    // Halfway through the first trial's window (the next onset is at least a window later).
    let mid = msgs
        .iter()
        .position(|m| auspex::wire::watermark_of(m).is_some_and(|w| w >= first.onset + window / 2))
        .unwrap();
    for m in &msgs[..=mid] {
        push.send(m.encode_to_vec(), 0).unwrap();
    }
    wait_for(
        || {
            status(&ctx, &ep.control)
                .senders
                .iter()
                .any(|s| s.sender == "reloader" && s.last_seq == msgs[mid].seq)
        },
        "the first half of trial 1",
    );
    assert_eq!(status(&ctx, &ep.control).open_trials, vec![first.id]);
    let r = control(
        &ctx,
        &ep.control,
        control_request::Body::Reload(v1::ReloadModel {
            path: path_b.display().to_string(),
        }),
    );
    assert!(r.ok, "reload refused: {}", r.error);
    // A model whose tables would not fit the memory budget (one unit, 25 000 stimuli: its
    // per-unit tally alone is 5 GB) is refused before any of it is built — not "ok" and then
    // an abort at the next session start — and changes nothing.
    let wide = f.model_path.with_file_name("wide.apxm");
    let n = 25_000;
    let wide_spec = auspex_engine::ModelSpec {
        cells: (0..n)
            .map(|_| auspex_engine::CellSpec {
                count: auspex_engine::CountParams::Poisson { mean: 2.0 },
                timing: vec![1.0],
                summary: Default::default(),
            })
            .collect(),
        ..auspex_engine::ModelSpec::numbered(1, n, 1, Vec::new())
    };
    auspex_proto::model_file::save_model(&wide, &wide_spec, "e2e wide").unwrap();
    let too_big = control(
        &ctx,
        &ep.control,
        control_request::Body::Reload(v1::ReloadModel {
            path: wide.display().to_string(),
        }),
    );
    assert!(
        !too_big.ok && too_big.error.contains("memory budget"),
        "{too_big:?}"
    );
    // A model file that does not load is refused with its path named, and changes nothing.
    let bad = control(
        &ctx,
        &ep.control,
        control_request::Body::Reload(v1::ReloadModel {
            path: "/nonexistent/x.apxm".into(),
        }),
    );
    assert!(
        !bad.ok && bad.error.contains("/nonexistent/x.apxm"),
        "{}",
        bad.error
    );
    for m in &msgs[mid + 1..] {
        push.send(m.encode_to_vec(), 0).unwrap();
    }
    let n = msgs.len() as u64;
    wait_for(
        || {
            status(&ctx, &ep.control)
                .senders
                .iter()
                .any(|s| s.sender == "reloader" && s.last_seq == n && s.ended)
        },
        "the rest of the session",
    );
    std::thread::sleep(Duration::from_millis(300));
    assert_eq!(
        status(&ctx, &ep.control).model_path,
        path_b.display().to_string()
    );
    stop_sub.send(()).unwrap();
    let live = frames_of(&sub.join().unwrap());
    rt.block_on(running.stop());

    let id1 = first.id;
    let mut expect = offline_frames(f.model.clone(), &f.data, |t| t == id1);
    expect.extend(offline_frames(model_b.clone(), &f.data, |t| t != id1));
    expect.sort_by_key(|x| (x.0, x.1));
    assert_eq!(live.len(), expect.len());
    assert!(
        live == expect,
        "trial 1 finishes on the old model, every later trial uses the new one"
    );
    // And the two models really differ on trial 1, so the check above can fail.
    assert!(
        offline_frames(model_b, &f.data, |t| t == id1)
            != offline_frames(f.model.clone(), &f.data, |t| t == id1)
    );
}

#[test]
fn decisions_arrive_while_a_subscriber_is_stalled() {
    let _serial = serial();
    // Enough trials that the stalled subscriber's queues overflow many times over
    // (about 150 000 posterior frames).
    let f = fixture(150);
    let rt = runtime();
    let running = rt
        .block_on(auspexd::service::start(config(&f, None)))
        .unwrap();
    let ep = running.endpoints.clone();
    let ctx = zmq::Context::new();
    // The stalled subscriber: everything, tiny queue, never reads.
    let stalled = ctx.socket(zmq::SUB).unwrap();
    stalled.set_rcvhwm(1).unwrap();
    stalled.set_rcvbuf(4096).unwrap();
    stalled.connect(&ep.publish).unwrap();
    stalled.set_subscribe(b"").unwrap();
    // The closed-loop controller: decisions only.
    let ctl = ctx.socket(zmq::SUB).unwrap();
    ctl.set_rcvhwm(0).unwrap();
    ctl.connect(&ep.publish).unwrap();
    ctl.set_subscribe(auspex_proto::topic::DECISION.as_bytes())
        .unwrap();
    ctl.set_rcvtimeo(100).unwrap();
    std::thread::sleep(Duration::from_millis(300));

    let push = ctx.socket(zmq::PUSH).unwrap();
    push.set_sndhwm(0).unwrap();
    push.connect(&ep.ingest).unwrap();
    let bt = (f.model.bin_width_s() * f.data.tick_rate_hz).round() as i64;
    let msgs = dataset_messages(&f.data, "fast-acq", bt, bt * f.model.n_bins() as i64);
    let n_trials = f.data.trials.len();
    let sender = std::thread::spawn(move || {
        for m in &msgs {
            push.send(m.encode_to_vec(), 0).unwrap();
        }
        push
    });
    let mut decisions = Vec::new();
    let t0 = Instant::now();
    while decisions.len() < n_trials && t0.elapsed() < Duration::from_secs(60) {
        if let Ok(parts) = ctl.recv_multipart(0) {
            assert_eq!(parts[0], auspex_proto::topic::DECISION.as_bytes());
            decisions.push(v1::Outbound::decode(parts[1].as_slice()).unwrap());
        }
    }
    let _push = sender.join().unwrap();
    let h = status(&ctx, &ep.control).health.unwrap();
    rt.block_on(running.stop());
    assert_eq!(
        decisions.len(),
        n_trials,
        "every decision reached the controller"
    );
    let seqs: Vec<u64> = decisions.iter().map(|d| d.seq).collect();
    assert_eq!(
        seqs,
        (1..=n_trials as u64).collect::<Vec<_>>(),
        "decision sequence numbers without a gap"
    );
    assert!(
        h.frames_out as usize > 100_000,
        "the stalled subscriber had plenty to choke on"
    );
    drop(stalled);
}

#[test]
fn control_answers_a_thousand_short_lived_clients_while_ingest_is_busy() {
    // Regression: with zeromq 0.7's REP socket, control stopped answering for good after a few
    // hundred one-shot REQ clients under ingest load; the daemon now serves control on ROUTER.
    let _serial = serial();
    let f = fixture(60);
    let rt = runtime();
    let running = rt
        .block_on(auspexd::service::start(config(&f, None)))
        .unwrap();
    let ep = running.endpoints.clone();
    let ctx = zmq::Context::new();
    let bt = (f.model.bin_width_s() * f.data.tick_rate_hz).round() as i64;
    let msgs = dataset_messages(&f.data, "busy", bt, bt * f.model.n_bins() as i64);
    let (c2, ingest) = (ctx.clone(), ep.ingest.clone());
    let sender = std::thread::spawn(move || {
        let p = c2.socket(zmq::PUSH).unwrap();
        p.connect(&ingest).unwrap();
        for m in &msgs {
            p.send(m.encode_to_vec(), 0).unwrap();
            std::thread::sleep(Duration::from_micros(20));
        }
    });
    for _ in 0..1000 {
        let s = status(&ctx, &ep.control);
        assert_eq!(s.stimuli, f.model.stimuli());
    }
    sender.join().unwrap();
    rt.block_on(running.stop());
}

#[test]
fn control_answers_every_frame_count_with_one_rule() {
    let _g = serial();
    let f = fixture(1);
    let rt = runtime();
    let running = rt
        .block_on(auspexd::service::start(config(&f, None)))
        .unwrap();
    let ep = running.endpoints.control.clone();
    let ctx = zmq::Context::new();
    let req_bytes = v1::ControlRequest {
        body: Some(control_request::Body::Status(v1::StatusQuery {})),
    }
    .encode_to_vec();
    let decode = |parts: Vec<Vec<u8>>| -> v1::ControlReply {
        assert_eq!(
            parts.len(),
            1,
            "one reply frame, never the request echoed back"
        );
        v1::ControlReply::decode(parts[0].as_slice()).unwrap()
    };
    // REQ, two frames: refused with one error reply.
    let req = ctx.socket(zmq::REQ).unwrap();
    req.set_rcvtimeo(5000).unwrap();
    req.connect(&ep).unwrap();
    req.send_multipart([req_bytes.clone(), b"extra".to_vec()], 0)
        .unwrap();
    let r = decode(req.recv_multipart(0).unwrap());
    assert!(!r.ok && r.error.contains("one frame"), "{r:?}");
    // REQ, one frame: answered.
    req.send(req_bytes.clone(), 0).unwrap();
    assert!(decode(req.recv_multipart(0).unwrap()).ok);
    // DEALER without a delimiter: one frame answered, two refused.
    let dealer = ctx.socket(zmq::DEALER).unwrap();
    dealer.set_rcvtimeo(5000).unwrap();
    dealer.connect(&ep).unwrap();
    dealer.send(req_bytes.clone(), 0).unwrap();
    assert!(decode(dealer.recv_multipart(0).unwrap()).ok);
    dealer
        .send_multipart([req_bytes.clone(), req_bytes.clone()], 0)
        .unwrap();
    assert!(!decode(dealer.recv_multipart(0).unwrap()).ok);
    rt.block_on(running.stop());
}

#[test]
fn text_lines_through_auspex_send_give_frames_identical_to_offline_decode() {
    let _g = serial();
    let f = fixture(2);
    let rt = runtime();
    let running = rt
        .block_on(auspexd::service::start(config(&f, None)))
        .unwrap();
    let ep = running.endpoints.clone();
    let ctx = zmq::Context::new();
    let (stop, sub) = subscriber(&ctx, &ep.publish);
    std::thread::sleep(Duration::from_millis(300));
    let window = (f.model.bin_width_s() * 1e6).round() as i64 * f.model.n_bins() as i64;
    let lines = auspex::send::dataset_lines(&f.data, window);
    let s = rt
        .block_on(auspex::send::send(
            Box::new(std::io::Cursor::new(lines.into_bytes())),
            &ep.ingest,
            "lines",
            false,
        ))
        .unwrap();
    assert_eq!(s.bad_lines, 0);
    assert_eq!(s.spikes, f.data.spikes.len() as u64);
    wait_for(
        || {
            status(&ctx, &ep.control)
                .ended_sessions
                .first()
                .is_some_and(|e| e.session_name == "lines")
        },
        "the lines' session to end",
    );
    std::thread::sleep(Duration::from_millis(300));
    stop.send(()).unwrap();
    let got = sub.join().unwrap();
    rt.block_on(running.stop());
    assert_eq!(
        frames_of(&got),
        offline_frames(f.model.clone(), &f.data, |_| true),
        "frames from text lines differ from offline decoding"
    );
}
