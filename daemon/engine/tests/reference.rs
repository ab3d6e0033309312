//! Whole-engine checks against values computed outside this project. Each value names its source.

use auspex_engine::count::{CountDist, CountParams};
use auspex_engine::engine::{Decoder, Engine, EngineConfig, EngineSink, Frame};
use auspex_engine::model::{CellSpec, CellSummary, Model, ModelSpec};
use auspex_engine::{LookupBudget, PreparedModel};
use statrs::distribution::{Beta, Continuous};
use std::sync::Arc;

#[derive(Default)]
struct Frames(Vec<(u64, u32, Vec<f64>)>);
impl EngineSink for Frames {
    fn frame(&mut self, f: &Frame<'_>) {
        self.0.push((f.trial, f.bin, f.posterior.to_vec()));
    }
}

fn cell(count: CountParams, timing: Vec<f64>) -> CellSpec {
    CellSpec {
        count,
        timing,
        summary: CellSummary::default(),
    }
}

fn model(
    bin_width_s: f64,
    stimuli: &[&str],
    units: &[u32],
    cells: Vec<CellSpec>,
) -> Arc<PreparedModel> {
    let n_bins = cells[0].timing.len() as u32;
    Arc::new(
        Model::new(ModelSpec {
            bin_width_s,
            n_bins,
            stimuli: stimuli.iter().map(|s| s.to_string()).collect(),
            units: units.to_vec(),
            prior: vec![1.0 / stimuli.len() as f64; stimuli.len()],
            cells,
            calibration: Default::default(),
            unit_groups: Vec::new(),
        })
        .unwrap(),
    )
    .prepare(LookupBudget::DEFAULT)
}

/// Stimulus A: uniform density on [0, 0.1 s], Poisson(4). B: density ∝ e^(−30t), negative
/// binomial r = 2, mean 6. 1 ms bins (shared/REFERENCE-VALUES.md, "Whole decoder", derived and
/// confirmed by Monte Carlo with 2×10⁷ trials per stimulus).
fn two_stimulus_model() -> Arc<PreparedModel> {
    let qa = vec![0.01; 100];
    let z = 1.0 - (-3.0f64).exp();
    let qb: Vec<f64> = (0..100)
        .map(|b| ((-30.0 * b as f64 / 1000.0).exp() - (-30.0 * (b + 1) as f64 / 1000.0).exp()) / z)
        .collect();
    model(
        0.001,
        &["A", "B"],
        &[7],
        vec![
            cell(CountParams::Poisson { mean: 4.0 }, qa),
            cell(
                CountParams::NegativeBinomial {
                    mean: 6.0,
                    shape: 2.0,
                },
                qb,
            ),
        ],
    )
}

#[test]
fn whole_decoder_matches_reference_values() {
    let m = two_stimulus_model();
    let mut e = Engine::new(m.clone(), EngineConfig::new(1000.0)).unwrap();
    let mut out = Frames::default();
    e.open_trial(1, 0, None, &mut out).unwrap();
    e.spike(7, 12).unwrap();
    e.spike(7, 30).unwrap();
    e.advance(49, &mut out).unwrap();
    // A second trial, silent: through 20 ms P(A) = 0.7253664 (likelihoods 0.4493289641,
    // 0.1701220514).
    let mut silent = Frames::default();
    let mut e2 = Engine::new(m.clone(), EngineConfig::new(1000.0)).unwrap();
    e2.open_trial(2, 0, None, &mut silent).unwrap();
    e2.advance(19, &mut silent).unwrap();
    let at19 = &silent.0[19].2;
    assert!(
        (at19[0] - 0.7253664).abs() < 1e-7,
        "P(A) after 20 ms silence = {}",
        at19[0]
    );
    // Spikes at 12 and 30 ms, evaluated at 50 ms with 1 ms bins: P(A) = 0.6749852.
    let at49 = &out.0[49].2;
    assert_eq!(out.0[49].1, 49);
    assert!(
        (at49[0] - 0.6749852).abs() < 1e-7,
        "P(A) at 50 ms = {}",
        at49[0]
    );
}

