//! The validation run: cross-validated accuracy against time for every decoder, decisions across
//! thresholds, mutual information with a label-shuffle null, per-unit accuracy and information,
//! count variability, and the time-rescaling goodness of fit — the numbers behind the HTML
//! report and the JSON summary the CLI draws. Every decoding here runs the same engine as the
//! daemon; the shuffle null uses the engine's window-end likelihood in closed form.

use crate::calibrate::EvidenceRecord;
use crate::fit::{plan, CellInput, FitOptions, FitPlan};
use crate::folds::stratified_folds;
use crate::stats::{clopper_pearson, ks_critical, ks_uniform};
use crate::validation::{
    add_window_end_log_likelihood, decide, earliest_reliable, fano_interval, refit_cell,
    rescaled_intervals,
};
use crate::windows::Ragged;
use auspex_engine::data::Dataset;
use auspex_engine::engine::run_dataset;
use auspex_engine::engine::{Decoder, EngineConfig, EngineSink, Frame};
use auspex_engine::information::information;
use auspex_engine::model::{CellSpec, Model};
use auspex_engine::special::argmax;
use auspex_engine::CountFamily;
use auspex_engine::LookupBudget;
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use serde::Serialize;
use std::collections::HashMap;
use std::sync::Arc;

/// Fewest labelled trials of a stimulus `validate` accepts: one held out, and two left in every
/// training fold, where the calibration is fitted on its own held-out folds. Checked once, up
/// front, naming the stimuli that have fewer.
pub const MIN_TRIALS_PER_STIMULUS: usize = 3;

