//! The steering thread: find-tuning's next-stimulus choices (`auspex_modelling::design`), off
//! the engine thread. The engine thread hands it the session's units and stimulus set, every
//! labelled trial's window (each unit's spike count), and every `next --policy find-tuning`
//! request in the order it applies them, so a choice depends only on the trials before it and
//! the seed. Between messages it estimates, one unit at a time, each unit's posterior
//! probability of preferring each stimulus (for the reasons in replies and the status; the
//! choices never wait for it).
//!
//! Must not: touch the engine or the sockets; allocate past the memory budget (the design's
//! tables are units × stimuli).

use crate::recorder::RecorderMsg;
use auspex_modelling::design::{Choice, Constraints, Design, Policy, Why, SETTLED};
use auspex_proto::v1::{self, ControlReply};
use crossbeam_channel::{Receiver, Sender, TryRecvError};
use std::collections::HashMap;
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
    /// Units added part-way.
    Units(Vec<u32>),
    /// A labelled trial's window: its stimulus and spikes (tick − onset, unit).
    Trial {
        /// Presented stimulus.
        stimulus: String,
        /// Spikes in the window.
        spikes: Vec<(i64, u32)>,
    },
    /// The session ended.
    End,
    /// A `next --policy find-tuning` request.
    Next {
        /// Where the reply goes.
        reply: oneshot::Sender<ControlReply>,
    },
}

/// The engine thread's handle.
pub struct Steering {
    /// Inbox.
    pub tx: Sender<SteerMsg>,
    /// The state the status shows (None before the first session with a stimulus set).
    pub state: Arc<Mutex<Option<v1::SteeringState>>>,
    join: Option<std::thread::JoinHandle<()>>,
}

impl Steering {
    /// Starts the thread.
    pub fn spawn(
        constraints: Constraints,
        seed: u64,
        declared: Vec<String>,
        recorder: Option<Sender<RecorderMsg>>,
    ) -> std::io::Result<Self> {
        let (tx, rx) = crossbeam_channel::unbounded();
        let state = Arc::new(Mutex::new(None));
        let mut w = Worker {
            constraints,
            seed,
            declared,
            recorder,
            state: state.clone(),
            session: None,
        };
        let join = std::thread::Builder::new()
            .name("auspex-steering".into())
            .spawn(move || w.run(rx))?;
        Ok(Steering {
            tx,
            state,
            join: Some(join),
        })
    }
}

