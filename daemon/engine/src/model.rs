//! The immutable decoding model: stimuli, units, prior, and one cell per (unit, stimulus) holding
//! its count distribution and its floored spike density q(b). Built and validated once; the
//! per-bin tables every decoder reads are precomputed here so the hot path only indexes; the
//! budget-dependent ones are built by [`Model::prepare`] into a [`crate::PreparedModel`].
//!
//! Must not: change after construction (hot reload builds a new `Model`), or do I/O.

use crate::calibration::Calibration;
use crate::count::{CountDist, CountError, CountFamily, CountParams};
use serde::{Deserialize, Serialize};
use std::collections::HashMap;

/// Per-cell fit summary carried in the model file for reports (not used by the likelihood).
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct CellSummary {
    /// Training trials of this stimulus.
    pub n_trials: u32,
    /// Sample mean of the window count.
    pub mean_count: f64,
    /// Sample variance of the window count (n − 1 denominator; 0 with fewer than 2 trials).
    pub var_count: f64,
    /// Kernel bandwidth in seconds (NaN when the cell had no spikes).
    pub bandwidth_s: f64,
    /// Held-out log-likelihood per trial of each family tried (NaN where the fit failed).
    pub held_out: Vec<(CountFamily, f64)>,
}

/// One (unit, stimulus) cell as stored in a model file.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct CellSpec {
    /// Count distribution parameters.
    pub count: CountParams,
    /// q(0..B): probability that one spike falls in each bin; positive, sums to 1.
    pub timing: Vec<f64>,
    /// Fit summary.
    pub summary: CellSummary,
}

/// Everything a model file holds: enough to rebuild the exact [`Model`].
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ModelSpec {
    /// Bin width in seconds.
    pub bin_width_s: f64,
    /// Number of bins B in the window (window = B · bin width).
    pub n_bins: u32,
    /// Stimulus names, in index order.
    pub stimuli: Vec<String>,
    /// Unit ids, in index order.
    pub units: Vec<u32>,
    /// Prior over stimuli (sums to 1).
    pub prior: Vec<f64>,
    /// Cells, unit-major: cell (u, s) is at `u · S + s`.
    pub cells: Vec<CellSpec>,
    /// Calibration of the posterior and the held-out threshold evidence (default: none).
    #[serde(default)]
    pub calibration: Calibration,
    /// Unit groups: the index (in `units`) of the first unit of each group after the first,
    /// ascending. Empty: one group. Blocks of the population sum never straddle a group, so a
    /// group's units can be decoded on a machine of their own (`auspexd --role shard`).
    #[serde(default, skip_serializing_if = "Vec::is_empty")]
    pub unit_groups: Vec<u32>,
}

impl ModelSpec {
    /// A spec for synthetic models (benchmarks, tests, fuzzing): units numbered 0.., stimuli
    /// named `s0`, `s1`…, a flat prior, no calibration; `cells` unit-major, `n_bins` each.
    pub fn numbered(n_units: usize, n_stimuli: usize, n_bins: usize, cells: Vec<CellSpec>) -> Self {
        ModelSpec {
            bin_width_s: 0.001,
            n_bins: n_bins as u32,
            stimuli: (0..n_stimuli).map(|s| format!("s{s}")).collect(),
            units: (0..n_units as u32).collect(),
            prior: vec![1.0; n_stimuli],
            cells,
            calibration: Default::default(),
            unit_groups: Vec::new(),
        }
    }
}

