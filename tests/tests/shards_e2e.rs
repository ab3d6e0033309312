//! A deployment across machines, over loopback: two `auspexd --role shard` daemons, each
//! taking the spikes of its own unit group from its own (libzmq) acquisition sender, and an
//! `auspexd --role combine` taking the task program's messages, relaying them to the shards and
//! adding their partials. Its frames equal offline `decode` bit for bit; a shard that stops is
//! named in every frame until it rejoins, and counts from the next trial after it does.

use auspex::offline::run_dataset;
use auspex::wire::dataset_messages;
use auspex_engine::engine::{EngineConfig, EngineSink, Frame};
use auspex_engine::{Dataset, Model};
use auspex_modelling::fit::{plan, FitOptions};
use auspex_modelling::simulate::{simulate, SimOptions};
use auspex_proto::v1::{self, inbound::Body, outbound};
use auspexd::config::{validate, FileConfig};
use auspexd::service::Running;
use prost::Message;
use std::collections::HashSet;
use std::sync::Arc;
use std::time::Duration;

mod common;
use common::{runtime, serial, status, subscriber, wait_for};

struct Fixture {
    dir: tempfile::TempDir,
    model_path: std::path::PathBuf,
    model: Arc<Model>,
    data: Dataset,
}

/// 150 units in two groups (unit indices 0..100 and 100..150: blocks 0..64, 64..100, 100..150).
fn fixture(trials: u32) -> Fixture {
    let sc = common::many_units_scenario(150, 4);
    let dir = tempfile::tempdir().unwrap();
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
    let mut spec = plan(&train, &opts).unwrap().fit_all();
    spec.unit_groups = vec![100];
    let model_path = dir.path().join("m.apxm");
    auspex_proto::model_file::save_model(&model_path, &spec, "e2e").unwrap();
    let data = simulate(
        &truth,
        &SimOptions {
            trials_per_stimulus: trials,
            seed: 77,
            ..sc.sim_options()
        },
    );
    let model = Arc::new(Model::new(spec).unwrap());
    assert_eq!(model.n_groups(), 2);
    Fixture {
        dir,
        model_path,
        model,
        data,
    }
}

fn file_config(f: &Fixture) -> FileConfig {
    FileConfig {
        model: Some(f.model_path.clone()),
        ingest: Some("tcp://127.0.0.1:0".into()),
        task_ingest: Some("tcp://127.0.0.1:0".into()),
        publish: Some("tcp://127.0.0.1:0".into()),
        control: Some("tcp://127.0.0.1:0".into()),
        ..Default::default()
    }
}

fn shard(rt: &tokio::runtime::Runtime, f: &Fixture, part: u32, link: &str) -> Running {
    shard_on(rt, f, part, link, 1)
}

/// A shard on `threads` engine threads (each computes a slice of its part).
fn shard_on(
    rt: &tokio::runtime::Runtime,
    f: &Fixture,
    part: u32,
    link: &str,
    threads: u32,
) -> Running {
    let mut c = validate(
        FileConfig {
            role: Some("shard".into()),
            part: Some(part),
            parts: Some(2),
            link: Some(link.into()),
            threads: Some(threads),
            record: Some(f.dir.path().join(format!("shard{part}.apxs"))),
            ..file_config(f)
        },
        &mut Vec::new(),
    )
    .unwrap();
    c.health_period = Duration::from_millis(100);
    rt.block_on(auspexd::service::start(c)).unwrap()
}

fn combiner(
    rt: &tokio::runtime::Runtime,
    f: &Fixture,
    links: &[String],
    deadline_ms: f64,
) -> Running {
    let mut c = validate(
        FileConfig {
            role: Some("combine".into()),
            shards: Some(links.to_vec()),
            shard_deadline_ms: Some(deadline_ms),
            record: Some(f.dir.path().join("combiner.apxs")),
            ..file_config(f)
        },
        &mut Vec::new(),
    )
    .unwrap();
    c.health_period = Duration::from_millis(100);
    rt.block_on(auspexd::service::start(c)).unwrap()
}

