//! What each fuzz target does with its bytes. The cargo-fuzz binaries in `tests/fuzz/` (their
//! own workspace, nightly) call these functions, and `tests/tests/fuzz_corpus.rs` runs every
//! saved input of `tests/fuzz/regressions/` through them on stable, so a finding stays fixed.
//!
//! Every reader of outside bytes has a target: inbound messages through the daemon's engine
//! thread, the engine under arbitrary operation sequences (posteriors finite, summing to 1),
//! model files, session files (records framed with valid CRCs so payloads are reached), CSV
//! tables, the daemon's TOML configuration, scenario files, the monitor's decoding and
//! drawing of published messages, what a combiner takes from its shards' links, and NWB files. A target panics only on a real defect.
//!
//! Must not: keep state between calls, or call anything slower than the engine's own limits
//! allow (the scenario target simulates only small sessions).

use auspex_engine::count::CountParams;
use auspex_engine::engine::{Engine, EngineConfig, EngineSink, Frame};
use auspex_engine::model::{CellSpec, CellSummary, Model, ModelSpec};
use auspex_engine::{LookupBudget, PreparedModel};
use auspex_proto::v1::{self, inbound};
use prost::Message;
use std::sync::{Arc, OnceLock};

/// A target: what it does with one input.
pub type Target = fn(&[u8]);

/// The targets, by name (the fuzz binaries' and the regression folders' names).
pub const TARGETS: [(&str, Target); 11] = [
    ("inbound", inbound_messages),
    ("engine_ops", engine_ops),
    ("model_file", model_file),
    ("session_file", session_file),
    ("csv_tables", csv_tables),
    ("toml_config", toml_config),
    ("scenario", scenario),
    ("monitor", monitor),
    ("shard_link", shard_link),
    ("declared_sizes", declared_sizes),
    ("nwb_file", nwb_file),
];

/// Reads the input as a stream of small numbers.
struct Bytes<'a>(&'a [u8]);

impl Bytes<'_> {
    fn u8(&mut self) -> Option<u8> {
        let (&b, rest) = self.0.split_first()?;
        self.0 = rest;
        Some(b)
    }
    fn u32(&mut self) -> Option<u32> {
        Some(u32::from_le_bytes([
            self.u8()?,
            self.u8()?,
            self.u8()?,
            self.u8()?,
        ]))
    }
    /// A tick: usually small and near the last one, sometimes anywhere in the i64 range.
    fn tick(&mut self, near: i64) -> Option<i64> {
        Some(match self.u8()? {
            0 => i64::MAX - self.u8()? as i64,
            1 => i64::MIN + self.u8()? as i64,
            2 => self.u32()? as i64 * 1_000_003,
            3 => -(self.u8()? as i64),
            b => near.saturating_add(b as i64 - 40),
        })
    }
    fn slice(&mut self, max: usize) -> &[u8] {
        let n = (self.u8().unwrap_or(0) as usize).min(max).min(self.0.len());
        let (a, rest) = self.0.split_at(n);
        self.0 = rest;
        a
    }
}

/// A small model with every kind of cell (Poisson, negative binomial, COM-Poisson, empirical):
/// 5 units × 3 stimuli × 20 bins of 1 ms.
pub fn small_model() -> Arc<PreparedModel> {
    static M: OnceLock<Arc<PreparedModel>> = OnceLock::new();
    M.get_or_init(|| {
        let (nu, ns, nb) = (5usize, 3usize, 20usize);
        let mut cells = Vec::new();
        for u in 0..nu {
            for s in 0..ns {
                let x = (u * ns + s) as f64 / (nu * ns) as f64;
                let count = match u % 4 {
                    0 => CountParams::Poisson {
                        mean: 0.5 + 4.0 * x,
                    },
                    1 => CountParams::NegativeBinomial {
                        mean: 1.0 + 3.0 * x,
                        shape: 2.0,
                    },
                    2 => CountParams::ComPoisson {
                        lambda: 1.0 + x,
                        nu: 0.8,
                    },
                    _ => CountParams::Empirical {
                        pmf: vec![0.4, 0.3, 0.2, 0.1],
                    },
                };
                let q: Vec<f64> = (0..nb)
                    .map(|b| 1.0 + ((b + 3 * s + u) % 7) as f64)
                    .collect();
                let z: f64 = q.iter().sum();
                cells.push(CellSpec {
                    count,
                    timing: q.iter().map(|v| v / z).collect(),
                    summary: CellSummary::default(),
                });
            }
        }
        Arc::new(
            Model::new(ModelSpec {
                bin_width_s: 0.001,
                n_bins: nb as u32,
                stimuli: vec!["north".into(), "east".into(), "south".into()],
                units: vec![3, 4, 7, 9, 12],
                prior: vec![1.0, 2.0, 1.0],
                cells,
                calibration: Default::default(),
                unit_groups: Vec::new(),
            })
            .expect("the fuzzing model is valid"),
        )
        .prepare(LookupBudget::DEFAULT)
    })
    .clone()
}

