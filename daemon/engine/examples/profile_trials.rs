//! Decodes synthetic trials in a loop for a profiler (`perf record`, `valgrind --tool=callgrind`),
//! with nothing else in the process: `cargo run --release -p auspex-engine --example
//! profile_trials -- FAMILY UNITS STIMULI SPIKES_PER_WINDOW TRIALS`
//! (FAMILY: poisson, negative_binomial, com_poisson or empirical). The models and trials are the
//! criterion benchmark's (`benches/common`). Prints µs per bin.

#[path = "../benches/common/mod.rs"]
mod common;

use auspex_engine::engine::{Engine, EngineConfig};
use common::{decode_trial, model_at, trial_spikes_at, BINS};

fn main() {
    let a: Vec<String> = std::env::args().collect();
    let arg = |i: usize, d: &str| a.get(i).cloned().unwrap_or_else(|| d.to_string());
    let family = arg(1, "com_poisson");
    let nu: usize = arg(2, "1024").parse().expect("units");
    let ns: usize = arg(3, "64").parse().expect("stimuli");
    let count: f64 = arg(4, "4").parse().expect("spikes per window");
    let trials: usize = arg(5, "40").parse().expect("trials");
    let t = std::time::Instant::now();
    let m = model_at(nu, ns, &family, count);
    eprintln!("built and prepared in {:.2} s", t.elapsed().as_secs_f64());
    let mut e = Engine::new(m, EngineConfig::new(1000.0)).expect("engine");
    let spikes = trial_spikes_at(nu, count);
    let (mut trial, mut onset) = (0u64, 0i64);
    let t = std::time::Instant::now();
    for _ in 0..trials {
        decode_trial(&mut e, &mut trial, &mut onset, &spikes);
    }
    println!(
        "{family} {nu}×{ns}, {count} spikes per window: {:.1} µs per bin",
        t.elapsed().as_secs_f64() * 1e6 / (trials * BINS) as f64
    );
}