/// Where each message of the session goes: spikes split by unit group to the two acquisition
/// senders (each keeps every watermark), onsets to the task program, the session's start and
/// end to all three. Each sender numbers its own messages.
struct Streams {
    /// (destination: 0, 1 shard ingest; 2 combiner task ingest; message), in time order.
    order: Vec<(usize, v1::Inbound)>,
}

fn streams(f: &Fixture) -> Streams {
    let bt = (f.model.bin_width_s() * f.data.tick_rate_hz).round() as i64;
    let msgs = dataset_messages(&f.data, "deploy", bt, bt * f.model.n_bins() as i64);
    let group0: HashSet<u32> = f.model.units()[f.model.part_units(0, 2)]
        .iter()
        .copied()
        .collect();
    let names = ["acq-a", "acq-b", "task"];
    let mut seq = [0u64; 3];
    let mut order = Vec::new();
    let mut push = |dest: usize, body: Body, order: &mut Vec<(usize, v1::Inbound)>| {
        seq[dest] += 1;
        order.push((
            dest,
            v1::Inbound {
                sender: names[dest].into(),
                seq: seq[dest],
                body: Some(body),
            },
        ));
    };
    for m in msgs {
        match m.body.unwrap() {
            b @ (Body::SessionStart(_) | Body::EndOfStream(_)) => {
                for d in 0..3 {
                    push(d, b.clone(), &mut order);
                }
            }
            b @ Body::Onset(_) => push(2, b, &mut order),
            Body::Spikes(s) => {
                for (d, keep) in [(0, true), (1, false)] {
                    let (units, ticks): (Vec<u32>, Vec<i64>) = s
                        .units
                        .iter()
                        .zip(&s.ticks)
                        .filter(|(u, _)| group0.contains(u) == keep)
                        .map(|(u, t)| (*u, *t))
                        .unzip();
                    push(
                        d,
                        Body::Spikes(v1::SpikeBatch {
                            units,
                            ticks,
                            complete_through: s.complete_through,
                        }),
                        &mut order,
                    );
                }
            }
            b @ Body::Heartbeat(_) => {
                push(0, b.clone(), &mut order);
                push(1, b, &mut order);
            }
            other => panic!("unexpected message {other:?}"),
        }
    }
    Streams { order }
}

#[derive(Default)]
struct Collect(Vec<(u64, u32, Vec<f64>)>);
impl EngineSink for Collect {
    fn frame(&mut self, f: &Frame<'_>) {
        self.0.push((f.trial, f.bin, f.posterior.to_vec()));
    }
}

fn offline(f: &Fixture) -> Vec<(u64, u32, Vec<f64>)> {
    let mut c = Collect::default();
    run_dataset(
        f.model.clone(),
        &f.data,
        EngineConfig::new(f.data.tick_rate_hz),
        &mut c,
    )
    .unwrap();
    c.0.sort_by_key(|x| (x.0, x.1));
    c.0
}

/// (trial, bin, posterior, missing parts) of the posterior frames collected.
fn frames(got: &[(String, v1::Outbound)]) -> Vec<(u64, u32, Vec<f64>, u64)> {
    let mut v: Vec<_> = got
        .iter()
        .filter_map(|(t, m)| match &m.body {
            Some(outbound::Body::Posterior(p)) if t == "posterior" => {
                Some((p.trial, p.bin, p.posterior.clone(), p.missing_parts))
            }
            _ => None,
        })
        .collect();
    v.sort_by_key(|x| (x.0, x.1));
    v
}

fn sockets(ctx: &zmq::Context, eps: &[&str]) -> Vec<zmq::Socket> {
    eps.iter()
        .map(|ep| {
            let s = ctx.socket(zmq::PUSH).unwrap();
            s.set_sndhwm(0).unwrap();
            s.connect(ep).unwrap();
            s
        })
        .collect()
}

