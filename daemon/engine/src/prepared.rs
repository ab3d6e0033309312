//! A model made ready for bin-by-bin decoding: the per-bin precomputation built once, under a
//! memory budget chosen by the caller and carried with it.
//!
//! [`crate::Model`] is immutable and holds no lazily built state; [`PreparedModel`] owns what
//! the engine reads besides it (negative binomial spike steps, the COM-Poisson/empirical
//! tables and their lookup). [`crate::Engine::new`] and [`crate::Engine::set_model`] take a
//! prepared model, so no engine builds tables behind its caller's back and every caller states
//! the budget it spends.
//!
//! This module must not read files or clocks: callers time the preparation themselves.
use std::sync::Arc;

use crate::model::{CellKernel, Model};
use crate::table::TablePrep;

/// Memory the COM-Poisson/empirical count-term lookup may take, in bytes (checked when built
/// from megabytes). The lookup covers all counts of small models and the low counts of large
/// ones; 0 never builds it (every term evaluated exactly, in product form).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct LookupBudget(usize);

/// A lookup budget outside what a machine can hold.
#[derive(Debug, Clone, PartialEq, Eq, thiserror::Error)]
#[error("table memory {0} MB is more than 1 TB; give MB, e.g. 2048")]
pub struct BudgetError(pub u64);

impl LookupBudget {
    /// The default: 1 GB.
    pub const DEFAULT: LookupBudget = LookupBudget(1 << 30);
    /// No lookup at all.
    pub const NONE: LookupBudget = LookupBudget(0);
    /// The largest budget accepted, in MB (1 TB).
    pub const MAX_MB: u64 = 1 << 20;

    /// A budget of `mb` megabytes (MiB), refused past [`LookupBudget::MAX_MB`].
    pub fn from_mb(mb: u64) -> Result<Self, BudgetError> {
        if mb > Self::MAX_MB {
            return Err(BudgetError(mb));
        }
        Ok(LookupBudget((mb as usize) << 20))
    }
    /// The budget in bytes.
    pub fn bytes(self) -> usize {
        self.0
    }
    /// The budget in whole megabytes (MiB).
    pub fn mb(self) -> u64 {
        (self.0 >> 20) as u64
    }
}

/// Whole megabytes, as the options that set it are written.
impl std::fmt::Display for LookupBudget {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}", self.mb())
    }
}

impl Default for LookupBudget {
    fn default() -> Self {
        Self::DEFAULT
    }
}

/// Negative binomial spike steps are tabulated only while they take at most this much memory.
const NB_STEPS_MAX_BYTES: usize = 512 << 20;
/// Counts up to which negative binomial spike steps are tabulated.
const NB_STEPS_MAX_COUNT: usize = 512;

/// A model with its per-bin precomputation (see the module documentation). Dereferences to
/// the [`Model`].
pub struct PreparedModel {
    model: Arc<Model>,
    budget: LookupBudget,
    /// Table-family (COM-Poisson, empirical) precomputation (see `table.rs`).
    table: TablePrep,
    /// What a spike adds to a negative binomial cell's count constant when the unit's count
    /// reaches k, `ln(1−p) + ln(r + k − 1)`, laid out [u][k][s] for k < `nb_steps_k` (0 for
    /// other families), so a spike costs one contiguous pass instead of S logarithms.
    nb_steps: Vec<f64>,
    nb_steps_k: usize,
}

impl std::ops::Deref for PreparedModel {
    type Target = Model;
    fn deref(&self) -> &Model {
        &self.model
    }
}

impl std::fmt::Debug for PreparedModel {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("PreparedModel")
            .field("units", &self.model.n_units())
            .field("stimuli", &self.model.n_stimuli())
            .field("bins", &self.model.n_bins())
            .field("budget", &self.budget)
            .field("table_bytes", &self.table_bytes())
            .finish()
    }
}

impl Model {
    /// Builds the per-bin precomputation the engine reads (negative binomial spike steps; for
    /// COM-Poisson and empirical cells their silence sums, product-form tables and a lookup of
    /// `ln Φ^(k)(S(b)) − ln Φ^(0)(S(b))` for the counts `budget` covers). Can take seconds for
    /// large table-family models (see `examples/prep_limits.rs`); models never decoded bin by
    /// bin (validation's shuffle refits) need not be prepared.
    pub fn prepare(self: Arc<Self>, budget: LookupBudget) -> Arc<PreparedModel> {
        let (nb_steps, nb_steps_k) = nb_steps(&self);
        let table = TablePrep::build(&self, budget.bytes());
        Arc::new(PreparedModel {
            model: self,
            budget,
            table,
            nb_steps,
            nb_steps_k,
        })
    }
}

/// The negative binomial spike steps, [u][k][s] (empty when there are none or they would
/// take more than [`NB_STEPS_MAX_BYTES`]).
fn nb_steps(m: &Model) -> (Vec<f64>, usize) {
    let (nu, ns) = (m.n_units(), m.n_stimuli());
    let kmax = (0..nu * ns)
        .filter(|&i| matches!(m.kernels[i], CellKernel::NegBin { .. }))
        .map(|i| m.dists[i].pmf().len())
        .max()
        .unwrap_or(0)
        .min(NB_STEPS_MAX_COUNT);
    if kmax == 0 || nu * kmax * ns * 8 > NB_STEPS_MAX_BYTES {
        return (Vec::new(), 0);
    }
    let mut v = vec![0.0; nu * kmax * ns];
    for u in 0..nu {
        for s in 0..ns {
            if let CellKernel::NegBin { shape } = m.kernels[u * ns + s] {
                for k in 1..kmax {
                    v[(u * kmax + k) * ns + s] = m.nb_step_direct(u * ns + s, shape, k as u32);
                }
            }
        }
    }
    (v, kmax)
}

impl PreparedModel {
    /// The model.
    pub fn model(&self) -> &Arc<Model> {
        &self.model
    }
    /// The lookup budget it was prepared with.
    pub fn budget(&self) -> LookupBudget {
        self.budget
    }
    /// Bytes of precomputed table-family terms.
    pub fn table_bytes(&self) -> usize {
        self.table.bytes()
    }
    /// The smallest count up to which every COM-Poisson/empirical unit's per-bin terms come from
    /// the lookup (higher counts are evaluated in product form); None without such cells.
    pub fn table_lookup_counts(&self) -> Option<usize> {
        (!self.table.units.is_empty()).then(|| self.table.lookup_counts())
    }
    /// The table-family precomputation.
    #[inline]
    pub(crate) fn table_prep(&self) -> &TablePrep {
        &self.table
    }
    /// Unit u's row of negative binomial steps for count k (length S), when tabulated.
    #[inline]
    pub(crate) fn nb_step_row(&self, u: usize, k: u32) -> Option<&[f64]> {
        let (kmax, ns, k) = (self.nb_steps_k, self.model.n_stimuli(), k as usize);
        (k < kmax).then(|| &self.nb_steps[(u * kmax + k) * ns..(u * kmax + k + 1) * ns])
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn budget_from_mb_and_its_bound() {
        assert_eq!(LookupBudget::from_mb(256).unwrap().bytes(), 256 << 20);
        assert_eq!(LookupBudget::from_mb(0).unwrap(), LookupBudget::NONE);
        assert_eq!(LookupBudget::DEFAULT.mb(), 1024);
        assert_eq!(
            LookupBudget::from_mb(LookupBudget::MAX_MB).unwrap().mb(),
            LookupBudget::MAX_MB
        );
        let e = LookupBudget::from_mb(5_000_000).unwrap_err();
        assert!(e.to_string().contains("1 TB"), "{e}");
    }
}
