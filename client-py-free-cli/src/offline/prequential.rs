//! Prequential decoding offline: every trial decoded with a model learned only from trials
//! labelled before it opened, as the daemon does while learning. From a daemon's recording the
//! learned models are refitted and swapped in exactly where the recording says the daemon swapped
//! them, so the posteriors equal the live ones bit for bit; from tables (or a recording made
//! without learning) a model is refitted every N labelled trials and applies at once.
//!
//! Must not: decide anything the daemon decides differently: messages go through
//! `auspex_proto::stream`, the daemon's own rule, and fits through the learner's plan.

use crate::fitting::fit_cells;
use crate::offline::DecisionRow;
use crate::wire::RecordedSession;
use anyhow::Context;
use auspex_engine::engine::{
    Decision, Engine, EngineConfig, EngineSink, Frame, TrialEnd, UnitSummaries,
};
use auspex_engine::{CountFamily, LookupBudget, Model};
use auspex_modelling::assess::{assess, Assessment, VerdictRule};
use auspex_modelling::learn::{LearnOptions, Learner, TrialWindow, WindowCollector};
use auspex_proto::stream::{apply_body, remember_onset, TrialStimuli};
use auspex_proto::v1::inbound::Body;
use std::collections::{HashMap, VecDeque};
use std::io::Write;
use std::sync::Arc;

/// Posterior frames as (trial, bin, posterior).
pub type Frames = Vec<(u64, u32, Vec<f64>)>;

/// When models are refitted where the recording does not say.
#[derive(Clone, Debug)]
pub struct Schedule {
    /// Refit after this many new labelled trials.
    pub every_trials: u32,
}

/// What a prequential run produced.
#[derive(Debug, Default)]
pub struct PrequentialRun {
    /// Decisions, named in each trial's model.
    pub decisions: Vec<DecisionRow>,
    /// Models applied: (labelled trials fitted on, units, stimuli).
    pub models: Vec<(u64, usize, usize)>,
    /// Trials opened before any model existed (learned from, not decoded).
    pub undecoded_trials: u64,
    /// Labelled trials learned from.
    pub trials_learned: u64,
    /// Whether the swap points came from the recording (true) or the schedule.
    pub recorded_swaps: bool,
    /// The per-unit assessments after the last labelled trial (as the daemon publishes them).
    pub units: Vec<(u32, Assessment)>,
    /// When frames are collected: each frame's bin-end tick and the stimulus names of the model
    /// that decoded it (the posterior's order), beside the frames.
    pub frame_meta: Vec<(i64, Arc<[String]>)>,
}

/// Writes posterior rows with each trial's own stimulus names and collects decisions.
pub struct PrequentialSink<'a, W: Write> {
    out: Option<W>,
    names: &'a TrialStimuli,
    truth: &'a HashMap<u64, Option<String>>,
    decisions: Vec<DecisionRow>,
    decided_names: Vec<String>,
    error: Option<std::io::Error>,
    /// Every frame as (trial, bin, posterior), when asked for (tests, export).
    pub frames: Option<Vec<(u64, u32, Vec<f64>)>>,
    /// Beside `frames`: each frame's bin-end tick and its trial's stimulus names.
    frame_meta: Vec<(i64, Arc<[String]>)>,
    units: Option<Vec<(u32, Assessment)>>,
}

impl<W: Write> EngineSink for PrequentialSink<'_, W> {
    fn frame(&mut self, f: &Frame<'_>) {
        if let Some(v) = self.frames.as_mut() {
            v.push((f.trial, f.bin, f.posterior.to_vec()));
            let names = self
                .names
                .get(f.trial)
                .cloned()
                .unwrap_or_else(|| [].into());
            self.frame_meta.push((f.bin_end_tick, names));
        }
        if self.error.is_some() {
            return;
        }
        if let Some(w) = self.out.as_mut() {
            let names = self.names.get(f.trial);
            for (s, p) in f.posterior.iter().enumerate() {
                let name = names
                    .and_then(|n| n.get(s))
                    .map(String::as_str)
                    .unwrap_or("?");
                if let Err(e) = writeln!(w, "{},{},{},{}", f.trial, f.bin, name, p) {
                    self.error = Some(e);
                    return;
                }
            }
        }
    }
    fn decision(&mut self, d: &Decision) {
        let name = self
            .names
            .get(d.trial)
            .and_then(|n| n.get(d.stimulus as usize).cloned())
            .unwrap_or_default();
        self.decided_names.push(name);
        self.decisions.push(DecisionRow {
            decision: *d,
            true_stimulus: self.truth.get(&d.trial).cloned().flatten(),
        });
    }
    fn trial_end(&mut self, _e: &TrialEnd<'_>) {}
    fn unit_summaries(&mut self, s: &UnitSummaries<'_>) {
        let rule = VerdictRule::default();
        let ns = s.model.n_stimuli();
        self.units = Some(
            (0..s.units.len())
                .map(|i| (s.units[i], assess(s.tally.confusion(i), ns, &rule)))
                .collect(),
        );
    }
}

