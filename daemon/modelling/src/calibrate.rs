//! Calibrated confidence: the promise a decision threshold makes, how it is kept, and how it is
//! watched.
//!
//! A decision at threshold θ promises that at least a share θ of such decisions are right.
//! Fitted models (few trials per cell), units treated as independent and stopping at the first
//! crossing make the raw posterior over-confident. The correction used here is **temperature
//! scaling** (Guo, Pleiss, Sun & Weinberger 2017, "On calibration of modern neural networks",
//! ICML): the log-likelihood is multiplied by a factor β fitted on *held-out* trials to minimise
//! the log loss of the presented stimulus,
//!
//! ```text
//! π_s(b) = softmax_s( ln prior_s + β(b) · log L_s(b) )
//! ```
//!
//! either one β for the whole window ([`CalibrationMethod::Temperature`]) or one per band of time
//! since onset ([`CalibrationMethod::BandedTemperature`]: the same fit run separately on each
//! band, bands doubling in length from the minimum decision time), because over-confidence grows
//! as evidence accumulates. β = 1 everywhere is the uncalibrated engine. The log loss is convex
//! in β (a log-sum-exp of functions linear in β), so its minimum is found by bisection on the
//! derivative `Σ (E_π[log L] − log L_presented)`.
//!
//! The threshold table ([`ThresholdEvidence`]) is the held-out record of the decision rule
//! itself: cross-fitted calibration (each fold's factors fitted on the other folds' held-out
//! trials), decisions replayed exactly as the engine takes them, realised accuracy with its
//! Clopper–Pearson interval. `--target-accuracy` picks the smallest threshold whose lower bound
//! meets the target ([`Calibration::threshold_for`]) and refuses when none does.
//!
//! [`PromiseWatch`] watches the promise live: Page's CUSUM (Page 1954, "Continuous inspection
//! schemes", Biometrika 41:100–115) of the Bernoulli log-likelihood ratio of "error rate twice
//! the promised one" against "the promise", alarming at `ln 1000`: when the promise is kept, a
//! false alarm comes on average no more often than once per 1000 labelled decisions (the
//! average-run-length bound `ARL₀ ≥ e^h` for CUSUM of a log-likelihood ratio).
//!
//! Must not: do I/O or spawn threads (the caller passes a fitting function and may run folds on
//! its own threads).

use crate::fit::{plan, FitError, FitOptions, FitPlan};
use crate::folds::stratified_folds;
use crate::stats::clopper_pearson;
use auspex_engine::calibration::{
    posterior_into, Calibration, CalibrationMethod, Fitted, ThresholdEvidence,
};
use auspex_engine::data::Dataset;
use auspex_engine::engine::{
    min_bin_for, run_dataset, EngineConfig, EngineError, EngineSink, Frame,
};
use auspex_engine::model::{Model, ModelError, ModelSpec};
use auspex_engine::prepared::LookupBudget;
use auspex_engine::special::argmax;
use serde::{Deserialize, Serialize};
use std::collections::HashMap;
use std::ops::Range;
use std::sync::Arc;

/// The recalibration `auspex fit` and the learner apply unless told otherwise.
pub const DEFAULT_METHOD: CalibrationMethod = CalibrationMethod::Temperature;

/// Search range of a fitted factor.
const FACTOR_RANGE: (f64, f64) = (1.0 / 64.0, 8.0);

/// Thresholds whose held-out record a calibrated model carries.
pub const EVIDENCE_THRESHOLDS: [f64; 16] = [
    0.5, 0.6, 0.7, 0.8, 0.85, 0.9, 0.925, 0.95, 0.96, 0.97, 0.975, 0.98, 0.985, 0.99, 0.995, 0.999,
];

/// What a held-out threshold record says about its promise (the statistics of the record; the
/// record itself is `auspex_engine::calibration::ThresholdEvidence`).
pub trait EvidenceRecord {
    /// The promise of the threshold decisions: right at least a share θ of the time. Kept when
    /// their 95% Clopper–Pearson interval reaches θ (or none was taken: nothing was claimed).
    fn kept(&self) -> bool;
    /// Accuracy of the threshold decisions and its 95% interval.
    fn early_accuracy(&self) -> (f64, f64, f64);
}

impl EvidenceRecord for ThresholdEvidence {
    fn kept(&self) -> bool {
        self.early == 0
            || clopper_pearson(self.early_correct as u64, self.early as u64, 0.05).1
                >= self.threshold
    }
    fn early_accuracy(&self) -> (f64, f64, f64) {
        let (lo, hi) = clopper_pearson(self.early_correct as u64, self.early as u64, 0.05);
        (self.early_correct as f64 / self.early.max(1) as f64, lo, hi)
    }
}

