//! find-tuning's next-stimulus choices (`auspex_modelling::design`). The engine thread hands
//! them the session's units and stimulus set, every labelled trial's window (each unit's spike
//! count), and every `next --policy find-tuning` request in the order it applies them, so a
//! choice depends only on the trials before it and the seed. Recording a trial and choosing are
//! cheap (a pass over units × stimuli and one top-two draw: tens of µs at 64 × 64), so they run on
//! the engine thread and `next` is answered as fast as the engine thread's own policies (a hop
//! to a thread of their own cost a wake-up and a millisecond tail on a busy two-core machine,
//! `BENCHMARKS.md`). What is costly — each unit's posterior probability of preferring each
//! stimulus, by posterior draws, for the reasons in replies and the status — runs on an
//! estimator thread at lowered priority (nice 10, as the learner) from the latest snapshot of
//! the design; nothing waits for it.
//!
//! Must not: touch the engine or the sockets; allocate past the memory budget (the design's
//! tables are units × stimuli).

use crate::recorder::RecorderMsg;
use auspex_modelling::design::{Choice, Constraints, Design, Policy, Why, SETTLED};
use auspex_proto::v1::{self, ControlReply};
use crossbeam_channel::Sender;
use std::collections::HashMap;
use std::sync::Condvar;
use std::sync::{Arc, Mutex};
use tokio::sync::oneshot;

/// Posterior draws per unit for the background estimate.
const DRAWS: usize = 200;
/// Units listed in the status (the rest are counted, not listed).
const STATUS_UNITS: usize = 512;

/// What the engine thread tells the steering thread.
pub enum SteerMsg {
    /// A session started: its units, and its stimulus set if known (`from` says whence).
    Session {
        /// Units declared at the start.
        units: Vec<u32>,
        /// The stimulus set (empty: not known yet).
        stimuli: Vec<String>,
        /// "session start", "daemon setting" or "model".
        from: &'static str,
    },
    /// A model now in use names these stimuli (taken when no set was declared).
    ModelStimuli(Vec<String>),
    /// The session's set, declared by a later start message (taken when none is known yet).
    Declared(Vec<String>),
    /// Units added part-way.
    Units(Vec<u32>),
    /// The session ended.
    End,
    /// A `next --policy find-tuning` or `improve-decoding` request.
    Next {
        /// Where the reply goes.
        reply: oneshot::Sender<ControlReply>,
        /// Its place among the session's requests (0: asked outside a session).
        ordinal: u64,
        /// Which policy.
        policy: Policy,
    },
}

/// The steered policies the engine thread hands to [`Steering`] (the others are answered where
/// they were before): find-tuning and improve-decoding.
pub(crate) fn steered(policy: &str) -> Option<Policy> {
    match policy.trim() {
        "find-tuning" => Some(Policy::FindTuning),
        "improve-decoding" => Some(Policy::ImproveDecoding),
        _ => None,
    }
}

/// The engine thread's find-tuning: its design, and the estimator thread's handle.
pub struct Steering {
    worker: Worker,
    estimator: Option<std::thread::JoinHandle<()>>,
}

/// The latest snapshot for the estimator (a newer one replaces one not yet taken), and whether
/// the estimator should end.
#[derive(Default)]
struct Slot {
    latest: Option<Snapshot>,
    closed: bool,
    /// Snapshots the estimator is done with, freed by the engine thread that allocated them:
    /// a free of another thread's block takes that thread's allocator arena lock, and a
    /// low-priority thread preempted while holding it would hold the engine thread up.
    spent: Vec<Snapshot>,
}

type SnapshotSlot = Arc<(Mutex<Slot>, Condvar)>;

impl Steering {
    /// Starts the estimator thread.
    pub fn spawn(
        constraints: Constraints,
        seed: u64,
        declared: Vec<String>,
        recorder: Option<Sender<RecorderMsg>>,
    ) -> std::io::Result<Self> {
        let estimates = Arc::new(Mutex::new(Estimates::default()));
        let slot: SnapshotSlot = Arc::new((Mutex::new(Slot::default()), Condvar::new()));
        let (est, from) = (estimates.clone(), slot.clone());
        let estimator = std::thread::Builder::new()
            .name("auspex-steer-est".into())
            .spawn(move || estimate(from, est, seed))?;
        Ok(Steering {
            worker: Worker {
                constraints,
                seed,
                declared,
                recorder,
                session: None,
                estimates,
                slot,
                epoch: 0,
                pending: None,
            },
            estimator: Some(estimator),
        })
    }

