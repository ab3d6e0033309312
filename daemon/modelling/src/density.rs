//! Spike density after onset per (unit, stimulus): a Gaussian kernel density estimate with
//! reflection at both window edges, bandwidth by the Shimazaki–Shinomoto (2010) kernel cost,
//! turned into per-bin probabilities q(b) and floored so no bin has probability 0.
//!
//! Works in bin units (time / bin width) throughout; callers convert to seconds for display.
//! Must not: read clocks or files; allocate per spike beyond the working buffers of one fit.

use crate::windows::Ragged;
use statrs::function::erf::erf;

/// Share of the uniform density mixed into every fitted timing, so no bin has probability 0.
pub const TIMING_FLOOR: f64 = 1e-3;
/// Number of bandwidths tried on the log grid before refinement.
const GRID: usize = 36;
/// Sub-bins per bin used to place spikes when convolving with the kernel.
const SUB: usize = 4;

#[inline]
fn norm_cdf(x: f64) -> f64 {
    0.5 * (1.0 + erf(x / std::f64::consts::SQRT_2))
}

/// The Shimazaki–Shinomoto (2010, eq. 25) cost of a Gaussian kernel of standard deviation `w`
/// for spikes pooled over `n_trials` trials, computed exactly over all pairs:
/// `C(w) = [Σ_{i,j} ψ_w(t_i−t_j) − 2 Σ_{i≠j} k_w(t_i−t_j)] / n²`, with `k_w` the kernel and
/// `ψ_w = k_w ⋆ k_w` (a Gaussian of standard deviation √2·w). Times and `w` share one unit.
pub fn ss_kernel_cost(times: &[f64], n_trials: usize, w: f64) -> f64 {
    let mut pairs = Vec::with_capacity(times.len() * times.len() / 2);
    for (i, a) in times.iter().enumerate() {
        for b in &times[i + 1..] {
            pairs.push(((a - b).abs(), 1.0));
        }
    }
    cost_from_pairs(&pairs, times.len(), n_trials, w)
}

fn cost_from_pairs(pairs: &[(f64, f64)], n_spikes: usize, n_trials: usize, w: f64) -> f64 {
    let c_psi = 1.0 / (2.0 * std::f64::consts::PI.sqrt() * w);
    let c_k = 1.0 / ((2.0 * std::f64::consts::PI).sqrt() * w);
    let mut s_psi = n_spikes as f64 * c_psi;
    let mut s_k = 0.0;
    for &(d, m) in pairs {
        let d2 = d * d / (w * w);
        s_psi += 2.0 * m * c_psi * (-d2 / 4.0).exp();
        s_k += 2.0 * m * c_k * (-d2 / 2.0).exp();
    }
    (s_psi - 2.0 * s_k) / (n_trials.max(1) as f64).powi(2)
}

/// Pairwise distances with multiplicities: exact for modest spike counts, otherwise from a
/// histogram of spike times at a quarter-bin resolution (the cost is then evaluated at
/// quarter-bin accuracy, far below any bandwidth the grid allows).
fn pair_distances(times: &[f64], n_bins: usize) -> Vec<(f64, f64)> {
    if times.len() <= 300 {
        let mut pairs = Vec::with_capacity(times.len() * times.len() / 2);
        for (i, a) in times.iter().enumerate() {
            for b in &times[i + 1..] {
                pairs.push(((a - b).abs(), 1.0));
            }
        }
        return pairs;
    }
    let m = n_bins * SUB;
    let mut h = vec![0.0f64; m];
    for &t in times {
        let i = ((t * SUB as f64) as usize).min(m - 1);
        h[i] += 1.0;
    }
    let nz: Vec<(usize, f64)> = h
        .iter()
        .copied()
        .enumerate()
        .filter(|(_, c)| *c > 0.0)
        .collect();
    let mut acc = vec![0.0f64; m];
    for (x, &(i, ci)) in nz.iter().enumerate() {
        // Same sub-bin: ci·(ci−1)/2 unordered pairs at distance 0.
        acc[0] += ci * (ci - 1.0) / 2.0;
        for &(j, cj) in &nz[x + 1..] {
            acc[j - i] += ci * cj;
        }
    }
    acc.iter()
        .enumerate()
        .filter(|(_, c)| **c > 0.0)
        .map(|(d, c)| (d as f64 / SUB as f64, *c))
        .collect()
}

