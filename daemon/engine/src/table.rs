//! The count term of table-family cells (COM-Poisson, empirical), which have no closed form:
//! `ln Φ^(k)(S(b)) = ln Σ_{n≥k} P(n)·n!/(n−k)!·S(b)^(n−k)`. Owns what is precomputed once per
//! model for them and the per-bin work on the engine's summed path:
//!
//! * units that have not spiked (k = 0) cost nothing per bin: their `ln Φ^(0)(S(b))` is summed
//!   over units per (bin, stimulus) once, like the closed-form families' silence terms;
//! * a unit that has spiked adds `ln Φ^(k)(S(b)) − ln Φ^(0)(S(b))`: one contiguous row of a
//!   per-model lookup `[b][k][unit][s]` for the counts k ≤ K the memory budget allows (all of
//!   them for small models; the low counts, where realistic firing spends most of a window, for
//!   large ones), otherwise evaluated exactly by Horner's rule on `Σ_m W(k+m)·z^m/m!` with
//!   `W(n) = P(n)·n!` (scaled by a power of two per unit so long tables stay in range, the scale
//!   carried exactly in the exponent), all stimuli side by side (independent chains, so the
//!   loop is bound by arithmetic throughput, not by latency), and multiplied into a
//!   per-stimulus product whose binary exponent is carried separately, so a bin takes one
//!   logarithm per stimulus instead of one per cell.
//!
//! Must not: allocate per bin, or use fused multiply-add (results must not depend on the CPU:
//! the AVX2 variant performs the same IEEE operations in the same order as the baseline one).

use crate::model::{CellKernel, Model};
use crate::special::ln_factorial_table;
use std::f64::consts::LN_2;

/// Longest count table evaluated by the product form. With `c = 2^j ≈ N/e` for a table of N
/// entries, the scaled coefficients `W(n)/c^n` stay below about `P(n)·√(2πn)` (Stirling) and
/// every partial Horner sum below `Φ^(n)(z)/c^n ≤ (N/c)^n = e^n`, finite for n ≤ 600.
pub const FAST_MAX_COUNT: usize = 600;

/// Ratios outside this range leave the product form for the logarithmic one, so the product
/// (kept in [1, 2) between units) can never leave the normal floating-point range.
const RATIO_MIN: f64 = 1e-280;
const RATIO_MAX: f64 = 1e280;

/// Per-model precomputation for table-family cells. Built by [`Model::prepare`].
#[derive(Debug, Default)]
pub(crate) struct TablePrep {
    /// Per unit: its slot among units with a table-family cell, or `NO_SLOT`.
    pub(crate) slot: Vec<u32>,
    /// Slot → unit index.
    pub(crate) units: Vec<usize>,
    /// Σ over a block's table-family cells of `ln Φ^(0)(S(b))`, per [b][block][s]
    /// ([`Model::block_bin_row`]).
    pub(crate) sum0: Vec<f64>,
    /// `1/Φ^(0)(S(b))` per [b][slot][s] for table-family cells, 0 for the others.
    inv0: Vec<f64>,
    /// `ln Φ^(0)(S(b))` per [b][slot][s]: what the slow path subtracts (the reciprocal above
    /// under- or overflows for huge-rate cells, whose logarithm stays finite).
    ln0: Vec<f64>,
    /// 1 for a slot's cells of other families (their ratio is taken as 1), 0 for table cells.
    other: Vec<f64>,
    /// 1 for a slot's table cells, 0 for the others (whose ratio carries no scale).
    is_table: Vec<i64>,
    /// `W(n)/2^(j·n)` with `W(n) = P(n)·n!` per slot, rows [n][s], zero past each cell's table.
    w: Vec<f64>,
    /// Per slot: (offset into `w`, rows, shortest table among its cells, j); rows = 0 when a
    /// cell is longer than [`FAST_MAX_COUNT`] (that unit takes the per-cell logarithmic path).
    w_rows: Vec<(usize, usize, usize, i64)>,
    /// 1/m for m = 0..=FAST_MAX_COUNT (index 0 unused).
    inv_int: Vec<f64>,
    /// Precomputed corrections `ln Φ^(k)(S(b)) − ln Φ^(0)(S(b))` for k = 1..=K per slot.
    lookup: Lookup,
    avx2: bool,
}

/// Slot value of a unit without table-family cells.
pub(crate) const NO_SLOT: u32 = u32::MAX;

