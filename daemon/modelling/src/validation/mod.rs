//! The pure pieces of validation: stratified cross-validation folds, refitting a cell with its
//! family and bandwidth held fixed (for label-shuffle nulls), the window-end likelihood in closed
//! form, decisions replayed from posterior trajectories at any threshold, the discrete-time
//! time-rescaling transform, and the Fano factor with an interval. No I/O, no threads.

use crate::density::{floor_timing, kde_bin_probabilities};
use crate::families::{fit_family, fit_poisson};
use crate::fit::CellInput;
use auspex_engine::count::{CountDist, CountFamily};

pub mod run;
use auspex_engine::model::{mean_var, CellSpec, CellSummary, Model};
use auspex_engine::special::{argmax, ln_factorial};
use statrs::distribution::{ChiSquared, ContinuousCDF};

/// Refits one cell with a given family and kernel bandwidth (bins): the count parameters and
/// the spike density are re-estimated from `input`, the model-selection choices are not.
/// Used for label-shuffle nulls, where rerunning the selection on every shuffle would cost
/// hundreds of times the original fit.
pub fn refit_cell(
    input: &CellInput,
    n_bins: usize,
    bin_width_s: f64,
    family: CountFamily,
    bandwidth_bins: f64,
) -> CellSpec {
    let count = fit_family(family, &input.counts).unwrap_or_else(|| fit_poisson(&input.counts));
    let pooled = input.times.items();
    let timing = if pooled.is_empty() || !bandwidth_bins.is_finite() {
        vec![1.0 / n_bins as f64; n_bins]
    } else {
        let mut q = kde_bin_probabilities(pooled, n_bins, bandwidth_bins);
        floor_timing(&mut q);
        q
    };
    let (mean, var) = mean_var(&input.counts);
    CellSpec {
        count,
        timing,
        summary: CellSummary {
            n_trials: input.counts.len() as u32,
            mean_count: mean,
            var_count: var,
            bandwidth_s: bandwidth_bins * bin_width_s,
            held_out: Vec::new(),
        },
    }
}

/// Adds unit `u`'s full-window log-likelihood for every stimulus to `out` (length S), given
/// the bins of its spikes in the window: `Σ_i ln q(b_i) + ln k! + ln P(k)` — the engine's
/// likelihood at the last bin, where `Φ^(k)(0) = k!·P(k)`, up to terms equal for every stimulus.
pub fn add_window_end_log_likelihood(model: &Model, u: usize, spike_bins: &[u32], out: &mut [f64]) {
    let k = spike_bins.len() as u32;
    let lf = ln_factorial(k);
    for (s, o) in out.iter_mut().enumerate() {
        let q = model.timing(u, s);
        let t: f64 = spike_bins.iter().map(|&b| q[b as usize].ln()).sum();
        *o += t + lf + model.count(u, s).ln_pmf(k);
    }
}

/// The decision the engine's policy would take on a stored trajectory (`n_bins × S` posteriors,
/// bin-major): the first bin at or after `min_bin` whose top posterior reaches `threshold`, else
/// the maximum a posteriori stimulus at the last bin. Returns (stimulus, bin, by_threshold).
pub fn decide(
    trajectory: &[f32],
    n_stimuli: usize,
    threshold: f64,
    min_bin: usize,
    thresholds_apply: bool,
) -> (usize, usize, bool) {
    let nb = trajectory.len() / n_stimuli;
    if thresholds_apply {
        for b in min_bin..nb {
            let row = &trajectory[b * n_stimuli..(b + 1) * n_stimuli];
            let top = argmax(row);
            if auspex_engine::decision::fires(b, min_bin, row[top] as f64, threshold) {
                return (top, b, true);
            }
        }
    }
    let last = &trajectory[(nb - 1) * n_stimuli..];
    (argmax(last), nb - 1, false)
}