/// Bandwidth (in bins) minimising the Shimazaki–Shinomoto cost over a log grid from a quarter bin
/// to half the window, refined by golden-section search around the best grid point.
pub fn choose_bandwidth(times: &[f64], n_trials: usize, n_bins: usize) -> f64 {
    let lo = 0.25f64;
    let hi = (n_bins as f64 / 2.0).max(lo * 2.0);
    if times.len() < 2 {
        return hi;
    }
    let pairs = pair_distances(times, n_bins);
    let cost = |w: f64| cost_from_pairs(&pairs, times.len(), n_trials, w);
    let grid: Vec<f64> = (0..GRID)
        .map(|i| (lo.ln() + (hi.ln() - lo.ln()) * i as f64 / (GRID - 1) as f64).exp())
        .collect();
    let costs: Vec<f64> = grid.iter().map(|&w| cost(w)).collect();
    let best = costs
        .iter()
        .enumerate()
        .min_by(|a, b| a.1.total_cmp(b.1))
        .map(|(i, _)| i)
        .unwrap_or(GRID - 1);
    let (mut a, mut b) = (
        grid[best.saturating_sub(1)].ln(),
        grid[(best + 1).min(GRID - 1)].ln(),
    );
    let g = (5f64.sqrt() - 1.0) / 2.0;
    for _ in 0..30 {
        let x1 = b - g * (b - a);
        let x2 = a + g * (b - a);
        if cost(x1.exp()) < cost(x2.exp()) {
            b = x2;
        } else {
            a = x1;
        }
    }
    ((a + b) / 2.0).exp()
}

/// Kernel masses of a Gaussian of standard deviation `w` (bins) per sub-bin start position:
/// `kern[j][d + reach]` is the mass a spike at quarter-bin `j` of bin 0 puts in bin `d`.
struct KernelTable {
    reach: i64,
    width: usize,
    kern: Vec<f64>,
}

impl KernelTable {
    fn new(w: f64, n_bins: usize) -> Self {
        let reach = ((7.0 * w).ceil() as i64 + 2).min(3 * n_bins as i64);
        let width = (2 * reach + 1) as usize;
        let mut kern = vec![0.0f64; SUB * width];
        for j in 0..SUB {
            let pos = (j as f64 + 0.5) / SUB as f64;
            for (x, d) in (-reach..=reach).enumerate() {
                let a = (d as f64 - pos) / w;
                let b = (d as f64 + 1.0 - pos) / w;
                kern[j * width + x] = norm_cdf(b) - norm_cdf(a);
            }
        }
        KernelTable { reach, width, kern }
    }

    /// Adds `weight` × the kernel mass of a spike at `t` (bins), and of its mirror images at −t
    /// and 2T − t, into `out` (one entry per bin).
    fn add_spike(&self, t: f64, weight: f64, out: &mut [f64]) {
        let nb = out.len() as i64;
        let m = nb * SUB as i64;
        let i = ((t * SUB as f64).floor() as i64).clamp(0, m - 1);
        for e in [i, -1 - i, 2 * m - 1 - i] {
            let bin = e.div_euclid(SUB as i64);
            let j = e.rem_euclid(SUB as i64) as usize;
            let lo = (bin - self.reach).max(0);
            let hi = (bin + self.reach).min(nb - 1);
            for b in lo..=hi {
                out[b as usize] +=
                    weight * self.kern[j * self.width + (b - bin + self.reach) as usize];
            }
        }
    }
}

/// Per-bin probabilities of a Gaussian kernel density estimate with bandwidth `w` (bins),
/// reflected at 0 and at the window end so no mass leaks out of the window; spikes are placed at
/// quarter-bin centres. Returns probabilities summing to 1 (uniform if there are no spikes).
pub fn kde_bin_probabilities(times: &[f64], n_bins: usize, w: f64) -> Vec<f64> {
    if times.is_empty() || n_bins == 0 {
        return vec![1.0 / n_bins.max(1) as f64; n_bins];
    }
    let k = KernelTable::new(w, n_bins);
    let mut q = vec![0.0f64; n_bins];
    for &t in times {
        k.add_spike(t, 1.0, &mut q);
    }
    let s: f64 = q.iter().sum();
    if s > 0.0 {
        q.iter_mut().for_each(|x| *x /= s);
    } else {
        q.iter_mut().for_each(|x| *x = 1.0 / n_bins as f64);
    }
    q
}

