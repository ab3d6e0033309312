//! Property tests: for arbitrary small models and spike trains the posterior is a probability
//! vector (sums to 1, no NaN) in every bin, for every decoder, and the engine's output does not
//! depend on how the input is split into batches.

use auspex_engine::count::CountParams;
use auspex_engine::engine::{Decoder, Engine, EngineConfig, EngineSink, Frame};
use auspex_engine::model::{CellSpec, CellSummary, Model, ModelSpec};
use auspex_engine::{LookupBudget, PreparedModel};
use proptest::prelude::*;
use std::sync::Arc;

#[derive(Default)]
struct Frames(Vec<(u64, u32, Vec<f64>)>);
impl EngineSink for Frames {
    fn frame(&mut self, f: &Frame<'_>) {
        self.0.push((f.trial, f.bin, f.posterior.to_vec()));
    }
}

fn count_strategy() -> impl Strategy<Value = CountParams> {
    prop_oneof![
        (0.01f64..30.0).prop_map(|mean| CountParams::Poisson { mean }),
        (0.01f64..30.0, 0.05f64..50.0)
            .prop_map(|(mean, shape)| CountParams::NegativeBinomial { mean, shape }),
        (0.05f64..20.0, 0.5f64..3.0)
            .prop_map(|(lambda, nu)| CountParams::ComPoisson { lambda, nu }),
        proptest::collection::vec(0.001f64..1.0, 1..12).prop_map(|v| {
            let s: f64 = v.iter().sum();
            CountParams::Empirical {
                pmf: v.iter().map(|x| x / s).collect(),
            }
        }),
    ]
}

fn model_strategy() -> impl Strategy<Value = Arc<Model>> {
    (1usize..4, 2usize..5, 2usize..30).prop_flat_map(|(nu, ns, nb)| {
        proptest::collection::vec(
            (
                count_strategy(),
                proptest::collection::vec(1e-6f64..1.0, nb),
            ),
            nu * ns,
        )
        .prop_map(move |cells| {
            let cells = cells
                .into_iter()
                .map(|(count, q)| {
                    let s: f64 = q.iter().sum();
                    CellSpec {
                        count,
                        timing: q.iter().map(|x| x / s).collect(),
                        summary: CellSummary::default(),
                    }
                })
                .collect();
            Arc::new(Model::new(ModelSpec::numbered(nu, ns, nb, cells)).unwrap())
        })
    })
}

fn run(m: &Arc<Model>, dec: Decoder, spikes: &[(u32, i64)], step: i64) -> Frames {
    run_announced(m, dec, spikes, step, -1)
}

/// Trial 2 (onset tick 5) is announced once the watermark reaches `announce`: before its onset
/// (ahead of the data) or after it (late, within the spike history).
fn run_announced(
    m: &Arc<Model>,
    dec: Decoder,
    spikes: &[(u32, i64)],
    step: i64,
    announce: i64,
) -> Frames {
    run_with(
        &m.clone().prepare(LookupBudget::DEFAULT),
        dec,
        spikes,
        step,
        announce,
        false,
    )
}

