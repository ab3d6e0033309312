//! Synthetic models and trials shared by the engine benchmark and the `profile_trials` example,
//! so both measure the same thing: 250 bins of 1 ms, a response bump at a unit- and
//! stimulus-dependent latency over a flat floor, count means spread ±25% around `mean_count`.
#![allow(dead_code)]

use auspex_engine::count::CountParams;
use auspex_engine::engine::{Engine, NullSink};
use auspex_engine::model::{CellSpec, CellSummary, Model, ModelSpec};
use auspex_engine::{LookupBudget, PreparedModel};
use std::sync::Arc;

/// Window bins.
pub const BINS: usize = 250;

/// A model of `nu` units × `ns` stimuli, every cell of `family` (poisson, negative_binomial,
/// com_poisson, empirical).
pub fn model_at(nu: usize, ns: usize, family: &str, mean_count: f64) -> Arc<PreparedModel> {
    let mut cells = Vec::with_capacity(nu * ns);
    for u in 0..nu {
        for s in 0..ns {
            let mean = mean_count * (0.75 + 0.5 * (((u * 7 + s * 3) % 11) as f64 / 10.0));
            let count = match family {
                "poisson" => CountParams::Poisson { mean },
                "negative_binomial" => CountParams::NegativeBinomial { mean, shape: 8.0 },
                "com_poisson" => CountParams::ComPoisson {
                    lambda: mean.powf(0.8),
                    nu: 0.8,
                },
                _ => {
                    let d = auspex_engine::CountDist::new(CountParams::NegativeBinomial {
                        mean,
                        shape: 8.0,
                    })
                    .unwrap();
                    CountParams::Empirical {
                        pmf: d.pmf().to_vec(),
                    }
                }
            };
            let centre = 20.0 + ((u + s) % 9) as f64 * 15.0;
            let q: Vec<f64> = (0..BINS)
                .map(|b| 0.2 + (-((b as f64 - centre) / 12.0).powi(2)).exp())
                .collect();
            let z: f64 = q.iter().sum();
            cells.push(CellSpec {
                count,
                timing: q.iter().map(|x| x / z).collect(),
                summary: CellSummary::default(),
            });
        }
    }
    Arc::new(Model::new(ModelSpec::numbered(nu, ns, BINS, cells)).unwrap())
        .prepare(LookupBudget::DEFAULT)
}

/// Spike bins of one trial: each unit fires `mean_count` spikes spread over the window
/// (deterministic LCG); entries are (unit, tick offset from onset).
pub fn trial_spikes_at(nu: usize, mean_count: f64) -> Vec<Vec<(u32, i64)>> {
    let mut per_bin = vec![Vec::new(); BINS];
    let mut x = 12345u64;
    for u in 0..nu {
        for _ in 0..mean_count as usize {
            x = x
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            let b = (x >> 33) as usize % BINS;
            per_bin[b].push((u as u32, b as i64));
        }
    }
    per_bin
}

/// One iteration: open a trial, feed its spikes bin by bin, advance through all its bins.
pub fn decode_trial(e: &mut Engine, trial: &mut u64, onset: &mut i64, spikes: &[Vec<(u32, i64)>]) {
    *trial += 1;
    e.open_trial(*trial, *onset, Some(0), &mut NullSink)
        .unwrap();
    for (bin, sp) in spikes.iter().enumerate() {
        for &(u, t) in sp {
            e.spike(u, *onset + t).unwrap();
        }
        e.advance(*onset + bin as i64, &mut NullSink).unwrap();
    }
    *onset += BINS as i64;
}
