//! What a stimulus choice costs on the daemon's engine thread at 64 units × 64 stimuli (the
//! size issue 29 asks `next` to answer within a millisecond): improve-decoding's expected gains
//! (computed by the estimator thread after every trial, and on the engine thread when a request
//! comes before the estimator has them), a whole improve-decoding choice that computes them (on
//! every trial but the last, as the policy judges), the same choice with the estimator's gains
//! ready (what the engine thread does when the estimator had the trial to compute them), and a
//! find-tuning choice (margins of every unit and one top-two draw).
//! Run: `cargo bench -p auspex-modelling --bench design`.

use auspex_modelling::design::{units_of, Constraints, Design, Policy};
use criterion::{criterion_group, criterion_main, Criterion};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;

/// A design of `nu` × `ns` after `trials` trials of the project's simulated tuned units.
fn design_after(policy: Policy, nu: usize, ns: usize, trials: usize) -> Design {
    let units = units_of(5, nu, ns);
    let mut rng = ChaCha8Rng::seed_from_u64(11);
    let mut d = Design::new(policy, Constraints::default(), nu, ns, 3);
    for _ in 0..trials {
        let s = d.choose();
        let counts: Vec<u32> = units
            .iter()
            .map(|u| u.draw(s as usize, ns, &mut rng))
            .collect();
        d.record(s, &counts);
    }
    d
}

fn bench(c: &mut Criterion) {
    let mut g = c.benchmark_group("design_64x64");
    let d = design_after(Policy::ImproveDecoding, 64, 64, 200);
    g.bench_function("decoding_gains", |b| b.iter(|| d.decoding_gains()));
    g.bench_function("improve_decoding_choice_computing_gains", |b| {
        b.iter_batched(
            || d.clone(),
            |mut d| d.choose_explained(),
            criterion::BatchSize::SmallInput,
        )
    });
    let ready = d.decoding_gains_before_last();
    g.bench_function("improve_decoding_choice_gains_ready", |b| {
        b.iter_batched(
            || (d.clone(), ready.clone()),
            |(mut d, ready)| d.choose_explained_given(Some(ready)),
            criterion::BatchSize::SmallInput,
        )
    });
    let f = design_after(Policy::FindTuning, 64, 64, 200);
    g.bench_function("find_tuning_choice", |b| {
        b.iter_batched(
            || f.clone(),
            |mut f| f.choose_explained(),
            criterion::BatchSize::SmallInput,
        )
    });
    g.finish();
}

criterion_group! {
    name = benches;
    config = Criterion::default().sample_size(30).measurement_time(std::time::Duration::from_secs(3));
    targets = bench
}
criterion_main!(benches);
