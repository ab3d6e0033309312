//! Spike-count distributions per (unit, stimulus): the four families, their probability tables,
//! the derivatives of their probability generating functions (the count term of the likelihood,
//! DESIGN.md) (fitting is `auspex_modelling::families`).
//!
//! Owns: the numbers. Must not: touch files, clocks or threads. Every table built here is the one
//! the engine and the JSON export use, so both see the same probabilities.

use crate::special::{ln_factorial, ln_factorial_table, log_sum_exp};
use serde::{Deserialize, Serialize};
use statrs::function::gamma::ln_gamma;

/// Probability mass left out of every count table (the interchange promise).
pub const TAIL_MASS: f64 = 1e-12;
/// Longest count table a model may hold; a cell needing more is a fitting error, not a silent cut.
pub const MAX_TABLE_LEN: usize = 20_000;
/// Weight, in pseudo-trials, of the parametric shape mixed into the smoothed empirical family.
pub const EMPIRICAL_SMOOTHING_TRIALS: f64 = 1.0;

/// The count families a cell may use.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash, Serialize, Deserialize, PartialOrd, Ord)]
#[serde(rename_all = "snake_case")]
pub enum CountFamily {
    /// Poisson(mean): Fano factor 1.
    Poisson,
    /// Negative binomial (mean, shape r): over-dispersed, variance mean + mean²/r.
    NegativeBinomial,
    /// Conway–Maxwell–Poisson (λ, ν): under- or over-dispersed.
    ComPoisson,
    /// Training histogram smoothed towards a fitted negative binomial, so no count has probability 0.
    Empirical,
}

impl CountFamily {
    /// All families, simplest first (the order used to break near-ties in selection).
    pub const ALL: [CountFamily; 4] = [
        CountFamily::Poisson,
        CountFamily::NegativeBinomial,
        CountFamily::ComPoisson,
        CountFamily::Empirical,
    ];

    /// Name used in files and on the command line.
    pub fn name(self) -> &'static str {
        match self {
            CountFamily::Poisson => "poisson",
            CountFamily::NegativeBinomial => "negative_binomial",
            CountFamily::ComPoisson => "com_poisson",
            CountFamily::Empirical => "empirical",
        }
    }

    /// Parses a family name (also accepts the short forms `nb` and `com`).
    pub fn parse(s: &str) -> Option<Self> {
        match s.trim().to_ascii_lowercase().as_str() {
            "poisson" => Some(CountFamily::Poisson),
            "negative_binomial" | "negative-binomial" | "nb" => Some(CountFamily::NegativeBinomial),
            "com_poisson" | "com-poisson" | "com" => Some(CountFamily::ComPoisson),
            "empirical" => Some(CountFamily::Empirical),
            _ => None,
        }
    }
}

/// Parameters of a fitted count distribution.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(tag = "family", rename_all = "snake_case")]
pub enum CountParams {
    /// Poisson with this mean.
    Poisson {
        /// Mean count in the window.
        mean: f64,
    },
    /// Negative binomial with this mean and shape (variance mean + mean²/shape).
    NegativeBinomial {
        /// Mean count in the window.
        mean: f64,
        /// Shape r (> 0).
        shape: f64,
    },
    /// Conway–Maxwell–Poisson, P(n) ∝ λⁿ/(n!)^ν.
    ComPoisson {
        /// Rate-like parameter λ (> 0).
        lambda: f64,
        /// Dispersion ν (> 0; < 1 over-, > 1 under-dispersed).
        nu: f64,
    },
    /// A probability table P(0), P(1), … (mass left out below [`TAIL_MASS`]).
    Empirical {
        /// The table.
        pmf: Vec<f64>,
    },
}

