//! The engine thread: one OS thread that owns the engine. It takes inbound messages in arrival
//! order from the bounded ingest channel, hands each to the recorder, decodes and checks it
//! (sequence numbers, size, session), drives the engine (through [`crate::stream`], the rule
//! offline replay shares), and turns the engine's outputs into published messages. Bad input is
//! counted and logged with rate limiting, never fatal. It also answers control requests,
//! publishes health once a second, runs the session lifecycle (a new session name ends the
//! current session: open trials closed, a summary published, the recording rotated), and, when
//! learning, feeds labelled trial windows to the learner thread and swaps in what it learns at
//! the trial boundary, recording where.
//!
//! Must not: block on the learner or the recorder's disk, fit models, or allocate per spike.

use crate::learner::{Cadence, LearnMsg};
use crate::messages::{EngineInput, Learned, ShardEvent, RELAY_ENDPOINT};
use crate::next_stimulus::StimulusChooser;
use crate::promise::PromiseKeeper;
use crate::publish::Publisher;
use crate::ratelog::RateLimitedLog;
use crate::recorder::RecorderMsg;
use crate::shard_link::Link;
use crate::workers::{OwnedPartial, Workers};
use auspex_engine::engine::{
    Counters, Decision, DecisionReason, Engine, EngineConfig, EngineError, EngineSink, Frame, Role,
    TrialEnd, TrialOutcome, UnitSummaries,
};
use auspex_engine::PreparedModel;
use auspex_modelling::assess::{assess, peak_ms, tuning, VerdictRule};
use auspex_modelling::learn::{LearnOptions, TrialWindow, WindowCollector};
use auspex_proto::stream::{apply_body, remember_onset, TrialStimuli};
use auspex_proto::topic;
use auspex_proto::v1::{self, control_request, inbound, outbound, ControlReply};
use bytes::Bytes;
use crossbeam_channel::{Receiver, RecvTimeoutError, Sender};
use prost::Message;
use std::collections::{BTreeMap, VecDeque};
use std::path::PathBuf;
use std::sync::atomic::Ordering;
use std::sync::Arc;
use std::time::{Duration, Instant};

mod sink;
mod status;
use sink::{PubSink, SessionTally};

/// Daemon-level counters (the engine keeps its own).
#[derive(Default, Debug, Clone)]
struct DaemonCounters {
    messages_in: u64,
    malformed: u64,
    oversized: u64,
    sequence_gaps: u64,
    duplicate_messages: u64,
    model_mismatches: u64,
    unknown_stimuli: u64,
    before_session: u64,
}

#[derive(Default, Debug, Clone)]
struct SenderInfo {
    /// Its messages come relayed by a combiner (a shard's view of the task program).
    relayed: bool,
    last_seq: u64,
    gaps: u64,
    ended: bool,
    messages: u64,
    /// Spoke while no session ran (e.g. a task program announcing trials before acquisition's
    /// SessionStart): part of the session that starts next, not of the one before.
    between_sessions: bool,
}

/// The sink over the engine thread's fields (a macro, so the engine can be borrowed beside it).
macro_rules! pub_sink {
    ($t:ident) => {
        PubSink {
            publisher: &mut $t.publisher,
            recorder: $t.recorder.as_ref(),
            names: &$t.names,
            current: &$t.current,
            chooser: &mut $t.chooser,
            tally: $t.session.as_mut(),
            promise: &mut $t.promise,
            link_out: $t.link.shard_out(),
        }
    };
}

// After the macro, which it uses.
mod link;
mod receive;
mod requests;
mod session;
use requests::swap_record;
use session::add_counters;

/// Learning settings for the engine thread.
#[derive(Clone, Debug)]
pub struct LearnSetup {
    /// What and how to fit.
    pub options: LearnOptions,
    /// When to refit.
    pub cadence: Cadence,
    /// Start with learning on (false: frozen until `steer learn resume`).
    pub enabled: bool,
}