/// Checks every frame: a probability vector.
struct CheckFrames;
impl EngineSink for CheckFrames {
    fn frame(&mut self, f: &Frame<'_>) {
        assert!(
            f.posterior.iter().all(|p| p.is_finite() && *p >= 0.0),
            "posterior {:?}",
            f.posterior
        );
        let s: f64 = f.posterior.iter().sum();
        assert!((s - 1.0).abs() < 1e-9, "posterior sums to {s}");
    }
}

/// The engine driven by arbitrary operations on the small model.
pub fn engine_ops(data: &[u8]) {
    let m = small_model();
    let mut b = Bytes(data);
    let rate = match b.u8().unwrap_or(0) % 3 {
        0 => 1000.0,
        1 => 30_000.0,
        _ => 1e6,
    };
    let mut cfg = EngineConfig::new(rate);
    let Ok(mut e) = Engine::new(m.clone(), cfg.clone()) else {
        return;
    };
    let mut sink = CheckFrames;
    let mut last = 0i64;
    let mut ops = 0;
    while let Some(op) = b.u8() {
        ops += 1;
        if ops > 2000 {
            break;
        }
        match op % 8 {
            0 => {
                let id = b.u8().unwrap_or(0) as u64;
                let Some(onset) = b.tick(last) else { break };
                let presented = b.u8().map(|x| x as u32 % 4).filter(|&x| x < 3);
                let _ = e.open_trial(id, onset, presented, &mut sink);
            }
            1 | 2 => {
                let unit = [3, 4, 7, 9, 12, 5][b.u8().unwrap_or(0) as usize % 6];
                let Some(t) = b.tick(last) else { break };
                let _ = e.spike(unit, t);
            }
            3 => {
                let Some(w) = b.tick(last) else { break };
                // Long gaps are decoded bin by bin: keep the watermark within reach.
                let w = w.clamp(last.saturating_sub(10), last.saturating_add(200_000));
                if e.advance(w, &mut sink).is_ok() {
                    last = w;
                }
            }
            4 => {
                let id = b.u8().unwrap_or(0) as u64;
                let _ = e.label(id, b.u8().unwrap_or(0) as u32 % 4, &mut sink);
            }
            5 => {
                let _ = e.cancel(b.u8().unwrap_or(0) as u64, &mut sink);
            }
            6 => {
                let x = b.u8().unwrap_or(0);
                cfg.policy.threshold = (x as f64 / 200.0).min(1.0);
                cfg.policy.min_time_s = (x % 30) as f64 / 1000.0;
                cfg.decoder = auspex_engine::engine::Decoder::ALL[x as usize % 3];
                cfg.calibrated = x % 2 == 0;
                let _ = e.set_config(cfg.clone());
            }
            _ => e.close_all(auspex_engine::engine::TrialOutcome::Cancelled, &mut sink),
        }
    }
}