/// The learner's settings recorded in the first marker of a recording, if any.
pub fn recorded_options(rec: &RecordedSession) -> Option<LearnOptions> {
    let m = rec.learned.first().map(|(_, m)| m)?;
    let families: Vec<CountFamily> = m
        .families
        .iter()
        .filter_map(|f| CountFamily::parse(f))
        .collect();
    let mut o = LearnOptions::default();
    o.fit.window_s = m.window_s;
    o.fit.bin_width_s = m.bin_width_s;
    if !families.is_empty() {
        o.fit.families = families;
    }
    o.min_trials_per_stimulus = m.min_trials_per_stimulus.max(1);
    if m.max_trials_per_stimulus > 0 {
        o.max_trials_per_stimulus = m.max_trials_per_stimulus as usize;
    }
    Some(o)
}

struct Run<'a, W: Write> {
    opts: LearnOptions,
    cfg: EngineConfig,
    engine: Option<Engine>,
    collector: Option<WindowCollector>,
    learner: Option<Learner>,
    queue: VecDeque<TrialWindow>,
    names: TrialStimuli,
    current: Arc<[String]>,
    out: Option<W>,
    truth: &'a HashMap<u64, Option<String>>,
    result: PrequentialRun,
    frames: Option<Vec<(u64, u32, Vec<f64>)>>,
    decided_names: Vec<String>,
}

impl<W: Write> Run<'_, W> {
    /// Adds queued windows until the learner has taken `k` trials.
    fn take_until(&mut self, k: u64) {
        let Some(l) = self.learner.as_mut() else {
            return;
        };
        while l.added() < k {
            match self.queue.pop_front() {
                Some(w) => l.add(w),
                None => break,
            }
        }
    }

    fn swap(&mut self, k: u64) -> anyhow::Result<()> {
        self.take_until(k);
        let Some(l) = self.learner.as_ref() else {
            return Ok(());
        };
        let plan = match l.plan() {
            Ok(p) => p,
            // The daemon could not fit here either (it records only models it applied).
            Err(_) => return Ok(()),
        };
        let cells = fit_cells(&plan, false);
        let spec = l.calibrated(plan.assemble(cells), &|p| p.assemble(fit_cells(p, false)));
        // The daemon's learned models are prepared with its budget (default unless set).
        let model = Arc::new(Model::new(spec)?).prepare(LookupBudget::DEFAULT);
        match self.engine.as_mut() {
            Some(e) => e.set_model(model.clone())?,
            None => self.engine = Some(Engine::new(model.clone(), self.cfg.clone())?),
        }
        self.result
            .models
            .push((l.added(), model.n_units(), model.n_stimuli()));
        self.current = model.stimuli().to_vec().into();
        Ok(())
    }

    fn message(&mut self, body: &Body) {
        if self.engine.is_some() {
            remember_onset(&mut self.names, body, &self.current);
        } else if matches!(body, Body::Onset(_)) {
            self.result.undecoded_trials += 1;
        }
        let mut windows = Vec::new();
        let mut sink = PrequentialSink {
            out: self.out.as_mut(),
            names: &self.names,
            truth: self.truth,
            decisions: Vec::new(),
            decided_names: Vec::new(),
            error: None,
            frames: self.frames.take(),
            frame_meta: Vec::new(),
            units: None,
        };
        let learning = self.collector.is_some();
        let _ = apply_body(
            self.engine.as_mut(),
            self.collector.as_mut(),
            learning,
            &self.names,
            &self.current,
            body,
            &mut sink,
            &mut windows,
        );
        let PrequentialSink {
            decisions,
            decided_names,
            error,
            frames,
            frame_meta,
            units,
            ..
        } = sink;
        if let Some(u) = units {
            self.result.units = u;
        }
        self.result.frame_meta.extend(frame_meta);
        self.frames = frames;
        self.result.decisions.extend(decisions);
        self.decided_names.extend(decided_names);
        if let Some(e) = error {
            tracing_free_warn(&e);
        }
        self.result.trials_learned += windows.len() as u64;
        self.queue.extend(windows);
    }
}

fn tracing_free_warn(e: &std::io::Error) {
    eprintln!("warning: writing posteriors failed: {e}");
}