    /// Records a labelled trial's window (see [`SteerMsg`] for the other inputs).
    pub fn trial(&mut self, stimulus: &str, spikes: &[(i64, u32)]) {
        self.worker.trial(stimulus, spikes);
        self.worker.snapshot();
    }

    /// Applies one message (a request is answered at once).
    pub fn send(&mut self, msg: SteerMsg) {
        let changed = !matches!(msg, SteerMsg::Next { .. } | SteerMsg::End);
        self.worker.handle(msg);
        if changed {
            self.worker.snapshot();
        }
    }

    /// find-tuning's state for the status: as of the last message the steering thread handled,
    /// each unit's preference and settledness as of the estimator's latest figures.
    pub fn status(&self) -> Option<v1::SteeringState> {
        let (epoch, mut st) = self.worker.state()?;
        let e = self.worker.estimates.lock().ok()?;
        if e.epoch == epoch {
            for (u, x) in st.units.iter_mut().enumerate() {
                if let Some(Some(est)) = e.units.get(u) {
                    x.preferred = st.stimuli.get(est.mode).cloned().unwrap_or_default();
                    x.settled = est.settled;
                }
            }
        }
        Some(st)
    }
}

impl Drop for Steering {
    fn drop(&mut self) {
        let (lock, cv) = &*self.worker.slot;
        if let Ok(mut g) = lock.lock() {
            g.closed = true;
        }
        cv.notify_all();
        if let Some(j) = self.estimator.take() {
            let _ = j.join();
        }
    }
}

/// One session's design.
struct SessionDesign {
    stimuli: Vec<String>,
    from: &'static str,
    units: Vec<u32>,
    index: HashMap<u32, usize>,
    /// Trials recorded per unit (units added part-way start at 0).
    unit_trials: Vec<u64>,
    /// None: the set is not known yet, or it is over the memory budget (`refused` says why).
    design: Option<Design>,
    /// improve-decoding's design (the same trials; its own choices and constraints' history).
    decoding: Option<Design>,
    /// improve-decoding has been asked this session.
    decoding_asked: bool,
    refused: Option<String>,
    trials: u64,
    choices: u64,
    unknown_stimuli: u64,
    last: Option<v1::NextStimulusReply>,
    /// Trials recorded before the stimulus set was known, replayed into the design once it is.
    early: std::collections::VecDeque<(String, Vec<(usize, u32)>)>,
}

/// What the estimator is given: the design as of `trials` trials of session `epoch`.
struct Snapshot {
    epoch: u64,
    trials: u64,
    design: Design,
    /// improve-decoding has been asked this session: its gains are worth computing ahead.
    decoding: bool,
}

/// The estimator's latest figures per unit, for session `epoch`.
#[derive(Default)]
struct Estimates {
    epoch: u64,
    units: Vec<Option<UnitEstimate>>,
    /// improve-decoding's gains as of this many trials — (trials, expected accuracy, gains) —
    /// for the latest two snapshots: a choice after trial n uses those as of n − 1
    /// ([`Design::decoding_gains_before_last`]), which the estimator has had a whole trial to
    /// compute; the latest are kept for the choice after the next trial.
    gains: Vec<(u64, f64, Vec<f64>)>,
}

/// One unit's estimate: each stimulus's probability of being its preferred one, the most
/// probable, the share within one neighbour of it, as of `at_trials` trials.
#[derive(Clone)]
struct UnitEstimate {
    shares: Vec<f64>,
    mode: usize,
    settled: f64,
    at_trials: u64,
}

