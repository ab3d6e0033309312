//! Learning during the recording, end to end with a libzmq-based peer: a daemon started with no
//! model learns from a simulated session whose task program labels each trial only after its
//! window; its live posteriors equal `decode --prequential` of its own recording bit for bit, and
//! the learned model it saves equals `auspex fit --session` of that recording byte for byte. A
//! unit declared part-way learns from then on. Three sessions in a row through one daemon give three recordings and
//! three summaries, each session decoded exactly as if it ran alone.

use auspex::prequential::{run_recording, Schedule};
use auspex::wire::{dataset_messages, read_recording};
use auspex_engine::engine::{EngineConfig, EngineSink, Frame};
use auspex_engine::{Dataset, Model};
use auspex_modelling::fit::{plan, FitOptions};
use auspex_modelling::learn::LearnOptions;
use auspex_modelling::simulate::{simulate, Scenario, SimOptions};
use auspex_proto::v1::{self, control_request, inbound::Body, outbound};
use auspexd::config::{validate, FileConfig};

mod common;
use common::{control_waiting, frames_of, serial, status, subscriber, wait_for};
use prost::Message;
use std::sync::Arc;
use std::time::{Duration, Instant};

fn scenario() -> Scenario {
    common::demo_scenario(8, 4)
}

fn runtime() -> tokio::runtime::Runtime {
    auspexd::service::io_runtime().unwrap()
}

fn daemon_config(
    record: &std::path::Path,
    model: Option<std::path::PathBuf>,
) -> auspexd::config::DaemonConfig {
    let fc = FileConfig {
        model,
        ingest: Some("tcp://127.0.0.1:0".into()),
        task_ingest: Some("tcp://127.0.0.1:0".into()),
        publish: Some("tcp://127.0.0.1:0".into()),
        control: Some("tcp://127.0.0.1:0".into()),
        record: Some(record.to_path_buf()),
        refit_every_trials: Some(4),
        ..Default::default()
    };
    let mut c = validate(fc, &mut Vec::new()).unwrap();
    c.health_period = Duration::from_millis(100);
    c
}

/// The session as acquisition plus a task program would send it, on one sender: onsets without
/// the stimulus, each trial's label only once its window has passed, and optionally a unit
/// declared part-way (its spikes before the declaration dropped: they were never sorted).
fn session_messages(
    data: &Dataset,
    name: &str,
    window_ticks: i64,
    late_unit: Option<(u32, i64)>,
) -> Vec<v1::Inbound> {
    let mut d = data.clone();
    if let Some((u, from)) = late_unit {
        d.spikes.retain(|t, unit| unit != u || t >= from);
        d.units.retain(|&x| x != u);
    }
    let labels: std::collections::HashMap<u64, (i64, String)> = d
        .trials
        .iter()
        .map(|t| (t.id, (t.onset, t.stimulus.clone().unwrap_or_default())))
        .collect();
    for t in d.trials.iter_mut() {
        t.stimulus = None;
    }
    let plain = dataset_messages(&d, name, 1000, window_ticks);
    let mut out = Vec::new();
    let mut pending: Vec<(i64, u64)> = Vec::new();
    let mut declared = late_unit.is_none();
    for m in plain {
        let wm = match &m.body {
            Some(Body::Spikes(b)) => Some(b.complete_through),
            Some(Body::Heartbeat(h)) => Some(h.complete_through),
            _ => None,
        };
        if let Some(Body::Onset(o)) = &m.body {
            pending.push((o.onset_tick + window_ticks, o.trial));
        }
        if let (false, Some((u, from)), Some(w)) = (declared, late_unit, wm) {
            if w + 1000 >= from {
                declared = true;
                out.push(v1::Inbound {
                    sender: name.into(),
                    seq: 0,
                    body: Some(Body::UnitsAdded(v1::UnitsAdded {
                        units: vec![u],
                        from_tick: from,
                    })),
                });
            }
        }
        let is_end = matches!(m.body, Some(Body::EndOfStream(_)));
        out.push(m);
        if let Some(w) = wm {
            pending.retain(|&(end, trial)| {
                if end - 1 <= w {
                    out.push(v1::Inbound {
                        sender: name.into(),
                        seq: 0,
                        body: Some(Body::Label(v1::TrialLabel {
                            trial,
                            stimulus: labels[&trial].1.clone(),
                        })),
                    });
                    false
                } else {
                    true
                }
            });
        }
        if is_end {
            break;
        }
    }
    for (i, m) in out.iter_mut().enumerate() {
        m.seq = i as u64 + 1;
    }
    out
}

