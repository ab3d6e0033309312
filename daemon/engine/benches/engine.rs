//! Per-bin engine update at several sizes, for each count family and decoder.
//! One iteration decodes a whole 250-bin trial (open + 250 bins); criterion's throughput is in
//! bins, so "elem/s" is bins per second and real time is 1000 bins/s at 1 ms bins.
//! Each decoder runs on the summed path (the default) and on the per-cell reference path, so
//! the before/after of the per-model sums is measured in one run; `window_end_frame_16hz` times
//! the window's last bin alone, up to its frame (where a window-end decision comes from).
//! Run: `cargo bench -p auspex-engine --bench engine` (set AUSPEX_BENCH_LARGE=1 for 4096×64).

use auspex_engine::engine::{Decoder, Engine, EngineConfig, EngineSink, Frame, NullSink};
use auspex_engine::{LookupBudget, PreparedModel};
use criterion::{criterion_group, criterion_main, BenchmarkId, Criterion, Throughput};
use std::sync::Arc;

mod common;
use common::{decode_trial, model_at, trial_spikes_at, BINS};

const MEAN_COUNT: f64 = 32.0; // counts reach about 64 in the upper tail
/// The realistic-firing group: 4 spikes per window, 16 spikes/s.
const REALISTIC_COUNT: f64 = 4.0;

fn model(nu: usize, ns: usize, family: &str) -> Arc<PreparedModel> {
    model_at(nu, ns, family, MEAN_COUNT)
}

fn trial_spikes(nu: usize) -> Vec<Vec<(u32, i64)>> {
    trial_spikes_at(nu, MEAN_COUNT)
}

