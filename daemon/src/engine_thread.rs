//! The engine thread: one OS thread that owns the engine. It takes inbound messages in arrival
//! order from the bounded ingest channel, hands each to the recorder, decodes and checks it
//! (sequence gaps, size, session), drives the engine, and turns the engine's outputs into
//! published messages. Bad input is counted and logged with rate limiting, never fatal.
//! It also answers control requests and publishes health once a second.

use crate::publish::Publisher;
use crate::recorder::RecorderMsg;
use auspex_engine::engine::{
    Decision, DecisionReason, Engine, EngineConfig, EngineError, EngineSink, Frame, TrialEnd,
    TrialOutcome, UnitSummaries,
};
use auspex_engine::Model;
use auspex_proto::topic;
use auspex_proto::v1::{self, control_request, inbound, outbound, ControlReply};
use bytes::Bytes;
use crossbeam_channel::{Receiver, RecvTimeoutError, Sender};
use prost::Message;
use std::collections::{BTreeMap, HashMap};
use std::sync::atomic::Ordering;
use std::sync::Arc;
use std::time::{Duration, Instant};
use tokio::sync::oneshot;

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
    /// A control request (other than reload).
    Control {
        /// The request.
        body: control_request::Body,
        /// Where the reply goes.
        reply: oneshot::Sender<ControlReply>,
    },
    /// A model already loaded by the control task.
    Reload {
        /// The model.
        model: Arc<Model>,
        /// Its path.
        path: String,
        /// Where the reply goes.
        reply: oneshot::Sender<ControlReply>,
    },
    /// Stop: end open trials, publish, flush.
    Shutdown,
}

/// Daemon-level counters (the engine keeps its own).
#[derive(Default, Debug, Clone)]
struct DaemonCounters {
    messages_in: u64,
    malformed: u64,
    oversized: u64,
    sequence_gaps: u64,
    model_mismatches: u64,
    unknown_stimuli: u64,
    before_session: u64,
}

#[derive(Default, Debug, Clone)]
struct SenderInfo {
    last_seq: u64,
    gaps: u64,
    ended: bool,
    messages: u64,
}

/// Logs at most a few messages per kind per second, then says how many were suppressed.
struct RateLimitedLog {
    window_start: Instant,
    counts: HashMap<&'static str, u32>,
    suppressed: HashMap<&'static str, u64>,
}

impl RateLimitedLog {
    fn new() -> Self {
        RateLimitedLog {
            window_start: Instant::now(),
            counts: HashMap::new(),
            suppressed: HashMap::new(),
        }
    }
    fn allow(&mut self, kind: &'static str) -> bool {
        if self.window_start.elapsed() >= Duration::from_secs(1) {
            for (k, n) in self.suppressed.drain() {
                if n > 0 {
                    tracing::warn!(
                        kind = k,
                        suppressed = n,
                        "further messages of this kind were not logged"
                    );
                }
            }
            self.counts.clear();
            self.window_start = Instant::now();
        }
        let c = self.counts.entry(kind).or_insert(0);
        *c += 1;
        if *c <= 5 {
            true
        } else {
            *self.suppressed.entry(kind).or_insert(0) += 1;
            false
        }
    }
}

/// The next-stimulus policies.
struct StimulusChooser {
    rng: u64,
    block: Vec<u32>,
    decided: Vec<u64>,
    correct: Vec<u64>,
}

impl StimulusChooser {
    fn new(seed: u64, n: usize) -> Self {
        StimulusChooser {
            rng: seed ^ 0x9E37_79B9_7F4A_7C15,
            block: Vec::new(),
            decided: vec![0; n],
            correct: vec![0; n],
        }
    }
    fn next_u64(&mut self) -> u64 {
        self.rng = self.rng.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.rng;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
    fn resize(&mut self, n: usize) {
        if self.decided.len() != n {
            self.decided = vec![0; n];
            self.correct = vec![0; n];
            self.block.clear();
        }
    }
    fn balanced(&mut self, n: usize) -> u32 {
        if self.block.is_empty() {
            self.block = (0..n as u32).collect();
            for i in (1..n).rev() {
                let j = (self.next_u64() % (i as u64 + 1)) as usize;
                self.block.swap(i, j);
            }
        }
        self.block.pop().unwrap_or(0)
    }
    /// The stimulus with the lowest running decoding accuracy (untried first), exploring a
    /// random one 10% of the time.
    fn least_certain(&mut self, n: usize) -> u32 {
        if self.next_u64() % 10 == 0 {
            return (self.next_u64() % n as u64) as u32;
        }
        let acc = |i: usize| {
            if self.decided[i] == 0 {
                -1.0
            } else {
                self.correct[i] as f64 / self.decided[i] as f64
            }
        };
        (0..n)
            .min_by(|&a, &b| acc(a).total_cmp(&acc(b)))
            .unwrap_or(0) as u32
    }
    fn record(&mut self, presented: u32, decided: u32) {
        if let Some(d) = self.decided.get_mut(presented as usize) {
            *d += 1;
            if presented == decided {
                self.correct[presented as usize] += 1;
            }
        }
    }
}

/// Turns engine outputs into published messages.
struct PubSink<'a> {
    publisher: &'a mut Publisher,
    recorder: Option<&'a Sender<RecorderMsg>>,
    stimuli: &'a [String],
    chooser: &'a mut StimulusChooser,
}