/// The engine thread's side of learning.
struct LearnLink {
    tx: Sender<LearnMsg>,
    setup: LearnSetup,
    enabled: bool,
    trials_sent: u64,
    model_trials: u64,
    applied_at: Option<Instant>,
    /// The session asked to learn in step (`SessionStart.learn_in_step`, a replay): refits at
    /// every `cadence.every_trials` windows sent, each applied before the next message is read.
    in_step: bool,
    /// Windows sent when the last in-step refit was asked for.
    in_step_fitted_at: u64,
    last_refit_s: f64,
    refits: u32,
    waiting_for: String,
}

/// Everything the engine thread owns.
pub struct EngineThread {
    model: Option<Arc<PreparedModel>>,
    model_path: String,
    base: Option<(Arc<PreparedModel>, String)>,
    config: EngineConfig,
    fixed_tick_rate: Option<f64>,
    tick_rate: Option<f64>,
    engine: Option<Engine>,
    collector: Option<WindowCollector>,
    steering: crate::steering::Steering,
    steer_window_s: Option<f64>,
    /// find-tuning requests of this session (their recorded markers' ordinals).
    choices_asked: u64,
    /// The daemon's declared stimulus set (--stimuli).
    daemon_stimuli: Arc<[String]>,
    /// The session's declared set (its start message's, else the daemon's).
    declared_stimuli: Arc<[String]>,
    names: TrialStimuli,
    current: Arc<[String]>,
    publisher: Publisher,
    recorder: Option<Sender<RecorderMsg>>,
    record_dir: Option<PathBuf>,
    recording_path: String,
    max_message_bytes: usize,
    counters: DaemonCounters,
    /// Engine counters of ended sessions (health figures run over the daemon's life).
    carried: Counters,
    senders: BTreeMap<String, SenderInfo>,
    log: RateLimitedLog,
    latencies_us: Vec<f64>,
    lat_pos: usize,
    chooser: StimulusChooser,
    started: Instant,
    /// This daemon's start, ns since the Unix epoch: tells a monitor it is another daemon.
    incarnation: u64,
    last_health: Instant,
    last_rates: (Instant, u64, u64),
    rates: (f64, f64),
    health_period: Duration,
    backlog: Receiver<EngineInput>,
    /// Trial messages that arrived before SessionStart, applied when it does.
    held: Vec<inbound::Body>,
    session: Option<SessionTally>,
    ended: Vec<v1::SessionSummary>,
    epoch: u64,
    learn: Option<LearnLink>,
    windows: Vec<TrialWindow>,
    promise: PromiseKeeper,
    /// Engine worker threads computing the other parts of the unit blocks (None: one thread).
    workers: Option<Workers>,
    /// Counts fresh engines, so the workers know when to build theirs anew.
    engine_gen: u64,
    /// Shard or combiner of a deployment across machines.
    link: Link,
    /// A session whose senders all ended, waiting before it is closed: a combiner's for the
    /// shards' last partials (up to the shard deadline), a shard's for the task program's last
    /// trial messages, relayed by its combiner (they may come after its own acquisition's end).
    pending_end: Option<Instant>,
    /// When the link last brought something: a combiner a shard's partial, a shard a relay.
    last_from_link: Instant,
    recorder_errors: Arc<std::sync::atomic::AtomicU64>,
}

/// Trial messages held while waiting for SessionStart; more are counted as malformed.
const MAX_HELD_BEFORE_SESSION: usize = 4096;
/// How long a shard whose acquisition has ended waits, after the last relayed message, for the
/// task program's end: trial messages come by way of the combiner and may arrive after the
/// shard's own acquisition has said its last.
const SHARD_WAITS_FOR_TASK_END: Duration = Duration::from_secs(2);
/// Ended sessions kept for status.
const ENDED_KEPT: usize = 64;

