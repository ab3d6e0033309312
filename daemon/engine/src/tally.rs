//! Running per-unit single-unit decoding tallies over a session: a confusion matrix per unit
//! (presented × decoded at the window end), from which accuracy and mutual information follow.
//! Sized once per model; recording a trial never allocates.

use crate::stats::{mutual_info_bias_bits, mutual_info_bits};

/// Per-unit confusion matrices.
#[derive(Clone, Debug)]
pub struct UnitTally {
    units: Vec<u32>,
    n_stim: usize,
    conf: Vec<u64>,
    correct: Vec<u64>,
    n_trials: u64,
}

impl UnitTally {
    /// An empty tally for these units and `n_stim` stimuli.
    pub fn new(units: &[u32], n_stim: usize) -> Self {
        UnitTally {
            units: units.to_vec(),
            n_stim,
            conf: vec![0; units.len() * n_stim * n_stim],
            correct: vec![0; units.len()],
            n_trials: 0,
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
        self.conf[u * s * s + presented as usize * s + decoded as usize] += 1;
        if presented == decoded {
            self.correct[u] += 1;
        }
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
    /// Mutual information (bits) of unit index `u`'s confusion matrix, with the
    /// Panzeri–Treves / Miller–Madow first-order bias subtracted (floored at 0): the plug-in
    /// estimate alone is strongly inflated over the few trials of a live session.
    pub fn info_bits(&self, u: usize) -> f64 {
        let c = self.confusion(u);
        (mutual_info_bits(c, self.n_stim) - mutual_info_bias_bits(c, self.n_stim)).max(0.0)
    }
}
