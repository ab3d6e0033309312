//! Shards and combiner: for random models (several blocks of units), random splits of the blocks
//! into parts and random spike trains, a combiner fed by shards' partials gives the same frames,
//! decisions and per-unit summaries as one whole engine, bit for bit — whatever order the
//! partials arrive in, before or after the combiner's own watermark.

use auspex_engine::count::CountParams;
use auspex_engine::engine::{
    Decision, Decoder, Engine, EngineConfig, EngineSink, Frame, Partial, Role, TrialEnd,
    UnitSummaries,
};
use auspex_engine::model::{CellSpec, CellSummary, Model, ModelSpec, UNIT_BLOCK};
use auspex_engine::{LookupBudget, PreparedModel};
use proptest::prelude::*;
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use std::sync::Arc;

/// A frame as bits: (trial, bin, posterior, log-likelihood, spikes).
type FrameBits = (u64, u32, Vec<u64>, Vec<u64>, u32);
/// A shard's partial, owned: (trial, bin, first block, values, spikes, unit rows at the end).
type OwnedPartial = (u64, u32, u32, Vec<f64>, u32, Option<(Vec<f64>, Vec<u32>)>);

/// Everything a whole engine or a combiner emits, as bits.
#[derive(Default, Debug, PartialEq)]
struct Out {
    frames: Vec<FrameBits>,
    decisions: Vec<(u64, u32, u64, u32)>,
    ends: Vec<(u64, u32, u32)>,
    units: Vec<(u64, Vec<u64>, Vec<u32>)>,
}

fn bits(x: &[f64]) -> Vec<u64> {
    x.iter().map(|v| v.to_bits()).collect()
}

impl EngineSink for Out {
    fn frame(&mut self, f: &Frame<'_>) {
        // Frames of different trials may interleave differently; each trial's own sequence
        // is compared (sorted below).
        self.frames.push((
            f.trial,
            f.bin,
            bits(f.posterior),
            bits(f.log_likelihood),
            f.spikes,
        ));
    }
    fn decision(&mut self, d: &Decision) {
        self.decisions
            .push((d.trial, d.stimulus, d.posterior.to_bits(), d.bin));
    }
    fn trial_end(&mut self, e: &TrialEnd<'_>) {
        self.ends.push((e.trial, e.spikes, e.bins));
    }
    fn unit_summaries(&mut self, s: &UnitSummaries<'_>) {
        self.units
            .push((s.trial, bits(s.presented_posterior), s.decoded.to_vec()));
    }
}

impl Out {
    fn sorted(mut self) -> Self {
        self.frames.sort_by_key(|f| (f.0, f.1));
        self.decisions.sort_by_key(|d| d.0);
        self.ends.sort_by_key(|e| e.0);
        self.units.sort_by_key(|u| u.0);
        self
    }
}

/// A shard's partials, owned.
#[derive(Default)]
struct Partials(Vec<OwnedPartial>);
impl EngineSink for Partials {
    fn partial(&mut self, p: &Partial<'_>) {
        self.0.push((
            p.trial,
            p.bin,
            p.first_block,
            p.values.to_vec(),
            p.spikes,
            p.units.map(|(l, k)| (l.to_vec(), k.to_vec())),
        ));
    }
}

/// Hands an owned partial to a combiner.
fn give(
    comb: &mut Engine,
    p: &OwnedPartial,
    sink: &mut dyn EngineSink,
) -> Result<(), auspex_engine::engine::EngineError> {
    let (trial, bin, first_block, values, spikes, units) = p;
    comb.add_partial(
        &Partial {
            trial: *trial,
            bin: *bin,
            first_block: *first_block,
            values,
            spikes: *spikes,
            units: units.as_ref().map(|(l, k)| (&l[..], &k[..])),
        },
        sink,
    )
}

fn family(kind: u8, x: f64) -> CountParams {
    match kind % 4 {
        0 => CountParams::Poisson {
            mean: 0.2 + 6.0 * x,
        },
        1 => CountParams::NegativeBinomial {
            mean: 0.2 + 6.0 * x,
            shape: 0.5 + 10.0 * x,
        },
        2 => CountParams::ComPoisson {
            lambda: 0.3 + 4.0 * x,
            nu: 0.6 + 1.5 * x,
        },
        _ => CountParams::Empirical {
            pmf: vec![0.3, 0.3 * x + 0.05, 0.2, 0.1 + x * 0.1, 0.05],
        },
    }
    .normalised()
}

