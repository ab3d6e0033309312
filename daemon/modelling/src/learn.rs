//! Learning during the recording, the pure half: a [`WindowCollector`] that cuts each labelled
//! trial's window out of the inbound stream (whatever units the current model has), and a
//! [`Learner`] that keeps those windows — the sufficient statistics of a fit: every unit's window
//! count and spike times after onset — and turns them into the same [`FitPlan`] `auspex fit`
//! builds from a recording, so the learned model is the offline fit of the trials seen so far.
//!
//! Prequential rule: the caller fits on the trials the learner holds *now* and applies the model
//! to trials that open afterwards; a trial's own spikes therefore never shape the model that
//! decodes it. The daemon fits on a background thread and records, in the session file, the
//! point in the message stream where each learned model took over and how many trials it was fit
//! on, so an offline replay (`auspex decode --prequential`) applies the same models at the same
//! points.
//!
//! Must not: fit (callers do, with `fit::fit_cell` on as many threads as they like), read clocks
//! or spawn threads.

use crate::calibrate::{calibrate, held_out_set, DEFAULT_METHOD};
use crate::fit::reorder_spec;
use crate::fit::{plan_from_windows, window_bins, FitError, FitOptions, FitPlan};
use crate::windows::UnitWindows;
use auspex_engine::calibration::CalibrationMethod;
use auspex_engine::data::Dataset;
use auspex_engine::model::ModelSpec;
use std::collections::{BTreeMap, BTreeSet, HashMap, HashSet, VecDeque};

/// One labelled trial's window: spikes as (ticks after onset, unit), in (tick, unit) order.
#[derive(Clone, Debug, PartialEq)]
pub struct TrialWindow {
    /// Trial id.
    pub id: u64,
    /// Onset tick.
    pub onset: i64,
    /// Presented stimulus.
    pub stimulus: String,
    /// Spikes in [onset, onset + window): (tick − onset, unit).
    pub spikes: Vec<(i64, u32)>,
}

struct Pending {
    id: u64,
    onset: i64,
    stimulus: Option<String>,
}

/// Completed trials kept while waiting for a late label (the engine parks as many).
const PARKED_MAX: usize = 64;
/// Trial ids remembered to refuse duplicates.
const RECENT_IDS: usize = 4096;

/// Cuts labelled trials' windows out of the inbound stream. Same inputs as the engine
/// (open, spike, advance, label, cancel) and the same acceptance rules: spikes at or behind the
/// watermark and onsets older than the history allowance are ignored (the engine counts them).
pub struct WindowCollector {
    window_ticks: i64,
    history_ticks: i64,
    watermark: i64,
    spikes: VecDeque<(i64, u32)>,
    pending: Vec<(i64, u32)>,
    open: Vec<Pending>,
    parked: VecDeque<TrialWindow>,
    recent: VecDeque<u64>,
    recent_set: HashSet<u64>,
}

impl WindowCollector {
    /// A collector for windows of `window_ticks`, accepting onsets up to `history_ticks` behind
    /// the watermark.
    pub fn new(window_ticks: i64, history_ticks: i64) -> Self {
        WindowCollector {
            window_ticks: window_ticks.max(1),
            history_ticks: history_ticks.max(0),
            watermark: i64::MIN,
            spikes: VecDeque::new(),
            pending: Vec::new(),
            open: Vec::new(),
            parked: VecDeque::new(),
            recent: VecDeque::new(),
            recent_set: HashSet::new(),
        }
    }

    /// A trial opened at `onset`, with its stimulus if known.
    pub fn open(&mut self, id: u64, onset: i64, stimulus: Option<&str>) {
        if self.recent_set.contains(&id) {
            return;
        }
        if self.watermark != i64::MIN && onset < self.watermark.saturating_sub(self.history_ticks) {
            return;
        }
        if self.recent.len() == RECENT_IDS {
            if let Some(old) = self.recent.pop_front() {
                self.recent_set.remove(&old);
            }
        }
        self.recent.push_back(id);
        self.recent_set.insert(id);
        self.open.push(Pending {
            id,
            onset,
            stimulus: stimulus.map(str::to_string),
        });
    }

    /// A spike of any unit.
    pub fn spike(&mut self, unit: u32, tick: i64) {
        if tick > self.watermark {
            self.pending.push((tick, unit));
        }
    }

