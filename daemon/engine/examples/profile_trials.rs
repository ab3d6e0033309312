//! Decodes synthetic trials in a loop for a profiler (`perf record`, `valgrind --tool=callgrind`),
//! with nothing else in the process: `cargo run --release -p auspex-engine --example
//! profile_trials -- FAMILY UNITS STIMULI SPIKES_PER_WINDOW TRIALS`
//! (FAMILY: poisson, negative_binomial, com_poisson or empirical). Prints µs per bin.

use auspex_engine::count::CountParams;
use auspex_engine::engine::{Engine, EngineConfig, NullSink};
use auspex_engine::model::{CellSpec, CellSummary, Model, ModelSpec};
use std::sync::Arc;

const BINS: usize = 250;

fn main() {
    let a: Vec<String> = std::env::args().collect();
    let arg = |i: usize, d: &str| a.get(i).cloned().unwrap_or_else(|| d.to_string());
    let family = arg(1, "com_poisson");
    let nu: usize = arg(2, "1024").parse().expect("units");
    let ns: usize = arg(3, "64").parse().expect("stimuli");
    let count: f64 = arg(4, "4").parse().expect("spikes per window");
    let trials: usize = arg(5, "40").parse().expect("trials");
    let mut cells = Vec::with_capacity(nu * ns);
    for u in 0..nu {
        for s in 0..ns {
            let mean = count * (0.75 + 0.5 * (((u * 7 + s * 3) % 11) as f64 / 10.0));
            let params = match family.as_str() {
                "poisson" => CountParams::Poisson { mean },
                "negative_binomial" => CountParams::NegativeBinomial { mean, shape: 8.0 },
                "com_poisson" => CountParams::ComPoisson {
                    lambda: mean.powf(0.8),
                    nu: 0.8,
                },
                _ => CountParams::Empirical {
                    pmf: auspex_engine::CountDist::new(CountParams::NegativeBinomial {
                        mean,
                        shape: 8.0,
                    })
                    .expect("valid")
                    .pmf()
                    .to_vec(),
                },
            };
            let centre = 20.0 + ((u + s) % 9) as f64 * 15.0;
            let q: Vec<f64> = (0..BINS)
                .map(|b| 0.2 + (-((b as f64 - centre) / 12.0).powi(2)).exp())
                .collect();
            let z: f64 = q.iter().sum();
            cells.push(CellSpec {
                count: params,
                timing: q.iter().map(|x| x / z).collect(),
                summary: CellSummary::default(),
            });
        }
    }
    let m = Arc::new(
        Model::new(ModelSpec {
            bin_width_s: 0.001,
            n_bins: BINS as u32,
            stimuli: (0..ns).map(|s| format!("s{s}")).collect(),
            units: (0..nu as u32).collect(),
            prior: vec![1.0; ns],
            cells,
        })
        .expect("valid model"),
    );
    let t = std::time::Instant::now();
    let mut e = Engine::new(m, EngineConfig::new(1000.0)).expect("engine");
    eprintln!("prepared in {:.2} s", t.elapsed().as_secs_f64());
    let mut x = 12345u64;
    let mut per_bin = vec![Vec::new(); BINS];
    for u in 0..nu {
        for _ in 0..count as usize {
            x = x
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            per_bin[(x >> 33) as usize % BINS].push(u as u32);
        }
    }
    let t = std::time::Instant::now();
    for trial in 0..trials {
        let onset = (trial * BINS) as i64;
        e.open_trial(trial as u64 + 1, onset, Some(0), &mut NullSink)
            .expect("open");
        for (b, units) in per_bin.iter().enumerate() {
            for &u in units {
                e.spike(u, onset + b as i64).expect("spike");
            }
            e.advance(onset + b as i64, &mut NullSink).expect("advance");
        }
    }
    println!(
        "{family} {nu}×{ns}, {count} spikes per window: {:.1} µs per bin",
        t.elapsed().as_secs_f64() * 1e6 / (trials * BINS) as f64
    );
}
