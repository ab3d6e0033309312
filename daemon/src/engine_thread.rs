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

use crate::learner::{Cadence, LearnMsg, Learned};
use crate::next_stimulus::StimulusChooser;
use crate::promise::PromiseKeeper;
use crate::publish::Publisher;
use crate::ratelog::RateLimitedLog;
use crate::recorder::RecorderMsg;
use crate::shard_link::{Link, ShardEvent};
use crate::workers::{OwnedPartial, Workers};
use auspex_engine::assess::{assess, peak_ms, tuning, VerdictRule};
use auspex_engine::engine::{
    Counters, Decision, DecisionReason, Engine, EngineConfig, EngineError, EngineSink, Frame,
    TrialEnd, TrialOutcome, UnitSummaries,
};
use auspex_engine::learn::{LearnOptions, TrialWindow, WindowCollector};
use auspex_engine::PreparedModel;
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
use tokio::sync::oneshot;

mod sink;
mod status;
use sink::{PubSink, SessionTally};

/// What the engine thread receives.
pub enum EngineInput {
    /// Raw bytes from an ingest endpoint.
    Inbound {
        /// 0 main ingest, 1 task ingest.
        endpoint: u32,
        /// The message.
        bytes: Bytes,
        /// Wall-clock receive time.
        received_ns: i64,
    },
    /// A control request (other than reload and save).
    Control {
        /// The request.
        body: control_request::Body,
        /// Where the reply goes.
        reply: oneshot::Sender<ControlReply>,
    },
    /// A model already loaded by the control task.
    Reload {
        /// The model.
        model: Arc<PreparedModel>,
        /// Its path.
        path: String,
        /// Where the reply goes.
        reply: oneshot::Sender<ControlReply>,
    },
    /// Save the learned model (forwarded to the learner thread, which replies).
    SaveLearned {
        /// Model file path.
        path: PathBuf,
        /// The reply.
        reply: oneshot::Sender<Result<String, String>>,
    },
    /// A model the learner thread fitted.
    Learned(Learned),
    /// Why the learner could not fit (yet).
    LearnNote {
        /// Session counter.
        epoch: u64,
        /// The reason.
        text: String,
    },
    /// A message the combiner relayed to this shard (applied like ingest, not recorded: the
    /// combiner records it).
    Relay {
        /// The Inbound message.
        bytes: Bytes,
        /// The combiner's decoder when it applied it.
        decoder: String,
        /// Wall-clock receive time.
        received_ns: i64,
    },
    /// From a combiner's link tasks.
    FromShard(ShardEvent),
    /// Stop: end open trials, publish, flush.
    Shutdown,
}

/// The endpoint number relayed messages carry (0 main ingest, 1 task ingest).
pub const RELAY_ENDPOINT: u32 = 2;

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
    /// A combiner's session whose senders all ended, waiting (up to the shard deadline) for
    /// the shards' last partials before its trials are closed.
    pending_end: Option<Instant>,
    /// When a combiner last took a shard's partial.
    last_partial: Instant,
    recorder_errors: Arc<std::sync::atomic::AtomicU64>,
}

/// Trial messages held while waiting for SessionStart; more are counted as malformed.
const MAX_HELD_BEFORE_SESSION: usize = 4096;
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
}

/// Adds one set of engine counters to another.
fn add_counters(a: &mut Counters, b: &Counters) {
    a.spikes += b.spikes;
    a.stray_partials += b.stray_partials;
    a.late_spikes += b.late_spikes;
    a.unknown_unit_spikes += b.unknown_unit_spikes;
    a.watermark_backwards += b.watermark_backwards;
    a.duplicate_trials += b.duplicate_trials;
    a.stale_onsets += b.stale_onsets;
    a.unknown_trials += b.unknown_trials;
    a.unknown_stimuli += b.unknown_stimuli;
    a.trials_opened += b.trials_opened;
    a.trials_completed += b.trials_completed;
    a.trials_cancelled += b.trials_cancelled;
    a.frames += b.frames;
    a.decisions += b.decisions;
    a.labels_missing += b.labels_missing;
}

/// A file-name-safe form of a session name ("session" when empty).
pub fn file_safe(name: &str) -> String {
    let s: String = name
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '-' || c == '_' || c == '.' {
                c
            } else {
                '_'
            }
        })
        .collect();
    let s = s.trim_start_matches('.').to_string();
    if s.is_empty() {
        "session".into()
    } else {
        s
    }
}