trait Normalised {
    fn normalised(self) -> Self;
}
impl Normalised for CountParams {
    fn normalised(self) -> Self {
        match self {
            CountParams::Empirical { pmf } => {
                let s: f64 = pmf.iter().sum();
                CountParams::Empirical {
                    pmf: pmf.iter().map(|p| p / s).collect(),
                }
            }
            other => other,
        }
    }
}

/// A model of `nu` units (several blocks), `ns` stimuli and `nb` bins; families per unit from
/// `mix` (so some units are all one family and some mixed).
fn model(nu: usize, ns: usize, nb: usize, mix: u8, seed: u64) -> Arc<PreparedModel> {
    grouped_model(nu, ns, nb, mix, seed, Vec::new())
}

/// [`model`] with unit groups starting at the given unit indices.
fn grouped_model(
    nu: usize,
    ns: usize,
    nb: usize,
    mix: u8,
    seed: u64,
    unit_groups: Vec<u32>,
) -> Arc<PreparedModel> {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let mut cells = Vec::new();
    for u in 0..nu {
        for _ in 0..ns {
            let kind = if mix == 4 {
                rng.gen_range(0..4)
            } else {
                (mix + (u % 3 == 0) as u8) % 4
            };
            let q: Vec<f64> = (0..nb).map(|_| rng.gen_range(0.05..1.0)).collect();
            let s: f64 = q.iter().sum();
            cells.push(CellSpec {
                count: family(kind, rng.gen_range(0.0..1.0)),
                timing: q.iter().map(|x| x / s).collect(),
                summary: CellSummary::default(),
            });
        }
    }
    Arc::new(
        Model::new(ModelSpec {
            bin_width_s: 0.001,
            n_bins: nb as u32,
            stimuli: (0..ns).map(|s| format!("s{s}")).collect(),
            units: (0..nu as u32).map(|u| 3 * u + 1).collect(),
            prior: (1..=ns).map(|x| x as f64).collect(),
            cells,
            calibration: Default::default(),
            unit_groups,
        })
        .unwrap(),
    )
    .prepare(LookupBudget::DEFAULT)
}

struct Input {
    /// (onset tick, presented stimulus)
    trials: Vec<(i64, u32)>,
    /// (unit id, tick), sorted by tick.
    spikes: Vec<(u32, i64)>,
    step: i64,
    end: i64,
}

fn input(m: &Model, seed: u64) -> Input {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let nb = m.n_bins() as i64;
    let trials: Vec<(i64, u32)> = (0..3)
        .map(|i| {
            (
                i * (nb / 2 + 1) + rng.gen_range(0..3),
                rng.gen_range(0..m.n_stimuli() as u32),
            )
        })
        .collect();
    let end = trials.last().unwrap().0 + nb + 2;
    let mut spikes: Vec<(u32, i64)> = (0..rng.gen_range(0..400))
        .map(|_| {
            let u = m.units()[rng.gen_range(0..m.n_units())];
            (u, rng.gen_range(0..end))
        })
        .collect();
    spikes.sort_by_key(|s| s.1);
    Input {
        trials,
        spikes,
        step: rng.gen_range(1..6),
        end,
    }
}

fn config(dec: Decoder, role: Role) -> EngineConfig {
    let mut c = EngineConfig::new(1000.0);
    c.decoder = dec;
    c.policy.threshold = 0.8;
    c.policy.min_time_s = 0.002;
    c.role = role;
    c
}

fn whole(m: &Arc<PreparedModel>, dec: Decoder, inp: &Input) -> Out {
    let mut e = Engine::new(m.clone(), config(dec, Role::Whole)).unwrap();
    let mut out = Out::default();
    drive(inp, |step| match step {
        Step::Open(id, onset, st) => {
            let _ = e.open_trial(id, onset, Some(st), &mut out);
        }
        Step::Spike(u, t) => {
            let _ = e.spike(u, t);
        }
        Step::Advance(w) => e.advance(w, &mut out).unwrap(),
    });
    out.sorted()
}

enum Step {
    Open(u64, i64, u32),
    Spike(u32, i64),
    Advance(i64),
}

