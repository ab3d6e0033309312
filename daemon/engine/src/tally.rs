//! Running per-unit single-unit decoding tallies over a session: a confusion matrix per unit
//! (presented × decoded at the window end), from which accuracy and mutual information follow.
//! Sized once per model; recording a trial never allocates.
//!
//! The information is kept up to date incrementally: with N trials, row sums r_i, column sums
//! c_j and cells c_ij, `MI = ln N + (Σ c_ij ln c_ij − Σ r_i ln r_i − Σ c_j ln c_j) / N` (nats),
//! and one trial changes one cell, one row and one column, so each sum moves by O(1) terms
//! instead of a pass over S² cells per unit per trial.

/// `x ln x` with 0 ln 0 = 0.
fn xlnx(x: u64) -> f64 {
    if x == 0 {
        0.0
    } else {
        let f = x as f64;
        f * f.ln()
    }
}

/// Per-unit confusion matrices.
#[derive(Clone, Debug)]
pub struct UnitTally {
    units: Vec<u32>,
    n_stim: usize,
    conf: Vec<u64>,
    rows: Vec<u64>,
    cols: Vec<u64>,
    /// Per unit: Σ c ln c over cells, rows, columns, and the nonzero cells, rows, columns.
    sums: Vec<[f64; 3]>,
    nonzero: Vec<[u32; 3]>,
    correct: Vec<u64>,
    n_trials: u64,
    /// Per (unit, presented stimulus): labelled trials, Σ window count, Σ count².
    count_sums: Vec<(u64, f64, f64)>,
}

impl UnitTally {
    /// An empty tally for these units and `n_stim` stimuli.
    pub fn new(units: &[u32], n_stim: usize) -> Self {
        UnitTally {
            units: units.to_vec(),
            n_stim,
            conf: vec![0; units.len() * n_stim * n_stim],
            rows: vec![0; units.len() * n_stim],
            cols: vec![0; units.len() * n_stim],
            sums: vec![[0.0; 3]; units.len()],
            nonzero: vec![[0; 3]; units.len()],
            correct: vec![0; units.len()],
            n_trials: 0,
            count_sums: vec![(0, 0.0, 0.0); units.len() * n_stim],
        }
    }
    /// Unit ids.
    pub fn units(&self) -> &[u32] {
        &self.units
    }
    /// Number of stimuli.
    pub fn n_stimuli(&self) -> usize {
        self.n_stim
    }
    /// Records unit index `u`'s decoded stimulus for a trial with `presented`.
    pub fn record(&mut self, u: usize, presented: u32, decoded: u32) {
        let s = self.n_stim;
        let (p, d) = (presented as usize, decoded as usize);
        let slots = [
            &mut self.conf[u * s * s + p * s + d],
            &mut self.rows[u * s + p],
            &mut self.cols[u * s + d],
        ];
        for (j, slot) in slots.into_iter().enumerate() {
            let old = *slot;
            *slot += 1;
            self.sums[u][j] += xlnx(old + 1) - xlnx(old);
            if old == 0 {
                self.nonzero[u][j] += 1;
            }
        }
        if presented == decoded {
            self.correct[u] += 1;
        }
    }
    /// Records unit index `u`'s window count in a trial with `presented` (its tuning).
    pub fn record_count(&mut self, u: usize, presented: u32, count: u32) {
        if let Some(c) = self
            .count_sums
            .get_mut(u * self.n_stim + presented as usize)
        {
            let k = count as f64;
            c.0 += 1;
            c.1 += k;
            c.2 += k * k;
        }
    }
    /// Unit index `u`'s count sums per presented stimulus: (trials, Σ count, Σ count²).
    pub fn count_sums(&self, u: usize) -> &[(u64, f64, f64)] {
        &self.count_sums[u * self.n_stim..(u + 1) * self.n_stim]
    }
    /// Marks the end of one labelled trial (after every unit was recorded).
    pub fn end_trial(&mut self) {
        self.n_trials += 1;
    }
    /// Labelled trials so far.
    pub fn n_trials(&self) -> u64 {
        self.n_trials
    }
    /// Running accuracy of unit index `u` (0 before any trial).
    pub fn accuracy(&self, u: usize) -> f64 {
        if self.n_trials == 0 {
            0.0
        } else {
            self.correct[u] as f64 / self.n_trials as f64
        }
    }
    /// Confusion matrix of unit index `u`, row = presented, column = decoded.
    pub fn confusion(&self, u: usize) -> &[u64] {
        let s = self.n_stim;
        &self.conf[u * s * s..(u + 1) * s * s]
    }
    /// Mutual information (bits) of unit index `u`'s confusion matrix: the estimate of
    /// [`crate::information::bias_corrected`] (plug-in less its positive first-order bias, in
    /// [0, H(presented)]), kept incrementally.
    pub fn info_bits(&self, u: usize) -> f64 {
        let n: u64 = self.rows[u * self.n_stim..(u + 1) * self.n_stim]
            .iter()
            .sum();
        if n == 0 {
            return 0.0;
        }
        let nf = n as f64;
        let [cells, rows, cols] = self.sums[u];
        let plug_in = ((nf.ln() + (cells - rows - cols) / nf) / std::f64::consts::LN_2).max(0.0);
        let [jz, rz, cz] = self.nonzero[u].map(|x| x as f64);
        let bias = ((jz - 1.0) - (rz - 1.0) - (cz - 1.0)) / (2.0 * nf * std::f64::consts::LN_2);
        let h_presented = ((nf.ln() - rows / nf) / std::f64::consts::LN_2).max(0.0);
        crate::information::bias_corrected(plug_in, bias, h_presented)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::information::information;

    #[test]
    fn incremental_information_equals_the_direct_formula() {
        let mut t = UnitTally::new(&[7, 8], 5);
        let mut x = 17u64;
        for _ in 0..300 {
            x = x
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            let p = ((x >> 33) % 5) as u32;
            let d = if (x >> 20).is_multiple_of(3) {
                p
            } else {
                ((x >> 40) % 5) as u32
            };
            t.record(0, p, d);
            t.record(1, p, (p + 1) % 5);
            t.end_trial();
            for u in 0..2 {
                let c = t.confusion(u);
                let direct = information(c, 5).bits;
                assert!(
                    (t.info_bits(u) - direct).abs() < 1e-9,
                    "{} vs {direct}",
                    t.info_bits(u)
                );
            }
        }
    }
}