/// Builds one inbound message from the input.
fn inbound_message(b: &mut Bytes<'_>, last: &mut i64) -> Option<Vec<u8>> {
    let kind = b.u8()?;
    let sender = ["acq", "task", "", "other"][b.u8()? as usize % 4].to_string();
    let seq = match b.u8()? {
        0 => 0,
        1 => u64::MAX,
        s => s as u64,
    };
    let body = match kind % 11 {
        0 => inbound::Body::SessionStart(v1::SessionStart {
            stimuli: Default::default(),
            tick_rate_hz: [1000.0, 30_000.0, 1e6, 0.0, f64::NAN, 1e300, -5.0][b.u8()? as usize % 7],
            units: (0..b.u8()? % 8)
                .map(|i| [3, 4, 7, 9, 12, 77, 0, 3][i as usize])
                .collect(),
            session_name: ["a", "b", ""][b.u8()? as usize % 3].into(),
            learn_in_step: false,
        }),
        1..=3 => {
            let n = b.u8()? % 16;
            let mut units = Vec::new();
            let mut ticks = Vec::new();
            for _ in 0..n {
                units.push([3, 4, 7, 9, 12, 5][b.u8()? as usize % 6]);
                ticks.push(b.tick(*last)?);
            }
            if b.u8()? == 7 {
                ticks.pop();
            }
            let through = b.tick(*last)?;
            *last = through.clamp(last.saturating_sub(10), last.saturating_add(5_000));
            inbound::Body::Spikes(v1::SpikeBatch {
                units,
                ticks,
                complete_through: *last,
            })
        }
        4 => {
            let t = b.tick(*last)?;
            *last = t.clamp(last.saturating_sub(10), last.saturating_add(5_000));
            inbound::Body::Heartbeat(v1::Heartbeat {
                complete_through: *last,
            })
        }
        5 | 6 => inbound::Body::Onset(v1::TrialOnset {
            trial: b.u8()? as u64,
            onset_tick: b.tick(*last)?,
            stimulus: ["north", "east", "", "west"][b.u8()? as usize % 4].into(),
        }),
        7 => inbound::Body::Label(v1::TrialLabel {
            trial: b.u8()? as u64,
            stimulus: ["north", "south", "nowhere"][b.u8()? as usize % 3].into(),
        }),
        8 => inbound::Body::Cancel(v1::TrialCancel {
            trial: b.u8()? as u64,
            ..Default::default()
        }),
        9 => inbound::Body::EndOfStream(v1::EndOfStream {}),
        10 if b.u8()? % 2 == 0 => inbound::Body::UnitsAdded(v1::UnitsAdded {
            units: vec![[3, 4, 77][b.u8()? as usize % 3]],
            from_tick: b.tick(*last)?,
        }),
        _ => return Some(b.slice(64).to_vec()),
    };
    Some(
        v1::Inbound {
            sender,
            seq,
            body: Some(body),
        }
        .encode_to_vec(),
    )
}

/// Inbound messages, structured and raw, through the daemon's engine thread (the same code the
/// running daemon uses: checks, sessions, engine, publishing), then a shutdown.
pub fn inbound_messages(data: &[u8]) {
    use auspexd::engine_thread::{EngineThread, EngineThreadSetup};
    use auspexd::messages::EngineInput;
    let (pub_tx, _pub_rx) = tokio::sync::mpsc::channel(1 << 16);
    let stats = Arc::new(auspexd::publish::PublishStats::default());
    let mut b = Bytes(data);
    let mode = b.u8().unwrap_or(0);
    let with_model = mode % 4 != 0;
    // Half the inputs reach a learning daemon: labelled windows go to a real learner thread
    // that refits after every trial (under a 256 MB memory budget), its models swapped in.
    let learning = mode & 0x10 != 0;
    auspex_engine::budget::set_mb(256);
    let (tx, rx) = crossbeam_channel::unbounded();
    let learner = learning
        .then(|| {
            let opts = auspex_modelling::learn::LearnOptions {
                fit: auspex_modelling::fit::FitOptions {
                    window_s: 0.02,
                    bin_width_s: 0.001,
                    ..Default::default()
                },
                min_trials_per_stimulus: 1,
                ..Default::default()
            };
            let cadence = auspexd::learner::Cadence {
                every_trials: 1,
                every: std::time::Duration::from_millis(20),
            };
            let l = auspexd::learner::LearnerThread::start(
                opts.clone(),
                cadence,
                LookupBudget::from_mb(8).expect("8 MB"),
                tx.clone(),
            )
            .ok()?;
            let setup = auspexd::engine_thread::LearnSetup {
                options: opts,
                cadence,
                enabled: true,
            };
            Some((l, setup))
        })
        .flatten();
    let setup = EngineThreadSetup {
        model: with_model.then(small_model),
        model_path: "fuzz".into(),
        config: EngineConfig::new(1000.0),
        tick_rate: None,
        publisher: auspexd::publish::Publisher::new(pub_tx, stats),
        recorder: None,
        recording_path: String::new(),
        record_dir: None,
        max_message_bytes: 4096,
        threads: 1 + (b.u8().unwrap_or(0) % 2) as u32,
        seed: 1,
        health_period: std::time::Duration::from_secs(3600),
        learn: learner.as_ref().map(|(l, s)| (s.clone(), l.sender())),
        target_accuracy: None,
        link: auspexd::shard_link::Link::None,
        recorder_errors: Default::default(),
        steering: auspexd::steering::Steering::spawn(
            Default::default(),
            1,
            vec!["north".into(), "east".into(), "south".into()],
            None,
        )
        .expect("steering thread"),
        steer_window_s: Some(0.02),
        stimuli: Vec::new(),
    };
    let Ok(et) = EngineThread::new(setup, rx.clone()) else {
        return;
    };
    let mut last = 0i64;
    let mut n = 0;
    while let Some(bytes) = inbound_message(&mut b, &mut last) {
        n += 1;
        if n > 500 {
            break;
        }
        let _ = tx.send(EngineInput::Inbound {
            endpoint: n % 2,
            bytes: bytes.into(),
            received_ns: 0,
        });
        if n % 7 == 0 {
            // A task program asking find-tuning (answered by the steering thread) and the
            // engine thread's own policies, between the messages.
            for policy in ["find-tuning", "balanced-blocks", "no-such-policy"] {
                let (reply, _) = tokio::sync::oneshot::channel();
                let _ = tx.send(EngineInput::Control {
                    body: v1::control_request::Body::NextStimulus(v1::NextStimulus {
                        policy: policy.into(),
                    }),
                    reply,
                });
            }
        }
    }
    let _ = tx.send(EngineInput::Shutdown);
    et.run(rx);
    if let Some((l, _)) = learner {
        l.finish();
    }
}