#[test]
fn partial_likelihoods_match_reference_values() {
    // Same scenario, the likelihood values themselves: 2.16536453e−4 and 1.04265329e−4.
    let m = two_stimulus_model();
    let s = m.survival(0, 0, 49);
    let la = m.timing(0, 0)[12].ln() + m.timing(0, 0)[30].ln() + m.count(0, 0).ln_gf_deriv(2, s);
    let sb = m.survival(0, 1, 49);
    let lb = m.timing(0, 1)[12].ln() + m.timing(0, 1)[30].ln() + m.count(0, 1).ln_gf_deriv(2, sb);
    assert!(
        (la.exp() / 2.16536453e-4 - 1.0).abs() < 1e-7,
        "{}",
        la.exp()
    );
    assert!(
        (lb.exp() / 1.04265329e-4 - 1.0).abs() < 1e-7,
        "{}",
        lb.exp()
    );
}

#[test]
fn population_poisson_decoding_matches_zhang_et_al() {
    // Zhang, Ginzburg, McNaughton & Sejnowski (1998): rates A = (10, 20, 5) Hz, B = (30, 5, 5) Hz,
    // τ = 0.1 s, counts (2, 0, 1), flat prior: P(A) = 0.1548281. Silence for 20 ms: 0.5249792.
    let q = vec![0.01; 100];
    let (ra, rb) = ([10.0, 20.0, 5.0], [30.0, 5.0, 5.0]);
    let mut cells = Vec::new();
    for u in 0..3 {
        cells.push(cell(CountParams::Poisson { mean: ra[u] * 0.1 }, q.clone()));
        cells.push(cell(CountParams::Poisson { mean: rb[u] * 0.1 }, q.clone()));
    }
    let m = model(0.001, &["A", "B"], &[1, 2, 3], cells);
    let spikes = [(1u32, 40i64), (1, 70), (3, 55)];
    // Count-only at the window end.
    let mut cfg = EngineConfig::new(1000.0);
    cfg.decoder = Decoder::CountOnly;
    let mut e = Engine::new(m.clone(), cfg).unwrap();
    let mut out = Frames::default();
    e.open_trial(1, 0, None, &mut out).unwrap();
    for (u, t) in spikes {
        e.spike(u, t).unwrap();
    }
    e.advance(99, &mut out).unwrap();
    assert!((out.0[99].2[0] - 0.1548281).abs() < 1e-7);
    // Every decoder gives the same answer at the window end with Poisson counts and flat timing.
    for dec in [Decoder::OrderStats, Decoder::InhomogeneousPoisson] {
        let mut cfg = EngineConfig::new(1000.0);
        cfg.decoder = dec;
        let mut e = Engine::new(m.clone(), cfg).unwrap();
        let mut out = Frames::default();
        e.open_trial(1, 0, None, &mut out).unwrap();
        for (u, t) in spikes {
            e.spike(u, t).unwrap();
        }
        e.advance(99, &mut out).unwrap();
        assert!((out.0[99].2[0] - 0.1548281).abs() < 1e-7, "{dec:?}");
        // Silence through 20 ms.
        assert!((out.0[19].2[0] - 0.5249792).abs() < 1e-7, "{dec:?}");
    }
}

#[test]
fn order_statistic_densities_match_beta() {
    // David & Nagaraja (2003) §2.1: the k-th of n i.i.d. uniforms is Beta(k, n−k+1). With a count
    // distribution concentrated on n, Φ^(k)(1−x) = n!/(n−k)!·(1−x)^(n−k), so the density of the k-th
    // spike at x is x^(k−1)/(k−1)!·Φ^(k)(1−x). Checked against statrs' Beta and the tabulated values.
    for (k, n, x, table) in [
        (2u32, 5u32, 0.3f64, 2.058f64),
        (4, 4, 0.9, 2.916),
        (3, 7, 0.5, 1.640625),
    ] {
        let mut pmf = vec![1e-16; n as usize + 1];
        pmf[n as usize] = 1.0 - 1e-16 * n as f64;
        let d = CountDist::new(CountParams::Empirical { pmf }).unwrap();
        let lf = statrs::function::factorial::ln_factorial((k - 1) as u64);
        let dens = ((k - 1) as f64 * x.ln() - lf + d.ln_gf_deriv(k, 1.0 - x)).exp();
        let beta = Beta::new(k as f64, (n - k + 1) as f64).unwrap().pdf(x);
        assert!(
            (dens - beta).abs() < 1e-9,
            "k={k} n={n}: {dens} vs statrs {beta}"
        );
        assert!(
            (dens - table).abs() < 1e-9,
            "k={k} n={n}: {dens} vs table {table}"
        );
    }
}