/// The estimator thread: for the latest snapshot, one unit at a time, round the units from
/// where the last snapshot's pass stopped, going on with the newer snapshot as soon as one
/// comes (so under a fast stream every unit is still brought up to date in turn). Figures are
/// seeded by the trial count and unit: a function of the data.
fn estimate(slot: SnapshotSlot, out: Arc<Mutex<Estimates>>, seed: u64) {
    crate::learner::lower_priority();
    let (lock, cv) = &*slot;
    let take = |wait: bool| -> Result<Option<Snapshot>, ()> {
        let mut g = lock.lock().map_err(|_| ())?;
        while wait && g.latest.is_none() && !g.closed {
            g = cv.wait(g).map_err(|_| ())?;
        }
        if g.closed {
            return Err(());
        }
        Ok(g.latest.take())
    };
    let (mut cursor, mut epoch) = (0usize, 0u64);
    let mut next: Option<Snapshot> = None;
    loop {
        let snap = match next.take() {
            Some(s) => s,
            None => match take(true) {
                Ok(Some(s)) => s,
                _ => return,
            },
        };
        let n = snap.design.n_units();
        if snap.epoch != epoch {
            (cursor, epoch) = (0, snap.epoch);
        }
        // improve-decoding's gains first (a function of the counts alone, which both designs
        // share): a request after the next trial then finds them ready instead of computing
        // them on the engine thread. Only once the session has asked for it.
        if snap.decoding {
            let (now, gains) = snap.design.decoding_gains();
            let mut e = out.lock().expect("steering estimates");
            if e.epoch != snap.epoch {
                e.epoch = snap.epoch;
                e.units.clear();
                e.gains.clear();
            }
            e.gains
                .retain(|g| g.0 + 1 >= snap.trials && g.0 != snap.trials);
            e.gains.push((snap.trials, now, gains));
        }
        for k in 0..n {
            let u = (cursor + k) % n;
            match take(false) {
                Ok(Some(newer)) => {
                    next = Some(newer);
                    break;
                }
                Ok(None) => {}
                Err(()) => return,
            }
            let seed =
                seed ^ snap.trials.wrapping_mul(0x9E37_79B9) ^ (u as u64).wrapping_mul(0x85EB_CA6B);
            let (shares, (mode, settled)) = snap.design.preferred_shares_seeded(u, DRAWS, seed);
            let mut e = out.lock().expect("steering estimates");
            if e.epoch != snap.epoch {
                e.epoch = snap.epoch;
                e.units.clear();
            }
            if e.units.len() < snap.design.n_units() {
                e.units.resize(snap.design.n_units(), None);
            }
            e.units[u] = Some(UnitEstimate {
                shares,
                mode,
                settled,
                at_trials: snap.trials,
            });
            cursor = (u + 1) % n.max(1);
        }
        match lock.lock() {
            Ok(mut g) => g.spent.push(snap),
            Err(_) => return,
        }
    }
}

struct Worker {
    constraints: Constraints,
    seed: u64,
    declared: Vec<String>,
    recorder: Option<Sender<RecorderMsg>>,
    session: Option<SessionDesign>,
    estimates: Arc<Mutex<Estimates>>,
    slot: SnapshotSlot,
    /// Sessions started (the estimates' epoch).
    epoch: u64,
    /// A snapshot not yet handed over because the estimator held the slot at that moment.
    pending: Option<Snapshot>,
}

impl Worker {
    /// Hands the estimator the design as it now is (in place of one it has not started).
    fn snapshot(&mut self) {
        let Some(s) = self.session.as_ref() else {
            return;
        };
        let Some(d) = s.design.as_ref() else { return };
        let snap = Snapshot {
            epoch: self.epoch,
            trials: s.trials,
            design: d.clone(),
            decoding: s.decoding_asked,
        };
        self.pending = Some(snap);
        self.hand_over();
    }

    /// Hands over the pending snapshot if the slot is free this instant. Never waits: the
    /// estimator runs at lowered priority, and waiting for a lock it holds could hold this
    /// (real-time) thread up for a scheduler's time slice; a snapshot not taken yet is
    /// replaced, one not handed over is tried again at the next trial or request.
    fn hand_over(&mut self) {
        let (lock, cv) = &*self.slot;
        if let Ok(mut g) = lock.try_lock() {
            let spent = std::mem::take(&mut g.spent);
            if let Some(snap) = self.pending.take() {
                // An untaken one it replaces is this thread's own allocation, freed here.
                let _old = g.latest.replace(snap);
                drop(g);
                cv.notify_one();
            }
            drop(spent);
        }
    }

    /// The estimates of the current session (none yet: empty).
    fn current_estimates(&self) -> Vec<Option<UnitEstimate>> {
        let e = self.estimates.lock().expect("steering estimates");
        if e.epoch == self.epoch {
            e.units.clone()
        } else {
            Vec::new()
        }
    }