/// Settings for [`EngineThread::new`].
pub struct EngineThreadSetup {
    /// The model loaded at start (None: learn one).
    pub model: Option<Arc<PreparedModel>>,
    /// Its path (for status).
    pub model_path: String,
    /// Decoder, policy.
    pub config: EngineConfig,
    /// Clock rate if known before SessionStart.
    pub tick_rate: Option<f64>,
    /// Publisher.
    pub publisher: Publisher,
    /// Recorder channel.
    pub recorder: Option<Sender<RecorderMsg>>,
    /// Recording path (for status).
    pub recording_path: String,
    /// The directory sessions are recorded into, one file each (None: one file given by path).
    pub record_dir: Option<PathBuf>,
    /// Largest message.
    pub max_message_bytes: usize,
    /// Engine threads (the engine thread and `threads − 1` workers, see `workers.rs`).
    pub threads: u32,
    /// Next-stimulus seed.
    pub seed: u64,
    /// Health period.
    pub health_period: Duration,
    /// Learning (None: off), and the learner thread's inbox.
    pub learn: Option<(LearnSetup, Sender<LearnMsg>)>,
    /// Choose the threshold from the model's held-out record to keep this accuracy.
    pub target_accuracy: Option<f64>,
    /// Shard or combiner (see `shard_link.rs`).
    pub link: Link,
    /// The recorder's write errors so far (health reports them).
    pub recorder_errors: Arc<std::sync::atomic::AtomicU64>,
    /// find-tuning's thread.
    pub steering: crate::steering::Steering,
    /// The window find-tuning counts spikes in without learning (the model's), seconds.
    pub steer_window_s: Option<f64>,
    /// The stimulus set declared with --stimuli (empty: none).
    pub stimuli: Vec<String>,
}

impl EngineThread {
    /// Sets up; `rx` is also read for the backlog figure.
    pub fn new(s: EngineThreadSetup, rx: Receiver<EngineInput>) -> Result<Self, EngineError> {
        let n = s.model.as_ref().map(|m| m.n_stimuli()).unwrap_or(0);
        let stimuli: Vec<String> = s
            .model
            .as_ref()
            .map(|m| m.stimuli().to_vec())
            .unwrap_or_default();
        let learn = s.learn.map(|(setup, tx)| LearnLink {
            tx,
            enabled: setup.enabled,
            setup,
            trials_sent: 0,
            model_trials: 0,
            applied_at: None,
            in_step: false,
            in_step_fitted_at: 0,
            last_refit_s: 0.0,
            refits: 0,
            waiting_for: "no session has started".into(),
        });
        let mut t = EngineThread {
            base: s.model.clone().map(|m| (m, s.model_path.clone())),
            model: s.model,
            model_path: s.model_path,
            config: s.config,
            fixed_tick_rate: s.tick_rate,
            tick_rate: s.tick_rate,
            engine: None,
            collector: None,
            names: TrialStimuli::default(),
            current: stimuli.into(),
            publisher: s.publisher,
            recorder: s.recorder,
            record_dir: s.record_dir,
            recording_path: s.recording_path,
            max_message_bytes: s.max_message_bytes,
            counters: DaemonCounters::default(),
            carried: Counters::default(),
            senders: BTreeMap::new(),
            log: RateLimitedLog::new(),
            latencies_us: Vec::with_capacity(4096),
            lat_pos: 0,
            chooser: StimulusChooser::new(s.seed, n),
            started: Instant::now(),
            incarnation: std::time::SystemTime::now()
                .duration_since(std::time::UNIX_EPOCH)
                .map_or(1, |d| d.as_nanos() as u64),
            last_health: Instant::now(),
            last_rates: (Instant::now(), 0, 0),
            rates: (0.0, 0.0),
            health_period: s.health_period,
            backlog: rx,
            held: Vec::new(),
            session: None,
            ended: Vec::new(),
            epoch: 0,
            learn,
            windows: Vec::new(),
            promise: PromiseKeeper::new(s.target_accuracy),
            workers: None,
            engine_gen: 0,
            link: s.link,
            pending_end: None,
            last_from_link: Instant::now(),
            recorder_errors: s.recorder_errors,
            steering: s.steering,
            choices_asked: 0,
            steer_window_s: s.steer_window_s,
            daemon_stimuli: s.stimuli.clone().into(),
            declared_stimuli: s.stimuli.into(),
        };
        t.config.policy = t
            .promise
            .model_changed(t.model.as_deref().map(|m| &**m), &t.config);
        t.config.role = match t.link.role() {
            // A shard on several threads: each computes a slice of its part, and every slice's
            // partials go to the combiner.
            Some(Role::Shard { part, parts }) if s.threads > 1 => Role::ShardSlice {
                part,
                parts,
                slice: 0,
                slices: s.threads,
            },
            Some(r) => r,
            None => crate::workers::combiner_role(s.threads),
        };
        t.workers = Workers::start(s.threads)
            .map_err(|e| EngineError::Config(format!("cannot start engine threads: {e}")))?;
        if let (Some(r), Some(m)) = (t.tick_rate, t.model.clone()) {
            t.config.tick_rate_hz = r;
            t.engine = Some(Engine::new(m, t.config.clone())?);
            t.engine_gen += 1;
            t.mark_lost_shards();
        }
        Ok(t)
    }

