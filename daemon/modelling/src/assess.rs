//! What a researcher at the rig wants to know about each unit while trials come in: its tuning
//! (mean window count per stimulus with an interval), its response latency, how well it alone
//! decodes the stimulus (prequential single-unit accuracy with a Clopper–Pearson interval), how
//! much it tells (bias-corrected information with an uncertainty and a test against none), and
//! a plain verdict under a stated rule.
//!
//! Rules (also in the README):
//! * **not yet**: some stimulus has fewer than `min_trials` labelled, decoded trials of the unit.
//! * **encodes** / **does not encode**: the G-test of independence of its presented × decoded
//!   confusion matrix, `G = 2·N·I` (I the plug-in information in nats), against χ² with
//!   (r − 1)(c − 1) degrees of freedom (r, c: rows and columns with any trial), at p < `alpha`
//!   (the χ² approximation of the G statistic is rough with few trials per cell).
//! * **settled**: the 95% Clopper–Pearson interval of its accuracy is at most `settle_width` wide,
//!   so further trials are unlikely to move the accuracy by more than about half of that.
//!
//! Must not: allocate on the per-bin path (it runs once per labelled trial), or do I/O.

use crate::stats::clopper_pearson;
use auspex_engine::information::{bias_corrected, mutual_info_bias_bits, presented_entropy_bits};
use statrs::distribution::{ChiSquared, ContinuousCDF, StudentsT};

/// The verdict rule's settings.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct VerdictRule {
    /// Labelled trials of every stimulus before any verdict.
    pub min_trials: u64,
    /// Significance level of the test.
    pub alpha: f64,
    /// Widest accuracy interval that counts as settled.
    pub settle_width: f64,
}

impl Default for VerdictRule {
    fn default() -> Self {
        VerdictRule {
            min_trials: 3,
            alpha: 0.05,
            settle_width: 0.2,
        }
    }
}

/// A unit's verdict.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Verdict {
    /// Too few trials of some stimulus.
    NotYet,
    /// Its decoded stimulus depends on the presented one (p < alpha).
    Encodes,
    /// No evidence that it does.
    DoesNotEncode,
}

impl Verdict {
    /// The words shown to users.
    pub fn words(self) -> &'static str {
        match self {
            Verdict::NotYet => "not yet enough trials",
            Verdict::Encodes => "encodes",
            Verdict::DoesNotEncode => "no evidence it encodes",
        }
    }
}

/// Mean window count of one stimulus with a 95% interval (Student's t on the trial counts).
#[derive(Clone, Copy, Debug, Default, PartialEq)]
pub struct Tuning {
    /// Labelled trials.
    pub trials: u64,
    /// Mean count.
    pub mean: f64,
    /// Interval (equal to the mean with fewer than two trials).
    pub low: f64,
    /// Interval.
    pub high: f64,
}

/// Everything said about one unit.
#[derive(Clone, Debug, PartialEq)]
pub struct Assessment {
    /// Labelled, decoded trials.
    pub trials: u64,
    /// Prequential single-unit accuracy.
    pub accuracy: f64,
    /// Its 95% Clopper–Pearson interval.
    pub accuracy_low: f64,
    /// Its 95% Clopper–Pearson interval.
    pub accuracy_high: f64,
    /// Bias-corrected information, bits (plug-in minus the Panzeri–Treves term, floored at 0).
    pub info_bits: f64,
    /// Standard error of the plug-in information, bits (leading-order delta method).
    pub info_se_bits: f64,
    /// p-value of the G-test of independence.
    pub p_value: f64,
    /// The verdict.
    pub verdict: Verdict,
    /// Whether more trials would change the accuracy much (see the module rules).
    pub settled: bool,
}

/// Tuning of one stimulus from the count sums `(n, Σk, Σk²)`.
pub fn tuning(n: u64, sum: f64, sum_sq: f64) -> Tuning {
    if n == 0 {
        return Tuning::default();
    }
    let nf = n as f64;
    let mean = sum / nf;
    if n < 2 {
        return Tuning {
            trials: n,
            mean,
            low: mean,
            high: mean,
        };
    }
    let var = ((sum_sq - nf * mean * mean) / (nf - 1.0)).max(0.0);
    let t = StudentsT::new(0.0, 1.0, nf - 1.0)
        .map(|d| d.inverse_cdf(0.975))
        .unwrap_or(1.96);
    let half = t * (var / nf).sqrt();
    Tuning {
        trials: n,
        mean,
        low: (mean - half).max(0.0),
        high: mean + half,
    }
}