impl PubSink<'_> {
    fn name(&self, i: u32) -> String {
        self.stimuli.get(i as usize).cloned().unwrap_or_default()
    }
}

impl EngineSink for PubSink<'_> {
    fn frame(&mut self, f: &Frame<'_>) {
        let body = outbound::Body::Posterior(v1::PosteriorFrame {
            trial: f.trial,
            bin: f.bin,
            bin_end_tick: f.bin_end_tick,
            posterior: f.posterior.to_vec(),
            top: f.top,
            top_posterior: f.top_posterior,
            entropy_bits: f.entropy_bits,
            spikes: f.spikes,
        });
        self.publisher.publish(topic::POSTERIOR, body, false);
    }
    fn decision(&mut self, d: &Decision) {
        let body = outbound::Body::Decision(decision_msg(d, self.stimuli));
        self.publisher.publish(topic::DECISION, body, true);
    }
    fn trial_end(&mut self, e: &TrialEnd<'_>) {
        if let (Some(p), Some(d)) = (e.presented, e.decision) {
            if e.outcome == TrialOutcome::Completed {
                self.chooser.record(p, d.stimulus);
            }
        }
        let body = outbound::Body::Trial(v1::TrialClosed {
            trial: e.trial,
            outcome: match e.outcome {
                TrialOutcome::Completed => v1::TrialOutcome::Completed,
                TrialOutcome::Cancelled => v1::TrialOutcome::Cancelled,
                TrialOutcome::Shutdown => v1::TrialOutcome::Shutdown,
            } as i32,
            spikes: e.spikes,
            bins: e.bins,
            presented: e.presented.map(|p| self.name(p)).unwrap_or_default(),
            posterior: e.posterior.to_vec(),
            onset_tick: e.onset,
        });
        // Trial ends must reach closed-loop control as surely as decisions.
        self.publisher.publish(topic::TRIAL, body, true);
        if let Some(r) = self.recorder {
            let _ = r.send(RecorderMsg::Flush);
        }
    }
    fn unit_summaries(&mut self, s: &UnitSummaries<'_>) {
        let units = (0..s.units.len())
            .map(|i| v1::UnitLine {
                unit: s.units[i],
                presented_posterior: s.presented_posterior[i],
                decoded: s.decoded[i],
                accuracy: s.accuracy[i],
                info_bits: s.info_bits[i],
            })
            .collect();
        let body = outbound::Body::Units(v1::UnitReport {
            trial: s.trial,
            presented: self.name(s.presented),
            labelled_trials: s.n_trials,
            units,
        });
        self.publisher.publish(topic::UNITS, body, false);
    }
}

/// The published form of a decision.
pub fn decision_msg(d: &Decision, stimuli: &[String]) -> v1::DecisionEvent {
    v1::DecisionEvent {
        trial: d.trial,
        stimulus: d.stimulus,
        stimulus_name: stimuli
            .get(d.stimulus as usize)
            .cloned()
            .unwrap_or_default(),
        posterior: d.posterior,
        bin: d.bin,
        reason: match d.reason {
            DecisionReason::Threshold => v1::DecisionReason::Threshold,
            DecisionReason::WindowEnd => v1::DecisionReason::WindowEnd,
        } as i32,
        presented: d
            .presented
            .and_then(|p| stimuli.get(p as usize).cloned())
            .unwrap_or_default(),
        bin_end_tick: 0,
    }
}

