//! Fitting spike-count distributions per (unit, stimulus): maximum likelihood for each family,
//! the few-trials mean shrinkage helper, and per-cell family choice by held-out likelihood.
//!
//! Owns: the estimators. The distributions themselves (tables, generating functions) are
//! `auspex_engine::count`; this file only turns counts into their parameters.

use auspex_engine::count::{
    com_log_terms, CountDist, CountError, CountFamily, CountParams, EMPIRICAL_SMOOTHING_TRIALS,
    MAX_TABLE_LEN,
};
use auspex_engine::special::ln_factorial;
use statrs::function::gamma::ln_gamma;

// Fitting
// ---------------------------------------------------------------------------------------------

/// Count histogram: (value, multiplicity), for likelihoods that only depend on distinct values.
fn histogram(counts: &[u32]) -> Vec<(u32, u32)> {
    let mut v: Vec<u32> = counts.to_vec();
    v.sort_unstable();
    let mut h: Vec<(u32, u32)> = Vec::new();
    for x in v {
        match h.last_mut() {
            Some((val, m)) if *val == x => *m += 1,
            _ => h.push((x, 1)),
        }
    }
    h
}

fn sample_mean(counts: &[u32]) -> f64 {
    counts.iter().map(|&c| c as f64).sum::<f64>() / counts.len().max(1) as f64
}

/// Smallest mean a fit may return: half a spike spread over all training trials, so a cell that
/// never fired still assigns a finite probability to a spike.
fn mean_floor(n_trials: usize) -> f64 {
    0.5 / (n_trials.max(1) as f64)
}

/// Poisson maximum likelihood (the sample mean, floored).
pub fn fit_poisson(counts: &[u32]) -> CountParams {
    CountParams::Poisson {
        mean: sample_mean(counts).max(mean_floor(counts.len())),
    }
}

/// Negative binomial maximum likelihood: the mean is the sample mean; the shape maximises the
/// profile likelihood (golden-section search on ln r over [1e-2, 1e4]). Data with variance at or
/// below the mean drive r to the upper bound, where the family is Poisson in all but name.
pub fn fit_negative_binomial(counts: &[u32]) -> CountParams {
    let m = sample_mean(counts).max(mean_floor(counts.len()));
    let h = histogram(counts);
    let t = counts.len() as f64;
    let ll = |r: f64| -> f64 {
        let lp = (r / (r + m)).ln();
        let l1p = (m / (r + m)).ln();
        let lgr = ln_gamma(r);
        h.iter()
            .map(|&(n, c)| c as f64 * (ln_gamma(r + n as f64) - lgr + n as f64 * l1p))
            .sum::<f64>()
            + t * r * lp
    };
    let (mut a, mut b) = ((1e-2f64).ln(), (1e4f64).ln());
    let g = (5f64.sqrt() - 1.0) / 2.0;
    let mut x1 = b - g * (b - a);
    let mut x2 = a + g * (b - a);
    let (mut f1, mut f2) = (ll(x1.exp()), ll(x2.exp()));
    for _ in 0..80 {
        if f1 < f2 {
            a = x1;
            x1 = x2;
            f1 = f2;
            x2 = a + g * (b - a);
            f2 = ll(x2.exp());
        } else {
            b = x2;
            x2 = x1;
            f2 = f1;
            x1 = b - g * (b - a);
            f1 = ll(x1.exp());
        }
    }
    CountParams::NegativeBinomial {
        mean: m,
        shape: ((a + b) / 2.0).exp(),
    }
}

/// Moments of n and ln n! under COM-Poisson(λ, ν): (ln Z, E n, E ln n!, Var n, Cov, Var ln n!).
fn com_moments(lambda: f64, nu: f64) -> Option<[f64; 6]> {
    let (lz, len) = com_log_terms(lambda, nu).ok()?;
    let ll = lambda.ln();
    let mut s = [0.0f64; 5];
    for n in 0..len as u32 {
        let lf = ln_factorial(n);
        let p = (n as f64 * ll - nu * lf - lz).exp();
        let x = n as f64;
        s[0] += p * x;
        s[1] += p * lf;
        s[2] += p * x * x;
        s[3] += p * x * lf;
        s[4] += p * lf * lf;
    }
    Some([
        lz,
        s[0],
        s[1],
        s[2] - s[0] * s[0],
        s[3] - s[0] * s[1],
        s[4] - s[1] * s[1],
    ])
}