/// Why a model could not be built.
#[derive(Debug, thiserror::Error)]
pub enum ModelError {
    /// Shapes or values that do not fit together.
    #[error("invalid model: {0}")]
    Invalid(String),
    /// A cell's count distribution is invalid.
    #[error("invalid model: cell (unit {unit}, stimulus {stimulus}): {source}")]
    Count {
        /// Unit id.
        unit: u32,
        /// Stimulus name.
        stimulus: String,
        /// The cause.
        source: CountError,
    },
    /// The tables would not fit the memory budget ([`crate::budget`]).
    #[error("model too large: {0}")]
    OverBudget(#[from] crate::budget::OverBudget),
}

/// Bytes a model of `nu` units × `ns` stimuli × `nb` bins needs besides its count tables: three
/// f64 tables per (unit, bin, stimulus) and, for decoding, each unit's running tally (an
/// `ns × ns` confusion matrix, row and column sums, count sums per stimulus).
pub fn decoding_bytes(nu: usize, ns: usize, nb: usize) -> u128 {
    use crate::budget::product;
    let (u, s, b) = (nu as u128, ns as u128, nb as u128);
    product(&[u, b, s, 3 * 8]) + product(&[u, s, s, 8]) + product(&[u, s, 8 * 2 + 24])
}

/// How the engine evaluates a cell's count term: closed forms where the family has one.
#[derive(Clone, Copy, Debug)]
pub(crate) enum CellKernel {
    Poisson { mean: f64, ln_mean: f64 },
    NegBin { shape: f64 },
    Table,
}

/// A validated, immutable model with the engine's precomputed tables.
#[derive(Debug)]
pub struct Model {
    spec: ModelSpec,
    n_units: usize,
    n_stim: usize,
    n_bins: usize,
    pub(crate) dists: Vec<CountDist>,
    pub(crate) kernels: Vec<CellKernel>,
    /// Count-distribution mean per cell (the inhomogeneous Poisson decoder's expected count).
    pub(crate) means: Vec<f64>,
    pub(crate) ln_means: Vec<f64>,
    /// ln q, laid out [u][b][s] so a bin's terms for one unit are contiguous.
    pub(crate) ln_q: Vec<f64>,
    /// S(b) = Σ_{b' > b} q(b'), laid out [u][b][s].
    pub(crate) surv: Vec<f64>,
    /// Negative binomial: ln(1 − (1−p)·S(b)), laid out [b][u][s] (the summed path reads one
    /// bin's rows for every spiking unit, so they sit together); 0 for other families.
    pub(crate) nb_g: Vec<f64>,
    pub(crate) ln_prior: Vec<f64>,
    unit_index: HashMap<u32, u32>,
    /// The units of each block of the likelihood sum (see [`UNIT_BLOCK`]), as index ranges.
    pub(crate) blocks: Vec<std::ops::Range<usize>>,
    /// The block of each unit index.
    block_of_unit: Vec<u32>,
    /// The first block of each unit group (one entry per group).
    group_first_block: Vec<usize>,
    /// Σ over a block's units of the count-independent part of every closed-form cell's count
    /// term, per [b][block][s] (see [`Model::block_bin_row`]):
    /// `μ·S(b)` for Poisson cells, `−r·ln(1 − (1−p)·S(b))` for negative binomial cells. With it
    /// a bin costs O(S) plus the units that have spiked (and any table-family units).
    pub(crate) order_stats_sum: Vec<f64>,
    /// Σ over a block's units of μ_us·S_us(b) per [b][block][s]: the inhomogeneous Poisson
    /// decoder's whole silence term.
    pub(crate) rate_sum: Vec<f64>,
    /// Units with at least one negative binomial cell.
    pub(crate) unit_has_negbin: Vec<bool>,
    /// Any negative binomial cell at all (else the per-bin negative binomial pass is skipped).
    pub(crate) any_negbin: bool,
    /// Units whose cells are all negative binomial (a branch-free, vectorisable loop).
    pub(crate) unit_all_negbin: Vec<bool>,
    /// ln μ of Poisson cells (0 elsewhere): what a spike adds to their count constant.
    pub(crate) poisson_ln_mean: Vec<f64>,
}

/// Units per block of the population sum. The log-likelihood is summed per block of this many
/// consecutive units (in the model's unit order), and the block partials are then added in block
/// order — by one engine, by engine threads or by shards on several machines alike — so the
/// result is the same bits however the blocks are spread.
pub const UNIT_BLOCK: usize = 64;

/// The unit index ranges of the groups whose later starts are `starts` (checked).
fn group_ranges(nu: usize, starts: &[u32]) -> Result<Vec<std::ops::Range<usize>>, ModelError> {
    let mut out = Vec::with_capacity(starts.len() + 1);
    let mut a = 0usize;
    for &s in starts {
        let s = s as usize;
        if s <= a || s >= nu {
            return Err(ModelError::Invalid(format!(
                "unit groups {starts:?}: each group must start after the previous one and inside the {nu} units"
            )));
        }
        out.push(a..s);
        a = s;
    }
    out.push(a..nu);
    Ok(out)
}

impl Model {
    /// Validates a spec and precomputes the tables.
    pub fn new(spec: ModelSpec) -> Result<Self, ModelError> {
        let inv = |m: String| Err(ModelError::Invalid(m));
        let (nu, ns, nb) = (spec.units.len(), spec.stimuli.len(), spec.n_bins as usize);
        if !(spec.bin_width_s.is_finite() && spec.bin_width_s > 0.0) {
            return inv(format!("bin width {} s must be > 0", spec.bin_width_s));
        }
        if nb == 0 || nb > 1_000_000 {
            return inv(format!("window of {nb} bins is out of range (1..=1000000)"));
        }
        if nu == 0 || ns < 2 {
            return inv(format!(
                "need at least one unit and two stimuli (have {nu} units, {ns} stimuli)"
            ));
        }
        if spec.prior.len() != ns {
            return inv(format!(
                "prior has {} entries for {ns} stimuli",
                spec.prior.len()
            ));
        }
        if spec.prior.iter().any(|p| !(p.is_finite() && *p > 0.0)) {
            return inv("prior entries must be finite and > 0".into());
        }
        spec.calibration.check(nb).map_err(ModelError::Invalid)?;
        if spec.cells.len() != nu * ns {
            return inv(format!(
                "{} cells for {nu} units × {ns} stimuli",
                spec.cells.len()
            ));
        }
        let mut unit_index = HashMap::with_capacity(nu);
        for (i, &u) in spec.units.iter().enumerate() {
            if unit_index.insert(u, i as u32).is_some() {
                return inv(format!("unit {u} is listed twice"));
            }
        }
        let mut seen = std::collections::HashSet::new();
        for s in &spec.stimuli {
            if !seen.insert(s) {
                return inv(format!("stimulus {s:?} is listed twice"));
            }
        }
        // Every cell's shape is checked before the tables are sized from it, so a small file that
        // declares a huge window or cell count is refused instead of asking for the memory.
        for (i, cell) in spec.cells.iter().enumerate() {
            if cell.timing.len() != nb {
                return inv(format!(
                    "cell (unit {}, stimulus {}) has {} timing bins, window has {nb}",
                    spec.units[i / ns],
                    spec.stimuli[i % ns],
                    cell.timing.len()
                ));
            }
        }
        if nu.checked_mul(nb).and_then(|x| x.checked_mul(ns)).is_none() {
            return inv(format!(
                "{nu} units × {nb} bins × {ns} stimuli is too large"
            ));
        }
        // Everything sized from the file, before any of it is built: three tables per (unit,
        // bin, stimulus), and what decoding with the model keeps per unit (the running tallies:
        // a stimuli × stimuli confusion matrix each). The count tables follow, checked as they
        // grow.
        let sizes = || format!("{nu} units × {ns} stimuli × {nb} bins");
        let fixed = decoding_bytes(nu, ns, nb);
        crate::budget::check("the model's tables", sizes, fixed)?;
        // The count tables as their parameters say they will be, before any is built (the
        // check as they grow, below, is exact).
        let hinted: u128 = spec
            .cells
            .iter()
            .map(|c| 3 * 8 * c.count.table_len_hint() as u128)
            .sum();
        crate::budget::check(
            "the model's count tables",
            || {
                format!(
                    "{nu} units × {ns} stimuli, about {} table entries in all",
                    hinted / 24
                )
            },
            fixed + hinted,
        )?;
        let mut count_bytes = 0u128;
        let psum: f64 = spec.prior.iter().sum();
        let ln_prior: Vec<f64> = spec.prior.iter().map(|p| (p / psum).ln()).collect();

        let mut dists = Vec::with_capacity(nu * ns);
        let mut kernels = Vec::with_capacity(nu * ns);
        let mut ln_q = vec![0.0; nu * nb * ns];
        let mut surv = vec![0.0; nu * nb * ns];
        let mut nb_g = vec![0.0; nu * nb * ns];
        for u in 0..nu {
            for s in 0..ns {
                let cell = &spec.cells[u * ns + s];
                let d = CountDist::new(cell.count.clone()).map_err(|e| ModelError::Count {
                    unit: spec.units[u],
                    stimulus: spec.stimuli[s].clone(),
                    source: e,
                })?;
                if cell.timing.len() != nb {
                    return inv(format!(
                        "cell (unit {}, stimulus {}) has {} timing bins, window has {nb}",
                        spec.units[u],
                        spec.stimuli[s],
                        cell.timing.len()
                    ));
                }
                if cell.timing.iter().any(|q| !(q.is_finite() && *q > 0.0)) {
                    return inv(format!(
                        "cell (unit {}, stimulus {}): timing probabilities must be finite and > 0",
                        spec.units[u], spec.stimuli[s]
                    ));
                }
                let qs: f64 = cell.timing.iter().sum();
                if (qs - 1.0).abs() > 1e-6 {
                    return inv(format!(
                        "cell (unit {}, stimulus {}): timing sums to {qs}, not 1",
                        spec.units[u], spec.stimuli[s]
                    ));
                }
                // Survival from the right so S(B−1) is exactly 0.
                let mut right = 0.0;
                let one_minus_p = d.nb_one_minus_p();
                for b in (0..nb).rev() {
                    let i = (u * nb + b) * ns + s;
                    ln_q[i] = (cell.timing[b] / qs).ln();
                    surv[i] = right;
                    nb_g[(b * nu + u) * ns + s] = (1.0 - one_minus_p * right).ln();
                    right += cell.timing[b] / qs;
                }
                kernels.push(match d.params() {
                    CountParams::Poisson { mean } => CellKernel::Poisson {
                        mean: *mean,
                        ln_mean: mean.ln(),
                    },
                    CountParams::NegativeBinomial { shape, .. } => {
                        CellKernel::NegBin { shape: *shape }
                    }
                    _ => CellKernel::Table,
                });
                // pmf, ln pmf and ln n! per table entry.
                count_bytes += 3 * 8 * d.pmf().len() as u128;
                crate::budget::check(
                    "the model's count tables",
                    || {
                        format!(
                            "{nu} units × {ns} stimuli; {} entries in the first {} cells, the longest for unit {} stimulus {:?} (mean {:.0})",
                            count_bytes / 24,
                            u * ns + s + 1,
                            spec.units[u],
                            spec.stimuli[s],
                            d.mean()
                        )
                    },
                    fixed + count_bytes,
                )?;
                dists.push(d);
            }
        }
        let means: Vec<f64> = dists.iter().map(|d| d.mean().max(1e-12)).collect();
        let ln_means = means.iter().map(|m| m.ln()).collect();
        let groups = group_ranges(nu, &spec.unit_groups)?;
        let blocks: Vec<std::ops::Range<usize>> = groups
            .iter()
            .flat_map(|g| {
                g.clone()
                    .step_by(UNIT_BLOCK)
                    .map(move |a| a..(a + UNIT_BLOCK).min(g.end))
            })
            .collect();
        let mut block_of_unit = vec![0u32; nu];
        for (j, r) in blocks.iter().enumerate() {
            for u in r.clone() {
                block_of_unit[u] = j as u32;
            }
        }
        let group_first_block: Vec<usize> = groups
            .iter()
            .map(|g| blocks.partition_point(|b| b.start < g.start))
            .collect();
        let mut order_stats_sum = vec![0.0; blocks.len() * nb * ns];
        let mut rate_sum = vec![0.0; blocks.len() * nb * ns];
        let mut unit_has_negbin = vec![false; nu];
        let mut unit_all_negbin = vec![true; nu];
        let mut poisson_ln_mean = vec![0.0; nu * ns];
        for u in 0..nu {
            let blk = block_of_unit[u] as usize;
            for s in 0..ns {
                let i = u * ns + s;
                for b in 0..nb {
                    let t = (u * nb + b) * ns + s;
                    let o = (b * blocks.len() + blk) * ns + s;
                    rate_sum[o] += means[i] * surv[t];
                    order_stats_sum[o] += match kernels[i] {
                        CellKernel::Poisson { mean, .. } => mean * surv[t],
                        CellKernel::NegBin { shape } => -shape * nb_g[(b * nu + u) * ns + s],
                        CellKernel::Table => 0.0,
                    };
                }
                match kernels[i] {
                    CellKernel::NegBin { .. } => unit_has_negbin[u] = true,
                    CellKernel::Table | CellKernel::Poisson { .. } => {}
                }
                if !matches!(kernels[i], CellKernel::NegBin { .. }) {
                    unit_all_negbin[u] = false;
                }
                if let CellKernel::Poisson { ln_mean, .. } = kernels[i] {
                    poisson_ln_mean[i] = ln_mean;
                }
            }
        }
        Ok(Model {
            n_units: nu,
            n_stim: ns,
            n_bins: nb,
            spec,
            dists,
            kernels,
            means,
            ln_means,
            ln_q,
            surv,
            nb_g,
            ln_prior,
            unit_index,
            blocks,
            block_of_unit,
            group_first_block,
            order_stats_sum,
            rate_sum,
            any_negbin: unit_has_negbin.iter().any(|&x| x),
            unit_has_negbin,
            unit_all_negbin,
            poisson_ln_mean,
        })
    }