fn drive(inp: &Input, mut f: impl FnMut(Step)) {
    let (mut i, mut wm, mut opened) = (0, -1i64, 0);
    while wm < inp.end {
        let next = (wm + inp.step).min(inp.end);
        while opened < inp.trials.len() && inp.trials[opened].0 <= next {
            let (onset, st) = inp.trials[opened];
            f(Step::Open(opened as u64 + 1, onset, st));
            opened += 1;
        }
        while i < inp.spikes.len() && inp.spikes[i].1 <= next {
            f(Step::Spike(inp.spikes[i].0, inp.spikes[i].1));
            i += 1;
        }
        f(Step::Advance(next));
        wm = next;
    }
}

/// The combiner computes part 0 (or nothing), shards the other parts, each shard on `slices`
/// engine threads (`Role::ShardSlice`; one: `Role::Shard`); partials are handed over after each
/// step in a shuffled order, some before the combiner's own advance.
fn sharded(
    m: &Arc<PreparedModel>,
    dec: Decoder,
    inp: &Input,
    parts: u32,
    slices: u32,
    combiner_part: bool,
    seed: u64,
) -> Out {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let mut comb = Engine::new(
        m.clone(),
        config(
            dec,
            Role::Combiner {
                part: combiner_part.then_some(0),
                parts,
            },
        ),
    )
    .unwrap();
    let first_shard = if combiner_part { 1 } else { 0 };
    let role = |part, slice| match slices {
        1 => Role::Shard { part, parts },
        _ => Role::ShardSlice {
            part,
            parts,
            slice,
            slices,
        },
    };
    let mut shards: Vec<Engine> = (first_shard..parts)
        .flat_map(|part| (0..slices).map(move |slice| (part, slice)))
        .map(|(part, slice)| Engine::new(m.clone(), config(dec, role(part, slice))).unwrap())
        .collect();
    let mut out = Out::default();
    let mut held: Vec<OwnedPartial> = Vec::new();
    drive(inp, |step| match step {
        Step::Open(id, onset, st) => {
            let _ = comb.open_trial(id, onset, Some(st), &mut out);
            for s in &mut shards {
                let _ = s.open_trial(id, onset, None, &mut Partials::default());
            }
        }
        Step::Spike(u, t) => {
            let _ = comb.spike(u, t);
            for s in &mut shards {
                let _ = s.spike(u, t);
            }
        }
        Step::Advance(w) => {
            let mut p = Partials::default();
            for s in &mut shards {
                s.advance(w, &mut p).unwrap();
            }
            held.extend(p.0);
            held.shuffle(&mut rng);
            // Some partials now (ahead of the combiner's watermark), some later.
            let now = rng.gen_range(0..=held.len());
            for p in held.drain(..now) {
                give(&mut comb, &p, &mut out).unwrap();
            }
            comb.advance(w, &mut out).unwrap();
        }
    });
    for p in held.drain(..) {
        give(&mut comb, &p, &mut out).unwrap();
    }
    assert_eq!(comb.counters().stray_partials, 0);
    out.sorted()
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 40, .. ProptestConfig::default() })]

    #[test]
    fn shards_plus_combiner_equal_one_engine_bit_for_bit(
        blocks in 1usize..5,
        extra in 0usize..UNIT_BLOCK,
        ns in 2usize..5,
        nb in 2usize..14,
        mix in 0u8..5,
        parts in 1u32..6,
        slices in 1u32..4,
        combiner_part in any::<bool>(),
        groups in 0usize..3,
        by_group in any::<bool>(),
        seed in any::<u64>(),
    ) {
        let nu = (blocks - 1) * UNIT_BLOCK + extra + 1;
        // Unit groups at a third and two thirds of the units (blocks restart at each), and
        // parts that follow the groups or split the blocks evenly.
        let mut starts: Vec<u32> = (1..=groups).map(|g| (nu * g / 3) as u32).filter(|&s| s > 0).collect();
        starts.dedup();
        let m = grouped_model(nu, ns, nb, mix, seed, starts);
        let parts = if by_group && m.n_groups() > 1 { m.n_groups() as u32 } else { parts };
        let inp = input(&m, seed ^ 0x5eed);
        for dec in Decoder::ALL {
            let want = whole(&m, dec, &inp);
            prop_assert_eq!(want.ends.len(), 3);
            let got = sharded(&m, dec, &inp, parts, slices, combiner_part, seed);
            prop_assert!(got == want, "decoder {:?}, {} units, {} parts of {} slices", dec, nu, parts, slices);
        }
    }
}