/// Assesses one unit from its presented × decoded confusion matrix (`s × s`, row = presented).
pub fn assess(conf: &[u64], s: usize, rule: &VerdictRule) -> Assessment {
    let n: u64 = conf.iter().sum();
    let rows: Vec<u64> = (0..s)
        .map(|i| conf[i * s..(i + 1) * s].iter().sum())
        .collect();
    let cols: Vec<u64> = (0..s)
        .map(|j| (0..s).map(|i| conf[i * s + j]).sum())
        .collect();
    let correct: u64 = (0..s).map(|i| conf[i * s + i]).sum();
    let (lo, hi) = clopper_pearson(correct, n, 0.05);
    let nf = n.max(1) as f64;
    // Plug-in information (nats) and the second moment of the log ratio.
    let (mut i_nats, mut m2) = (0.0, 0.0);
    for i in 0..s {
        for j in 0..s {
            let c = conf[i * s + j];
            if c == 0 {
                continue;
            }
            let p = c as f64 / nf;
            let l = (c as f64 * nf / (rows[i] as f64 * cols[j] as f64)).ln();
            i_nats += p * l;
            m2 += p * l * l;
        }
    }
    let info_bits = if n == 0 {
        0.0
    } else {
        bias_corrected(
            i_nats / std::f64::consts::LN_2,
            mutual_info_bias_bits(conf, s),
            presented_entropy_bits(conf, s),
        )
    };
    let info_se_bits = ((m2 - i_nats * i_nats).max(0.0) / nf).sqrt() / std::f64::consts::LN_2;
    let r = rows.iter().filter(|&&x| x > 0).count();
    let c = cols.iter().filter(|&&x| x > 0).count();
    let df = (r.saturating_sub(1) * c.saturating_sub(1)) as f64;
    let g = 2.0 * n as f64 * i_nats;
    let p_value = if df > 0.0 {
        ChiSquared::new(df)
            .map(|d| (1.0 - d.cdf(g)).clamp(0.0, 1.0))
            .unwrap_or(1.0)
    } else {
        1.0
    };
    let enough = rows.iter().all(|&x| x >= rule.min_trials) && s >= 2;
    let verdict = if !enough {
        Verdict::NotYet
    } else if p_value < rule.alpha {
        Verdict::Encodes
    } else {
        Verdict::DoesNotEncode
    };
    Assessment {
        trials: n,
        accuracy: correct as f64 / nf,
        accuracy_low: lo,
        accuracy_high: hi,
        info_bits,
        info_se_bits,
        p_value,
        verdict,
        settled: enough && hi - lo <= rule.settle_width,
    }
}

/// The time (ms after onset, bin centre) at which a spike density peaks.
pub fn peak_ms(q: &[f64], bin_width_s: f64) -> f64 {
    let mut best = (0usize, f64::NEG_INFINITY);
    for (b, &x) in q.iter().enumerate() {
        if x > best.1 {
            best = (b, x);
        }
    }
    (best.0 as f64 + 0.5) * bin_width_s * 1000.0
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn g_test_matches_the_chi_square_reference() {
        // 2 × 2 table [[30, 10], [10, 30]]: G = 2 Σ O ln(O/E) with E = 20 everywhere
        // = 2·(2·30·ln 1.5 + 2·10·ln 0.5) = 20.929926; with one degree of freedom
        // P(χ² > G) = erfc(√(G/2)) = 4.763938e-6 (computed with Python's math.erfc, a
        // general-purpose reference).
        let a = assess(&[30, 10, 10, 30], 2, &VerdictRule::default());
        let g = 2.0 * (2.0 * 30.0 * 1.5f64.ln() + 2.0 * 10.0 * 0.5f64.ln());
        assert!((g - 20.929926).abs() < 1e-5);
        assert!((a.p_value - 4.763938e-6).abs() < 1e-10, "{}", a.p_value);
        assert_eq!(a.verdict, Verdict::Encodes);
        assert!((a.accuracy - 0.75).abs() < 1e-12);
        // Information: plug-in I = g / (2N) nats.
        let plug = g / 160.0 / std::f64::consts::LN_2;
        assert!(a.info_bits < plug && a.info_bits > plug - 0.02);
    }

    #[test]
    fn independent_table_does_not_encode_and_few_trials_wait() {
        let a = assess(&[10, 10, 10, 10], 2, &VerdictRule::default());
        assert_eq!(a.verdict, Verdict::DoesNotEncode);
        assert!((a.p_value - 1.0).abs() < 1e-9);
        assert_eq!(a.info_bits, 0.0);
        let b = assess(&[2, 0, 0, 5], 2, &VerdictRule::default());
        assert_eq!(b.verdict, Verdict::NotYet);
        assert!(!b.settled);
    }

    #[test]
    fn settled_when_the_accuracy_interval_is_narrow() {
        let rule = VerdictRule::default();
        assert!(!assess(&[8, 2, 2, 8], 2, &rule).settled);
        assert!(assess(&[80, 20, 20, 80], 2, &rule).settled);
    }

    #[test]
    fn tuning_interval_uses_student_t() {
        // Counts 1, 2, 3: mean 2, sd 1, t(0.975; 2) = 4.302653 (statrs; handbook value 4.303).
        let t = tuning(3, 6.0, 14.0);
        assert!((t.mean - 2.0).abs() < 1e-12);
        assert!((t.high - (2.0 + 4.302653 / 3f64.sqrt())).abs() < 1e-5);
        assert_eq!(t.low, 0.0f64.max(2.0 - 4.302653 / 3f64.sqrt()));
    }
}