/// Conway–Maxwell–Poisson maximum likelihood by Newton's method in (ln λ, ν), an exponential
/// family with sufficient statistics (n, ln n!), so the log-likelihood is concave there.
/// ν is kept in [0.05, 30]. Returns `None` when every count is zero (no information on ν).
pub fn fit_com_poisson(counts: &[u32]) -> Option<CountParams> {
    if counts.iter().all(|&c| c == 0) || counts.is_empty() {
        return None;
    }
    let t = counts.len() as f64;
    let ybar = sample_mean(counts);
    let lbar = counts.iter().map(|&c| ln_factorial(c)).sum::<f64>() / t;
    let ll = |th: f64, nu: f64| -> Option<f64> {
        let (lz, _) = com_log_terms(th.exp(), nu).ok()?;
        Some(th * ybar - nu * lbar - lz)
    };
    let (mut th, mut nu) = (ybar.max(1e-3).ln(), 1.0f64);
    let mut cur = ll(th, nu)?;
    for _ in 0..100 {
        let [_, en, el, vn, cnl, vl] = com_moments(th.exp(), nu)?;
        let g = [ybar - en, el - lbar];
        // Hessian of ℓ in (θ, ν): [[−Var n, Cov], [Cov, −Var ln n!]].
        let (h11, h12, h22) = (-vn, cnl, -vl);
        let det = h11 * h22 - h12 * h12;
        let (mut d1, mut d2) = if det.abs() > 1e-14 && det > 0.0 {
            (
                -(h22 * g[0] - h12 * g[1]) / det,
                -(-h12 * g[0] + h11 * g[1]) / det,
            )
        } else {
            (g[0] * 0.1, g[1] * 0.1)
        };
        let mut step_ok = false;
        for _ in 0..40 {
            let (nth, nnu) = (th + d1, (nu + d2).clamp(0.05, 30.0));
            if let Some(v) = ll(nth, nnu) {
                if v >= cur - 1e-12 {
                    let gain = v - cur;
                    th = nth;
                    nu = nnu;
                    cur = v;
                    step_ok = gain > 1e-11;
                    break;
                }
            }
            d1 *= 0.5;
            d2 *= 0.5;
        }
        if !step_ok || (g[0].abs() < 1e-10 && g[1].abs() < 1e-10) {
            break;
        }
    }
    Some(CountParams::ComPoisson {
        lambda: th.exp(),
        nu,
    })
}

/// Smoothed empirical: `P(n) = (c_n + a·P_nb(n)) / (T + a)` with `a` =
/// [`EMPIRICAL_SMOOTHING_TRIALS`] and `P_nb` the negative binomial fit to the same counts, so the
/// histogram keeps its shape and no count, seen or not, gets probability 0.
pub fn fit_empirical(counts: &[u32]) -> Result<CountParams, CountError> {
    let base = CountDist::new(fit_negative_binomial(counts))?;
    let a = EMPIRICAL_SMOOTHING_TRIALS;
    let t = counts.len() as f64;
    let max_obs = counts.iter().copied().max().unwrap_or(0) as usize;
    let len = base.pmf().len().max(max_obs + 1);
    if len > MAX_TABLE_LEN {
        return Err(CountError::TableTooLong);
    }
    let mut pmf = vec![0.0; len];
    for &c in counts {
        pmf[c as usize] += 1.0;
    }
    for (n, p) in pmf.iter_mut().enumerate() {
        *p = (*p + a * base.ln_pmf(n as u32).exp()) / (t + a);
    }
    Ok(CountParams::Empirical { pmf })
}

/// Fits one family to the counts.
pub fn fit_family(family: CountFamily, counts: &[u32]) -> Option<CountParams> {
    match family {
        CountFamily::Poisson => Some(fit_poisson(counts)),
        CountFamily::NegativeBinomial => Some(fit_negative_binomial(counts)),
        CountFamily::ComPoisson => fit_com_poisson(counts),
        CountFamily::Empirical => fit_empirical(counts).ok(),
    }
}