    fn handle(&mut self, msg: SteerMsg) {
        match msg {
            SteerMsg::Session {
                units,
                stimuli,
                from,
            } => {
                let (stimuli, from) = if !stimuli.is_empty() {
                    (stimuli, from)
                } else if !self.declared.is_empty() {
                    (self.declared.clone(), "daemon setting")
                } else {
                    (Vec::new(), "")
                };
                let index = units.iter().enumerate().map(|(i, &u)| (u, i)).collect();
                self.epoch += 1;
                let mut s = SessionDesign {
                    stimuli: Vec::new(),
                    from: "",
                    unit_trials: vec![0; units.len()],
                    units,
                    index,
                    design: None,
                    decoding: None,
                    decoding_asked: false,
                    refused: None,
                    trials: 0,
                    choices: 0,
                    unknown_stimuli: 0,
                    last: None,
                    early: Default::default(),
                };
                if !stimuli.is_empty() {
                    self.set_stimuli(&mut s, stimuli, from);
                }
                self.session = Some(s);
            }
            SteerMsg::ModelStimuli(stimuli) => self.take_set(stimuli, "model"),
            SteerMsg::Declared(stimuli) => self.take_set(stimuli, "session start"),
            SteerMsg::Units(new) => {
                if let Some(s) = self.session.as_mut() {
                    let fresh: Vec<u32> = new
                        .into_iter()
                        .filter(|u| !s.index.contains_key(u))
                        .collect();
                    for &u in &fresh {
                        s.index.insert(u, s.units.len());
                        s.units.push(u);
                        s.unit_trials.push(0);
                    }
                    let ns = s.stimuli.len();
                    let over = s.design.is_some() && Self::check(s.units.len(), ns).is_err();
                    if over {
                        s.refused = Self::check(s.units.len(), ns).err();
                        s.design = None;
                        s.decoding = None;
                    } else {
                        for d in s.design.iter_mut().chain(s.decoding.iter_mut()) {
                            d.add_units(fresh.len());
                        }
                    }
                }
            }
            SteerMsg::End => self.session = None,
            SteerMsg::Next {
                reply,
                ordinal,
                policy,
            } => {
                let r = self.next(ordinal, policy);
                let _ = reply.send(r);
            }
        }
    }

    /// A stimulus set from a model or a later start message, taken when none is known yet.
    fn take_set(&mut self, stimuli: Vec<String>, from: &'static str) {
        if let Some(mut s) = self.session.take() {
            if s.stimuli.is_empty() && !stimuli.is_empty() {
                self.set_stimuli(&mut s, stimuli, from);
            }
            self.session = Some(s);
        }
    }

    /// A labelled trial's window: its stimulus and spikes (tick − onset, unit), counted per
    /// unit where they lie (no copy of the window).
    fn trial(&mut self, stimulus: &str, spikes: &[(i64, u32)]) {
        let Some(s) = self.session.as_mut() else {
            return;
        };
        let mut counts: HashMap<usize, u32> = HashMap::new();
        for (_, u) in spikes {
            if let Some(&i) = s.index.get(u) {
                *counts.entry(i).or_insert(0) += 1;
            }
        }
        let mut sparse: Vec<(usize, u32)> = counts.into_iter().collect();
        sparse.sort_unstable();
        if s.stimuli.is_empty() {
            // Kept until the set is known (bounded: a session that never names its set keeps
            // the latest trials only).
            if s.early.len() == 100_000 {
                s.early.pop_front();
            }
            s.early.push_back((stimulus.to_string(), sparse));
        } else {
            Self::record(s, stimulus, &sparse);
        }
    }

    fn check(nu: usize, ns: usize) -> Result<(), String> {
        auspex_engine::budget::check(
            "find-tuning's tables",
            || format!("{nu} units × {ns} stimuli"),
            (nu as u128) * (ns as u128) * 128,
        )
        .map_err(|e| e.to_string())
    }

    fn set_stimuli(&self, s: &mut SessionDesign, stimuli: Vec<String>, from: &'static str) {
        let ns = stimuli.len();
        s.stimuli = stimuli;
        s.from = from;
        if let Err(e) = self.constraints.check(ns) {
            s.refused = Some(format!("the stimulus set cannot be steered: {e}"));
            return;
        }
        if let Err(e) = Self::check(s.units.len(), ns) {
            s.refused = Some(e);
            return;
        }
        s.design = Some(Design::new(
            Policy::FindTuning,
            self.constraints,
            s.units.len(),
            ns,
            self.seed,
        ));
        s.decoding = Some(Design::new(
            Policy::ImproveDecoding,
            self.constraints,
            s.units.len(),
            ns,
            self.seed,
        ));
        for (stimulus, sparse) in std::mem::take(&mut s.early) {
            Self::record(s, &stimulus, &sparse);
        }
    }

