//! Cross-validation folds: which held-out fold each labelled trial belongs to. One rule for
//! validation, calibration and the learner, so every held-out record is cut the same way.
//!
//! Must not: depend on anything but the trials' labels and the seed.

use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

/// Assigns each trial a fold in `0..k`, stratified by stimulus: the trials of each stimulus are
/// shuffled (seeded) and dealt round-robin, so every fold holds each stimulus as evenly as
/// possible. `labels[i]` is trial i's stimulus index and `when[i]` its (onset tick, trial id).
///
/// The assignment depends only on the trials themselves — which stimulus each one showed and
/// when — never on how they are listed or named: trials are taken in (onset, id) order and the
/// stimuli in the order they first appear in it, so a display order (`--stimulus-order`),
/// renamed stimuli, reordered table rows, or a learner that stored its trials as their labels
/// arrived all give the same folds.
pub fn stratified_folds(
    labels: &[usize],
    when: &[(i64, u64)],
    n_stimuli: usize,
    k: usize,
    seed: u64,
) -> Vec<usize> {
    debug_assert_eq!(labels.len(), when.len());
    let (by_time, first_seen) = time_order(labels, when, n_stimuli);
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let mut fold = vec![0usize; labels.len()];
    let mut next = 0usize;
    for s in first_seen {
        let mut idx: Vec<usize> = by_time
            .iter()
            .copied()
            .filter(|&i| labels[i] == s)
            .collect();
        idx.shuffle(&mut rng);
        for i in idx {
            // Continue dealing where the previous stimulus stopped, so fold sizes stay level.
            fold[i] = next % k.max(1);
            next += 1;
        }
    }
    fold
}

/// The trials in (onset, id) order, and the stimuli in the order they first appear in it: the
/// order every seeded draw over trials or stimuli follows, so that no draw depends on how the
/// trials are listed or the stimuli named.
pub fn time_order(
    labels: &[usize],
    when: &[(i64, u64)],
    n_stimuli: usize,
) -> (Vec<usize>, Vec<usize>) {
    let mut by_time: Vec<usize> = (0..labels.len()).collect();
    by_time.sort_by_key(|&i| (when.get(i).copied().unwrap_or((0, 0)), i));
    let mut first_seen: Vec<usize> = Vec::with_capacity(n_stimuli);
    let mut seen = vec![false; n_stimuli];
    for &i in &by_time {
        let s = labels[i];
        if s < n_stimuli && !seen[s] {
            seen[s] = true;
            first_seen.push(s);
        }
    }
    (by_time, first_seen)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn folds_are_stratified_and_balanced() {
        let labels: Vec<usize> = (0..40).map(|i| i % 4).collect();
        let when: Vec<(i64, u64)> = (0..40).map(|i| (i as i64 * 10, i as u64)).collect();
        let f = stratified_folds(&labels, &when, 4, 5, 1);
        for fold in 0..5 {
            for s in 0..4 {
                let n = (0..40).filter(|&i| f[i] == fold && labels[i] == s).count();
                assert_eq!(n, 2, "fold {fold} stimulus {s}");
            }
        }
        assert_eq!(f, stratified_folds(&labels, &when, 4, 5, 1), "seeded");
    }
}

#[cfg(test)]
mod properties {
    use super::*;
    use proptest::prelude::*;

    proptest! {
        /// Renaming the stimuli (a permutation of their indices) and listing the trials in any
        /// order give every trial the same fold.
        #[test]
        fn folds_do_not_depend_on_listing_or_naming(
            raw in proptest::collection::vec(0usize..5, 4..60),
            rename_seed in any::<u64>(),
            row_seed in any::<u64>(),
            k in 2usize..6,
            seed in any::<u64>(),
        ) {
            let n = raw.len();
            let when: Vec<(i64, u64)> = (0..n).map(|i| (i as i64 * 7 - (i % 3) as i64, i as u64)).collect();
            let base = stratified_folds(&raw, &when, 5, k, seed);
            let mut rng = ChaCha8Rng::seed_from_u64(rename_seed);
            let mut names: Vec<usize> = (0..5).collect();
            names.shuffle(&mut rng);
            let mut rows: Vec<usize> = (0..n).collect();
            let mut rng = ChaCha8Rng::seed_from_u64(row_seed);
            rows.shuffle(&mut rng);
            let labels2: Vec<usize> = rows.iter().map(|&r| names[raw[r]]).collect();
            let when2: Vec<(i64, u64)> = rows.iter().map(|&r| when[r]).collect();
            let other = stratified_folds(&labels2, &when2, 5, k, seed);
            for (j, &r) in rows.iter().enumerate() {
                prop_assert_eq!(other[j], base[r]);
            }
        }
    }
}
