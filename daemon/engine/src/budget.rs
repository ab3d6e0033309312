//! One memory budget per process, checked where sizes from outside (tables, model files,
//! recordings, the wire, scenarios, settings) are multiplied out — *before* the memory is asked
//! for. A request over budget is refused with the sizes, the memory it would need and the
//! setting that allows it, instead of the process aborting on a failed allocation (on a rig: a
//! daemon that dies mid-recording because a file or a sender declared too much).
//!
//! The budget bounds each large structure an operation builds from outside sizes (the trial
//! windows of a fit, a model's tables, the per-unit tallies, a validation's matrices), not the
//! process's whole resident memory; the default leaves room for several at once on a machine
//! with 8 GB.
//!
//! Must not: allocate to find out.

use std::sync::atomic::{AtomicU64, Ordering};

/// The default budget, MB (`--memory-budget-mb`, TOML `memory_budget_mb`).
pub const DEFAULT_MB: u64 = 2048;

static BUDGET_BYTES: AtomicU64 = AtomicU64::new(DEFAULT_MB << 20);

/// Sets this process's budget (MB, at least 1).
pub fn set_mb(mb: u64) {
    BUDGET_BYTES.store(mb.max(1).saturating_mul(1 << 20), Ordering::Relaxed);
}

/// This process's budget, bytes.
pub fn bytes() -> u64 {
    BUDGET_BYTES.load(Ordering::Relaxed)
}

/// A structure that would not fit in the budget.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
#[error("{what} ({sizes}) would need {}, over the memory budget of {} — refused before asking for it; if the machine has the memory, raise the budget: `auspex --memory-budget-mb MB …`, `auspexd --memory-budget-mb MB` or `memory_budget_mb` in its TOML", human(*.need), human(*.budget as u128))]
pub struct OverBudget {
    /// What would have been built.
    pub what: String,
    /// The sizes it follows from, as the user gave them.
    pub sizes: String,
    /// Bytes it would need.
    pub need: u128,
    /// The budget, bytes.
    pub budget: u64,
}

/// Checks that `bytes` (a product of outside sizes, computed without overflow in u128) fits
/// the budget.
pub fn check(what: &str, sizes: impl FnOnce() -> String, bytes: u128) -> Result<(), OverBudget> {
    let budget = self::bytes();
    if bytes <= budget as u128 {
        Ok(())
    } else {
        Err(OverBudget {
            what: what.to_string(),
            sizes: sizes(),
            need: bytes,
            budget,
        })
    }
}

/// The product of sizes, in u128 (no overflow for any product of a few u64 sizes).
pub fn product(sizes: &[u128]) -> u128 {
    sizes.iter().fold(1u128, |a, &b| a.saturating_mul(b))
}

/// Bytes for a person: "512 B", "3.4 MB", "6.9 GB", "1.2e6 TB".
pub fn human(bytes: u128) -> String {
    let b = bytes as f64;
    if b < 1e3 {
        format!("{bytes} B")
    } else if b < 1e6 {
        format!("{:.1} kB", b / 1e3)
    } else if b < 1e9 {
        format!("{:.1} MB", b / 1e6)
    } else if b < 1e12 {
        format!("{:.1} GB", b / 1e9)
    } else if b < 1e15 {
        format!("{:.1} TB", b / 1e12)
    } else {
        format!("{:.1e} TB", b / 1e12)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn over_budget_says_what_how_much_and_which_setting() {
        let e = check(
            "the trial windows",
            || "12500 units × 12500 trials".into(),
            4_375_000_000,
        )
        .unwrap_err();
        let t = e.to_string();
        assert!(t.contains("12500 units × 12500 trials"), "{t}");
        assert!(
            t.contains("4.4 GB") && t.contains("--memory-budget-mb"),
            "{t}"
        );
        assert!(check("small", String::new, 1 << 20).is_ok());
        assert_eq!(product(&[u64::MAX as u128, u64::MAX as u128, 9]), u128::MAX);
    }
}