impl Drop for Steering {
    fn drop(&mut self) {
        let (tx, _) = crossbeam_channel::bounded(0);
        drop(std::mem::replace(&mut self.tx, tx));
        if let Some(j) = self.join.take() {
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
    refused: Option<String>,
    /// Per unit: (each stimulus's probability of being preferred, mode, settled share), as of
    /// `estimated_at[u]` trials.
    estimate: Vec<Option<(Vec<f64>, usize, f64)>>,
    estimated_at: Vec<u64>,
    /// Trials not yet in an estimate: the next unit to estimate.
    cursor: usize,
    trials: u64,
    choices: u64,
    unknown_stimuli: u64,
    last: Option<v1::NextStimulusReply>,
    /// Trials recorded before the stimulus set was known, replayed into the design once it is.
    early: Vec<(String, Vec<(usize, u32)>)>,
}

struct Worker {
    constraints: Constraints,
    seed: u64,
    declared: Vec<String>,
    recorder: Option<Sender<RecorderMsg>>,
    state: Arc<Mutex<Option<v1::SteeringState>>>,
    session: Option<SessionDesign>,
}

impl Worker {
    fn run(&mut self, rx: Receiver<SteerMsg>) {
        loop {
            // Estimate one unit between messages; block only when every estimate is current.
            let msg = if self.estimate_one() {
                match rx.try_recv() {
                    Ok(m) => m,
                    Err(TryRecvError::Empty) => continue,
                    Err(TryRecvError::Disconnected) => return,
                }
            } else {
                match rx.recv() {
                    Ok(m) => m,
                    Err(_) => return,
                }
            };
            self.handle(msg);
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
                let mut s = SessionDesign {
                    stimuli: Vec::new(),
                    from: "",
                    unit_trials: vec![0; units.len()],
                    estimate: vec![None; units.len()],
                    estimated_at: vec![0; units.len()],
                    units,
                    index,
                    design: None,
                    refused: None,
                    cursor: 0,
                    trials: 0,
                    choices: 0,
                    unknown_stimuli: 0,
                    last: None,
                    early: Vec::new(),
                };
                if !stimuli.is_empty() {
                    self.set_stimuli(&mut s, stimuli, from);
                }
                self.session = Some(s);
            }
            SteerMsg::ModelStimuli(stimuli) => {
                if let Some(mut s) = self.session.take() {
                    if s.stimuli.is_empty() && !stimuli.is_empty() {
                        self.set_stimuli(&mut s, stimuli, "model");
                    }
                    self.session = Some(s);
                }
            }
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
                        s.estimate.push(None);
                        s.estimated_at.push(0);
                    }
                    let ns = s.stimuli.len();
                    let over = s.design.is_some() && Self::check(s.units.len(), ns).is_err();
                    if over {
                        s.refused = Self::check(s.units.len(), ns).err();
                        s.design = None;
                    } else if let Some(d) = s.design.as_mut() {
                        d.add_units(fresh.len());
                    }
                }
            }
            SteerMsg::Trial { stimulus, spikes } => {
                let Some(s) = self.session.as_mut() else {
                    return;
                };
                let mut counts: HashMap<usize, u32> = HashMap::new();
                for (_, u) in spikes {
                    if let Some(&i) = s.index.get(&u) {
                        *counts.entry(i).or_insert(0) += 1;
                    }
                }
                let mut sparse: Vec<(usize, u32)> = counts.into_iter().collect();
                sparse.sort_unstable();
                if s.stimuli.is_empty() {
                    // Kept until the set is known (bounded: a session that never names its
                    // set keeps the latest trials only).
                    if s.early.len() == 100_000 {
                        s.early.remove(0);
                    }
                    s.early.push((stimulus, sparse));
                } else {
                    Self::record(s, &stimulus, &sparse);
                }
            }
            SteerMsg::End => {
                self.session = None;
                *self.state.lock().expect("steering state") = None;
                return;
            }
            SteerMsg::Next { reply } => {
                let r = self.next();
                let _ = reply.send(r);
            }
        }
        self.publish();
    }

    fn check(nu: usize, ns: usize) -> Result<(), String> {
        auspex_engine::budget::check(
            "find-tuning's tables",
            || format!("{nu} units × {ns} stimuli"),
            (nu as u128) * (ns as u128) * 64,
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
        for (stimulus, sparse) in std::mem::take(&mut s.early) {
            Self::record(s, &stimulus, &sparse);
        }
    }

    fn record(s: &mut SessionDesign, stimulus: &str, sparse: &[(usize, u32)]) {
        let Some(k) = s.stimuli.iter().position(|x| x == stimulus) else {
            s.unknown_stimuli += 1;
            return;
        };
        let Some(d) = s.design.as_mut() else { return };
        let mut counts = vec![0u32; s.units.len()];
        for &(i, c) in sparse {
            counts[i] = c;
        }
        d.record(k as u32, &counts);
        for t in &mut s.unit_trials {
            *t += 1;
        }
        s.trials += 1;
        s.cursor = 0;
    }

    /// Brings one unit's estimate up to date; false when all are.
    fn estimate_one(&mut self) -> bool {
        let Some(s) = self.session.as_mut() else {
            return false;
        };
        let Some(d) = s.design.as_ref() else {
            return false;
        };
        while s.cursor < s.units.len()
            && s.estimated_at[s.cursor] == s.trials
            && s.estimate[s.cursor].is_some()
        {
            s.cursor += 1;
        }
        if s.cursor >= s.units.len() {
            return false;
        }
        let u = s.cursor;
        // Seeded by the trial count and unit: the estimate is a function of the data.
        let seed =
            self.seed ^ s.trials.wrapping_mul(0x9E37_79B9) ^ (u as u64).wrapping_mul(0x85EB_CA6B);
        let (shares, (mode, settled)) = d.preferred_shares_seeded(u, DRAWS, seed);
        s.estimate[u] = Some((shares, mode, settled));
        s.estimated_at[u] = s.trials;
        s.cursor += 1;
        if s.cursor >= s.units.len() {
            self.publish();
        }
        true
    }

    fn next(&mut self) -> ControlReply {
        let err = |e: String| ControlReply {
            ok: false,
            error: e,
            note: String::new(),
            body: None,
        };
        let Some(s) = self.session.as_mut() else {
            return err(
                "find-tuning: no session is running (it starts with the session's SessionStart)"
                    .into(),
            );
        };
        if let Some(why) = &s.refused {
            return err(format!("find-tuning: {why}"));
        }
        let Some(d) = s.design.as_mut() else {
            return err("find-tuning: no stimulus set to choose from yet — declare it in the session's start message (SessionStart.stimuli), start the daemon with --stimuli A,B,…, or load a model".into());
        };
        if s.units.is_empty() {
            return err("find-tuning: the session declared no units (SessionStart.units), so there is no tuning to learn".into());
        }
        let c: Choice = d.choose_explained();
        s.choices += 1;
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
                let (p, runner, runner_p) = match &s.estimate[u] {
                    Some((shares, _, _)) => {
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
        };
        let settled = s
            .estimate
            .iter()
            .filter(|e| e.as_ref().is_some_and(|e| e.2 >= SETTLED))
            .count() as u32;
        let as_of = c.unit.map_or(0, |u| {
            if s.estimate[u].is_some() {
                s.estimated_at[u]
            } else {
                0
            }
        });
        let reply = v1::NextStimulusReply {
            stimulus: name(c.stimulus as usize),
            index: c.stimulus,
            policy: Policy::FindTuning.name().into(),
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
        };
        s.last = Some(reply.clone());
        if let Some(r) = &self.recorder {
            let _ = r.send(RecorderMsg::Record(v1::SessionRecord {
                received_unix_ns: crate::clock::now_ns(),
                choice: Some(Box::new(v1::StimulusChoice {
                    policy: Policy::FindTuning.name().into(),
                    reply: Some(reply.clone()),
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

    fn publish(&self) {
        let st = self.session.as_ref().map(|s| v1::SteeringState {
            stimuli: s.stimuli.clone(),
            stimuli_from: s.from.into(),
            trials: s.trials,
            units: (0..s.units.len().min(STATUS_UNITS))
                .map(|u| {
                    let (preferred, settled) =
                        s.estimate[u].as_ref().map_or((String::new(), 0.0), |e| {
                            (s.stimuli.get(e.1).cloned().unwrap_or_default(), e.2)
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
        *self.state.lock().expect("steering state") = st;
    }
}