/// Why a validation run could not give a result.
#[derive(Debug, thiserror::Error)]
pub enum ValidateError {
    /// Fitting a fold's model failed.
    #[error(transparent)]
    Fit(#[from] crate::fit::FitError),
    /// A fitted model was refused.
    #[error(transparent)]
    Model(#[from] auspex_engine::model::ModelError),
    /// The engine refused a replay.
    #[error(transparent)]
    Engine(#[from] auspex_engine::engine::EngineError),
    /// Calibration could not be fitted.
    #[error(transparent)]
    Calibration(#[from] crate::calibrate::CalibrationError),
    /// The data cannot be validated as asked (the message says why and what to do).
    #[error("{0}")]
    Refused(String),
}

/// Where a validation run reports how far it is (the command draws a bar from it; tests and
/// library callers may pass `&()`). Called from worker threads, hence `Sync`.
pub trait Progress: Sync {
    /// The run has `work` units of work in all (see [`WORK`]).
    fn start(&self, _work: u64) {}
    /// What the run is doing now.
    fn stage(&self, _what: &'static str) {}
    /// `work` units done.
    fn done(&self, _work: u64) {}
    /// The run is over.
    fn finish(&self) {}
}

/// Relative costs of the run's steps, so that a progress bar's share done is a share of the
/// time (measured on the demo session: a fold's fit and decoding ≈ 0.5 s, a shuffle's refit
/// with the families held ≈ 0.05 s, a calibration's inner fit ≈ 0.8 s, a learning-curve fit on
/// part of the training ≈ 0.3 s, the per-unit reports ≈ 2 s). A guide, not a promise: the
/// ratios move with the families tried and the numbers of units and stimuli.
pub mod work {
    /// One fold: fit every cell, decode the held-out trials with every decoder.
    pub const FOLD: u64 = 10;
    /// One label shuffle: refit with the fold's families held, decode at the window end.
    pub const SHUFFLE: u64 = 1;
    /// One inner fit of the calibration comparison (folds × folds of them).
    pub const CALIBRATION_FIT: u64 = 16;
    /// One learning-curve fit (sizes × folds of them).
    pub const LEARNING_FIT: u64 = 6;
    /// The per-unit reports and the goodness of fit, at the end.
    pub const UNITS: u64 = 40;
}

impl Progress for () {}

/// Settings of a validation run.
#[derive(Clone, Debug)]
pub struct ValidateOptions {
    /// Cross-validation folds.
    pub folds: usize,
    /// Label shuffles for the information null.
    pub shuffles: usize,
    /// Seed for folds, shuffles and the time-rescaling randomisation.
    pub seed: u64,
    /// Fitting settings (window, bin, families, bandwidth rule).
    pub fit: FitOptions,
    /// Decision threshold for the headline decision figures.
    pub threshold: f64,
    /// Minimum time before a threshold decision, ms.
    pub min_time_ms: f64,
    /// Show a progress bar.
    pub progress: bool,
}

impl Default for ValidateOptions {
    fn default() -> Self {
        ValidateOptions {
            folds: 5,
            shuffles: 200,
            seed: 1,
            fit: FitOptions::default(),
            threshold: auspex_engine::engine::DEFAULT_THRESHOLD,
            min_time_ms: auspex_engine::engine::DEFAULT_MIN_TIME_MS,
            progress: false,
        }
    }
}

/// Thresholds of the decision trade-off.
pub const THRESHOLDS: [f64; 8] = [0.5, 0.6, 0.7, 0.8, 0.9, 0.95, 0.99, 0.999];
/// Consecutive bins the lower 95% bound must stay above chance for "reliably above chance".
pub const RELIABLE_RUN_BINS: usize = 10;

/// How reliable the stated confidence is at one moment of the trial.
#[derive(Clone, Debug, Serialize)]
pub struct ReliabilitySet {
    /// When: "at decision (θ = …)", "at 25 ms", …, "at window end".
    pub when: String,
    /// Confidence bins with accuracy and interval.
    pub bins: Vec<crate::validation::ReliabilityBin>,
    /// Expected calibration error.
    pub ece: f64,
    /// The same points in 10 bins of equal counts (what the report's diagram draws).
    pub equal_mass: Vec<crate::validation::ReliabilityBin>,
}

impl ReliabilitySet {
    /// The set of (confidence, right) points `when`: 10 equal-width bins with the ECE, and 10
    /// equal-count bins.
    pub fn of(when: String, points: &[(f64, bool)]) -> Self {
        let (bins, ece) = crate::validation::reliability(points, 10);
        ReliabilitySet {
            when,
            bins,
            ece,
            equal_mass: crate::validation::reliability_equal_mass(points, 10),
        }
    }
}

/// Whether deciding at a threshold keeps its promise on held-out trials.
#[derive(Clone, Debug, Serialize)]
pub struct Promise {
    /// The threshold: the promised accuracy.
    pub threshold: f64,
    /// Held-out accuracy of decisions at it.
    pub accuracy: f64,
    /// 95% Clopper–Pearson interval.
    pub lo: f64,
    /// 95% Clopper–Pearson interval.
    pub hi: f64,
    /// The interval reaches the promise (kept) or lies wholly below it (broken).
    pub kept: bool,
}

/// One recalibration method, fitted inside each training fold only (nested cross-validation)
/// and applied to the fold's held-out trials.
#[derive(Clone, Debug, Serialize)]
pub struct MethodReport {
    /// Method name ("none" is the raw posterior).
    pub method: String,
    /// Mean held-out log loss per trial and bin, nats.
    pub log_loss: f64,
    /// Factor range over folds and bins.
    pub factor_range: (f64, f64),
    /// Prior share ε range over folds.
    pub floor_range: (f64, f64),
    /// Deciding at each threshold: held-out record.
    pub record: Vec<auspex_engine::calibration::ThresholdEvidence>,
    /// Thresholds from 0.8 to 0.99 whose interval reaches the promise, of those tested.
    pub kept: (usize, usize),
    /// Thresholds from 0.8 to 0.99 whose threshold decisions' accuracy is at least θ (the
    /// point estimate, a stricter reading), of those tested.
    pub met: (usize, usize),
    /// Reliability at decision time (headline threshold).
    pub at_decision: ReliabilitySet,
    /// Median decision time at each threshold divided by the raw posterior's median decision
    /// time at the same realised accuracy (interpolated on the raw trade-off; None outside it).
    pub time_ratio: Vec<Option<f64>>,
}

/// Calibration of the order-statistics decoder's posteriors on held-out trials.
#[derive(Clone, Debug, Serialize)]
pub struct Calibration {
    /// Reliability at decision time and at fixed times after onset.
    pub reliability: Vec<ReliabilitySet>,
    /// Every threshold's promise against its realised accuracy.
    pub promises: Vec<Promise>,
    /// The raw posterior and each recalibration, compared on the same held-out trials.
    pub methods: Vec<MethodReport>,
    /// The method `auspex fit` applies by default.
    pub default_method: String,
}

/// One point of the learning curve.
#[derive(Clone, Debug, Serialize)]
pub struct LearningPoint {
    /// Training trials of each stimulus in each fold.
    pub trials_per_stimulus: usize,
    /// Held-out trials decoded (all folds).
    pub held_out: u64,
    /// Window-end accuracy (order statistics, population).
    pub accuracy: f64,
    /// 95% Clopper–Pearson interval.
    pub lo: f64,
    /// 95% Clopper–Pearson interval.
    pub hi: f64,
    /// Bias-corrected information, bits.
    pub info_bits: f64,
    /// Its standard error, bits.
    pub info_se_bits: f64,
}

/// Accuracy at one time.
#[derive(Clone, Debug, Serialize)]
pub struct CurvePoint {
    /// End of the bin, ms after onset.
    pub t_ms: f64,
    /// Share of held-out trials whose maximum a posteriori stimulus was the presented one.
    pub accuracy: f64,
    /// Clopper–Pearson 95% interval.
    pub lo: f64,
    /// Upper bound.
    pub hi: f64,
}

/// One threshold of the trade-off.
#[derive(Clone, Debug, Serialize)]
pub struct TradeoffPoint {
    /// Threshold on the top posterior.
    pub threshold: f64,
    /// Decision accuracy.
    pub accuracy: f64,
    /// Clopper–Pearson 95% interval.
    pub lo: f64,
    /// Upper bound.
    pub hi: f64,
    /// Mean decision time, ms after onset (end of the deciding bin).
    pub mean_time_ms: f64,
    /// Median decision time, ms.
    pub median_time_ms: f64,
    /// Share decided by the threshold before the window end.
    pub early_share: f64,
}

/// One decoder's cross-validated figures.
#[derive(Clone, Debug, Serialize)]
pub struct DecoderReport {
    /// Decoder name.
    pub decoder: String,
    /// Accuracy at the window end.
    pub accuracy_end: CurvePoint,
    /// Accuracy every bin.
    pub curve: Vec<CurvePoint>,
    /// Earliest time (ms) from which the lower 95% bound stays above chance for
    /// [`RELIABLE_RUN_BINS`] bins.
    pub earliest_reliable_ms: Option<f64>,
    /// Decision trade-off.
    pub tradeoff: Vec<TradeoffPoint>,
    /// At the headline threshold: decision accuracy and times.
    pub decision: TradeoffPoint,
    /// Decision times at the headline threshold, ms, one per trial.
    pub decision_times_ms: Vec<f64>,
    /// Confusion (presented row × decoded column) at the decision.
    pub confusion_decision: Vec<Vec<u64>>,
    /// Confusion at the window end.
    pub confusion_end: Vec<Vec<u64>>,
    /// Mutual information between presented and window-end decoded stimulus, bias-corrected.
    pub info_bits: f64,
}

/// Information with its null.
#[derive(Clone, Debug, Serialize)]
pub struct InfoReport {
    /// Plug-in information, bits.
    pub plugin_bits: f64,
    /// Panzeri–Treves bias, bits.
    pub bias_bits: f64,
    /// Bias-corrected information, bits.
    pub bits: f64,
    /// Shuffle null (bias-corrected bits), one per shuffle.
    pub null_bits: Vec<f64>,
    /// 95th percentile of the null.
    pub null_95: f64,
    /// (1 + #{null ≥ observed}) / (1 + shuffles).
    pub p_value: f64,
}

/// One unit × stimulus cell.
#[derive(Clone, Debug, Serialize)]
pub struct CellReport {
    /// Stimulus.
    pub stimulus: String,
    /// Trials.
    pub n_trials: usize,
    /// Mean window count.
    pub mean: f64,
    /// Variance.
    pub variance: f64,
    /// Fano factor with its 95% interval (None when the mean is 0).
    pub fano: Option<(f64, f64, f64)>,
    /// Count family chosen on all trials.
    pub family: String,
    /// Time-rescaling KS statistic on held-out trials.
    pub ks_d: f64,
    /// Its 95% critical value (exact, for the number of intervals).
    pub ks_critical: f64,
    /// Rescaled intervals tested.
    pub ks_n: usize,
    /// D within the 95% band (cells with fewer than 5 intervals count as passing, untested).
    pub ks_pass: bool,
}

/// One unit.
#[derive(Clone, Debug, Serialize)]
pub struct UnitReport {
    /// Unit id.
    pub unit: u32,
    /// Single-unit window-end accuracy (held out).
    pub accuracy: f64,
    /// Its information, bias-corrected bits, with the shuffle null.
    pub info: InfoReport,
    /// Cells.
    pub cells: Vec<CellReport>,
}

/// Goodness-of-fit summary.
#[derive(Clone, Debug, Serialize)]
pub struct FitReport {
    /// Cells with at least 5 rescaled intervals.
    pub cells_tested: usize,
    /// Cells outside the 95% band.
    pub cells_failed: usize,
    /// (unit, stimulus) of each failed cell.
    pub failed: Vec<(u32, String)>,
}

/// The whole validation.
#[derive(Clone, Debug, Serialize)]
pub struct Validation {
    /// Where the data came from.
    pub source: String,
    /// Labelled trials used.
    pub trials: usize,
    /// Units.
    pub units: Vec<u32>,
    /// Stimuli.
    pub stimuli: Vec<String>,
    /// Bin width, ms.
    pub bin_ms: f64,
    /// Window, ms.
    pub window_ms: f64,
    /// Folds.
    pub folds: usize,
    /// Shuffles.
    pub shuffles: usize,
    /// Seed.
    pub seed: u64,
    /// Chance: the share of the most frequent stimulus.
    pub chance: f64,
    /// Headline threshold and minimum time.
    pub threshold: f64,
    /// Minimum decision time, ms.
    pub min_time_ms: f64,
    /// Per decoder.
    pub decoders: Vec<DecoderReport>,
    /// Population information (order statistics, window end) with the shuffle null.
    pub information: InfoReport,
    /// Per unit, ranked by information.
    pub units_ranked: Vec<UnitReport>,
    /// Goodness of fit.
    pub goodness_of_fit: FitReport,
    /// Whether the closed-form window-end decoding used by the shuffle null gives exactly the
    /// engine's window-end decisions (it must; false would mean the null is not comparable).
    pub closed_form_agrees: bool,
    /// Held-out accuracy and information at the window end against training trials per stimulus
    /// (same folds, training trials subsampled per stimulus).
    pub learning_curve: Vec<LearningPoint>,
    /// Whether the decisions' confidence keeps its promise (order statistics, held out).
    pub calibration: Calibration,
    /// Seconds the run took.
    pub seconds: f64,
}

/// Units with a picture section in the report: the most informative ones, plus every unit whose
/// fit is flagged (a page with thousands of units' plots would not open; the table and the JSON
/// hold every unit).
pub const UNIT_FIGURES_MAX: usize = 64;
/// Trials per stimulus in a unit's raster.
pub const RASTER_TRIALS: usize = 12;

/// Points of a line, (x, y).
pub type Curve = Vec<(f64, f64)>;

/// What one unit's report section draws, computed here so the renderer only draws.
#[derive(Clone, Debug)]
pub struct UnitFigures {
    /// Unit id.
    pub unit: u32,
    /// Per stimulus, its first [`RASTER_TRIALS`] labelled trials: spike times, ms after onset.
    pub raster: Vec<Vec<Vec<f64>>>,
    /// PSTH bin edges, ms after onset.
    pub psth_edges: Vec<f64>,
    /// Per stimulus: the PSTH (spikes/s per bin) and the fitted density (ms, spikes/s).
    pub psth: Vec<(Vec<f64>, Curve)>,
    /// Window counts 0 ..= `count_max` (the last one gathers higher counts).
    pub count_max: usize,
    /// Per stimulus: each count's share of trials and the fitted distribution (count + 0.5,
    /// probability).
    pub counts: Vec<(Vec<f64>, Curve)>,
    /// Per stimulus: the time-rescaling curve (model quantile, deviation / the cell's 95%
    /// critical value, clamped to ±1.6), None with fewer than 5 intervals.
    pub ks: Vec<Option<Curve>>,
}

/// What the pictures need besides the numbers.
pub struct Extras {
    /// The model fitted on all labelled trials (for densities and count distributions).
    pub full_model: Arc<Model>,
    /// The labelled dataset.
    pub data: Dataset,
    /// Stimulus index of each labelled trial.
    pub labels: Vec<usize>,
    /// Per decoder, per trial: the trajectory (n_bins × S posteriors).
    pub trajectories: Vec<Vec<Vec<f32>>>,
    /// Per cell (unit-major), the held-out rescaled intervals.
    pub rescaled: Vec<Vec<f64>>,
    /// Picture data of the units shown in detail, in rank order.
    pub unit_figures: Vec<UnitFigures>,
}

/// Counts of `values` in `n` equal bins over [lo, hi) (the last bin takes hi), with the edges.
pub fn histogram(values: &[f64], lo: f64, hi: f64, n: usize) -> (Vec<f64>, Vec<f64>) {
    let edges: Vec<f64> = (0..=n)
        .map(|i| lo + (hi - lo) * i as f64 / n as f64)
        .collect();
    let mut h = vec![0.0; n];
    for &v in values {
        let i = (((v - lo) / (hi - lo)) * n as f64).floor();
        if i >= 0.0 {
            h[(i as usize).min(n - 1)] += 1.0;
        }
    }
    (edges, h)
}

/// The picture data of one unit (see [`UnitFigures`]), from the run's windows of every unit
/// (`w`, in `data.units` order).
fn unit_figures(
    unit: u32,
    model: &Model,
    data: &Dataset,
    w: &crate::windows::UnitWindows,
    labels: &[usize],
    rescaled: &[Vec<f64>],
    bw_ms: f64,
) -> Option<UnitFigures> {
    let u = model.unit_index(unit)?;
    let d = data.units.iter().position(|&x| x == unit)?;
    let (ns, nb) = (model.n_stimuli(), model.n_bins());
    let window_ms = nb as f64 * bw_ms;
    let of = |st: usize| (0..labels.len()).filter(move |&i| labels[i] == st);
    let times_ms = |i: usize| w.times(d, i).iter().map(|t| t * bw_ms);
    let raster = (0..ns)
        .map(|st| {
            of(st)
                .take(RASTER_TRIALS)
                .map(|i| times_ms(i).collect())
                .collect()
        })
        .collect();
    // PSTH against the fitted density, per stimulus, in spikes/s.
    let nbins_psth = (nb / 5).max(1);
    let width_s = window_ms / nbins_psth as f64 / 1000.0;
    let mut psth_edges = Vec::new();
    let psth = (0..ns)
        .map(|st| {
            let trials = of(st).count();
            let times: Vec<f64> = of(st).flat_map(times_ms).collect();
            let (edges, mut h) = histogram(&times, 0.0, window_ms, nbins_psth);
            psth_edges = edges;
            h.iter_mut()
                .for_each(|c| *c /= trials.max(1) as f64 * width_s);
            let mean = model.count(u, st).mean();
            let fit = model
                .timing(u, st)
                .iter()
                .enumerate()
                .map(|(b, q)| ((b as f64 + 0.5) * bw_ms, mean * q / (bw_ms / 1000.0)))
                .collect();
            (h, fit)
        })
        .collect();
    // Window counts with the fitted distributions.
    let count_max = (0..labels.len())
        .map(|i| w.count(d, i))
        .max()
        .unwrap_or(0)
        .max(3) as usize;
    let counts = (0..ns)
        .map(|st| {
            let trials = of(st).count().max(1) as f64;
            let mut h = vec![0.0; count_max + 1];
            for i in of(st) {
                h[(w.count(d, i) as usize).min(count_max)] += 1.0 / trials;
            }
            let pmf = (0..=count_max)
                .map(|n| (n as f64 + 0.5, model.count(u, st).ln_pmf(n as u32).exp()))
                .collect();
            (h, pmf)
        })
        .collect();
    // Time rescaling: each cell's empirical CDF of rescaled intervals minus the uniform, over
    // that cell's own 95% critical value (it depends on how many intervals the cell has).
    let ks = (0..ns)
        .map(|st| {
            let mut z = rescaled[u * ns + st].clone();
            if z.len() < 5 {
                return None;
            }
            z.sort_by(|a, b| a.total_cmp(b));
            let n = z.len() as f64;
            let crit = ks_critical(z.len(), 0.05);
            // The deviation the KS statistic takes at each interval: the larger of the ECDF's
            // step above, (i+1)/n − q, and below, q − i/n — signed. Thinned to about 200
            // points, always keeping the largest, so a flagged cell's curve leaves the band.
            let dev: Vec<f64> = z
                .iter()
                .enumerate()
                .map(|(i, &q)| {
                    let (up, down) = ((i as f64 + 1.0) / n - q, q - i as f64 / n);
                    if up >= down {
                        up
                    } else {
                        -down
                    }
                })
                .collect();
            let worst = (0..dev.len())
                .max_by(|&a, &b| dev[a].abs().total_cmp(&dev[b].abs()))
                .unwrap_or(0);
            let step = (z.len() / 200).max(1);
            Some(
                (0..z.len())
                    .filter(|&i| i % step == 0 || i == worst)
                    .map(|i| (z[i], (dev[i] / crit).clamp(-1.6, 1.6)))
                    .collect(),
            )
        })
        .collect();
    Some(UnitFigures {
        unit,
        raster,
        psth_edges,
        psth,
        count_max,
        counts,
        ks,
    })
}

struct TrajSink {
    index: HashMap<u64, usize>,
    ns: usize,
    out: Vec<Vec<f32>>,
    /// The log-likelihood trajectories too (order statistics: calibration is fitted on them).
    ll: Option<Vec<Vec<f64>>>,
}

impl EngineSink for TrajSink {
    fn frame(&mut self, f: &Frame<'_>) {
        if let Some(&i) = self.index.get(&f.trial) {
            let b = f.bin as usize;
            for (s, p) in f.posterior.iter().enumerate() {
                self.out[i][b * self.ns + s] = *p as f32;
            }
            if let Some(ll) = self.ll.as_mut() {
                ll[i][b * self.ns..(b + 1) * self.ns].copy_from_slice(f.log_likelihood);
            }
        }
    }
}

/// Puts a plan's stimuli in `order` (folds may meet stimuli in a different first order).
fn reorder(p: FitPlan, order: &[String]) -> Result<FitPlan, ValidateError> {
    Ok(p.reordered(order)?)
}

fn subset(data: &Dataset, keep: &[usize], labels: Option<(&[usize], &[String])>) -> Dataset {
    let mut d = Dataset {
        tick_rate_hz: data.tick_rate_hz,
        units: data.units.clone(),
        spikes: data.spikes.clone(),
        trials: keep.iter().map(|&i| data.trials[i].clone()).collect(),
        declared_from: data.declared_from.clone(),
        stimulus_order: data.stimulus_order.clone(),
    };
    if let Some((lab, names)) = labels {
        for (t, &i) in d.trials.iter_mut().zip(keep) {
            t.stimulus = Some(names[lab[i]].clone());
        }
    }
    d
}

/// (plug-in, first-order bias, the estimate shown) — `auspex_engine::information`, the one
/// estimator: within [0, H(presented)].
fn info(conf: &[u64], ns: usize) -> (f64, f64, f64) {
    let e = information(conf, ns);
    (e.plug_in_bits, e.bias_bits, e.bits)
}

fn info_report(conf: &[u64], ns: usize, mut null: Vec<f64>) -> InfoReport {
    let (plugin_bits, bias_bits, bits) = info(conf, ns);
    let ge = null.iter().filter(|&&x| x >= bits).count();
    let p_value = (1 + ge) as f64 / (1 + null.len()) as f64;
    let mut sorted = null.clone();
    sorted.sort_by(|a, b| a.total_cmp(b));
    let null_95 = if sorted.is_empty() {
        f64::NAN
    } else {
        sorted[((sorted.len() as f64 * 0.95).ceil() as usize).clamp(1, sorted.len()) - 1]
    };
    null.shrink_to_fit();
    InfoReport {
        plugin_bits,
        bias_bits,
        bits,
        null_bits: null,
        null_95,
        p_value,
    }
}

fn nested(conf: &[u64], ns: usize) -> Vec<Vec<u64>> {
    conf.chunks(ns).map(|r| r.to_vec()).collect()
}

/// Per-fold state kept for the shuffle null.
struct Fold {
    train: Vec<usize>,
    test: Vec<usize>,
    /// Per cell: family and bandwidth (bins) chosen on the real training labels.
    choice: Vec<(CountFamily, f64)>,
}

/// Window-end decoding of `test` trials with `model`, population and per unit: the
/// population's into the confusion matrix `pop`, each unit's alone handed to `unit(u, presented,
/// decided)` (a dense matrix per unit, or a list where matrices for every unit would not fit).
fn window_end_confusions(
    model: &Model,
    bins: &[Ragged<u32>],
    labels: &[usize],
    test: &[usize],
    pop: &mut [u64],
    mut unit: impl FnMut(usize, usize, usize),
) {
    let (nu, ns) = (model.n_units(), model.n_stimuli());
    let mut total = vec![0.0f64; ns];
    let mut one = vec![0.0f64; ns];
    for &i in test {
        total.copy_from_slice(model.ln_prior());
        for (u, b) in bins.iter().enumerate().take(nu) {
            one.iter_mut().for_each(|x| *x = 0.0);
            add_window_end_log_likelihood(model, u, b.row(i), &mut one);
            for s in 0..ns {
                total[s] += one[s];
            }
            unit(u, labels[i], argmax_within_rounding(&one));
        }
        pop[labels[i] * ns + argmax_within_rounding(&total)] += 1;
    }
}

/// The first stimulus whose log-likelihood is within rounding of the largest. Summed over the
/// units in another order, equal sums differ in their last bits; two stimuli whose terms are
/// equal (cells refitted on the same shuffled data) must not be told apart by that rounding —
/// found by the unit-order property test (`tests/invariance.rs`: a label-shuffle null that
/// moved by 0.06 bits when the units were listed in another order).
fn argmax_within_rounding(v: &[f64]) -> usize {
    let max = v.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    let tol = 1e-12 * max.abs().max(1.0);
    v.iter().position(|&x| x >= max - tol).unwrap_or(0)
}

/// Runs the validation, reporting progress to `bar`; prints nothing.
pub fn validate_with(
    data: &Dataset,
    source: &str,
    opts: &ValidateOptions,
    bar: &dyn Progress,
) -> Result<(Validation, Extras), ValidateError> {
    let labelled: Vec<usize> = (0..data.trials.len())
        .filter(|&i| data.trials[i].stimulus.is_some())
        .collect();
    let data = subset(data, &labelled, None);
    // Computed with the stimuli in the order they are met, presented in the order asked for
    // (`--stimulus-order`, numeric names in numeric order): no figure depends on the listing.
    let presented = data.stimulus_names();
    let data = data.in_met_order();
    let full_plan = plan(&data, &opts.fit)?;
    let stimuli = full_plan.stimuli.clone();
    let (ns, nb) = (stimuli.len(), full_plan.n_bins);
    let at = auspex_engine::data::name_index(&stimuli);
    let labels: Vec<usize> = data
        .trials
        .iter()
        .map(|t| {
            t.stimulus
                .as_deref()
                .and_then(|s| at.get(s).copied())
                .unwrap_or(0)
        })
        .collect();
    let nt = labels.len();
    let min_per = (0..ns)
        .map(|s| labels.iter().filter(|&&l| l == s).count())
        .min()
        .unwrap_or(0);
    let k = opts.folds.clamp(2, min_per.max(2));
    if min_per < MIN_TRIALS_PER_STIMULUS {
        let few: Vec<String> = (0..ns)
            .filter_map(|s| {
                let n = labels.iter().filter(|&&l| l == s).count();
                (n < MIN_TRIALS_PER_STIMULUS).then(|| format!("{:?} ({n})", stimuli[s]))
            })
            .collect();
        return Err(ValidateError::Refused(format!(
            "{source}: every stimulus needs at least {MIN_TRIALS_PER_STIMULUS} labelled trials for cross-validation \
             (each training fold must keep 2 of it to fit the calibration inside the fold); too few: {}",
            few.join(", ")
        )));
    }
    // The fit's windows and model, and what validation adds: a confusion matrix per unit
    // (stimuli × stimuli) for the real folds, each shuffle worker's per-unit decisions (a word
    // per unit and trial) and its two matrices, and the trajectories (trials × bins × stimuli
    // per decoder).
    crate::windows::check_fit_size(
        data.units.len(),
        nt,
        ns,
        nb,
        crate::windows::spikes_in_windows(&data, full_plan.bin_ticks * nb as i64),
    )
    .map_err(crate::fit::FitError::from)?;
    {
        use auspex_engine::budget::{check, product};
        let workers = std::thread::available_parallelism().map_or(1, |n| n.get()) as u128 + 2;
        let (u, s, t, b) = (data.units.len() as u128, ns as u128, nt as u128, nb as u128);
        check(
            "validation",
            || {
                format!(
                    "{} units × {ns}² stimulus pairs, {nt} trials × {nb} bins × {ns} stimuli",
                    data.units.len()
                )
            },
            product(&[u, s, s, 8])
                + product(&[workers, (u + 1) * t * 4 + s * s * 8 * 2])
                + product(&[t, b, s, 4 * 3 + 8]),
        )
        .map_err(crate::fit::FitError::from)?;
    }
    let when: Vec<(i64, u64)> = data.trials.iter().map(|t| (t.onset, t.id)).collect();
    let fold_of = stratified_folds(&labels, &when, ns, k, opts.seed);
    let bw_ms = opts.fit.bin_width_s * 1000.0;
    let min_bin =
        auspex_engine::decision::min_bin_for(opts.min_time_ms / 1000.0, opts.fit.bin_width_s)
            as usize;

    let sizes = learning_sizes(&labels, &fold_of, k, ns);
    bar.start(
        k as u64 * work::FOLD
            + opts.shuffles as u64 * work::SHUFFLE
            + (k * k) as u64 * work::CALIBRATION_FIT
            + (sizes.len() * k) as u64 * work::LEARNING_FIT
            + work::UNITS,
    );

    // Per unit, per trial: spike bins in the window.
    let w = crate::windows::windows(&data, &data.units, full_plan.bin_ticks, nb);
    let bins: Vec<Ragged<u32>> = w
        .units
        .iter()
        .map(|per| per.map(|t| (*t as usize).min(nb - 1) as u32))
        .collect();

    // Cross-validated decoding with every decoder, and the per-fold choices.
    bar.stage("fitting and decoding folds");
    let CrossValidated {
        traj,
        held_ll,
        unit_conf,
        pop_conf_closed,
        rescaled,
        folds,
    } = cross_validate(&data, &stimuli, &labels, &fold_of, k, &bins, nb, opts, bar)?;
    // Label-shuffle null: labels permuted within each training fold only, cells refitted
    // (family and bandwidth held at the real fold's choices), held-out trials decoded at the
    // window end with their true labels.
    bar.stage("label-shuffle null");
    let nulls = shuffle_null(&data, &w, &bins, &labels, &stimuli, &folds, opts, nb, bar)?;
    let (pop_null, unit_null) = nulls;

    // Accuracy curves and decisions per decoder.
    let chance = (0..ns)
        .map(|s| labels.iter().filter(|&&l| l == s).count())
        .max()
        .unwrap_or(0) as f64
        / nt as f64;
    let decoders: Vec<DecoderReport> = Decoder::ALL
        .iter()
        .enumerate()
        .map(|(d, dec)| {
            decoder_report(
                *dec,
                &traj[d],
                &labels,
                ns,
                nb,
                bw_ms,
                min_bin,
                chance,
                opts.threshold,
            )
        })
        .collect();
    let mut calibration = calibration(
        &traj[0],
        &labels,
        ns,
        nb,
        bw_ms,
        min_bin,
        opts.threshold,
        &decoders[0],
    );
    bar.stage("calibration, fitted inside each training fold");
    calibration.methods = compare_calibrations(
        &data,
        &stimuli,
        &labels,
        &folds,
        held_ll,
        &full_plan.prior,
        opts,
        min_bin,
        bar,
    )?;
    // The promise is the threshold decisions': judged from the raw posterior's record.
    if let Some(raw) = calibration.methods.first() {
        calibration.promises = raw
            .record
            .iter()
            .filter(|e| THRESHOLDS.contains(&e.threshold))
            .map(|e| {
                let (accuracy, lo, hi) = e.early_accuracy();
                Promise {
                    threshold: e.threshold,
                    accuracy,
                    lo,
                    hi,
                    kept: e.kept(),
                }
            })
            .collect();
    }
    // The observed population figure is the engine's own window-end confusion (order stats);
    // the closed form used by the null must agree with it.
    let engine_conf: Vec<u64> = decoders[0].confusion_end.concat();
    let information = info_report(&engine_conf, ns, pop_null);
    let closed_form_agrees = engine_conf == pop_conf_closed;

    // Learning curve: the same folds with training subsampled to n trials per stimulus.
    bar.stage("learning curve");
    let learning_curve = learning_curve(
        &data, &labels, &fold_of, k, &stimuli, &bins, &sizes, opts, bar,
    )?;

    // Units: accuracy, information and its null; cells: count variability, family, fit.
    let full_cells = crate::fit::fit_cells(&full_plan, &|| {});
    let full_model = Arc::new(Model::new(full_plan.assemble(full_cells))?);
    let (units_ranked, goodness_of_fit) = unit_reports(
        &data,
        &stimuli,
        &labels,
        &bins,
        &unit_conf,
        unit_null,
        &rescaled,
        &full_model,
    );
    bar.done(work::UNITS);
    bar.finish();

    let v = Validation {
        source: source.to_string(),
        trials: nt,
        units: data.units.clone(),
        stimuli: stimuli.clone(),
        bin_ms: bw_ms,
        window_ms: nb as f64 * bw_ms,
        folds: k,
        shuffles: opts.shuffles,
        seed: opts.seed,
        chance,
        threshold: opts.threshold,
        min_time_ms: opts.min_time_ms,
        decoders,
        information,
        units_ranked,
        goodness_of_fit,
        closed_form_agrees,
        learning_curve,
        calibration,
        seconds: 0.0,
    };
    let unit_figures = v
        .units_ranked
        .iter()
        .enumerate()
        .filter(|(r, u)| *r < UNIT_FIGURES_MAX || u.cells.iter().any(|c| !c.ks_pass))
        .filter_map(|(_, u)| {
            unit_figures(u.unit, &full_model, &data, &w, &labels, &rescaled, bw_ms)
        })
        .collect();
    let mut v = v;
    let mut x = Extras {
        full_model,
        data,
        labels,
        trajectories: traj,
        rescaled,
        unit_figures,
    };
    present(&mut v, &mut x, &presented)?;
    Ok((v, x))
}

/// Puts a validation computed with the stimuli as met into the order they are presented:
/// every per-stimulus list, matrix and figure is permuted, no number changes.
fn present(v: &mut Validation, x: &mut Extras, order: &[String]) -> Result<(), ValidateError> {
    let ns = v.stimuli.len();
    // map[p]: the computed index of the stimulus presented at position p.
    let at = auspex_engine::data::name_index(&v.stimuli);
    let map: Vec<usize> = order
        .iter()
        .filter_map(|s| at.get(s.as_str()).copied())
        .collect();
    if map.len() != ns || map.iter().enumerate().all(|(p, &m)| p == m) {
        return Ok(());
    }
    let mut at = vec![0usize; ns];
    for (p, &m) in map.iter().enumerate() {
        at[m] = p;
    }
    v.stimuli = map.iter().map(|&m| v.stimuli[m].clone()).collect();
    for d in &mut v.decoders {
        for c in [&mut d.confusion_decision, &mut d.confusion_end] {
            *c = map
                .iter()
                .map(|&r| map.iter().map(|&q| c[r][q]).collect())
                .collect();
        }
    }
    for u in &mut v.units_ranked {
        u.cells = map.iter().map(|&m| u.cells[m].clone()).collect();
    }
    let unit_at = |id: u32| x.data.units.iter().position(|&u| u == id);
    let order_at = auspex_engine::data::name_index(order);
    let stim_at = |name: &str| order_at.get(name).copied();
    v.goodness_of_fit
        .failed
        .sort_by_key(|(u, s)| (unit_at(*u), stim_at(s)));
    let spec = crate::fit::reorder_spec(x.full_model.spec().clone(), &v.stimuli)?;
    x.full_model = Arc::new(Model::new(spec)?);
    for l in &mut x.labels {
        *l = at[*l];
    }
    for per_decoder in &mut x.trajectories {
        for tr in per_decoder.iter_mut() {
            *tr = tr
                .chunks(ns)
                .flat_map(|bin| map.iter().map(move |&m| bin[m]))
                .collect();
        }
    }
    let nu = x.rescaled.len() / ns.max(1);
    let mut rescaled = Vec::with_capacity(x.rescaled.len());
    for u in 0..nu {
        for &m in &map {
            rescaled.push(std::mem::take(&mut x.rescaled[u * ns + m]));
        }
    }
    x.rescaled = rescaled;
    for f in &mut x.unit_figures {
        f.raster = map.iter().map(|&m| f.raster[m].clone()).collect();
        f.psth = map.iter().map(|&m| f.psth[m].clone()).collect();
        f.counts = map.iter().map(|&m| f.counts[m].clone()).collect();
        f.ks = map.iter().map(|&m| f.ks[m].clone()).collect();
    }
    x.data.stimulus_order = v.stimuli.clone();
    Ok(())
}

/// What cross-validated decoding gives: per decoder and trial the posterior trajectory, the
/// order-statistics log-likelihood trajectories, window-end confusions, rescaled intervals and
/// each fold's trials and choices.
struct CrossValidated {
    traj: Vec<Vec<Vec<f32>>>,
    held_ll: Vec<Vec<f64>>,
    unit_conf: Vec<Vec<u64>>,
    pop_conf_closed: Vec<u64>,
    rescaled: Vec<Vec<f64>>,
    folds: Vec<Fold>,
}

/// Fits each fold's training trials and decodes its held-out trials with every decoder.
#[allow(clippy::too_many_arguments)]
fn cross_validate(
    data: &Dataset,
    stimuli: &[String],
    labels: &[usize],
    fold_of: &[usize],
    k: usize,
    bins: &[Ragged<u32>],
    nb: usize,
    opts: &ValidateOptions,
    bar: &dyn Progress,
) -> Result<CrossValidated, ValidateError> {
    let (ns, nu, nt) = (stimuli.len(), data.units.len(), labels.len());
    let mut traj: Vec<Vec<Vec<f32>>> = vec![vec![Vec::new(); nt]; Decoder::ALL.len()];
    let mut rescaled: Vec<Vec<f64>> = vec![Vec::new(); nu * ns];
    // Rescaled time since each cell's last spike, chained across its held-out trials.
    let mut carry = vec![0.0f64; nu * ns];
    let mut unit_conf = vec![vec![0u64; ns * ns]; nu];
    let mut pop_conf_closed = vec![0u64; ns * ns];
    let mut folds = Vec::with_capacity(k);
    let mut held_ll: Vec<Vec<f64>> = vec![Vec::new(); nt];
    for f in 0..k {
        let train: Vec<usize> = (0..nt).filter(|&i| fold_of[i] != f).collect();
        let test: Vec<usize> = (0..nt).filter(|&i| fold_of[i] == f).collect();
        let p = reorder(plan(&subset(data, &train, None), &opts.fit)?, stimuli)?;
        let cells = crate::fit::fit_cells(&p, &|| {});
        let choice = cells
            .iter()
            .map(|c| {
                (
                    c.count.family(),
                    c.summary.bandwidth_s / opts.fit.bin_width_s,
                )
            })
            .collect();
        // Prepared once for the three decoders (the default budget, as offline decoding's).
        let model = Arc::new(Model::new(p.assemble(cells))?).prepare(LookupBudget::DEFAULT);
        let test_data = subset(data, &test, None);
        for (d, dec) in Decoder::ALL.iter().enumerate() {
            let mut sink = TrajSink {
                index: test_data
                    .trials
                    .iter()
                    .enumerate()
                    .map(|(j, t)| (t.id, j))
                    .collect(),
                ns,
                out: vec![vec![0f32; nb * ns]; test.len()],
                ll: (*dec == Decoder::OrderStats).then(|| vec![vec![0f64; nb * ns]; test.len()]),
            };
            let mut cfg = EngineConfig::new(data.tick_rate_hz);
            cfg.decoder = *dec;
            run_dataset(model.clone(), &test_data, cfg, &mut sink)?;
            for (j, &i) in test.iter().enumerate() {
                traj[d][i] = std::mem::take(&mut sink.out[j]);
                if let Some(ll) = sink.ll.as_mut() {
                    held_ll[i] = std::mem::take(&mut ll[j]);
                }
            }
        }
        window_end_confusions(
            &model,
            bins,
            labels,
            &test,
            &mut pop_conf_closed,
            |u, p, d| unit_conf[u][p * ns + d] += 1,
        );
        // Time rescaling on the held-out trials, each under its presented stimulus. The
        // uniform draws of the discrete-time correction are keyed by the trial (onset, id) and
        // the draw's place in it, not drawn from one stream in unit order: renumbering the
        // units changes no draw of any cell.
        let mut counts = vec![0u32; nb];
        for &i in &test {
            let s = labels[i];
            let t = &data.trials[i];
            for u in 0..nu {
                counts.iter_mut().for_each(|c| *c = 0);
                for &b in bins[u].row(i) {
                    counts[b as usize] += 1;
                }
                let mut draw = 0u64;
                rescaled_intervals(
                    model.count(u, s),
                    |b| model.survival(u, s, b),
                    &counts,
                    &mut carry[u * ns + s],
                    || {
                        draw += 1;
                        keyed_uniform(&[opts.seed ^ 0x5eed, t.onset as u64, t.id, draw])
                    },
                    &mut rescaled[u * ns + s],
                );
            }
        }
        folds.push(Fold {
            train,
            test,
            choice,
        });
        bar.done(work::FOLD);
    }

    Ok(CrossValidated {
        traj,
        held_ll,
        unit_conf,
        pop_conf_closed,
        rescaled,
        folds,
    })
}

/// One decoder's accuracy curve, threshold trade-off, decisions and confusions from its
/// held-out trajectories.
#[allow(clippy::too_many_arguments)]
fn decoder_report(
    dec: Decoder,
    traj: &[Vec<f32>],
    labels: &[usize],
    ns: usize,
    nb: usize,
    bw_ms: f64,
    min_bin: usize,
    chance: f64,
    threshold: f64,
) -> DecoderReport {
    let nt = labels.len();
    let t_of = |b: usize| (b + 1) as f64 * bw_ms;
    let mut correct = vec![0u64; nb];
    for (i, tr) in traj.iter().enumerate() {
        for (b, c) in correct.iter_mut().enumerate() {
            if argmax(&tr[b * ns..(b + 1) * ns]) == labels[i] {
                *c += 1;
            }
        }
    }
    let curve: Vec<CurvePoint> = correct
        .iter()
        .enumerate()
        .map(|(b, &c)| {
            let (lo, hi) = clopper_pearson(c, nt as u64, 0.05);
            CurvePoint {
                t_ms: t_of(b),
                accuracy: c as f64 / nt as f64,
                lo,
                hi,
            }
        })
        .collect();
    let lower: Vec<f64> = curve.iter().map(|c| c.lo).collect();
    let earliest = earliest_reliable(&lower, chance, RELIABLE_RUN_BINS).map(t_of);
    let thresholds_apply = dec != Decoder::CountOnly;
    let point = |th: f64| {
        let mut times = Vec::with_capacity(nt);
        let mut conf = vec![0u64; ns * ns];
        let mut early = 0usize;
        for (i, tr) in traj.iter().enumerate() {
            let (s, b, by) = decide(tr, ns, th, min_bin, thresholds_apply);
            conf[labels[i] * ns + s] += 1;
            times.push(t_of(b));
            early += by as usize;
        }
        let ok: u64 = (0..ns).map(|s| conf[s * ns + s]).sum();
        let (lo, hi) = clopper_pearson(ok, nt as u64, 0.05);
        let mut sorted = times.clone();
        sorted.sort_by(|a, b| a.total_cmp(b));
        (
            TradeoffPoint {
                threshold: th,
                accuracy: ok as f64 / nt as f64,
                lo,
                hi,
                mean_time_ms: times.iter().sum::<f64>() / nt as f64,
                median_time_ms: sorted[nt / 2],
                early_share: early as f64 / nt as f64,
            },
            times,
            conf,
        )
    };
    let tradeoff = THRESHOLDS.iter().map(|&th| point(th).0).collect();
    let (decision, decision_times_ms, conf_dec) = point(threshold);
    let mut conf_end = vec![0u64; ns * ns];
    for (i, tr) in traj.iter().enumerate() {
        conf_end[labels[i] * ns + argmax(&tr[(nb - 1) * ns..])] += 1;
    }
    DecoderReport {
        decoder: dec.name().to_string(),
        accuracy_end: curve[nb - 1].clone(),
        curve,
        earliest_reliable_ms: earliest,
        tradeoff,
        decision,
        decision_times_ms,
        confusion_decision: nested(&conf_dec, ns),
        info_bits: info(&conf_end, ns).2,
        confusion_end: nested(&conf_end, ns),
    }
}

/// Per unit: accuracy, information and its null; per cell: count variability, the family the
/// full model chose and the time-rescaling test. Ranked by information.
#[allow(clippy::too_many_arguments)]
fn unit_reports(
    data: &Dataset,
    stimuli: &[String],
    labels: &[usize],
    bins: &[Ragged<u32>],
    unit_conf: &[Vec<u64>],
    unit_null: Vec<Vec<f64>>,
    rescaled: &[Vec<f64>],
    full_model: &Model,
) -> (Vec<UnitReport>, FitReport) {
    let (ns, nu, nt) = (stimuli.len(), data.units.len(), labels.len());
    let mut units_ranked = Vec::with_capacity(nu);
    let mut failed = Vec::new();
    let mut tested = 0;
    for u in 0..nu {
        let conf = &unit_conf[u];
        let ok: u64 = (0..ns).map(|s| conf[s * ns + s]).sum();
        let cells = (0..ns)
            .map(|s| {
                let counts: Vec<u32> = (0..nt)
                    .filter(|&i| labels[i] == s)
                    .map(|i| bins[u].row(i).len() as u32)
                    .collect();
                let (mean, variance) = auspex_engine::model::mean_var(&counts);
                let mut z = rescaled[u * ns + s].clone();
                let n = z.len();
                let d = if n > 0 { ks_uniform(&mut z) } else { 0.0 };
                let crit = if n > 0 { ks_critical(n, 0.05) } else { 1.0 };
                let pass = n < 5 || d <= crit;
                if n >= 5 {
                    tested += 1;
                    if !pass {
                        failed.push((data.units[u], stimuli[s].clone()));
                    }
                }
                CellReport {
                    stimulus: stimuli[s].clone(),
                    n_trials: counts.len(),
                    mean,
                    variance,
                    fano: fano_interval(&counts, 0.05),
                    family: full_model.count(u, s).family().name().to_string(),
                    ks_d: d,
                    ks_critical: crit,
                    ks_n: n,
                    ks_pass: pass,
                }
            })
            .collect();
        units_ranked.push(UnitReport {
            unit: data.units[u],
            accuracy: ok as f64 / nt as f64,
            info: info_report(conf, ns, unit_null[u].clone()),
            cells,
        });
    }
    units_ranked.sort_by(|a, b| b.info.bits.total_cmp(&a.info.bits));
    (
        units_ranked,
        FitReport {
            cells_tested: tested,
            cells_failed: failed.len(),
            failed,
        },
    )
}

/// Times after onset (ms) at which the reliability of the posterior is shown, besides the
/// decision time and the window end.
const RELIABILITY_TIMES_MS: [f64; 3] = [25.0, 50.0, 100.0];

/// Reliability of the top posterior (held-out trajectories) at decision time, at fixed times
/// and at the window end, and every threshold's promise against its realised accuracy.
#[allow(clippy::too_many_arguments)]
fn calibration(
    traj: &[Vec<f32>],
    labels: &[usize],
    ns: usize,
    nb: usize,
    bw_ms: f64,
    min_bin: usize,
    threshold: f64,
    order_stats: &DecoderReport,
) -> Calibration {
    let at_bin = |b: usize| -> Vec<(f64, bool)> {
        traj.iter()
            .zip(labels)
            .map(|(tr, &l)| {
                let row = &tr[b * ns..(b + 1) * ns];
                let top = argmax(row);
                (row[top] as f64, top == l)
            })
            .collect()
    };
    let mut sets = Vec::new();
    let decided: Vec<(f64, bool)> = traj
        .iter()
        .zip(labels)
        .map(|(tr, &l)| {
            let (s, b, _) = decide(tr, ns, threshold, min_bin, true);
            (tr[b * ns + s] as f64, s == l)
        })
        .collect();
    sets.push(ReliabilitySet::of(
        format!("at decision (θ = {threshold})"),
        &decided,
    ));
    for t in RELIABILITY_TIMES_MS {
        let b = (t / bw_ms).round() as usize;
        if b >= 1 && b < nb {
            sets.push(ReliabilitySet::of(format!("at {t:.0} ms"), &at_bin(b - 1)));
        }
    }
    sets.push(ReliabilitySet::of("at window end".into(), &at_bin(nb - 1)));
    let promises = order_stats
        .tradeoff
        .iter()
        .map(|t| Promise {
            threshold: t.threshold,
            accuracy: t.accuracy,
            lo: t.lo,
            hi: t.hi,
            kept: t.hi >= t.threshold,
        })
        .collect();
    Calibration {
        reliability: sets,
        promises,
        methods: Vec::new(),
        default_method: crate::calibrate::DEFAULT_METHOD.name().into(),
    }
}

/// The median over thresholds 0.8–0.99 of a method's decision-time ratio at equal accuracy.
pub fn median_ratio(m: &MethodReport) -> Option<f64> {
    let mut r: Vec<f64> = m
        .record
        .iter()
        .zip(&m.time_ratio)
        .filter(|(e, _)| {
            e.threshold >= PROMISE_RANGE.0 - 1e-9 && e.threshold <= PROMISE_RANGE.1 + 1e-9
        })
        .filter_map(|(_, r)| *r)
        .collect();
    if r.is_empty() {
        return None;
    }
    r.sort_by(|a, b| a.total_cmp(b));
    Some(r[r.len() / 2])
}

/// Thresholds whose promise the method comparison judges.
pub const PROMISE_RANGE: (f64, f64) = (0.8, 0.99);

/// The raw posterior and each recalibration on the same held-out trials. Each outer fold's
/// factors are fitted on held-out decoding *inside* its training trials (inner folds), so no
/// held-out label shapes the calibration applied to it.
#[allow(clippy::too_many_arguments)]
fn compare_calibrations(
    data: &Dataset,
    stimuli: &[String],
    labels: &[usize],
    folds: &[Fold],
    held_ll: Vec<Vec<f64>>,
    prior: &[f64],
    opts: &ValidateOptions,
    min_bin: usize,
    bar: &dyn Progress,
) -> Result<Vec<MethodReport>, ValidateError> {
    use crate::calibrate::{
        fit_factors, held_out_set, mean_log_loss, replay_decision, threshold_evidence,
        HeldOutTrial, EVIDENCE_THRESHOLDS,
    };
    use auspex_engine::calibration::{posterior_into, CalibrationMethod};
    let psum: f64 = prior.iter().sum();
    let ln_prior: Vec<f64> = prior.iter().map(|p| (p / psum).ln()).collect();
    let ns = ln_prior.len();
    let nb = held_ll.first().map(|l| l.len()).unwrap_or(0) / ns.max(1);
    let trials: Vec<HeldOutTrial> = held_ll
        .into_iter()
        .zip(labels)
        .map(|(ll, &label)| HeldOutTrial { label, ll })
        .collect();
    // Factors per method per outer fold, fitted on the inner held-out decoding of its training.
    let methods = CalibrationMethod::ALL;
    let mut factors: Vec<Vec<auspex_engine::calibration::Fitted>> = vec![Vec::new(); methods.len()];
    for f in folds {
        let inner = held_out_set(
            &data.subset(&f.train),
            &opts.fit,
            stimuli,
            opts.folds,
            opts.seed ^ 0xca1,
            &|p| {
                let spec = p.assemble(crate::fit::fit_cells(p, &|| {}));
                bar.done(work::CALIBRATION_FIT);
                spec
            },
        )?;
        let refs: Vec<&HeldOutTrial> = inner.trials.iter().collect();
        for (m, method) in methods.iter().enumerate() {
            factors[m].push(fit_factors(*method, &refs, &ln_prior, nb, min_bin));
        }
    }
    let mut fold_of = vec![0; trials.len()];
    for (fi, f) in folds.iter().enumerate() {
        for &i in &f.test {
            fold_of[i] = fi;
        }
    }
    let mut out: Vec<MethodReport> = Vec::new();
    for (m, method) in methods.iter().enumerate() {
        let factors_of: Vec<&auspex_engine::calibration::Fitted> =
            fold_of.iter().map(|&f| &factors[m][f]).collect();
        let record = threshold_evidence(
            &trials,
            &factors_of,
            &ln_prior,
            &EVIDENCE_THRESHOLDS,
            min_bin,
            opts.fit.bin_width_s * 1000.0,
        );
        let mut loss = 0.0;
        for (fi, f) in folds.iter().enumerate() {
            let mine: Vec<&HeldOutTrial> = f.test.iter().map(|&i| &trials[i]).collect();
            loss += mean_log_loss(&mine, &ln_prior, &factors[m][fi]) * mine.len() as f64;
        }
        let in_range: Vec<_> = record
            .iter()
            .filter(|e| {
                e.threshold >= PROMISE_RANGE.0 - 1e-9 && e.threshold <= PROMISE_RANGE.1 + 1e-9
            })
            .collect();
        let kept = (in_range.iter().filter(|e| e.kept()).count(), in_range.len());
        let met = (
            in_range
                .iter()
                .filter(|e| e.early == 0 || e.early_accuracy().0 >= e.threshold)
                .count(),
            in_range.len(),
        );
        let mut post = vec![0.0; ns];
        let decided: Vec<(f64, bool)> = trials
            .iter()
            .zip(&factors_of)
            .map(|(t, f)| {
                let (s, b, _) =
                    replay_decision(&t.ll, &ln_prior, f, opts.threshold, min_bin, &mut post);
                posterior_into(
                    &ln_prior,
                    &t.ll[b * ns..(b + 1) * ns],
                    f.beta(b),
                    f.floor,
                    &mut post,
                );
                (post[s], s == t.label)
            })
            .collect();

        let range = factors[m]
            .iter()
            .flat_map(|f| f.factors.iter())
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &x| {
                (a.min(x), b.max(x))
            });
        let time_ratio = match out.first() {
            None => vec![Some(1.0); record.len()],
            Some(raw) => record
                .iter()
                .map(|e| raw_time_at(&raw.record, e.accuracy()).map(|t| e.median_decision_ms / t))
                .collect(),
        };
        out.push(MethodReport {
            method: method.name().into(),
            log_loss: loss / trials.len().max(1) as f64,
            factor_range: if range.0.is_finite() {
                range
            } else {
                (1.0, 1.0)
            },
            floor_range: factors[m]
                .iter()
                .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), f| {
                    (a.min(f.floor), b.max(f.floor))
                }),
            record,
            kept,
            met,
            at_decision: ReliabilitySet::of(
                format!("at decision (θ = {})", opts.threshold),
                &decided,
            ),
            time_ratio,
        });
    }
    Ok(out)
}

/// The raw posterior's median decision time at `accuracy`, interpolated linearly between the
/// thresholds whose accuracies bracket it (None outside the raw record's range).
fn raw_time_at(
    raw: &[auspex_engine::calibration::ThresholdEvidence],
    accuracy: f64,
) -> Option<f64> {
    let mut pts: Vec<(f64, f64)> = raw
        .iter()
        .map(|e| (e.accuracy(), e.median_decision_ms))
        .collect();
    pts.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.total_cmp(&b.1)));
    for w in pts.windows(2) {
        let ((a0, t0), (a1, t1)) = (w[0], w[1]);
        if accuracy >= a0 && accuracy <= a1 {
            return Some(if a1 > a0 {
                t0 + (t1 - t0) * (accuracy - a0) / (a1 - a0)
            } else {
                t0.min(t1)
            });
        }
    }
    None
}