fn bench(c: &mut Criterion) {
    let mut sizes = vec![(64, 8), (256, 32), (1024, 64)];
    if std::env::var("AUSPEX_BENCH_LARGE").is_ok() {
        sizes.push((4096, 64));
    }
    let mut g = c.benchmark_group("trial_250_bins");
    g.sample_size(10);
    g.warm_up_time(std::time::Duration::from_secs(1));
    g.measurement_time(std::time::Duration::from_secs(3));
    g.throughput(Throughput::Elements(BINS as u64));
    for &(nu, ns) in &sizes {
        let spikes = trial_spikes(nu);
        for family in ["poisson", "negative_binomial", "com_poisson", "empirical"] {
            let table = family == "com_poisson" || family == "empirical";
            if table && nu > 1024 {
                continue; // tens of seconds per trial at 4096×64; measured up to 1024×64
            }
            let m = model(nu, ns, family);
            let decoders: &[Decoder] = if family == "poisson" {
                &Decoder::ALL
            } else {
                &[Decoder::OrderStats]
            };
            for (&dec, reference) in decoders
                .iter()
                .flat_map(|d| [(d, false), (d, true)])
                .filter(|(d, _)| **d != Decoder::CountOnly)
            {
                let mut cfg = EngineConfig::new(1000.0);
                cfg.decoder = dec;
                cfg.per_cell_reference = reference;
                let path = if reference { "per-cell" } else { "summed" };
                let mut e = Engine::new(m.clone(), cfg).unwrap();
                let mut trial = 0u64;
                let mut onset = 0i64;
                g.bench_function(
                    BenchmarkId::new(
                        format!("{family}/{}/{path}", dec.name()),
                        format!("{nu}x{ns}"),
                    ),
                    |b| b.iter(|| decode_trial(&mut e, &mut trial, &mut onset, &spikes)),
                );
            }
        }
    }
    g.finish();
    // Realistic firing (16 spikes/s per unit) at 1024 × 64, every family: most units are silent
    // in most bins and counts stay low, where COM-Poisson/empirical terms come from the lookup.
    let mut g = c.benchmark_group("trial_250_bins_16hz");
    g.sample_size(10);
    g.warm_up_time(std::time::Duration::from_secs(1));
    g.measurement_time(std::time::Duration::from_secs(3));
    g.throughput(Throughput::Elements(BINS as u64));
    let (nu, ns) = (1024, 64);
    let spikes = trial_spikes_at(nu, REALISTIC_COUNT);
    for family in ["poisson", "negative_binomial", "com_poisson", "empirical"] {
        let m = model_at(nu, ns, family, REALISTIC_COUNT);
        let mut e = Engine::new(m.clone(), EngineConfig::new(1000.0)).unwrap();
        let (mut trial, mut onset) = (0u64, 0i64);
        g.bench_function(BenchmarkId::new(family, format!("{nu}x{ns}")), |b| {
            b.iter(|| decode_trial(&mut e, &mut trial, &mut onset, &spikes))
        });
        eprintln!(
            "{family} {nu}x{ns} at 16 spikes/s: {:.0} MB of table-family terms, looked up for counts ≤ {:?}",
            m.table_bytes() as f64 / 1e6,
            m.table_lookup_counts()
        );
    }
    g.finish();
    // What calibration costs per bin: the same negative binomial trial, raw posterior against
    // temperature scaling (β on every bin) and temperature with a prior share ε.
    let mut g = c.benchmark_group("calibration_250_bins_16hz");
    g.sample_size(10);
    g.warm_up_time(std::time::Duration::from_secs(1));
    g.measurement_time(std::time::Duration::from_secs(3));
    g.throughput(Throughput::Elements(BINS as u64));
    let base = model_at(nu, ns, "negative_binomial", REALISTIC_COUNT);
    for (name, factors, floor) in [
        ("none", vec![], 0.0),
        ("temperature", vec![0.88; BINS], 0.0),
        ("temperature-floor", vec![0.88; BINS], 0.01),
    ] {
        let mut spec = base.spec().clone();
        spec.calibration.factors = factors;
        spec.calibration.floor = floor;
        let m = Arc::new(auspex_engine::Model::new(spec).unwrap()).prepare(LookupBudget::DEFAULT);
        let mut e = Engine::new(m, EngineConfig::new(1000.0)).unwrap();
        let (mut trial, mut onset) = (0u64, 0i64);
        g.bench_function(BenchmarkId::new(name, format!("{nu}x{ns}")), |b| {
            b.iter(|| decode_trial(&mut e, &mut trial, &mut onset, &spikes))
        });
    }
    g.finish();
    // The floor: only reading what a negative binomial bin needs once every unit has spiked —
    // one row of S values per unit from a [bin][unit][stimulus] table as large as the model's —
    // with one multiply-add each. The summed path's NB time is compared with this.
    let mut g = c.benchmark_group("read_floor_250_bins");
    g.sample_size(10);
    g.warm_up_time(std::time::Duration::from_secs(1));
    g.measurement_time(std::time::Duration::from_secs(3));
    g.throughput(Throughput::Elements(BINS as u64));
    for &(nu, ns) in &sizes {
        let table: Vec<f64> = (0..nu * BINS * ns)
            .map(|i| (i % 97) as f64 * 1e-3)
            .collect();
        let k: Vec<f64> = (0..nu).map(|u| (u % 7) as f64).collect();
        let mut post = vec![0.0f64; ns];
        g.bench_function(format!("{nu}x{ns}"), |b| {
            b.iter(|| {
                for bin in 0..BINS {
                    for u in 0..nu {
                        let row = &table[(bin * nu + u) * ns..(bin * nu + u + 1) * ns];
                        for (p, x) in post.iter_mut().zip(row) {
                            *p -= k[u] * x;
                        }
                    }
                }
                criterion::black_box(&post);
            })
        });
    }
    g.finish();
    // The window's last bin: from the advance that completes it to its frame (the one that
    // carries a window-end decision), realistic firing. Everything after the frame (the
    // per-unit summaries) is outside the timed span.
    let mut g = c.benchmark_group("window_end_frame_16hz");
    g.sample_size(10);
    g.warm_up_time(std::time::Duration::from_secs(1));
    g.measurement_time(std::time::Duration::from_secs(3));
    let mut cases = vec![(1024, 64, "negative_binomial"), (1024, 64, "com_poisson")];
    if std::env::var("AUSPEX_BENCH_LARGE").is_ok() {
        cases.push((4096, 64, "negative_binomial"));
    }
    for (nu, ns, family) in cases {
        let m = model_at(nu, ns, family, REALISTIC_COUNT);
        let spikes = trial_spikes_at(nu, REALISTIC_COUNT);
        let mut e = Engine::new(m, EngineConfig::new(1000.0)).unwrap();
        let (mut trial, mut onset) = (0u64, 0i64);
        g.bench_function(BenchmarkId::new(family, format!("{nu}x{ns}")), |b| {
            b.iter_custom(|iters| {
                let mut timed = std::time::Duration::ZERO;
                for _ in 0..iters {
                    trial += 1;
                    e.open_trial(trial, onset, Some(0), &mut NullSink).unwrap();
                    let mut sink = LastFrame::default();
                    for (bin, sp) in spikes.iter().enumerate() {
                        for &(u, t) in sp {
                            e.spike(u, onset + t).unwrap();
                        }
                        let t0 = std::time::Instant::now();
                        e.advance(onset + bin as i64, &mut sink).unwrap();
                        if bin + 1 == BINS {
                            timed += sink.at.expect("the last bin's frame") - t0;
                        }
                    }
                    onset += BINS as i64;
                }
                timed
            })
        });
    }
    g.finish();
    // Opening a trial alone (the per-trial reset of the scratch state).
    let mut g = c.benchmark_group("open_trial");
    for &(nu, ns) in &sizes {
        let m = model(nu, ns, "negative_binomial");
        let mut e = Engine::new(m, EngineConfig::new(1000.0)).unwrap();
        let mut trial = 0u64;
        g.bench_function(format!("{nu}x{ns}"), |b| {
            b.iter(|| {
                trial += 1;
                e.open_trial(trial, trial as i64 * 1000, None, &mut NullSink)
                    .unwrap();
                e.cancel(trial, &mut NullSink).unwrap();
            })
        });
    }
    g.finish();
}

/// Notes when the frame of a window's last bin arrives.
#[derive(Default)]
struct LastFrame {
    at: Option<std::time::Instant>,
}

impl EngineSink for LastFrame {
    fn frame(&mut self, frame: &Frame<'_>) {
        if frame.bin as usize + 1 == BINS {
            self.at = Some(std::time::Instant::now());
        }
    }
}

criterion_group!(benches, bench);
criterion_main!(benches);
