//! Fitting a model from a dataset: gather each (unit, stimulus) cell's window counts and spike
//! times, fit its count distribution (family chosen by held-out likelihood) and its spike density
//! (Shimazaki–Shinomoto bandwidth), and assemble a [`ModelSpec`].
//!
//! Cells are independent pure functions of their inputs, so callers may fit them in any order or
//! in parallel (the CLI does, with a progress bar); the engine itself spawns no threads.

use crate::count::{choose_family, CountFamily};
use crate::data::Dataset;
use crate::density::{fit_timing, BandwidthRule};
use crate::model::{mean_var, CellSpec, CellSummary, ModelSpec};

/// How to fit.
#[derive(Clone, Debug, PartialEq)]
pub struct FitOptions {
    /// Bin width in seconds (default 1 ms).
    pub bin_width_s: f64,
    /// Window after onset in seconds.
    pub window_s: f64,
    /// Families a cell may choose among.
    pub families: Vec<CountFamily>,
    /// Prior: equal (false) or the training frequencies of the stimuli (true).
    pub prior_from_frequencies: bool,
    /// Kernel bandwidth rule.
    pub bandwidth: BandwidthRule,
}

impl Default for FitOptions {
    fn default() -> Self {
        FitOptions {
            bin_width_s: 0.001,
            window_s: 0.25,
            families: CountFamily::ALL.to_vec(),
            prior_from_frequencies: false,
            bandwidth: BandwidthRule::default(),
        }
    }
}

/// Why a fit cannot start.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum FitError {
    /// Options out of range.
    #[error("{0}")]
    Options(String),
    /// The data cannot support a model.
    #[error("{0}")]
    Data(String),
}

/// One cell's training data.
#[derive(Clone, Debug, Default)]
pub struct CellInput {
    /// Window count per training trial of this stimulus.
    pub counts: Vec<u32>,
    /// Spike times (bins from onset), one list per training trial.
    pub times: Vec<Vec<f64>>,
}

/// Everything needed to fit, gathered from a dataset.
#[derive(Clone, Debug)]
pub struct FitPlan {
    /// Bin width in seconds.
    pub bin_width_s: f64,
    /// Bins in the window.
    pub n_bins: usize,
    /// Ticks per bin.
    pub bin_ticks: i64,
    /// Stimuli (order of first appearance).
    pub stimuli: Vec<String>,
    /// Units (sorted ids).
    pub units: Vec<u32>,
    /// Trials per stimulus.
    pub trials_per_stimulus: Vec<u32>,
    /// Cells, unit-major.
    pub cells: Vec<CellInput>,
    /// Families allowed.
    pub families: Vec<CountFamily>,
    /// Bandwidth rule.
    pub bandwidth: BandwidthRule,
    /// Prior.
    pub prior: Vec<f64>,
    /// Units with no spike inside any labelled trial window.
    pub silent_units: Vec<u32>,
    /// Trials without a stimulus label (not used for fitting).
    pub unlabelled_trials: usize,
}

/// Number of bins, checking the window is a whole number of bins and each bin whole ticks.
pub fn window_bins(
    bin_width_s: f64,
    window_s: f64,
    tick_rate_hz: f64,
) -> Result<(usize, i64), FitError> {
    if !(bin_width_s.is_finite() && bin_width_s > 0.0) {
        return Err(FitError::Options(format!(
            "bin width {bin_width_s} s must be > 0"
        )));
    }
    if !(window_s.is_finite() && window_s >= bin_width_s) {
        return Err(FitError::Options(format!(
            "window {window_s} s must be at least one bin ({bin_width_s} s)"
        )));
    }
    let nb = (window_s / bin_width_s).round();
    if (nb * bin_width_s - window_s).abs() > 1e-9 * window_s.max(1.0) {
        return Err(FitError::Options(format!(
            "window {window_s} s is not a whole number of {bin_width_s} s bins"
        )));
    }
    let bt = (bin_width_s * tick_rate_hz).round();
    if bt < 1.0 || (bt - bin_width_s * tick_rate_hz).abs() > 1e-6 * bt {
        return Err(FitError::Options(format!(
            "bin width {bin_width_s} s is not a whole number of ticks at {tick_rate_hz} ticks/s"
        )));
    }
    Ok((nb as usize, bt as i64))
}