fn scratch_file(name: &str, bytes: &[u8]) -> (tempfile::TempDir, std::path::PathBuf) {
    let dir = tempfile::Builder::new()
        .prefix("auspex-fuzz")
        .tempdir_in(if std::path::Path::new("/dev/shm").is_dir() {
            "/dev/shm"
        } else {
            "."
        })
        .or_else(|_| tempfile::tempdir())
        .expect("a scratch directory");
    let p = dir.path().join(name);
    std::fs::write(&p, bytes).expect("scratch file");
    (dir, p)
}

/// A model file: loaded as the daemon loads it; a model that loads is prepared (within its
/// limits) and decodes one trial.
pub fn model_file(data: &[u8]) {
    let (_d, p) = scratch_file("m.apxm", data);
    let Ok((_, m)) = auspex_proto::model_file::load_model(&p) else {
        return;
    };
    let m = Arc::new(m).prepare(LookupBudget::DEFAULT);
    let Ok(mut e) = Engine::new(
        m.clone(),
        EngineConfig::new(1000.0 / m.bin_width_s().max(1e-3)),
    ) else {
        return;
    };
    let mut sink = CheckFrames;
    let _ = e.open_trial(1, 0, Some(0), &mut sink);
    let _ = e.spike(m.units()[0], 0);
    let _ = e.advance((m.n_bins() as i64).min(5000), &mut sink);
}

/// A session file: the raw bytes, and the bytes cut into records framed with valid CRCs (so the
/// reader reaches the payloads), through the recording reader.
pub fn session_file(data: &[u8]) {
    let _ = auspex_proto::session::read_session(data);
    let mut b = Bytes(data);
    let mut framed = Vec::new();
    let mut last = 0;
    while !b.0.is_empty() {
        let structured = b.u8().unwrap_or(0) % 2 == 0;
        let message = if structured {
            match inbound_message(&mut b, &mut last) {
                Some(m) => m,
                None => break,
            }
        } else {
            b.slice(200).to_vec()
        };
        let rec = v1::SessionRecord {
            choice: Default::default(),
            received_unix_ns: 0,
            endpoint: (message.len() % 2) as u32,
            message,
            header: None,
            learned: None,
        };
        auspex_proto::session::frame_record(&rec, &mut framed);
    }
    let (_d, p) = scratch_file("s.apxs", &framed);
    let _ = auspex::wire::read_recording(&p);
    let (_d2, p2) = scratch_file("raw.apxs", data);
    let _ = auspex::wire::read_recording(&p2);
}

/// Two CSV tables (spikes, trials), split at the first 0xFF byte, read as `fit` reads them.
pub fn csv_tables(data: &[u8]) {
    let cut = data
        .iter()
        .position(|&x| x == 0xFF)
        .unwrap_or(data.len() / 2);
    let (spikes, trials) = data.split_at(cut);
    let trials = trials.get(1..).unwrap_or_default();
    let (_d, ps) = scratch_file("spikes.csv", spikes);
    let (_d2, pt) = scratch_file("trials.csv", trials);
    for rate in [1000.0, 30_000.0] {
        if let Ok((ds, _)) = auspex::tables::read_dataset(&ps, &pt, rate, 0.25) {
            let _ = auspex::tables::report_for(&ds, 0.25);
            // The offline path from the tables: events in batches.
            let mut batches = 0;
            for _ in ds.events(rate as i64 / 1000, rate as i64 / 4) {
                batches += 1;
                if batches > 100_000 {
                    break;
                }
            }
        }
    }
}

/// The daemon's TOML configuration, validated as at start.
pub fn toml_config(data: &[u8]) {
    let text = String::from_utf8_lossy(data);
    if let Ok(f) = toml::from_str::<auspexd::config::FileConfig>(&text) {
        let _ = auspexd::config::validate(f, &mut Vec::new());
    }
}