    /// Blocks of the population sum ([`UNIT_BLOCK`] units each, the last one of each unit
    /// group shorter).
    pub fn n_blocks(&self) -> usize {
        self.blocks.len()
    }

    /// Unit groups (1 when the model has none; see [`ModelSpec::unit_groups`]).
    pub fn n_groups(&self) -> usize {
        self.group_first_block.len()
    }

    /// The blocks of part `index` of `parts`. When the model has unit groups and `parts` equals
    /// their number, part p is group p; otherwise an even split of whole blocks (parts past the
    /// number of blocks are empty).
    pub fn part_blocks(&self, index: u32, parts: u32) -> std::ops::Range<usize> {
        let n = self.blocks.len();
        let g = &self.group_first_block;
        if g.len() > 1 && parts as usize == g.len() {
            let i = index as usize;
            return match (g.get(i), g.get(i + 1)) {
                (Some(&a), Some(&b)) => a..b,
                (Some(&a), None) => a..n,
                _ => n..n,
            };
        }
        let parts = parts.max(1) as usize;
        let i = (index as usize).min(parts);
        (n * i / parts)..(n * (i + 1).min(parts) / parts)
    }

    /// The unit indices of part `index` of `parts` (see [`Model::part_blocks`]).
    pub fn part_units(&self, index: u32, parts: u32) -> std::ops::Range<usize> {
        let b = self.part_blocks(index, parts);
        if b.is_empty() {
            return 0..0;
        }
        self.blocks[b.start].start..self.blocks[b.end - 1].end
    }