/// Gathers the cell inputs.
pub fn plan(data: &Dataset, opts: &FitOptions) -> Result<FitPlan, FitError> {
    let (n_bins, bin_ticks) = window_bins(opts.bin_width_s, opts.window_s, data.tick_rate_hz)?;
    let stimuli = data.stimulus_names();
    if stimuli.len() < 2 {
        return Err(FitError::Data(format!(
            "the trial table names {} stimulus; decoding needs at least two",
            stimuli.len()
        )));
    }
    if data.units.is_empty() {
        return Err(FitError::Data("the spike table holds no units".into()));
    }
    let labelled: Vec<usize> = (0..data.trials.len())
        .filter(|&i| data.trials[i].stimulus.is_some())
        .collect();
    let stim_of: Vec<Option<usize>> = data
        .trials
        .iter()
        .map(|t| {
            t.stimulus
                .as_ref()
                .and_then(|s| stimuli.iter().position(|x| x == s))
        })
        .collect();
    let mut per = vec![0u32; stimuli.len()];
    for s in stim_of.iter().flatten() {
        per[*s] += 1;
    }
    let w = data.windows(&data.units, bin_ticks, n_bins);
    let ns = stimuli.len();
    let mut cells = vec![CellInput::default(); data.units.len() * ns];
    let mut silent = Vec::new();
    for (u, &unit) in data.units.iter().enumerate() {
        let mut any = false;
        for &i in &labelled {
            let Some(s) = stim_of[i] else { continue };
            let c = &mut cells[u * ns + s];
            c.counts.push(w.counts[u][i]);
            c.times.push(w.times[u][i].clone());
            any |= w.counts[u][i] > 0;
        }
        if !any {
            silent.push(unit);
        }
    }
    let prior = if opts.prior_from_frequencies {
        let t: u32 = per.iter().sum();
        per.iter()
            .map(|&c| (c.max(1)) as f64 / t.max(1) as f64)
            .collect()
    } else {
        vec![1.0 / ns as f64; ns]
    };
    if opts.families.is_empty() {
        return Err(FitError::Options("no count family allowed".into()));
    }
    Ok(FitPlan {
        bin_width_s: opts.bin_width_s,
        n_bins,
        bin_ticks,
        stimuli,
        units: data.units.clone(),
        trials_per_stimulus: per,
        cells,
        families: opts.families.clone(),
        bandwidth: opts.bandwidth,
        prior,
        silent_units: silent,
        unlabelled_trials: data.trials.len() - labelled.len(),
    })
}

/// Fits one cell.
pub fn fit_cell(
    input: &CellInput,
    n_bins: usize,
    bin_width_s: f64,
    families: &[CountFamily],
    rule: BandwidthRule,
) -> CellSpec {
    let choice = choose_family(&input.counts, families);
    let timing = fit_timing(&input.times, n_bins, rule);
    let (mean, var) = mean_var(&input.counts);
    CellSpec {
        count: choice.params,
        timing: timing.q,
        summary: CellSummary {
            n_trials: input.counts.len() as u32,
            mean_count: mean,
            var_count: var,
            bandwidth_s: timing.bandwidth_bins * bin_width_s,
            held_out: choice
                .held_out
                .into_iter()
                .map(|(f, s)| (f, s.unwrap_or(f64::NAN)))
                .collect(),
        },
    }
}

impl FitPlan {
    /// Assembles the fitted cells (unit-major, as in `self.cells`) into a model spec.
    pub fn assemble(&self, cells: Vec<CellSpec>) -> ModelSpec {
        ModelSpec {
            bin_width_s: self.bin_width_s,
            n_bins: self.n_bins as u32,
            stimuli: self.stimuli.clone(),
            units: self.units.clone(),
            prior: self.prior.clone(),
            cells,
        }
    }

    /// Fits every cell in order (single-threaded convenience for tests and small data).
    pub fn fit_all(&self) -> ModelSpec {
        let cells = self
            .cells
            .iter()
            .map(|c| {
                fit_cell(
                    c,
                    self.n_bins,
                    self.bin_width_s,
                    &self.families,
                    self.bandwidth,
                )
            })
            .collect();
        self.assemble(cells)
    }
}
