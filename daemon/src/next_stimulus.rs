//! The next-stimulus policies answered through control: balanced blocks (seeded) and
//! least-certain (the stimulus decoded worst so far, with 10% exploration).
//!
//! Must not: read clocks or the engine; it sees only decided trials.

/// The next-stimulus policies.
pub struct StimulusChooser {
    rng: u64,
    block: Vec<u32>,
    decided: Vec<u64>,
    correct: Vec<u64>,
}

impl StimulusChooser {
    /// A chooser for `n` stimuli, seeded.
    pub fn new(seed: u64, n: usize) -> Self {
        StimulusChooser {
            rng: seed ^ 0x9E37_79B9_7F4A_7C15,
            block: Vec::new(),
            decided: vec![0; n],
            correct: vec![0; n],
        }
    }
    fn next_u64(&mut self) -> u64 {
        self.rng = self.rng.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.rng;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }
    /// Follows a change of the stimulus count (a reloaded or learned model).
    pub fn resize(&mut self, n: usize) {
        if self.decided.len() != n {
            self.decided = vec![0; n];
            self.correct = vec![0; n];
            self.block.clear();
        }
    }
    /// Balanced blocks: every stimulus once per block, in a seeded random order.
    pub fn balanced(&mut self, n: usize) -> u32 {
        if self.block.is_empty() {
            self.block = (0..n as u32).collect();
            for i in (1..n).rev() {
                let j = (self.next_u64() % (i as u64 + 1)) as usize;
                self.block.swap(i, j);
            }
        }
        self.block.pop().unwrap_or(0)
    }
    /// The stimulus with the lowest running decoding accuracy (untried first), exploring a
    /// random one 10% of the time.
    pub fn least_certain(&mut self, n: usize) -> u32 {
        if self.next_u64().is_multiple_of(10) {
            return (self.next_u64() % n as u64) as u32;
        }
        let acc = |i: usize| {
            if self.decided[i] == 0 {
                -1.0
            } else {
                self.correct[i] as f64 / self.decided[i] as f64
            }
        };
        (0..n)
            .min_by(|&a, &b| acc(a).total_cmp(&acc(b)))
            .unwrap_or(0) as u32
    }
    /// Records a decided trial.
    pub fn record(&mut self, presented: u32, decided: u32) {
        if let Some(d) = self.decided.get_mut(presented as usize) {
            *d += 1;
            if presented == decided {
                self.correct[presented as usize] += 1;
            }
        }
    }
}