impl CountParams {
    /// About how many entries this distribution's table will hold (at most
    /// [`MAX_TABLE_LEN`]), from the parameters alone: the mean plus ten standard deviations
    /// (the table stops once the tail mass is negligible). For budgets, before any is built.
    pub fn table_len_hint(&self) -> usize {
        let (mean, var) = match self {
            CountParams::Poisson { mean } => (*mean, *mean),
            CountParams::NegativeBinomial { mean, shape } => (*mean, mean + mean * mean / shape),
            CountParams::ComPoisson { lambda, nu } => {
                let m = lambda.powf(1.0 / nu);
                (m, m / nu)
            }
            CountParams::Empirical { pmf } => return pmf.len().min(MAX_TABLE_LEN),
        };
        let n = mean + 10.0 * var.max(0.0).sqrt() + 10.0;
        if n.is_finite() {
            (n as usize).min(MAX_TABLE_LEN)
        } else {
            MAX_TABLE_LEN
        }
    }

    /// The family of these parameters.
    pub fn family(&self) -> CountFamily {
        match self {
            CountParams::Poisson { .. } => CountFamily::Poisson,
            CountParams::NegativeBinomial { .. } => CountFamily::NegativeBinomial,
            CountParams::ComPoisson { .. } => CountFamily::ComPoisson,
            CountParams::Empirical { .. } => CountFamily::Empirical,
        }
    }
}

/// Why a count distribution could not be built.
#[derive(Debug, thiserror::Error, PartialEq)]
pub enum CountError {
    /// A parameter is out of its domain.
    #[error("count distribution parameter out of range: {0}")]
    BadParameter(String),
    /// The table would be longer than [`MAX_TABLE_LEN`].
    #[error("count distribution needs more than {MAX_TABLE_LEN} table entries (mean too large?)")]
    TableTooLong,
}

/// A count distribution ready for the likelihood: parameters plus its probability table.
#[derive(Clone, Debug)]
pub struct CountDist {
    params: CountParams,
    pmf: Vec<f64>,
    ln_pmf: Vec<f64>,
    ln_fact: Vec<f64>,
    /// ln of the geometric ratio used past the end of the table (empirical and COM only).
    tail_ln_ratio: f64,
    mean: f64,
    variance: f64,
    // Closed-form constants.
    ln_mean: f64,
    nb_p: f64,
    nb_ln_p: f64,
    nb_ln_1mp: f64,
    nb_ln_gamma_r: f64,
}

fn check_pos(name: &str, v: f64) -> Result<(), CountError> {
    if v.is_finite() && v > 0.0 {
        Ok(())
    } else {
        Err(CountError::BadParameter(format!(
            "{name} = {v} must be finite and > 0"
        )))
    }
}

/// Builds a table from a log-pmf generator, stopping once past `mode_hint` with the remaining
/// mass below [`TAIL_MASS`]: either the running sum says so, or the geometric bound
/// `P(n)·ρ/(1−ρ)` does, with ρ the larger of the last ratio P(n)/P(n−1) and `ratio_limit`
/// (the ratio's limit for families whose ratio rises towards it). The bound keeps rounding in
/// the running sum from stretching the table.
fn table_from(
    mut ln_term: impl FnMut(u32) -> f64,
    mode_hint: f64,
    ratio_limit: f64,
) -> Result<Vec<f64>, CountError> {
    let mut pmf: Vec<f64> = Vec::new();
    let mut cum = 0.0f64;
    for n in 0..MAX_TABLE_LEN as u32 {
        let p = ln_term(n).exp();
        pmf.push(p);
        cum += p;
        if (n as f64) > mode_hint {
            let prev = pmf[n as usize - 1];
            let rho = if prev > 0.0 {
                (p / prev).max(ratio_limit)
            } else {
                ratio_limit
            };
            let bound = if rho < 1.0 {
                p * rho / (1.0 - rho)
            } else {
                f64::INFINITY
            };
            if 1.0 - cum < TAIL_MASS || bound < TAIL_MASS * 0.5 {
                // Grown by doubling: up to twice the table's own size held for the model's
                // lifetime, which the memory budget (counting the entries) would not see —
                // found by the budget property test (`tests/budget.rs`: 5 × 32 cells of mean
                // 16 073 held 85 MB under a 64 MB budget).
                pmf.shrink_to_fit();
                return Ok(pmf);
            }
        }
    }
    Err(CountError::TableTooLong)
}