    /// The block holding unit index `u`.
    pub fn block_of(&self, u: usize) -> usize {
        self.block_of_unit[u] as usize
    }

    /// Where block `j`'s per-stimulus sums of bin `b` sit in the per-block tables, laid out
    /// [b][block][s] so a bin's rows of every block are one contiguous run (a bin walks the
    /// blocks in order; [block][b] put each block's row 8·bins·stimuli bytes from the last).
    pub(crate) fn block_bin_row(&self, j: usize, b: usize) -> std::ops::Range<usize> {
        let ns = self.n_stimuli();
        let at = (b * self.blocks.len() + j) * ns;
        at..at + ns
    }

    /// The spec this model was built from.
    pub fn spec(&self) -> &ModelSpec {
        &self.spec
    }
    /// Number of units.
    pub fn n_units(&self) -> usize {
        self.n_units
    }
    /// Number of stimuli.
    pub fn n_stimuli(&self) -> usize {
        self.n_stim
    }
    /// Number of bins in the window.
    pub fn n_bins(&self) -> usize {
        self.n_bins
    }
    /// Bin width in seconds.
    pub fn bin_width_s(&self) -> f64 {
        self.spec.bin_width_s
    }
    /// Stimulus names.
    pub fn stimuli(&self) -> &[String] {
        &self.spec.stimuli
    }
    /// Unit ids.
    pub fn units(&self) -> &[u32] {
        &self.spec.units
    }
    /// Index of a unit id, if the model knows it.
    #[inline]
    pub fn unit_index(&self, unit: u32) -> Option<usize> {
        self.unit_index.get(&unit).map(|&i| i as usize)
    }
    /// Index of a stimulus name.
    pub fn stimulus_index(&self, name: &str) -> Option<usize> {
        self.spec.stimuli.iter().position(|s| s == name)
    }
    /// The count distribution of cell (u, s) (indices).
    pub fn count(&self, u: usize, s: usize) -> &CountDist {
        &self.dists[u * self.n_stim + s]
    }
    /// q(b) of cell (u, s) as stored (sums to 1).
    pub fn timing(&self, u: usize, s: usize) -> &[f64] {
        &self.spec.cells[u * self.n_stim + s].timing
    }
    /// ln prior (normalised).
    pub fn ln_prior(&self) -> &[f64] {
        &self.ln_prior
    }
    /// The calibration the engine applies (unless switched off) and its evidence.
    pub fn calibration(&self) -> &Calibration {
        &self.spec.calibration
    }
    /// The negative binomial step `ln(1−p) + ln(r + k − 1)` computed directly.
    #[inline]
    pub(crate) fn nb_step_direct(&self, i: usize, shape: f64, k: u32) -> f64 {
        self.dists[i].nb_ln_one_minus_p() + (shape + (k - 1) as f64).ln()
    }