/// The scenario's true model, and the same saved as a model file in `dir`.
fn truth_on_disk(sc: &Scenario, dir: &std::path::Path) -> (Model, std::path::PathBuf) {
    let spec = sc.true_model().unwrap();
    let path = dir.join("truth.apxm");
    auspex_proto::model_file::save_model(&path, &spec, "e2e").unwrap();
    (Model::new(spec).unwrap(), path)
}

/// A running daemon with a collecting subscriber and a connected PUSH sender.
struct Live {
    rt: tokio::runtime::Runtime,
    running: auspexd::service::Running,
    ep: auspexd::service::BoundEndpoints,
    ctx: zmq::Context,
    stop: std::sync::mpsc::Sender<()>,
    sub: std::thread::JoinHandle<Vec<(String, v1::Outbound)>>,
    push: zmq::Socket,
}

fn live(cfg: auspexd::config::DaemonConfig) -> Live {
    let rt = runtime();
    let running = rt.block_on(auspexd::service::start(cfg)).unwrap();
    let ep = running.endpoints.clone();
    let ctx = zmq::Context::new();
    let (stop, sub) = subscriber(&ctx, &ep.publish);
    std::thread::sleep(Duration::from_millis(300));
    let push = ctx.socket(zmq::PUSH).unwrap();
    push.connect(&ep.ingest).unwrap();
    Live {
        rt,
        running,
        ep,
        ctx,
        stop,
        sub,
        push,
    }
}

/// Sends messages at about `speed` × real time (1 ms batches).
fn send(push: &zmq::Socket, msgs: &[v1::Inbound], speed: f64) {
    let t0 = Instant::now();
    let mut batches = 0u64;
    for m in msgs {
        push.send(m.encode_to_vec(), 0).unwrap();
        if matches!(m.body, Some(Body::Spikes(_)) | Some(Body::Heartbeat(_))) {
            batches += 1;
            let due = Duration::from_secs_f64(batches as f64 * 0.001 / speed);
            if let Some(w) = due.checked_sub(t0.elapsed()) {
                std::thread::sleep(w);
            }
        }
    }
}

fn recordings(dir: &std::path::Path) -> Vec<std::path::PathBuf> {
    let mut v: Vec<_> = std::fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|e| e == "apxs"))
        .collect();
    v.sort();
    v
}