fn joined(ctx: &zmq::Context, control: &str) -> Vec<bool> {
    status(ctx, control)
        .shards
        .iter()
        .map(|s| s.joined)
        .collect()
}

/// Sends one message; a task message is waited for at the combiner (on a rig both streams run
/// in real time; sent flat out, acquisition would run seconds of session time ahead).
fn send(ctx: &zmq::Context, socks: &[zmq::Socket], control: &str, dest: usize, m: &v1::Inbound) {
    socks[dest].send(m.encode_to_vec(), 0).unwrap();
    if dest == 2 {
        wait_for(
            || {
                status(ctx, control)
                    .senders
                    .iter()
                    .any(|s| s.sender == "task" && s.last_seq >= m.seq)
            },
            "a task message at the combiner",
        );
    }
}

/// Two shards on free ports (on the given engine threads each) and a combiner connected to
/// them, once both have joined: (shards, their link endpoints, combiner).
fn deploy(
    rt: &tokio::runtime::Runtime,
    f: &Fixture,
    ctx: &zmq::Context,
    deadline_ms: f64,
    threads: [u32; 2],
) -> (Vec<Running>, Vec<String>, Running) {
    let shards = vec![
        shard_on(rt, f, 0, "tcp://127.0.0.1:0", threads[0]),
        shard_on(rt, f, 1, "tcp://127.0.0.1:0", threads[1]),
    ];
    let links: Vec<String> = shards
        .iter()
        .map(|s| s.endpoints.link.clone().unwrap())
        .collect();
    let comb = combiner(rt, f, &links, deadline_ms);
    wait_for(
        || joined(ctx, &comb.endpoints.control) == [true, true],
        "both shards to join",
    );
    (shards, links, comb)
}

/// A subscriber's stop signal and its thread.
type Collecting = (
    std::sync::mpsc::Sender<()>,
    std::thread::JoinHandle<Vec<(String, v1::Outbound)>>,
);

/// Waits until the combiner has completed `n_trials`, then stops the subscriber and the
/// deployment (combiner, shards): the frames collected.
fn finish(
    rt: &tokio::runtime::Runtime,
    ctx: &zmq::Context,
    (comb, shards): (Running, Vec<Running>),
    n_trials: u64,
    what: &str,
    (stop_sub, sub): Collecting,
) -> Vec<(u64, u32, Vec<f64>, u64)> {
    let control = comb.endpoints.control.clone();
    wait_for(
        || status(ctx, &control).health.unwrap().trials_completed == n_trials,
        what,
    );
    std::thread::sleep(Duration::from_millis(300));
    stop_sub.send(()).unwrap();
    let got = frames(&sub.join().unwrap());
    rt.block_on(comb.stop());
    for s in shards {
        rt.block_on(s.stop());
    }
    got
}

