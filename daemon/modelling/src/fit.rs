//! Fitting a model from a dataset: gather each (unit, stimulus) cell's window counts and spike
//! times, fit its count distribution (family chosen by held-out likelihood) and its spike density
//! (Shimazaki–Shinomoto bandwidth), and assemble a [`ModelSpec`].
//!
//! Cells are independent pure functions of their inputs, so callers may fit them in any order or
//! in parallel (the CLI does, with a progress bar); the engine itself spawns no threads.

use crate::density::{fit_timing, BandwidthRule};
use crate::families::{choose_family, fit_negative_binomial, with_mean};
use crate::windows::{windows, Ragged, UnitWindows};
use auspex_engine::count::{CountDist, CountFamily};
use auspex_engine::data::Dataset;
use auspex_engine::model::{mean_var, CellSpec, CellSummary, ModelSpec};
use std::collections::BTreeMap;

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
    /// Borrow strength from the unit's pooled data for cells with few trials (see [`shrink_unit`]).
    pub shrinkage: Shrinkage,
}

/// How cells with few trials borrow strength from their unit's pooled-over-stimuli data.
#[derive(Clone, Copy, Debug, PartialEq, Default)]
pub enum Shrinkage {
    /// Empirical Bayes: each cell's mean count moves toward the unit's pooled mean with weight
    /// κ/(κ + n), κ estimated per unit from the spread of its cell means (method of moments),
    /// and its spike density is mixed with the unit's pooled density with weight
    /// [`DENSITY_PRIOR_TRIALS`]/(that + n). Both weights vanish as trials accumulate.
    #[default]
    EmpiricalBayes,
    /// Every cell from its own trials alone.
    Off,
}

/// Upper bound on κ, the prior's worth in trials (reached by units whose cell means do not
/// differ beyond sampling noise: their cells are mostly pooled until 50 trials each).
pub const KAPPA_MAX: f64 = 50.0;

/// The pooled spike density's worth in trials when shrinking a cell's density (a chosen
/// setting: two pseudo-trials, so a cell's own density dominates from a handful of trials on).
pub const DENSITY_PRIOR_TRIALS: f64 = 2.0;

impl Default for FitOptions {
    fn default() -> Self {
        FitOptions {
            bin_width_s: 0.001,
            window_s: 0.25,
            families: CountFamily::ALL.to_vec(),
            prior_from_frequencies: false,
            bandwidth: BandwidthRule::default(),
            shrinkage: Shrinkage::default(),
        }
    }
}

/// Why a fit cannot start.
#[derive(Clone, Debug, thiserror::Error, PartialEq)]
pub enum FitError {
    /// Options out of range.
    #[error("{0}")]
    Options(String),
    /// The data cannot support a model.
    #[error("{0}")]
    Data(String),
    /// The fit would not fit the memory budget.
    #[error(transparent)]
    OverBudget(#[from] auspex_engine::budget::OverBudget),
}

/// One cell's training data.
#[derive(Clone, Debug, Default)]
pub struct CellInput {
    /// Window count per training trial of this stimulus.
    pub counts: Vec<u32>,
    /// Spike times (bins from onset): row k holds those of the k-th training trial (rows of
    /// trials without spikes are empty and cost nothing).
    pub times: Ragged<f64>,
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
    /// Shrinkage applied by [`FitPlan::assemble`].
    pub shrinkage: Shrinkage,
    /// Prior.
    pub prior: Vec<f64>,
    /// Units with no spike inside any labelled trial window.
    pub silent_units: Vec<u32>,
    /// Trials without a stimulus label (not used for fitting).
    pub unlabelled_trials: usize,
}

/// The most bins a fitted window may have (window ÷ bin width): e.g. a 100 s window in 1 ms
/// bins, or 1 s in 10 µs bins. The same bound for `fit`, `validate` and the daemon's learner
/// (its TOML and flags are checked against it at start).
pub const MAX_FIT_BINS: usize = 100_000;

/// Number of bins, checking the window is a whole number of bins (at most [`MAX_FIT_BINS`])
/// and each bin whole ticks.
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
    if nb > MAX_FIT_BINS as f64 {
        return Err(FitError::Options(format!(
            "a window of {window_s} s in {bin_width_s} s bins is {nb:.0} bins; at most {MAX_FIT_BINS} are fitted (widen the bins or shorten the window)"
        )));
    }
    let bt = auspex_engine::ticks::bin_ticks(bin_width_s, tick_rate_hz)
        .map_err(|e| FitError::Options(e.to_string()))?;
    Ok((nb as usize, bt))
}