/// Most count-table terms the lookup may sum while it is built. Cells whose tables are too long
/// for the fast (Horner) form cost a whole-table sum per entry; without this bound a 4 KB model
/// with a couple of huge-rate COM-Poisson cells took minutes to prepare. Counts beyond the cap
/// are evaluated per bin instead (correct, slower), so preparation stays around a second.
pub const PREP_TERMS_MAX: usize = 50_000_000;

/// Rows `[b][k − 1][slot][s]` for k = 1..=K, 0 for cells of other families: one bin's rows lie
/// together, and within them the units at the same count, so a pass over the units in order
/// reads a few forward streams (one per count) rather than one scattered row per unit.
#[derive(Debug, Default)]
struct Lookup {
    /// Counts covered (0: no lookup).
    k: usize,
    values: Vec<f64>,
}

/// Per-stimulus running product of ratios with its binary exponent kept apart; owned by a
/// trial, emptied into the posterior once per bin.
#[derive(Debug, Clone)]
pub(crate) struct ProductAcc {
    prod: Vec<f64>,
    exp: Vec<i64>,
    /// Horner results of one unit.
    scratch: Vec<f64>,
    used: bool,
}

impl ProductAcc {
    pub(crate) fn new(ns: usize) -> Self {
        ProductAcc {
            prod: vec![1.0; ns],
            exp: vec![0; ns],
            scratch: vec![0.0; ns],
            used: false,
        }
    }

    /// Adds `ln Π` to `post` and starts a new product.
    #[inline]
    pub(crate) fn flush_into(&mut self, post: &mut [f64]) {
        if !self.used {
            return;
        }
        for ((p, x), e) in post.iter_mut().zip(&mut self.prod).zip(&mut self.exp) {
            *p += x.ln() + *e as f64 * std::f64::consts::LN_2;
            *x = 1.0;
            *e = 0;
        }
        self.used = false;
    }
}

impl TablePrep {
    /// Builds the precomputation; `lookup_budget` bytes may go to the `ln Φ^(k)(S(b))` lookup.
    pub(crate) fn build(m: &Model, lookup_budget: usize) -> Self {
        let (nu, ns, nb) = (m.n_units(), m.n_stimuli(), m.n_bins());
        let is_table = |i: usize| matches!(m.kernels[i], CellKernel::Table);
        let mut slot = vec![NO_SLOT; nu];
        let mut units = Vec::new();
        for (u, sl) in slot.iter_mut().enumerate() {
            if (0..ns).any(|s| is_table(u * ns + s)) {
                *sl = units.len() as u32;
                units.push(u);
            }
        }
        let mut p = TablePrep {
            slot,
            inv_int: (0..=FAST_MAX_COUNT)
                .map(|m| if m == 0 { 0.0 } else { 1.0 / m as f64 })
                .collect(),
            avx2: detect_avx2(),
            ..TablePrep::default()
        };
        if units.is_empty() {
            p.units = units;
            return p;
        }
        let nt = units.len();
        // W rows per slot.
        for &u in &units {
            let lens: Vec<usize> = (0..ns)
                .filter(|&s| is_table(u * ns + s))
                .map(|s| m.dists[u * ns + s].pmf().len())
                .collect();
            let (longest, shortest) = (
                lens.iter().copied().max().unwrap_or(0),
                lens.iter().copied().min().unwrap_or(0),
            );
            if longest > FAST_MAX_COUNT {
                p.w_rows.push((p.w.len(), 0, shortest, 0));
                continue;
            }
            let j = ((longest as f64 / std::f64::consts::E).log2().round() as i64).max(0);
            let ln_fact = ln_factorial_table(longest);
            let off = p.w.len();
            p.w.resize(off + longest * ns, 0.0);
            for s in (0..ns).filter(|&s| is_table(u * ns + s)) {
                for (n, &pn) in m.dists[u * ns + s].pmf().iter().enumerate() {
                    let ln_w = pn.ln() + ln_fact[n] - (j * n as i64) as f64 * LN_2;
                    p.w[off + n * ns + s] = ln_w.exp();
                }
            }
            p.w_rows.push((off, longest, shortest, j));
        }
        p.other = units
            .iter()
            .flat_map(|&u| (0..ns).map(move |s| (u, s)))
            .map(|(u, s)| if is_table(u * ns + s) { 0.0 } else { 1.0 })
            .collect();
        p.is_table = p.other.iter().map(|&o| (o == 0.0) as i64).collect();
        // Φ^(0)(S(b)) of every table cell: its reciprocal per [b][slot][s], its log summed.
        p.sum0 = vec![0.0; m.n_blocks() * nb * ns];
        p.inv0 = vec![0.0; nb * nt * ns];
        p.ln0 = vec![0.0; nb * nt * ns];
        let mut vals = vec![0.0; ns];
        for (sl, &u) in units.iter().enumerate() {
            for b in 0..nb {
                let z = &m.surv[(u * nb + b) * ns..(u * nb + b + 1) * ns];
                let fast = p.w_rows[sl].1 > 0;
                if fast {
                    p.horner(sl, 0, z, &mut vals);
                }
                for s in (0..ns).filter(|&s| is_table(u * ns + s)) {
                    let ln0 = if fast && vals[s] > 0.0 && vals[s].is_finite() {
                        vals[s].ln()
                    } else {
                        m.dists[u * ns + s].ln_gf_deriv(0, z[s])
                    };
                    p.sum0[m.block_bin_row(m.block_of(u), b).start + s] += ln0;
                    p.inv0[(b * nt + sl) * ns + s] = (-ln0).exp();
                    p.ln0[(b * nt + sl) * ns + s] = ln0;
                }
            }
        }
        p.units = units;
        p.lookup = p.build_lookup(m, lookup_budget);
        p
    }

