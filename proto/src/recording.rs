//! Recorded sessions and message streams: the messages a sender would produce from a dataset,
//! a replay's share of them, and a recording read back into its messages and its dataset (labels
//! applied, cancelled trials left unlabelled, units added part-way remembered) — for the
//! client's replay, fit, decode and validate alike.
//!
//! Must not: read files (callers give bytes or decoded records) or print.

use crate::session::SessionContents;
use crate::v1::{self, inbound::Body};
use auspex_engine::data::{Dataset, Event, Trial};
use prost::Message;

/// The messages of a dataset as one sender would send them: SessionStart, then per batch the
/// onsets it contains and a SpikeBatch with its watermark, then EndOfStream. Sequence numbers
/// count from 1. `batch_ticks` is the acquisition's batch length (1 ms is typical).
pub fn dataset_messages(
    data: &Dataset,
    sender: &str,
    batch_ticks: i64,
    window_ticks: i64,
) -> Vec<v1::Inbound> {
    let mut out = Vec::new();
    let mut seq = 0u64;
    let mut push = |body: Body| {
        seq += 1;
        out.push(v1::Inbound {
            sender: sender.into(),
            seq,
            body: Some(body),
        });
    };
    push(Body::SessionStart(v1::SessionStart {
        stimuli: Default::default(),
        tick_rate_hz: data.tick_rate_hz,
        units: data.units.clone(),
        session_name: sender.into(),
        learn_in_step: false,
    }));
    for ev in data.events(batch_ticks, window_ticks) {
        match ev {
            Event::Open {
                trial,
                onset,
                stimulus,
            } => push(Body::Onset(v1::TrialOnset {
                trial,
                onset_tick: onset,
                stimulus: stimulus.unwrap_or_default(),
            })),
            Event::Batch { spikes, watermark } => {
                if spikes.is_empty() {
                    push(Body::Heartbeat(v1::Heartbeat {
                        complete_through: watermark,
                    }));
                } else {
                    push(Body::Spikes(v1::SpikeBatch {
                        units: spikes.iter().map(|s| s.1).collect(),
                        ticks: spikes.iter().map(|s| s.0).collect(),
                        complete_through: watermark,
                    }))
                }
            }
        }
    }
    push(Body::EndOfStream(v1::EndOfStream {}));
    out
}

/// The watermark a message promises, if any (for pacing replays).
pub fn watermark_of(m: &v1::Inbound) -> Option<i64> {
    match &m.body {
        Some(Body::Spikes(b)) => Some(b.complete_through),
        Some(Body::Heartbeat(h)) => Some(h.complete_through),
        _ => None,
    }
}

/// A replay's share of a session: only `units`' spikes (every watermark kept), and only the
/// spikes (`only = "spikes"`) or only the trial messages (`"trials"`); the session's start and
/// end always go. Renumbered for `sender`.
pub fn select_messages(
    msgs: Vec<v1::Inbound>,
    units: Option<&std::collections::BTreeSet<u32>>,
    only: Option<&str>,
    sender: &str,
) -> Vec<v1::Inbound> {
    let spikes = only != Some("trials");
    let trials = only != Some("spikes");
    let mut out: Vec<v1::Inbound> = msgs
        .into_iter()
        .filter_map(|mut m| {
            let keep = match m.body.as_mut()? {
                Body::Spikes(b) => {
                    if let Some(keep) = units {
                        let (u, t): (Vec<u32>, Vec<i64>) = b
                            .units
                            .iter()
                            .zip(&b.ticks)
                            .filter(|(u, _)| keep.contains(u))
                            .map(|(u, t)| (*u, *t))
                            .unzip();
                        (b.units, b.ticks) = (u, t);
                    }
                    spikes
                }
                Body::Heartbeat(_) => spikes,
                Body::Onset(_) | Body::Label(_) | Body::Cancel(_) => trials,
                _ => true,
            };
            keep.then_some(m)
        })
        .collect();
    for (i, m) in out.iter_mut().enumerate() {
        m.sender = sender.to_string();
        m.seq = i as u64 + 1;
    }
    out
}