    /// The label of an open trial, or of a completed one waiting for it (then complete).
    pub fn label(&mut self, id: u64, stimulus: &str, out: &mut Vec<TrialWindow>) {
        if let Some(t) = self.open.iter_mut().find(|t| t.id == id) {
            t.stimulus = Some(stimulus.to_string());
        } else if let Some(i) = self.parked.iter().position(|t| t.id == id) {
            if let Some(mut w) = self.parked.remove(i) {
                w.stimulus = stimulus.to_string();
                out.push(w);
            }
        }
    }

    /// A cancelled trial is never learned from.
    pub fn cancel(&mut self, id: u64) {
        self.open.retain(|t| t.id != id);
        self.parked.retain(|t| t.id != id);
    }

    /// Drops every open trial (the session ended).
    pub fn clear_trials(&mut self) {
        self.open.clear();
        self.parked.clear();
    }

    /// Every spike up to `watermark` has been given: windows that ended are complete; labelled
    /// ones go to `out` in completion order (trial-opening order within one advance).
    pub fn advance(&mut self, watermark: i64, out: &mut Vec<TrialWindow>) {
        if watermark < self.watermark {
            return;
        }
        self.pending.sort_unstable();
        let cut = self.pending.partition_point(|x| x.0 <= watermark);
        self.spikes.extend(self.pending.drain(..cut));
        self.watermark = watermark;
        let mut i = 0;
        while i < self.open.len() {
            let end = self.open[i].onset.saturating_add(self.window_ticks);
            if end.saturating_sub(1) <= watermark {
                let t = self.open.remove(i);
                let a = self.spikes.partition_point(|s| s.0 < t.onset);
                let b = self.spikes.partition_point(|s| s.0 < end);
                let spikes = self
                    .spikes
                    .range(a..b)
                    .map(|&(tick, u)| (tick - t.onset, u))
                    .collect();
                let mut w = TrialWindow {
                    id: t.id,
                    onset: t.onset,
                    stimulus: String::new(),
                    spikes,
                };
                match t.stimulus {
                    Some(s) => {
                        w.stimulus = s;
                        out.push(w);
                    }
                    None => {
                        if self.parked.len() == PARKED_MAX {
                            self.parked.pop_front();
                        }
                        self.parked.push_back(w);
                    }
                }
            } else {
                i += 1;
            }
        }
        let keep_from = self
            .open
            .iter()
            .map(|t| t.onset)
            .min()
            .unwrap_or(i64::MAX)
            .min(watermark.saturating_sub(self.history_ticks));
        while self.spikes.front().is_some_and(|s| s.0 < keep_from) {
            self.spikes.pop_front();
        }
    }

    /// Spikes held (bounded by firing rate × (window + history)).
    pub fn buffered_spikes(&self) -> usize {
        self.spikes.len() + self.pending.len()
    }
}

/// What the learner needs to know beyond the fit options.
#[derive(Clone, Debug, PartialEq)]
pub struct LearnOptions {
    /// The fit, exactly as `auspex fit` would run it.
    pub fit: FitOptions,
    /// A stimulus enters the model once it has this many labelled trials, and a unit once it
    /// has this many of every stimulus in the model (counted from its declaration).
    pub min_trials_per_stimulus: u32,
    /// The most recent labelled trials kept per stimulus (older ones are forgotten, which also
    /// bounds memory: per unit, at most stimuli × this × (spikes per window) spike times).
    pub max_trials_per_stimulus: usize,
    /// Recalibration of every learned model, fitted on held-out folds of the trials learned
    /// (as `auspex fit` does), with its threshold record.
    pub calibration: CalibrationMethod,
    /// Minimum decision time the threshold record is replayed with, seconds.
    pub calibration_min_time_s: f64,
}

impl Default for LearnOptions {
    fn default() -> Self {
        LearnOptions {
            fit: FitOptions::default(),
            min_trials_per_stimulus: 3,
            max_trials_per_stimulus: 1000,
            calibration: DEFAULT_METHOD,
            calibration_min_time_s: auspex_engine::engine::DecisionPolicy::default().min_time_s,
        }
    }
}