/// The same family moved to mean `target`, its shape kept: Poisson and negative binomial set the
/// mean (the negative binomial keeps its shape r), COM-Poisson solves for the λ whose mean is
/// `target` with ν kept (bisection on ln λ; the mean rises with λ), and a table is mixed with
/// `pool` (weight `w`, the caller's shrinkage weight), which moves its mean the same way.
/// Returns `None` when the moved parameters do not give a usable distribution.
pub fn with_mean(params: &CountParams, target: f64, w: f64, pool: &[f64]) -> Option<CountParams> {
    if !(target.is_finite() && target > 0.0) {
        return None;
    }
    let moved = match params {
        CountParams::Poisson { .. } => CountParams::Poisson { mean: target },
        CountParams::NegativeBinomial { shape, .. } => CountParams::NegativeBinomial {
            mean: target,
            shape: *shape,
        },
        CountParams::ComPoisson { lambda, nu } => {
            let mean_at = |ll: f64| com_moments(ll.exp(), *nu).map(|m| m[1]);
            let (mut a, mut b) = (lambda.ln() - 1.0, lambda.ln() + 1.0);
            // Widen until the target is bracketed (at most a few steps for a shrinkage move).
            for _ in 0..60 {
                match (mean_at(a), mean_at(b)) {
                    (Some(ma), Some(mb)) if ma <= target && target <= mb => break,
                    (Some(ma), Some(_)) if ma > target => a -= 2.0,
                    (Some(_), Some(_)) => b += 2.0,
                    _ => return None,
                }
            }
            for _ in 0..80 {
                let mid = 0.5 * (a + b);
                if mean_at(mid)? < target {
                    a = mid;
                } else {
                    b = mid;
                }
            }
            CountParams::ComPoisson {
                lambda: (0.5 * (a + b)).exp(),
                nu: *nu,
            }
        }
        CountParams::Empirical { pmf } => {
            let len = pmf.len().max(pool.len());
            let mut out = vec![0.0; len];
            for (n, o) in out.iter_mut().enumerate() {
                let p = pmf.get(n).copied().unwrap_or(0.0);
                let q = pool.get(n).copied().unwrap_or(0.0);
                *o = (1.0 - w) * p + w * q;
            }
            // Entries past one table's end come from the other alone: keep every entry > 0.
            let floor = out
                .iter()
                .copied()
                .filter(|x| *x > 0.0)
                .fold(1.0f64, f64::min);
            for o in out.iter_mut() {
                if *o <= 0.0 {
                    *o = floor * 1e-3;
                }
            }
            let s: f64 = out.iter().sum();
            out.iter_mut().for_each(|x| *x /= s);
            CountParams::Empirical { pmf: out }
        }
    };
    CountDist::new(moved.clone()).ok().map(|_| moved)
}

/// The outcome of choosing a family for one cell.
#[derive(Clone, Debug)]
pub struct FamilyChoice {
    /// The chosen, refitted on all trials.
    pub params: CountParams,
    /// Held-out log-likelihood per trial for each family tried (`None` where the fit failed).
    pub held_out: Vec<(CountFamily, Option<f64>)>,
}

/// Held-out log-likelihood margin (nats, summed over trials) a more complex family must win by.
pub const SELECTION_MARGIN_NATS: f64 = 0.5;

