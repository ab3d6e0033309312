//! Trial windows cut out of a dataset: every unit's spike times (in bins from onset) in every
//! trial's window — the sufficient statistics a fit reads. Kept sparse: only the (unit, trial)
//! pairs with spikes hold anything; silence is the default, so memory grows with the spikes in
//! the windows, not with units × trials.
//!
//! Must not: do I/O; the dataset comes from the caller.

use auspex_engine::data::Dataset;

/// A ragged table stored sparsely: rows are numbered, only rows with items are kept, rows
/// without are empty slices. Rows are added in increasing order. Costs 12 bytes per non-empty
/// row plus the items, whatever the number of empty rows.
#[derive(Clone, Debug, PartialEq)]
pub struct Ragged<T> {
    /// The numbers of the non-empty rows, increasing.
    rows: Vec<u32>,
    /// `ends[k]`: one past row `rows[k]`'s last item in `items`.
    ends: Vec<u64>,
    items: Vec<T>,
}

impl<T> Default for Ragged<T> {
    fn default() -> Self {
        Ragged {
            rows: Vec::new(),
            ends: Vec::new(),
            items: Vec::new(),
        }
    }
}

impl<T: Copy> Ragged<T> {
    /// Appends `x` to row `row`, which must be the last row added or a later one.
    pub fn push(&mut self, row: usize, x: T) {
        let row = u32::try_from(row).expect("a ragged table's row fits 32 bits");
        match self.rows.last() {
            Some(&r) if r == row => {}
            Some(&r) => {
                assert!(r < row, "rows are added in increasing order");
                self.rows.push(row);
                self.ends.push(self.items.len() as u64);
            }
            None => {
                self.rows.push(row);
                self.ends.push(0);
            }
        }
        self.items.push(x);
        *self.ends.last_mut().expect("a row was just made") += 1;
    }

    /// Appends the items of row `row` (a later row than any added; nothing when empty).
    pub fn push_row(&mut self, row: usize, xs: &[T]) {
        for &x in xs {
            self.push(row, x);
        }
    }

    /// Row `row`'s items (empty for a row never added).
    pub fn row(&self, row: usize) -> &[T] {
        let Ok(row) = u32::try_from(row) else {
            return &[];
        };
        match self.rows.binary_search(&row) {
            Ok(k) => {
                let a = if k == 0 { 0 } else { self.ends[k - 1] as usize };
                &self.items[a..self.ends[k] as usize]
            }
            Err(_) => &[],
        }
    }

    /// Every non-empty row, in increasing order, with its items.
    pub fn nonempty(&self) -> impl Iterator<Item = (usize, &[T])> + '_ {
        self.rows.iter().enumerate().map(move |(k, &r)| {
            let a = if k == 0 { 0 } else { self.ends[k - 1] as usize };
            (r as usize, &self.items[a..self.ends[k] as usize])
        })
    }

    /// Every item, row by row.
    pub fn items(&self) -> &[T] {
        &self.items
    }

    /// How many rows are non-empty.
    pub fn n_nonempty(&self) -> usize {
        self.rows.len()
    }

    /// Maps every item, keeping the rows.
    pub fn map<U>(&self, f: impl FnMut(&T) -> U) -> Ragged<U> {
        Ragged {
            rows: self.rows.clone(),
            ends: self.ends.clone(),
            items: self.items.iter().map(f).collect(),
        }
    }
}

/// Per-unit spike times in every trial's window (see [`windows`]): `units[u]`'s row `i` holds
/// unit `u`'s spike times in trial `i`, in bins from onset.
#[derive(Clone, Debug, Default)]
pub struct UnitWindows {
    /// How many trials (rows) there are.
    pub n_trials: usize,
    /// Per unit, its spike times by trial.
    pub units: Vec<Ragged<f64>>,
}

impl UnitWindows {
    /// Unit `u`'s spike count in trial `i`'s window.
    pub fn count(&self, u: usize, i: usize) -> u32 {
        self.units[u].row(i).len() as u32
    }

    /// Unit `u`'s spike times in trial `i`'s window, in bins from onset.
    pub fn times(&self, u: usize, i: usize) -> &[f64] {
        self.units[u].row(i)
    }
}

/// Checks, before anything is built, that fitting `units` units on `trials` trials of
/// `stimuli` stimuli with `n_bins` bins, from `spikes` spikes, fits the memory budget: a count
/// per unit and trial in the cells' inputs, each spike's time in the windows and again in the
/// cells (at most 24 bytes with its row's share), the cells' timing tables, and the model's
/// tables for decoding.
pub fn check_fit_size(
    units: usize,
    trials: usize,
    stimuli: usize,
    n_bins: usize,
    spikes: usize,
) -> Result<(), auspex_engine::budget::OverBudget> {
    use auspex_engine::budget::{check, product};
    let (u, t, s, b) = (
        units as u128,
        trials as u128,
        stimuli as u128,
        n_bins as u128,
    );
    let windows = product(&[u, t, 4]) + 2 * product(&[spikes as u128, 8 + 12]);
    let cells = product(&[u, s, b, 8 * 2]);
    let model = auspex_engine::model::decoding_bytes(units, stimuli, n_bins);
    check(
        "fitting",
        || format!("{units} units × {trials} trials, {stimuli} stimuli × {n_bins} bins"),
        windows + cells + model,
    )
}

