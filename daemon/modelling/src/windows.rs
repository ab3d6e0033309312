//! Trial windows cut out of a dataset: every unit's spike count and spike times (in bins from
//! onset) in every trial's window — the sufficient statistics a fit reads.
//!
//! Must not: do I/O; the dataset comes from the caller.

use auspex_engine::data::Dataset;

/// Per-unit, per-trial window contents (see [`windows`]).
#[derive(Clone, Debug, Default)]
pub struct UnitWindows {
    /// counts[u][trial]
    pub counts: Vec<Vec<u32>>,
    /// times[u][trial]: spike times in bins from onset.
    pub times: Vec<Vec<Vec<f64>>>,
}

/// Checks, before anything is built, that fitting `units` units on `trials` trials of
/// `stimuli` stimuli with `n_bins` bins fits the memory budget: the windows (a count and a list
/// of spike times per unit and trial), the cells' inputs and timing tables, and the model's
/// tables for decoding.
pub fn check_fit_size(
    units: usize,
    trials: usize,
    stimuli: usize,
    n_bins: usize,
) -> Result<(), auspex_engine::budget::OverBudget> {
    use auspex_engine::budget::{check, product};
    let (u, t, s, b) = (
        units as u128,
        trials as u128,
        stimuli as u128,
        n_bins as u128,
    );
    let windows = 2 * product(&[u, t, 4 + 24]);
    let cells = product(&[u, s, b, 8 * 2]);
    let model = auspex_engine::model::decoding_bytes(units, stimuli, n_bins);
    check(
        "fitting",
        || format!("{units} units × {trials} trials, {stimuli} stimuli × {n_bins} bins"),
        windows + cells + model,
    )
}

/// For every unit in `units` (index order) and every trial: the window's spike count and
/// spike times in bin units from onset. One pass over the trial windows.
pub fn windows(data: &Dataset, units: &[u32], bin_ticks: i64, n_bins: usize) -> UnitWindows {
    let index: std::collections::HashMap<u32, usize> =
        units.iter().enumerate().map(|(i, &u)| (u, i)).collect();
    let nt = data.trials.len();
    let mut counts = vec![vec![0u32; nt]; units.len()];
    let mut times = vec![vec![Vec::new(); nt]; units.len()];
    let window = bin_ticks * n_bins as i64;
    for (i, t) in data.trials.iter().enumerate() {
        let a = data.spikes.partition_point(|s| s.0 < t.onset);
        let b = data
            .spikes
            .partition_point(|s| s.0 < t.onset.saturating_add(window));
        for &(tick, unit) in &data.spikes[a..b] {
            if let Some(&u) = index.get(&unit) {
                counts[u][i] += 1;
                times[u][i].push((tick - t.onset) as f64 / bin_ticks as f64);
            }
        }
    }
    UnitWindows { counts, times }
}