    /// Horner's rule for every stimulus of slot `sl` at count `k`:
    /// `out[s] = Φ^(k)(z[s]) / 2^(j·k)` (0 for the slot's cells of other families).
    /// Needs `k <` the slot's shortest table.
    #[inline]
    fn horner(&self, sl: usize, k: usize, z: &[f64], out: &mut [f64]) {
        let (off, rows, _, j) = self.w_rows[sl];
        let ns = z.len();
        let w = &self.w[off..off + rows * ns];
        let scale = (j as f64).exp2();
        #[cfg(target_arch = "x86_64")]
        if self.avx2 {
            // SAFETY: `avx2` is set only when the running CPU reports the feature.
            unsafe { horner_avx2(w, rows, k, z, scale, &self.inv_int, out) };
            return;
        }
        horner_rows(w, rows, k, z, scale, &self.inv_int, out);
    }

    /// Adds unit `u`'s table-family correction at bin `b` with count `k > 0`:
    /// `ln Φ^(k)(S(b)) − ln Φ^(0)(S(b))` for each of its table cells, into `post` directly or
    /// into the trial's running product `acc`.
    #[inline]
    pub(crate) fn add_unit(
        &self,
        m: &Model,
        u: usize,
        b: usize,
        k: u32,
        post: &mut [f64],
        acc: &mut ProductAcc,
    ) {
        let ns = post.len();
        let nt = self.units.len();
        let sl = self.slot[u] as usize;
        if (k as usize) <= self.lookup.k {
            let row = self.lookup_row(b, k, sl, ns);
            for (p, c) in post.iter_mut().zip(&self.lookup.values[row..row + ns]) {
                *p += c;
            }
            return;
        }
        let inv0 = &self.inv0[(b * nt + sl) * ns..(b * nt + sl + 1) * ns];
        let ln0 = &self.ln0[(b * nt + sl) * ns..(b * nt + sl + 1) * ns];
        let z = &m.surv[(u * m.n_bins() + b) * ns..(u * m.n_bins() + b + 1) * ns];
        let (_, rows, shortest, j) = self.w_rows[sl];
        if rows > 0 && (k as usize) < shortest {
            let other = &self.other[sl * ns..(sl + 1) * ns];
            let is_table = &self.is_table[sl * ns..(sl + 1) * ns];
            let jk = j * k as i64;
            let v = &mut acc.scratch;
            self.horner(sl, k as usize, z, v);
            let mut ok = true;
            for ((x, i0), o) in v.iter_mut().zip(inv0).zip(other) {
                *x = *x * i0 + o;
                ok &= *x > RATIO_MIN && *x < RATIO_MAX;
            }
            if ok {
                for (((p, e), x), t) in acc
                    .prod
                    .iter_mut()
                    .zip(&mut acc.exp)
                    .zip(v.iter())
                    .zip(is_table)
                {
                    let bits = (*p * x).to_bits();
                    *e += ((bits >> 52) & 0x7ff) as i64 - 1023 + jk * t;
                    *p = f64::from_bits((bits & 0x800F_FFFF_FFFF_FFFF) | 0x3FF0_0000_0000_0000);
                }
                acc.used = true;
                return;
            }
        }
        for (s, p) in post.iter_mut().enumerate() {
            if let CellKernel::Table = m.kernels[u * ns + s] {
                *p += m.dists[u * ns + s].ln_gf_deriv(k, z[s]) - ln0[s];
            }
        }
    }