#[test]
fn a_daemon_without_a_model_learns_and_equals_prequential_decoding_and_the_offline_fit() {
    let _g = serial();
    let sc = scenario();
    let truth = Model::new(sc.true_model().unwrap()).unwrap();
    let data = simulate(
        &truth,
        &SimOptions {
            trials_per_stimulus: 12,
            seed: 21,
            ..sc.sim_options()
        },
    );
    let window_ticks = (sc.window_ms / 1000.0 * data.tick_rate_hz).round() as i64;
    // The last unit is isolated a third of the way in.
    let late = *data.units.last().unwrap();
    let from = data.trials[data.trials.len() / 3].onset - 1000;
    let msgs = session_messages(&data, "rig-7-day-2", window_ticks, Some((late, from)));

    let dir = tempfile::tempdir().unwrap();
    let mut cfg = daemon_config(dir.path(), None);
    cfg.learn.as_mut().unwrap().window_s = Some(sc.window_ms / 1000.0);
    let Live {
        rt,
        running,
        ep,
        ctx,
        stop,
        sub,
        push,
    } = live(cfg);
    // Paced, and paused after each third until the learner has swapped in a model, so at least
    // two refits (each also calibrating on 5 held-out folds) land in-session however busy the
    // machine is (the learner runs at nice 10).
    let thirds = [msgs.len() / 3, 2 * msgs.len() / 3, msgs.len()];
    let mut sent = 0;
    for (i, &to) in thirds.iter().enumerate() {
        send(&push, &msgs[sent..to], 8.0);
        sent = to;
        if i < 2 {
            wait_for(
                || {
                    status(&ctx, &ep.control)
                        .learning
                        .is_some_and(|l| l.refits > i as u32)
                },
                "a learned model swapped in",
            );
        }
    }
    let n = msgs.len() as u64;
    wait_for(
        || status(&ctx, &ep.control).ended_sessions.len() == 1,
        "the session to end after its end of stream",
    );
    let st = status(&ctx, &ep.control);
    assert_eq!(st.senders[0].last_seq, n);
    let learning = st.learning.clone().unwrap();
    assert_eq!(learning.trials_learned, data.trials.len() as u64);
    assert!(
        learning.refits >= 2,
        "models learned during the session: {learning:?}"
    );
    // The learned model left with its session: status says so everywhere (it said "model in
    // use fitted on N trials" beside "no model yet"), and `steer next` agrees.
    assert!(st.model_path.is_empty() && st.stimuli.is_empty());
    assert_eq!(learning.model_trials, 0, "{learning:?}");
    assert!(
        learning.waiting_for.contains("save-learned"),
        "{learning:?}"
    );
    let next = control_waiting(
        &ctx,
        &ep.control,
        control_request::Body::NextStimulus(v1::NextStimulus::default()),
        5_000,
    );
    assert!(
        !next.ok && next.error.contains("no session is running"),
        "{next:?}"
    );
    // A learning action answers with what now holds, not the decision policy.
    let r = control_waiting(
        &ctx,
        &ep.control,
        control_request::Body::SetLearning(v1::SetLearning {
            action: "freeze".into(),
        }),
        5_000,
    );
    assert!(r.ok && r.note.starts_with("learning frozen"), "{r:?}");
    let r = control_waiting(
        &ctx,
        &ep.control,
        control_request::Body::SetLearning(v1::SetLearning {
            action: "resume".into(),
        }),
        5_000,
    );
    assert!(r.ok && r.note.starts_with("learning on"), "{r:?}");
    // Save what was learned: the fit of every labelled trial of the session.
    let saved = dir.path().join("learned.apxm");
    let r = control_waiting(
        &ctx,
        &ep.control,
        control_request::Body::SaveLearned(v1::SaveLearned {
            path: saved.display().to_string(),
        }),
        120_000,
    );
    assert!(r.ok, "save: {}", r.error);
    std::thread::sleep(Duration::from_millis(300));
    stop.send(()).unwrap();
    let got = sub.join().unwrap();
    rt.block_on(running.stop());

    let live = frames_of(&got);
    assert!(live.len() > 1000, "live frames: {}", live.len());
    let summary = got
        .iter()
        .find_map(|(t, m)| match &m.body {
            Some(outbound::Body::Session(s)) if t == "session" => Some(s.clone()),
            _ => None,
        })
        .expect("a session summary is published");
    assert_eq!(summary.session_name, "rig-7-day-2");
    assert_eq!(summary.reason, "every sender ended");
    assert!(summary.decisions_labelled > 0 && summary.decisions_correct > 0);

    let files = recordings(dir.path());
    assert_eq!(files.len(), 1, "one recording: {files:?}");
    let name = files[0].file_name().unwrap().to_string_lossy().to_string();
    assert!(
        name.starts_with("rig-7-day-2-") && name.ends_with("Z.apxs"),
        "{name}"
    );
    let rec = read_recording(&files[0]).unwrap();
    assert!(rec.learned.len() >= 3);

    // Live posteriors = prequential decoding of the recording, bit for bit.
    let (run, _, frames) = run_recording(
        &rec,
        &LearnOptions::default(),
        &EngineConfig::new(rec.dataset.tick_rate_hz),
        &Schedule { every_trials: 4 },
        None::<Vec<u8>>,
        true,
    )
    .unwrap();
    let mut offline = frames.unwrap();
    offline.sort_by_key(|x| (x.0, x.1));
    // The recording opens with a learning marker (no model), then one per swap.
    assert!(rec.learned[0].1.reset && rec.learned[0].1.trials_learned == 0);
    assert_eq!(run.models.len(), rec.learned.len() - 1);
    assert!(
        run.undecoded_trials > 0,
        "the first trials wait for a model"
    );
    assert_eq!(live.len(), offline.len());
    assert!(live == offline, "live and prequential frames differ");

    // The saved model = `auspex fit` of the recording (the late unit from its declaration on).
    assert_eq!(rec.dataset.declared_from.get(&late), Some(&from));
    let (spec, _) = auspex_proto::model_file::load_model(&saved).unwrap();
    let fit_opts = FitOptions {
        window_s: sc.window_ms / 1000.0,
        ..FitOptions::default()
    };
    let mut fitted = plan(&rec.dataset, &fit_opts).unwrap().fit_all();
    // Calibrated as `auspex fit` calibrates: 5 held-out folds, seed 1, temperature, 20 ms.
    let set = auspex_modelling::calibrate::held_out_set(
        &rec.dataset,
        &fit_opts,
        &fitted.stimuli,
        5,
        1,
        &|p| p.fit_all(),
    )
    .unwrap();
    fitted.calibration = auspex_modelling::calibrate::calibrate(
        &set,
        auspex_modelling::calibrate::DEFAULT_METHOD,
        0.02,
    );
    assert!(spec.calibration.is_active() && !spec.calibration.evidence.is_empty());
    assert!(spec.units.contains(&late));
    assert!(
        spec == fitted,
        "the saved learned model differs from the offline fit"
    );
    // And byte for byte: `auspex fit --session` of the recording writes the very same file
    // (provenance included: the learned model names the recording it was learned from).
    let by_cli = dir.path().join("by-cli.apxm");
    auspex::offline::commands::fit_cmd(
        &auspex::offline::tables::Source::Session(files[0].clone()),
        &by_cli,
        &auspex::offline::commands::FitArgs {
            window_ms: sc.window_ms,
            quiet: true,
            ..Default::default()
        },
    )
    .unwrap();
    assert!(
        std::fs::read(&saved).unwrap() == std::fs::read(&by_cli).unwrap(),
        "save-learned and fit --session wrote different files"
    );
    let n_late = spec.cells
        [spec.units.iter().position(|&u| u == late).unwrap() * spec.stimuli.len()]
    .summary
    .n_trials;
    let n_first = spec.cells[0].summary.n_trials;
    assert!(
        n_late < n_first,
        "the late unit learns only from its declaration: {n_late} vs {n_first}"
    );
}