    fn record(s: &mut SessionDesign, stimulus: &str, sparse: &[(usize, u32)]) {
        let Some(k) = s.stimuli.iter().position(|x| x == stimulus) else {
            s.unknown_stimuli += 1;
            return;
        };
        if s.design.is_none() {
            return;
        }
        let mut counts = vec![0u32; s.units.len()];
        for &(i, c) in sparse {
            counts[i] = c;
        }
        for d in s.design.iter_mut().chain(s.decoding.iter_mut()) {
            d.record(k as u32, &counts);
        }
        for t in &mut s.unit_trials {
            *t += 1;
        }
        s.trials += 1;
    }

    fn next(&mut self, ordinal: u64, policy: Policy) -> ControlReply {
        self.hand_over();
        let (policy_name, name) = (policy.name(), policy.name());
        let err = |e: String| ControlReply {
            ok: false,
            error: e,
            note: String::new(),
            body: None,
        };
        let Some(s) = self.session.as_mut() else {
            return err(format!(
                "{name}: no session is running (it starts with the session's SessionStart)"
            ));
        };
        if let Some(why) = &s.refused {
            return err(format!("{name}: {why}"));
        }
        s.decoding_asked |= policy == Policy::ImproveDecoding;
        let slot = if policy == Policy::ImproveDecoding {
            &mut s.decoding
        } else {
            &mut s.design
        };
        let Some(d) = slot.as_mut() else {
            return err(format!("{name}: no stimulus set to choose from yet — declare it in the session's start message (SessionStart.stimuli), start the daemon with --stimuli A,B,…, or load a model"));
        };
        if s.units.is_empty() {
            return err(format!("{name}: the session declared no units (SessionStart.units), so there are no counts to learn from"));
        }
        // improve-decoding's gains as of every trial but the last, if the estimator has them
        // (else the choice computes them here: the same numbers either way).
        let before_last = s.trials.saturating_sub(1);
        let ready = (policy == Policy::ImproveDecoding)
            .then(|| match self.estimates.try_lock() {
                Ok(e) if e.epoch == self.epoch => e
                    .gains
                    .iter()
                    .find(|g| g.0 == before_last)
                    .map(|g| (g.1, g.2.clone())),
                _ => None,
            })
            .flatten();
        let c: Choice = d.choose_explained_given(ready);
        s.choices += 1;
        // Only the served unit's figures and the count of settled units (no copy of the rest).
        // The background figures are read only if the estimator is not writing them this
        // instant (never waiting for a lower-priority thread); else the reply goes without.
        let (estimate, settled) = match self.estimates.try_lock() {
            Ok(e) if e.epoch == self.epoch => (
                c.unit.and_then(|u| e.units.get(u).cloned().flatten()),
                e.units
                    .iter()
                    .filter(|x| x.as_ref().is_some_and(|x| x.settled >= SETTLED))
                    .count() as u32,
            ),
            _ => (None, 0),
        };
        let name = |i: usize| s.stimuli.get(i).cloned().unwrap_or_default();
        let (reason, p, runner, runner_p) = match (c.why, c.unit) {
            (Why::WarmUp, _) => (
                format!(
                    "warm-up: every stimulus once per block for the first {} block(s)",
                    self.constraints.warmup_blocks
                ),
                f64::NAN,
                String::new(),
                f64::NAN,
            ),
            (Why::Block, _) => ("balanced block".into(), f64::NAN, String::new(), f64::NAN),
            (Why::Owed, _) => (
                format!(
                    "owed: below its minimum share ({} of an equal share of the trials)",
                    self.constraints.min_share
                ),
                f64::NAN,
                String::new(),
                f64::NAN,
            ),
            (Why::RunLimit { instead_of }, _) => (
                format!(
                    "run limit: {} was chosen but already shown {} times in a row; the least shown other instead",
                    auspex_engine::data::printable(&name(instead_of as usize)),
                    self.constraints.max_run
                ),
                f64::NAN,
                String::new(),
                f64::NAN,
            ),
            (Why::TopTwo { first }, Some(u)) => {
                let what = if first {
                    "its posterior draw's best"
                } else {
                    "the challenger to its draw's best"
                };
                let (p, runner, runner_p) = match &estimate {
                    Some(UnitEstimate { shares, .. }) => {
                        let k = c.stimulus as usize;
                        let r = (0..shares.len())
                            .filter(|&x| x != k)
                            .max_by(|&a, &b| shares[a].total_cmp(&shares[b]));
                        (
                            shares[k],
                            r.map(name).unwrap_or_default(),
                            r.map_or(f64::NAN, |r| shares[r]),
                        )
                    }
                    None => (f64::NAN, String::new(), f64::NAN),
                };
                (
                    format!(
                        "top-two draw for unit {} (least clear, margin {:.2} SD): {what}",
                        s.units[u], c.margin
                    ),
                    p,
                    runner,
                    runner_p,
                )
            }
            (Why::TopTwo { .. }, None) => ("top-two draw".into(), f64::NAN, String::new(), f64::NAN),
            (Why::Accuracy { gain, now, runner_up }, _) => (
                format!(
                    "largest expected gain in decoding accuracy: {:.1}% as of trial {before_last}, +{:.3} points with this stimulus (runner-up {} +{:.3})",
                    100.0 * now,
                    100.0 * gain,
                    auspex_engine::data::printable(&name(runner_up.0 as usize)),
                    100.0 * runner_up.1
                ),
                f64::NAN,
                name(runner_up.0 as usize),
                f64::NAN,
            ),
        };
        let (accuracy, gain, runner_gain) = match c.why {
            Why::Accuracy {
                gain,
                now,
                runner_up,
            } => (now, gain, runner_up.1),
            _ => (f64::NAN, f64::NAN, f64::NAN),
        };
        let as_of = estimate.as_ref().map_or(0, |e| e.at_trials);
        let reply = v1::NextStimulusReply {
            stimulus: name(c.stimulus as usize),
            index: c.stimulus,
            policy: policy_name.into(),
            reason,
            serves_unit: c.unit.is_some(),
            unit: c.unit.map_or(0, |u| s.units[u]),
            margin: c.margin,
            p_preferred: p,
            runner_up: runner,
            runner_up_p_preferred: runner_p,
            as_of_trials: as_of,
            units_settled: settled,
            units: s.units.len() as u32,
            choice: s.choices,
            expected_accuracy: accuracy,
            expected_gain: gain,
            runner_up_gain: runner_gain,
        };
        s.last = Some(reply.clone());
        if let Some(r) = &self.recorder {
            let _ = r.send(RecorderMsg::Record(v1::SessionRecord {
                received_unix_ns: crate::clock::now_ns(),
                choice: Some(Box::new(v1::StimulusChoice {
                    policy: policy_name.into(),
                    reply: Some(reply.clone()),
                    ordinal,
                })),
                ..Default::default()
            }));
        }
        ControlReply {
            ok: true,
            error: String::new(),
            note: String::new(),
            body: Some(v1::control_reply::Body::Next(reply)),
        }
    }