    /// Runs until Shutdown or until every sender is gone.
    pub fn run(mut self, rx: Receiver<EngineInput>) {
        let rt = crate::realtime::enter("engine thread", 0);
        loop {
            if let Some(t) = &rt {
                // Only a real pause counts: messages taken back to back are one busy stretch.
                if rx.is_empty() {
                    t.idle();
                }
            }
            let wait = self
                .health_period
                .saturating_sub(self.last_health.elapsed())
                .max(Duration::from_millis(1));
            let input = match self.workers.as_ref().map(|w| w.partials.clone()) {
                None => rx.recv_timeout(wait),
                Some(partials) => crossbeam_channel::select! {
                    recv(rx) -> m => m.map_err(|_| RecvTimeoutError::Disconnected),
                    recv(partials) -> p => {
                        if let Ok(p) = p {
                            self.take_partial(p);
                        }
                        continue;
                    }
                    default(wait) => Err(RecvTimeoutError::Timeout),
                },
            };
            if let Some(t) = &rt {
                t.busy();
            }
            match input {
                Ok(EngineInput::Inbound {
                    endpoint,
                    bytes,
                    received_ns,
                }) => {
                    let t0 = Instant::now();
                    self.inbound(endpoint, bytes, received_ns);
                    self.record_latency(t0.elapsed().as_secs_f64() * 1e6);
                    self.drain_partials();
                    self.refit_in_step();
                }
                Ok(EngineInput::Control {
                    body: control_request::Body::NextStimulus(n),
                    reply,
                }) if crate::steering::steered(&n.policy).is_some() => {
                    let policy = crate::steering::steered(&n.policy)
                        .unwrap_or(auspex_modelling::design::Policy::FindTuning);
                    // Answered by the steering thread, in this thread's order of trials and
                    // requests (so a choice depends only on the trials before it). Where it was
                    // asked is recorded here, after every message applied before it, so a
                    // replay can ask again at the same point.
                    let ordinal = if self.session.is_some() {
                        self.choices_asked += 1;
                        if let Some(r) = &self.recorder {
                            let _ = r.send(RecorderMsg::Record(v1::SessionRecord {
                                received_unix_ns: crate::clock::now_ns(),
                                choice: Some(Box::new(v1::StimulusChoice {
                                    policy: policy.name().into(),
                                    reply: None,
                                    ordinal: self.choices_asked,
                                })),
                                ..Default::default()
                            }));
                        }
                        self.choices_asked
                    } else {
                        0
                    };
                    self.steering.send(crate::steering::SteerMsg::Next {
                        reply,
                        ordinal,
                        policy,
                    });
                }
                Ok(EngineInput::Control { body, reply }) => {
                    let r = self.control(body);
                    let _ = reply.send(r);
                }
                Ok(EngineInput::Reload { model, path, reply }) => {
                    let r = self.reload(model, path);
                    let _ = reply.send(r);
                }
                Ok(EngineInput::SaveLearned { path, reply }) => match &self.learn {
                    Some(l) => {
                        let recording = self.learned_recording();
                        if let Err(e) = l.tx.send(LearnMsg::Save {
                            path,
                            recording,
                            reply,
                        }) {
                            if let LearnMsg::Save { reply, .. } = e.0 {
                                let _ = reply.send(Err("the learner has stopped".into()));
                            }
                        }
                    }
                    None => {
                        let _ = reply.send(Err(
                            "learning is off: start auspexd without --model, or with --learn"
                                .into(),
                        ));
                    }
                },
                Ok(EngineInput::Learned(l)) => self.learned(l),
                Ok(EngineInput::LearnNote { epoch, text }) => {
                    if let Some(l) = self.learn.as_mut() {
                        if epoch == self.epoch {
                            l.waiting_for = text;
                        }
                    }
                }
                Ok(EngineInput::Relay {
                    bytes,
                    decoder,
                    received_ns,
                }) => self.relayed(bytes, &decoder, received_ns),
                Ok(EngineInput::FromShard(ev)) => self.shard_event(ev),
                Ok(EngineInput::Shutdown) | Err(RecvTimeoutError::Disconnected) => break,
                Err(RecvTimeoutError::Timeout) => {}
            }
            if let Some(t0) = self.pending_end {
                let give_up = match &self.link {
                    // Shards that are alive keep their trials coming (a lost one is given up,
                    // and its trials then finish without it); only a long pause ends the wait.
                    Link::Combine { deadline, .. } => {
                        let open = self
                            .engine
                            .as_ref()
                            .is_some_and(|e| e.open_trials().next().is_some());
                        !open || t0.max(self.last_from_link).elapsed() > *deadline * 10
                    }
                    // The relayed end of the task program normally ends it first.
                    Link::Shard { .. } => {
                        t0.max(self.last_from_link).elapsed() > SHARD_WAITS_FOR_TASK_END
                    }
                    Link::None => true,
                };
                if give_up {
                    self.pending_end = None;
                    if self.session.is_some() {
                        self.end_session("every sender ended");
                    }
                }
            }
            if self.last_health.elapsed() >= self.health_period {
                self.publish_health();
            }
        }
        // Drain what already arrived, then end open trials.
        while let Ok(input) = rx.try_recv() {
            if let EngineInput::Inbound {
                endpoint,
                bytes,
                received_ns,
            } = input
            {
                self.inbound(endpoint, bytes, received_ns);
            }
        }
        self.close_trials(TrialOutcome::Shutdown);
        if self.session.is_some() {
            self.publish_summary("daemon stopping");
        }
        self.publish_health();
        if let Some(r) = &self.recorder {
            let _ = r.send(RecorderMsg::Flush);
        }
    }