#[derive(Default)]
struct Collect(Vec<(u64, u32, Vec<f64>)>);
impl EngineSink for Collect {
    fn frame(&mut self, f: &Frame<'_>) {
        self.0.push((f.trial, f.bin, f.posterior.to_vec()));
    }
}

#[test]
fn three_sessions_through_one_daemon_are_three_recordings_and_three_summaries() {
    let _g = serial();
    let sc = scenario();
    let dir = tempfile::tempdir().unwrap();
    let (truth, model_path) = truth_on_disk(&sc, dir.path());
    // `--record rec` names a directory that does not exist yet: the daemon creates it.
    let rec_dir = dir.path().join("rec");
    let cfg = daemon_config(&rec_dir, Some(model_path));
    let Live {
        rt,
        running,
        ep,
        ctx,
        stop,
        sub,
        push,
    } = live(cfg);
    let window_ticks = (sc.window_ms / 1000.0 * 1e6).round() as i64;
    let mut datasets = Vec::new();
    for (i, name) in ["alpha", "beta", "gamma"].iter().enumerate() {
        let data = simulate(
            &truth,
            &SimOptions {
                trials_per_stimulus: 2,
                seed: 100 + i as u64,
                ..sc.sim_options()
            },
        );
        let mut msgs = dataset_messages(&data, name, 1000, window_ticks);
        if *name == "beta" {
            // beta's sender never says it ended: gamma's start ends beta.
            msgs.pop();
        }
        for m in msgs.iter_mut() {
            m.sender = "acq".into();
        }
        send(&push, &msgs, 1e9);
        let want = i + 1;
        if *name != "beta" {
            wait_for(
                || status(&ctx, &ep.control).ended_sessions.len() == want,
                "the session to end",
            );
        } else {
            wait_for(
                || {
                    status(&ctx, &ep.control)
                        .senders
                        .first()
                        .is_some_and(|s| s.last_seq == msgs.len() as u64)
                },
                "beta to be processed",
            );
        }
        datasets.push(data);
        // The folder holds only named recordings, never an empty or provisional one.
        std::thread::sleep(Duration::from_millis(150));
        for f in std::fs::read_dir(&rec_dir).unwrap() {
            let n = f.unwrap().file_name().to_string_lossy().into_owned();
            assert!(
                ["alpha-", "beta-", "gamma-"]
                    .iter()
                    .any(|p| n.starts_with(p)),
                "after {name}: {n}"
            );
        }
    }
    let st = status(&ctx, &ep.control);
    assert_eq!(st.health.unwrap().duplicate_messages, 0);
    std::thread::sleep(Duration::from_millis(300));
    stop.send(()).unwrap();
    let got = sub.join().unwrap();
    rt.block_on(running.stop());

    let summaries: Vec<v1::SessionSummary> = got
        .iter()
        .filter_map(|(_, m)| match &m.body {
            Some(outbound::Body::Session(s)) => Some(s.clone()),
            _ => None,
        })
        .collect();
    let names: Vec<&str> = summaries.iter().map(|s| s.session_name.as_str()).collect();
    assert_eq!(names, ["alpha", "beta", "gamma"]);
    assert_eq!(summaries[1].reason, "new session");
    assert_eq!(summaries[0].reason, "every sender ended");
    let files = recordings(&rec_dir);
    assert_eq!(files.len(), 3, "{files:?}");
    // Each session decoded exactly as alone: its frames equal offline decoding of its dataset.
    let mut frames_by_session: Vec<Vec<(u64, u32, Vec<f64>)>> = vec![Vec::new(); 3];
    let mut k = 0usize;
    for (t, m) in &got {
        match &m.body {
            Some(outbound::Body::Posterior(p)) if t == "posterior" => {
                frames_by_session[k].push((p.trial, p.bin, p.posterior.clone()))
            }
            Some(outbound::Body::Session(_)) => k += 1,
            _ => {}
        }
    }
    let model = Arc::new(truth);
    for (i, data) in datasets.iter().enumerate() {
        let name = ["alpha", "beta", "gamma"][i];
        let file = files
            .iter()
            .find(|p| p.file_name().unwrap().to_string_lossy().starts_with(name))
            .unwrap();
        let rec = read_recording(file).unwrap();
        assert_eq!(rec.dataset.trials.len(), data.trials.len(), "{name}");
        let mut c = Collect::default();
        auspex::offline::run_dataset(model.clone(), data, EngineConfig::new(1e6), &mut c).unwrap();
        c.0.sort_by_key(|x| (x.0, x.1));
        frames_by_session[i].sort_by_key(|x| (x.0, x.1));
        assert!(
            frames_by_session[i] == c.0,
            "session {name} differs from decoding it alone"
        );
    }
}