/// UTC date and time of a Unix time as `YYYYMMDDTHHMMSSZ` (civil-from-days conversion of the
/// proleptic Gregorian calendar).
pub fn utc_stamp(unix_s: u64) -> String {
    let days = (unix_s / 86_400) as i64;
    let secs = unix_s % 86_400;
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = doy - (153 * mp + 2) / 5 + 1;
    let m = if mp < 10 { mp + 3 } else { mp - 9 };
    let y = yoe + era * 400 + (m <= 2) as i64;
    format!(
        "{y:04}{m:02}{d:02}T{:02}{:02}{:02}Z",
        secs / 3600,
        (secs / 60) % 60,
        secs % 60
    )
}

fn unix_now_s() -> u64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_secs())
        .unwrap_or(0)
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
            last_partial: Instant::now(),
            recorder_errors: s.recorder_errors,
        };
        t.config.policy = t
            .promise
            .model_changed(t.model.as_deref().map(|m| &**m), &t.config);
        t.config.role = t
            .link
            .role()
            .unwrap_or(crate::workers::combiner_role(s.threads));
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
        loop {
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
                        if let Err(e) = l.tx.send(LearnMsg::Save { path, reply }) {
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
            if let (Some(t0), Link::Combine { deadline, .. }) = (self.pending_end, &self.link) {
                // Shards that are alive keep their trials coming (a lost one is given up, and
                // its trials then finish without it); only a long pause ends the wait early.
                let open = self
                    .engine
                    .as_ref()
                    .is_some_and(|e| e.open_trials().next().is_some());
                if !open || t0.max(self.last_partial).elapsed() > *deadline * 10 {
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
        if let Some(e) = self.engine.as_mut() {
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

    fn inbound(&mut self, endpoint: u32, bytes: Bytes, received_ns: i64) {
        self.counters.messages_in += 1;
        // Decoded once; oversized messages are not decoded at all.
        let msg =
            (bytes.len() <= self.max_message_bytes).then(|| v1::Inbound::decode(bytes.as_ref()));
        // A new session ends the current one before its first message is recorded, so each
        // recording holds one session.
        if let Some(Ok(v1::Inbound {
            body: Some(inbound::Body::SessionStart(ss)),
            ..
        })) = &msg
        {
            if self
                .session
                .as_ref()
                .is_some_and(|s| s.name != ss.session_name)
            {
                self.end_session("new session");
            }
        }
        if let (Some(r), false) = (&self.recorder, endpoint == RELAY_ENDPOINT) {
            let _ = r.send(RecorderMsg::Record(v1::SessionRecord {
                received_unix_ns: received_ns,
                endpoint,
                message: bytes.to_vec(),
                header: None,
                learned: None,
            }));
        }
        if bytes.len() > self.max_message_bytes {
            self.counters.oversized += 1;
            let n = bytes.len();
            let max = self.max_message_bytes;
            self.warn("oversized", || {
                format!("message of {n} bytes exceeds {max}; ignored")
            });
            return;
        }
        let msg = match msg {
            Some(Ok(m)) => m,
            // Oversized messages were counted above.
            None => return,
            Some(Err(e)) => {
                self.counters.malformed += 1;
                self.warn("malformed", || {
                    format!("endpoint {endpoint}: not an Inbound message ({e})")
                });
                return;
            }
        };
        // Bytes that decode as neither a sender nor a body are garbage, not a sender named ""
        // (a named sender's unknown message kind still advances its numbering, below).
        if msg.body.is_none() && msg.sender.is_empty() {
            self.counters.malformed += 1;
            self.warn("malformed", || {
                "message without a body (unknown kind?)".into()
            });
            return;
        }
        let restart = matches!(msg.body, Some(inbound::Body::SessionStart(_)));
        let between = self.session.is_none();
        let s = self.senders.entry(msg.sender.clone()).or_default();
        s.messages += 1;
        s.relayed |= endpoint == RELAY_ENDPOINT;
        s.between_sessions |= between;
        if s.last_seq != 0 && msg.seq <= s.last_seq {
            if restart || (s.ended && msg.seq == 1) {
                // A sender that restarts announces itself (SessionStart, or seq 1 after its
                // end of stream): its numbering starts afresh.
                s.last_seq = msg.seq;
                s.ended = false;
            } else {
                // Already seen: a retransmission. Applying it again would count spikes twice.
                self.counters.duplicate_messages += 1;
                let (sender, last, seq) = (msg.sender.clone(), s.last_seq, msg.seq);
                self.warn("duplicate", || {
                    format!("sender {sender:?}: message #{seq} is not after #{last}; dropped")
                });
                return;
            }
        } else {
            if s.last_seq != 0 && msg.seq != s.last_seq + 1 {
                s.gaps += 1;
                self.counters.sequence_gaps += 1;
                let (sender, last, seq) = (msg.sender.clone(), s.last_seq, msg.seq);
                self.warn("sequence", || {
                    format!("sender {sender:?}: sequence jumped from {last} to {seq}")
                });
            }
            let s = self.senders.entry(msg.sender.clone()).or_default();
            s.last_seq = msg.seq;
        }
        let Some(body) = msg.body else {
            self.counters.malformed += 1;
            self.warn("malformed", || {
                "message without a body (unknown kind?)".into()
            });
            return;
        };
        self.relay(&body, &bytes);
        match body {
            inbound::Body::SessionStart(ss) => {
                self.session_start(&ss, &msg.sender);
                return;
            }
            inbound::Body::EndOfStream(_) => {
                if let Some(s) = self.senders.get_mut(&msg.sender) {
                    s.ended = true;
                }
                // A shard's session is its acquisition's: the task program's end (relayed by
                // the combiner) may come before the last spikes of its own senders.
                let own = |s: &&SenderInfo| !s.relayed || matches!(self.link, Link::None);
                let ended = self.senders.values().filter(own).all(|s| s.ended)
                    && self.senders.values().find(own).is_some();
                if self.session.is_some() && ended {
                    let waiting = matches!(self.link, Link::Combine { .. })
                        && self
                            .engine
                            .as_ref()
                            .is_some_and(|e| e.open_trials().next().is_some());
                    if waiting {
                        // The shards' last partials may still be on their way.
                        self.pending_end.get_or_insert_with(Instant::now);
                    } else {
                        self.end_session("every sender ended");
                    }
                }
                return;
            }
            inbound::Body::UnitsAdded(ua) => {
                self.units_added(&ua);
                return;
            }
            _ => {}
        }
        if self.tick_rate.is_none() || self.session.is_none() && self.engine.is_none() {
            // Task programs may announce trials before acquisition has declared the clock:
            // hold their messages (bounded) and apply them when the session starts.
            let task_kind = matches!(
                body,
                inbound::Body::Onset(_) | inbound::Body::Label(_) | inbound::Body::Cancel(_)
            );
            if task_kind && self.held.len() < MAX_HELD_BEFORE_SESSION {
                self.held.push(body);
            } else {
                self.counters.before_session += 1;
                self.warn("no-session", || {
                    "spikes or watermark before SessionStart declared the clock; ignored".into()
                });
            }
            return;
        }
        self.apply(body);
    }

    /// Applies a decoded message to the collector and the running engine.
    fn apply(&mut self, body: inbound::Body) {
        if self.engine.is_some() {
            remember_onset(&mut self.names, &body, &self.current);
        }
        // One shared body for the combiner and every worker (see `workers.rs`).
        let body = Arc::new(body);
        if let Some(w) = self.workers.as_mut() {
            w.sync(self.engine.as_ref(), self.engine_gen);
            if self.engine.is_some() {
                w.body(&body);
            }
            let dead = w.dead_parts();
            if let Some(e) = self.engine.as_mut() {
                let newly = dead & !e.lost_parts();
                if newly != 0 {
                    tracing::error!(
                        parts = format!("{newly:#b}"),
                        "an engine thread stopped: its units contribute nothing from now on (frames say which parts are missing); restart the daemon"
                    );
                    let mut sink = pub_sink!(self);
                    for p in 0..64 {
                        if newly & (1u64 << p) != 0 {
                            e.lose_part(p, &mut sink);
                        }
                    }
                }
            }
        }
        let mut sink = pub_sink!(self);
        let applied = apply_body(
            self.engine.as_mut(),
            self.collector.as_mut(),
            &self.names,
            &self.current,
            &body,
            &mut sink,
            &mut self.windows,
        );
        let learning = self.learn.is_some();
        if let Some((a, t)) = applied.mismatched_batch {
            self.counters.malformed += 1;
            self.warn("malformed", || {
                format!("spike batch has {a} units but {t} ticks; ignored")
            });
        }
        if let Some((trial, name)) = applied.unknown_stimulus {
            if !learning {
                self.counters.unknown_stimuli += 1;
                self.warn("stimulus", || {
                    format!("trial {trial} names stimulus {name:?}, which the model does not have; decoding without it")
                });
            }
        }
        for e in applied.errors {
            let kind = match &e {
                EngineError::LateSpike { .. } => "late-spike",
                EngineError::UnknownUnit(_) => "unknown-unit",
                EngineError::WatermarkBackwards { .. } => "watermark",
                EngineError::DuplicateTrial(_) => "duplicate-trial",
                EngineError::StaleOnset { .. } => "stale-onset",
                EngineError::UnknownTrial(_) => "unknown-trial",
                EngineError::StrayPartial { .. } => "stray-partial",
                EngineError::Config(_) => "config",
                EngineError::UnknownStimulus(_) => "stimulus",
            };
            self.warn(kind, || e.to_string());
        }
        self.send_windows();
    }

    /// Hands completed labelled windows to the learner (the collector only runs when learning).
    fn send_windows(&mut self) {
        if self.windows.is_empty() {
            return;
        }
        match self.learn.as_mut() {
            Some(l) => {
                for w in self.windows.drain(..) {
                    l.trials_sent += 1;
                    let _ = l.tx.send(LearnMsg::Trial(w));
                }
            }
            None => self.windows.clear(),
        }
    }

    fn units_added(&mut self, ua: &v1::UnitsAdded) {
        if self.session.is_none() {
            self.counters.before_session += 1;
            self.warn("no-session", || {
                "UnitsAdded before SessionStart; ignored".into()
            });
            return;
        }
        tracing::info!(
            units = %ua.units.iter().map(|u| u.to_string()).collect::<Vec<_>>().join(","),
            from_tick = ua.from_tick,
            "units added to the session"
        );
        if let Some(l) = &self.learn {
            let _ = l.tx.send(LearnMsg::Units {
                units: ua.units.clone(),
                from_tick: ua.from_tick,
            });
        }
    }

    fn session_start(&mut self, ss: &v1::SessionStart, sender: &str) {
        if !(ss.tick_rate_hz.is_finite() && ss.tick_rate_hz >= 1.0 && ss.tick_rate_hz <= 1e12) {
            self.counters.malformed += 1;
            let r = ss.tick_rate_hz;
            self.warn("session", || {
                format!("SessionStart tick rate {r} is not usable (1 to 1e12 ticks/s)")
            });
            return;
        }
        if self.session.is_some() {
            // The same session announced again (another sender, or a repeat): harmless, but
            // its clock must agree.
            if self.tick_rate.is_some_and(|r| r != ss.tick_rate_hz) {
                self.counters.malformed += 1;
                let (nr, r) = (ss.tick_rate_hz, self.tick_rate.unwrap_or(0.0));
                self.warn("session", || {
                    format!(
                        "SessionStart declares {nr} ticks/s but the session runs at {r}; ignored"
                    )
                });
            }
            return;
        }
        if let Some(r) = self.fixed_tick_rate {
            if r != ss.tick_rate_hz {
                self.counters.malformed += 1;
                let nr = ss.tick_rate_hz;
                self.warn("session", || {
                    format!("SessionStart declares {nr} ticks/s but the daemon was started with --tick-rate {r}; ignored")
                });
                return;
            }
        }
        if let Some(m) = &self.model {
            let model_units: std::collections::HashSet<u32> = m.units().iter().copied().collect();
            let session: std::collections::HashSet<u32> = ss.units.iter().copied().collect();
            let missing = model_units.difference(&session).count();
            let extra = session.difference(&model_units).count();
            if !ss.units.is_empty() && (missing > 0 || extra > 0) && self.learn.is_none() {
                self.counters.model_mismatches += (missing + extra) as u64;
                tracing::warn!(
                    model_units_not_in_session = missing,
                    session_units_not_in_model = extra,
                    "session and model units differ: spikes of unknown units are counted and ignored; missing units contribute silence"
                );
            }
        }
        self.epoch += 1;
        // Sequence tracking starts afresh: the senders of the last session stay visible in
        // status until this one starts.
        // (A sender that spoke while no session ran belongs to this one: a task program's onset
        // may overtake acquisition's SessionStart on its own socket.)
        self.senders
            .retain(|k, s| k == sender || (s.between_sessions && !s.ended));
        for s in self.senders.values_mut() {
            s.between_sessions = false;
        }
        if let Some(s) = self.senders.get_mut(sender) {
            s.gaps = 0;
            s.messages = 1;
            s.ended = false;
        }
        self.tick_rate = Some(ss.tick_rate_hz);
        self.config.tick_rate_hz = ss.tick_rate_hz;
        // Name the recording after the session (the file of the first session was opened at
        // start, before its name was known; later ones are opened at their session's start).
        if let (Some(dir), Some(r)) = (&self.record_dir, &self.recorder) {
            let stem = format!(
                "{}-{}",
                file_safe(&ss.session_name),
                utc_stamp(unix_now_s())
            );
            let path = (1..)
                .map(|i| match i {
                    1 => dir.join(format!("{stem}.apxs")),
                    i => dir.join(format!("{stem}-{i}.apxs")),
                })
                .find(|p| !p.exists())
                .unwrap_or_else(|| dir.join(format!("{stem}.apxs")));
            let _ = r.send(RecorderMsg::Rename(path.clone()));
            self.recording_path = path.display().to_string();
        }
        self.session = Some(SessionTally::new(
            &ss.session_name,
            self.recording_path.clone(),
        ));
        self.promise.new_session();
        if let Some(l) = self.learn.as_mut() {
            let window_ticks = (l.setup.options.fit.window_s * ss.tick_rate_hz).round() as i64;
            let history = (self.config.history_s * ss.tick_rate_hz).round() as i64;
            self.collector = Some(WindowCollector::new(window_ticks, history));
            l.trials_sent = 0;
            l.model_trials = 0;
            l.applied_at = None;
            l.waiting_for = "no labelled trial yet".into();
            let _ = l.tx.send(LearnMsg::Session {
                epoch: self.epoch,
                tick_rate_hz: ss.tick_rate_hz,
                units: ss.units.clone(),
                name: ss.session_name.clone(),
            });
            let _ = l.tx.send(LearnMsg::Enable(l.enabled));
            // Mark the recording as a learning session from its start (with the learner's
            // settings), so a replay knows to follow the swap points even if none come.
            if let Some(r) = &self.recorder {
                let _ = r.send(RecorderMsg::Record(swap_record(&l.setup.options, 0, None)));
            }
        }
        if let (None, Some(m)) = (&self.engine, self.model.clone()) {
            match Engine::new(m, self.config.clone()) {
                Ok(e) => {
                    self.engine = Some(e);
                    self.engine_gen += 1;
                    self.mark_lost_shards();
                }
                Err(e) => {
                    self.counters.malformed += 1;
                    tracing::error!(error = %e, "cannot decode this session with the loaded model");
                }
            }
        }
        tracing::info!(tick_rate_hz = ss.tick_rate_hz, units = ss.units.len(), name = %ss.session_name, held = self.held.len(), learning = self.learn.is_some(), "session started");
        for body in std::mem::take(&mut self.held) {
            self.apply(body);
        }
    }

    fn close_trials(&mut self, outcome: TrialOutcome) {
        if let (Some(w), Some(_)) = (self.workers.as_mut(), self.engine.as_ref()) {
            // Bins the workers have computed but not yet reported complete the trials first.
            w.sync(self.engine.as_ref(), self.engine_gen);
            w.barrier();
            w.close_all(outcome);
            self.drain_partials();
        }
        if let Some(e) = self.engine.as_mut() {
            let mut sink = pub_sink!(self);
            e.close_all(outcome, &mut sink);
        }
    }

    fn publish_summary(&mut self, reason: &str) {
        let Some(t) = self.session.take() else {
            return;
        };
        let learned = self.learn.as_ref().map(|l| l.trials_sent).unwrap_or(0);
        let s = v1::SessionSummary {
            session_name: t.name.clone(),
            trials_completed: t.completed,
            trials_cancelled: t.cancelled,
            decisions: t.decisions,
            decisions_labelled: t.labelled,
            decisions_correct: t.correct,
            recording_path: t.recording.clone(),
            trials_learned: learned,
            reason: reason.into(),
            duration_s: t.started.elapsed().as_secs_f64(),
        };
        tracing::info!(session = %t.name, reason, completed = t.completed, decisions = t.decisions, labelled = t.labelled, correct = t.correct, "session ended");
        self.publisher
            .publish(topic::SESSION, outbound::Body::Session(s.clone()), true);
        if self.ended.len() == ENDED_KEPT {
            self.ended.remove(0);
        }
        self.ended.push(s);
    }

    /// Ends the current session: open trials closed, summary published, recording rotated,
    /// sequence tracking and learning started afresh for the next.
    fn end_session(&mut self, reason: &str) {
        self.pending_end = None;
        self.close_trials(TrialOutcome::SessionEnded);
        self.publish_summary(reason);
        if let Some(e) = self.engine.take() {
            add_counters(&mut self.carried, e.counters());
        }
        self.names.clear();
        self.held.clear();
        self.collector = None;
        self.tick_rate = self.fixed_tick_rate;
        if let Some(l) = self.learn.as_mut() {
            l.waiting_for = "the next session".into();
        }
        if self.learn.is_some() {
            // Learning starts from the loaded model (or none) in every session.
            self.model = self.base.as_ref().map(|b| b.0.clone());
            self.model_path = self.base.as_ref().map(|b| b.1.clone()).unwrap_or_default();
            self.config.policy = self
                .promise
                .model_changed(self.model.as_deref().map(|m| &**m), &self.config);
            self.current = self
                .model
                .as_ref()
                .map(|m| m.stimuli().to_vec())
                .unwrap_or_default()
                .into();
        }
        if let Some(r) = &self.recorder {
            // The next session gets a file of its own; its name is settled at its start.
            let next = match &self.record_dir {
                Some(dir) => dir.join(format!("next-session-{}.apxs", utc_stamp(unix_now_s()))),
                None => numbered_sibling(std::path::Path::new(&self.recording_path)),
            };
            let _ = r.send(RecorderMsg::Rotate(next.clone()));
            self.recording_path = next.display().to_string();
        }
    }

    fn learned(&mut self, l: Learned) {
        let Some(link) = self.learn.as_mut() else {
            return;
        };
        if l.epoch != self.epoch || self.session.is_none() {
            return;
        }
        let mut cfg = self.config.clone();
        cfg.policy = self.promise.model_changed(Some(&l.model), &cfg);
        let r = match self.engine.as_mut() {
            Some(e) => e
                .set_model(l.model.clone())
                .and_then(|()| e.set_config(cfg.clone())),
            None => Engine::new(l.model.clone(), cfg.clone()).map(|e| {
                self.engine = Some(e);
                self.engine_gen += 1;
            }),
        };
        self.config.policy = cfg.policy;
        if let Err(e) = r {
            link.waiting_for = format!("the learned model could not be used: {e}");
            return;
        }
        link.model_trials = l.trials;
        link.applied_at = Some(Instant::now());
        link.last_refit_s = l.fit_s;
        link.refits += 1;
        link.waiting_for.clear();
        if let Some(r) = &self.recorder {
            let _ = r.send(RecorderMsg::Record(swap_record(
                &link.setup.options,
                l.trials,
                Some(&l.model),
            )));
        }
        tracing::info!(
            trials = l.trials,
            units = l.model.n_units(),
            stimuli = l.model.n_stimuli(),
            fit_s = l.fit_s,
            "learned model applies to trials that open from now on"
        );
        self.current = l.model.stimuli().to_vec().into();
        self.chooser.resize(l.model.n_stimuli());
        if let Some(e) = &self.engine {
            self.config = e.config().clone();
        }
        self.model_path = format!("learned from {} labelled trials", l.trials);
        if let Some(old) = self.model.replace(l.model) {
            let _ = link.tx.send(LearnMsg::Retire(old));
        }
    }

    fn reload(&mut self, model: Arc<PreparedModel>, path: String) -> ControlReply {
        if !matches!(self.link, Link::None) {
            // Shards and combiner must sum the same model's blocks.
            return ControlReply {
                ok: false,
                error: format!(
                    "{path}: not loaded: this daemon is a {} of a deployment across machines, whose shards and combiner must load the same model; restart each of them with --model {path}",
                    self.link.name()
                ),
                note: String::new(),
                body: None,
            };
        }
        // A target accuracy the new model's record cannot support refuses the reload.
        let mut cfg = self.config.clone();
        if let Some(t) = self.promise.target() {
            match PromiseKeeper::policy_for(t, Some(&model), &cfg) {
                Ok((p, _)) => cfg.policy = p,
                Err(e) => {
                    return ControlReply {
                        ok: false,
                        error: format!("{path}: not loaded: target accuracy {t}: {e}"),
                        note: String::new(),
                        body: None,
                    }
                }
            }
        }
        let r = match self.engine.as_mut() {
            Some(e) => e
                .set_model(model.clone())
                .and_then(|()| e.set_config(cfg.clone())),
            None => Ok(()),
        };
        if r.is_ok() {
            self.config.policy = self.promise.model_changed(Some(&model), &cfg);
        }
        match r {
            Ok(()) => {
                self.current = model.stimuli().to_vec().into();
                self.chooser.resize(model.n_stimuli());
                self.model = Some(model);
                self.model_path = path.clone();
                if let Some(e) = &self.engine {
                    self.config = e.config().clone();
                }
                tracing::info!(model = %path, "model reloaded; applies to trials that open from now on");
                ControlReply {
                    ok: true,
                    error: String::new(),
                    note: String::new(),
                    body: Some(v1::control_reply::Body::Status(self.status())),
                }
            }
            Err(e) => ControlReply {
                ok: false,
                error: format!("{path}: {e}"),
                note: String::new(),
                body: None,
            },
        }
    }

    fn apply_config(&mut self, c: EngineConfig) -> Result<(), String> {
        if let Some(e) = self.engine.as_mut() {
            e.set_config(c.clone()).map_err(|e| e.to_string())?;
        } else {
            // No engine yet (no session): the same checks the engine makes.
            c.policy.check()?;
            match (&c.prior, &self.model) {
                (Some(p), Some(m)) => auspex_engine::engine::check_prior(p, m.n_stimuli())?,
                (Some(_), None) => {
                    return Err("no model yet: a prior needs the model's stimuli".into())
                }
                (None, _) => {}
            }
        }
        self.config = c;
        Ok(())
    }

    fn set_learning(&mut self, action: &str) -> Result<(), String> {
        let Some(l) = self.learn.as_mut() else {
            return Err("learning is off: start auspexd without --model, or with --learn".into());
        };
        match action {
            "freeze" => {
                l.enabled = false;
                let _ = l.tx.send(LearnMsg::Enable(false));
            }
            "resume" => {
                l.enabled = true;
                let _ = l.tx.send(LearnMsg::Enable(true));
            }
            "reset" => {
                let _ = l.tx.send(LearnMsg::Reset);
                if let Some(r) = &self.recorder {
                    let _ = r.send(RecorderMsg::Record(swap_record(
                        &l.setup.options,
                        l.trials_sent,
                        None,
                    )));
                }
            }
            other => {
                return Err(format!(
                    "unknown learning action `{other}`: use freeze, resume or reset"
                ))
            }
        }
        tracing::info!(action, "learning");
        Ok(())
    }

    fn control(&mut self, body: control_request::Body) -> ControlReply {
        use control_request::Body as B;
        let ok = |body| ControlReply {
            ok: true,
            error: String::new(),
            note: String::new(),
            body,
        };
        let err = |e: String| ControlReply {
            ok: false,
            error: e,
            note: String::new(),
            body: None,
        };
        let with_status = |this: &mut Self, r: Result<(), String>| match r {
            Ok(()) => ok(Some(v1::control_reply::Body::Status(this.status()))),
            Err(e) => err(e),
        };
        match body {
            B::Status(_) => ok(Some(v1::control_reply::Body::Status(self.status()))),
            B::SetPolicy(p) => {
                let mut c = self.config.clone();
                c.policy.threshold = p.threshold;
                c.policy.min_time_s = p.min_time_s;
                let target = (p.target_accuracy > 0.0).then_some(p.target_accuracy);
                let r = match target {
                    // Checked against the model before anything changes.
                    Some(t) => {
                        PromiseKeeper::policy_for(t, self.model.as_deref().map(|m| &**m), &c)
                            .map(|(pol, _)| c.policy = pol)
                    }
                    None => Ok(()),
                }
                .and_then(|()| self.apply_config(c.clone()));
                if r.is_ok() {
                    let _ =
                        self.promise
                            .set_target(target, self.model.as_deref().map(|m| &**m), &c);
                    tracing::info!(
                        threshold = c.policy.threshold,
                        min_time_s = c.policy.min_time_s,
                        target_accuracy = target.unwrap_or(0.0),
                        "decision policy changed; applies to trials that open from now on"
                    );
                }
                let mut reply = with_status(self, r);
                // A minimum time past the window end leaves only window-end decisions: say so.
                if let (true, Some(m)) = (reply.ok, &self.model) {
                    let window_s = m.n_bins() as f64 * m.bin_width_s();
                    if c.policy.min_time_s > window_s + 1e-9 {
                        reply.note = format!(
                            "policy set, but the minimum time {} ms is past the {} ms window: every decision will come at the window end",
                            c.policy.min_time_s * 1000.0,
                            window_s * 1000.0
                        );
                    }
                }
                reply
            }
            B::SetPrior(p) => {
                let sum: f64 = p.prior.iter().sum();
                let mut c = self.config.clone();
                c.prior = if p.prior.is_empty() {
                    None
                } else {
                    Some(p.prior)
                };
                let r = self.apply_config(c);
                let mut reply = with_status(self, r);
                // Entries that do not sum to 1 are used as weights: say so, never silently.
                if reply.ok && sum > 0.0 && (sum - 1.0).abs() > 1e-6 {
                    reply.note = format!(
                        "prior set: its entries summed to {sum} and were divided by that sum"
                    );
                }
                reply
            }
            B::SetDecoder(d) => match auspex_engine::Decoder::parse(&d.decoder) {
                Some(dec) => {
                    let mut c = self.config.clone();
                    c.decoder = dec;
                    let r = self.apply_config(c);
                    with_status(self, r)
                }
                None => err(format!(
                    "unknown decoder `{}`: use order-stats, inhomogeneous-poisson or count-only",
                    d.decoder
                )),
            },
            B::NextStimulus(n) => {
                let ns = self.current.len();
                if ns == 0 {
                    return err("no model yet: nothing to choose among (learning waits for labelled trials)".into());
                }
                self.chooser.resize(ns);
                let (idx, policy) = match n.policy.as_str() {
                    "" | "balanced-blocks" => (self.chooser.balanced(ns), "balanced-blocks"),
                    "least-certain" => (self.chooser.least_certain(ns), "least-certain"),
                    other => return err(format!("unknown next-stimulus policy `{other}`: use balanced-blocks or least-certain")),
                };
                ok(Some(v1::control_reply::Body::Next(v1::NextStimulusReply {
                    stimulus: self.current[idx as usize].clone(),
                    index: idx,
                    policy: policy.into(),
                })))
            }
            B::SetLearning(a) => {
                let r = self.set_learning(a.action.trim());
                with_status(self, r)
            }
            B::Reload(_) | B::SaveLearned(_) => {
                err("reload and save are handled by the control task".into())
            }
        }
    }
}

/// The recording's marker of a learned model taking over (`model`), or of the learner forgetting
/// its trials (None), after `trials` labelled trials, with the settings a replay needs.
fn swap_record(
    opts: &LearnOptions,
    trials: u64,
    model: Option<&Arc<PreparedModel>>,
) -> v1::SessionRecord {
    v1::SessionRecord {
        received_unix_ns: crate::ingest::now_ns(),
        endpoint: 0,
        message: Vec::new(),
        header: None,
        learned: Some(v1::LearnedSwap {
            trials_learned: trials,
            units: model.map(|m| m.n_units() as u32).unwrap_or(0),
            stimuli: model.map(|m| m.n_stimuli() as u32).unwrap_or(0),
            reset: model.is_none(),
            window_s: opts.fit.window_s,
            bin_width_s: opts.fit.bin_width_s,
            families: opts
                .fit
                .families
                .iter()
                .map(|f| f.name().to_string())
                .collect(),
            min_trials_per_stimulus: opts.min_trials_per_stimulus,
            max_trials_per_stimulus: opts.max_trials_per_stimulus.min(u32::MAX as usize) as u32,
        }),
    }
}

/// `name-2.ext`, `name-3.ext`, … beside `path`: the next free numbered file.
fn numbered_sibling(path: &std::path::Path) -> PathBuf {
    let stem = path
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| "session".into());
    let ext = path
        .extension()
        .map(|e| format!(".{}", e.to_string_lossy()))
        .unwrap_or_default();
    let base = stem
        .rsplit_once('-')
        .filter(|(_, n)| n.parse::<u32>().is_ok())
        .map(|(b, _)| b.to_string())
        .unwrap_or(stem);
    (2..)
        .map(|i| path.with_file_name(format!("{base}-{i}{ext}")))
        .find(|p| !p.exists())
        .unwrap_or_else(|| path.to_path_buf())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn utc_stamp_matches_known_dates() {
        // 2000-03-01 00:00:00 UTC = 951868800; 2026-12-02 05:30:00 UTC = 1796189400
        // (both computed with Python's datetime, a general-purpose reference).
        assert_eq!(utc_stamp(0), "19700101T000000Z");
        assert_eq!(utc_stamp(951_868_800), "20000301T000000Z");
        assert_eq!(utc_stamp(1_796_189_400), "20261202T053000Z");
    }

    #[test]
    fn session_names_become_safe_file_names() {
        assert_eq!(file_safe("rat 7 / day 2"), "rat_7___day_2");
        assert_eq!(file_safe(""), "session");
        assert_eq!(file_safe("../x"), "_x");
    }
}