/// ln Z and the table of ln terms for COM-Poisson, summed until terms are negligible.
pub fn com_log_terms(lambda: f64, nu: f64) -> Result<(f64, usize), CountError> {
    let ll = lambda.ln();
    let mode = lambda.powf(1.0 / nu);
    let mut terms = Vec::new();
    let mut best = f64::NEG_INFINITY;
    for n in 0..(4 * MAX_TABLE_LEN) as u32 {
        let t = n as f64 * ll - nu * ln_factorial(n);
        best = best.max(t);
        terms.push(t);
        if (n as f64) > mode && t < best - 45.0 {
            return Ok((log_sum_exp(&terms), terms.len()));
        }
    }
    Err(CountError::TableTooLong)
}

impl CountDist {
    /// Builds the distribution and its table, validating the parameters.
    pub fn new(params: CountParams) -> Result<Self, CountError> {
        let (pmf, _mode) = match &params {
            CountParams::Poisson { mean } => {
                check_pos("mean", *mean)?;
                let lm = mean.ln();
                (
                    table_from(|n| n as f64 * lm - mean - ln_factorial(n), *mean, 0.0)?,
                    *mean,
                )
            }
            CountParams::NegativeBinomial { mean, shape } => {
                check_pos("mean", *mean)?;
                check_pos("shape", *shape)?;
                let (r, m) = (*shape, *mean);
                let p = r / (r + m);
                let (lp, l1p) = (p.ln(), (m / (r + m)).ln());
                // ln P(n) by the recurrence P(n+1) = P(n)·(r+n)/(n+1)·(1−p): no cancellation
                // between large ln Γ values when r is large.
                let mut ln_terms = vec![r * lp];
                let t = table_from(
                    |n| {
                        let n = n as usize;
                        while ln_terms.len() <= n {
                            let j = ln_terms.len() - 1;
                            let next = ln_terms[j] + ((r + j as f64) / (j as f64 + 1.0)).ln() + l1p;
                            ln_terms.push(next);
                        }
                        ln_terms[n]
                    },
                    m,
                    m / (r + m),
                );
                (t?, m)
            }
            CountParams::ComPoisson { lambda, nu } => {
                check_pos("lambda", *lambda)?;
                check_pos("nu", *nu)?;
                let (lz, _) = com_log_terms(*lambda, *nu)?;
                let ll = lambda.ln();
                let mode = lambda.powf(1.0 / nu);
                (
                    table_from(|n| n as f64 * ll - nu * ln_factorial(n) - lz, mode, 0.0)?,
                    mode,
                )
            }
            CountParams::Empirical { pmf } => {
                if pmf.is_empty() {
                    return Err(CountError::BadParameter("empty count table".into()));
                }
                if pmf.len() > MAX_TABLE_LEN {
                    return Err(CountError::TableTooLong);
                }
                if let Some((n, p)) = pmf
                    .iter()
                    .enumerate()
                    .find(|(_, p)| !(p.is_finite() && **p > 0.0))
                {
                    return Err(CountError::BadParameter(format!(
                        "count table entry P({n}) = {p} must be finite and > 0"
                    )));
                }
                let s: f64 = pmf.iter().sum();
                if (s - 1.0).abs() > 1e-6 {
                    return Err(CountError::BadParameter(format!(
                        "count table sums to {s}, not 1"
                    )));
                }
                (pmf.clone(), 0.0)
            }
        };
        let ln_pmf: Vec<f64> = pmf.iter().map(|p| p.ln()).collect();
        let mean: f64 = pmf.iter().enumerate().map(|(n, p)| n as f64 * p).sum();
        let m2: f64 = pmf
            .iter()
            .enumerate()
            .map(|(n, p)| (n * n) as f64 * p)
            .sum();
        let variance = (m2 - mean * mean).max(0.0);
        let nlen = pmf.len();
        let tail_ln_ratio = if nlen >= 2 {
            (ln_pmf[nlen - 1] - ln_pmf[nlen - 2]).min((0.95f64).ln())
        } else {
            (0.5f64).ln()
        };
        let mut d = CountDist {
            ln_fact: ln_factorial_table(nlen + 1),
            params,
            pmf,
            ln_pmf,
            tail_ln_ratio,
            mean,
            variance,
            ln_mean: 0.0,
            nb_p: 0.0,
            nb_ln_p: 0.0,
            nb_ln_1mp: 0.0,
            nb_ln_gamma_r: 0.0,
        };
        match d.params {
            CountParams::Poisson { mean } => {
                d.ln_mean = mean.ln();
                d.mean = mean;
                d.variance = mean;
            }
            CountParams::NegativeBinomial { mean, shape } => {
                let p = shape / (shape + mean);
                d.nb_p = p;
                d.nb_ln_p = p.ln();
                d.nb_ln_1mp = (mean / (shape + mean)).ln();
                d.nb_ln_gamma_r = ln_gamma(shape);
                d.mean = mean;
                d.variance = mean + mean * mean / shape;
            }
            _ => {}
        }
        Ok(d)
    }