/// Training sizes (trials per stimulus) the learning curve tries, up to what the folds hold.
const LEARNING_SIZES: [usize; 12] = [2, 3, 5, 8, 12, 20, 30, 50, 80, 120, 200, 300];

/// The training sizes (trials per stimulus) the learning curve tries: those of
/// [`LEARNING_SIZES`] below the fewest training trials any fold holds of any stimulus, and that
/// fewest itself.
fn learning_sizes(labels: &[usize], fold_of: &[usize], k: usize, ns: usize) -> Vec<usize> {
    let mut most = usize::MAX;
    for f in 0..k {
        let mut per = vec![0usize; ns];
        for (i, &l) in labels.iter().enumerate() {
            if fold_of[i] != f {
                per[l] += 1;
            }
        }
        most = most.min(per.into_iter().min().unwrap_or(0));
    }
    if k == 0 || ns == 0 {
        most = 0;
    }
    let mut sizes: Vec<usize> = LEARNING_SIZES
        .iter()
        .copied()
        .filter(|&n| n < most)
        .collect();
    if most >= 2 {
        sizes.push(most);
    }
    sizes
}

/// Held-out window-end accuracy and information against training trials per stimulus: each
/// fold's training trials are shuffled (seeded) within each stimulus and the first n kept; the
/// model is fitted on them as `auspex fit` would and decodes the fold's untouched test trials.
#[allow(clippy::too_many_arguments)]
fn learning_curve(
    data: &Dataset,
    labels: &[usize],
    fold_of: &[usize],
    k: usize,
    stimuli: &[String],
    bins: &[Ragged<u32>],
    sizes: &[usize],
    opts: &ValidateOptions,
    bar: &dyn Progress,
) -> Result<Vec<LearningPoint>, ValidateError> {
    let (ns, nt) = (stimuli.len(), labels.len());
    let mut rng = ChaCha8Rng::seed_from_u64(opts.seed ^ 0x1ea2);
    // Per fold, per stimulus: training trials in a seeded random order. The draws follow the
    // trials' time order and the stimuli's first appearance, never a listing order or names.
    let when: Vec<(i64, u64)> = data.trials.iter().map(|t| (t.onset, t.id)).collect();
    let (by_time, first_seen) = crate::folds::time_order(labels, &when, ns);
    let orders: Vec<Vec<Vec<usize>>> = (0..k)
        .map(|f| {
            let mut per = vec![Vec::new(); ns];
            for &s in &first_seen {
                let mut v: Vec<usize> = by_time
                    .iter()
                    .copied()
                    .filter(|&i| fold_of[i] != f && labels[i] == s)
                    .collect();
                v.shuffle(&mut rng);
                per[s] = v;
            }
            per
        })
        .collect();
    let mut out = Vec::new();
    for &n in sizes {
        let mut pop = vec![0u64; ns * ns];
        for (f, order) in orders.iter().enumerate() {
            let mut train: Vec<usize> = order.iter().flat_map(|v| v[..n].iter().copied()).collect();
            train.sort_unstable();
            let test: Vec<usize> = (0..nt).filter(|&i| fold_of[i] == f).collect();
            let p = reorder(plan(&subset(data, &train, None), &opts.fit)?, stimuli)?;
            let cells = crate::fit::fit_cells(&p, &|| {});
            let model = Model::new(p.assemble(cells))?;
            window_end_confusions(&model, bins, labels, &test, &mut pop, |_, _, _| {});
            bar.done(work::LEARNING_FIT);
        }
        let a = crate::assess::assess(&pop, ns, &Default::default());
        let correct: u64 = (0..ns).map(|s| pop[s * ns + s]).sum();
        let (lo, hi) = clopper_pearson(correct, a.trials, 0.05);
        out.push(LearningPoint {
            trials_per_stimulus: n,
            held_out: a.trials,
            accuracy: a.accuracy,
            lo,
            hi,
            info_bits: a.info_bits,
            info_se_bits: a.info_se_bits,
        });
    }
    Ok(out)
}