/// The discrete-time time-rescaling transform (Haslinger, Pipa & Brown 2010) of one trial of
/// one cell. Bins are binary events (a bin holding one or more spikes is one event); the model's
/// probability of no spike in bin b given k spikes before it is
/// `Φ^(k)(S(b)) / Φ^(k)(S(b−1))`, so `q_b = −ln P(no spike) = ln Φ^(k)(S(b−1)) − ln Φ^(k)(S(b))`.
/// For each event bin t_i: `τ_i = Σ_{t_{i−1} < j < t_i} q_j + δ_i` with
/// `δ_i = −ln(1 − r_i (1 − e^{−q_{t_i}}))`, `r_i ~ U(0,1)`, and `ξ_i = 1 − e^{−τ_i}`, which is
/// Uniform(0,1) when the model is right. (The δ_i correction is written from memory of the
/// paper; `calibration` below checks the result is uniform on data drawn from the model.)
///
/// Trials are short (a few spikes each), so dropping each trial's censored last interval would
/// bias the sample toward short intervals. Instead the trials are chained: `carry` holds the
/// rescaled time since the last event and runs on into the next trial (compensators of
/// independent trials add), and only the one interval still open at the very end is dropped.
/// `counts[b]` is the number of spikes in bin b; `uniform()` draws r_i.
pub fn rescaled_intervals(
    dist: &CountDist,
    survival: impl Fn(usize) -> f64,
    counts: &[u32],
    carry: &mut f64,
    mut uniform: impl FnMut() -> f64,
    out: &mut Vec<f64>,
) {
    let mut k = 0u32;
    let mut prev_ln = dist.ln_gf_deriv(0, 1.0);
    for (b, &c) in counts.iter().enumerate() {
        let ln_here = dist.ln_gf_deriv(k, survival(b));
        let q = (prev_ln - ln_here).max(0.0);
        if c == 0 {
            *carry += q;
            prev_ln = ln_here;
            if !carry.is_finite() {
                // The model ruled this silence out (no count as low as this one is possible):
                // record the most extreme interval and start afresh.
                out.push(1.0);
                *carry = 0.0;
            }
        } else {
            let r = uniform();
            let delta = -(1.0 - r * (1.0 - (-q).exp())).ln();
            *carry += delta;
            out.push(1.0 - (-*carry).exp());
            *carry = 0.0;
            k += c;
            prev_ln = dist.ln_gf_deriv(k, survival(b));
        }
    }
}

/// Fano factor (variance / mean) of counts with a `1 − alpha` interval from the chi-square
/// distribution of `(n−1)·s²/σ²` (normal approximation for the sample variance; a common
/// practice for count variability, not exact for Poisson-like counts). None when the mean is
/// zero or fewer than two trials.
pub fn fano_interval(counts: &[u32], alpha: f64) -> Option<(f64, f64, f64)> {
    let n = counts.len();
    if n < 2 {
        return None;
    }
    let (mean, var) = mean_var(counts);
    if mean <= 0.0 {
        return None;
    }
    let f = var / mean;
    let df = (n - 1) as f64;
    let chi = ChiSquared::new(df).ok()?;
    let lo = df * f / chi.inverse_cdf(1.0 - alpha / 2.0);
    let hi = df * f / chi.inverse_cdf(alpha / 2.0);
    Some((f, lo, hi))
}

/// The earliest bin from which the lower confidence bound stays above `chance` for at least
/// `run` consecutive bins (or to the end of the window, if shorter).
pub fn earliest_reliable(lower: &[f64], chance: f64, run: usize) -> Option<usize> {
    let n = lower.len();
    (0..n).find(|&b| {
        let end = (b + run).min(n);
        lower[b..end].iter().all(|&l| l > chance)
    })
}