/// One held-out trial: its presented stimulus and its log-likelihood trajectory (bin-major,
/// `n_bins × n_stimuli`, without the prior), as the engine computed it.
#[derive(Clone, Debug)]
pub struct HeldOutTrial {
    /// Presented stimulus index.
    pub label: usize,
    /// Log-likelihood after each bin.
    pub ll: Vec<f64>,
}

/// Log loss summed over `bins` of `trials` at factor `beta`, and its derivative in `beta`.
fn loss_and_slope(
    trials: &[&HeldOutTrial],
    ln_prior: &[f64],
    bins: &Range<usize>,
    beta: f64,
) -> (f64, f64) {
    let ns = ln_prior.len();
    let (mut loss, mut slope) = (0.0, 0.0);
    let mut z = vec![0.0; ns];
    for t in trials {
        for b in bins.clone() {
            let ll = &t.ll[b * ns..(b + 1) * ns];
            let mut m = f64::NEG_INFINITY;
            for s in 0..ns {
                z[s] = ln_prior[s] + beta * ll[s];
                m = m.max(z[s]);
            }
            let (mut sum, mut mean_ll) = (0.0, 0.0);
            for s in 0..ns {
                let e = (z[s] - m).exp();
                sum += e;
                mean_ll += e * ll[s];
            }
            loss += m + sum.ln() - z[t.label];
            slope += mean_ll / sum - ll[t.label];
        }
    }
    (loss, slope)
}

/// The factor minimising the held-out log loss over `bins` (bisection on the derivative in
/// ln β, which is monotone because the loss is convex in β).
pub fn fit_factor(trials: &[&HeldOutTrial], ln_prior: &[f64], bins: Range<usize>) -> f64 {
    let (lo0, hi0) = FACTOR_RANGE;
    if trials.is_empty() || bins.is_empty() {
        return 1.0;
    }
    let slope = |b: f64| loss_and_slope(trials, ln_prior, &bins, b).1;
    if slope(lo0) >= 0.0 {
        return lo0;
    }
    if slope(hi0) <= 0.0 {
        return hi0;
    }
    let (mut lo, mut hi) = (lo0.ln(), hi0.ln());
    for _ in 0..48 {
        let mid = 0.5 * (lo + hi);
        if slope(mid.exp()) > 0.0 {
            hi = mid;
        } else {
            lo = mid;
        }
    }
    (0.5 * (lo + hi)).exp()
}

/// Bands of time since onset for [`CalibrationMethod::BandedTemperature`]: the first ends at
/// the minimum decision time (at least 5 bins), each next one is twice as long, the last ends
/// at the window end.
pub fn bands(n_bins: usize, min_bin: usize) -> Vec<Range<usize>> {
    let mut edges = vec![0];
    let mut e = (min_bin + 1).max(5);
    while e < n_bins {
        edges.push(e);
        e *= 2;
    }
    // A remainder shorter than half the band before it joins that band.
    if edges.len() >= 2 {
        let k = edges.len();
        let (prev, last) = (edges[k - 2], edges[k - 1]);
        if n_bins - last < (last - prev) / 2 {
            edges.pop();
        }
    }
    edges.push(n_bins);
    edges.windows(2).map(|w| w[0]..w[1]).collect()
}

/// Fits `method`'s parameters on `trials`.
pub fn fit_factors(
    method: CalibrationMethod,
    trials: &[&HeldOutTrial],
    ln_prior: &[f64],
    n_bins: usize,
    min_bin: usize,
) -> Fitted {
    match method {
        CalibrationMethod::None => Fitted::default(),
        CalibrationMethod::Temperature => Fitted {
            factors: vec![fit_factor(trials, ln_prior, 0..n_bins); n_bins],
            floor: 0.0,
        },
        CalibrationMethod::BandedTemperature => {
            let mut f = vec![1.0; n_bins];
            for band in bands(n_bins, min_bin) {
                let beta = fit_factor(trials, ln_prior, band.clone());
                f[band].iter_mut().for_each(|x| *x = beta);
            }
            Fitted {
                factors: f,
                floor: 0.0,
            }
        }
        CalibrationMethod::TemperatureFloor => {
            let (beta, floor) = fit_factor_floor(trials, ln_prior, 0..n_bins);
            Fitted {
                factors: vec![beta; n_bins],
                floor,
            }
        }
    }
}

