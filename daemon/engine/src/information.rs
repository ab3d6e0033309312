//! Information a unit's decoded stimulus carries about the presented one, from a confusion matrix
//! (rows presented, columns decoded): the plug-in estimate and its first-order bias. The one
//! estimator behind the engine's live per-unit tally and every report.
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
}