    /// The memory unit `u` (with a table slot) will read at bin `b` with count `k > 0`.
    #[inline]
    pub(crate) fn row_for(&self, u: usize, b: usize, k: u32, ns: usize) -> &[f64] {
        let sl = self.slot[u] as usize;
        if (k as usize) <= self.lookup.k {
            let row = self.lookup_row(b, k, sl, ns);
            &self.lookup.values[row..row + ns]
        } else {
            let nt = self.units.len();
            &self.inv0[(b * nt + sl) * ns..(b * nt + sl + 1) * ns]
        }
    }

    /// Bytes held.
    pub(crate) fn bytes(&self) -> usize {
        8 * (self.sum0.len()
            + self.inv0.len()
            + self.ln0.len()
            + 2 * self.other.len()
            + self.w.len())
            + 8 * self.lookup.values.len()
    }

    #[inline]
    fn lookup_row(&self, b: usize, k: u32, sl: usize, ns: usize) -> usize {
        let nt = self.units.len();
        ((b * self.lookup.k + k as usize - 1) * nt + sl) * ns
    }

    /// Counts up to which the lookup holds every unit's terms (0: no lookup).
    pub(crate) fn lookup_counts(&self) -> usize {
        self.lookup.k
    }

    /// The lookup: the largest count cap K (no more than the longest table) whose rows for every
    /// unit with table-family cells fit `budget` bytes.
    fn build_lookup(&self, m: &Model, budget: usize) -> Lookup {
        let (ns, nb, nt) = (m.n_stimuli(), m.n_bins(), self.units.len());
        let longest = self
            .units
            .iter()
            .flat_map(|&u| (0..ns).map(move |s| u * ns + s))
            .filter(|&i| matches!(m.kernels[i], CellKernel::Table))
            .map(|i| m.dists[i].pmf().len())
            .max()
            .unwrap_or(0);
        // Counts past every table cell's upper 1 − LOOKUP_TAIL quantile are met so rarely that
        // a row for them is memory spent for nothing: they take the exact path of `add_unit`.
        // So the lookup grows with the counts the cells make likely, not with the longest
        // table (one heavy-tailed cell no longer sizes every unit's rows).
        let likely = self
            .units
            .iter()
            .flat_map(|&u| (0..ns).map(move |s| u * ns + s))
            .filter(|&i| matches!(m.kernels[i], CellKernel::Table))
            .map(|i| likely_counts(m.dists[i].pmf()))
            .max()
            .unwrap_or(0);
        let per_count = (nt * nb * ns * 8).max(1);
        let mut kk = longest.min(likely).min(budget / per_count);
        // Bounded preparation time (see PREP_TERMS_MAX).
        let slow_terms_per_count: usize = self
            .units
            .iter()
            .enumerate()
            .filter(|(sl, _)| self.w_rows[*sl].1 == 0)
            .map(|(_, &u)| {
                (0..ns)
                    .filter(|&s| matches!(m.kernels[u * ns + s], CellKernel::Table))
                    .map(|s| m.dists[u * ns + s].pmf().len())
                    .sum::<usize>()
                    * nb
            })
            .sum();
        if let Some(cap) = PREP_TERMS_MAX.checked_div(slow_terms_per_count) {
            kk = kk.min(cap);
        }
        let mut l = Lookup {
            k: kk,
            values: vec![0.0; kk * nt * nb * ns],
        };
        let mut vals = vec![0.0; ns];
        for (sl, &u) in self.units.iter().enumerate() {
            let (_, rows, shortest, j) = self.w_rows[sl];
            for b in 0..nb {
                let z = &m.surv[(u * nb + b) * ns..(u * nb + b + 1) * ns];
                let ln0 = &self.ln0[(b * nt + sl) * ns..(b * nt + sl + 1) * ns];
                for k in 1..=kk {
                    let fast = rows > 0 && k < shortest;
                    if fast {
                        self.horner(sl, k, z, &mut vals);
                    }
                    let row = ((b * kk + k - 1) * nt + sl) * ns;
                    for s in 0..ns {
                        let i = u * ns + s;
                        if !matches!(m.kernels[i], CellKernel::Table) {
                            continue;
                        }
                        let ln_k = if fast && vals[s] > 0.0 && vals[s].is_finite() {
                            vals[s].ln() + (j * k as i64) as f64 * LN_2
                        } else {
                            m.dists[i].ln_gf_deriv(k as u32, z[s])
                        };
                        l.values[row + s] = ln_k - ln0[s];
                    }
                }
            }
        }
        l
    }
}