/// Log loss summed over `bins` with factor `beta` and prior share `floor`.
fn mixture_loss(
    trials: &[&HeldOutTrial],
    ln_prior: &[f64],
    bins: &Range<usize>,
    beta: f64,
    floor: f64,
) -> f64 {
    let ns = ln_prior.len();
    let mut post = vec![0.0; ns];
    let mut loss = 0.0;
    for t in trials {
        for b in bins.clone() {
            posterior_into(
                ln_prior,
                &t.ll[b * ns..(b + 1) * ns],
                beta,
                floor,
                &mut post,
            );
            loss -= post[t.label].max(f64::MIN_POSITIVE).ln();
        }
    }
    loss
}

/// Prior shares ε tried by [`CalibrationMethod::TemperatureFloor`].
const FLOOR_GRID: [f64; 10] = [0.0, 1e-4, 3e-4, 1e-3, 2e-3, 5e-3, 0.01, 0.02, 0.03, 0.05];

/// (β, ε) minimising the held-out log loss of `(1 − ε)·softmax(ln prior + β·ll) + ε·prior`
/// over `bins`: ε on a grid, β by golden-section search in ln β for each.
pub fn fit_factor_floor(
    trials: &[&HeldOutTrial],
    ln_prior: &[f64],
    bins: Range<usize>,
) -> (f64, f64) {
    if trials.is_empty() || bins.is_empty() {
        return (1.0, 0.0);
    }
    let mut best = (f64::INFINITY, 1.0, 0.0);
    for &eps in &FLOOR_GRID {
        let f = |lb: f64| mixture_loss(trials, ln_prior, &bins, lb.exp(), eps);
        let (mut a, mut b) = (FACTOR_RANGE.0.ln(), FACTOR_RANGE.1.ln());
        let g = 0.618_033_988_749_894_9;
        let (mut x1, mut x2) = (b - g * (b - a), a + g * (b - a));
        let (mut f1, mut f2) = (f(x1), f(x2));
        for _ in 0..28 {
            if f1 < f2 {
                b = x2;
                x2 = x1;
                f2 = f1;
                x1 = b - g * (b - a);
                f1 = f(x1);
            } else {
                a = x1;
                x1 = x2;
                f1 = f2;
                x2 = a + g * (b - a);
                f2 = f(x2);
            }
        }
        let lb = 0.5 * (a + b);
        let l = f(lb);
        if l < best.0 {
            best = (l, lb.exp(), eps);
        }
    }
    (best.1, best.2)
}

/// Mean log loss per trial and bin of `trials` under `fitted`.
pub fn mean_log_loss(trials: &[&HeldOutTrial], ln_prior: &[f64], fitted: &Fitted) -> f64 {
    let ns = ln_prior.len();
    let Some(first) = trials.first() else {
        return f64::NAN;
    };
    let nb = first.ll.len() / ns;
    let mut total = 0.0;
    for b in 0..nb {
        total += mixture_loss(trials, ln_prior, &(b..b + 1), fitted.beta(b), fitted.floor);
    }
    total / (trials.len() * nb) as f64
}

/// The decision the engine takes on a trial with log-likelihood trajectory `ll` (stimulus, bin,
/// by threshold), calibrated by `fitted`; `post` is scratch of `n_stimuli`.
pub fn replay_decision(
    ll: &[f64],
    ln_prior: &[f64],
    fitted: &Fitted,
    threshold: f64,
    min_bin: usize,
    post: &mut [f64],
) -> (usize, usize, bool) {
    let ns = ln_prior.len();
    let nb = ll.len() / ns;
    for b in 0..nb {
        posterior_into(
            ln_prior,
            &ll[b * ns..(b + 1) * ns],
            fitted.beta(b),
            fitted.floor,
            post,
        );
        let top = argmax(post);
        if auspex_engine::decision::fires(b, min_bin, post[top], threshold) {
            return (top, b, true);
        }
        if b + 1 == nb {
            return (top, b, false);
        }
    }
    (0, 0, false)
}