    /// The parameters.
    pub fn params(&self) -> &CountParams {
        &self.params
    }
    /// The family.
    pub fn family(&self) -> CountFamily {
        self.params.family()
    }
    /// P(0), P(1), …: the table the engine uses (mass left out below [`TAIL_MASS`]).
    pub fn pmf(&self) -> &[f64] {
        &self.pmf
    }
    /// Mean of the distribution.
    pub fn mean(&self) -> f64 {
        self.mean
    }
    /// Variance of the distribution.
    pub fn variance(&self) -> f64 {
        self.variance
    }

    /// ln P(n), including the geometric tail past the table for table-based families.
    pub fn ln_pmf(&self, n: u32) -> f64 {
        match self.params {
            CountParams::Poisson { mean } => n as f64 * self.ln_mean - mean - ln_factorial(n),
            CountParams::NegativeBinomial { shape, .. } => {
                ln_gamma(shape + n as f64) - self.nb_ln_gamma_r - ln_factorial(n)
                    + shape * self.nb_ln_p
                    + n as f64 * self.nb_ln_1mp
            }
            _ => {
                let n = n as usize;
                if n < self.ln_pmf.len() {
                    self.ln_pmf[n]
                } else {
                    let last = self.ln_pmf.len() - 1;
                    self.ln_pmf[last] + (n - last) as f64 * self.tail_ln_ratio
                }
            }
        }
    }

    /// `ln Φ^(k)(z)`, the log of the k-th derivative of the probability generating function at
    /// `z ∈ [0, 1]` (DESIGN.md): Poisson and negative binomial in closed form, the others by the
    /// finite sum `Σ_{n≥k} P(n)·n!/(n−k)!·z^(n−k)` evaluated by Horner's rule.
    pub fn ln_gf_deriv(&self, k: u32, z: f64) -> f64 {
        match self.params {
            CountParams::Poisson { mean } => k as f64 * self.ln_mean - mean * (1.0 - z),
            CountParams::NegativeBinomial { shape, .. } => {
                let kf = k as f64;
                self.nb_ln_gf_const(k) - (shape + kf) * (1.0 - (1.0 - self.nb_p) * z).ln()
            }
            _ => self.ln_gf_deriv_table(k, z),
        }
    }

    /// Negative binomial: the part of `ln Φ^(k)` that does not depend on z,
    /// `r ln p + k ln(1−p) + ln Γ(r+k) − ln Γ(r)`.
    pub fn nb_ln_gf_const(&self, k: u32) -> f64 {
        match self.params {
            CountParams::NegativeBinomial { shape, .. } => {
                let kf = k as f64;
                shape * self.nb_ln_p + kf * self.nb_ln_1mp + ln_gamma(shape + kf)
                    - self.nb_ln_gamma_r
            }
            _ => f64::NAN,
        }
    }

    /// Negative binomial `ln(1 − p)` (NaN for other families).
    pub fn nb_ln_one_minus_p(&self) -> f64 {
        match self.params {
            CountParams::NegativeBinomial { .. } => self.nb_ln_1mp,
            _ => f64::NAN,
        }
    }