/// One confidence bin of a reliability diagram.
#[derive(Clone, Debug, PartialEq, serde::Serialize)]
pub struct ReliabilityBin {
    /// Lower edge of the confidence bin.
    pub from: f64,
    /// Upper edge (the last bin includes 1).
    pub to: f64,
    /// Trials whose confidence fell in the bin.
    pub n: u64,
    /// Their mean confidence (top posterior).
    pub confidence: f64,
    /// Share of them decoded right.
    pub accuracy: f64,
    /// 95% Clopper–Pearson interval of the accuracy.
    pub lo: f64,
    /// 95% Clopper–Pearson interval of the accuracy.
    pub hi: f64,
}

/// Reliability of stated confidences: `points` are (top posterior, decoded right), binned into
/// `n_bins` equal-width confidence bins; returns the non-empty bins and the expected calibration
/// error `ECE = Σ_b (n_b / N) · |accuracy_b − confidence_b|`.
pub fn reliability(points: &[(f64, bool)], n_bins: usize) -> (Vec<ReliabilityBin>, f64) {
    let n_bins = n_bins.max(1);
    let mut acc = vec![(0u64, 0u64, 0.0f64); n_bins];
    for &(c, right) in points {
        let b = ((c.clamp(0.0, 1.0) * n_bins as f64) as usize).min(n_bins - 1);
        acc[b].0 += 1;
        acc[b].1 += right as u64;
        acc[b].2 += c;
    }
    let total = points.len().max(1) as f64;
    let mut ece = 0.0;
    let mut bins = Vec::new();
    for (b, &(n, k, csum)) in acc.iter().enumerate() {
        if n == 0 {
            continue;
        }
        let (conf, a) = (csum / n as f64, k as f64 / n as f64);
        ece += n as f64 / total * (a - conf).abs();
        let (lo, hi) = crate::stats::clopper_pearson(k, n, 0.05);
        bins.push(ReliabilityBin {
            from: b as f64 / n_bins as f64,
            to: (b + 1) as f64 / n_bins as f64,
            n,
            confidence: conf,
            accuracy: a,
            lo,
            hi,
        });
    }
    (bins, ece)
}