/// For every unit in `units` (index order) and every trial: the window's spike times in bin
/// units from onset. One pass over the trial windows.
pub fn windows(data: &Dataset, units: &[u32], bin_ticks: i64, n_bins: usize) -> UnitWindows {
    let index: std::collections::HashMap<u32, usize> =
        units.iter().enumerate().map(|(i, &u)| (u, i)).collect();
    let mut out = vec![Ragged::default(); units.len()];
    let window = bin_ticks * n_bins as i64;
    for (i, t) in data.trials.iter().enumerate() {
        let r = data.spikes.between(t.onset, t.onset.saturating_add(window));
        for (tick, unit) in data.spikes.range(r) {
            if let Some(&u) = index.get(&unit) {
                out[u].push(i, (tick - t.onset) as f64 / bin_ticks as f64);
            }
        }
    }
    UnitWindows {
        n_trials: data.trials.len(),
        units: out,
    }
}

/// How many (spike, trial) pairs the trial windows of `window_ticks` hold (a spike in two
/// overlapping windows counts twice): what [`windows`] will store, found without storing it.
pub fn spikes_in_windows(data: &Dataset, window_ticks: i64) -> usize {
    data.trials
        .iter()
        .map(|t| {
            data.spikes
                .between(t.onset, t.onset.saturating_add(window_ticks))
                .len()
        })
        .sum()
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    proptest! {
        /// The sparse table holds exactly what a dense one (a list per row) holds: every row's
        /// items in order, empty rows empty, the non-empty rows listed in order, every item
        /// once — whatever mix of empty and full rows was added.
        #[test]
        fn ragged_equals_the_dense_table(dense in prop::collection::vec(
            prop::collection::vec(-1e3f64..1e3, 0..4), 0..40)) {
            let mut r = Ragged::default();
            for (i, row) in dense.iter().enumerate() {
                if i % 3 == 0 {
                    r.push_row(i, row);
                } else {
                    for &x in row {
                        r.push(i, x);
                    }
                }
            }
            for (i, row) in dense.iter().enumerate() {
                prop_assert_eq!(r.row(i), &row[..]);
            }
            prop_assert!(r.row(dense.len() + 5).is_empty());
            let listed: Vec<(usize, Vec<f64>)> =
                r.nonempty().map(|(i, xs)| (i, xs.to_vec())).collect();
            let want: Vec<(usize, Vec<f64>)> = dense
                .iter()
                .enumerate()
                .filter(|(_, row)| !row.is_empty())
                .map(|(i, row)| (i, row.clone()))
                .collect();
            prop_assert_eq!(&listed, &want);
            prop_assert_eq!(r.n_nonempty(), want.len());
            let flat: Vec<f64> = dense.iter().flatten().copied().collect();
            prop_assert_eq!(r.items(), &flat[..]);
            let doubled = r.map(|x| x * 2.0);
            for (i, row) in dense.iter().enumerate() {
                let want: Vec<f64> = row.iter().map(|x| x * 2.0).collect();
                prop_assert_eq!(doubled.row(i), &want[..]);
            }
        }
    }

    #[test]
    #[should_panic(expected = "increasing order")]
    fn rows_out_of_order_are_a_programming_error() {
        let mut r = Ragged::default();
        r.push(3, 1.0);
        r.push(2, 1.0);
    }

    /// A window table for many units and trials with few spikes costs what the spikes cost:
    /// 12 500 units × 12 500 trials with one spike per unit (the case that once asked for
    /// 4.4 GB of per-pair lists) stores 12 500 times and 12 500 rows.
    #[test]
    fn windows_of_sparse_data_grow_with_the_spikes() {
        use auspex_engine::data::Trial;
        let n = 12_500usize;
        let trials: Vec<Trial> = (0..n)
            .map(|i| Trial {
                id: i as u64,
                onset: i as i64 * 1000,
                stimulus: Some(format!("s{}", i % 2)),
            })
            .collect();
        let spikes: Vec<(i64, u32)> = (0..n).map(|u| (u as i64 * 1000 + 7, u as u32)).collect();
        let data = Dataset {
            tick_rate_hz: 10_000.0,
            trials,
            spikes: spikes.into(),
            units: (0..n as u32).collect(),
            ..Default::default()
        };
        assert_eq!(spikes_in_windows(&data, 500), n);
        let w = windows(&data, &data.units, 10, 50);
        assert_eq!(w.n_trials, n);
        let stored: usize = w.units.iter().map(|r| r.items().len()).sum();
        let rows: usize = w.units.iter().map(|r| r.n_nonempty()).sum();
        assert_eq!((stored, rows), (n, n));
        assert_eq!(w.count(17, 17), 1);
        assert_eq!(w.times(17, 17), &[0.7]);
        assert_eq!(w.count(17, 18), 0);
    }

    /// The size check counts what the sparse windows store: 12 500 units × 12 500 trials with
    /// one spike per unit (refused while windows were dense: 28 bytes per pair, twice) fits the
    /// default budget; 25 000 × 25 000 does not (a count per pair: 2.5 GB).
    #[test]
    fn the_size_check_follows_the_sparse_windows() {
        assert_eq!(
            auspex_engine::budget::bytes(),
            auspex_engine::budget::DEFAULT_MB << 20,
            "the test assumes the default budget"
        );
        assert!(check_fit_size(12_500, 12_500, 2, 250, 12_500).is_ok());
        let e = check_fit_size(25_000, 25_000, 2, 250, 25_000).unwrap_err();
        assert!(e.to_string().contains("25000 units × 25000 trials"), "{e}");
    }
}