/// Everything the engine thread owns.
pub struct EngineThread {
    model: Arc<Model>,
    model_path: String,
    config: EngineConfig,
    tick_rate: Option<f64>,
    session_units: Option<Vec<u32>>,
    engine: Option<Engine>,
    publisher: Publisher,
    recorder: Option<Sender<RecorderMsg>>,
    recording_path: String,
    max_message_bytes: usize,
    counters: DaemonCounters,
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
}

/// Trial messages held while waiting for SessionStart; more are counted as malformed.
const MAX_HELD_BEFORE_SESSION: usize = 4096;

/// Settings for [`EngineThread::new`].
pub struct EngineThreadSetup {
    /// The model.
    pub model: Arc<Model>,
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
    /// Largest message.
    pub max_message_bytes: usize,
    /// Next-stimulus seed.
    pub seed: u64,
    /// Health period.
    pub health_period: Duration,
}

impl EngineThread {
    /// Sets up; `rx` is also read for the backlog figure.
    pub fn new(s: EngineThreadSetup, rx: Receiver<EngineInput>) -> Result<Self, EngineError> {
        let n = s.model.n_stimuli();
        let mut t = EngineThread {
            model: s.model,
            model_path: s.model_path,
            config: s.config,
            tick_rate: s.tick_rate,
            session_units: None,
            engine: None,
            publisher: s.publisher,
            recorder: s.recorder,
            recording_path: s.recording_path,
            max_message_bytes: s.max_message_bytes,
            counters: DaemonCounters::default(),
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
        };
        if let Some(r) = t.tick_rate {
            t.config.tick_rate_hz = r;
            t.engine = Some(Engine::new(t.model.clone(), t.config.clone())?);
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
            match rx.recv_timeout(wait) {
                Ok(EngineInput::Inbound {
                    endpoint,
                    bytes,
                    received_ns,
                }) => {
                    let t0 = Instant::now();
                    self.inbound(endpoint, bytes, received_ns);
                    self.record_latency(t0.elapsed().as_secs_f64() * 1e6);
                }
                Ok(EngineInput::Control { body, reply }) => {
                    let r = self.control(body);
                    let _ = reply.send(r);
                }
                Ok(EngineInput::Reload { model, path, reply }) => {
                    let r = self.reload(model, path);
                    let _ = reply.send(r);
                }
                Ok(EngineInput::Shutdown) | Err(RecvTimeoutError::Disconnected) => break,
                Err(RecvTimeoutError::Timeout) => {}
            }
            if self.last_health.elapsed() >= self.health_period {
                self.publish_health();
            }
        }
        // Drain what already arrived, then end open trials.
        while let Ok(EngineInput::Inbound {
            endpoint,
            bytes,
            received_ns,
        }) = rx.try_recv()
        {
            self.inbound(endpoint, bytes, received_ns);
        }
        let stimuli = self.model.stimuli().to_vec();
        if let Some(e) = self.engine.as_mut() {
            let mut sink = PubSink {
                publisher: &mut self.publisher,
                recorder: self.recorder.as_ref(),
                stimuli: &stimuli,
                chooser: &mut self.chooser,
            };
            e.shutdown(&mut sink);
        }
        self.publish_health();
        if let Some(r) = &self.recorder {
            let _ = r.send(RecorderMsg::Flush);
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
        if let Some(r) = &self.recorder {
            let _ = r.send(RecorderMsg::Record(v1::SessionRecord {
                received_unix_ns: received_ns,
                endpoint,
                message: bytes.to_vec(),
                header: None,
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
        let msg = match v1::Inbound::decode(bytes.as_ref()) {
            Ok(m) => m,
            Err(e) => {
                self.counters.malformed += 1;
                self.warn("malformed", || {
                    format!("endpoint {endpoint}: not an Inbound message ({e})")
                });
                return;
            }
        };
        let s = self.senders.entry(msg.sender.clone()).or_default();
        s.messages += 1;
        if s.last_seq != 0 && msg.seq != s.last_seq + 1 {
            s.gaps += 1;
            self.counters.sequence_gaps += 1;
            let (sender, last, seq) = (msg.sender.clone(), s.last_seq, msg.seq);
            self.warn("sequence", || {
                format!("sender {sender:?}: sequence jumped from {last} to {seq}")
            });
        }
        let s = self.senders.entry(msg.sender.clone()).or_default();
        s.last_seq = s.last_seq.max(msg.seq);
        let Some(body) = msg.body else {
            self.counters.malformed += 1;
            self.warn("malformed", || {
                "message without a body (unknown kind?)".into()
            });
            return;
        };
        if let inbound::Body::SessionStart(ss) = &body {
            self.session_start(ss);
            return;
        }
        if let inbound::Body::EndOfStream(_) = &body {
            if let Some(s) = self.senders.get_mut(&msg.sender) {
                s.ended = true;
            }
            return;
        }
        if self.engine.is_none() {
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

    /// Applies a decoded message to the running engine.
    fn apply(&mut self, body: inbound::Body) {
        let stimuli = self.model.stimuli().to_vec();
        let Some(engine) = self.engine.as_mut() else {
            return;
        };
        let mut sink = PubSink {
            publisher: &mut self.publisher,
            recorder: self.recorder.as_ref(),
            stimuli: &stimuli,
            chooser: &mut self.chooser,
        };
        let mut errors: Vec<EngineError> = Vec::new();
        match body {
            inbound::Body::Spikes(b) => {
                if b.units.len() != b.ticks.len() {
                    self.counters.malformed += 1;
                    let (a, t) = (b.units.len(), b.ticks.len());
                    self.warn("malformed", || {
                        format!("spike batch has {a} units but {t} ticks; ignored")
                    });
                    return;
                }
                for (&u, &t) in b.units.iter().zip(&b.ticks) {
                    if let Err(e) = engine.spike(u, t) {
                        if errors.len() < 3 {
                            errors.push(e);
                        }
                    }
                }
                if let Err(e) = engine.advance(b.complete_through, &mut sink) {
                    errors.push(e);
                }
            }
            inbound::Body::Heartbeat(h) => {
                if let Err(e) = engine.advance(h.complete_through, &mut sink) {
                    errors.push(e);
                }
            }
            inbound::Body::Onset(o) => {
                let presented = if o.stimulus.is_empty() {
                    None
                } else {
                    match engine.model().stimulus_index(&o.stimulus) {
                        Some(i) => Some(i as u32),
                        None => {
                            self.counters.unknown_stimuli += 1;
                            let (t, s) = (o.trial, o.stimulus.clone());
                            if self.log.allow("stimulus") {
                                tracing::warn!(trial = t, stimulus = %s, "onset names a stimulus the model does not have; decoding without it");
                            }
                            None
                        }
                    }
                };
                if let Err(e) = engine.open_trial(o.trial, o.onset_tick, presented, &mut sink) {
                    errors.push(e);
                }
            }
            inbound::Body::Label(l) => match engine.model().stimulus_index(&l.stimulus) {
                Some(i) => {
                    if let Err(e) = engine.label(l.trial, i as u32, &mut sink) {
                        errors.push(e);
                    }
                }
                None => {
                    self.counters.unknown_stimuli += 1;
                    let (t, s) = (l.trial, l.stimulus.clone());
                    self.warn("stimulus", || {
                        format!("label for trial {t} names unknown stimulus {s:?}")
                    });
                }
            },
            inbound::Body::Cancel(c) => {
                if let Err(e) = engine.cancel(c.trial, &mut sink) {
                    errors.push(e);
                }
            }
            inbound::Body::SessionStart(_) | inbound::Body::EndOfStream(_) => {}
        }
        for e in errors {
            let kind = match &e {
                EngineError::LateSpike { .. } => "late-spike",
                EngineError::UnknownUnit(_) => "unknown-unit",
                EngineError::WatermarkBackwards { .. } => "watermark",
                EngineError::DuplicateTrial(_) => "duplicate-trial",
                EngineError::StaleOnset { .. } => "stale-onset",
                EngineError::UnknownTrial(_) => "unknown-trial",
                EngineError::UnknownStimulus(_) => "stimulus",
                EngineError::Config(_) => "config",
            };
            self.warn(kind, || e.to_string());
        }
    }

    fn session_start(&mut self, ss: &v1::SessionStart) {
        if !(ss.tick_rate_hz.is_finite() && ss.tick_rate_hz >= 1.0) {
            self.counters.malformed += 1;
            let r = ss.tick_rate_hz;
            self.warn("session", || {
                format!("SessionStart tick rate {r} is not usable")
            });
            return;
        }
        if let Some(r) = self.tick_rate {
            if r != ss.tick_rate_hz {
                self.counters.malformed += 1;
                let nr = ss.tick_rate_hz;
                self.warn("session", || {
                    format!(
                        "SessionStart declares {nr} ticks/s but the session runs at {r}; ignored"
                    )
                });
                return;
            }
        }
        let model_units: std::collections::HashSet<u32> =
            self.model.units().iter().copied().collect();
        let session: std::collections::HashSet<u32> = ss.units.iter().copied().collect();
        let missing = model_units.difference(&session).count();
        let extra = session.difference(&model_units).count();
        if !ss.units.is_empty() && (missing > 0 || extra > 0) {
            self.counters.model_mismatches += (missing + extra) as u64;
            tracing::warn!(
                model_units_not_in_session = missing,
                session_units_not_in_model = extra,
                "session and model units differ: spikes of unknown units are counted and ignored; missing units contribute silence"
            );
        }
        self.session_units = Some(ss.units.clone());
        if self.engine.is_none() {
            let mut c = self.config.clone();
            c.tick_rate_hz = ss.tick_rate_hz;
            match Engine::new(self.model.clone(), c.clone()) {
                Ok(e) => {
                    self.engine = Some(e);
                    self.config = c;
                    self.tick_rate = Some(ss.tick_rate_hz);
                    tracing::info!(tick_rate_hz = ss.tick_rate_hz, units = ss.units.len(), name = %ss.session_name, held = self.held.len(), "session started");
                    for body in std::mem::take(&mut self.held) {
                        self.apply(body);
                    }
                }
                Err(e) => {
                    self.counters.malformed += 1;
                    tracing::error!(error = %e, "cannot decode this session with the loaded model");
                }
            }
        }
    }

    fn reload(&mut self, model: Arc<Model>, path: String) -> ControlReply {
        let r = match self.engine.as_mut() {
            Some(e) => e.set_model(model.clone()),
            None => Ok(()),
        };
        match r {
            Ok(()) => {
                self.model = model;
                self.model_path = path.clone();
                self.chooser.resize(self.model.n_stimuli());
                if let Some(e) = &self.engine {
                    self.config = e.config().clone();
                }
                tracing::info!(model = %path, "model reloaded; applies to trials that open from now on");
                ControlReply {
                    ok: true,
                    error: String::new(),
                    body: Some(v1::control_reply::Body::Status(self.status())),
                }
            }
            Err(e) => ControlReply {
                ok: false,
                error: format!("{path}: {e}"),
                body: None,
            },
        }
    }

    fn apply_config(&mut self, c: EngineConfig) -> Result<(), String> {
        if let Some(e) = self.engine.as_mut() {
            e.set_config(c.clone()).map_err(|e| e.to_string())?;
        } else {
            // Validate against a throwaway engine at a nominal clock.
            let mut probe = c.clone();
            probe.tick_rate_hz = 1.0 / self.model.bin_width_s();
            Engine::new(self.model.clone(), probe).map_err(|e| e.to_string())?;
        }
        self.config = c;
        Ok(())
    }

    fn control(&mut self, body: control_request::Body) -> ControlReply {
        use control_request::Body as B;
        let ok = |body| ControlReply {
            ok: true,
            error: String::new(),
            body,
        };
        let err = |e: String| ControlReply {
            ok: false,
            error: e,
            body: None,
        };
        match body {
            B::Status(_) => ok(Some(v1::control_reply::Body::Status(self.status()))),
            B::SetPolicy(p) => {
                let mut c = self.config.clone();
                c.policy.threshold = p.threshold;
                c.policy.min_time_s = p.min_time_s;
                match self.apply_config(c) {
                    Ok(()) => ok(Some(v1::control_reply::Body::Status(self.status()))),
                    Err(e) => err(e),
                }
            }
            B::SetPrior(p) => {
                let mut c = self.config.clone();
                c.prior = if p.prior.is_empty() {
                    None
                } else {
                    Some(p.prior)
                };
                match self.apply_config(c) {
                    Ok(()) => ok(Some(v1::control_reply::Body::Status(self.status()))),
                    Err(e) => err(e),
                }
            }
            B::SetDecoder(d) => match auspex_engine::Decoder::parse(&d.decoder) {
                Some(dec) => {
                    let mut c = self.config.clone();
                    c.decoder = dec;
                    match self.apply_config(c) {
                        Ok(()) => ok(Some(v1::control_reply::Body::Status(self.status()))),
                        Err(e) => err(e),
                    }
                }
                None => err(format!("unknown decoder `{}`", d.decoder)),
            },
            B::NextStimulus(n) => {
                let ns = self.model.n_stimuli();
                self.chooser.resize(ns);
                let (idx, policy) = match n.policy.as_str() {
                    "" | "balanced-blocks" => (self.chooser.balanced(ns), "balanced-blocks"),
                    "least-certain" => (self.chooser.least_certain(ns), "least-certain"),
                    other => return err(format!("unknown next-stimulus policy `{other}`: use balanced-blocks or least-certain")),
                };
                ok(Some(v1::control_reply::Body::Next(v1::NextStimulusReply {
                    stimulus: self.model.stimuli()[idx as usize].clone(),
                    index: idx,
                    policy: policy.into(),
                })))
            }
            B::Reload(_) => err("reload is handled by the control task".into()),
        }
    }

    fn percentile(&self, p: f64) -> f64 {
        if self.latencies_us.is_empty() {
            return 0.0;
        }
        let mut v = self.latencies_us.clone();
        v.sort_by(|a, b| a.total_cmp(b));
        v[((v.len() - 1) as f64 * p).round() as usize]
    }

    fn health(&mut self) -> v1::Health {
        let ec = self
            .engine
            .as_ref()
            .map(|e| e.counters().clone())
            .unwrap_or_default();
        let st = &self.publisher.stats;
        let now = Instant::now();
        let dt = now.duration_since(self.last_rates.0).as_secs_f64();
        if dt >= 0.5 {
            self.rates = (
                (ec.spikes - self.last_rates.1) as f64 / dt,
                (ec.frames - self.last_rates.2) as f64 / dt,
            );
            self.last_rates = (now, ec.spikes, ec.frames);
        }
        v1::Health {
            uptime_s: self.started.elapsed().as_secs_f64(),
            messages_in: self.counters.messages_in,
            spikes_in: ec.spikes,
            frames_out: ec.frames,
            spikes_per_s: self.rates.0,
            frames_per_s: self.rates.1,
            late_spikes: ec.late_spikes,
            unknown_unit_spikes: ec.unknown_unit_spikes,
            malformed_messages: self.counters.malformed + self.counters.before_session,
            sequence_gaps: self.counters.sequence_gaps,
            watermark_backwards: ec.watermark_backwards,
            duplicate_trials: ec.duplicate_trials,
            stale_onsets: ec.stale_onsets,
            oversized_batches: self.counters.oversized,
            unknown_trials: ec.unknown_trials,
            unknown_stimuli: ec.unknown_stimuli + self.counters.unknown_stimuli,
            dropped_posterior: st.dropped_posterior.load(Ordering::Relaxed),
            dropped_other: st.dropped_other.load(Ordering::Relaxed),
            engine_backlog: self.backlog.len() as u64,
            update_p50_us: self.percentile(0.5),
            update_p99_us: self.percentile(0.99),
            watermark: self
                .engine
                .as_ref()
                .map(|e| e.watermark())
                .unwrap_or(i64::MIN),
            open_trials: self
                .engine
                .as_ref()
                .map(|e| e.open_trials().count() as u32)
                .unwrap_or(0),
            trials_completed: ec.trials_completed,
            decisions: ec.decisions,
            model_mismatches: self.counters.model_mismatches,
            recorder_errors: 0,
            unlabelled_trials_dropped: ec.labels_missing,
        }
    }

    fn publish_health(&mut self) {
        let h = self.health();
        self.publisher
            .publish(topic::HEALTH, outbound::Body::Health(h), false);
        self.last_health = Instant::now();
    }

    fn status(&mut self) -> v1::Status {
        let prior = match &self.config.prior {
            Some(p) => {
                let s: f64 = p.iter().sum();
                p.iter().map(|x| x / s).collect()
            }
            None => self.model.ln_prior().iter().map(|l| l.exp()).collect(),
        };
        v1::Status {
            version: env!("CARGO_PKG_VERSION").into(),
            model_path: self.model_path.clone(),
            stimuli: self.model.stimuli().to_vec(),
            units: self.model.units().to_vec(),
            threshold: self.config.policy.threshold,
            min_time_s: self.config.policy.min_time_s,
            prior,
            decoder: self.config.decoder.name().into(),
            tick_rate_hz: self.tick_rate.unwrap_or(0.0),
            senders: self
                .senders
                .iter()
                .map(|(k, s)| v1::SenderState {
                    sender: k.clone(),
                    last_seq: s.last_seq,
                    gaps: s.gaps,
                    ended: s.ended,
                    messages: s.messages,
                })
                .collect(),
            health: Some(self.health()),
            recording_path: self.recording_path.clone(),
            open_trials: self
                .engine
                .as_ref()
                .map(|e| e.open_trials().collect())
                .unwrap_or_default(),
            n_bins: self.model.n_bins() as u32,
            bin_width_s: self.model.bin_width_s(),
        }
    }
}
