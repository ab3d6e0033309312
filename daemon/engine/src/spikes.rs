//! A dataset's spikes, sorted by (tick, unit), held in 8 bytes per spike where it can be.
//!
//! Each spike is one `u64`: its tick minus the earliest tick, shifted left by just enough bits
//! to hold the position of its unit in the table's sorted list of unit ids, plus that position.
//! Sorting these keys sorts by (tick, unit). When the ticks span more than the bits left (at
//! one tick per microsecond and 65 536 units: 4.4 years), the table holds plain (tick, unit)
//! pairs instead (16 bytes per spike); both behave the same. A table is shared, not copied,
//! when cloned (a training fold and a held-out fold read the same spikes).
//!
//! Must not: change the order, drop or merge duplicates, or expose which form it holds.

use std::sync::Arc;

/// Spikes (tick, unit), sorted; cheap to clone.
#[derive(Clone, Default)]
pub struct SpikeTable(Arc<Repr>);

#[derive(Clone)]
enum Repr {
    Packed(Packed),
    Wide(Vec<(i64, u32)>),
}

impl Default for Repr {
    fn default() -> Self {
        Repr::Wide(Vec::new())
    }
}

#[derive(Clone)]
struct Packed {
    base: i64,
    shift: u32,
    ids: Vec<u32>,
    keys: Vec<u64>,
}

impl Packed {
    #[inline]
    fn decode(&self, k: u64) -> (i64, u32) {
        decode(self.base, self.shift, &self.ids, k)
    }
}

#[inline]
fn decode(base: i64, shift: u32, ids: &[u32], k: u64) -> (i64, u32) {
    let mask = (1u64 << shift) - 1;
    (base + (k >> shift) as i64, ids[(k & mask) as usize])
}

/// Bits that hold a position among `n` units (at least 1, so the mask is never empty).
fn unit_bits(n: usize) -> u32 {
    (usize::BITS - n.saturating_sub(1).leading_zeros()).max(1)
}

/// The key of `tick` for unit position `pos`, or None when the tick does not fit.
#[inline]
fn key(base: i64, shift: u32, tick: i64, pos: usize) -> Option<u64> {
    let off = tick.checked_sub(base)?;
    if off < 0 || (off as u64) >> (64 - shift) != 0 {
        return None;
    }
    Some(((off as u64) << shift) | pos as u64)
}

impl SpikeTable {
    /// The table of these spikes, in any order (sorted here).
    pub fn new(mut spikes: Vec<(i64, u32)>) -> SpikeTable {
        let mut ids: Vec<u32> = spikes
            .iter()
            .map(|s| s.1)
            .collect::<std::collections::HashSet<u32>>()
            .into_iter()
            .collect();
        ids.sort_unstable();
        let base = spikes.iter().map(|s| s.0).min().unwrap_or(0);
        let shift = unit_bits(ids.len());
        let keys: Option<Vec<u64>> = spikes
            .iter()
            .map(|&(t, u)| key(base, shift, t, ids.binary_search(&u).ok()?))
            .collect();
        match keys {
            Some(mut keys) if !ids.is_empty() => {
                drop(spikes);
                keys.sort_unstable();
                SpikeTable(Arc::new(Repr::Packed(Packed {
                    base,
                    shift,
                    ids,
                    keys,
                })))
            }
            _ => {
                spikes.sort_unstable();
                SpikeTable(Arc::new(Repr::Wide(spikes)))
            }
        }
    }

    /// Number of spikes.
    pub fn len(&self) -> usize {
        match &*self.0 {
            Repr::Packed(p) => p.keys.len(),
            Repr::Wide(v) => v.len(),
        }
    }

    /// True when there are no spikes.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The `i`-th spike (tick, unit), if there is one.
    #[inline]
    pub fn get(&self, i: usize) -> Option<(i64, u32)> {
        match &*self.0 {
            Repr::Packed(p) => p.keys.get(i).map(|&k| p.decode(k)),
            Repr::Wide(v) => v.get(i).copied(),
        }
    }

