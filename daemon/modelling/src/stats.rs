//! Statistics for reports and monitoring: exact Clopper–Pearson intervals and binomial
//! tail probabilities, and the Kolmogorov–Smirnov statistic and critical values used by the
//! time-rescaling goodness-of-fit test. Pure functions. (Information from a confusion matrix is
//! `auspex_engine::information`, the one estimator the live tally and every report use.)

use statrs::distribution::{Beta, Binomial, ContinuousCDF, Discrete, DiscreteCDF};

/// Exact Clopper–Pearson interval for `k` successes in `n` trials at confidence `1 − alpha`.
pub fn clopper_pearson(k: u64, n: u64, alpha: f64) -> (f64, f64) {
    if n == 0 {
        return (0.0, 1.0);
    }
    let lo = if k == 0 {
        0.0
    } else {
        Beta::new(k as f64, (n - k + 1) as f64)
            .map(|b| b.inverse_cdf(alpha / 2.0))
            .unwrap_or(0.0)
    };
    let hi = if k == n {
        1.0
    } else {
        Beta::new((k + 1) as f64, (n - k) as f64)
            .map(|b| b.inverse_cdf(1.0 - alpha / 2.0))
            .unwrap_or(1.0)
    };
    (lo, hi)
}

/// One-sided binomial p-value P(X ≥ k) for X ~ Binomial(n, p).
pub fn binomial_upper_p(k: u64, n: u64, p: f64) -> f64 {
    if k == 0 {
        return 1.0;
    }
    match Binomial::new(p, n) {
        Ok(b) => (1.0 - b.cdf(k - 1)).max(b.pmf(k)).clamp(0.0, 1.0),
        Err(_) => f64::NAN,
    }
}

/// Smallest k of n that is significant at `alpha` (one-sided) against chance `p`.
pub fn smallest_significant(n: u64, p: f64, alpha: f64) -> Option<u64> {
    (0..=n).find(|&k| binomial_upper_p(k, n, p) < alpha)
}

/// Kolmogorov–Smirnov statistic of samples against the Uniform(0, 1) distribution.
pub fn ks_uniform(samples: &mut [f64]) -> f64 {
    samples.sort_by(|a, b| a.total_cmp(b));
    let n = samples.len() as f64;
    let mut d = 0.0f64;
    for (i, &z) in samples.iter().enumerate() {
        let lo = z - i as f64 / n;
        let hi = (i as f64 + 1.0) / n - z;
        d = d.max(lo).max(hi);
    }
    d
}

/// Exact two-sided one-sample KS distribution function P(D_n ≤ d), by the
/// Marsaglia–Tsang–Wang (2003) matrix method.
pub fn ks_cdf(n: usize, d: f64) -> f64 {
    if d <= 0.0 {
        return 0.0;
    }
    if d >= 1.0 {
        return 1.0;
    }
    let nf = n as f64;
    let k = (nf * d).floor() as usize + 1;
    let m = 2 * k - 1;
    let h = k as f64 - nf * d;
    let mut hm = vec![0.0f64; m * m];
    for i in 0..m {
        for j in 0..m {
            hm[i * m + j] = if i + 1 >= j { 1.0 } else { 0.0 };
        }
    }
    for i in 0..m {
        hm[i * m] -= h.powi(i as i32 + 1);
        hm[(m - 1) * m + i] -= h.powi((m - i) as i32);
    }
    hm[(m - 1) * m] += if 2.0 * h - 1.0 > 0.0 {
        (2.0 * h - 1.0).powi(m as i32)
    } else {
        0.0
    };
    for i in 0..m {
        for j in 0..m {
            if i + 1 >= j {
                for g in 1..=(i + 1 - j) {
                    hm[i * m + j] /= g as f64;
                }
            }
        }
    }
    // Matrix power with exponent tracking to avoid overflow.
    let (mut q, mut eq) = mat_pow(&hm, m, n);
    let mut s = q[(k - 1) * m + (k - 1)];
    for i in 1..=n {
        s = s * i as f64 / nf;
        if s < 1e-140 {
            s *= 1e140;
            eq -= 140;
        }
    }
    q.clear();
    s * 10f64.powi(eq)
}

fn mat_mul(a: &[f64], b: &[f64], m: usize) -> Vec<f64> {
    let mut c = vec![0.0; m * m];
    for i in 0..m {
        for k in 0..m {
            let x = a[i * m + k];
            if x != 0.0 {
                for j in 0..m {
                    c[i * m + j] += x * b[k * m + j];
                }
            }
        }
    }
    c
}

fn mat_pow(a: &[f64], m: usize, n: usize) -> (Vec<f64>, i32) {
    if n == 1 {
        return (a.to_vec(), 0);
    }
    let (half, eh) = mat_pow(a, m, n / 2);
    let mut v = mat_mul(&half, &half, m);
    let mut ev = 2 * eh;
    if n % 2 == 1 {
        v = mat_mul(a, &v, m);
    }
    if v[(m / 2) * m + m / 2] > 1e140 {
        v.iter_mut().for_each(|x| *x *= 1e-140);
        ev += 140;
    }
    (v, ev)
}

/// The critical value D such that P(D_n > D) = alpha (exact, by bisection on [`ks_cdf`]).
pub fn ks_critical(n: usize, alpha: f64) -> f64 {
    let (mut lo, mut hi) = (0.0f64, 1.0f64);
    for _ in 0..60 {
        let mid = 0.5 * (lo + hi);
        if ks_cdf(n, mid) < 1.0 - alpha {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    0.5 * (lo + hi)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn clopper_pearson_matches_scipy() {
        // SciPy 1.17.1 binomtest(45, 60).proportion_ci(method='exact'): [0.6214036445, 0.8528139262].
        let (lo, hi) = clopper_pearson(45, 60, 0.05);
        assert!((lo - 0.6214036445).abs() < 1e-8, "{lo}");
        assert!((hi - 0.8528139262).abs() < 1e-8, "{hi}");
        // 0 of 20: upper bound 0.1684334710.
        assert!((clopper_pearson(0, 20, 0.05).1 - 0.1684334710).abs() < 1e-8);
        // One-sided p against 0.5: 6.725704e−5.
        assert!((binomial_upper_p(45, 60, 0.5) / 6.725704e-5 - 1.0).abs() < 1e-5);
        assert_eq!(smallest_significant(60, 0.5, 0.05), Some(37));
        assert_eq!(smallest_significant(60, 0.25, 0.05), Some(22));
    }

    #[test]
    fn ks_critical_values_match_scipy_kstwo() {
        // SciPy 1.17.1 kstwo.ppf(0.95, n).
        for (n, want) in [(20, 0.294075), (50, 0.188406), (100, 0.134028)] {
            let got = ks_critical(n, 0.05);
            assert!((got - want).abs() < 2e-6, "n={n}: {got} vs {want}");
        }
    }

    #[test]
    fn ks_statistic_of_reference_example() {
        // Brown et al. (2002) time rescaling, REFERENCE-VALUES.md: D = 0.1934693.
        let mut z = [0.3934693, 0.5276334, 0.8262261, 0.0951626, 0.7534030];
        assert!((ks_uniform(&mut z) - 0.1934693).abs() < 1e-6);
    }
}
