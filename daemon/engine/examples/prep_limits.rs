//! Model preparation time at the limits the engine states: how long `Model::new` and
//! `Model::prepare` (the per-bin tables a model needs before it decodes) take for the worst
//! models a file may hold. Run: `cargo run --release -p auspex-engine --example prep_limits`.
//! The figures are recorded in BENCHMARKS.md ("Model preparation at its limits").

use auspex_engine::count::CountParams;
use auspex_engine::model::{CellSpec, CellSummary, Model, ModelSpec};
use auspex_engine::LookupBudget;
use std::sync::Arc;
use std::time::Instant;

fn model(
    nu: usize,
    ns: usize,
    nb: usize,
    count: impl Fn(usize, usize) -> CountParams,
) -> ModelSpec {
    let timing: Vec<f64> = (0..nb).map(|b| 1.0 + (b % 17) as f64).collect();
    let z: f64 = timing.iter().sum();
    let timing: Vec<f64> = timing.iter().map(|x| x / z).collect();
    let cells = (0..nu * ns)
        .map(|i| CellSpec {
            count: count(i / ns, i % ns),
            timing: timing.clone(),
            summary: CellSummary::default(),
        })
        .collect();
    ModelSpec::numbered(nu, ns, nb, cells)
}

fn time(name: &str, spec: ModelSpec) {
    let t0 = Instant::now();
    let m = Arc::new(Model::new(spec).expect("valid model"));
    let built = t0.elapsed().as_secs_f64();
    let t1 = Instant::now();
    let m = m.prepare(LookupBudget::DEFAULT);
    let prepared = t1.elapsed().as_secs_f64();
    println!(
        "{name:<62} new {built:>6.2} s  prepare {prepared:>6.2} s  total {:>6.2} s  tables {:>5} MB",
        built + prepared,
        m.table_bytes() >> 20
    );
}

fn main() {
    println!("model preparation at the engine's limits (1 GB lookup budget, the daemon's default)");
    // Huge-rate COM-Poisson cells: count tables of thousands, beyond the fast form; the lookup
    // build is capped at PREP_TERMS_MAX table terms.
    time(
        "64 units × 16 stimuli × 250 bins, COM-Poisson λ 3000–6000",
        model(64, 16, 250, |u, s| CountParams::ComPoisson {
            lambda: 3000.0 + 100.0 * ((u + s) % 31) as f64,
            nu: 1.0,
        }),
    );
    // The largest lookup within the budget: 1024 × 64 table-family cells at realistic rates.
    time(
        "1024 units × 64 stimuli × 250 bins, COM-Poisson λ 2–8",
        model(1024, 64, 250, |u, s| CountParams::ComPoisson {
            lambda: 2.0 + ((u * 3 + s) % 7) as f64,
            nu: 0.9,
        }),
    );
    time(
        "1024 units × 64 stimuli × 250 bins, empirical (40 counts)",
        model(1024, 64, 250, |u, s| {
            let pmf: Vec<f64> = (0..40)
                .map(|n| 1.0 / (1.0 + ((n + u + s) % 9) as f64))
                .collect();
            let z: f64 = pmf.iter().sum();
            CountParams::Empirical {
                pmf: pmf.iter().map(|p| p / z).collect(),
            }
        }),
    );
    // The longest window a model may have (1 000 000 bins).
    time(
        "2 units × 2 stimuli × 1 000 000 bins, COM-Poisson λ 5",
        model(2, 2, 1_000_000, |_, _| CountParams::ComPoisson {
            lambda: 5.0,
            nu: 1.0,
        }),
    );
    time(
        "4096 units × 64 stimuli × 250 bins, negative binomial",
        model(4096, 64, 250, |u, s| CountParams::NegativeBinomial {
            mean: 2.0 + ((u + s) % 5) as f64,
            shape: 3.0,
        }),
    );
}