/// Why there is no model to learn yet.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum NotYet {
    /// Fewer than two stimuli have enough trials.
    #[error("{ready} of the {seen} stimuli seen have {min} labelled trials; decoding needs two")]
    Stimuli {
        /// Stimuli with enough trials.
        ready: usize,
        /// Stimuli seen.
        seen: usize,
        /// The minimum.
        min: u32,
    },
    /// No unit has enough trials of every stimulus.
    #[error("no unit has {min} labelled trials of every stimulus yet")]
    Units {
        /// The minimum.
        min: u32,
    },
    /// The fit refused (options).
    #[error("{0}")]
    Fit(#[from] FitError),
}

/// The labelled trials of a session so far, and the units it has declared.
pub struct Learner {
    opts: LearnOptions,
    tick_rate_hz: f64,
    n_bins: usize,
    bin_ticks: i64,
    units: BTreeSet<u32>,
    at_start: BTreeSet<u32>,
    declared_from: BTreeMap<u32, i64>,
    trials: VecDeque<TrialWindow>,
    per_stimulus: HashMap<String, usize>,
    added: u64,
}

impl Learner {
    /// A learner for a session clocked at `tick_rate_hz`.
    pub fn new(opts: LearnOptions, tick_rate_hz: f64) -> Result<Self, FitError> {
        let (n_bins, bin_ticks) =
            window_bins(opts.fit.bin_width_s, opts.fit.window_s, tick_rate_hz)?;
        Ok(Learner {
            opts,
            tick_rate_hz,
            n_bins,
            bin_ticks,
            units: BTreeSet::new(),
            at_start: BTreeSet::new(),
            declared_from: BTreeMap::new(),
            trials: VecDeque::new(),
            per_stimulus: HashMap::new(),
            added: 0,
        })
    }

    /// The options.
    pub fn options(&self) -> &LearnOptions {
        &self.opts
    }

    /// Window length in ticks.
    pub fn window_ticks(&self) -> i64 {
        self.bin_ticks * self.n_bins as i64
    }

    /// Units the session declared at its start (or that spiked): learned from every trial.
    pub fn add_units(&mut self, units: impl IntoIterator<Item = u32>) {
        for u in units {
            self.units.insert(u);
            self.at_start.insert(u);
        }
    }

    /// Units declared part-way through: learned from trials with onset at or after `from_tick`.
    /// A unit declared at the start, or declared before, keeps its earlier start.
    pub fn declare_units_from(&mut self, units: &[u32], from_tick: i64) {
        for &u in units {
            self.units.insert(u);
            if !self.at_start.contains(&u) && !self.declared_from.contains_key(&u) {
                self.declared_from.insert(u, from_tick);
            }
        }
    }

    /// Whether a unit is known.
    pub fn knows_unit(&self, unit: u32) -> bool {
        self.units.contains(&unit)
    }