#[test]
fn two_shards_and_a_combiner_give_frames_identical_to_offline_decode() {
    let _serial = serial();
    let f = fixture(3);
    let rt = runtime();
    let ctx = zmq::Context::new();
    let (shards, _, comb) = deploy(&rt, &f, &ctx, 5000.0, [1, 1]);
    let cep = comb.endpoints.clone();
    let st = status(&ctx, &cep.control);
    assert_eq!((st.role.as_str(), st.parts), ("combine", 2));
    let (stop_sub, sub) = subscriber(&ctx, &cep.publish);
    std::thread::sleep(Duration::from_millis(300));
    let socks = sockets(
        &ctx,
        &[
            &shards[0].endpoints.ingest,
            &shards[1].endpoints.ingest,
            cep.task_ingest.as_deref().unwrap(),
        ],
    );
    for (dest, m) in &streams(&f).order {
        send(&ctx, &socks, &cep.control, *dest, m);
    }
    let n_trials = f.data.trials.len() as u64;
    wait_for(
        || status(&ctx, &cep.control).health.unwrap().trials_completed == n_trials,
        "every trial completed at the combiner",
    );
    std::thread::sleep(Duration::from_millis(300));
    let h = status(&ctx, &cep.control).health.unwrap();
    assert_eq!(
        (h.shards_lost, h.missing_parts, h.misrouted_spikes),
        (0, 0, 0)
    );
    for s in &shards {
        let sh = status(&ctx, &s.endpoints.control);
        assert_eq!(sh.role, "shard");
        let sh = sh.health.unwrap();
        assert_eq!((sh.partials_unsent, sh.malformed_messages), (0, 0));
        assert!(sh.spikes_in > 0);
    }
    stop_sub.send(()).unwrap();
    let got = sub.join().unwrap();
    rt.block_on(comb.stop());
    for s in shards {
        rt.block_on(s.stop());
    }
    let live = frames(&got);
    let want = offline(&f);
    assert_eq!(live.len(), want.len(), "every frame, once");
    for (l, w) in live.iter().zip(&want) {
        assert_eq!(l.3, 0, "no part missing");
        assert!(
            (l.0, l.1, &l.2) == (w.0, w.1, &w.2),
            "deployment frames must equal offline decoding bit for bit: trial {} bin {}: {:?} vs {:?}",
            l.0,
            l.1,
            l.2,
            w.2
        );
    }
    assert_eq!(
        got.iter().filter(|(t, _)| t == "decision").count() as u64,
        n_trials
    );
    // Each shard recorded its own acquisition stream (not the relayed trial messages, which
    // the combiner recorded as its own ingest).
    let mut recordings = Vec::new();
    for (file, name) in [
        ("shard0.apxs", "acq-a"),
        ("shard1.apxs", "acq-b"),
        ("combiner.apxs", "task"),
    ] {
        let rec = auspex::wire::read_recording(&f.dir.path().join(file)).unwrap();
        assert!(rec.messages.iter().all(|(_, m)| m.sender == name));
        let msgs: Vec<v1::Inbound> = rec.messages.into_iter().map(|(_, m)| m).collect();
        recordings.push((name, msgs, rec.dataset.tick_rate_hz));
    }

    // Replaying the three recordings through a fresh deployment (at 4x real time, started
    // together, as a lab would after the session) gives the same frames — with its shards on 2
    // and 3 engine threads (part 0 has two blocks, part 1 one: one slice there is empty).
    let (shards, _, comb) = deploy(&rt, &f, &ctx, 5000.0, [2, 3]);
    let cep = comb.endpoints.clone();
    let (stop_sub, sub) = subscriber(&ctx, &cep.publish);
    std::thread::sleep(Duration::from_millis(300));
    let targets = [
        (
            shards[0].endpoints.ingest.clone(),
            shards[0].endpoints.control.clone(),
        ),
        (
            shards[1].endpoints.ingest.clone(),
            shards[1].endpoints.control.clone(),
        ),
        (cep.task_ingest.clone().unwrap(), cep.control.clone()),
    ];
    let replay = |i: usize| {
        let (name, msgs, rate) = &recordings[i];
        let (to, ctl) = &targets[i];
        auspex::live::replay(
            to,
            ctl,
            msgs,
            name,
            *rate,
            auspex::live::Pace::Speed(4.0),
            false,
        )
    };
    let (a, b, c) = rt.block_on(async { tokio::join!(replay(0), replay(1), replay(2)) });
    for r in [a, b, c] {
        r.unwrap();
    }
    let replayed = finish(
        &rt,
        &ctx,
        (comb, shards),
        n_trials,
        "every replayed trial completed at the combiner",
        (stop_sub, sub),
    );
    assert!(
        replayed == live,
        "the replayed deployment (shards on 2 and 3 threads) gives the live frames, bit for bit"
    );
}