/// Leave-one-trial-out log-likelihood of the spike times under the floored, binned kernel
/// estimate with bandwidth `w`: each trial's spikes are scored against the estimate built from
/// every other trial, exactly as the decoder will use an estimate on unseen trials.
pub fn loto_log_likelihood(trials: &Ragged<f64>, n_bins: usize, w: f64) -> f64 {
    let k = KernelTable::new(w, n_bins);
    let total: usize = trials.items().len();
    let mut all = vec![0.0f64; n_bins];
    for t in trials.items() {
        k.add_spike(*t, 1.0, &mut all);
    }
    let mut own = vec![0.0f64; n_bins];
    let mut ll = 0.0;
    let bf = n_bins as f64;
    for (_, tr) in trials.nonempty() {
        let rest = (total - tr.len()) as f64;
        own.iter_mut().for_each(|x| *x = 0.0);
        for &t in tr {
            k.add_spike(t, 1.0, &mut own);
        }
        for &t in tr {
            let b = (t.floor() as usize).min(n_bins - 1);
            let q = if rest > 0.0 {
                ((all[b] - own[b]).max(0.0)) / rest
            } else {
                1.0 / bf
            };
            ll += ((1.0 - TIMING_FLOOR) * q + TIMING_FLOOR / bf).ln();
        }
    }
    ll
}

/// Bandwidth (bins) maximising the leave-one-trial-out likelihood over the same log grid as
/// [`choose_bandwidth`], refined by golden-section search.
pub fn choose_bandwidth_loto(trials: &Ragged<f64>, n_bins: usize) -> f64 {
    let lo = 0.5f64;
    let hi = (n_bins as f64 / 2.0).max(lo * 2.0);
    let n_trials_with = trials.n_nonempty();
    if n_trials_with < 2 {
        return hi;
    }
    let f = |w: f64| -loto_log_likelihood(trials, n_bins, w);
    let grid: Vec<f64> = (0..24)
        .map(|i| (lo.ln() + (hi.ln() - lo.ln()) * i as f64 / 23.0).exp())
        .collect();
    let costs: Vec<f64> = grid.iter().map(|&w| f(w)).collect();
    let best = costs
        .iter()
        .enumerate()
        .min_by(|a, b| a.1.total_cmp(b.1))
        .map(|(i, _)| i)
        .unwrap_or(0);
    let (mut a, mut b) = (
        grid[best.saturating_sub(1)].ln(),
        grid[(best + 1).min(23)].ln(),
    );
    let g = (5f64.sqrt() - 1.0) / 2.0;
    for _ in 0..20 {
        let x1 = b - g * (b - a);
        let x2 = a + g * (b - a);
        if f(x1.exp()) < f(x2.exp()) {
            b = x2;
        } else {
            a = x1;
        }
    }
    ((a + b) / 2.0).exp()
}

/// Mixes in [`TIMING_FLOOR`] of the uniform density: `q ← (1−ε)·q + ε/B`. Keeps Σq = 1.
pub fn floor_timing(q: &mut [f64]) {
    let b = q.len() as f64;
    let s: f64 = q.iter().sum();
    for x in q.iter_mut() {
        *x = (1.0 - TIMING_FLOOR) * (*x / s) + TIMING_FLOOR / b;
    }
}

/// How the kernel bandwidth is chosen.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Default, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum BandwidthRule {
    /// Leave-one-trial-out likelihood (default: what the decoder will meet on unseen trials).
    #[default]
    LeaveOneTrialOut,
    /// Shimazaki–Shinomoto (2010) kernel cost (integrated squared error of the rate).
    KernelCost,
}

impl BandwidthRule {
    /// Parses `loto` / `kernel-cost`.
    pub fn parse(s: &str) -> Option<Self> {
        match s {
            "loto" | "leave-one-trial-out" => Some(BandwidthRule::LeaveOneTrialOut),
            "kernel-cost" | "ss" => Some(BandwidthRule::KernelCost),
            _ => None,
        }
    }
}