    /// Units known, sorted.
    pub fn units(&self) -> impl Iterator<Item = u32> + '_ {
        self.units.iter().copied()
    }

    /// Adds a labelled trial's window (its units become known, as spiking units are in a
    /// recording). The oldest trial of the stimulus is forgotten beyond the per-stimulus cap.
    pub fn add(&mut self, w: TrialWindow) {
        for &(_, u) in &w.spikes {
            self.units.insert(u);
        }
        let n = self.per_stimulus.entry(w.stimulus.clone()).or_insert(0);
        *n += 1;
        if *n > self.opts.max_trials_per_stimulus {
            if let Some(i) = self.trials.iter().position(|t| t.stimulus == w.stimulus) {
                self.trials.remove(i);
                *n -= 1;
            }
        }
        self.trials.push_back(w);
        self.added += 1;
    }

    /// Labelled trials added so far (including forgotten ones): the version a fit is known by.
    pub fn added(&self) -> u64 {
        self.added
    }

    /// Labelled trials held, per stimulus (order of first appearance by onset).
    pub fn trials_per_stimulus(&self) -> Vec<(String, usize)> {
        self.stimulus_order()
            .into_iter()
            .map(|s| {
                let n = self.per_stimulus.get(&s).copied().unwrap_or(0);
                (s, n)
            })
            .collect()
    }

    fn stimulus_order(&self) -> Vec<String> {
        let mut idx: Vec<usize> = (0..self.trials.len()).collect();
        idx.sort_by_key(|&i| (self.trials[i].onset, self.trials[i].id));
        let mut out: Vec<String> = Vec::new();
        for i in idx {
            let s = &self.trials[i].stimulus;
            if !out.contains(s) {
                out.push(s.clone());
            }
        }
        out
    }

    /// Forgets every trial (units stay known).
    pub fn reset(&mut self) {
        self.trials.clear();
        self.per_stimulus.clear();
    }

    /// The fit plan of the trials held now: stimuli with at least the minimum of trials, units
    /// with at least the minimum of every such stimulus since their declaration. With the
    /// minimum met everywhere this is exactly `fit::plan` of the recording so far.
    pub fn plan(&self) -> Result<FitPlan, NotYet> {
        let min = self.opts.min_trials_per_stimulus.max(1) as usize;
        let order = self.stimulus_order();
        let ready: Vec<String> = order
            .iter()
            .filter(|s| self.per_stimulus.get(*s).copied().unwrap_or(0) >= min)
            .cloned()
            .collect();
        if ready.len() < 2 {
            return Err(NotYet::Stimuli {
                ready: ready.len(),
                seen: order.len(),
                min: min as u32,
            });
        }
        let ready_set: std::collections::HashSet<&str> = ready.iter().map(String::as_str).collect();
        let mut idx: Vec<usize> = (0..self.trials.len())
            .filter(|&i| ready_set.contains(self.trials[i].stimulus.as_str()))
            .collect();
        idx.sort_by_key(|&i| (self.trials[i].onset, self.trials[i].id));
        let ready_at = auspex_engine::data::name_index(&ready);
        let stim_of: Vec<Option<usize>> = idx
            .iter()
            .map(|&i| ready_at.get(self.trials[i].stimulus.as_str()).copied())
            .collect();
        let onsets: Vec<i64> = idx.iter().map(|&i| self.trials[i].onset).collect();
        // Whether a unit declared from `from` has the minimum of every stimulus: one pass over
        // the trials per distinct declaration tick (most units share one), not per unit.
        let mut enough: HashMap<i64, bool> = HashMap::new();
        let units: Vec<u32> = self
            .units
            .iter()
            .copied()
            .filter(|u| {
                let from = self.declared_from.get(u).copied().unwrap_or(i64::MIN);
                *enough.entry(from).or_insert_with(|| {
                    let mut per = vec![0usize; ready.len()];
                    for (j, &i) in idx.iter().enumerate() {
                        if self.trials[i].onset >= from {
                            if let Some(s) = stim_of[j] {
                                per[s] += 1;
                            }
                        }
                    }
                    per.iter().all(|&n| n >= min)
                })
            })
            .collect();
        if units.is_empty() {
            return Err(NotYet::Units { min: min as u32 });
        }
        let spikes = idx.iter().map(|&i| self.trials[i].spikes.len()).sum();
        crate::windows::check_fit_size(units.len(), idx.len(), ready.len(), self.n_bins, spikes)
            .map_err(FitError::from)?;
        let w = self.windows(&idx, &units);
        Ok(plan_from_windows(
            &self.opts.fit,
            (self.n_bins, self.bin_ticks),
            ready,
            units,
            &stim_of,
            &onsets,
            w,
            &self.declared_from,
        )?)
    }

    fn windows(&self, idx: &[usize], units: &[u32]) -> UnitWindows {
        let index: HashMap<u32, usize> = units.iter().enumerate().map(|(i, &u)| (u, i)).collect();
        let mut out = vec![crate::windows::Ragged::default(); units.len()];
        for (j, &i) in idx.iter().enumerate() {
            for &(dt, unit) in &self.trials[i].spikes {
                if let Some(&u) = index.get(&unit) {
                    out[u].push(j, dt as f64 / self.bin_ticks as f64);
                }
            }
        }
        UnitWindows {
            n_trials: idx.len(),
            units: out,
        }
    }

    /// The trials held as a dataset (for reports and tests).
    pub fn dataset(&self) -> Dataset {
        let mut d = Dataset {
            tick_rate_hz: self.tick_rate_hz,
            units: self.units.iter().copied().collect(),
            declared_from: self.declared_from.clone(),
            ..Dataset::default()
        };
        // A spike in two overlapping windows is held twice but happened once; two spikes of
        // one unit at one tick (a sorter's double) happened twice, and each window holds both.
        // So each (tick, unit) counts as often as the window holding it most often has it.
        let mut times: HashMap<(i64, u32), u32> = HashMap::new();
        let mut here: Vec<(i64, u32)> = Vec::new();
        for t in &self.trials {
            d.trials.push(auspex_engine::data::Trial {
                id: t.id,
                onset: t.onset,
                stimulus: Some(t.stimulus.clone()),
            });
            here.clear();
            here.extend(
                t.spikes
                    .iter()
                    .map(|&(dt, u)| (t.onset.saturating_add(dt), u)),
            );
            here.sort_unstable();
            for run in here.chunk_by(|a, b| a == b) {
                let n = times.entry(run[0]).or_insert(0);
                *n = (*n).max(run.len() as u32);
            }
        }
        d.trials.sort_by_key(|t| (t.onset, t.id));
        let mut spikes = Vec::new();
        for (spike, n) in times {
            spikes.extend(std::iter::repeat_n(spike, n as usize));
        }
        spikes.sort_unstable();
        d.spikes = spikes.into();
        d
    }

    /// `spec`, fitted on this learner's trials, with its calibration and threshold record: the
    /// held-out folds are the learned trials of the model's stimuli, restricted to its units
    /// (`fit` fits a fold's plan as the caller fits). Too few trials: returned uncalibrated.
    pub fn calibrated(
        &self,
        mut spec: ModelSpec,
        fit: &dyn Fn(&FitPlan) -> ModelSpec,
    ) -> ModelSpec {
        // Stored in the order `auspex fit` presents them (numbers in numeric order).
        let presented: Vec<String> =
            auspex_engine::data::presentation_order(self.stimulus_order(), &[])
                .into_iter()
                .filter(|s| spec.stimuli.contains(s))
                .collect();
        if self.opts.calibration == CalibrationMethod::None {
            return reorder_spec(spec.clone(), &presented).unwrap_or(spec);
        }
        let mut d = self.dataset();
        let units: std::collections::BTreeSet<u32> = spec.units.iter().copied().collect();
        d.units.retain(|u| units.contains(u));
        d.spikes.retain(|_, u| units.contains(&u));
        d.trials.retain(|t| {
            t.stimulus
                .as_ref()
                .is_some_and(|s| spec.stimuli.contains(s))
        });
        if let Ok(set) = held_out_set(&d, &self.opts.fit, &spec.stimuli, 5, 1, fit) {
            spec.calibration = calibrate(
                &set,
                self.opts.calibration,
                self.opts.calibration_min_time_s,
            );
        }
        reorder_spec(spec.clone(), &presented).unwrap_or(spec)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::fit::plan;
    use crate::simulate::{simulate, SimOptions};
    use auspex_engine::{CountParams, Model};

    fn two_unit_model() -> Model {
        let nb = 50;
        let early: Vec<f64> = (0..nb)
            .map(|b| if b < 10 { 0.08 } else { 0.2 / 40.0 })
            .collect();
        let flat = vec![1.0 / nb as f64; nb];
        let z: f64 = early.iter().sum();
        let early: Vec<f64> = early.iter().map(|x| x / z).collect();
        let cell = |mean: f64, t: &Vec<f64>| auspex_engine::CellSpec {
            count: CountParams::Poisson { mean },
            timing: t.clone(),
            summary: Default::default(),
        };
        Model::new(auspex_engine::ModelSpec {
            bin_width_s: 0.001,
            n_bins: nb as u32,
            stimuli: vec!["A".into(), "B".into(), "C".into()],
            units: vec![3, 7],
            prior: vec![1.0 / 3.0; 3],
            cells: vec![
                cell(2.0, &flat),
                cell(6.0, &early),
                cell(4.0, &flat),
                cell(3.0, &flat),
                cell(3.0, &flat),
                cell(3.0, &flat),
            ],
            calibration: Default::default(),
            unit_groups: Vec::new(),
        })
        .unwrap()
    }

    fn collect_all(data: &Dataset, window: i64) -> Vec<TrialWindow> {
        let mut c = WindowCollector::new(window, 2_000);
        let mut out = Vec::new();
        for ev in data.events(1000, window) {
            match ev {
                auspex_engine::data::Event::Open {
                    trial,
                    onset,
                    stimulus,
                } => c.open(trial, onset, stimulus.as_deref()),
                auspex_engine::data::Event::Batch { spikes, watermark } => {
                    for (t, u) in spikes {
                        c.spike(u, t);
                    }
                    c.advance(watermark, &mut out);
                }
            }
        }
        out
    }

    /// A simulated session of the two-unit model, and learning options for its 50 ms window.
    fn two_unit_session() -> (Dataset, LearnOptions) {
        let m = two_unit_model();
        let data = simulate(
            &m,
            &SimOptions {
                trials_per_stimulus: 12,
                gap_s: (0.01, 0.03),
                spontaneous_hz: 5.0,
                tick_rate_hz: 1e6,
                seed: 4,
            },
        );
        let opts = LearnOptions {
            fit: FitOptions {
                window_s: 0.05,
                ..FitOptions::default()
            },
            ..LearnOptions::default()
        };
        (data, opts)
    }

    #[test]
    fn learned_plan_is_the_offline_plan_of_the_same_trials() {
        let (data, opts) = two_unit_session();
        let window = 50_000;
        let windows = collect_all(&data, window);
        assert_eq!(windows.len(), data.trials.len());
        let mut l = Learner::new(opts.clone(), 1e6).unwrap();
        l.add_units(data.units.iter().copied());
        for w in windows {
            l.add(w);
        }
        let learned = l.plan().unwrap().fit_all();
        let offline = plan(&data, &opts.fit).unwrap().fit_all();
        assert_eq!(learned, offline);
    }

    #[test]
    fn learned_calibration_is_the_offline_calibration() {
        let (data, opts) = two_unit_session();
        // A sorter's double (two spikes of one unit at one tick) inside a trial's window
        // counts twice in the cells and in the held-out folds alike.
        let mut data = data;
        let t = data.trials[7].onset + 10_000;
        let unit = data.units[0];
        let mut spikes = data.spikes.to_vec();
        spikes.push((t, unit));
        spikes.push((t, unit));
        data.spikes = spikes.into();
        let mut l = Learner::new(opts.clone(), 1e6).unwrap();
        l.add_units(data.units.iter().copied());
        for w in collect_all(&data, 50_000) {
            l.add(w);
        }
        let learned = l.calibrated(l.plan().unwrap().fit_all(), &|p| p.fit_all());
        let p = plan(&data, &opts.fit).unwrap();
        let mut offline = p.fit_all();
        let set = held_out_set(&data, &opts.fit, &offline.stimuli, 5, 1, &|p| p.fit_all()).unwrap();
        offline.calibration = calibrate(&set, opts.calibration, opts.calibration_min_time_s);
        assert_eq!(learned, offline);
    }

    #[test]
    fn nothing_is_learned_until_two_stimuli_have_the_minimum() {
        let mut l = Learner::new(LearnOptions::default(), 1e6).unwrap();
        l.add_units([1]);
        let w = |id: u64, s: &str| TrialWindow {
            id,
            onset: id as i64 * 1_000_000,
            stimulus: s.into(),
            spikes: vec![(1000, 1)],
        };
        for i in 0..3 {
            l.add(w(i, "A"));
        }
        l.add(w(10, "B"));
        l.add(w(11, "B"));
        assert!(matches!(l.plan(), Err(NotYet::Stimuli { ready: 1, .. })));
        l.add(w(12, "B"));
        let p = l.plan().unwrap();
        assert_eq!(p.stimuli, vec!["A".to_string(), "B".to_string()]);
        // A unit declared later has no trials of its own yet: it waits.
        l.declare_units_from(&[9], 50_000_000);
        assert_eq!(l.plan().unwrap().units, vec![1]);
        for i in 0..3 {
            l.add(w(100 + i, "A"));
            l.add(w(200 + i, "B"));
        }
        assert_eq!(l.plan().unwrap().units, vec![1, 9]);
    }

    #[test]
    fn cancelled_and_unlabelled_trials_are_not_learned() {
        let mut c = WindowCollector::new(100, 1000);
        let mut out = Vec::new();
        c.open(1, 10, Some("A"));
        c.open(2, 20, None);
        c.open(3, 30, Some("B"));
        c.spike(5, 15);
        c.spike(5, 25);
        c.cancel(3);
        c.advance(200, &mut out);
        assert_eq!(out.len(), 1);
        assert_eq!(out[0].spikes, vec![(5, 5), (15, 5)]);
        // The late label completes trial 2.
        c.label(2, "B", &mut out);
        assert_eq!(out.len(), 2);
        assert_eq!(out[1].stimulus, "B");
        assert_eq!(out[1].spikes, vec![(5, 5)]);
    }
}