/// A scenario file: checked, its true model built, and small sessions simulated.
pub fn scenario(data: &[u8]) {
    use auspex_modelling::simulate::{simulate, Scenario};
    let text = String::from_utf8_lossy(data);
    let Ok(sc) = toml::from_str::<Scenario>(&text) else {
        return;
    };
    if sc.check().is_err() {
        return;
    }
    let Ok(spec) = sc.true_model() else {
        return;
    };
    let mut opts = sc.sim_options();
    opts.trials_per_stimulus = opts.trials_per_stimulus.min(2);
    if opts
        .check(sc.window_ms / 1000.0, spec.stimuli.len())
        .is_err()
    {
        return;
    }
    let cells = spec.units.len() * spec.stimuli.len() * spec.n_bins as usize;
    if cells > 200_000 {
        return;
    }
    if let Ok(m) = Model::new(spec) {
        let _ = simulate(&m, &opts);
    }
}

/// Published messages as the monitor receives them: (topic, payload) pairs decoded, applied,
/// printed as lines and JSON, and drawn on a 100 × 30 screen.
pub fn monitor(data: &[u8]) {
    use auspex::monitor::{json_line, plain_line, MonitorState};
    let mut b = Bytes(data);
    let mut state = MonitorState::new(vec!["north".into(), "east".into(), "south".into()], 0.001);
    let topics = auspex_proto::topic::ALL;
    let mut n = 0;
    while let Some(t) = b.u8() {
        n += 1;
        if n > 300 {
            break;
        }
        let topic = topics[t as usize % topics.len()];
        let payload = b.slice(255);
        let Ok(msg) = v1::Outbound::decode(payload) else {
            continue;
        };
        state.apply(topic, &msg);
        let _ = plain_line(&state, topic, &msg);
        let _ = json_line(topic, &msg);
    }
    let mut term =
        ratatui::Terminal::new(ratatui::backend::TestBackend::new(100, 30)).expect("test terminal");
    let _ = term.draw(|f| state.draw(f));
}

/// A value a shard's partial might carry: ordinary, extreme, or not a number at all.
fn partial_value(b: &mut Bytes<'_>) -> f64 {
    match b.u8().unwrap_or(0) {
        0 => f64::NAN,
        1 => f64::INFINITY,
        2 => f64::NEG_INFINITY,
        3 => -1e300,
        4 => 1e300,
        5 => f64::MIN_POSITIVE,
        x => -(x as f64) / 16.0,
    }
}

/// What a combiner takes from its shards' links: `ShardLink` messages — structured partials of
/// any shape and values, and raw bytes — interleaved with trial openings and with the part
/// being given up and restored, into a combiner engine computing no block itself (the network
/// role). Every posterior must be finite and sum to 1 whatever a shard sends.
pub fn shard_link(data: &[u8]) {
    use auspex_engine::engine::Role;
    use auspex_proto::v1::shard_link::Body;
    let m = small_model();
    let mut cfg = EngineConfig::new(1000.0);
    cfg.role = Role::Combiner {
        part: None,
        parts: 1,
    };
    let Ok(mut e) = Engine::new(m, cfg) else {
        return;
    };
    let mut sink = CheckFrames;
    let mut b = Bytes(data);
    let mut ops = 0;
    while let Some(op) = b.u8() {
        ops += 1;
        if ops > 2000 {
            break;
        }
        let msg = match op % 6 {
            0 => {
                let id = b.u8().unwrap_or(0) as u64 % 8;
                let onset = b.u8().unwrap_or(0) as i64;
                let _ = e.open_trial(id, onset, None, &mut sink);
                continue;
            }
            1 | 2 => {
                let mut p = v1::ShardPartial {
                    trial: b.u8().unwrap_or(0) as u64 % 8,
                    bin: b.u8().unwrap_or(0) as u32 % 24,
                    first_block: b.u8().unwrap_or(0) as u32 % 2,
                    spikes: b.u8().unwrap_or(0) as u32,
                    last: b.u8().unwrap_or(0) % 2 == 0,
                    ..Default::default()
                };
                for _ in 0..b.u8().unwrap_or(0) % 8 {
                    p.values.push(partial_value(&mut b));
                }
                if p.last {
                    for _ in 0..b.u8().unwrap_or(0) % 20 {
                        p.unit_ll.push(partial_value(&mut b));
                    }
                    for _ in 0..b.u8().unwrap_or(0) % 8 {
                        p.unit_counts.push(b.u8().unwrap_or(0) as u32);
                    }
                }
                // Through the wire's bytes, as the link decodes them.
                v1::ShardLink {
                    body: Some(Body::Partial(p)),
                }
                .encode_to_vec()
            }
            3 => b.slice(96).to_vec(),
            4 => {
                e.lose_part(0, &mut sink);
                continue;
            }
            _ => {
                e.restore_part(0);
                continue;
            }
        };
        if let Ok(v1::ShardLink {
            body: Some(Body::Partial(p)),
        }) = v1::ShardLink::decode(msg.as_slice())
        {
            let p = auspex_proto::convert::partial_from_msg(p);
            let bad = p
                .values
                .iter()
                .chain(p.units.iter().flat_map(|u| u.0.iter()))
                .any(|v| v.is_nan() || *v == f64::INFINITY);
            let r = e.add_partial(&p.as_partial(), &mut sink);
            // A log-likelihood is never NaN or +∞: such a partial is refused (and counted),
            // never folded into a posterior.
            assert!(!bad || r.is_err(), "a NaN or +∞ partial was taken");
        }
    }
}