    /// Adds a worker's partials to the combiner (its frames, decisions and trial ends follow).
    fn take_partial(&mut self, p: OwnedPartial) {
        if matches!(self.config.role, Role::ShardSlice { .. }) {
            // A shard's threads: every slice's partials go to the combiner as they are.
            let mut sink = pub_sink!(self);
            sink.partial(&p.as_partial());
        } else if let Some(e) = self.engine.as_mut() {
            let mut sink = pub_sink!(self);
            // A partial of a trial already closed (session end, shutdown) is counted by the
            // engine as stray; nothing else can go wrong with the workers' own output.
            let _ = e.add_partial(&p.as_partial(), &mut sink);
        }
        if let Some(w) = &self.workers {
            w.recycle(p);
        }
    }

    /// Takes every partial already waiting.
    fn drain_partials(&mut self) {
        while let Some(p) = self
            .workers
            .as_ref()
            .and_then(|w| w.partials.try_recv().ok())
        {
            self.take_partial(p);
        }
    }

    fn record_latency(&mut self, us: f64) {
        if self.latencies_us.len() < 4096 {
            self.latencies_us.push(us);
        } else {
            self.latencies_us[self.lat_pos] = us;
            self.lat_pos = (self.lat_pos + 1) % 4096;
        }
    }

    fn warn(&mut self, kind: &'static str, detail: impl FnOnce() -> String) {
        if self.log.allow(kind) {
            tracing::warn!(kind, detail = %detail(), "bad input");
        }
    }
}