#[test]
fn a_stopped_shard_is_named_in_every_frame_and_rejoins_at_the_next_trial() {
    let _serial = serial();
    let f = fixture(6);
    let rt = runtime();
    let ctx = zmq::Context::new();
    let (shards, links, comb) = deploy(&rt, &f, &ctx, 1000.0, [1, 1]);
    let mut shards: Vec<Option<Running>> = shards.into_iter().map(Some).collect();
    let cep = comb.endpoints.clone();
    let (stop_sub, sub) = subscriber(&ctx, &cep.publish);
    std::thread::sleep(Duration::from_millis(300));
    let ingest = |s: &Option<Running>| s.as_ref().unwrap().endpoints.ingest.clone();
    let mut socks = sockets(
        &ctx,
        &[
            &ingest(&shards[0]),
            &ingest(&shards[1]),
            cep.task_ingest.as_deref().unwrap(),
        ],
    );
    let order = streams(&f).order;
    let onsets: Vec<usize> = (0..order.len())
        .filter(|&i| matches!(order[i].1.body, Some(Body::Onset(_))))
        .collect();
    let n = onsets.len();
    // Trials opened while the shard is away: from the third onset up to the sixth-last; the
    // shard is back before the sixth-last (whose window may hold spikes sent while it was
    // away), and the last five count it again.
    let (stop_at, restart_at, counted_from) = (onsets[2], onsets[n - 6], onsets[n - 5]);
    let mut trials_while_away = HashSet::new();
    let mut trials_after = HashSet::new();
    let mut away = false;
    for (i, (dest, m)) in order.iter().enumerate() {
        if i == stop_at {
            rt.block_on(shards[1].take().unwrap().stop());
            wait_for(
                || joined(&ctx, &cep.control) == [true, false],
                "the combiner to give the stopped shard up",
            );
            away = true;
        }
        if i == restart_at {
            let s = shard(&rt, &f, 1, &links[1]);
            socks[1] = sockets(&ctx, &[&s.endpoints.ingest]).pop().unwrap();
            shards[1] = Some(s);
            wait_for(
                || joined(&ctx, &cep.control) == [true, true],
                "the restarted shard to rejoin",
            );
            away = false;
        }
        if let Some(Body::Onset(o)) = &m.body {
            if away {
                trials_while_away.insert(o.trial);
            } else if i >= counted_from {
                trials_after.insert(o.trial);
            }
        }
        if *dest == 1 && away {
            continue; // its acquisition has no one to send to
        }
        send(&ctx, &socks, &cep.control, *dest, m);
    }
    let n_trials = f.data.trials.len() as u64;
    wait_for(
        || status(&ctx, &cep.control).health.unwrap().trials_completed == n_trials,
        "every trial completed at the combiner",
    );
    std::thread::sleep(Duration::from_millis(300));
    let st = status(&ctx, &cep.control);
    let h = st.health.unwrap();
    assert_eq!(h.shards_lost, 1, "one loss counted");
    assert_eq!(h.missing_parts, 0, "rejoined");
    assert_eq!(st.shards[1].times_lost, 1);
    stop_sub.send(()).unwrap();
    let got = sub.join().unwrap();
    rt.block_on(comb.stop());
    for s in shards.into_iter().flatten() {
        rt.block_on(s.stop());
    }
    let live = frames(&got);
    let want = offline(&f);
    assert!(!trials_while_away.is_empty() && !trials_after.is_empty());
    for t in &trials_while_away {
        let fr: Vec<_> = live.iter().filter(|x| x.0 == *t).collect();
        assert_eq!(fr.len(), f.model.n_bins(), "trial {t} still finishes");
        assert!(
            fr.iter().all(|x| x.3 == 1 << 1),
            "every frame of trial {t} says part 1 is missing"
        );
    }
    for t in &trials_after {
        let a: Vec<_> = live
            .iter()
            .filter(|x| x.0 == *t)
            .map(|x| (x.1, x.2.clone(), x.3))
            .collect();
        let b: Vec<_> = want
            .iter()
            .filter(|x| x.0 == *t)
            .map(|x| (x.1, x.2.clone(), 0))
            .collect();
        assert!(
            a == b,
            "trial {t} after the rejoin equals offline decoding bit for bit"
        );
    }
}