/// A uniform draw in (0, 1) that is a function of `key` alone (SplitMix64's finaliser over
/// the key's words; Steele, Lea & Flood 2014), for draws that must not depend on the order
/// anything is visited in.
fn keyed_uniform(key: &[u64]) -> f64 {
    let mut h = 0x9e37_79b9_7f4a_7c15u64;
    for &k in key {
        h = h.wrapping_add(k).wrapping_add(0x9e37_79b9_7f4a_7c15);
        let mut z = h;
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        h = z ^ (z >> 31);
    }
    // 53 random bits, shifted off zero.
    ((h >> 11) as f64 + 0.5) / (1u64 << 53) as f64
}

type Nulls = (Vec<f64>, Vec<Vec<f64>>);

#[allow(clippy::too_many_arguments)]
fn shuffle_null(
    data: &Dataset,
    w: &crate::windows::UnitWindows,
    bins: &[Ragged<u32>],
    labels: &[usize],
    stimuli: &[String],
    folds: &[Fold],
    opts: &ValidateOptions,
    nb: usize,
    bar: &dyn Progress,
) -> Result<Nulls, ValidateError> {
    let (nu, ns) = (data.units.len(), stimuli.len());
    let prior = vec![1.0 / ns as f64; ns];
    let one = |r: usize| -> Result<(f64, Vec<f64>), ValidateError> {
        let mut rng =
            ChaCha8Rng::seed_from_u64(opts.seed.wrapping_mul(7919).wrapping_add(r as u64));
        let mut pop = vec![0u64; ns * ns];
        // Each unit's decisions as a list (the presented stimulus of every test trial is the
        // same for all units): trials × units words per worker, where a matrix per unit would
        // be units × stimuli² — 2 GB over 64 workers at 64 units × 256 stimuli.
        let mut presented: Vec<u32> = Vec::new();
        let mut decided: Vec<Vec<u32>> = vec![Vec::new(); nu];
        for f in folds {
            let mut shuffled: Vec<usize> = f.train.iter().map(|&i| labels[i]).collect();
            shuffled.shuffle(&mut rng);
            let mut cells = Vec::with_capacity(nu * ns);
            let mut inputs: Vec<CellInput> = Vec::with_capacity(nu * ns);
            for u in 0..nu {
                for s in 0..ns {
                    let mut input = CellInput::default();
                    for (j, &i) in f.train.iter().enumerate() {
                        if shuffled[j] == s {
                            let times = w.times(u, i);
                            input.times.push_row(input.counts.len(), times);
                            input.counts.push(times.len() as u32);
                        }
                    }
                    let (fam, bw) = f.choice[u * ns + s];
                    cells.push(refit_cell(&input, nb, opts.fit.bin_width_s, fam, bw));
                    inputs.push(input);
                }
                // The null is fitted as the real folds are, shrinkage included.
                if opts.fit.shrinkage == crate::fit::Shrinkage::EmpiricalBayes {
                    let refs: Vec<&CellInput> = inputs[u * ns..(u + 1) * ns].iter().collect();
                    crate::fit::shrink_unit(&refs, &mut cells[u * ns..(u + 1) * ns]);
                }
            }
            let model = Model::new(auspex_engine::ModelSpec {
                bin_width_s: opts.fit.bin_width_s,
                n_bins: nb as u32,
                stimuli: stimuli.to_vec(),
                units: data.units.clone(),
                prior: prior.clone(),
                cells: cells.into_iter().collect::<Vec<CellSpec>>(),
                calibration: Default::default(),
                unit_groups: Vec::new(),
            })?;
            presented.extend(f.test.iter().map(|&i| labels[i] as u32));
            window_end_confusions(&model, bins, labels, &f.test, &mut pop, |u, _, d| {
                decided[u].push(d as u32)
            });
        }
        // One matrix at a time, cleared where it was filled.
        let mut conf = vec![0u64; ns * ns];
        let units = decided
            .iter()
            .map(|d| {
                for (&p, &d) in presented.iter().zip(d) {
                    conf[p as usize * ns + d as usize] += 1;
                }
                let bits = info(&conf, ns).2;
                for (&p, &d) in presented.iter().zip(d) {
                    conf[p as usize * ns + d as usize] = 0;
                }
                bits
            })
            .collect();
        Ok((info(&pop, ns).2, units))
    };
    let threads = std::thread::available_parallelism()
        .map(|n| n.get())
        .unwrap_or(1)
        .min(opts.shuffles.max(1));
    let next = std::sync::atomic::AtomicUsize::new(0);
    // Per shuffle: its index, the population null and each unit's.
    type ShuffleNulls = Vec<(usize, (f64, Vec<f64>))>;
    let results: Vec<Result<ShuffleNulls, ValidateError>> = std::thread::scope(|sc| {
        let hs: Vec<_> = (0..threads)
            .map(|_| {
                sc.spawn(|| {
                    let mut mine = Vec::new();
                    loop {
                        let r = next.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                        if r >= opts.shuffles {
                            break;
                        }
                        mine.push((r, one(r)?));
                        bar.done(work::SHUFFLE);
                    }
                    Ok(mine)
                })
            })
            .collect();
        hs.into_iter()
            .map(|h| {
                h.join().unwrap_or_else(|_| {
                    Err(ValidateError::Refused("a shuffle worker panicked".into()))
                })
            })
            .collect()
    });
    let mut all = Vec::with_capacity(opts.shuffles);
    for r in results {
        all.extend(r?);
    }
    all.sort_by_key(|x| x.0);
    let pop: Vec<f64> = all.iter().map(|x| x.1 .0).collect();
    let units: Vec<Vec<f64>> = (0..nu)
        .map(|u| all.iter().map(|x| x.1 .1[u]).collect())
        .collect();
    Ok((pop, units))
}