/// The memory budget [`declared_sizes`] runs under (MB): small, so that whatever it accepts is
/// also quick, and a fuzzing run with `-malloc_limit_mb` a little above it catches any
/// allocation the budget checks let through.
pub const DECLARED_SIZES_BUDGET_MB: u64 = 64;

/// A size from one byte: 1 to about 10⁶, spread over the orders of magnitude.
fn declared(b: u8) -> usize {
    let e = (b % 21) as u32;
    (1usize << e) + (b as usize >> 5)
}

/// Large but consistent declared sizes through every path that multiplies sizes out before
/// allocating: the input picks a path and the sizes (units, trials, stimuli, window and bin,
/// count parameters — each from 1 to ~10⁶, the spikes few), and the path must either refuse
/// it, or build it within [`DECLARED_SIZES_BUDGET_MB`]. Paths: tables through `fit` (plan,
/// cells, model) and `validate`; a learning daemon's learner (declared units, labelled
/// windows); a model file's cells (count tables, per-unit tallies, the engine's lookup under
/// the daemon's table-memory setting); a scenario (its true model).
pub fn declared_sizes(data: &[u8]) {
    use auspex_modelling::fit::{fit_cells, plan, FitOptions};
    auspex_engine::budget::set_mb(DECLARED_SIZES_BUDGET_MB);
    let mut b = Bytes(data);
    let path = b.u8().unwrap_or(0) % 5;
    let nu = declared(b.u8().unwrap_or(0));
    let nt = declared(b.u8().unwrap_or(0));
    let ns = declared(b.u8().unwrap_or(1)).max(2);
    // Window 1 ms … 65 s, bin 1 µs … 65 ms.
    let window_ms = 1.0 + (b.u8().unwrap_or(0) as f64).powi(2);
    let bin_ms = 0.001 * (1 + b.u8().unwrap_or(0) as u32).pow(2) as f64;
    let opts = FitOptions {
        window_s: window_ms / 1000.0,
        bin_width_s: bin_ms / 1000.0,
        ..FitOptions::default()
    };
    let rate = 1_000_000.0;
    // A dataset as the tables declare it: every unit listed, trials of ns stimuli in turn,
    // and a few spikes (the rest of the input) inside the first windows.
    let dataset = || {
        let trials: Vec<auspex_engine::data::Trial> = (0..nt)
            .map(|i| auspex_engine::data::Trial {
                id: i as u64,
                onset: i as i64 * 2_000_000,
                stimulus: Some(format!("s{}", i % ns)),
            })
            .collect();
        let mut spikes = Vec::new();
        let mut rest = Bytes(b.0);
        while let (Some(t), Some(u)) = (rest.u8(), rest.u8()) {
            if spikes.len() >= 256 {
                break;
            }
            let trial = (t as usize) % nt;
            spikes.push((
                trial as i64 * 2_000_000 + t as i64 * 97,
                (u as usize % nu) as u32,
            ));
        }
        spikes.sort_unstable();
        auspex_engine::data::Dataset {
            tick_rate_hz: rate,
            trials,
            spikes: spikes.into(),
            units: (0..nu as u32).collect(),
            declared_from: Default::default(),
            stimulus_order: Vec::new(),
        }
    };
    match path {
        0 => {
            // `fit`: plan, then (for what a fuzzing run can afford) cells and the model.
            let d = dataset();
            if let Ok(p) = plan(&d, &opts) {
                if p.units.len() * p.stimuli.len() <= 64 && p.n_bins <= 2000 {
                    let cells = fit_cells(&p, &|| {});
                    let _ = Model::new(p.assemble(cells));
                }
            }
        }
        1 => {
            // `validate`, small enough to finish: two shuffles.
            let d = dataset();
            // Fine bins make a validation long, not large (at 1000 bins a 34-trial run took
            // over 10 s in the instrumented fuzzing build): what a fuzzing run can afford.
            let nb = window_ms / bin_ms;
            if nu * ns > 16 || nt > 256 || nb > 300.0 {
                // Still the planning (where the sizes are multiplied out).
                let _ = plan(&d, &opts);
                return;
            }
            let v = auspex_modelling::validation::run::ValidateOptions {
                shuffles: 2,
                fit: opts,
                ..Default::default()
            };
            let _ = auspex_modelling::validation::run::validate_with(&d, "fuzz", &v, &());
        }
        2 => {
            // A learning daemon's learner: declared units and labelled windows.
            let lo = auspex_modelling::learn::LearnOptions {
                fit: opts,
                min_trials_per_stimulus: 1,
                ..Default::default()
            };
            let Ok(mut l) = auspex_modelling::learn::Learner::new(lo, rate) else {
                return;
            };
            l.add_units(0..nu as u32);
            let d = dataset();
            for (i, t) in d.trials.iter().enumerate().take(4096) {
                let spikes = d
                    .spikes
                    .iter()
                    .filter(|s| s.0 >= t.onset && s.0 < t.onset + 2_000_000)
                    .map(|(tick, u)| (tick - t.onset, u))
                    .collect();
                l.add(auspex_modelling::learn::TrialWindow {
                    id: i as u64,
                    onset: t.onset,
                    stimulus: t.stimulus.clone().unwrap_or_default(),
                    spikes,
                });
            }
            let _ = l.plan();
        }
        3 => {
            // A model file's cells: count tables from their parameters, per-unit tallies,
            // then the engine's preparation under a table-memory setting.
            let mean = (b.u32().unwrap_or(1) % 1_000_000) as f64 + 0.5;
            let nb = (window_ms / bin_ms).ceil().clamp(1.0, 1e6) as usize;
            // The spec itself is what reading a file of that many cells gives (its size grows
            // with the file's); the harness builds it only within the budget.
            let spec_bytes = (nu * ns) as u128 * (std::mem::size_of::<CellSpec>() + nb * 8) as u128;
            if auspex_engine::budget::check("fuzz cells", String::new, spec_bytes).is_err() {
                return;
            }
            let count = match b.u8().unwrap_or(0) % 3 {
                0 => CountParams::Poisson { mean },
                1 => CountParams::NegativeBinomial { mean, shape: 0.5 },
                _ => CountParams::ComPoisson {
                    lambda: mean,
                    nu: 0.7,
                },
            };
            let cell = CellSpec {
                count,
                timing: vec![1.0 / nb as f64; nb],
                summary: CellSummary::default(),
            };
            let mut spec = ModelSpec::numbered(nu, ns, nb, vec![cell; nu * ns]);
            spec.bin_width_s = bin_ms / 1000.0;
            if let Ok(m) = Model::new(spec) {
                // Preparing a long window of huge-count cells takes seconds at the engine's
                // limits (BENCHMARKS: model preparation, worst 8.3 s): long, not large.
                if nb > 2000 {
                    return;
                }
                let prepared = Arc::new(m).prepare(LookupBudget::from_mb(8).expect("8 MB"));
                let mut e = Engine::new(prepared, EngineConfig::new(rate)).ok();
                if let Some(e) = e.as_mut() {
                    let sink = &mut auspex_engine::engine::NullSink;
                    let _ = e.open_trial(1, 0, Some(0), sink);
                    let _ = e.advance(nb.min(64) as i64 * 1000, sink);
                }
            }
        }
        _ => {
            // A scenario: checked, then its true model (units × stimuli × bins tables).
            use auspex_modelling::simulate::{Scenario, ScenarioUnit};
            // The scenario itself is what reading a file of that many units and stimuli gives
            // (it grows with the file); the harness builds it only within the budget.
            let file_bytes = (nu * std::mem::size_of::<ScenarioUnit>()) as u128
                + (ns * (std::mem::size_of::<(String, f64)>() + 8)) as u128;
            if auspex_engine::budget::check("fuzz scenario", String::new, 2 * file_bytes).is_err() {
                return;
            }
            let sc = Scenario {
                description: "fuzz".into(),
                stimuli: (0..ns).map(|s| (format!("s{s}"), s as f64)).collect(),
                bin_width_ms: bin_ms,
                window_ms,
                trials_per_stimulus: nt.min(u32::MAX as usize) as u32,
                gap_ms: (100.0, 200.0),
                spontaneous_hz: 2.0,
                tick_rate_hz: rate,
                seed: 1,
                units: (0..nu as u32)
                    .map(|id| ScenarioUnit {
                        id,
                        preferred_deg: 0.0,
                        baseline_count: 1.0,
                        peak_count: 4.0,
                        count_family: "poisson".into(),
                        fano: 1.0,
                        early_ms: window_ms * 0.1,
                        late_ms: window_ms * 0.5,
                        width_ms: window_ms * 0.05,
                    })
                    .collect(),
            };
            if sc.check().is_ok() {
                let _ = sc.true_model();
            }
        }
    }
}