/// A combiner that loses a part stops waiting for it: trials finish, every frame names the lost
/// part, and no per-unit line is given for a trial some units did not reach.
#[test]
fn a_lost_part_is_named_in_every_frame_and_trials_still_finish() {
    let m = model(3 * UNIT_BLOCK, 3, 8, 1, 7);
    let mut comb = Engine::new(
        m.clone(),
        config(
            Decoder::OrderStats,
            Role::Combiner {
                part: Some(0),
                parts: 3,
            },
        ),
    )
    .unwrap();
    let mut shard1 = Engine::new(
        m.clone(),
        config(Decoder::OrderStats, Role::Shard { part: 1, parts: 3 }),
    )
    .unwrap();
    #[derive(Default)]
    struct Seen(Vec<u64>, usize, usize);
    impl EngineSink for Seen {
        fn frame(&mut self, f: &Frame<'_>) {
            self.0.push(f.lost_parts);
        }
        fn trial_end(&mut self, _: &TrialEnd<'_>) {
            self.1 += 1;
        }
        fn unit_summaries(&mut self, _: &UnitSummaries<'_>) {
            self.2 += 1;
        }
    }
    let mut seen = Seen::default();
    comb.open_trial(1, 0, Some(0), &mut seen).unwrap();
    shard1
        .open_trial(1, 0, None, &mut Partials::default())
        .unwrap();
    let mut p = Partials::default();
    shard1.advance(20, &mut p).unwrap();
    comb.advance(20, &mut seen).unwrap();
    assert!(seen.0.is_empty(), "part 2 has not reported: no frame yet");
    for p in &p.0 {
        give(&mut comb, p, &mut seen).unwrap();
    }
    assert!(seen.0.is_empty(), "part 2 still missing");
    comb.lose_part(2, &mut seen);
    assert_eq!(seen.0.len(), 8);
    assert!(seen.0.iter().all(|&l| l == 1 << 2));
    assert_eq!((seen.1, seen.2), (1, 0));
    assert_eq!(comb.lost_parts(), 1 << 2);
    // Trials opened after the part is restored wait for it again.
    comb.restore_part(2);
    comb.open_trial(2, 30, Some(0), &mut seen).unwrap();
    comb.advance(60, &mut seen).unwrap();
    assert_eq!(seen.0.len(), 8);
    // A partial for a trial the combiner does not hold is refused and counted.
    let stray = Partial {
        trial: 99,
        bin: 0,
        first_block: 1,
        values: &[0.0; 3],
        spikes: 0,
        units: None,
    };
    assert!(comb.add_partial(&stray, &mut seen).is_err());
    assert_eq!(comb.counters().stray_partials, 1);
}

/// A shard's partial holding NaN or +∞ (a defect or a corrupted link) is refused and counted; −∞
/// (a count the model gives no chance) is a log-likelihood like any other.
#[test]
fn a_partial_that_is_not_a_log_likelihood_is_refused() {
    let m = model(UNIT_BLOCK, 3, 4, 0, 3);
    let mut comb = Engine::new(
        m.clone(),
        config(
            Decoder::OrderStats,
            Role::Combiner {
                part: None,
                parts: 1,
            },
        ),
    )
    .unwrap();
    let mut out = Partials::default();
    comb.open_trial(1, 0, Some(0), &mut out).unwrap();
    for bad in [f64::NAN, f64::INFINITY] {
        let p = Partial {
            trial: 1,
            bin: 0,
            first_block: 0,
            values: &[-1.0, bad, -2.0],
            spikes: 0,
            units: None,
        };
        assert!(comb.add_partial(&p, &mut out).is_err(), "{bad} refused");
    }
    assert_eq!(comb.counters().stray_partials, 2);
    let p = Partial {
        trial: 1,
        bin: 0,
        first_block: 0,
        values: &[-1.0, f64::NEG_INFINITY, -2.0],
        spikes: 0,
        units: None,
    };
    assert!(comb.add_partial(&p, &mut out).is_ok(), "−∞ taken");
}
