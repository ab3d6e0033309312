//! The `declared_sizes` fuzz target on stable, in a process of its own with an allocator that
//! records the largest single request and the peak of live bytes: for every saved input and
//! 600 generated ones, whatever the declared sizes (units, trials, stimuli, window and bin,
//! count parameters, each from 1 to ~10⁶), the paths either refuse or build within the target's
//! memory budget (64 MB) plus a fixed margin. This is the issue-27 property "refused before any
//! large allocation" measured, not assumed.

use auspex_e2e::fuzzing::{declared_sizes, DECLARED_SIZES_BUDGET_MB};
use std::alloc::{GlobalAlloc, Layout, System};
use std::sync::atomic::{AtomicUsize, Ordering::Relaxed};

struct Recording;
static LARGEST: AtomicUsize = AtomicUsize::new(0);
static LIVE: AtomicUsize = AtomicUsize::new(0);
static PEAK: AtomicUsize = AtomicUsize::new(0);

unsafe impl GlobalAlloc for Recording {
    unsafe fn alloc(&self, l: Layout) -> *mut u8 {
        LARGEST.fetch_max(l.size(), Relaxed);
        let live = LIVE.fetch_add(l.size(), Relaxed) + l.size();
        PEAK.fetch_max(live, Relaxed);
        System.alloc(l)
    }
    unsafe fn alloc_zeroed(&self, l: Layout) -> *mut u8 {
        LARGEST.fetch_max(l.size(), Relaxed);
        let live = LIVE.fetch_add(l.size(), Relaxed) + l.size();
        PEAK.fetch_max(live, Relaxed);
        System.alloc_zeroed(l)
    }
    unsafe fn dealloc(&self, p: *mut u8, l: Layout) {
        LIVE.fetch_sub(l.size(), Relaxed);
        System.dealloc(p, l)
    }
    unsafe fn realloc(&self, p: *mut u8, l: Layout, new: usize) -> *mut u8 {
        LARGEST.fetch_max(new, Relaxed);
        if new >= l.size() {
            let live = LIVE.fetch_add(new - l.size(), Relaxed) + (new - l.size());
            PEAK.fetch_max(live, Relaxed);
        } else {
            LIVE.fetch_sub(l.size() - new, Relaxed);
        }
        System.realloc(p, l, new)
    }
}

#[global_allocator]
static A: Recording = Recording;

/// What one input may hold at once, past what the process held before it: the budget (each
/// structure is checked against it) and a margin for what is built from a budgeted structure
/// (a fit's cells beside its windows, the engine's 8 MB lookup).
const MARGIN_MB: usize = 48;

fn run(name: &str, bytes: &[u8]) {
    let before = LIVE.load(Relaxed);
    PEAK.store(before, Relaxed);
    LARGEST.store(0, Relaxed);
    declared_sizes(bytes);
    let limit = (DECLARED_SIZES_BUDGET_MB as usize + MARGIN_MB) << 20;
    let (largest, peak) = (LARGEST.load(Relaxed), PEAK.load(Relaxed) - before);
    assert!(
        largest <= limit && peak <= limit,
        "{name}: largest single request {largest} B, peak {peak} B over the {} MB budget + {MARGIN_MB} MB (input {bytes:?})",
        DECLARED_SIZES_BUDGET_MB
    );
}

#[test]
fn declared_sizes_stay_within_the_budget_or_are_refused() {
    let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("fuzz");
    let mut saved = 0;
    for kind in ["seeds", "regressions"] {
        let Ok(entries) = std::fs::read_dir(dir.join(kind).join("declared_sizes")) else {
            continue;
        };
        let mut paths: Vec<_> = entries.filter_map(|e| e.ok()).map(|e| e.path()).collect();
        paths.sort();
        for p in paths {
            run(&p.display().to_string(), &std::fs::read(&p).unwrap());
            saved += 1;
        }
    }
    assert!(saved >= 10, "the seeds cover every path ({saved} ran)");
    // Generated: every path with sizes drawn over their whole range.
    let mut x: u64 = 0x2545_F491_4F6C_DD1D;
    for i in 0..600 {
        let mut bytes = vec![(i % 5) as u8];
        for _ in 0..(6 + i % 40) {
            x ^= x << 13;
            x ^= x >> 7;
            x ^= x << 17;
            bytes.push((x >> 24) as u8);
        }
        run(&format!("generated input {i}"), &bytes);
    }
}