/// An NWB file, read as `fit --nwb` and `inspect --nwb` read it: half the inputs are the raw
/// bytes (mutated HDF5 from the seeds), half a small NWB-shaped file whose sizes, index, times
/// and labels come from the input (indices past their data, unsorted or negative times, NaN
/// stimuli, unit ids out of range) — so the checks after HDF5 parsing are reached too.
pub fn nwb_file(data: &[u8]) {
    use crate::nwb_build::{MiniNwb, Stimulus};
    let bytes = if data.first().is_some_and(|b| b % 2 == 0) {
        data[1..].to_vec()
    } else {
        let mut b = Bytes(data.get(1..).unwrap_or_default());
        let units = b.u8().unwrap_or(1) as usize % 9;
        let per = b.u8().unwrap_or(3) as usize % 17;
        let trials = b.u8().unwrap_or(4) as usize % 13;
        let mut f = MiniNwb::regular(units, per, trials);
        while let Some(op) = b.u8() {
            let at = b.u8().unwrap_or(0) as usize;
            let v = b.u8().unwrap_or(0);
            match op % 8 {
                0 if !f.index.is_empty() => {
                    let n = f.index.len();
                    f.index[at % n] = v as u64 * 3;
                }
                1 if !f.spike_times.is_empty() => {
                    let n = f.spike_times.len();
                    f.spike_times[at % n] = [f64::NAN, -1.0, 1e300, v as f64 * 0.1][v as usize % 4];
                }
                2 if !f.onsets.is_empty() => {
                    let n = f.onsets.len();
                    f.onsets[at % n] = [f64::INFINITY, -0.5, v as f64, 1e17][v as usize % 4];
                }
                3 if !f.unit_ids.is_empty() => {
                    let n = f.unit_ids.len();
                    f.unit_ids[at % n] = [-1, 1 << 40, v as i64, 0][v as usize % 4];
                }
                4 if !f.trial_ids.is_empty() => {
                    let n = f.trial_ids.len();
                    f.trial_ids[at % n] = [-3, v as i64, 0, i64::MAX][v as usize % 4];
                }
                5 => {
                    f.stimulus = Stimulus::Float(
                        (0..f.onsets.len())
                            .map(|i| {
                                if (i + at).is_multiple_of(5) {
                                    f64::NAN
                                } else {
                                    (i % 3) as f64 * 22.5
                                }
                            })
                            .collect(),
                    )
                }
                6 => {
                    f.quality = Some(
                        (0..f.unit_ids.len())
                            .map(|i| {
                                if (i + at).is_multiple_of(2) {
                                    "good"
                                } else {
                                    ""
                                }
                                .to_string()
                            })
                            .collect(),
                    )
                }
                _ => {
                    // Columns of different lengths.
                    match v % 3 {
                        0 => {
                            f.onsets.pop();
                        }
                        1 => f.unit_ids.push(99),
                        _ => {
                            f.spike_times.truncate(at);
                        }
                    }
                }
            }
        }
        f.bytes()
    };
    let (_d, p) = scratch_file("f.nwb", &bytes);
    let Ok(nwb) = auspex::nwb::Nwb::open(&p) else {
        return;
    };
    let _ = nwb.summary();
    for units in [
        auspex::nwb::UnitPick::All,
        auspex::nwb::UnitPick::parse("quality=good").unwrap(),
    ] {
        let choice = auspex::nwb::NwbChoice {
            units,
            ..Default::default()
        };
        let mut notes = Vec::new();
        if let Ok(ds) = nwb.dataset(&choice, 30_000.0, &mut notes) {
            let v = ds.spikes.to_vec();
            assert!(v.windows(2).all(|w| w[0] <= w[1]), "spikes sorted");
            assert!(ds
                .spikes
                .iter()
                .all(|s| s.0 >= 0 && ds.units.binary_search(&s.1).is_ok()));
            assert!(ds
                .trials
                .iter()
                .all(|t| t.onset >= 0 && t.stimulus.is_some()));
            let _ = auspex::tables::report_for(&ds, 0.25);
        }
    }
}