fn run_with(
    m: &Arc<PreparedModel>,
    dec: Decoder,
    spikes: &[(u32, i64)],
    step: i64,
    announce: i64,
    reference: bool,
) -> Frames {
    let mut cfg = EngineConfig::new(1000.0);
    cfg.decoder = dec;
    cfg.per_cell_reference = reference;
    let mut e = Engine::new(m.clone(), cfg).unwrap();
    let mut out = Frames::default();
    e.open_trial(1, 0, None, &mut out).unwrap();
    let end = 5 + m.n_bins() as i64;
    let mut sp: Vec<(u32, i64)> = spikes.to_vec();
    sp.sort_by_key(|s| s.1);
    let mut i = 0;
    let mut wm = -1;
    let mut announced = false;
    while wm < end {
        if !announced && wm >= announce {
            e.open_trial(2, 5, None, &mut out).unwrap();
            announced = true;
        }
        let next = (wm + step).min(end);
        while i < sp.len() && sp[i].1 <= next {
            let _ = e.spike(sp[i].0 % m.n_units() as u32, sp[i].1);
            i += 1;
        }
        e.advance(next, &mut out).unwrap();
        wm = next;
    }
    if !announced {
        e.open_trial(2, 5, None, &mut out).unwrap();
    }
    out
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 64, .. ProptestConfig::default() })]

    #[test]
    fn posteriors_are_probabilities(m in model_strategy(), spikes in proptest::collection::vec((0u32..4, 0i64..40), 0..60)) {
        for dec in Decoder::ALL {
            let out = run(&m, dec, &spikes, 1);
            prop_assert_eq!(out.0.len(), 2 * m.n_bins());
            for (_, _, p) in &out.0 {
                prop_assert!(p.iter().all(|x| x.is_finite() && *x >= 0.0));
                prop_assert!((p.iter().sum::<f64>() - 1.0).abs() < 1e-9);
            }
        }
    }

    #[test]
    fn batching_does_not_change_frames(m in model_strategy(), spikes in proptest::collection::vec((0u32..4, 0i64..40), 0..60), step in 1i64..17) {
        let a = run(&m, Decoder::OrderStats, &spikes, 1);
        let b = run(&m, Decoder::OrderStats, &spikes, step);
        let mut a = a.0; let mut b = b.0;
        a.sort_by_key(|x| (x.0, x.1)); b.sort_by_key(|x| (x.0, x.1));
        prop_assert_eq!(a, b);
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 64, .. ProptestConfig::default() })]

    /// A task program may announce an onset ahead of the acquisition stream or a little after
    /// it: the trial's frames must not depend on when the announcement arrived.
    #[test]
    fn announcing_an_onset_early_or_late_does_not_change_frames(m in model_strategy(), spikes in proptest::collection::vec((0u32..4, 0i64..40), 0..60), step in 1i64..9, announce in -1i64..45) {
        for dec in Decoder::ALL {
            let mut a = run(&m, dec, &spikes, step).0;
            let mut b = run_announced(&m, dec, &spikes, step, announce).0;
            a.sort_by_key(|x| (x.0, x.1));
            b.sort_by_key(|x| (x.0, x.1));
            prop_assert_eq!(a, b);
        }
    }
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 64, .. ProptestConfig::default() })]

    /// The per-model sums (O(S) per bin plus spiking units) give the per-cell reference's
    /// posteriors up to summation order.
    #[test]
    fn summed_path_matches_the_per_cell_reference(m in model_strategy(), spikes in proptest::collection::vec((0u32..4, 0i64..40), 0..60)) {
        // The same model without the table-family lookup: COM-Poisson and empirical cells then
        // take the product form (Horner on P(n)·n!, one logarithm per stimulus).
        let full = m.clone().prepare(LookupBudget::DEFAULT);
        let exact = m.clone().prepare(LookupBudget::NONE);
        for (dec, summed_model) in Decoder::ALL.into_iter().flat_map(|d| [(d, &full), (d, &exact)]) {
            let a = run_with(summed_model, dec, &spikes, 3, -1, false).0;
            let b = run_with(&full, dec, &spikes, 3, -1, true).0;
            prop_assert_eq!(a.len(), b.len());
            for (x, y) in a.iter().zip(&b) {
                prop_assert_eq!((x.0, x.1), (y.0, y.1));
                for (p, q) in x.2.iter().zip(&y.2) {
                    prop_assert!((p - q).abs() < 1e-9, "{} vs {}", p, q);
                }
            }
        }
    }
}