#[test]
fn retransmitted_messages_are_dropped_and_a_restarting_sender_is_followed() {
    let _g = serial();
    let sc = scenario();
    let dir = tempfile::tempdir().unwrap();
    let (truth, model_path) = truth_on_disk(&sc, dir.path());
    let cfg = daemon_config(&dir.path().join("s.apxs"), Some(model_path));
    let Live {
        rt,
        running,
        ep,
        ctx,
        stop,
        sub,
        push,
    } = live(cfg);
    let data = simulate(
        &truth,
        &SimOptions {
            trials_per_stimulus: 2,
            seed: 7,
            ..sc.sim_options()
        },
    );
    let window_ticks = (sc.window_ms / 1000.0 * 1e6).round() as i64;
    let msgs = dataset_messages(&data, "acq", 1000, window_ticks);
    // Every spike batch with spikes is sent twice, the copy carrying a spike beyond its own
    // promise (the schema allows it): applied twice it would be counted twice.
    let mut sent = 0u64;
    let mut dups = 0u64;
    let half = msgs.len() / 2;
    for (i, m) in msgs.iter().enumerate() {
        push.send(m.encode_to_vec(), 0).unwrap();
        sent += 1;
        if let Some(Body::Spikes(b)) = &m.body {
            if !b.units.is_empty() && dups < 20 {
                let mut copy = m.clone();
                if let Some(Body::Spikes(cb)) = copy.body.as_mut() {
                    cb.units.push(cb.units[0]);
                    cb.ticks.push(cb.complete_through + 1);
                }
                push.send(copy.encode_to_vec(), 0).unwrap();
                dups += 1;
            }
        }
        if i == half {
            // The sender restarts mid-session and says so: SessionStart again, numbering from 1.
            let mut again = msgs[0].clone();
            again.seq = 1;
            push.send(again.encode_to_vec(), 0).unwrap();
            // ... then goes on from 2 with the rest of the session.
            for (j, rest) in msgs[i + 1..].iter().enumerate() {
                let mut r = rest.clone();
                r.seq = 2 + j as u64;
                push.send(r.encode_to_vec(), 0).unwrap();
            }
            break;
        }
    }
    let last = 1 + (msgs.len() - half - 1) as u64;
    wait_for(
        || {
            status(&ctx, &ep.control)
                .senders
                .iter()
                .any(|s| s.sender == "acq" && s.ended && s.last_seq == last)
                || status(&ctx, &ep.control).ended_sessions.len() == 1
        },
        "the session to be processed",
    );
    let h = status(&ctx, &ep.control).health.unwrap();
    assert_eq!(h.duplicate_messages, dups, "every retransmission dropped");
    assert_eq!(h.sequence_gaps, 0, "the restart is not a gap");
    std::thread::sleep(Duration::from_millis(300));
    stop.send(()).unwrap();
    let got = sub.join().unwrap();
    rt.block_on(running.stop());
    // Frames equal decoding the session once, alone: nothing counted twice, nothing lost.
    let mut c = Collect::default();
    auspex::offline::run_dataset(Arc::new(truth), &data, EngineConfig::new(1e6), &mut c).unwrap();
    c.0.sort_by_key(|x| (x.0, x.1));
    assert!(
        frames_of(&got) == c.0,
        "frames differ from decoding the session once"
    );
    assert!(sent > 0);
}

