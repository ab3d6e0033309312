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