    /// S(b) of cell (u, s): probability mass of the bins after b.
    pub fn survival(&self, u: usize, s: usize, b: usize) -> f64 {
        self.surv[(u * self.n_bins + b) * self.n_stim + s]
    }
}

/// Sample mean and variance (n − 1) of counts.
pub fn mean_var(counts: &[u32]) -> (f64, f64) {
    let n = counts.len() as f64;
    if counts.is_empty() {
        return (0.0, 0.0);
    }
    let m = counts.iter().map(|&c| c as f64).sum::<f64>() / n;
    let v = if counts.len() > 1 {
        counts.iter().map(|&c| (c as f64 - m).powi(2)).sum::<f64>() / (n - 1.0)
    } else {
        0.0
    };
    (m, v)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Blocks restart at each unit group; a part per group when the parts equal the groups.
    #[test]
    fn unit_groups_cut_the_blocks() {
        let cells = (0..200)
            .map(|_| CellSpec {
                count: CountParams::Poisson { mean: 1.0 },
                timing: vec![0.5, 0.5],
                summary: CellSummary::default(),
            })
            .collect();
        let mut spec = ModelSpec::numbered(100, 2, 2, cells);
        let m = Model::new(spec.clone()).unwrap();
        assert_eq!(m.blocks, vec![0..64, 64..100]);
        assert_eq!(m.n_groups(), 1);
        spec.unit_groups = vec![70];
        let m = Model::new(spec.clone()).unwrap();
        assert_eq!(m.blocks, vec![0..64, 64..70, 70..100]);
        assert_eq!((m.block_of(63), m.block_of(69), m.block_of(70)), (0, 1, 2));
        assert_eq!(m.n_groups(), 2);
        assert_eq!((m.part_blocks(0, 2), m.part_blocks(1, 2)), (0..2, 2..3));
        assert_eq!((m.part_units(0, 2), m.part_units(1, 2)), (0..70, 70..100));
        // Three parts of a two-group model: an even split of the blocks.
        assert_eq!(m.part_blocks(2, 3), 2..3);
        for bad in [vec![0], vec![100], vec![70, 70], vec![80, 70]] {
            spec.unit_groups = bad;
            assert!(Model::new(spec.clone()).is_err());
        }
    }

    #[test]
    fn a_small_spec_declaring_a_huge_window_is_refused_before_allocating() {
        // 200 × 1000 cells without timing and a window of 1 000 000 bins: sizing the tables first
        // would ask for 3 × 1.6 TB (the process aborted on such a file before).
        let cell = CellSpec {
            count: CountParams::Poisson { mean: 1.0 },
            timing: Vec::new(),
            summary: CellSummary::default(),
        };
        let spec = ModelSpec {
            bin_width_s: 0.001,
            n_bins: 1_000_000,
            stimuli: (0..1000).map(|s| format!("s{s}")).collect(),
            units: (0..200).collect(),
            prior: vec![1e-3; 1000],
            cells: vec![cell; 200 * 1000],
            calibration: Default::default(),
            unit_groups: Vec::new(),
        };
        let e = Model::new(spec).unwrap_err().to_string();
        assert!(e.contains("0 timing bins, window has 1000000"), "{e}");
    }
}