/// Decodes the messages of a recording prequentially. `schedule` applies where the recording
/// holds no learned-model markers (a recording made without learning); `opts` gives the learner
/// settings then (with markers, the recorded settings win). `frames` collects every frame.
pub fn run_recording<W: Write>(
    rec: &RecordedSession,
    opts: &LearnOptions,
    cfg: &EngineConfig,
    schedule: &Schedule,
    out: Option<W>,
    collect_frames: bool,
) -> anyhow::Result<(PrequentialRun, Vec<String>, Option<Frames>)> {
    let recorded = !rec.learned.is_empty();
    let opts = if recorded {
        recorded_options(rec).unwrap_or_else(|| opts.clone())
    } else {
        opts.clone()
    };
    let truth: HashMap<u64, Option<String>> = rec
        .dataset
        .trials
        .iter()
        .map(|t| (t.id, t.stimulus.clone()))
        .collect();
    let mut cfg = cfg.clone();
    cfg.tick_rate_hz = rec.dataset.tick_rate_hz;
    let mut run = Run {
        opts,
        cfg,
        engine: None,
        collector: None,
        learner: None,
        queue: VecDeque::new(),
        names: TrialStimuli::default(),
        current: Vec::new().into(),
        out,
        truth: &truth,
        result: PrequentialRun {
            recorded_swaps: recorded,
            ..Default::default()
        },
        frames: collect_frames.then(Vec::new),
        decided_names: Vec::new(),
    };
    let mut markers = rec.learned.iter().peekable();
    let mut senders: HashMap<String, (u64, bool)> = HashMap::new();
    let mut held: Vec<Body> = Vec::new();
    let mut session: Option<String> = None;
    let mut last_fit = 0u64;
    for (i, (_, msg)) in rec.messages.iter().enumerate() {
        while let Some((_, m)) = markers.next_if(|(pos, _)| *pos <= i) {
            if m.reset {
                run.take_until(m.trials_learned);
                if let Some(l) = run.learner.as_mut() {
                    l.reset();
                }
            } else {
                run.swap(m.trials_learned)?;
            }
        }
        // The daemon's sequence rule: a message not after its sender's last is dropped, unless
        // the sender restarts (SessionStart, or seq 1 after its end of stream).
        let restart = matches!(msg.body, Some(Body::SessionStart(_)));
        let s = senders.entry(msg.sender.clone()).or_insert((0, false));
        if s.0 != 0 && msg.seq <= s.0 && !(restart || (s.1 && msg.seq == 1)) {
            continue;
        }
        s.0 = msg.seq;
        let Some(body) = &msg.body else { continue };
        match body {
            Body::SessionStart(ss) => {
                match &session {
                    Some(name) if *name != ss.session_name => break,
                    Some(_) => {}
                    None => {
                        session = Some(ss.session_name.clone());
                        let mut learner = Learner::new(run.opts.clone(), rec.dataset.tick_rate_hz)
                            .context("the recording's clock and the learner's bins do not fit")?;
                        learner.add_units(ss.units.iter().copied());
                        let history = (run.cfg.history_s * rec.dataset.tick_rate_hz).round() as i64;
                        run.collector = Some(WindowCollector::new(learner.window_ticks(), history));
                        run.learner = Some(learner);
                        for b in std::mem::take(&mut held) {
                            run.message(&b);
                        }
                    }
                }
                s.1 = false;
            }
            Body::EndOfStream(_) => s.1 = true,
            Body::UnitsAdded(a) => {
                if let Some(l) = run.learner.as_mut() {
                    l.declare_units_from(&a.units, a.from_tick);
                }
            }
            b => {
                if session.is_none() {
                    if matches!(b, Body::Onset(_) | Body::Label(_) | Body::Cancel(_)) {
                        held.push(b.clone());
                    }
                    continue;
                }
                run.message(b);
                if !recorded {
                    let have = run.learner.as_ref().map(|l| l.added()).unwrap_or(0)
                        + run.queue.len() as u64;
                    if have >= last_fit + schedule.every_trials.max(1) as u64 {
                        last_fit = have;
                        run.swap(have)?;
                    }
                }
            }
        }
    }
    for (_, m) in markers {
        if !m.reset {
            run.swap(m.trials_learned)?;
        }
    }
    Ok((run.result, run.decided_names, run.frames))
}

/// The messages of a dataset (tables) as a recording without markers, for the scheduled mode.
pub fn tables_as_recording(data: &auspex_engine::Dataset, window_ticks: i64) -> RecordedSession {
    let bt = (data.tick_rate_hz / 1000.0).round().max(1.0) as i64;
    let msgs = crate::wire::dataset_messages(data, "tables", bt, window_ticks);
    RecordedSession {
        choices_answered: Default::default(),
        choices_asked: Default::default(),
        raw: Vec::new(),
        messages: msgs.into_iter().enumerate().collect(),
        dataset: data.clone(),
        undecodable: 0,
        learned: Vec::new(),
        torn_tail_bytes: 0,
    }
}

/// Writes `decisions.csv` with each trial's own stimulus names.
pub fn write_decisions(
    path: &std::path::Path,
    rows: &[DecisionRow],
    names: &[String],
) -> std::io::Result<()> {
    crate::offline::write_named_decisions(path, rows.iter().zip(names.iter().map(String::as_str)))
}