#[test]
fn poisson_case_equals_inhomogeneous_poisson_likelihood() {
    // With Poisson counts the model is the inhomogeneous Poisson process (DESIGN.md): the two
    // decoders must agree bin for bin.
    let q: Vec<f64> = (0..50)
        .map(|b| 1.0 + (b as f64 / 7.0).sin().abs())
        .collect();
    let s: f64 = q.iter().sum();
    let q: Vec<f64> = q.iter().map(|x| x / s).collect();
    let q2: Vec<f64> = q.iter().rev().copied().collect();
    let m = model(
        0.002,
        &["x", "y"],
        &[1],
        vec![
            cell(CountParams::Poisson { mean: 3.0 }, q),
            cell(CountParams::Poisson { mean: 5.0 }, q2),
        ],
    );
    let run = |dec| {
        let mut cfg = EngineConfig::new(10_000.0);
        cfg.decoder = dec;
        let mut e = Engine::new(m.clone(), cfg).unwrap();
        let mut out = Frames::default();
        e.open_trial(9, 1000, None, &mut out).unwrap();
        for t in [1003, 1100, 1101, 1500, 1777] {
            e.spike(1, t).unwrap();
        }
        e.advance(1000 + 20 * 50, &mut out).unwrap();
        out.0
    };
    let (a, b) = (run(Decoder::OrderStats), run(Decoder::InhomogeneousPoisson));
    assert_eq!(a.len(), 50);
    for (x, y) in a.iter().zip(&b) {
        assert!((x.2[0] - y.2[0]).abs() < 1e-12);
    }
}

/// A small deterministic generator (SplitMix64) so the Monte Carlo check does not reuse the
/// simulator under test.
struct SplitMix(u64);
impl SplitMix {
    fn next(&mut self) -> f64 {
        self.0 = self.0.wrapping_add(0x9E3779B97F4A7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58476D1CE4E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D049BB133111EB);
        ((z ^ (z >> 31)) >> 11) as f64 / (1u64 << 53) as f64
    }
}

#[test]
fn partial_trial_likelihood_matches_monte_carlo() {
    // Model: count ~ COM-Poisson(λ=2, ν=0.7) (over-dispersed), timing q = (0.1, 0.2, 0.3, 0.4).
    // Event after bin 1: one spike in bin 0, none in bin 1. The likelihood (generating-function
    // form, DESIGN.md) is q0·Φ^(1)(S(1)); Monte Carlo draws n from the pmf and n bins from q.
    let q: [f64; 4] = [0.1, 0.2, 0.3, 0.4];
    let d = CountDist::new(CountParams::ComPoisson {
        lambda: 2.0,
        nu: 0.7,
    })
    .unwrap();
    let s1 = 0.7;
    let want = q[0].ln() + d.ln_gf_deriv(1, s1);
    let cdf: Vec<f64> = d
        .pmf()
        .iter()
        .scan(0.0, |a, p| {
            *a += p;
            Some(*a)
        })
        .collect();
    let mut rng = SplitMix(12345);
    let trials = 400_000;
    let mut hits = 0u64;
    for _ in 0..trials {
        let u = rng.next();
        let n = cdf.partition_point(|&c| c < u);
        let (mut c0, mut c1) = (0, 0);
        for _ in 0..n {
            let v = rng.next();
            if v < 0.1 {
                c0 += 1;
            } else if v < 0.3 {
                c1 += 1;
            }
        }
        if c0 == 1 && c1 == 0 {
            hits += 1;
        }
    }
    let p = hits as f64 / trials as f64;
    let se = (p * (1.0 - p) / trials as f64).sqrt();
    assert!(
        (p - want.exp()).abs() < 4.0 * se,
        "MC {p} ± {se} vs {}",
        want.exp()
    );
}

#[derive(Default)]
struct Summaries(Vec<(Vec<f64>, Vec<u32>)>);
impl EngineSink for Summaries {
    fn unit_summaries(&mut self, s: &auspex_engine::engine::UnitSummaries<'_>) {
        self.0
            .push((s.presented_posterior.to_vec(), s.decoded.to_vec()));
    }
}