    /// The tick of the `i`-th spike. Panics when `i` is out of range.
    #[inline]
    pub fn tick(&self, i: usize) -> i64 {
        match &*self.0 {
            Repr::Packed(p) => p.base + (p.keys[i] >> p.shift) as i64,
            Repr::Wide(v) => v[i].0,
        }
    }

    /// The first spike.
    pub fn first(&self) -> Option<(i64, u32)> {
        self.get(0)
    }

    /// The last spike.
    pub fn last(&self) -> Option<(i64, u32)> {
        self.len().checked_sub(1).and_then(|i| self.get(i))
    }

    /// The index of the first spike at or after `tick` (`len()` when none is).
    pub fn first_at_or_after(&self, tick: i64) -> usize {
        match &*self.0 {
            Repr::Packed(p) => {
                if tick <= p.base {
                    return 0;
                }
                let off = (tick - p.base) as u64;
                if off.leading_zeros() < p.shift {
                    return p.keys.len();
                }
                let k = off << p.shift;
                p.keys.partition_point(|&x| x < k)
            }
            Repr::Wide(v) => v.partition_point(|s| s.0 < tick),
        }
    }

    /// The index range of the spikes with ticks in [from, to).
    pub fn between(&self, from: i64, to: i64) -> std::ops::Range<usize> {
        let a = self.first_at_or_after(from);
        a..self.first_at_or_after(to).max(a)
    }

    /// The spikes in order.
    pub fn iter(&self) -> Iter<'_> {
        self.range(0..self.len())
    }

    /// The spikes at indices `r`, in order. Panics when `r` is out of range.
    pub fn range(&self, r: std::ops::Range<usize>) -> Iter<'_> {
        match &*self.0 {
            Repr::Packed(p) => Iter::Packed {
                keys: p.keys[r].iter(),
                base: p.base,
                shift: p.shift,
                ids: &p.ids,
            },
            Repr::Wide(v) => Iter::Wide(v[r].iter()),
        }
    }

    /// The spikes as (tick, unit) pairs.
    pub fn to_vec(&self) -> Vec<(i64, u32)> {
        self.iter().collect()
    }

    /// Keeps only the spikes for which `keep` is true (order kept).
    pub fn retain(&mut self, mut keep: impl FnMut(i64, u32) -> bool) {
        match Arc::make_mut(&mut self.0) {
            Repr::Packed(p) => {
                let (base, shift) = (p.base, p.shift);
                let ids = std::mem::take(&mut p.ids);
                p.keys.retain(|&k| {
                    let (t, u) = decode(base, shift, &ids, k);
                    keep(t, u)
                });
                p.ids = ids;
            }
            Repr::Wide(v) => v.retain(|&(t, u)| keep(t, u)),
        }
    }

    /// Bytes the spikes take (8 per spike when packed, 16 otherwise).
    pub fn bytes(&self) -> usize {
        match &*self.0 {
            Repr::Packed(p) => p.keys.len() * 8 + p.ids.len() * 4,
            Repr::Wide(v) => v.len() * 16,
        }
    }
}

impl From<Vec<(i64, u32)>> for SpikeTable {
    fn from(v: Vec<(i64, u32)>) -> Self {
        SpikeTable::new(v)
    }
}

impl FromIterator<(i64, u32)> for SpikeTable {
    fn from_iter<I: IntoIterator<Item = (i64, u32)>>(it: I) -> Self {
        SpikeTable::new(it.into_iter().collect())
    }
}

impl PartialEq for SpikeTable {
    fn eq(&self, other: &Self) -> bool {
        self.len() == other.len() && self.iter().eq(other.iter())
    }
}

impl PartialEq<Vec<(i64, u32)>> for SpikeTable {
    fn eq(&self, other: &Vec<(i64, u32)>) -> bool {
        self.len() == other.len() && self.iter().eq(other.iter().copied())
    }
}

