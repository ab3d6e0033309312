//! Small numerical helpers shared by the count families and the likelihood: log-factorials,
//! log-sum-exp and entropy. Pure functions only; nothing here allocates on a hot path.

use statrs::function::gamma::ln_gamma;

/// `ln n!`, exact through `ln Γ(n + 1)`.
#[inline]
pub fn ln_factorial(n: u32) -> f64 {
    if n < 2 {
        0.0
    } else {
        ln_gamma(n as f64 + 1.0)
    }
}

/// Table of `ln n!` for `n = 0..len`, built once per model so the hot path only indexes.
pub fn ln_factorial_table(len: usize) -> Vec<f64> {
    let mut t = Vec::with_capacity(len.max(1));
    let mut acc = 0.0f64;
    for n in 0..len.max(1) {
        if n > 1 {
            acc += (n as f64).ln();
        }
        t.push(acc);
    }
    t
}

/// `ln Σ exp(x_i)` without overflow. Returns `-inf` for an empty slice or all `-inf`.
pub fn log_sum_exp(xs: &[f64]) -> f64 {
    let m = xs.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if !m.is_finite() {
        return m;
    }
    m + xs.iter().map(|x| (x - m).exp()).sum::<f64>().ln()
}

/// Turns log-weights into a probability vector in place (softmax). Never yields NaN as long as at
/// least one input is finite; if none is, falls back to the uniform distribution.
pub fn softmax_in_place(xs: &mut [f64]) {
    let m = xs.iter().copied().fold(f64::NEG_INFINITY, f64::max);
    if !m.is_finite() || m.is_nan() {
        let u = 1.0 / xs.len().max(1) as f64;
        xs.iter_mut().for_each(|x| *x = u);
        return;
    }
    let mut sum = 0.0;
    for x in xs.iter_mut() {
        let e = if x.is_nan() { 0.0 } else { (*x - m).exp() };
        *x = e;
        sum += e;
    }
    xs.iter_mut().for_each(|x| *x /= sum);
}

/// Shannon entropy in bits of a probability vector.
pub fn entropy_bits(p: &[f64]) -> f64 {
    p.iter().filter(|&&x| x > 0.0).map(|&x| -x * x.log2()).sum()
}

/// Index of the largest entry (the first one on ties).
pub fn argmax<T: PartialOrd + Copy>(v: &[T]) -> usize {
    let mut best = 0;
    for (i, x) in v.iter().enumerate() {
        if *x > v[best] {
            best = i;
        }
    }
    best
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn factorial_table_matches_gamma() {
        let t = ln_factorial_table(200);
        for n in [0u32, 1, 2, 5, 10, 50, 170, 199] {
            let d = (t[n as usize] - ln_factorial(n)).abs();
            assert!(d < 1e-9 * (1.0 + t[n as usize]), "n={n} d={d}");
        }
        // 10! = 3628800 (exact integer).
        assert!((t[10] - 3_628_800f64.ln()).abs() < 1e-12);
    }

    #[test]
    fn softmax_sums_to_one_and_survives_infinities() {
        let mut v = [f64::NEG_INFINITY, 0.0, -1000.0, 2.0];
        softmax_in_place(&mut v);
        assert!((v.iter().sum::<f64>() - 1.0).abs() < 1e-15);
        assert_eq!(v[0], 0.0);
        let mut w = [f64::NEG_INFINITY; 3];
        softmax_in_place(&mut w);
        assert!((w[1] - 1.0 / 3.0).abs() < 1e-15);
    }

    #[test]
    fn entropy_of_uniform_is_log2_n() {
        assert!((entropy_bits(&[0.25; 4]) - 2.0).abs() < 1e-15);
    }
}