/// A replay asks the daemon to learn in step (`SessionStart.learn_in_step`, as `auspex replay`
/// and `auspex demo` do): the refit due at trial N applies at trial N however fast the messages
/// arrive. The same session sent at real time, at 10× and as fast as the socket goes gives the
/// same live frames, each equal to `decode --prequential` of its own recording bit for bit, and
/// the same accuracy. (Without learning in step a fast replay refitted once and decoded the
/// rest at 42%.)
#[test]
fn a_replay_learns_in_step_at_any_speed() {
    let _g = serial();
    let sc = scenario();
    let truth = Model::new(sc.true_model().unwrap()).unwrap();
    let data = simulate(
        &truth,
        &SimOptions {
            trials_per_stimulus: 6,
            seed: 33,
            ..sc.sim_options()
        },
    );
    let window_ticks = (sc.window_ms / 1000.0 * data.tick_rate_hz).round() as i64;
    let mut msgs = session_messages(&data, "in-step", window_ticks, None);
    auspex::live::client::ask_to_learn_in_step(&mut msgs);
    let mut runs = Vec::new();
    for speed in [f64::INFINITY, 10.0, 1.0] {
        let dir = tempfile::tempdir().unwrap();
        let mut cfg = daemon_config(dir.path(), None);
        cfg.learn.as_mut().unwrap().window_s = Some(sc.window_ms / 1000.0);
        let Live {
            rt,
            running,
            ep,
            ctx,
            stop,
            sub,
            push,
        } = live(cfg);
        send(&push, &msgs, speed);
        let mut waited = Instant::now();
        let mut last = 0;
        // A learning daemon answers status between messages only: slow replies while it refits.
        loop {
            assert!(
                waited.elapsed() < Duration::from_secs(120),
                "no progress at speed {speed}"
            );
            let Some(st) = common::try_status(&ctx, &ep.control) else {
                continue;
            };
            if st.ended_sessions.len() == 1 {
                break;
            }
            let seq = st.senders.first().map(|s| s.last_seq).unwrap_or(0);
            if seq > last {
                (last, waited) = (seq, Instant::now());
            }
            assert!(
                waited.elapsed() < Duration::from_secs(120),
                "no progress at speed {speed}"
            );
            std::thread::sleep(Duration::from_millis(50));
        }
        let st = status(&ctx, &ep.control);
        let summary = st.ended_sessions[0].clone();
        let learning = st.learning.unwrap();
        std::thread::sleep(Duration::from_millis(300));
        stop.send(()).unwrap();
        let got = sub.join().unwrap();
        rt.block_on(running.stop());
        let live = frames_of(&got);
        let files = recordings(dir.path());
        let rec = read_recording(&files[0]).unwrap();
        let (_, _, frames) = run_recording(
            &rec,
            &LearnOptions::default(),
            &EngineConfig::new(rec.dataset.tick_rate_hz),
            &Schedule { every_trials: 4 },
            None::<Vec<u8>>,
            true,
        )
        .unwrap();
        let mut offline = frames.unwrap();
        offline.sort_by_key(|x| (x.0, x.1));
        assert!(
            live == offline,
            "speed {speed}: live frames differ from decode --prequential of the recording"
        );
        assert_eq!(learning.trials_learned, data.trials.len() as u64);
        runs.push((speed, live, summary, learning.refits));
    }
    let (_, first, s0, r0) = &runs[0];
    assert!(s0.decisions_labelled > 0 && *r0 >= 3, "{s0:?}, {r0} refits");
    for (speed, frames, s, refits) in &runs[1..] {
        assert!(
            frames == first,
            "speed {speed}: frames differ from the fastest replay's"
        );
        assert_eq!(
            (s.decisions_labelled, s.decisions_correct, refits),
            (s0.decisions_labelled, s0.decisions_correct, r0),
            "speed {speed}: accuracy and refits as the fastest replay's"
        );
    }
}