/// An onset whose window would run past the end of the tick range is refused and counted; the
/// engine goes on decoding (it used to wrap in release builds and panic with overflow checks).
#[test]
fn an_onset_at_the_end_of_the_tick_range_is_refused_not_wrapped() {
    use auspex_engine::engine::{EngineError, NullSink};
    let spec = auspex_engine::ModelSpec {
        bin_width_s: 0.001,
        n_bins: 4,
        stimuli: vec!["a".into(), "b".into()],
        units: vec![1],
        prior: vec![0.5, 0.5],
        cells: (0..2)
            .map(|s| auspex_engine::CellSpec {
                count: CountParams::Poisson {
                    mean: 1.0 + s as f64,
                },
                timing: vec![0.25; 4],
                summary: Default::default(),
            })
            .collect(),
        calibration: Default::default(),
        unit_groups: Vec::new(),
    };
    let m = Arc::new(Model::new(spec).unwrap()).prepare(LookupBudget::DEFAULT);
    let mut e = Engine::new(m, EngineConfig::new(1000.0)).unwrap();
    let r = e.open_trial(1, i64::MAX - 2, None, &mut NullSink);
    assert!(matches!(r, Err(EngineError::StaleOnset { .. })), "{r:?}");
    assert_eq!(e.counters().stale_onsets, 1);
    e.open_trial(2, 0, None, &mut NullSink).unwrap();
    e.advance(i64::MAX, &mut NullSink).unwrap();
    assert_eq!(e.counters().trials_completed, 1);
}

/// A session with long pauses and an onset far in the future (1e7 s at 1 MHz): the event stream
/// crosses each gap in one batch (a handful of events, not one per bin — the old cut asked for
/// gigabytes), and the frames equal those of 1-bin batches throughout.
#[test]
fn gaps_between_windows_cost_one_batch_and_change_no_frame() {
    use auspex_engine::data::{Dataset, Event, Trial};
    use auspex_engine::engine::run_dataset;
    let nb = 20usize;
    let q = vec![1.0 / nb as f64; nb];
    let early: Vec<f64> = (0..nb)
        .map(|b| if b < 5 { 0.15 } else { 0.25 / 15.0 })
        .collect();
    let cell = |mean: f64, t: &Vec<f64>| CellSpec {
        count: CountParams::Poisson { mean },
        timing: t.clone(),
        summary: CellSummary::default(),
    };
    let m = Arc::new(
        Model::new(ModelSpec {
            bin_width_s: 0.001,
            n_bins: nb as u32,
            stimuli: vec!["a".into(), "b".into()],
            units: vec![1, 2],
            prior: vec![1.0, 1.0],
            cells: vec![
                cell(3.0, &early),
                cell(3.0, &q),
                cell(1.0, &q),
                cell(4.0, &early),
            ],
            calibration: Default::default(),
            unit_groups: Vec::new(),
        })
        .unwrap(),
    )
    .prepare(LookupBudget::DEFAULT);
    // Ticks of 1 µs; bins of 1000 ticks.
    let far = 10_000_000_000_000i64; // 1e7 s
    let trial = |id: u64, onset: i64, s: &str| Trial {
        id,
        onset,
        stimulus: Some(s.into()),
    };
    let mut spikes = vec![
        (100, 1),
        (2_000, 2),
        (3_500, 1),
        (25_000, 2),
        (31_500, 1),
        (33_000, 2),
        (900_000, 1),
    ];
    spikes.extend([(far + 1_500, 2), (far + 2_500, 1), (far + 4_000, 2)]);
    let data = Dataset {
        tick_rate_hz: 1e6,
        trials: vec![trial(1, 0, "a"), trial(2, 30_000, "b"), trial(3, far, "b")],
        spikes: spikes.into(),
        units: vec![1, 2],
        ..Dataset::default()
    };
    let window = 1000 * nb as i64;
    let events = data.events(1000, window);
    assert!(events.len() < 200, "{} events", events.len());
    let mut gapped = Frames::default();
    run_dataset(m.clone(), &data, EngineConfig::new(1e6), &mut gapped).unwrap();
    // The same session in 1-bin batches only around the windows, driven by hand.
    let mut e = Engine::new(m.clone(), EngineConfig::new(1e6)).unwrap();
    let mut by_bin = Frames::default();
    let mut si = 0;
    for t in &data.trials {
        let mut wm = t.onset - 1;
        // Spikes before this onset are not in any window: hand them over with the watermark.
        while si < data.spikes.len() && data.spikes.tick(si) <= wm {
            let (tick, unit) = data.spikes.get(si).unwrap();
            e.spike(unit, tick).unwrap();
            si += 1;
        }
        if wm > e.watermark() {
            e.advance(wm, &mut by_bin).unwrap();
        }
        e.open_trial(
            t.id,
            t.onset,
            Some(if t.stimulus.as_deref() == Some("a") {
                0
            } else {
                1
            }),
            &mut by_bin,
        )
        .unwrap();
        while wm < t.onset + window {
            wm += 1000;
            while si < data.spikes.len() && data.spikes.tick(si) <= wm {
                let (tick, unit) = data.spikes.get(si).unwrap();
                e.spike(unit, tick).unwrap();
                si += 1;
            }
            e.advance(wm, &mut by_bin).unwrap();
        }
    }
    assert_eq!(gapped.0.len(), 3 * nb);
    assert_eq!(gapped.0, by_bin.0);
    assert!(events
        .iter()
        .any(|ev| matches!(ev, Event::Open { trial: 3, .. })));
}