/// A fitted timing: floored per-bin probabilities and the bandwidth used (bins).
#[derive(Clone, Debug)]
pub struct TimingFit {
    /// q(0..B), summing to 1, every entry > 0.
    pub q: Vec<f64>,
    /// Kernel standard deviation in bins (NaN when there were no spikes).
    pub bandwidth_bins: f64,
}

/// Fits the timing of one cell from spike times in bin units, one row per training trial
/// (`n_trials` of them, counting those without spikes).
pub fn fit_timing(
    trials: &Ragged<f64>,
    n_trials: usize,
    n_bins: usize,
    rule: BandwidthRule,
) -> TimingFit {
    let pooled = trials.items();
    if pooled.is_empty() {
        return TimingFit {
            q: vec![1.0 / n_bins as f64; n_bins],
            bandwidth_bins: f64::NAN,
        };
    }
    let w = match rule {
        BandwidthRule::KernelCost => choose_bandwidth(pooled, n_trials, n_bins),
        BandwidthRule::LeaveOneTrialOut => choose_bandwidth_loto(trials, n_bins),
    };
    let mut q = kde_bin_probabilities(pooled, n_bins, w);
    floor_timing(&mut q);
    TimingFit {
        q,
        bandwidth_bins: w,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn kernel_cost_matches_shimazaki_shinomoto_reference() {
        // Shimazaki & Shinomoto (2010) eq. 25, Gaussian kernel, values from
        // shared/REFERENCE-VALUES.md (times in seconds, n = 3 trials).
        let t: Vec<f64> = [12., 18., 21., 34., 35., 36., 52., 61., 74., 78., 81., 93.]
            .iter()
            .map(|x| x / 1000.0)
            .collect();
        for (w, want) in [(5.0, -47.418379), (10.0, -79.826272), (20.0, -108.607486)] {
            let got = ss_kernel_cost(&t, 3, w / 1000.0);
            assert!((got - want).abs() < 1e-5, "w={w}: {got} vs {want}");
        }
        // The minimum lies near 29.66 ms: search in ms-bins over a 100-bin window.
        let tb: Vec<f64> = t.iter().map(|x| x * 1000.0).collect();
        let w = choose_bandwidth(&tb, 3, 100);
        assert!((w - 29.66).abs() < 0.2, "argmin {w}");
    }

    #[test]
    fn binned_cost_agrees_with_exact_cost() {
        // 400 spikes force the histogram path; compare argmins.
        let times: Vec<f64> = (0..400)
            .map(|i| ((i * 7919) % 1000) as f64 / 1000.0 * 50.0 + 100.0 * ((i % 3) as f64 / 3.0))
            .map(|x: f64| x.min(249.9))
            .collect();
        let pairs = pair_distances(&times, 250);
        for w in [2.0, 5.0, 20.0] {
            let a = cost_from_pairs(&pairs, times.len(), 40, w);
            let b = ss_kernel_cost(&times, 40, w);
            assert!((a - b).abs() < 0.02 * b.abs(), "w={w}: {a} vs {b}");
        }
    }

    #[test]
    fn kde_sums_to_one_and_corrects_the_edges() {
        // Uniform spikes over the window: with reflection the density stays flat at the edges
        // instead of halving there.
        let times: Vec<f64> = (0..1000)
            .map(|i| (i as f64 + 0.5) / 1000.0 * 100.0)
            .collect();
        let q = kde_bin_probabilities(&times, 100, 5.0);
        assert!((q.iter().sum::<f64>() - 1.0).abs() < 1e-12);
        assert!(
            (q[0] / q[50] - 1.0).abs() < 0.05,
            "edge {} vs middle {}",
            q[0],
            q[50]
        );
        assert!((q[99] / q[50] - 1.0).abs() < 0.05);
    }

    #[test]
    fn floored_timing_is_positive_everywhere() {
        for rule in [BandwidthRule::KernelCost, BandwidthRule::LeaveOneTrialOut] {
            let mut trials = Ragged::default();
            trials.push_row(0, &[10.2, 10.4]);
            trials.push_row(1, &[11.0, 12.5]);
            let f = fit_timing(&trials, 2, 200, rule);
            assert!(f.q.iter().all(|&x| x > 0.0));
            assert!((f.q.iter().sum::<f64>() - 1.0).abs() < 1e-12);
            assert!(f.q[11] > 20.0 * f.q[150], "{rule:?}");
        }
    }
}