/// Replays the decision rule at each threshold on `trials`, each with its own factors
/// (`factors_of[i]`), and summarises accuracy and decision time.
pub fn threshold_evidence(
    trials: &[HeldOutTrial],
    factors_of: &[&Fitted],
    ln_prior: &[f64],
    thresholds: &[f64],
    min_bin: usize,
    bin_ms: f64,
) -> Vec<ThresholdEvidence> {
    let mut post = vec![0.0; ln_prior.len()];
    thresholds
        .iter()
        .map(|&th| {
            let (mut correct, mut early, mut early_correct) = (0u32, 0u32, 0u32);
            let mut times = Vec::with_capacity(trials.len());
            for (t, f) in trials.iter().zip(factors_of) {
                let (s, b, by) = replay_decision(&t.ll, ln_prior, f, th, min_bin, &mut post);
                correct += (s == t.label) as u32;
                early += by as u32;
                early_correct += (by && s == t.label) as u32;
                times.push((b + 1) as f64 * bin_ms);
            }
            times.sort_by(|a, b| a.total_cmp(b));
            let n = trials.len() as u32;
            let (lo, hi) = clopper_pearson(correct as u64, n as u64, 0.05);
            ThresholdEvidence {
                threshold: th,
                trials: n,
                correct,
                lo,
                hi,
                median_decision_ms: times.get(times.len() / 2).copied().unwrap_or(f64::NAN),
                early,
                early_correct,
            }
        })
        .collect()
}