impl std::fmt::Debug for SpikeTable {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_list().entries(self.iter()).finish()
    }
}

/// The spikes of a [`SpikeTable`] (or a range of it), in order, as (tick, unit).
pub enum Iter<'a> {
    #[doc(hidden)]
    Packed {
        keys: std::slice::Iter<'a, u64>,
        base: i64,
        shift: u32,
        ids: &'a [u32],
    },
    #[doc(hidden)]
    Wide(std::slice::Iter<'a, (i64, u32)>),
}

impl Iter<'_> {
    /// The next spike from the front, or from the back.
    #[inline]
    fn step(&mut self, back: bool) -> Option<(i64, u32)> {
        match self {
            Iter::Packed {
                keys,
                base,
                shift,
                ids,
            } => {
                let k = if back { keys.next_back() } else { keys.next() };
                k.map(|&k| decode(*base, *shift, ids, k))
            }
            Iter::Wide(it) => if back { it.next_back() } else { it.next() }.copied(),
        }
    }
}

impl Iterator for Iter<'_> {
    type Item = (i64, u32);
    #[inline]
    fn next(&mut self) -> Option<(i64, u32)> {
        self.step(false)
    }
    fn size_hint(&self) -> (usize, Option<usize>) {
        let n = self.len();
        (n, Some(n))
    }
}

impl ExactSizeIterator for Iter<'_> {
    fn len(&self) -> usize {
        match self {
            Iter::Packed { keys, .. } => keys.len(),
            Iter::Wide(it) => it.len(),
        }
    }
}

impl DoubleEndedIterator for Iter<'_> {
    fn next_back(&mut self) -> Option<(i64, u32)> {
        self.step(true)
    }
}

/// Builds a table from spikes read unit by unit, whose units are known in advance and whose
/// ticks are not below a known floor — without ever holding the spikes twice (8 bytes per
/// spike while reading, plus the sort's own stack).
pub struct SpikeTableBuilder {
    base: i64,
    shift: u32,
    ids: Vec<u32>,
    keys: Vec<u64>,
    /// Set once a spike does not fit a key: from then on pairs.
    wide: Option<Vec<(i64, u32)>>,
}

impl SpikeTableBuilder {
    /// A builder for spikes of the units `ids` (any order; repeats ignored) with ticks at or
    /// above `floor`, room reserved for `capacity` spikes.
    pub fn new(ids: &[u32], floor: i64, capacity: usize) -> SpikeTableBuilder {
        let mut ids = ids.to_vec();
        ids.sort_unstable();
        ids.dedup();
        SpikeTableBuilder {
            base: floor,
            shift: unit_bits(ids.len()),
            ids,
            keys: Vec::with_capacity(capacity),
            wide: None,
        }
    }

    /// The slot of unit `id` (pass it to [`SpikeTableBuilder::push`]), or None for a unit not
    /// given to [`SpikeTableBuilder::new`].
    pub fn slot(&self, id: u32) -> Option<usize> {
        self.ids.binary_search(&id).ok()
    }

    /// Adds one spike of the unit in `slot` (from [`SpikeTableBuilder::slot`]).
    #[inline]
    pub fn push(&mut self, tick: i64, slot: usize) {
        if let Some(w) = &mut self.wide {
            w.push((tick, self.ids[slot]));
            return;
        }
        match key(self.base, self.shift, tick, slot) {
            Some(k) => self.keys.push(k),
            None => {
                let (base, shift, ids) = (self.base, self.shift, &self.ids);
                let mut w: Vec<(i64, u32)> = self
                    .keys
                    .iter()
                    .map(|&k| decode(base, shift, ids, k))
                    .collect();
                self.keys = Vec::new();
                w.push((tick, self.ids[slot]));
                self.wide = Some(w);
            }
        }
    }

    /// Spikes added so far.
    pub fn len(&self) -> usize {
        self.wide.as_ref().map_or(self.keys.len(), |w| w.len())
    }