/// Chooses a family among `candidates` by k-fold held-out log-likelihood over trials
/// (k = min(5, trials); trial i is in fold i mod k), refits the winner on all counts.
/// Near-ties (within [`SELECTION_MARGIN_NATS`]) go to the simpler family.
pub fn choose_family(counts: &[u32], candidates: &[CountFamily]) -> FamilyChoice {
    let t = counts.len();
    let mut cands: Vec<CountFamily> = candidates.to_vec();
    cands.sort();
    cands.dedup();
    if cands.is_empty() {
        cands.push(CountFamily::Poisson);
    }
    let k = t.clamp(1, 5);
    let mut held_out = Vec::new();
    let mut best: Option<(CountFamily, f64)> = None;
    // Each fold's training counts, gathered once for every candidate family.
    let trains: Vec<Vec<u32>> = if t < 2 || cands.len() == 1 {
        Vec::new()
    } else {
        (0..k)
            .map(|fold| {
                counts
                    .iter()
                    .enumerate()
                    .filter(|(i, _)| i % k != fold)
                    .map(|(_, c)| *c)
                    .collect()
            })
            .collect()
    };
    for &fam in &cands {
        let score = if t < 2 || cands.len() == 1 {
            Some(0.0)
        } else {
            let mut total = 0.0;
            let mut ok = true;
            for (fold, train) in trains.iter().enumerate() {
                match fit_family(fam, train).and_then(|p| CountDist::new(p).ok()) {
                    Some(d) => {
                        total += counts
                            .iter()
                            .enumerate()
                            .filter(|(i, _)| i % k == fold)
                            .map(|(_, &c)| d.ln_pmf(c))
                            .sum::<f64>();
                    }
                    None => {
                        ok = false;
                        break;
                    }
                }
            }
            ok.then_some(total)
        };
        held_out.push((fam, score.map(|s| s / t.max(1) as f64)));
        if let Some(s) = score {
            if best.is_none_or(|(_, b)| s > b + SELECTION_MARGIN_NATS) {
                best = Some((fam, s));
            }
        }
    }
    let fam = best.map(|b| b.0).unwrap_or(CountFamily::Poisson);
    // The refit on all trials must also give a usable table; fall back to Poisson otherwise.
    let params = fit_family(fam, counts)
        .filter(|p| CountDist::new(p.clone()).is_ok())
        .unwrap_or_else(|| fit_poisson(counts));
    FamilyChoice { params, held_out }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn negative_binomial_fit_recovers_parameters() {
        // Deterministic sample: the NB(r=3, mean=6) quantiles at evenly spaced probabilities.
        let d = CountDist::new(CountParams::NegativeBinomial {
            mean: 6.0,
            shape: 3.0,
        })
        .unwrap();
        let mut counts = Vec::new();
        for i in 0..2000 {
            let u = (i as f64 + 0.5) / 2000.0;
            let mut c = 0.0;
            let mut n = 0;
            for (j, p) in d.pmf().iter().enumerate() {
                c += p;
                n = j;
                if c >= u {
                    break;
                }
            }
            counts.push(n as u32);
        }
        match fit_negative_binomial(&counts) {
            CountParams::NegativeBinomial { mean, shape } => {
                assert!((mean - 6.0).abs() < 0.05, "mean {mean}");
                assert!((shape - 3.0).abs() < 0.3, "shape {shape}");
            }
            _ => unreachable!(),
        }
        let ch = choose_family(&counts, &CountFamily::ALL);
        assert_ne!(
            ch.params.family(),
            CountFamily::Poisson,
            "over-dispersed data"
        );
    }

    #[test]
    fn com_fit_recovers_under_dispersion() {
        let d = CountDist::new(CountParams::ComPoisson {
            lambda: 20.0,
            nu: 2.0,
        })
        .unwrap();
        let mut counts = Vec::new();
        for i in 0..3000 {
            let u = (i as f64 + 0.5) / 3000.0;
            let mut c = 0.0;
            let mut n = 0;
            for (j, p) in d.pmf().iter().enumerate() {
                c += p;
                n = j;
                if c >= u {
                    break;
                }
            }
            counts.push(n as u32);
        }
        match fit_com_poisson(&counts).unwrap() {
            CountParams::ComPoisson { lambda, nu } => {
                assert!((nu - 2.0).abs() < 0.25, "nu {nu}");
                assert!((lambda.ln() - 20f64.ln()).abs() < 0.5, "lambda {lambda}");
            }
            _ => unreachable!(),
        }
        let ch = choose_family(&counts, &CountFamily::ALL);
        assert!(
            matches!(
                ch.params.family(),
                CountFamily::ComPoisson | CountFamily::Empirical
            ),
            "under-dispersed data chose {:?}",
            ch.params.family()
        );
    }

    #[test]
    fn empirical_never_zero_and_sums_to_one() {
        let counts = [0u32, 3, 3, 4, 9];
        let p = fit_empirical(&counts).unwrap();
        let d = CountDist::new(p).unwrap();
        assert!(d.pmf().iter().all(|&p| p > 0.0));
        assert!((d.pmf().iter().sum::<f64>() - 1.0).abs() < 1e-11);
        assert!(d.ln_pmf(500).is_finite());
        assert!(d.ln_gf_deriv(500, 0.5).is_finite());
    }

    #[test]
    fn all_zero_counts_still_fit() {
        let z = [0u32; 10];
        let ch = choose_family(&z, &CountFamily::ALL);
        let d = CountDist::new(ch.params).unwrap();
        assert!(d.ln_pmf(1).is_finite());
    }
}