/// Why calibration could not be fitted.
#[derive(Debug, thiserror::Error)]
pub enum CalibrationError {
    /// Planning a fold.
    #[error(transparent)]
    Fit(#[from] FitError),
    /// Building a fold's model.
    #[error(transparent)]
    Model(#[from] ModelError),
    /// Decoding a fold.
    #[error(transparent)]
    Engine(#[from] EngineError),
    /// Too little data.
    #[error("{0}")]
    Data(String),
}

/// Captures each trial's log-likelihood trajectory.
struct Trajectories {
    index: HashMap<u64, usize>,
    ns: usize,
    out: Vec<Vec<f64>>,
}

impl EngineSink for Trajectories {
    fn frame(&mut self, f: &Frame<'_>) {
        if let Some(&i) = self.index.get(&f.trial) {
            let b = f.bin as usize;
            self.out[i][b * self.ns..(b + 1) * self.ns].copy_from_slice(f.log_likelihood);
        }
    }
}

/// Decodes `data`'s trials with `model` (order statistics, calibration off; prepared with the
/// default lookup budget) and returns each trial's log-likelihood trajectory, in `data.trials`
/// order.
pub fn log_likelihood_trajectories(
    model: Arc<Model>,
    data: &Dataset,
) -> Result<Vec<Vec<f64>>, EngineError> {
    let (ns, nb) = (model.n_stimuli(), model.n_bins());
    let mut sink = Trajectories {
        index: data
            .trials
            .iter()
            .enumerate()
            .map(|(j, t)| (t.id, j))
            .collect(),
        ns,
        out: vec![vec![0.0; nb * ns]; data.trials.len()],
    };
    let mut cfg = EngineConfig::new(data.tick_rate_hz);
    cfg.calibrated = false;
    run_dataset(model.prepare(LookupBudget::DEFAULT), data, cfg, &mut sink)?;
    Ok(sink.out)
}

/// Cross-validated held-out trajectories of a dataset's labelled trials.
#[derive(Clone, Debug)]
pub struct HeldOutSet {
    /// Stimulus names, in the order of the labels.
    pub stimuli: Vec<String>,
    /// ln prior of the full model.
    pub ln_prior: Vec<f64>,
    /// Fold of each trial.
    pub fold_of: Vec<usize>,
    /// Number of folds.
    pub folds: usize,
    /// The trials, in the labelled trials' order.
    pub trials: Vec<HeldOutTrial>,
    /// Bin width, ms.
    pub bin_ms: f64,
}

/// Decodes every labelled trial of `data` with a model fitted on the other folds (stratified,
/// seeded): the held-out data calibration is fitted on. `fit` turns a plan into a model spec
/// (the caller chooses threads and progress); `stimuli` fixes the label order.
pub fn held_out_set(
    data: &Dataset,
    opts: &FitOptions,
    stimuli: &[String],
    folds: usize,
    seed: u64,
    fit: &dyn Fn(&FitPlan) -> ModelSpec,
) -> Result<HeldOutSet, CalibrationError> {
    let labelled: Vec<usize> = (0..data.trials.len())
        .filter(|&i| data.trials[i].stimulus.is_some())
        .collect();
    // Folds fitted with the stimuli in the order they are met, whatever order `data` lists
    // them in (pass `stimuli` in that order too for results independent of any listing).
    let data = data.subset(&labelled).in_met_order();
    let ns = stimuli.len();
    let at = auspex_engine::data::name_index(stimuli);
    let labels: Vec<usize> = data
        .trials
        .iter()
        .map(|t| {
            t.stimulus
                .as_deref()
                .and_then(|s| at.get(s).copied())
                .ok_or_else(|| {
                    CalibrationError::Data(format!(
                        "trial {} has stimulus {:?}, not among the model's",
                        t.id, t.stimulus
                    ))
                })
        })
        .collect::<Result<_, _>>()?;
    let min_per = (0..ns)
        .map(|s| labels.iter().filter(|&&l| l == s).count())
        .min()
        .unwrap_or(0);
    if min_per < 2 {
        return Err(CalibrationError::Data(format!(
            "calibration needs at least 2 labelled trials of every stimulus (the fewest: {min_per})"
        )));
    }
    let k = folds.clamp(2, min_per);
    let when: Vec<(i64, u64)> = data.trials.iter().map(|t| (t.onset, t.id)).collect();
    let fold_of = stratified_folds(&labels, &when, ns, k, seed);
    let nt = labels.len();
    let mut trials: Vec<Option<HeldOutTrial>> = vec![None; nt];
    let full_prior = plan(&data, opts)?.reordered(stimuli)?.prior;
    let psum: f64 = full_prior.iter().sum();
    let ln_prior: Vec<f64> = full_prior.iter().map(|p| (p / psum).ln()).collect();
    let mut bin_ms = opts.bin_width_s * 1000.0;
    for f in 0..k {
        let train: Vec<usize> = (0..nt).filter(|&i| fold_of[i] != f).collect();
        let test: Vec<usize> = (0..nt).filter(|&i| fold_of[i] == f).collect();
        let p = plan(&data.subset(&train), opts)?.reordered(stimuli)?;
        bin_ms = p.bin_width_s * 1000.0;
        let mut spec = fit(&p);
        // The held-out trials are decoded under the full model's prior, as the engine will.
        spec.prior = full_prior.clone();
        let model = Arc::new(Model::new(spec)?);
        let ll = log_likelihood_trajectories(model, &data.subset(&test))?;
        for (j, ll) in test.iter().zip(ll) {
            trials[*j] = Some(HeldOutTrial {
                label: labels[*j],
                ll,
            });
        }
    }
    Ok(HeldOutSet {
        stimuli: stimuli.to_vec(),
        ln_prior,
        fold_of,
        folds: k,
        trials: trials
            .into_iter()
            .map(|t| t.expect("every trial is in one fold"))
            .collect(),
        bin_ms,
    })
}

/// Factors fitted for each fold on the *other* folds' held-out trials (cross-fitting), so each
/// trial is calibrated without its own label.
pub fn cross_fitted_factors(
    set: &HeldOutSet,
    method: CalibrationMethod,
    min_bin: usize,
) -> Vec<Fitted> {
    let nb = set.trials.first().map(|t| t.ll.len()).unwrap_or(0) / set.ln_prior.len().max(1);
    (0..set.folds)
        .map(|f| {
            let others: Vec<&HeldOutTrial> = set
                .trials
                .iter()
                .zip(&set.fold_of)
                .filter(|(_, &g)| g != f)
                .map(|(t, _)| t)
                .collect();
            fit_factors(method, &others, &set.ln_prior, nb, min_bin)
        })
        .collect()
}

/// A calibration of `method` from a held-out set: factors fitted on every held-out trial (for
/// the model fitted on all of them), evidence and log loss from cross-fitting.
pub fn calibrate(set: &HeldOutSet, method: CalibrationMethod, min_time_s: f64) -> Calibration {
    let ns = set.ln_prior.len();
    let nb = set.trials.first().map(|t| t.ll.len()).unwrap_or(0) / ns.max(1);
    let min_bin = min_bin_for(min_time_s, set.bin_ms / 1000.0) as usize;
    let all: Vec<&HeldOutTrial> = set.trials.iter().collect();
    let fitted = fit_factors(method, &all, &set.ln_prior, nb, min_bin);
    let per_fold = cross_fitted_factors(set, method, min_bin);
    let factors_of: Vec<&Fitted> = set.fold_of.iter().map(|&f| &per_fold[f]).collect();
    let mut loss = 0.0;
    for (f, fac) in per_fold.iter().enumerate() {
        let mine: Vec<&HeldOutTrial> = set
            .trials
            .iter()
            .zip(&set.fold_of)
            .filter(|(_, &g)| g == f)
            .map(|(t, _)| t)
            .collect();
        loss += mean_log_loss(&mine, &set.ln_prior, fac) * mine.len() as f64;
    }
    Calibration {
        method,
        factors: fitted.factors,
        floor: fitted.floor,
        held_out_trials: set.trials.len() as u32,
        folds: set.folds as u32,
        log_loss_uncalibrated: mean_log_loss(&all, &set.ln_prior, &Fitted::default()),
        log_loss_calibrated: loss / set.trials.len().max(1) as f64,
        min_time_s,
        evidence: threshold_evidence(
            &set.trials,
            &factors_of,
            &set.ln_prior,
            &EVIDENCE_THRESHOLDS,
            min_bin,
            set.bin_ms,
        ),
    }
}

/// Page's CUSUM alarm level: `ln 1000` (average run length between false alarms ≥ 1000
/// labelled decisions while the promise is kept).
pub const WATCH_ALARM: f64 = 6.907755278982137;

/// Live record of the decisions made at one promised level.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct PromiseWatch {
    /// The promise: the threshold decisions were made at.
    pub threshold: f64,
    /// Labelled threshold decisions.
    pub decisions: u64,
    /// Of which right.
    pub correct: u64,
    /// The CUSUM statistic (0 while the record matches the promise).
    pub cusum: f64,
    /// The CUSUM has reached [`WATCH_ALARM`] (stays set until [`PromiseWatch::reset`]).
    pub alarm: bool,
}

impl PromiseWatch {
    /// A fresh watch of `threshold`.
    pub fn new(threshold: f64) -> Self {
        PromiseWatch {
            threshold,
            ..Default::default()
        }
    }

    /// The error rate the watch is tuned to detect: twice the promised one.
    pub fn alternative(&self) -> f64 {
        (2.0 * (1.0 - self.threshold)).min(1.0)
    }

    /// Adds one labelled decision; returns true when this one raised the alarm.
    pub fn add(&mut self, right: bool) -> bool {
        self.decisions += 1;
        self.correct += right as u64;
        let p0 = 1.0 - self.threshold; // promised error rate
        let p1 = self.alternative();
        if !(p0 > 0.0 && p1 > p0) {
            return false; // a promise of certainty is not watched by ratio
        }
        let llr = if right {
            ((1.0 - p1) / (1.0 - p0)).ln()
        } else {
            (p1 / p0).ln()
        };
        self.cusum = (self.cusum + llr).max(0.0);
        if !self.alarm && self.cusum >= WATCH_ALARM {
            self.alarm = true;
            return true;
        }
        false
    }

    /// Realised accuracy and its 95% Clopper–Pearson interval.
    pub fn accuracy(&self) -> (f64, f64, f64) {
        let (lo, hi) = clopper_pearson(self.correct, self.decisions, 0.05);
        (self.correct as f64 / self.decisions.max(1) as f64, lo, hi)
    }

    /// Starts over (a new model or a new session).
    pub fn reset(&mut self) {
        *self = PromiseWatch::new(self.threshold);
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use auspex_engine::calibration::PromiseError;
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// Two stimuli, uniform prior, n1 trials whose log-likelihood favours the presented stimulus
    /// by m nats and n0 trials that favour the other by m. Worked by hand: the log loss is
    /// `n1·ln(1 + e^{−βm}) + n0·ln(1 + e^{βm})`, whose derivative vanishes at
    /// `e^{βm} = n1/n0`, so `β = ln(n1/n0)/m` — the calibrated confidence equals the realised
    /// accuracy n1/(n0 + n1) (logistic regression on one feature, saturated).
    #[test]
    fn temperature_matches_the_worked_two_stimulus_case() {
        let m = 5.0;
        let (n1, n0) = (90usize, 10usize);
        let mut trials = Vec::new();
        for i in 0..n1 + n0 {
            let right = i < n1;
            trials.push(HeldOutTrial {
                label: 0,
                ll: if right { vec![m, 0.0] } else { vec![0.0, m] },
            });
        }
        let refs: Vec<&HeldOutTrial> = trials.iter().collect();
        let lp = [0.5f64.ln(), 0.5f64.ln()];
        let beta = fit_factor(&refs, &lp, 0..1);
        let want = (n1 as f64 / n0 as f64).ln() / m;
        assert!((beta - want).abs() < 1e-9, "β {beta} vs worked {want}");
        let mut post = [0.0; 2];
        posterior_into(&lp, &[m, 0.0], beta, 0.0, &mut post);
        assert!((post[0] - 0.9).abs() < 1e-9);
    }

    /// Temperature scaling of data drawn from a calibrated forecaster needs no correction:
    /// labels drawn from softmax(ll) itself give β ≈ 1.
    #[test]
    fn calibrated_forecasts_need_no_correction() {
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        let ns = 4;
        let lp = vec![(0.25f64).ln(); ns];
        let mut trials = Vec::new();
        for _ in 0..4000 {
            let ll: Vec<f64> = (0..ns).map(|_| rng.gen_range(-3.0..3.0)).collect();
            let mut p = vec![0.0; ns];
            posterior_into(&lp, &ll, 1.0, 0.0, &mut p);
            let u: f64 = rng.gen();
            let mut acc = 0.0;
            let mut label = ns - 1;
            for (s, q) in p.iter().enumerate() {
                acc += q;
                if u < acc {
                    label = s;
                    break;
                }
            }
            trials.push(HeldOutTrial { label, ll });
        }
        let refs: Vec<&HeldOutTrial> = trials.iter().collect();
        let beta = fit_factor(&refs, &lp, 0..1);
        assert!((beta - 1.0).abs() < 0.08, "β {beta}");
        // Over-confident forecasts (the same labels, log-likelihoods doubled) get β ≈ 1/2.
        let doubled: Vec<HeldOutTrial> = trials
            .iter()
            .map(|t| HeldOutTrial {
                label: t.label,
                ll: t.ll.iter().map(|x| 2.0 * x).collect(),
            })
            .collect();
        let refs: Vec<&HeldOutTrial> = doubled.iter().collect();
        let beta2 = fit_factor(&refs, &lp, 0..1);
        assert!((beta2 - beta / 2.0).abs() < 1e-6, "{beta2} vs {beta}/2");
    }

    /// A well-specified model fitted on many trials needs (almost) no correction; the same
    /// scenario fitted on a handful of trials per stimulus is over-confident and gets β < 1.
    #[test]
    fn well_specified_model_with_many_trials_needs_almost_no_correction() {
        use crate::simulate::{simulate, Scenario, ScenarioUnit};
        use auspex_engine::count::CountFamily;
        let units: Vec<ScenarioUnit> = (0..6)
            .map(|i| ScenarioUnit {
                id: 10 + i,
                preferred_deg: 30.0 * i as f64,
                baseline_count: 0.8,
                peak_count: 3.0,
                count_family: "poisson".into(),
                fano: 1.0,
                early_ms: 20.0,
                late_ms: 45.0,
                width_ms: 8.0,
            })
            .collect();
        let sc = |trials: u32| Scenario {
            description: "calibration test".into(),
            stimuli: vec![
                ("a".into(), 0.0),
                ("b".into(), 45.0),
                ("c".into(), 90.0),
                ("d".into(), 180.0),
            ],
            bin_width_ms: 1.0,
            window_ms: 80.0,
            trials_per_stimulus: trials,
            gap_ms: (50.0, 100.0),
            spontaneous_hz: 0.0,
            tick_rate_hz: 10_000.0,
            seed: 3,
            units: units.clone(),
        };
        let beta_for = |trials: u32| {
            let s = sc(trials);
            let model = Model::new(s.true_model().unwrap()).unwrap();
            let data = simulate(&model, &s.sim_options());
            let opts = FitOptions {
                bin_width_s: 0.001,
                window_s: 0.08,
                families: vec![CountFamily::Poisson],
                ..FitOptions::default()
            };
            let stimuli = model.stimuli().to_vec();
            let set = held_out_set(&data, &opts, &stimuli, 5, 1, &|p| p.fit_all()).unwrap();
            calibrate(&set, CalibrationMethod::Temperature, 0.02).factors[0]
        };
        let many = beta_for(300);
        assert!(
            (0.9..=1.1).contains(&many),
            "β {many} with 300 trials per stimulus"
        );
        let few = beta_for(8);
        eprintln!("β {many:.3} with 300 trials per stimulus, {few:.3} with 8");
        assert!(few < many - 0.1, "β {few} with 8 trials vs {many} with 300");
    }

    /// Forecasts from a calibrated model whose labels are replaced, 5% of the time, by a
    /// uniformly drawn stimulus: exactly the ε-contamination mixture with ε = 0.05 and β = 1.
    #[test]
    fn temperature_floor_recovers_a_contamination_share() {
        let mut rng = ChaCha8Rng::seed_from_u64(5);
        let ns = 4;
        let lp = vec![(0.25f64).ln(); ns];
        let mut trials = Vec::new();
        for _ in 0..6000 {
            let ll: Vec<f64> = (0..ns).map(|_| rng.gen_range(-6.0..6.0)).collect();
            let mut p = vec![0.0; ns];
            posterior_into(&lp, &ll, 1.0, 0.0, &mut p);
            let label = if rng.gen::<f64>() < 0.05 {
                rng.gen_range(0..ns)
            } else {
                let u: f64 = rng.gen();
                let mut acc = 0.0;
                p.iter()
                    .position(|q| {
                        acc += q;
                        u < acc
                    })
                    .unwrap_or(ns - 1)
            };
            trials.push(HeldOutTrial { label, ll });
        }
        let refs: Vec<&HeldOutTrial> = trials.iter().collect();
        let (beta, eps) = fit_factor_floor(&refs, &lp, 0..1);
        assert!((0.03..=0.05).contains(&eps), "ε {eps}");
        assert!((beta - 1.0).abs() < 0.12, "β {beta}");
        // Plain temperature scaling has to flatten everything instead.
        let t = fit_factor(&refs, &lp, 0..1);
        assert!(t < beta, "temperature {t} vs floor's β {beta}");
    }

    #[test]
    fn bands_double_from_the_minimum_time_and_cover_the_window() {
        assert_eq!(
            bands(250, 19),
            vec![0..20, 20..40, 40..80, 80..160, 160..250]
        );
        assert_eq!(bands(10, 0), vec![0..5, 5..10]);
        assert_eq!(bands(11, 0), vec![0..5, 5..11]);
        let b = bands(1000, 9);
        assert_eq!(b.first().unwrap().start, 0);
        assert_eq!(b.last().unwrap().end, 1000);
        for w in b.windows(2) {
            assert_eq!(w[0].end, w[1].start);
        }
    }

    #[test]
    fn threshold_choice_takes_the_smallest_supported_and_refuses_otherwise() {
        let ev = |th: f64, correct: u32| {
            let (lo, hi) = clopper_pearson(correct as u64, 400, 0.05);
            ThresholdEvidence {
                threshold: th,
                trials: 400,
                correct,
                lo,
                hi,
                median_decision_ms: 30.0,
                early: 0,
                early_correct: 0,
            }
        };
        let c = Calibration {
            evidence: vec![ev(0.99, 396), ev(0.9, 360), ev(0.95, 388)],
            ..Default::default()
        };
        // Clopper–Pearson lower bounds: 388/400 falls just short of 0.95, 396/400 clears it,
        // 360/400 falls short of 0.9.
        assert_eq!(c.threshold_for(0.95).unwrap().threshold, 0.99);
        assert_eq!(c.threshold_for(0.9).unwrap().threshold, 0.95);
        assert!(matches!(
            c.threshold_for(0.98),
            Err(PromiseError::Unsupported { .. })
        ));
        assert_eq!(
            Calibration::default().threshold_for(0.9),
            Err(PromiseError::NoEvidence)
        );
    }

    /// The CUSUM by hand at θ = 0.9 (p0 = 0.1, p1 = 0.2): a right decision adds
    /// ln(0.8/0.9) = −0.1178, a wrong one ln 2 = 0.6931; ten wrong in a row reach 6.93 ≥ ln 1000.
    #[test]
    fn watch_follows_the_hand_computed_cusum() {
        let mut w = PromiseWatch::new(0.9);
        w.add(false);
        assert!((w.cusum - 2f64.ln()).abs() < 1e-12);
        w.add(true);
        assert!((w.cusum - (2f64.ln() + (0.8f64 / 0.9).ln())).abs() < 1e-12);
        for _ in 0..20 {
            w.add(true);
        }
        assert_eq!(w.cusum, 0.0);
        let raised: Vec<bool> = (0..10).map(|_| w.add(false)).collect();
        assert_eq!(raised.iter().filter(|&&r| r).count(), 1);
        assert!(raised[9] && w.alarm);
    }

    /// Kept promise: over many streams of 500 decisions right with probability θ the alarm
    /// rate stays within the ARL bound (≤ 1 per 1000 decisions, so ≤ 0.5 per stream; in
    /// practice far fewer). Broken promise (error rate doubled): raised in most streams.
    #[test]
    fn watch_does_not_cry_wolf_and_catches_a_broken_promise() {
        let mut rng = ChaCha8Rng::seed_from_u64(11);
        let streams = 400;
        let mut false_alarms = 0;
        let mut caught = 0;
        for _ in 0..streams {
            let mut kept = PromiseWatch::new(0.95);
            let mut broken = PromiseWatch::new(0.95);
            for _ in 0..500 {
                kept.add(rng.gen::<f64>() < 0.95);
                broken.add(rng.gen::<f64>() < 0.90);
            }
            false_alarms += kept.alarm as usize;
            caught += broken.alarm as usize;
        }
        assert!(
            false_alarms as f64 / streams as f64 <= 0.1,
            "{false_alarms}"
        );
        assert!(caught as f64 / streams as f64 >= 0.5, "{caught}");
    }
}