    /// Negative binomial `1 − p` (0 for other families).
    pub fn nb_one_minus_p(&self) -> f64 {
        match self.params {
            CountParams::NegativeBinomial { .. } => 1.0 - self.nb_p,
            _ => 0.0,
        }
    }

    fn ln_gf_deriv_table(&self, k: u32, z: f64) -> f64 {
        let nlen = self.pmf.len();
        let ku = k as usize;
        let ln_k_fact = if ku < self.ln_fact.len() {
            self.ln_fact[ku]
        } else {
            ln_factorial(k)
        };
        if ku >= nlen {
            // Past the table every n ≥ k lies in the geometric tail P(n) = P(N)ρ^(n−N):
            // Σ_{n≥k} P(N)ρ^(n−N) n!/(n−k)! z^(n−k) = P(N) ρ^(k−N) k! / (1 − ρz)^(k+1).
            let last = nlen - 1;
            let lr = self.tail_ln_ratio;
            return self.ln_pmf[last] + (ku - last) as f64 * lr + ln_k_fact
                - (k as f64 + 1.0) * (1.0 - lr.exp() * z).ln();
        }
        if z == 0.0 {
            // The end of the window: Φ^(k)(0) = k!·P(k), what Horner's rule below gives too.
            return ln_k_fact + self.ln_pmf[ku];
        }
        // Horner on Σ_j P(k+j)·C(k+j, j)·z^j, innermost term first.
        let mut acc = self.pmf[nlen - 1];
        let mut n = nlen - 1;
        while n > ku {
            // acc ← P(n−1) + z·n/(n−k)·acc
            acc = self.pmf[n - 1] + z * (n as f64) / ((n - ku) as f64) * acc;
            n -= 1;
        }
        ln_k_fact + acc.ln()
    }
}

// ---------------------------------------------------------------------------------------------
#[cfg(test)]
mod tests {
    use super::*;
    use statrs::distribution::{Discrete, NegativeBinomial, Poisson};

    fn close(a: f64, b: f64, rel: f64) -> bool {
        (a - b).abs() <= rel * b.abs().max(1e-300)
    }

    #[test]
    fn poisson_pmf_matches_scipy_and_statrs() {
        // SciPy 1.17.1 poisson.pmf(n, 3.5), n = 0..4 (shared/REFERENCE-VALUES.md).
        let want = [
            0.0301973834,
            0.105690842,
            0.184958973,
            0.215785469,
            0.188812285,
        ];
        let d = CountDist::new(CountParams::Poisson { mean: 3.5 }).unwrap();
        let sr = Poisson::new(3.5).unwrap();
        for (n, w) in want.iter().enumerate() {
            assert!(close(d.pmf()[n], *w, 1e-8), "n={n}");
            assert!(close(d.pmf()[n], sr.pmf(n as u64), 1e-12));
        }
        let left: f64 = 1.0 - d.pmf().iter().sum::<f64>();
        assert!(left < TAIL_MASS, "mass left out {left}");
    }

    #[test]
    fn negative_binomial_pmf_matches_scipy_and_statrs() {
        // SciPy 1.17.1 nbinom.pmf(n, 2, 2/7) (r = 2, mean 5), n = 0..3; variance 17.5.
        let want = [0.0816326531, 0.116618076, 0.124947938, 0.118998037];
        let d = CountDist::new(CountParams::NegativeBinomial {
            mean: 5.0,
            shape: 2.0,
        })
        .unwrap();
        // statrs parameterises by (r, p) with p the success probability r/(r+mean).
        let sr = NegativeBinomial::new(2.0, 2.0 / 7.0).unwrap();
        for (n, w) in want.iter().enumerate() {
            assert!(close(d.pmf()[n], *w, 1e-8), "n={n}");
            assert!(close(d.pmf()[n], sr.pmf(n as u64), 1e-10));
        }
        assert!(close(d.variance(), 17.5, 1e-12));
        assert!(
            close(d.variance() / d.mean(), 3.5, 1e-12),
            "Fano factor 3.5"
        );
    }

