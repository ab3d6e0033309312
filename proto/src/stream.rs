//! One inbound message applied to the engine and to the learning window collector — the single
//! rule shared by the engine thread and by offline prequential replay of a recording
//! (`auspex decode --prequential --session`), so both make the same engine calls in the same
//! order and give bit-identical frames.
//!
//! Also remembers which stimulus names each open trial's model has: a learned or reloaded model
//! may order stimuli differently, and a trial is labelled and reported in its own model's order.
//!
//! Callers call [`remember_onset`] before [`apply_body`] for every message.
//!
//! Must not: log, count daemon-level figures, or touch sockets (callers do, from [`Applied`]).

use crate::v1::inbound::Body;
use auspex_engine::engine::{Engine, EngineError, EngineSink};
use auspex_modelling::learn::{TrialWindow, WindowCollector};
use std::collections::{HashMap, VecDeque};
use std::sync::Arc;

/// Trials whose stimulus names are remembered (open trials plus recently ended ones that may
/// still get a label).
const REMEMBERED_TRIALS: usize = 4096;

/// Stimulus names per trial, in the order of the model the trial opened with.
#[derive(Default)]
pub struct TrialStimuli {
    map: HashMap<u64, Arc<[String]>>,
    order: VecDeque<u64>,
}

impl TrialStimuli {
    /// Remembers a trial's names.
    pub fn insert(&mut self, trial: u64, names: Arc<[String]>) {
        if self.map.insert(trial, names).is_none() {
            self.order.push_back(trial);
            if self.order.len() > REMEMBERED_TRIALS {
                if let Some(old) = self.order.pop_front() {
                    self.map.remove(&old);
                }
            }
        }
    }
    /// A trial's names, if remembered.
    pub fn get(&self, trial: u64) -> Option<&Arc<[String]>> {
        self.map.get(&trial)
    }
    /// Forgets everything (a new session).
    pub fn clear(&mut self) {
        self.map.clear();
        self.order.clear();
    }
}

/// What applying a message found that the caller may count or log.
#[derive(Debug, Default)]
pub struct Applied {
    /// Engine refusals (at most a few per message).
    pub errors: Vec<EngineError>,
    /// A stimulus name the trial's model does not have (onset or label), with the trial.
    pub unknown_stimulus: Option<(u64, String)>,
    /// Spike batch with unequal unit and tick arrays (ignored whole).
    pub mismatched_batch: Option<(usize, usize)>,
}

/// Remembers the names a trial opens with, before the engine opens it (the engine may publish
/// frames and a decision for it at once). A trial id already remembered keeps its names.
pub fn remember_onset(names: &mut TrialStimuli, body: &Body, current: &Arc<[String]>) {
    if let Body::Onset(o) = body {
        if names.get(o.trial).is_none() {
            names.insert(o.trial, current.clone());
        }
    }
}

/// Applies one message body (not SessionStart, EndOfStream or UnitsAdded: the caller handles
/// those) to the collector and, if there is one, the engine. Completed labelled windows go to
/// `windows`. `learning`: units the model does not have yet are expected (not reported).
#[allow(clippy::too_many_arguments)]
pub fn apply_body(
    engine: Option<&mut Engine>,
    collector: Option<&mut WindowCollector>,
    learning: bool,
    names: &TrialStimuli,
    current: &Arc<[String]>,
    body: &Body,
    sink: &mut dyn EngineSink,
    windows: &mut Vec<TrialWindow>,
) -> Applied {
    let mut out = Applied::default();
    if let Body::Spikes(b) = body {
        if b.units.len() != b.ticks.len() {
            out.mismatched_batch = Some((b.units.len(), b.ticks.len()));
            return out;
        }
    }
    if let Some(c) = collector {
        match body {
            Body::Spikes(b) => {
                for (&u, &t) in b.units.iter().zip(&b.ticks) {
                    c.spike(u, t);
                }
                c.advance(b.complete_through, windows);
            }
            Body::Heartbeat(h) => c.advance(h.complete_through, windows),
            Body::Onset(o) => c.open(
                o.trial,
                o.onset_tick,
                (!o.stimulus.is_empty()).then_some(o.stimulus.as_str()),
            ),
            Body::Label(l) => c.label(l.trial, &l.stimulus, windows),
            Body::Cancel(x) => c.cancel(x.trial),
            _ => {}
        }
    }
    let Some(engine) = engine else {
        return out;
    };
    match body {
        Body::Spikes(b) => {
            for (&u, &t) in b.units.iter().zip(&b.ticks) {
                if let Err(e) = engine.spike(u, t) {
                    // While learning, units the model does not have yet are expected.
                    let expected = learning && matches!(e, EngineError::UnknownUnit(_));
                    if out.errors.len() < 3 && !expected {
                        out.errors.push(e);
                    }
                }
            }
            if let Err(e) = engine.advance(b.complete_through, sink) {
                out.errors.push(e);
            }
        }
        Body::Heartbeat(h) => {
            if let Err(e) = engine.advance(h.complete_through, sink) {
                out.errors.push(e);
            }
        }
        Body::Onset(o) => {
            let presented = if o.stimulus.is_empty() {
                None
            } else {
                match current.iter().position(|s| *s == o.stimulus) {
                    Some(i) => Some(i as u32),
                    None => {
                        out.unknown_stimulus = Some((o.trial, o.stimulus.clone()));
                        None
                    }
                }
            };
            if let Err(e) = engine.open_trial(o.trial, o.onset_tick, presented, sink) {
                out.errors.push(e);
            }
        }
        Body::Label(l) if learning && names.get(l.trial).is_none() => {
            // Opened before the first learned model: learned from, not decoded.
        }
        Body::Cancel(c) if learning && names.get(c.trial).is_none() => {}
        Body::Label(l) => {
            let own = names.get(l.trial).unwrap_or(current);
            match own.iter().position(|s| *s == l.stimulus) {
                Some(i) => {
                    if let Err(e) = engine.label(l.trial, i as u32, sink) {
                        out.errors.push(e);
                    }
                }
                None => out.unknown_stimulus = Some((l.trial, l.stimulus.clone())),
            }
        }
        Body::Cancel(c) => {
            if let Err(e) = engine.cancel(c.trial, sink) {
                out.errors.push(e);
            }
        }
        Body::SessionStart(_) | Body::EndOfStream(_) | Body::UnitsAdded(_) => {}
    }
    out
}
