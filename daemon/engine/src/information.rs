//! Information a unit's decoded stimulus carries about the presented one, from a confusion matrix
//! (rows presented, columns decoded): the plug-in estimate and its first-order bias. The one
//! estimator behind the engine's live per-unit tally and every report.
//!
//! **The estimate shown** ([`bias_corrected`]): the plug-in mutual information minus the
//! Panzeri–Treves (1996) / Miller (1955) first-order bias `[(R_joint − 1) − (R_rows − 1) −
//! (R_cols − 1)] / (2N ln 2)`, where the bias is taken as 0 when the count of occupied cells makes
//! it negative (a near-diagonal matrix: the formula's sign then says nothing about the plug-in's
//! upward bias, and subtracting it would *add* information), and the result clamped to
//! `[0, H(presented)]` — the plug-in entropy of the presented stimuli, the most any decoder can
//! tell about them (`I(S; D) ≤ H(S)`; for S equally frequent stimuli, log2 S bits).
//!
//! Must not: allocate per trial on the live path (the tally keeps its sums incrementally and
//! calls only the arithmetic here).

/// Plug-in mutual information in bits between rows and columns of an `n × n` count matrix.
pub fn mutual_info_bits(conf: &[u64], n: usize) -> f64 {
    let total: u64 = conf.iter().sum();
    if total == 0 {
        return 0.0;
    }
    let t = total as f64;
    let mut rows = vec![0.0; n];
    let mut cols = vec![0.0; n];
    for i in 0..n {
        for j in 0..n {
            let c = conf[i * n + j] as f64;
            rows[i] += c;
            cols[j] += c;
        }
    }
    let mut mi = 0.0;
    for i in 0..n {
        for j in 0..n {
            let c = conf[i * n + j] as f64;
            if c > 0.0 {
                mi += c / t * ((c * t) / (rows[i] * cols[j])).log2();
            }
        }
    }
    mi.max(0.0)
}

/// The Panzeri–Treves (1996) first-order bias of the plug-in information, in bits:
/// `[(R_joint − 1) − (R_rows − 1) − (R_cols − 1)] / (2 N ln 2)`, with R the number of nonzero
/// (relevant) bins, as in Miller (1955).
pub fn mutual_info_bias_bits(conf: &[u64], n: usize) -> f64 {
    let total: u64 = conf.iter().sum();
    if total == 0 {
        return 0.0;
    }
    let nz = |v: &[f64]| v.iter().filter(|x| **x > 0.0).count() as f64;
    let mut rows = vec![0.0; n];
    let mut cols = vec![0.0; n];
    let mut joint = 0.0;
    for i in 0..n {
        for j in 0..n {
            let c = conf[i * n + j] as f64;
            rows[i] += c;
            cols[j] += c;
            if c > 0.0 {
                joint += 1.0;
            }
        }
    }
    ((joint - 1.0) - (nz(&rows) - 1.0) - (nz(&cols) - 1.0))
        / (2.0 * total as f64 * std::f64::consts::LN_2)
}

/// Plug-in entropy (bits) of the presented stimuli: the row sums of an `n × n` count matrix.
pub fn presented_entropy_bits(conf: &[u64], n: usize) -> f64 {
    let total: u64 = conf.iter().sum();
    if total == 0 {
        return 0.0;
    }
    let t = total as f64;
    let mut h = 0.0;
    for row in conf.chunks(n.max(1)).take(n) {
        let r: u64 = row.iter().sum();
        if r > 0 {
            let p = r as f64 / t;
            h -= p * p.log2();
        }
    }
    h.max(0.0)
}

/// The estimate every screen and file shows: `plug_in − max(bias, 0)`, clamped to
/// `[0, h_presented]` (all in bits; see the module's text for why).
#[inline]
pub fn bias_corrected(plug_in_bits: f64, bias_bits: f64, h_presented_bits: f64) -> f64 {
    let v = plug_in_bits - bias_bits.max(0.0);
    v.min(h_presented_bits.max(0.0)).max(0.0)
}

/// One confusion matrix's information, with its parts.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct InfoEstimate {
    /// Plug-in mutual information, bits.
    pub plug_in_bits: f64,
    /// First-order bias of the plug-in (may be negative; only a positive one is subtracted).
    pub bias_bits: f64,
    /// The estimate shown: [`bias_corrected`].
    pub bits: f64,
    /// Its ceiling, H(presented), bits.
    pub max_bits: f64,
}

/// The information of an `n × n` confusion matrix (row = presented, column = decoded).
pub fn information(conf: &[u64], n: usize) -> InfoEstimate {
    let plug_in_bits = mutual_info_bits(conf, n);
    let bias_bits = mutual_info_bias_bits(conf, n);
    let max_bits = presented_entropy_bits(conf, n);
    InfoEstimate {
        plug_in_bits,
        bias_bits,
        bits: bias_corrected(plug_in_bits, bias_bits, max_bits),
        max_bits,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn binary_symmetric_channel_information() {
        // Cover & Thomas (2006), BSC capacity 1 − H(0.1) = 0.5310044064 bits, with error 0.1 and
        // equiprobable inputs: counts 450/50/50/450.
        let c = [450u64, 50, 50, 450];
        assert!((mutual_info_bits(&c, 2) - 0.5310044064).abs() < 1e-9);
    }

    #[test]
    fn confusion_information_and_bias() {
        // REFERENCE-VALUES.md (Panzeri & Treves 1996; Miller 1955).
        let c = [45u64, 5, 10, 40];
        assert!((mutual_info_bits(&c, 2) - 0.3973126097).abs() < 1e-9);
        assert!((mutual_info_bias_bits(&c, 2) - 0.0072134752).abs() < 1e-9);
        let c3 = [18u64, 2, 0, 3, 14, 3, 1, 4, 15];
        assert!((mutual_info_bits(&c3, 3) - 0.6994632564).abs() < 1e-9);
        assert!((mutual_info_bias_bits(&c3, 3) - 0.0360673760).abs() < 1e-9);
    }

    #[test]
    fn a_near_diagonal_matrix_is_not_raised_above_its_ceiling() {
        // Two stimuli, 20 trials each, every one decoded right: the plug-in is exactly 1 bit
        // (= H(presented)); the occupied-cells bias is (2−1)−(2−1)−(2−1) = −1 over 2N ln 2.
        // Subtracting it would report 1.018 bits for two stimuli.
        let c = [20u64, 0, 0, 20];
        let e = information(&c, 2);
        assert!((e.plug_in_bits - 1.0).abs() < 1e-12);
        assert!(e.bias_bits < 0.0);
        assert_eq!(e.bits, 1.0);
        assert!((e.max_bits - 1.0).abs() < 1e-12);
    }

    proptest::proptest! {
        /// Every estimate lies in [0, H(presented)] ≤ log2 S.
        #[test]
        fn every_estimate_is_within_its_bounds(
            s in 1usize..7,
            cells in proptest::collection::vec(0u64..6, 36),
        ) {
            let conf: Vec<u64> = cells[..s * s].to_vec();
            let e = information(&conf, s);
            proptest::prop_assert!(e.bits >= 0.0);
            proptest::prop_assert!(e.bits <= e.max_bits + 1e-12, "{} > {}", e.bits, e.max_bits);
            proptest::prop_assert!(e.max_bits <= (s as f64).log2() + 1e-12);
            proptest::prop_assert!(e.plug_in_bits <= e.max_bits + 1e-9);
        }
    }
}
