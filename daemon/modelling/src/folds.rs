//! Cross-validation folds: which held-out fold each labelled trial belongs to. One rule for
//! validation, calibration and the learner, so every held-out record is cut the same way.
//!
//! Must not: depend on anything but the trials' labels and the seed.

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

/// Assigns each trial a fold in `0..k`, stratified by stimulus: the trials of each stimulus are
/// shuffled (seeded) and dealt round-robin, so every fold holds each stimulus as evenly as
/// possible. `labels[i]` is trial i's stimulus index.
pub fn stratified_folds(labels: &[usize], n_stimuli: usize, k: usize, seed: u64) -> Vec<usize> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut fold = vec![0usize; labels.len()];
    let mut next = 0usize;
    for s in 0..n_stimuli {
        let mut idx: Vec<usize> = (0..labels.len()).filter(|&i| labels[i] == s).collect();
        idx.shuffle(&mut rng);
        for i in idx {
            // Continue dealing where the previous stimulus stopped, so fold sizes stay level.
            fold[i] = next % k.max(1);
            next += 1;
        }
    }
    fold
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn folds_are_stratified_and_balanced() {
        let labels: Vec<usize> = (0..40).map(|i| i % 4).collect();
        let f = stratified_folds(&labels, 4, 5, 1);
        for fold in 0..5 {
            for s in 0..4 {
                let n = (0..40).filter(|&i| f[i] == fold && labels[i] == s).count();
                assert_eq!(n, 2, "fold {fold} stimulus {s}");
            }
        }
        assert_eq!(f, stratified_folds(&labels, 4, 5, 1), "seeded");
    }
}