/// A recorded session read back: the raw messages in order and the dataset they describe.
pub struct RecordedSession {
    /// Every recorded message's bytes, in arrival order.
    pub raw: Vec<Vec<u8>>,
    /// Messages that decoded (index into `raw`, message).
    pub messages: Vec<(usize, v1::Inbound)>,
    /// Spikes, trials and clock as a dataset (labels applied to their trials).
    pub dataset: Dataset,
    /// Records that were not valid Inbound messages.
    pub undecodable: usize,
    /// Where a model learned during the recording took over (or the learner was reset):
    /// (number of `messages` before it, the marker).
    pub learned: Vec<(usize, v1::LearnedSwap)>,
    /// Bytes of a torn last record, if the recording was cut short.
    pub torn_tail_bytes: usize,
    /// find-tuning's requests: (number of `messages` before it, the request marker).
    pub choices_asked: Vec<(usize, v1::StimulusChoice)>,
    /// find-tuning's answers (their `ordinal` names the request).
    pub choices_answered: Vec<v1::StimulusChoice>,
}

/// The records of a session file (`session::read_session`) as messages and a dataset.
pub fn decode_recording(contents: SessionContents) -> Result<RecordedSession, String> {
    let mut raw = Vec::new();
    let mut messages = Vec::new();
    let mut undecodable = 0;
    let mut data = Dataset::default();
    let mut spikes: Vec<(i64, u32)> = Vec::new();
    let mut labels = std::collections::HashMap::new();
    let mut units = std::collections::BTreeSet::new();
    let mut learned = Vec::new();
    let mut at_start = std::collections::BTreeSet::new();
    let mut cancelled = std::collections::HashSet::new();
    let (mut choices_asked, mut choices_answered) = (Vec::new(), Vec::new());
    for r in contents.records {
        if let Some(l) = r.learned {
            learned.push((messages.len(), l));
            continue;
        }
        if let Some(c) = r.choice {
            if c.reply.is_some() {
                choices_answered.push(*c);
            } else {
                choices_asked.push((messages.len(), *c));
            }
            continue;
        }
        let i = raw.len();
        match v1::Inbound::decode(r.message.as_slice()) {
            Ok(m) => {
                match &m.body {
                    // A clock the daemon refuses (not finite, below 1 or above 10¹² ticks/s)
                    // is skipped here too, as it was live.
                    Some(Body::SessionStart(s))
                        if !(s.tick_rate_hz.is_finite()
                            && (1.0..=1e12).contains(&s.tick_rate_hz)) => {}
                    Some(Body::SessionStart(s)) => {
                        // The session's first clock holds: the daemon refuses (and counts) a
                        // later SessionStart that declares another one.
                        if data.tick_rate_hz <= 0.0 {
                            data.tick_rate_hz = s.tick_rate_hz;
                        }
                        units.extend(s.units.iter().copied());
                        at_start.extend(s.units.iter().copied());
                    }
                    Some(Body::Spikes(b)) => {
                        for (&u, &t) in b.units.iter().zip(&b.ticks) {
                            spikes.push((t, u));
                            units.insert(u);
                        }
                    }
                    Some(Body::Onset(o)) => data.trials.push(Trial {
                        id: o.trial,
                        onset: o.onset_tick,
                        stimulus: (!o.stimulus.is_empty()).then(|| o.stimulus.clone()),
                    }),
                    Some(Body::Label(l)) => {
                        labels.insert(l.trial, l.stimulus.clone());
                    }
                    Some(Body::Cancel(c)) => {
                        cancelled.insert(c.trial);
                    }
                    Some(Body::UnitsAdded(a)) => {
                        // The learner's rule: a unit not declared at the start learns from the
                        // first declaration of it on.
                        for &u in &a.units {
                            units.insert(u);
                            if !at_start.contains(&u) && !data.declared_from.contains_key(&u) {
                                data.declared_from.insert(u, a.from_tick);
                            }
                        }
                    }
                    _ => {}
                }
                messages.push((i, m));
            }
            Err(_) => undecodable += 1,
        }
        raw.push(r.message);
    }
    for t in data.trials.iter_mut() {
        if t.stimulus.is_none() {
            t.stimulus = labels.get(&t.id).cloned();
        }
        // A cancelled trial is decoded but never fitted on (as the daemon's learner does).
        if cancelled.contains(&t.id) {
            t.stimulus = None;
        }
    }
    if data.tick_rate_hz <= 0.0 {
        return Err(
            "the recording has no valid SessionStart (a clock of 1 to 10¹² ticks/s), so its clock rate is unknown"
                .into(),
        );
    }
    spikes.sort_unstable();
    data.spikes = spikes.into();
    data.trials.sort_by_key(|t| (t.onset, t.id));
    data.units = units.into_iter().collect();
    Ok(RecordedSession {
        raw,
        messages,
        dataset: data,
        undecodable,
        learned,
        choices_asked,
        choices_answered,
        torn_tail_bytes: contents.torn_tail_bytes,
    })
}