    #[test]
    fn com_poisson_pmf_and_moments_match_direct_summation() {
        // COM-Poisson λ=2, ν=1.5 by direct summation (REFERENCE-VALUES.md; Shmueli et al. 2005).
        let d = CountDist::new(CountParams::ComPoisson {
            lambda: 2.0,
            nu: 1.5,
        })
        .unwrap();
        let want = [0.195210504, 0.390421009, 0.276069343, 0.10625914];
        for (n, w) in want.iter().enumerate() {
            assert!(close(d.pmf()[n], *w, 1e-7), "n={n} got {}", d.pmf()[n]);
        }
        assert!(close(d.mean(), 1.39577919, 1e-7));
        assert!(close(d.variance(), 1.07380622, 1e-7));
        // λ=2, ν=0.5: over-dispersed.
        let o = CountDist::new(CountParams::ComPoisson {
            lambda: 2.0,
            nu: 0.5,
        })
        .unwrap();
        assert!(close(o.mean(), 4.55442393, 1e-7));
        assert!(close(o.variance(), 7.92158416, 1e-7));
    }

    /// Direct sum A_k(s) = Σ_{n≥k} P(n) n!/(n−k)! s^(n−k) in log space, far past any table.
    fn direct_gf(d: &CountDist, k: u32, s: f64) -> f64 {
        let terms: Vec<f64> = (k..4000)
            .map(|n| d.ln_pmf(n) + ln_factorial(n) - ln_factorial(n - k) + (n - k) as f64 * s.ln())
            .collect();
        log_sum_exp(&terms)
    }

    #[test]
    fn generating_function_derivatives_match_reference_values() {
        // Poisson(5), s = 0.7: k=2 → 5.578254004, k=0 → 0.2231301601 (SciPy direct sum; equals
        // μ^k e^(−μF), the inhomogeneous Poisson likelihood).
        let p = CountDist::new(CountParams::Poisson { mean: 5.0 }).unwrap();
        assert!(close(p.ln_gf_deriv(2, 0.7).exp(), 5.578254004, 1e-9));
        assert!(close(p.ln_gf_deriv(0, 0.7).exp(), 0.2231301601, 1e-9));
        // Negative binomial closed form (Johnson, Kemp & Kotz 2005, Ch. 5 PGF), REFERENCE-VALUES.md.
        for (r, m, f, k, want) in [
            (2.0, 5.0, 0.3, 2, 3.998334027),
            (2.0, 5.0, 0.3, 0, 0.3265306122),
            (0.5, 8.0, 0.6, 3, 1.980572258),
            (10.0, 4.0, 0.25, 5, 588.9182304),
        ] {
            let d = CountDist::new(CountParams::NegativeBinomial { mean: m, shape: r }).unwrap();
            let got = d.ln_gf_deriv(k, 1.0 - f).exp();
            assert!(close(got, want, 1e-8), "r={r} m={m} k={k}: {got} vs {want}");
            // Closed form equals the direct sum.
            assert!((d.ln_gf_deriv(k, 1.0 - f) - direct_gf(&d, k, 1.0 - f)).abs() < 1e-9);
        }
        // COM-Poisson λ=5, ν=2, s=0.7 (direct sum; derived): A0..A3.
        let c = CountDist::new(CountParams::ComPoisson {
            lambda: 5.0,
            nu: 2.0,
        })
        .unwrap();
        for (k, want) in [
            (0, 0.5308009516),
            (1, 1.209800074),
            (2, 2.063149548),
            (3, 2.746716107),
        ] {
            let got = c.ln_gf_deriv(k, 0.7).exp();
            assert!(close(got, want, 1e-8), "k={k}: {got} vs {want}");
        }
    }

    #[test]
    fn end_of_window_is_k_factorial_times_pmf() {
        // Φ^(k)(0) = k!·P(k) (DESIGN.md).
        let c = CountDist::new(CountParams::ComPoisson {
            lambda: 3.0,
            nu: 0.7,
        })
        .unwrap();
        for k in 0..12 {
            let want = ln_factorial(k) + c.ln_pmf(k);
            assert!((c.ln_gf_deriv(k, 0.0) - want).abs() < 1e-12);
        }
    }
}