/// Each unit's summary at the end of a labelled trial is its own full-window posterior: with
/// S = 0 at the window's end, `Φ^(k)(0) = k!·P(k)`, so unit u's log-likelihood of stimulus s is
/// `Σ_spikes ln q_us(b) + ln P_us(k)` up to terms equal for every stimulus (design note, "The
/// decoding mathematics"). Here `P_us` comes from statrs (`NegativeBinomial(r, p)` with
/// p = r/(r+μ), `Poisson(μ)`), not from this project's count code.
#[test]
fn unit_summaries_are_each_units_full_window_posterior() {
    use statrs::distribution::{Discrete, NegativeBinomial, Poisson};
    let bins = 40;
    // Three units × three stimuli: responses peaking at different bins, counts of both families.
    let q = |peak: f64| -> Vec<f64> {
        let w: Vec<f64> = (0..bins)
            .map(|b| 0.2 + (-((b as f64 - peak) / 4.0).powi(2)).exp())
            .collect();
        let z: f64 = w.iter().sum();
        w.iter().map(|x| x / z).collect()
    };
    let counts = |u: usize, s: usize| -> CountParams {
        let mean = 2.0 + (u * 3 + s * 5) as f64 % 7.0;
        if u == 1 {
            CountParams::Poisson { mean }
        } else {
            CountParams::NegativeBinomial {
                mean,
                shape: 1.5 + u as f64,
            }
        }
    };
    let mut cells = Vec::new();
    for u in 0..3 {
        for s in 0..3 {
            cells.push(cell(counts(u, s), q(5.0 + 10.0 * s as f64 + u as f64)));
        }
    }
    let m = model(0.001, &["a", "b", "c"], &[11, 12, 13], cells);
    let timing: Vec<Vec<f64>> = m.spec().cells.iter().map(|c| c.timing.clone()).collect();
    // Spikes (unit id, bin): unit 11 four, unit 12 one, unit 13 none (silence tells too).
    let spikes = [(11u32, 3i64), (11, 14), (11, 15), (11, 31), (12, 22)];
    let mut e = Engine::new(m, EngineConfig::new(1000.0)).unwrap();
    let mut sink = Summaries::default();
    e.open_trial(1, 0, Some(1), &mut sink).unwrap();
    for b in 0..bins as i64 {
        for &(u, t) in spikes.iter().filter(|s| s.1 == b) {
            e.spike(u, t).unwrap();
        }
        e.advance(b, &mut sink).unwrap();
    }
    assert_eq!(
        sink.0.len(),
        1,
        "one labelled trial, one set of unit summaries"
    );
    let (presented, decoded) = &sink.0[0];
    for (ui, unit) in [11u32, 12, 13].iter().enumerate() {
        let mine: Vec<i64> = spikes
            .iter()
            .filter(|s| s.0 == *unit)
            .map(|s| s.1)
            .collect();
        let k = mine.len() as u64;
        let ll: Vec<f64> = (0..3)
            .map(|s| {
                let pk = match counts(ui, s) {
                    CountParams::Poisson { mean } => Poisson::new(mean).unwrap().pmf(k),
                    CountParams::NegativeBinomial { mean, shape } => {
                        NegativeBinomial::new(shape, shape / (shape + mean))
                            .unwrap()
                            .pmf(k)
                    }
                    _ => unreachable!(),
                };
                let q = &timing[ui * 3 + s];
                mine.iter().map(|&b| q[b as usize].ln()).sum::<f64>() + pk.ln()
            })
            .collect();
        // Uniform prior: the posterior is the softmax of the log-likelihoods.
        let top = ll.iter().copied().fold(f64::NEG_INFINITY, f64::max);
        let z: f64 = ll.iter().map(|l| (l - top).exp()).sum();
        let want = (ll[1] - top).exp() / z;
        let got = presented[ui];
        assert!(
            (got - want).abs() < 1e-12,
            "unit {unit}: posterior of the presented stimulus {got} vs {want} (statrs)"
        );
        let best = (0..3).max_by(|&a, &b| ll[a].total_cmp(&ll[b])).unwrap() as u32;
        assert_eq!(decoded[ui], best, "unit {unit}: decoded stimulus");
    }
}
