//! The memory budget holds for any declared sizes: a model of random shape (units, stimuli,
//! bins, count-table lengths through the Poisson mean) either builds — and then its estimate
//! was within the budget — or is refused with `OverBudget` before any large allocation. The
//! allocations are measured by a counting allocator around the system one: the peak while
//! building stays under the budget plus a fixed margin either way.

use auspex_engine::budget;
use auspex_engine::model::ModelError;
use auspex_engine::{CellSpec, CellSummary, CountParams, Model, ModelSpec};
use proptest::prelude::*;
use std::alloc::{GlobalAlloc, Layout, System};
use std::sync::atomic::{AtomicUsize, Ordering};

struct Counting;
static NOW: AtomicUsize = AtomicUsize::new(0);
static PEAK: AtomicUsize = AtomicUsize::new(0);

// SAFETY: every call is passed to the system allocator unchanged; only counters are added.
unsafe impl GlobalAlloc for Counting {
    unsafe fn alloc(&self, l: Layout) -> *mut u8 {
        let p = System.alloc(l);
        if !p.is_null() {
            let now = NOW.fetch_add(l.size(), Ordering::Relaxed) + l.size();
            PEAK.fetch_max(now, Ordering::Relaxed);
        }
        p
    }
    unsafe fn dealloc(&self, p: *mut u8, l: Layout) {
        System.dealloc(p, l);
        NOW.fetch_sub(l.size(), Ordering::Relaxed);
    }
}

#[global_allocator]
static ALLOC: Counting = Counting;

const BUDGET_MB: u64 = 64;
/// Allowed beyond the budget: small structures the checks do not count (names, indexes).
const MARGIN: usize = 16 << 20;

proptest! {
    #![proptest_config(ProptestConfig { cases: 48, ..ProptestConfig::default() })]

    #[test]
    fn a_model_is_built_within_the_budget_or_refused_before_allocating(
        nu in 1usize..40,
        ns in 2usize..6000,
        nb in 1usize..4,
        mean in 0.5f64..18_000.0,
    ) {
        prop_assume!(nu * ns <= 60_000);
        budget::set_mb(BUDGET_MB);
        let cells: Vec<CellSpec> = (0..nu * ns)
            .map(|_| CellSpec {
                count: CountParams::Poisson { mean },
                timing: vec![1.0 / nb as f64; nb],
                summary: CellSummary::default(),
            })
            .collect();
        let spec = ModelSpec { cells, ..ModelSpec::numbered(nu, ns, nb, Vec::new()) };
        let base = NOW.load(Ordering::Relaxed);
        PEAK.store(base, Ordering::Relaxed);
        let r = Model::new(spec);
        let peak = PEAK.load(Ordering::Relaxed) - base;
        let estimate = auspex_engine::model::decoding_bytes(nu, ns, nb);
        match r {
            Ok(_) => prop_assert!(estimate <= (BUDGET_MB << 20) as u128, "built over the estimate"),
            Err(ModelError::OverBudget(e)) => prop_assert!(e.need > e.budget as u128),
            Err(e) => return Err(TestCaseError::fail(format!("refused otherwise: {e}"))),
        }
        prop_assert!(
            peak <= (BUDGET_MB as usize) * (1 << 20) + MARGIN,
            "peak {peak} bytes while building {nu} × {ns} × {nb} (mean {mean})"
        );
    }
}