/// The same points in `n_bins` bins of (nearly) equal counts, in order of confidence: where
/// confidences crowd (decisions all above θ) the bins are narrow, so a reliability diagram
/// shows points along the whole range instead of one in a corner. (The ECE stays that of
/// [`reliability`]'s equal-width bins.)
pub fn reliability_equal_mass(points: &[(f64, bool)], n_bins: usize) -> Vec<ReliabilityBin> {
    let mut sorted: Vec<(f64, bool)> = points
        .iter()
        .map(|&(c, r)| (c.clamp(0.0, 1.0), r))
        .collect();
    sorted.sort_by(|a, b| a.0.total_cmp(&b.0));
    let n = sorted.len();
    let k = n_bins.max(1).min(n.max(1));
    (0..k)
        .filter_map(|b| {
            let chunk = &sorted[b * n / k..(b + 1) * n / k];
            if chunk.is_empty() {
                return None;
            }
            let m = chunk.len() as u64;
            let right = chunk.iter().filter(|x| x.1).count() as u64;
            let (lo, hi) = crate::stats::clopper_pearson(right, m, 0.05);
            Some(ReliabilityBin {
                from: chunk[0].0,
                to: chunk[chunk.len() - 1].0,
                n: m,
                confidence: chunk.iter().map(|x| x.0).sum::<f64>() / m as f64,
                accuracy: right as f64 / m as f64,
                lo,
                hi,
            })
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use auspex_engine::count::CountParams;

    #[test]
    fn equal_mass_bins_hold_equal_counts_in_confidence_order() {
        let pts: Vec<(f64, bool)> = (0..100)
            .map(|i| (0.9 + i as f64 / 1000.0, i % 3 != 0))
            .collect();
        let bins = reliability_equal_mass(&pts, 10);
        assert_eq!(bins.len(), 10);
        assert!(bins.iter().all(|b| b.n == 10));
        assert!(bins.windows(2).all(|w| w[0].to <= w[1].from));
        let right: u64 = bins
            .iter()
            .map(|b| (b.accuracy * b.n as f64).round() as u64)
            .sum();
        assert_eq!(right, pts.iter().filter(|p| p.1).count() as u64);
        assert!(reliability_equal_mass(&[], 10).is_empty());
    }

    #[test]
    fn reliability_and_ece_match_a_hand_computed_case() {
        // Five trials: confidences 0.95 (right), 0.92 (wrong), 0.85 (right), 0.55 (right),
        // 0.52 (wrong), in 10 bins. Bin [0.9, 1): n 2, confidence 0.935, accuracy 0.5;
        // bin [0.8, 0.9): n 1, 0.85, 1.0; bin [0.5, 0.6): n 2, 0.535, 0.5.
        // ECE = 2/5·|0.5 − 0.935| + 1/5·|1 − 0.85| + 2/5·|0.5 − 0.535|
        //     = 0.174 + 0.03 + 0.014 = 0.218 (computed by hand).
        let pts = [
            (0.95, true),
            (0.92, false),
            (0.85, true),
            (0.55, true),
            (0.52, false),
        ];
        let (bins, ece) = reliability(&pts, 10);
        assert_eq!(bins.len(), 3);
        assert_eq!((bins[0].n, bins[1].n, bins[2].n), (2, 1, 2));
        assert!((bins[2].confidence - 0.935).abs() < 1e-12 && bins[2].accuracy == 0.5);
        assert!((ece - 0.218).abs() < 1e-12, "{ece}");
        assert!(bins
            .iter()
            .all(|b| b.lo <= b.accuracy && b.accuracy <= b.hi));
        // A confidence of exactly 1 falls in the last bin.
        assert_eq!(reliability(&[(1.0, true)], 10).0[0].from, 0.9);
    }

    #[test]
    fn decide_replays_the_policy() {
        // Two stimuli, four bins.
        let t = [0.5f32, 0.5, 0.8, 0.2, 0.95, 0.05, 0.3, 0.7];
        assert_eq!(decide(&t, 2, 0.9, 0, true), (0, 2, true));
        assert_eq!(decide(&t, 2, 0.9, 3, true), (1, 3, false));
        assert_eq!(decide(&t, 2, 0.99, 0, true), (1, 3, false));
        assert_eq!(decide(&t, 2, 0.5, 0, false), (1, 3, false));
    }

    #[test]
    fn fano_interval_brackets_the_estimate() {
        // Chi-square quantiles for df = 9 (statrs; tables give 2.700 and 19.023): the interval
        // is 9F/19.023 .. 9F/2.700.
        let counts = [3u32, 5, 4, 6, 2, 5, 4, 3, 7, 1];
        let (f, lo, hi) = fano_interval(&counts, 0.05).unwrap();
        assert!((lo - 9.0 * f / 19.0228).abs() < 1e-3 * f);
        assert!((hi - 9.0 * f / 2.7004).abs() < 1e-3 * f);
    }

    #[test]
    fn rescaling_of_a_poisson_cell_reduces_to_the_bernoulli_form() {
        // Poisson(μ): ln Φ^(k)(z) = k ln μ − μ(1 − z), so q_b = μ·q(b) whatever the history:
        // the familiar inhomogeneous-Poisson case, where P(no spike in b) = exp(−μ q(b)).
        let mu = 3.0;
        let d = CountDist::new(CountParams::Poisson { mean: mu }).unwrap();
        let q = [0.1, 0.2, 0.3, 0.4];
        let surv = |b: usize| q[b + 1..].iter().sum::<f64>();
        let mut out = Vec::new();
        let mut carry = 0.0;
        rescaled_intervals(&d, surv, &[0, 1, 0, 1], &mut carry, || 0.5, &mut out);
        assert!(
            (carry - 0.0).abs() < 1e-12,
            "nothing left open after a spike in the last bin"
        );
        let d1 = -(1.0 - 0.5 * (1.0 - (-mu * 0.2f64).exp())).ln();
        let z1 = 1.0 - (-(mu * 0.1 + d1)).exp();
        let d2 = -(1.0 - 0.5 * (1.0 - (-mu * 0.4f64).exp())).ln();
        let z2 = 1.0 - (-(mu * 0.3 + d2)).exp();
        assert_eq!(out.len(), 2);
        assert!((out[0] - z1).abs() < 1e-12 && (out[1] - z2).abs() < 1e-12);
    }

    #[test]
    fn earliest_reliable_needs_a_sustained_run() {
        let lower = [0.1, 0.3, 0.1, 0.3, 0.3, 0.3];
        assert_eq!(earliest_reliable(&lower, 0.2, 3), Some(3));
        assert_eq!(earliest_reliable(&lower, 0.5, 3), None);
    }
}
#[cfg(test)]
mod calibration {
    use super::*;
    use crate::simulate::{simulate, Scenario, SimOptions};
    use crate::stats::{ks_critical, ks_uniform};
    use rand::{Rng, SeedableRng};
    use rand_chacha::ChaCha8Rng;

    /// Share of cells whose rescaled intervals stay inside the 95% KS band.
    fn pass_share(model: &Model, data: &auspex_engine::Dataset) -> f64 {
        let nb = model.n_bins();
        let w = crate::windows::windows(data, model.units(), 1000, nb);
        let mut rng = ChaCha8Rng::seed_from_u64(3);
        let (mut pass, mut tested) = (0, 0);
        for u in 0..model.n_units() {
            for s in 0..model.n_stimuli() {
                let (mut z, mut carry) = (Vec::new(), 0.0);
                for (i, t) in data.trials.iter().enumerate() {
                    if t.stimulus.as_deref() != Some(&model.stimuli()[s]) {
                        continue;
                    }
                    let mut c = vec![0u32; nb];
                    for &x in w.times(u, i) {
                        c[(x as usize).min(nb - 1)] += 1;
                    }
                    let (d, sv) = (model.count(u, s), |b| model.survival(u, s, b));
                    rescaled_intervals(d, sv, &c, &mut carry, || rng.gen::<f64>(), &mut z);
                }
                if z.len() >= 5 {
                    tested += 1;
                    let n = z.len();
                    pass += (ks_uniform(&mut z) <= ks_critical(n, 0.05)) as usize;
                }
            }
        }
        pass as f64 / tested as f64
    }

    #[test]
    fn time_rescaling_is_calibrated_on_data_from_the_model_and_rejects_another() {
        let text = std::fs::read_to_string(concat!(
            env!("CARGO_MANIFEST_DIR"),
            "/../../demo-data/scenario.toml"
        ))
        .unwrap();
        let sc: Scenario = toml::from_str(&text).unwrap();
        let truth = Model::new(sc.true_model().unwrap()).unwrap();
        let data = simulate(
            &truth,
            &SimOptions {
                trials_per_stimulus: 40,
                ..sc.sim_options()
            },
        );
        // 192 cells tested at 95%: about 95% pass when the model is right (fixed seed; the
        // bound leaves room for the binomial spread of 192 tests, sd ≈ 1.6 points).
        let ok = pass_share(&truth, &data);
        assert!(
            (0.88..=1.0).contains(&ok),
            "share passing under the true model: {ok}"
        );
        // A clearly different model: the same counts with flat timing.
        let mut flat = sc.true_model().unwrap();
        for c in flat.cells.iter_mut() {
            let nb = c.timing.len();
            c.timing = vec![1.0 / nb as f64; nb];
        }
        let flat = Model::new(flat).unwrap();
        let bad = pass_share(&flat, &data);
        assert!(bad < 0.5, "share passing under a flat-timing model: {bad}");
    }
}