/// Gathers the cell inputs.
pub fn plan(data: &Dataset, opts: &FitOptions) -> Result<FitPlan, FitError> {
    let (n_bins, bin_ticks) = window_bins(opts.bin_width_s, opts.window_s, data.tick_rate_hz)?;
    let stimuli = data.stimulus_names();
    let at = auspex_engine::data::name_index(&stimuli);
    let stim_of: Vec<Option<usize>> = data
        .trials
        .iter()
        .map(|t| t.stimulus.as_deref().and_then(|s| at.get(s).copied()))
        .collect();
    let onsets: Vec<i64> = data.trials.iter().map(|t| t.onset).collect();
    crate::windows::check_fit_size(
        data.units.len(),
        data.trials.len(),
        stimuli.len(),
        n_bins,
        crate::windows::spikes_in_windows(data, bin_ticks * n_bins as i64),
    )?;
    let w = windows(data, &data.units, bin_ticks, n_bins);
    plan_from_windows(
        opts,
        (n_bins, bin_ticks),
        stimuli,
        data.units.clone(),
        &stim_of,
        &onsets,
        w,
        &data.declared_from,
    )
}

/// `spec` with its stimuli in `order` (the same names): cells and prior moved with their
/// stimulus; a calibration concerns no stimulus and stays. Models are fitted with the stimuli
/// in the order they are met (`Dataset::in_met_order`), so that no figure depends on a listing
/// order, and stored in the order they are presented.
pub fn reorder_spec(mut spec: ModelSpec, order: &[String]) -> Result<ModelSpec, FitError> {
    let ns = spec.stimuli.len();
    let at = auspex_engine::data::name_index(&spec.stimuli);
    let map: Vec<usize> = order
        .iter()
        .map(|s| at.get(s.as_str()).copied())
        .collect::<Option<_>>()
        .filter(|m: &Vec<usize>| m.len() == ns)
        .ok_or_else(|| {
            FitError::Data(format!(
                "cannot list the model's stimuli {:?} as {order:?}",
                spec.stimuli
            ))
        })?;
    let nu = spec.units.len();
    let mut cells = Vec::with_capacity(nu * ns);
    for u in 0..nu {
        for &m in &map {
            cells.push(spec.cells[u * ns + m].clone());
        }
    }
    spec.cells = cells;
    spec.prior = map.iter().map(|&m| spec.prior[m]).collect();
    spec.stimuli = order.to_vec();
    Ok(spec)
}