    /// True when no spike was added.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The sorted table.
    pub fn finish(self) -> SpikeTable {
        match self.wide {
            Some(w) => SpikeTable::new(w),
            None if self.keys.is_empty() => SpikeTable::default(),
            None => {
                let mut keys = self.keys;
                keys.sort_unstable();
                SpikeTable(Arc::new(Repr::Packed(Packed {
                    base: self.base,
                    shift: self.shift,
                    ids: self.ids,
                    keys,
                })))
            }
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    fn is_packed(t: &SpikeTable) -> bool {
        matches!(&*t.0, Repr::Packed(_))
    }

    #[test]
    fn unit_bits_hold_every_position() {
        assert_eq!(unit_bits(0), 1);
        assert_eq!(unit_bits(1), 1);
        assert_eq!(unit_bits(2), 1);
        assert_eq!(unit_bits(3), 2);
        assert_eq!(unit_bits(256), 8);
        assert_eq!(unit_bits(257), 9);
    }

    #[test]
    fn ticks_too_far_apart_for_a_key_are_held_as_pairs() {
        let t = SpikeTable::new(vec![(i64::MAX, 1), (i64::MIN, 2), (0, 1)]);
        assert!(!is_packed(&t));
        assert_eq!(t, vec![(i64::MIN, 2), (0, 1), (i64::MAX, 1)]);
        let t = SpikeTable::new(vec![(5, 1), (-3, 2)]);
        assert!(is_packed(&t));
        assert_eq!(t.bytes(), 2 * 8 + 2 * 4);
    }

    /// Pairs that sometimes need the wide form: ticks near either end of i64 now and then.
    fn pairs() -> impl Strategy<Value = Vec<(i64, u32)>> {
        let tick = prop_oneof![
            8 => -50i64..50,
            1 => any::<i64>(),
        ];
        prop::collection::vec((tick, 0u32..6), 0..60)
    }

    proptest! {
        /// The table is the sorted list of pairs, whatever form it takes: items, order,
        /// positions, ranges by tick, retain and the builder all agree with a sorted Vec.
        #[test]
        fn the_table_is_the_sorted_pairs(v in pairs(), probe in -60i64..60, cut in 0u32..6) {
            let mut want = v.clone();
            want.sort_unstable();
            let t = SpikeTable::new(v.clone());
            prop_assert_eq!(t.len(), want.len());
            prop_assert!(t == want);
            prop_assert_eq!(t.first(), want.first().copied());
            prop_assert_eq!(t.last(), want.last().copied());
            for (i, &s) in want.iter().enumerate() {
                prop_assert_eq!(t.get(i), Some(s));
                prop_assert_eq!(t.tick(i), s.0);
            }
            prop_assert_eq!(t.get(want.len()), None);
            for x in [probe, i64::MIN, i64::MAX, 0] {
                prop_assert_eq!(t.first_at_or_after(x), want.partition_point(|s| s.0 < x));
            }
            let r = t.between(probe, probe + 7);
            let w: Vec<_> = want.iter().copied().filter(|s| s.0 >= probe && s.0 < probe + 7).collect();
            prop_assert_eq!(t.range(r).collect::<Vec<_>>(), w);
            prop_assert_eq!(t.iter().rev().collect::<Vec<_>>(), want.iter().rev().copied().collect::<Vec<_>>());
            let mut kept = t.clone();
            kept.retain(|_, u| u != cut);
            let w: Vec<_> = want.iter().copied().filter(|s| s.1 != cut).collect();
            prop_assert!(kept == w);
            prop_assert!(t == want, "retain on a clone leaves the original");

            let ids: Vec<u32> = (0..6).collect();
            let mut b = SpikeTableBuilder::new(&ids, -50, 0);
            for &(tick, u) in &v {
                let s = b.slot(u).unwrap();
                b.push(tick, s);
            }
            prop_assert_eq!(b.len(), v.len());
            let built = b.finish();
            prop_assert!(built == want);
        }
    }
}