/// The task program's last onset reaches a shard by way of the combiner, and may come after
/// the shard's own acquisition has ended (a race the rig cannot order): the shard waits for
/// the task's relayed end, so the last trial still completes, equal to offline decoding.
#[test]
fn a_shard_takes_the_last_onset_relayed_after_its_acquisition_ended() {
    let _serial = serial();
    let f = fixture(2);
    let rt = runtime();
    let ctx = zmq::Context::new();
    let (shards, _, comb) = deploy(&rt, &f, &ctx, 5000.0, [1, 1]);
    let cep = comb.endpoints.clone();
    let (stop_sub, sub) = subscriber(&ctx, &cep.publish);
    std::thread::sleep(Duration::from_millis(300));
    let socks = sockets(
        &ctx,
        &[
            &shards[0].endpoints.ingest,
            &shards[1].endpoints.ingest,
            cep.task_ingest.as_deref().unwrap(),
        ],
    );
    let mut order = streams(&f).order;
    let last_onset = order
        .iter()
        .rposition(|(_, m)| matches!(m.body, Some(Body::Onset(_))))
        .unwrap();
    let onset = order.remove(last_onset);
    // Everything else but the task's end, the acquisitions' ends included.
    let task_end = order.pop().unwrap();
    assert!(task_end.0 == 2 && matches!(task_end.1.body, Some(Body::EndOfStream(_))));
    for (dest, m) in &order {
        send(&ctx, &socks, &cep.control, *dest, m);
    }
    let acquisition_ended = |s: &Running, name: &str| {
        status(&ctx, &s.endpoints.control)
            .senders
            .iter()
            .any(|x| x.sender == name && x.ended)
    };
    wait_for(
        || acquisition_ended(&shards[0], "acq-a") && acquisition_ended(&shards[1], "acq-b"),
        "both shards to take their acquisition's end",
    );
    send(&ctx, &socks, &cep.control, onset.0, &onset.1);
    send(&ctx, &socks, &cep.control, task_end.0, &task_end.1);
    let live = finish(
        &rt,
        &ctx,
        (comb, shards),
        f.data.trials.len() as u64,
        "every trial completed at the combiner, the last one too",
        (stop_sub, sub),
    );
    let want = offline(&f);
    assert_eq!(live.len(), want.len(), "every frame, once");
    for (l, w) in live.iter().zip(&want) {
        assert!(
            (l.0, l.1, &l.2, l.3) == (w.0, w.1, &w.2, 0),
            "trial {} bin {} equals offline decoding bit for bit",
            l.0,
            l.1
        );
    }
}

/// A shard serves one combiner: a second combiner pointed at the same shards is refused (its
/// status says why, the first keeps both shards), and takes them over once the first is gone.
#[test]
fn a_second_combiner_is_refused_until_the_first_is_gone() {
    let _serial = serial();
    let f = fixture(1);
    let rt = runtime();
    let ctx = zmq::Context::new();
    let (shards, links, first) = deploy(&rt, &f, &ctx, 5000.0, [1, 1]);
    let second = combiner(&rt, &f, &links, 5000.0);
    let (c1, c2) = (
        first.endpoints.control.clone(),
        second.endpoints.control.clone(),
    );
    wait_for(
        || {
            status(&ctx, &c2)
                .shards
                .iter()
                .all(|s| !s.joined && s.note.contains("already serves another combiner"))
        },
        "the second combiner to be refused by both shards",
    );
    // The first keeps its shards across many beats (and the second's retries).
    for _ in 0..15 {
        assert_eq!(
            joined(&ctx, &c1),
            [true, true],
            "the first combiner keeps both shards"
        );
        std::thread::sleep(Duration::from_millis(100));
    }
    rt.block_on(first.stop());
    wait_for(
        || joined(&ctx, &c2) == [true, true],
        "the second combiner to take the shards over",
    );
    rt.block_on(second.stop());
    for s in shards {
        rt.block_on(s.stop());
    }
}