/// Sizes from the wire cannot take a daemon down. A learning daemon told of a session with 10⁶
/// units and sent 160 labelled trials (its learner once sized the windows units × trials and
/// aborted) refuses the fit with the memory it would need, says so in status, and keeps
/// answering. A daemon decoding with a model and flooded with 10⁵ onsets at one tick refuses
/// all past the open-trial bound (counted), decodes the rest, and stops at once.
#[test]
fn sizes_from_the_wire_are_refused_and_the_daemon_lives_on() {
    let _g = serial();
    let sc = scenario();
    let dir = tempfile::tempdir().unwrap();
    // 1. Learning, no model: a session of 10⁶ declared units.
    let mut cfg = daemon_config(dir.path(), None);
    cfg.record = None;
    let Live {
        rt,
        running,
        ep,
        ctx,
        stop,
        sub,
        push,
    } = live(cfg);
    let units: Vec<u32> = (1..=1_000_000).collect();
    let mut msgs = vec![v1::Inbound {
        sender: "huge".into(),
        seq: 0,
        body: Some(Body::SessionStart(v1::SessionStart {
            stimuli: Default::default(),
            tick_rate_hz: 1e6,
            units,
            session_name: "huge".into(),
            learn_in_step: true,
        })),
    }];
    for i in 0..160u64 {
        let onset = 1_000_000 + i as i64 * 400_000;
        msgs.push(v1::Inbound {
            body: Some(Body::Onset(v1::TrialOnset {
                trial: i + 1,
                onset_tick: onset,
                stimulus: if i % 2 == 0 { "A" } else { "B" }.into(),
            })),
            ..Default::default()
        });
        msgs.push(v1::Inbound {
            body: Some(Body::Spikes(v1::SpikeBatch {
                units: vec![1 + (i % 7) as u32],
                ticks: vec![onset + 10_000],
                complete_through: onset + 399_999,
            })),
            ..Default::default()
        });
    }
    msgs.push(v1::Inbound {
        body: Some(Body::EndOfStream(v1::EndOfStream {})),
        ..Default::default()
    });
    for (i, m) in msgs.iter_mut().enumerate() {
        m.sender = "huge".into();
        m.seq = i as u64 + 1;
    }
    send(&push, &msgs, f64::INFINITY);
    wait_for(
        || common::try_status(&ctx, &ep.control).is_some_and(|s| s.ended_sessions.len() == 1),
        "the huge session to end",
    );
    let st = status(&ctx, &ep.control);
    let l = st.learning.clone().unwrap();
    assert_eq!(l.trials_learned, 160);
    assert_eq!(l.refits, 0, "nothing could be learned: {l:?}");
    stop.send(()).unwrap();
    drop(sub);
    rt.block_on(running.stop());

    // 2. Decoding with a model: 10⁵ onsets at one tick.
    let (_, model_path) = truth_on_disk(&sc, dir.path());
    let mut cfg = daemon_config(&dir.path().join("flood.apxs"), Some(model_path));
    cfg.learn = None;
    let Live {
        rt,
        running,
        ep,
        ctx,
        stop,
        sub,
        push,
    } = live(cfg);
    let n = 100_000u64;
    let mut flood = vec![v1::Inbound {
        body: Some(Body::SessionStart(v1::SessionStart {
            stimuli: Default::default(),
            tick_rate_hz: 1e6,
            units: Vec::new(),
            session_name: "flood".into(),
            learn_in_step: false,
        })),
        ..Default::default()
    }];
    flood.extend((0..n).map(|i| v1::Inbound {
        body: Some(Body::Onset(v1::TrialOnset {
            trial: i + 1,
            onset_tick: 1_000,
            stimulus: String::new(),
        })),
        ..Default::default()
    }));
    for (i, m) in flood.iter_mut().enumerate() {
        m.sender = "flood".into();
        m.seq = i as u64 + 1;
    }
    send(&push, &flood, f64::INFINITY);
    wait_for(
        || {
            status(&ctx, &ep.control)
                .senders
                .iter()
                .any(|s| s.sender == "flood" && s.last_seq == n + 1)
        },
        "every onset taken",
    );
    let st = status(&ctx, &ep.control);
    assert_eq!(st.open_trials.len(), auspex_engine::engine::MAX_OPEN_TRIALS);
    let h = st.health.unwrap();
    assert_eq!(
        h.trials_over_limit,
        n - auspex_engine::engine::MAX_OPEN_TRIALS as u64
    );
    stop.send(()).unwrap();
    drop(sub);
    let t0 = Instant::now();
    rt.block_on(running.stop());
    // (It took 137 s before the bound; a loose limit, so a busy machine cannot fail it.)
    assert!(
        t0.elapsed() < Duration::from_secs(10),
        "stopping with {} open trials took {:?}",
        auspex_engine::engine::MAX_OPEN_TRIALS,
        t0.elapsed()
    );
}