/// A calibration belongs to the decoder it was fitted for (order statistics): with any other
/// decoder the frames are that decoder's raw posterior whether calibration is asked for or not,
/// while the order statistics decoder's frames do change with it.
#[test]
fn calibration_is_applied_only_with_its_own_decoder() {
    use auspex_engine::calibration::{Calibration, CalibrationMethod};
    use auspex_engine::data::{Dataset, Trial};
    use auspex_engine::engine::run_dataset;
    let nb = 10usize;
    let early: Vec<f64> = (0..nb)
        .map(|b| if b < 3 { 0.2 } else { 0.4 / 7.0 })
        .collect();
    let flat = vec![0.1; nb];
    let cell = |mean: f64, t: &Vec<f64>| CellSpec {
        count: CountParams::Poisson { mean },
        timing: t.clone(),
        summary: CellSummary::default(),
    };
    let m = Arc::new(
        Model::new(ModelSpec {
            bin_width_s: 0.001,
            n_bins: nb as u32,
            stimuli: vec!["a".into(), "b".into()],
            units: vec![1],
            prior: vec![1.0, 1.0],
            cells: vec![cell(3.0, &early), cell(2.0, &flat)],
            calibration: Calibration {
                method: CalibrationMethod::Temperature,
                factors: vec![0.6; nb],
                ..Calibration::default()
            },
            unit_groups: Vec::new(),
        })
        .unwrap(),
    )
    .prepare(LookupBudget::DEFAULT);
    let data = Dataset {
        tick_rate_hz: 1000.0,
        trials: vec![Trial {
            id: 1,
            onset: 0,
            stimulus: Some("a".into()),
        }],
        spikes: vec![(1, 1), (2, 1), (6, 1)].into(),
        units: vec![1],
        ..Dataset::default()
    };
    let run = |decoder: Decoder, calibrated: bool| {
        let mut cfg = EngineConfig::new(1000.0);
        cfg.decoder = decoder;
        cfg.calibrated = calibrated;
        let mut f = Frames::default();
        run_dataset(m.clone(), &data, cfg, &mut f).unwrap();
        f.0
    };
    for d in [Decoder::InhomogeneousPoisson, Decoder::CountOnly] {
        assert_eq!(run(d, true), run(d, false), "{}", d.name());
    }
    assert_ne!(
        run(Decoder::OrderStats, true),
        run(Decoder::OrderStats, false)
    );
}