    /// The state the status shows, with the session's epoch (None between sessions): built
    /// when asked, so nothing is spent on it per trial or per choice.
    fn state(&self) -> Option<(u64, v1::SteeringState)> {
        let est = self.current_estimates();
        let st = self.session.as_ref().map(|s| v1::SteeringState {
            stimuli: s.stimuli.clone(),
            stimuli_from: s.from.into(),
            trials: s.trials,
            units: (0..s.units.len().min(STATUS_UNITS))
                .map(|u| {
                    let (preferred, settled) =
                        est.get(u)
                            .cloned()
                            .flatten()
                            .map_or((String::new(), 0.0), |e| {
                                (
                                    s.stimuli.get(e.mode).cloned().unwrap_or_default(),
                                    e.settled,
                                )
                            });
                    v1::UnitTuningState {
                        unit: s.units[u],
                        preferred,
                        settled,
                        margin: s.design.as_ref().map_or(f64::NAN, |d| d.margin(u)),
                        trials: s.unit_trials[u],
                    }
                })
                .collect(),
            last: s.last.clone(),
            choices: s.choices,
            unknown_stimuli: s.unknown_stimuli,
            warmup_blocks: self.constraints.warmup_blocks as u32,
            min_share: self.constraints.min_share,
            max_run: self.constraints.max_run as u32,
            seed: self.seed,
        });
        st.map(|st| (self.epoch, st))
    }
}