/// The planning shared by [`plan`] (a whole dataset) and the learner (the labelled trials of a
/// running session): trial i has stimulus `stim_of[i]` (None: unlabelled, not used) and onset
/// `onsets[i]`; `w` holds every unit's window of every trial (its spike times move into the
/// cells: one copy of them, not two).
#[allow(clippy::too_many_arguments)]
pub(crate) fn plan_from_windows(
    opts: &FitOptions,
    (n_bins, bin_ticks): (usize, i64),
    stimuli: Vec<String>,
    units: Vec<u32>,
    stim_of: &[Option<usize>],
    onsets: &[i64],
    mut w: UnitWindows,
    declared_from: &BTreeMap<u32, i64>,
) -> Result<FitPlan, FitError> {
    if stimuli.len() < 2 {
        return Err(FitError::Data(format!(
            "the trial table names {} stimulus; decoding needs at least two",
            stimuli.len()
        )));
    }
    if units.is_empty() {
        return Err(FitError::Data("the spike table holds no units".into()));
    }
    if opts.families.is_empty() {
        return Err(FitError::Options("no count family allowed".into()));
    }
    let labelled: Vec<usize> = (0..stim_of.len())
        .filter(|&i| stim_of[i].is_some())
        .collect();
    let mut per = vec![0u32; stimuli.len()];
    for s in stim_of.iter().flatten() {
        per[*s] += 1;
    }
    let ns = stimuli.len();
    let mut cells = vec![CellInput::default(); units.len() * ns];
    let mut silent = Vec::new();
    for (u, &unit) in units.iter().enumerate() {
        let from = declared_from.get(&unit).copied().unwrap_or(i64::MIN);
        let mut any = false;
        // This unit's windows are dropped once copied into its cells: one copy of the spike
        // times at a time, not two.
        let own = std::mem::take(&mut w.units[u]);
        for &i in &labelled {
            let Some(s) = stim_of[i] else { continue };
            if onsets[i] < from {
                continue;
            }
            let c = &mut cells[u * ns + s];
            let times = own.row(i);
            c.times.push_row(c.counts.len(), times);
            c.counts.push(times.len() as u32);
            any |= !times.is_empty();
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
    Ok(FitPlan {
        bin_width_s: opts.bin_width_s,
        n_bins,
        bin_ticks,
        stimuli,
        units,
        trials_per_stimulus: per,
        cells,
        families: opts.families.clone(),
        bandwidth: opts.bandwidth,
        shrinkage: opts.shrinkage,
        prior,
        silent_units: silent,
        unlabelled_trials: stim_of.len() - labelled.len(),
    })
}

/// Empirical Bayes shrinkage of one unit's cells (`inputs[s]`, fitted as `cells[s]`) toward the
/// unit's pooled-over-stimuli estimate.
///
/// Counts: the normal-means empirical Bayes rule (Efron & Morris 1975, "Data analysis using
/// Stein's estimator and its generalizations", JASA 70:311–319): a cell with n trials keeps
/// weight n/(n + κ) on its own fitted mean and gives κ/(n + κ) to the unit's pooled mean m, with
/// κ = σ²/τ², σ² the pooled within-cell variance of the count and τ² the method-of-moments
/// between-cell variance of the true means, `mean over cells of (x̄_s − m)² − σ²/n_s`, floored at
/// 0 (κ then [`KAPPA_MAX`]). The family and its shape are kept ([`crate::families::with_mean`]).
/// Spike density: the Dirichlet–multinomial posterior mean with the unit's pooled density as
/// prior worth [`DENSITY_PRIOR_TRIALS`] trials, i.e. `(n·q_s + a·q_pool)/(n + a)`.
/// Returns κ.
pub fn shrink_unit(inputs: &[&CellInput], cells: &mut [CellSpec]) -> f64 {
    let n: Vec<f64> = inputs.iter().map(|c| c.counts.len() as f64).collect();
    let total: f64 = n.iter().sum();
    if total == 0.0 || cells.is_empty() {
        return 0.0;
    }
    let sum: f64 = inputs
        .iter()
        .flat_map(|c| c.counts.iter())
        .map(|&x| x as f64)
        .sum();
    let m = sum / total;
    let (mut ss_within, mut df) = (0.0, 0.0);
    for c in inputs {
        if c.counts.len() >= 2 {
            let (_, v) = mean_var(&c.counts);
            ss_within += v * (c.counts.len() as f64 - 1.0);
            df += c.counts.len() as f64 - 1.0;
        }
    }
    let sigma2 = if df > 0.0 { ss_within / df } else { m }.max(1e-9);
    let seen: Vec<usize> = (0..inputs.len()).filter(|&s| n[s] > 0.0).collect();
    let tau2 = if seen.len() >= 2 {
        let k = seen.len() as f64;
        let between = seen
            .iter()
            .map(|&s| {
                let xbar = inputs[s].counts.iter().map(|&x| x as f64).sum::<f64>() / n[s];
                (xbar - m).powi(2)
            })
            .sum::<f64>()
            / k;
        let noise = seen.iter().map(|&s| sigma2 / n[s]).sum::<f64>() / k;
        (between - noise).max(0.0)
    } else {
        0.0
    };
    let kappa = if tau2 > 0.0 {
        (sigma2 / tau2).min(KAPPA_MAX)
    } else {
        KAPPA_MAX
    };
    let all_counts: Vec<u32> = inputs
        .iter()
        .flat_map(|c| c.counts.iter().copied())
        .collect();
    let pool_pmf = CountDist::new(fit_negative_binomial(&all_counts))
        .map(|d| d.pmf().to_vec())
        .unwrap_or_default();
    let nb = cells[0].timing.len();
    let mut q_pool = vec![0.0; nb];
    for (s, c) in cells.iter().enumerate() {
        for (b, q) in c.timing.iter().enumerate() {
            q_pool[b] += n[s] * q / total;
        }
    }
    for (s, c) in cells.iter_mut().enumerate() {
        let w = kappa / (kappa + n[s]);
        if let Ok(d) = CountDist::new(c.count.clone()) {
            let target = (1.0 - w) * d.mean() + w * m.max(1e-3);
            if let Some(p) = with_mean(&c.count, target, w, &pool_pmf) {
                c.count = p;
            }
        }
        let a = DENSITY_PRIOR_TRIALS;
        let mut q: Vec<f64> = c
            .timing
            .iter()
            .zip(&q_pool)
            .map(|(qs, qp)| (n[s] * qs + a * qp) / (n[s] + a))
            .collect();
        let z: f64 = q.iter().sum();
        q.iter_mut().for_each(|x| *x /= z);
        c.timing = q;
    }
    kappa
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
    let timing = fit_timing(&input.times, input.counts.len(), n_bins, rule);
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
    /// The same plan with its stimuli in `order` (a fold of the trials may meet the stimuli in
    /// another first-appearance order than the whole dataset).
    pub fn reordered(mut self, order: &[String]) -> Result<FitPlan, FitError> {
        let ns = order.len();
        if self.stimuli.len() != ns {
            return Err(FitError::Data(format!(
                "a training fold holds {} of the {} stimuli; use fewer folds",
                self.stimuli.len(),
                ns
            )));
        }
        let mut map = Vec::with_capacity(ns);
        let at = auspex_engine::data::name_index(&self.stimuli);
        for s in order {
            map.push(at.get(s.as_str()).copied().ok_or_else(|| {
                FitError::Data(format!("a training fold holds no trial of stimulus {s:?}"))
            })?);
        }
        let nu = self.units.len();
        let mut cells = Vec::with_capacity(nu * ns);
        for u in 0..nu {
            for &m in &map {
                cells.push(std::mem::take(&mut self.cells[u * ns + m]));
            }
        }
        self.cells = cells;
        self.trials_per_stimulus = map.iter().map(|&m| self.trials_per_stimulus[m]).collect();
        self.prior = map.iter().map(|&m| self.prior[m]).collect();
        self.stimuli = order.to_vec();
        Ok(self)
    }

    /// Assembles the fitted cells (unit-major, as in `self.cells`) into a model spec.
    pub fn assemble(&self, mut cells: Vec<CellSpec>) -> ModelSpec {
        if self.shrinkage == Shrinkage::EmpiricalBayes {
            let ns = self.stimuli.len();
            for u in 0..self.units.len() {
                let inputs: Vec<&CellInput> = self.cells[u * ns..(u + 1) * ns].iter().collect();
                shrink_unit(&inputs, &mut cells[u * ns..(u + 1) * ns]);
            }
        }
        ModelSpec {
            bin_width_s: self.bin_width_s,
            n_bins: self.n_bins as u32,
            stimuli: self.stimuli.clone(),
            units: self.units.clone(),
            prior: self.prior.clone(),
            cells,
            calibration: Default::default(),
            unit_groups: Vec::new(),
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

/// Fits every cell of `plan` on every core (scoped threads, joined before returning), calling
/// `on_cell` after each cell (a progress bar's tick). The result is in the plan's cell order and
/// does not depend on the number of threads.
pub fn fit_cells(plan: &FitPlan, on_cell: &(dyn Fn() + Sync)) -> Vec<CellSpec> {
    use std::sync::atomic::{AtomicUsize, Ordering};
    let n = plan.cells.len();
    let next = AtomicUsize::new(0);
    let threads = std::thread::available_parallelism()
        .map(|n| n.get())
        .unwrap_or(1)
        .min(n.max(1));
    let mut out: Vec<Option<CellSpec>> = vec![None; n];
    let results: Vec<Vec<(usize, CellSpec)>> = std::thread::scope(|s| {
        let handles: Vec<_> = (0..threads)
            .map(|_| {
                s.spawn(|| {
                    let mut mine = Vec::new();
                    loop {
                        let i = next.fetch_add(1, Ordering::Relaxed);
                        if i >= n {
                            break;
                        }
                        mine.push((
                            i,
                            fit_cell(
                                &plan.cells[i],
                                plan.n_bins,
                                plan.bin_width_s,
                                &plan.families,
                                plan.bandwidth,
                            ),
                        ));
                        on_cell();
                    }
                    mine
                })
            })
            .collect();
        handles
            .into_iter()
            .map(|h| h.join().expect("fit worker panicked"))
            .collect()
    });
    for (i, c) in results.into_iter().flatten() {
        out[i] = Some(c);
    }
    out.into_iter()
        .map(|c| c.expect("every cell fitted"))
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use auspex_engine::count::CountParams;
    use rand::{Rng, SeedableRng};

    fn cell(counts: &[u32]) -> CellInput {
        let mut times = Ragged::default();
        for (i, &k) in counts.iter().enumerate() {
            times.push_row(i, &vec![1.5; k as usize]);
        }
        CellInput {
            counts: counts.to_vec(),
            times,
        }
    }

    /// Fits each cell as Poisson, then a copy shrunk as `assemble` would.
    fn raw_and_shrunk(inputs: &[CellInput]) -> (Vec<CellSpec>, Vec<CellSpec>, f64) {
        let raw: Vec<CellSpec> = inputs
            .iter()
            .map(|c| {
                fit_cell(
                    c,
                    4,
                    0.001,
                    &[CountFamily::Poisson],
                    BandwidthRule::default(),
                )
            })
            .collect();
        let mut shrunk = raw.clone();
        let refs: Vec<&CellInput> = inputs.iter().collect();
        let kappa = shrink_unit(&refs, &mut shrunk);
        (raw, shrunk, kappa)
    }

    fn poisson_mean(c: &CellSpec) -> f64 {
        match c.count {
            CountParams::Poisson { mean } => mean,
            ref p => panic!("not Poisson: {p:?}"),
        }
    }

    #[test]
    fn shrinkage_follows_the_hand_computed_rule() {
        // Counts A = 1, 2, 3 (mean 2, variance 1) and B = 5, 6, 7 (mean 6, variance 1):
        // pooled mean m = 4, within variance σ² = 1, between = ((2−4)² + (6−4)²)/2 = 4,
        // sampling noise = (1/3 + 1/3)/2 = 1/3, τ² = 11/3, κ = σ²/τ² = 3/11,
        // w = κ/(κ + 3) = 1/12: A → (11/12)·2 + 4/12 = 2.1667, B → (11/12)·6 + 4/12 = 5.8333.
        let inputs = [cell(&[1, 2, 3]), cell(&[5, 6, 7])];
        let (_, cells, kappa) = raw_and_shrunk(&inputs);
        assert!((kappa - 3.0 / 11.0).abs() < 1e-12);
        assert!((poisson_mean(&cells[0]) - (11.0 / 12.0 * 2.0 + 4.0 / 12.0)).abs() < 1e-12);
        assert!((poisson_mean(&cells[1]) - (11.0 / 12.0 * 6.0 + 4.0 / 12.0)).abs() < 1e-12);
        // Densities stay probability vectors.
        for c in &cells {
            assert!((c.timing.iter().sum::<f64>() - 1.0).abs() < 1e-12);
            assert!(c.timing.iter().all(|&q| q > 0.0));
        }
    }

    #[test]
    fn shrinkage_vanishes_with_many_trials_and_helps_with_few() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(3);
        let poisson = |rng: &mut rand_chacha::ChaCha8Rng, mu: f64| -> u32 {
            // Knuth's multiplication method (small means).
            let l = (-mu).exp();
            let (mut k, mut p) = (0u32, 1.0f64);
            loop {
                p *= rng.gen::<f64>();
                if p <= l {
                    return k;
                }
                k += 1;
            }
        };
        let truth = [1.0, 1.5, 2.0, 2.5, 3.0, 3.5];
        let (mut err_raw, mut err_shrunk) = (0.0, 0.0);
        for _ in 0..300 {
            let inputs: Vec<CellInput> = truth
                .iter()
                .map(|&mu| cell(&(0..3).map(|_| poisson(&mut rng, mu)).collect::<Vec<_>>()))
                .collect();
            let (raw, shrunk, _) = raw_and_shrunk(&inputs);
            for (s, &mu) in truth.iter().enumerate() {
                err_raw += (poisson_mean(&raw[s]) - mu).powi(2);
                err_shrunk += (poisson_mean(&shrunk[s]) - mu).powi(2);
            }
        }
        assert!(
            err_shrunk < 0.9 * err_raw,
            "3 trials per cell: squared error {err_shrunk:.1} shrunk vs {err_raw:.1} raw"
        );
        // 400 trials per cell: each mean moves less than 1% of the way to the pooled mean.
        let inputs: Vec<CellInput> = truth
            .iter()
            .map(|&mu| cell(&(0..400).map(|_| poisson(&mut rng, mu)).collect::<Vec<_>>()))
            .collect();
        let (raw, shrunk, _) = raw_and_shrunk(&inputs);
        let all: Vec<u32> = inputs.iter().flat_map(|c| c.counts.clone()).collect();
        let m = all.iter().map(|&x| x as f64).sum::<f64>() / all.len() as f64;
        for s in 0..truth.len() {
            let (a, b) = (poisson_mean(&raw[s]), poisson_mean(&shrunk[s]));
            let w = (b - a) / (m - a);
            assert!((0.0..0.01).contains(&w), "{a} → {b}: weight {w}");
        }
    }
}