/// Upper-tail probability past which a count gets no lookup row (see `build_lookup`).
pub const LOOKUP_TAIL: f64 = 1e-7;

/// The smallest count q with P(N > q) < [`LOOKUP_TAIL`] under `pmf` (its length if none).
fn likely_counts(pmf: &[f64]) -> usize {
    let mut above: f64 = pmf.iter().sum();
    for (q, p) in pmf.iter().enumerate() {
        above -= p;
        if above < LOOKUP_TAIL {
            return q;
        }
    }
    pmf.len()
}

fn detect_avx2() -> bool {
    #[cfg(target_arch = "x86_64")]
    {
        std::arch::is_x86_feature_detected!("avx2")
    }
    #[cfg(not(target_arch = "x86_64"))]
    {
        false
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2")]
unsafe fn horner_avx2(
    w: &[f64],
    rows: usize,
    k: usize,
    z: &[f64],
    scale: f64,
    inv: &[f64],
    out: &mut [f64],
) {
    horner_rows(w, rows, k, z, scale, inv, out)
}

/// `out[s] = Σ_{n=k}^{rows−1} w[n][s] · (scale·z[s])^(n−k)/(n−k)!`, innermost term first:
/// `acc ← w(n) + (scale·z·1/(n−k+1))·acc` (`scale` is a power of two: exact). Stimuli in
/// blocks of 16, then 4, then 1, each block's accumulators independent so the steps overlap.
#[inline(always)]
fn horner_rows(
    w: &[f64],
    rows: usize,
    k: usize,
    z: &[f64],
    scale: f64,
    inv: &[f64],
    out: &mut [f64],
) {
    let ns = z.len();
    let mut c = 0;
    while c + 16 <= ns {
        horner_block::<16>(w, rows, k, ns, c, z, scale, inv, out);
        c += 16;
    }
    while c + 4 <= ns {
        horner_block::<4>(w, rows, k, ns, c, z, scale, inv, out);
        c += 4;
    }
    while c < ns {
        horner_block::<1>(w, rows, k, ns, c, z, scale, inv, out);
        c += 1;
    }
}

#[inline(always)]
#[allow(clippy::too_many_arguments)]
fn horner_block<const L: usize>(
    w: &[f64],
    rows: usize,
    k: usize,
    ns: usize,
    c: usize,
    z: &[f64],
    scale: f64,
    inv: &[f64],
    out: &mut [f64],
) {
    let zc: [f64; L] = std::array::from_fn(|j| z[c + j] * scale);
    let top = &w[(rows - 1) * ns + c..(rows - 1) * ns + c + L];
    let mut acc: [f64; L] = std::array::from_fn(|j| top[j]);
    for n in (k..rows - 1).rev() {
        let f = inv[n - k + 1];
        let row = &w[n * ns + c..n * ns + c + L];
        for j in 0..L {
            acc[j] = row[j] + (zc[j] * f) * acc[j];
        }
    }
    out[c..c + L].copy_from_slice(&acc);
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::count::CountParams;
    use crate::model::{CellSpec, CellSummary, ModelSpec};

    /// 3 units × 37 stimuli (blocks of 16, 4 and 1), COM-Poisson and empirical cells mixed with
    /// a Poisson and a negative binomial cell per unit.
    fn model() -> Model {
        let (nu, ns, nb) = (3, 37, 20);
        let mut cells = Vec::new();
        for u in 0..nu {
            for s in 0..ns {
                let count = match (u + s) % 9 {
                    0 => CountParams::Poisson { mean: 3.0 },
                    1 => CountParams::NegativeBinomial {
                        mean: 4.0,
                        shape: 2.0,
                    },
                    r if r % 2 == 0 => CountParams::ComPoisson {
                        lambda: 1.0 + s as f64 * 0.7,
                        nu: 0.6 + 0.1 * r as f64,
                    },
                    _ if u == 2 && s % 4 == 3 => {
                        // Long tables (up to 400 counts): the power-of-two scaling at work.
                        let d = crate::CountDist::new(CountParams::NegativeBinomial {
                            mean: 40.0 + s as f64,
                            shape: 6.0,
                        })
                        .unwrap();
                        assert!(
                            d.pmf().len() > 170 && d.pmf().len() <= FAST_MAX_COUNT,
                            "{}",
                            d.pmf().len()
                        );
                        CountParams::Empirical {
                            pmf: d.pmf().to_vec(),
                        }
                    }
                    _ => {
                        let v: Vec<f64> = (0..(5 + s))
                            .map(|n| 1.0 + ((n * 7 + u) % 5) as f64)
                            .collect();
                        let t: f64 = v.iter().sum();
                        CountParams::Empirical {
                            pmf: v.iter().map(|x| x / t).collect(),
                        }
                    }
                };
                let q: Vec<f64> = (0..nb).map(|b| 1.0 + ((b * 3 + s) % 7) as f64).collect();
                let t: f64 = q.iter().sum();
                cells.push(CellSpec {
                    count,
                    timing: q.iter().map(|x| x / t).collect(),
                    summary: CellSummary::default(),
                });
            }
        }
        Model::new(ModelSpec::numbered(nu, ns, nb, cells)).unwrap()
    }

    /// Huge-rate COM-Poisson cells (tables of thousands of counts, too long for the fast form):
    /// the lookup is capped so its build sums at most PREP_TERMS_MAX table terms, and a count
    /// beyond the cap still decodes (per bin) to the same value as the finite sum.
    #[test]
    fn preparation_of_huge_rate_cells_is_bounded() {
        let nb = 250;
        let cell = |lambda: f64| CellSpec {
            count: CountParams::ComPoisson { lambda, nu: 1.0 },
            timing: vec![1.0 / nb as f64; nb],
            summary: CellSummary::default(),
        };
        let m = Model::new(ModelSpec {
            bin_width_s: 0.001,
            n_bins: nb as u32,
            stimuli: vec!["a".into(), "b".into()],
            units: vec![1],
            prior: vec![1.0, 1.0],
            cells: vec![cell(5000.0), cell(6000.0)],
            calibration: Default::default(),
            unit_groups: Vec::new(),
        })
        .unwrap();
        let p = TablePrep::build(&m, 1 << 30);
        let terms: usize = (0..2).map(|s| m.dists[s].pmf().len()).sum::<usize>() * nb;
        assert!(m.dists[1].pmf().len() > FAST_MAX_COUNT);
        assert!(
            p.lookup.k * terms <= PREP_TERMS_MAX,
            "{} counts",
            p.lookup.k
        );
        assert!(p.lookup.k < m.dists[1].pmf().len());
        // Beyond the lookup the correction is computed, and equals the finite sum.
        let (b, k) = (100, p.lookup.k as u32 + 5);
        let mut post = vec![0.0; 2];
        let mut acc = ProductAcc::new(2);
        p.add_unit(&m, 0, b, k, &mut post, &mut acc);
        acc.flush_into(&mut post);
        for (s, got) in post.iter().enumerate() {
            let z = m.survival(0, s, b);
            let want = m.dists[s].ln_gf_deriv(k, z) - m.dists[s].ln_gf_deriv(0, z);
            assert!(
                (got - want).abs() <= 1e-8 * want.abs().max(1.0),
                "{got} vs {want}"
            );
        }
    }

    /// The product form (Horner on W(n) = P(n)·n!, one logarithm per stimulus) against the
    /// count distribution's own finite sum, cell by cell, for every bin and every count the
    /// tables cover; both baseline and (where the CPU has it) AVX2 kernels.
    #[test]
    fn product_form_matches_the_finite_sum() {
        let m = model();
        let (nu, ns, nb) = (m.n_units(), m.n_stimuli(), m.n_bins());
        for avx2 in [false, detect_avx2()] {
            let mut p = TablePrep::build(&m, 0);
            p.avx2 = avx2;
            assert!(p.lookup.values.is_empty());
            for u in 0..nu {
                let (_, rows, shortest, _) = p.w_rows[p.slot[u] as usize];
                assert!(rows > 0);
                for b in 0..nb {
                    for k in 1..shortest as u32 + 3 {
                        let mut post = vec![0.0; ns];
                        let mut acc = ProductAcc::new(ns);
                        p.add_unit(&m, u, b, k, &mut post, &mut acc);
                        acc.flush_into(&mut post);
                        for (s, got) in post.iter().enumerate() {
                            let i = u * ns + s;
                            let want = match m.kernels[i] {
                                CellKernel::Table => {
                                    let z = m.survival(u, s, b);
                                    m.dists[i].ln_gf_deriv(k, z) - m.dists[i].ln_gf_deriv(0, z)
                                }
                                _ => 0.0,
                            };
                            assert!(
                                (got - want).abs() <= 1e-10 * want.abs().max(1.0),
                                "u {u} s {s} b {b} k {k}: {got} vs {want}"
                            );
                        }
                    }
                }
            }
            // The k = 0 sums.
            for b in 0..nb {
                for s in 0..ns {
                    let want: f64 = (0..nu)
                        .filter(|&u| matches!(m.kernels[u * ns + s], CellKernel::Table))
                        .map(|u| m.dists[u * ns + s].ln_gf_deriv(0, m.survival(u, s, b)))
                        .sum();
                    assert!((p.sum0[b * ns + s] - want).abs() < 1e-10 * want.abs().max(1.0));
                }
            }
        }
    }

    /// With the lookup built, the correction comes from it and agrees with the product form.
    #[test]
    fn lookup_and_product_form_agree() {
        let m = model();
        let ns = m.n_stimuli();
        let with = TablePrep::build(&m, 1 << 30);
        let without = TablePrep::build(&m, 0);
        assert!(with.lookup_counts() > 4);
        assert!(without.lookup.values.is_empty());
        // A budget for a few counts only: higher counts take the product form.
        let part = TablePrep::build(&m, 3 * m.n_units() * m.n_bins() * ns * 8);
        assert_eq!(part.lookup_counts(), 3);
        for (u, b, k) in [(0, 0, 1), (1, 7, 3), (2, 19, 4), (2, 10, 2), (1, 3, 5)] {
            let (mut a, mut c) = (vec![0.0; ns], vec![0.0; ns]);
            let mut acc = ProductAcc::new(ns);
            with.add_unit(&m, u, b, k, &mut a, &mut acc);
            acc.flush_into(&mut a);
            without.add_unit(&m, u, b, k, &mut c, &mut acc);
            acc.flush_into(&mut c);
            let mut d = vec![0.0; ns];
            part.add_unit(&m, u, b, k, &mut d, &mut acc);
            acc.flush_into(&mut d);
            for s in 0..ns {
                assert!((a[s] - c[s]).abs() < 1e-10 * a[s].abs().max(1.0));
                assert!((d[s] - c[s]).abs() < 1e-10 * c[s].abs().max(1.0));
            }
        }
    }

    /// The lookup holds rows for the counts the cells make likely, not for the longest table:
    /// a count past every cell's upper 1 − LOOKUP_TAIL quantile has no row and takes the exact
    /// path. Quantile of a Poisson(3) checked against statrs' survival function.
    #[test]
    fn lookup_covers_the_likely_counts_only() {
        use statrs::distribution::{DiscreteCDF, Poisson};
        let d = crate::CountDist::new(CountParams::Poisson { mean: 3.0 }).unwrap();
        let q = likely_counts(d.pmf());
        let sf = Poisson::new(3.0).unwrap();
        assert!(
            sf.sf(q as u64) < LOOKUP_TAIL,
            "P(N > {q}) = {}",
            sf.sf(q as u64)
        );
        assert!(sf.sf(q as u64 - 1) >= LOOKUP_TAIL * 0.999);
        // In the test model the longest tables (≈ 400 counts) are long-tailed empirical cells;
        // the rows stop at their upper quantile, far below the table's length.
        let m = model();
        let p = TablePrep::build(&m, 1 << 30);
        let longest = (0..m.n_units() * m.n_stimuli())
            .filter(|&i| matches!(m.kernels[i], CellKernel::Table))
            .map(|i| m.dists[i].pmf().len())
            .max()
            .unwrap();
        let likely = (0..m.n_units() * m.n_stimuli())
            .filter(|&i| matches!(m.kernels[i], CellKernel::Table))
            .map(|i| likely_counts(m.dists[i].pmf()))
            .max()
            .unwrap();
        assert_eq!(p.lookup_counts(), likely);
        assert!(likely < longest, "{likely} vs {longest}");
    }
}
