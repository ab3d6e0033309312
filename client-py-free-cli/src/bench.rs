//! `bench`: a short self-test of the user's machine. It decodes synthetic trials at growing
//! sizes to find how many units × stimuli this machine decodes in real time with 10× headroom,
//! then runs a daemon on loopback and measures spike-batch → posterior-frame latency at 1 kHz
//! batches. The figures are for this machine as it is loaded right now.

use auspex_engine::count::CountParams;
use auspex_engine::engine::{Decoder, Engine, EngineConfig, NullSink};
use auspex_engine::model::{CellSpec, CellSummary, Model, ModelSpec};
use auspex_engine::{LookupBudget, PreparedModel};
use auspex_modelling::simulate::{simulate, SimOptions};
use auspex_proto::v1::{self, inbound::Body};
use bytes::Bytes;
use prost::Message;
use std::sync::Arc;
use std::time::{Duration, Instant};
use zeromq::{Socket, SocketRecv, SocketSend, ZmqMessage};

/// Window bins of the synthetic models (250 ms at 1 ms).
const BINS: usize = 250;
/// Mean spikes per unit per window: 4 in 250 ms, i.e. 16 spikes/s.
const MEAN_COUNT: f64 = 4.0;

/// A synthetic model: negative binomial counts (the family real units most often need) and a
/// response bump at a unit- and stimulus-dependent latency.
pub fn synthetic_model(nu: usize, ns: usize) -> Arc<PreparedModel> {
    let mut cells = Vec::with_capacity(nu * ns);
    for u in 0..nu {
        for s in 0..ns {
            let mean = MEAN_COUNT * (0.6 + 0.8 * (((u * 7 + s * 3) % 11) as f64 / 10.0));
            let centre = 20.0 + ((u + 2 * s) % 9) as f64 * 20.0;
            let q: Vec<f64> = (0..BINS)
                .map(|b| 0.3 + (-((b as f64 - centre) / 15.0).powi(2)).exp())
                .collect();
            let z: f64 = q.iter().sum();
            cells.push(CellSpec {
                count: CountParams::NegativeBinomial { mean, shape: 6.0 },
                timing: q.iter().map(|x| x / z).collect(),
                summary: CellSummary::default(),
            });
        }
    }
    Arc::new(
        Model::new(ModelSpec::numbered(nu, ns, BINS, cells)).expect("synthetic model is valid"),
    )
    .prepare(LookupBudget::DEFAULT)
}

/// Spike bins of one trial: every unit fires about `MEAN_COUNT` spikes (deterministic LCG).
fn trial_spikes(nu: usize, seed: u64) -> Vec<Vec<u32>> {
    let mut per_bin = vec![Vec::new(); BINS];
    let mut x = seed
        .wrapping_mul(2862933555777941757)
        .wrapping_add(3037000493);
    for u in 0..nu {
        for _ in 0..MEAN_COUNT as usize {
            x = x
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            per_bin[(x >> 33) as usize % BINS].push(u as u32);
        }
    }
    per_bin
}

/// Decodes whole synthetic trials of `nu` units with `run_trial(trial, onset, spike bins)` for
/// about `budget` (at least 3, at most 200 trials); the median time per 1 ms bin, µs.
fn median_us_per_bin(
    nu: usize,
    budget: Duration,
    mut run_trial: impl FnMut(u64, i64, &[Vec<u32>]) -> anyhow::Result<()>,
) -> anyhow::Result<f64> {
    let spikes: Vec<Vec<Vec<u32>>> = (0..4).map(|i| trial_spikes(nu, i)).collect();
    let mut per_bin = Vec::new();
    let t_all = Instant::now();
    let mut trial = 0u64;
    while (t_all.elapsed() < budget || per_bin.len() < 3) && per_bin.len() < 200 {
        trial += 1;
        let t0 = Instant::now();
        run_trial(
            trial,
            trial as i64 * 1000,
            &spikes[trial as usize % spikes.len()],
        )?;
        per_bin.push(t0.elapsed().as_secs_f64() * 1e6 / BINS as f64);
    }
    per_bin.sort_by(|a, b| a.total_cmp(b));
    Ok(per_bin[per_bin.len() / 2])
}

/// Engine cost at one size.
#[derive(Clone, Debug, serde::Serialize)]
pub struct EnginePoint {
    /// Units.
    pub units: usize,
    /// Stimuli.
    pub stimuli: usize,
    /// Median time per 1 ms bin, µs (over trials).
    pub us_per_bin: f64,
    /// Real time / time per bin.
    pub headroom: f64,
}

/// Times whole trials at one size for about `budget`; median µs per bin.
pub fn engine_point(nu: usize, ns: usize, budget: Duration) -> EnginePoint {
    let m = synthetic_model(nu, ns);
    let mut e = Engine::new(m, EngineConfig::new(1000.0)).expect("engine");
    let us = median_us_per_bin(nu, budget, |trial, onset, sp| {
        let _ = e.open_trial(trial, onset, Some(0), &mut NullSink);
        for (b, units) in sp.iter().enumerate() {
            for &u in units {
                let _ = e.spike(u, onset + b as i64);
            }
            let _ = e.advance(onset + b as i64, &mut NullSink);
        }
        Ok(())
    })
    .expect("the single engine does not fail");
    EnginePoint {
        units: nu,
        stimuli: ns,
        us_per_bin: us,
        headroom: 1000.0 / us,
    }
}

/// Throughput of `threads` engine threads (the daemon's `--threads`) at one size.
#[derive(Clone, Debug, serde::Serialize)]
pub struct ThreadPoint {
    /// Units.
    pub units: usize,
    /// Stimuli.
    pub stimuli: usize,
    /// Engine threads.
    pub threads: u32,
    /// Median time per 1 ms bin, µs (over trials; every bin of every trial decoded).
    pub us_per_bin: f64,
    /// Real time / time per bin.
    pub headroom: f64,
    /// One thread's time per bin / this one's (the same run).
    pub speedup: f64,
    /// The bare cost, µs, of reading one bin's negative binomial rows of every unit (units ×
    /// stimuli × 8 bytes) on this many threads at once: the memory's floor under a bin in which
    /// every unit has spiked ([`stream_floor_us`]).
    pub floor_us_per_bin: f64,
}

/// The memory floor of a dense bin at `nu` × `ns` on 1 ..= `max_threads` threads (index
/// threads − 1): each thread sums its share of one bin's `[unit][stimulus]` rows (a table of
/// ≥ 256 MB, far larger than the caches, read bin after bin as a dense negative binomial pass
/// reads `g`), all threads at once. Median µs per bin over three passes. More threads cannot make
/// the dense part of a bin faster than this floor allows, whatever the engine does.
pub fn stream_floor_us(nu: usize, ns: usize, max_threads: usize) -> Vec<f64> {
    let row = nu * ns;
    let bins = (256usize << 20).div_ceil(row * 8).max(16);
    let table: Vec<f64> = (0..row * bins).map(|i| (i % 977) as f64 * 1e-3).collect();
    (1..=max_threads.max(1))
        .map(|threads| {
            let share = nu.div_ceil(threads) * ns;
            let mut passes: Vec<f64> = (0..3)
                .map(|_| {
                    let t0 = Instant::now();
                    std::thread::scope(|sc| {
                        for th in 0..threads {
                            let table = &table;
                            sc.spawn(move || {
                                let mut acc = vec![0.0f64; ns];
                                for b in 0..bins {
                                    let lo = (b * row + th * share).min((b + 1) * row);
                                    let hi = (lo + share).min((b + 1) * row);
                                    for r in table[lo..hi].chunks_exact(ns) {
                                        for (a, x) in acc.iter_mut().zip(r) {
                                            *a += x;
                                        }
                                    }
                                }
                                std::hint::black_box(acc);
                            });
                        }
                    });
                    t0.elapsed().as_secs_f64() * 1e6 / bins as f64
                })
                .collect();
            passes.sort_by(|a, b| a.total_cmp(b));
            passes[1]
        })
        .collect()
}

/// Times whole trials through the daemon's threaded engine (`auspexd::ThreadedDecoder`: a
/// combiner and `threads − 1` workers fed as the engine thread feeds them), for about `budget`;
/// median µs per bin and the frames published.
pub fn thread_point(
    m: &Arc<PreparedModel>,
    threads: u32,
    budget: Duration,
) -> anyhow::Result<(f64, u64)> {
    let mut d = auspexd::ThreadedDecoder::start(m.clone(), threads)?;
    let us = median_us_per_bin(m.n_units(), budget, |trial, onset, sp| {
        Ok(d.decode_trial(trial, onset, sp)?)
    })?;
    Ok((us, d.frames()))
}

/// Thread scaling at the given sizes for 1 ..= `max_threads` threads, printed with a
/// recommendation for `auspexd --threads`.
pub fn thread_scaling(
    sizes: &[(usize, usize)],
    max_threads: u32,
) -> anyhow::Result<Vec<ThreadPoint>> {
    println!(
        "{:>6} × {:<4} {:>8} {:>12} {:>10} {:>8} {:>14}",
        "units", "stim", "threads", "µs per bin", "headroom", "speedup", "memory floor"
    );
    let mut points = Vec::new();
    for &(nu, ns) in sizes {
        let m = synthetic_model(nu, ns);
        let floors = stream_floor_us(nu, ns, max_threads.max(1) as usize);
        let mut one = None;
        for threads in 1..=max_threads.max(1) {
            let (us, _) = thread_point(&m, threads, Duration::from_millis(1500))?;
            let base = *one.get_or_insert(us);
            let p = ThreadPoint {
                units: nu,
                stimuli: ns,
                threads,
                us_per_bin: us,
                headroom: 1000.0 / us,
                speedup: base / us,
                floor_us_per_bin: floors[threads as usize - 1],
            };
            println!(
                "{:>6} × {:<4} {:>8} {:>12.1} {:>9.1}× {:>7.2}× {:>11.1} µs",
                p.units,
                p.stimuli,
                p.threads,
                p.us_per_bin,
                p.headroom,
                p.speedup,
                p.floor_us_per_bin
            );
            points.push(p);
        }
    }
    // The fewest threads within 10% of the fastest at the largest size.
    if let Some(&(nu, ns)) = sizes.last() {
        let at: Vec<&ThreadPoint> = points
            .iter()
            .filter(|p| p.units == nu && p.stimuli == ns)
            .collect();
        if let Some(best) = at
            .iter()
            .map(|p| p.us_per_bin)
            .min_by(|a, b| a.total_cmp(b))
        {
            if let Some(pick) = at.iter().find(|p| p.us_per_bin <= best * 1.1) {
                println!(
                    "→ for {nu} units × {ns} stimuli: auspexd --threads {} ({:.2}× one thread, {:.1}× real time); more threads than cores never help",
                    pick.threads, pick.speedup, pick.headroom
                );
            }
        }
        if let (Some(one), Some(most)) = (at.first(), at.last()) {
            if most.threads > 1 {
                println!(
                    "  memory floor: a bin in which every unit has spiked reads {:.1} MB of rows, {:.1} µs on 1 thread and {:.1} µs on {} ({:.2}×) — the most more threads can gain on that part of a bin on this machine",
                    (nu * ns * 8) as f64 / 1e6,
                    one.floor_us_per_bin,
                    most.floor_us_per_bin,
                    most.threads,
                    one.floor_us_per_bin / most.floor_us_per_bin
                );
            }
        }
    }
    Ok(points)
}

/// The engine's cost on a user's own model, with trials drawn from that model.
#[derive(Clone, Debug, serde::Serialize)]
pub struct ModelPoint {
    /// Units.
    pub units: usize,
    /// Stimuli.
    pub stimuli: usize,
    /// Bins per window.
    pub bins: usize,
    /// Decoder timed.
    pub decoder: String,
    /// Cells per count family, (family, cells).
    pub families: Vec<(String, usize)>,
    /// Seconds to prepare the model's per-bin tables (once per load or reload).
    pub prepare_s: f64,
    /// Bytes of precomputed COM-Poisson / empirical terms.
    pub table_bytes: usize,
    /// Counts up to which those terms are looked up rather than evaluated (None: no such cells).
    pub table_lookup_counts: Option<usize>,
    /// Mean spikes per second per unit inside the windows of the drawn trials.
    pub spikes_per_s: f64,
    /// Trials timed.
    pub trials: usize,
    /// Median time per bin over trials, µs.
    pub us_per_bin: f64,
    /// Slowest trial's time per bin, µs.
    pub worst_us_per_bin: f64,
    /// Bin width / median time per bin.
    pub headroom: f64,
}

/// Times the engine on `model`: prepares it, draws trials from the model itself (every
/// stimulus in turn, seeded), and decodes them bin by bin for about `budget`.
pub fn model_point(
    model: Arc<Model>,
    decoder: Decoder,
    table_memory: LookupBudget,
    budget: Duration,
) -> ModelPoint {
    let (nu, ns, nb) = (model.n_units(), model.n_stimuli(), model.n_bins());
    let t_prep = Instant::now();
    let model = model.prepare(table_memory);
    let prepare_s = t_prep.elapsed().as_secs_f64();
    let mut families = std::collections::BTreeMap::<&str, usize>::new();
    for u in 0..nu {
        for s in 0..ns {
            *families
                .entry(model.count(u, s).family().name())
                .or_default() += 1;
        }
    }
    // One tick per bin: the engine's cost does not depend on the clock.
    let tick_rate = 1.0 / model.bin_width_s();
    let data = simulate(
        &model,
        &SimOptions {
            trials_per_stimulus: (64 / ns as u32).max(2),
            gap_s: (0.0, 0.0),
            spontaneous_hz: 0.0,
            tick_rate_hz: tick_rate,
            seed: 7,
        },
    );
    let mut cfg = EngineConfig::new(tick_rate);
    cfg.decoder = decoder;
    let mut e = Engine::new(model.clone(), cfg).expect("engine on a loaded model");
    let mut per_bin = Vec::new();
    let mut in_window = 0usize;
    let t_all = Instant::now();
    let mut next_spike = 0usize;
    for (i, trial) in data.trials.iter().enumerate() {
        if (t_all.elapsed() >= budget && per_bin.len() >= 3) || per_bin.len() >= 200 {
            break;
        }
        let end = trial.onset + nb as i64;
        while next_spike < data.spikes.len() && data.spikes.tick(next_spike) < trial.onset {
            next_spike += 1;
        }
        let t0 = Instant::now();
        let _ = e.open_trial(i as u64 + 1, trial.onset, None, &mut NullSink);
        for b in 0..nb as i64 {
            let bin_end = trial.onset + b + 1;
            while next_spike < data.spikes.len() && data.spikes.tick(next_spike) < bin_end.min(end)
            {
                let (tick, unit) = data.spikes.get(next_spike).expect("in range");
                let _ = e.spike(unit, tick);
                in_window += 1;
                next_spike += 1;
            }
            let _ = e.advance(bin_end - 1, &mut NullSink);
        }
        per_bin.push(t0.elapsed().as_secs_f64() * 1e6 / nb as f64);
    }
    let trials = per_bin.len();
    let worst = per_bin.iter().copied().fold(0.0, f64::max);
    per_bin.sort_by(|a, b| a.total_cmp(b));
    let us = per_bin[per_bin.len() / 2];
    ModelPoint {
        units: nu,
        stimuli: ns,
        bins: nb,
        decoder: decoder.name().to_string(),
        families: families
            .into_iter()
            .map(|(f, n)| (f.to_string(), n))
            .collect(),
        prepare_s,
        table_bytes: model.table_bytes(),
        table_lookup_counts: model.table_lookup_counts(),
        spikes_per_s: in_window as f64
            / (trials.max(1) * nu) as f64
            / (nb as f64 * model.bin_width_s()),
        trials,
        us_per_bin: us,
        worst_us_per_bin: worst,
        headroom: model.bin_width_s() * 1e6 / us,
    }
}

/// Prints [`model_point`]'s answer for a user.
pub fn print_model_point(path: &std::path::Path, p: &ModelPoint) {
    let total: usize = p.families.iter().map(|f| f.1).sum();
    let fams: Vec<String> = p
        .families
        .iter()
        .map(|(f, n)| format!("{f} {:.0}%", 100.0 * *n as f64 / total.max(1) as f64))
        .collect();
    println!(
        "model {}: {} units × {} stimuli, {} bins; cells: {}",
        path.display(),
        p.units,
        p.stimuli,
        p.bins,
        fams.join(", ")
    );
    match p.table_lookup_counts {
        Some(k) => println!(
            "  prepared in {:.2} s ({:.0} MB of COM-Poisson/empirical terms, looked up for counts ≤ {k})",
            p.prepare_s,
            p.table_bytes as f64 / 1e6
        ),
        None => println!("  prepared in {:.2} s", p.prepare_s),
    }
    println!(
        "  {} trials drawn from the model itself ({:.1} spikes/s per unit in the window), decoder {}",
        p.trials, p.spikes_per_s, p.decoder
    );
    let verdict = if p.headroom >= 10.0 {
        "real time with ≥ 10× headroom"
    } else if p.headroom >= 1.0 {
        "real time, but below the 10× headroom a rig should keep"
    } else {
        "NOT real time on this machine"
    };
    println!(
        "→ {:.1} µs per bin (median; slowest trial {:.1} µs) = {:.1}× real time: {verdict}",
        p.us_per_bin, p.worst_us_per_bin, p.headroom
    );
    let table_cells: usize = p
        .families
        .iter()
        .filter(|(f, _)| f == "com_poisson" || f == "empirical")
        .map(|f| f.1)
        .sum();
    if p.headroom < 10.0 && table_cells > 0 {
        println!(
            "  {table_cells} COM-Poisson/empirical cells have no closed form: above the looked-up \
             counts each costs about its count table's length per bin. More memory for the lookup \
             (--table-memory-mb, here and on the daemon) or a refit with closed-form families only \
             (`auspex fit --families poisson,nb`) brings the cost down."
        );
    }
}

/// Latency percentiles, µs.
#[derive(Clone, Debug, serde::Serialize, serde::Deserialize)]
pub struct Latency {
    /// Transport.
    pub transport: String,
    /// Frames measured.
    pub frames: usize,
    /// Median.
    pub p50_us: f64,
    /// 99th percentile.
    pub p99_us: f64,
    /// 99.9th percentile.
    pub p999_us: f64,
    /// Worst.
    pub max_us: f64,
    /// Batches sent.
    pub batches: usize,
}

fn pct(sorted: &[f64], p: f64) -> f64 {
    if sorted.is_empty() {
        return f64::NAN;
    }
    sorted[((sorted.len() as f64 * p).ceil() as usize).clamp(1, sorted.len()) - 1]
}

/// The inbound messages of a latency run, encoded: SessionStart, then per 1 ms batch `i`
/// (1-based) possibly a trial onset (trials back to back: 250 ms window, 50 ms gap) and the
/// spike batch with watermark `i·1000 − 1`, marked `Some(i)` so the sender can time it. About
/// 16 spikes/s per unit, deterministic.
pub fn latency_messages(nu: usize, ns: usize, n_batches: usize) -> Vec<(Option<usize>, Vec<u8>)> {
    let mut out = Vec::with_capacity(n_batches + n_batches / 300 + 2);
    let mut seq = 0u64;
    let mut enc = |body: Body| {
        seq += 1;
        v1::Inbound {
            sender: "bench".into(),
            seq,
            body: Some(body),
        }
        .encode_to_vec()
    };
    out.push((
        None,
        enc(Body::SessionStart(v1::SessionStart {
            stimuli: Default::default(),
            tick_rate_hz: 1e6,
            units: (0..nu as u32).collect(),
            session_name: "bench".into(),
            learn_in_step: false,
        })),
    ));
    let mut x = 0x9e3779b97f4a7c15u64;
    let per_ms = MEAN_COUNT / BINS as f64 * nu as f64;
    let mut trial = 0u64;
    for i in 1..=n_batches {
        let ms = i as i64; // this batch covers ticks [(i−1)·1000, i·1000)
        if (ms - 1) % 300 == 0 {
            trial += 1;
            out.push((
                None,
                enc(Body::Onset(v1::TrialOnset {
                    trial,
                    onset_tick: (ms - 1) * 1000,
                    // Stimuli in turn, so a learning daemon has every stimulus to refit on.
                    stimulus: format!("s{}", (trial - 1) % ns as u64),
                })),
            ));
        }
        let mut spikes = Vec::new();
        let mut budget = per_ms;
        while budget > 0.0 {
            x = x
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            let r = (x >> 11) as f64 / (1u64 << 53) as f64;
            if r < budget.min(1.0) {
                spikes.push((
                    (ms - 1) * 1000 + ((x >> 40) % 1000) as i64,
                    ((x >> 20) % nu as u64) as u32,
                ));
            }
            budget -= 1.0;
        }
        spikes.sort_unstable();
        out.push((
            Some(i),
            enc(Body::Spikes(v1::SpikeBatch {
                units: spikes.iter().map(|s| s.1).collect(),
                ticks: spikes.iter().map(|s| s.0).collect(),
                complete_through: ms * 1000 - 1,
            })),
        ));
    }
    out
}

/// Latency percentiles from per-frame latencies (µs).
pub fn summarise(transport: &str, mut lat: Vec<f64>, batches: usize) -> Latency {
    lat.sort_by(|a, b| a.total_cmp(b));
    Latency {
        transport: transport.to_string(),
        frames: lat.len(),
        p50_us: pct(&lat, 0.5),
        p99_us: pct(&lat, 0.99),
        p999_us: pct(&lat, 0.999),
        max_us: lat.last().copied().unwrap_or(f64::NAN),
        batches,
    }
}

/// Starts a daemon in this process on loopback (`tcp` on free ports, or `ipc` sockets in
/// `dir`) with the synthetic model of `nu` units × `ns` stimuli, a 1 MHz clock and no task
/// endpoint: the set-up of every latency run, whichever library the peer uses. With `learning`
/// the daemon also learns from the labelled trials and refits after every one of them (the
/// heaviest refit load), swapping each learned model in as it comes, and records the session.
pub async fn start_daemon(
    nu: usize,
    ns: usize,
    transport: &str,
    dir: &std::path::Path,
    learning: bool,
    threads: u32,
) -> anyhow::Result<auspexd::service::Running> {
    let model_path = dir.join(format!("bench-{nu}x{ns}.apxm"));
    auspex_proto::model_file::save_model(
        &model_path,
        synthetic_model(nu, ns).spec(),
        "auspex bench",
    )?;
    let ep = |name: &str| match transport {
        "ipc" => format!("ipc://{}/{name}.sock", dir.display()),
        _ => "tcp://127.0.0.1:0".to_string(),
    };
    let fc = auspexd::config::FileConfig {
        model: Some(model_path),
        ingest: Some(ep("ingest")),
        task_ingest: Some(String::new()),
        publish: Some(ep("publish")),
        control: Some(ep("control")),
        tick_rate_hz: Some(1e6),
        learn: Some(learning),
        // A learning daemon at the rig records its session too: the recorder's writes and
        // flushes are part of the load measured.
        record: learning.then(|| dir.join(format!("bench-{transport}.apxs"))),
        refit_every_trials: Some(1),
        threads: Some(threads),
        ..Default::default()
    };
    let cfg = auspexd::config::validate(fc, &mut Vec::new())?;
    Ok(auspexd::service::start(cfg).await?)
}

/// Runs a daemon in this process on loopback (`tcp` or `ipc`), streams `seconds` of 1 kHz
/// spike batches for `nu` units at about 16 spikes/s each, trials back to back (250 ms window,
/// 50 ms gap), and measures the time from handing each batch to the sending socket to receiving
/// the posterior frame of the bin it completes.
pub async fn latency(
    nu: usize,
    ns: usize,
    seconds: f64,
    transport: &str,
    dir: &std::path::Path,
    learning: bool,
    threads: u32,
) -> anyhow::Result<Latency> {
    let running = start_daemon(nu, ns, transport, dir, learning, threads).await?;
    let eps = running.endpoints.clone();
    let mut push = zeromq::PushSocket::new();
    push.connect(&eps.ingest).await?;
    let n_batches = (seconds * 1000.0).round() as usize;
    let msgs = latency_messages(nu, ns, n_batches)
        .into_iter()
        .map(|(b, m)| (b, 0, m))
        .collect();
    let lat = measure(&eps.publish, vec![push], msgs).await?;
    let refits = if learning {
        crate::live::status(&eps.control)
            .await
            .ok()
            .and_then(|s| s.learning)
            .map(|l| l.refits)
            .unwrap_or(0)
    } else {
        0
    };
    running.stop().await;
    let mut name = if learning {
        format!("{transport}, learning ({refits} refits swapped in)")
    } else {
        transport.to_string()
    };
    if threads > 1 {
        name = format!("{name}, {threads} engine threads");
    }
    Ok(summarise(&name, lat, n_batches))
}

/// Sends `msgs` (batch index to time, socket index, bytes), each batch at its millisecond, and
/// collects the latency of every posterior frame published on `publish` (µs).
async fn measure(
    publish: &str,
    pushes: Vec<zeromq::PushSocket>,
    msgs: Vec<(Option<usize>, usize, Vec<u8>)>,
) -> anyhow::Result<Vec<f64>> {
    let mut lat = measure_each(&[publish], pushes, msgs).await?;
    Ok(lat.pop().unwrap_or_default())
}

/// [`measure`] for several deployments at once, each with its own publish endpoint: every batch
/// goes to one deployment only, so a frame's bin names the batch it answers whichever
/// deployment published it. The latencies of each publish endpoint's frames, in its order.
async fn measure_each(
    publishes: &[&str],
    mut pushes: Vec<zeromq::PushSocket>,
    msgs: Vec<(Option<usize>, usize, Vec<u8>)>,
) -> anyhow::Result<Vec<Vec<f64>>> {
    let n_batches = msgs.iter().filter_map(|m| m.0).max().unwrap_or(0);
    let sent: Arc<std::sync::Mutex<Vec<Option<Instant>>>> =
        Arc::new(std::sync::Mutex::new(vec![None; n_batches + 1]));
    // A deployment waiting for its turn publishes nothing: its receiver stops only once every
    // message is sent and its frames have been silent for 2 s.
    let sending = Arc::new(std::sync::atomic::AtomicBool::new(true));
    let mut receivers = Vec::new();
    for publish in publishes {
        let mut sub = zeromq::SubSocket::new();
        sub.connect(publish).await?;
        sub.subscribe(auspex_proto::topic::POSTERIOR).await?;
        let recv_sent = sent.clone();
        let sending = sending.clone();
        receivers.push(tokio::spawn(async move {
            let mut lat = Vec::new();
            loop {
                let m = match tokio::time::timeout(Duration::from_secs(2), sub.recv()).await {
                    Ok(Ok(m)) => m,
                    Err(_) if sending.load(std::sync::atomic::Ordering::Relaxed) => continue,
                    _ => break,
                };
                let now = Instant::now();
                let Some(payload) = m.into_vec().pop() else {
                    continue;
                };
                let Ok(out) = v1::Outbound::decode(payload.as_ref()) else {
                    continue;
                };
                if let Some(v1::outbound::Body::Posterior(p)) = out.body {
                    // Bin ends and batch watermarks are both at k·1000 − 1 ticks.
                    let i = ((p.bin_end_tick + 1) / 1000) as usize;
                    if let Some(Some(t)) = recv_sent.lock().ok().and_then(|v| v.get(i).copied()) {
                        lat.push(now.duration_since(t).as_secs_f64() * 1e6);
                    }
                }
            }
            lat
        }));
    }
    tokio::time::sleep(Duration::from_millis(300)).await;

    let t0 = tokio::time::Instant::now();
    for (batch, to, bytes) in msgs {
        if let Some(i) = batch {
            // The first socket's part of batch i starts its clock.
            let first = sent.lock().map(|v| v[i].is_none()).unwrap_or(false);
            if first {
                tokio::time::sleep_until(t0 + Duration::from_micros(i as u64 * 1000)).await;
                if let Ok(mut v) = sent.lock() {
                    v[i] = Some(Instant::now());
                }
            }
        }
        pushes[to]
            .send(ZmqMessage::from(Bytes::from(bytes)))
            .await?;
    }
    sending.store(false, std::sync::atomic::Ordering::Relaxed);
    let mut out = Vec::new();
    for r in receivers {
        out.push(r.await?);
    }
    Ok(out)
}

/// A shard deployment on loopback: `shards` shard daemons and a combiner.
struct Sharded {
    shards: Vec<auspexd::service::Running>,
    combiner: auspexd::service::Running,
    /// The shard that decodes each unit index.
    part_of: Vec<usize>,
}

impl Sharded {
    /// Starts `shards` shard daemons and a combiner in this process over TCP loopback with the
    /// synthetic model, and waits until every shard has joined.
    async fn start(
        nu: usize,
        ns: usize,
        dir: &std::path::Path,
        shards: u32,
    ) -> anyhow::Result<Self> {
        let model_path = dir.join(format!("bench-{nu}x{ns}-shards.apxm"));
        let model = synthetic_model(nu, ns);
        auspex_proto::model_file::save_model(&model_path, model.spec(), "auspex bench")?;
        let local = "tcp://127.0.0.1:0".to_string();
        let base = auspexd::config::FileConfig {
            model: Some(model_path),
            ingest: Some(local.clone()),
            task_ingest: Some(local.clone()),
            publish: Some(local.clone()),
            control: Some(local.clone()),
            tick_rate_hz: Some(1e6),
            ..Default::default()
        };
        let start = |f: auspexd::config::FileConfig| async move {
            let cfg = auspexd::config::validate(f, &mut Vec::new())?;
            anyhow::Ok(auspexd::service::start(cfg).await?)
        };
        let mut running = Vec::new();
        for part in 0..shards {
            running.push(
                start(auspexd::config::FileConfig {
                    role: Some("shard".into()),
                    part: Some(part),
                    parts: Some(shards),
                    link: Some(local.clone()),
                    ..base.clone()
                })
                .await?,
            );
        }
        let links: Vec<String> = running
            .iter()
            .filter_map(|r| r.endpoints.link.clone())
            .collect();
        let combiner = start(auspexd::config::FileConfig {
            role: Some("combine".into()),
            shards: Some(links),
            ..base
        })
        .await?;
        // Every shard greets before the session starts.
        let t = Instant::now();
        while !crate::live::status(&combiner.endpoints.control)
            .await
            .is_ok_and(|s| s.shards.iter().all(|x| x.joined))
        {
            if t.elapsed() > Duration::from_secs(10) {
                anyhow::bail!("the shards did not join the combiner within 10 s");
            }
            tokio::time::sleep(Duration::from_millis(50)).await;
        }
        let part_of = (0..nu)
            .map(|u| {
                (0..shards)
                    .find(|&p| model.part_units(p, shards).contains(&u))
                    .unwrap_or(0) as usize
            })
            .collect();
        Ok(Sharded {
            shards: running,
            combiner,
            part_of,
        })
    }

    /// Push sockets to every shard's ingest, then to the combiner's task ingest.
    async fn pushes(&self) -> anyhow::Result<Vec<zeromq::PushSocket>> {
        let eps = &self.combiner.endpoints;
        let mut pushes = Vec::new();
        for r in self
            .shards
            .iter()
            .map(|r| &r.endpoints.ingest)
            .chain([eps.task_ingest.as_ref().unwrap_or(&eps.ingest)])
        {
            let mut p = zeromq::PushSocket::new();
            p.connect(r).await?;
            pushes.push(p);
        }
        Ok(pushes)
    }

    async fn stop(self) {
        self.combiner.stop().await;
        for r in self.shards {
            r.stop().await;
        }
    }
}

/// Milliseconds the interleaved comparison gives one set-up before switching to the other: ten
/// whole trials (trials start every 300 ms), so no trial spans a switch.
const TURN_MS: usize = 3000;

/// Batch → posterior latency of one whole daemon and of `shards` shards + a combiner over TCP
/// loopback, **interleaved**: both set-ups run at once and take turns of [`TURN_MS`] (whole
/// trials), `seconds` each in all, so the host's load in any stretch of the run weighs on both
/// alike. The whole daemon gets each batch from one sender; each shard gets the spikes of its
/// part of the units from its own sender, the combiner the trial onsets.
pub async fn latency_interleaved(
    nu: usize,
    ns: usize,
    seconds: f64,
    dir: &std::path::Path,
    shards: u32,
) -> anyhow::Result<(Latency, Latency)> {
    let whole = start_daemon(nu, ns, "tcp", dir, false, 1).await?;
    let sharded = Sharded::start(nu, ns, dir, shards).await?;
    let mut whole_push = zeromq::PushSocket::new();
    whole_push.connect(&whole.endpoints.ingest).await?;
    let mut pushes = vec![whole_push];
    pushes.extend(sharded.pushes().await?);
    // Socket 0: the whole daemon; 1..=shards: the shards; shards + 1: the combiner's task.
    let task = shards as usize + 1;
    let per = ((seconds * 1000.0).round() as usize)
        .div_ceil(TURN_MS)
        .max(1)
        * TURN_MS;
    let n_batches = 2 * per;
    let sharded_turn = |ms: usize| (ms.saturating_sub(1) / TURN_MS) % 2 == 1;
    let mut seqs = vec![0u64; task + 1];
    let mut enc = |to: usize, body: Body| {
        seqs[to] += 1;
        v1::Inbound {
            sender: format!("bench-{to}"),
            seq: seqs[to],
            body: Some(body),
        }
        .encode_to_vec()
    };
    let mut msgs = Vec::new();
    for (batch, bytes) in latency_messages(nu, ns, n_batches) {
        let Some(body) = v1::Inbound::decode(bytes.as_slice())?.body else {
            continue;
        };
        match body {
            Body::SessionStart(s) => {
                for to in 0..=task {
                    msgs.push((None, to, enc(to, Body::SessionStart(s.clone()))));
                }
            }
            Body::Spikes(b) if sharded_turn(batch.unwrap_or(0)) => {
                for shard in 0..shards as usize {
                    let (units, ticks): (Vec<u32>, Vec<i64>) = b
                        .units
                        .iter()
                        .zip(&b.ticks)
                        .filter(|(u, _)| sharded.part_of[**u as usize] == shard)
                        .map(|(u, t)| (*u, *t))
                        .unzip();
                    let body = Body::Spikes(v1::SpikeBatch {
                        units,
                        ticks,
                        complete_through: b.complete_through,
                    });
                    msgs.push((batch, shard + 1, enc(shard + 1, body)));
                }
            }
            Body::Onset(o) if sharded_turn((o.onset_tick / 1000) as usize + 1) => {
                msgs.push((None, task, enc(task, Body::Onset(o))));
            }
            other => msgs.push((batch, 0, enc(0, other))),
        }
    }
    let publishes = [
        whole.endpoints.publish.as_str(),
        sharded.combiner.endpoints.publish.as_str(),
    ];
    let mut lat = measure_each(&publishes, pushes, msgs).await?;
    whole.stop().await;
    sharded.stop().await;
    let sharded_lat = lat.pop().unwrap_or_default();
    let whole_lat = lat.pop().unwrap_or_default();
    Ok((
        summarise("tcp, one whole daemon", whole_lat, per),
        summarise(
            &format!("tcp, {shards} shards + combiner"),
            sharded_lat,
            per,
        ),
    ))
}

/// The size ladder the self-test climbs.
pub const LADDER: [(usize, usize); 7] = [
    (64, 8),
    (128, 16),
    (256, 32),
    (512, 32),
    (1024, 64),
    (2048, 64),
    (4096, 64),
];

/// What `auspex bench` runs.
#[derive(Clone, Debug)]
pub struct Options {
    /// Seconds of 1 kHz batches per latency run.
    pub latency_seconds: f64,
    /// Units × stimuli of the latency runs.
    pub latency_size: (usize, usize),
    /// A model file to time instead of the synthetic ladder.
    pub model: Option<std::path::PathBuf>,
    /// Decoder for the model's timing.
    pub decoder: Decoder,
    /// Run the latency measurements.
    pub latency: bool,
    /// Memory for looked-up COM-Poisson/empirical terms (as the daemon's setting).
    pub table_memory: LookupBudget,
    /// Latency over TCP with learning off and on (refit after every trial), side by side.
    pub learning: bool,
    /// Thread scaling only, at 1024, 2048 and 4096 units × 64 stimuli.
    pub thread_scaling: bool,
    /// Engine threads of the latency runs' daemon (`auspexd --threads`).
    pub threads: u32,
    /// Latency of a whole daemon and of this many shards + a combiner, side by side (0: off).
    pub shards: u32,
    /// `next --policy find-tuning`'s round trip while the daemon decodes.
    pub next: bool,
}

/// Everything `auspex bench` measured.
#[derive(Clone, Debug, Default, serde::Serialize)]
pub struct Report {
    /// The synthetic ladder (empty with a model).
    pub engine: Vec<EnginePoint>,
    /// The user's model.
    pub model: Option<ModelPoint>,
    /// Latency runs.
    pub latency: Vec<Latency>,
    /// Engine threads' throughput.
    pub threads: Vec<ThreadPoint>,
}

/// Runs the self-test and prints the answer.
pub async fn run(opts: &Options) -> anyhow::Result<Report> {
    let t0 = Instant::now();
    let mut report = Report::default();
    match &opts.model {
        Some(path) => {
            let (_, m) = auspex_proto::model_file::load_model(path)?;
            eprintln!("auspex bench: timing {} …", path.display());
            let (dec, tb) = (opts.decoder, opts.table_memory);
            let p = tokio::task::spawn_blocking(move || {
                model_point(Arc::new(m), dec, tb, Duration::from_secs(5))
            })
            .await?;
            print_model_point(path, &p);
            report.model = Some(p);
        }
        None if opts.learning || opts.shards > 0 || opts.next => {}
        None if opts.thread_scaling => {}
        None => report.engine = ladder().await?,
    }
    let cores = std::thread::available_parallelism()
        .map(|n| n.get() as u32)
        .unwrap_or(1);
    if opts.thread_scaling {
        eprintln!("auspex bench: engine threads (auspexd --threads), {cores} cores: throughput of whole trials");
        report.threads = tokio::task::spawn_blocking(move || {
            thread_scaling(&[(1024, 64), (2048, 64), (4096, 64)], cores.max(2))
        })
        .await??;
        return Ok(report);
    }
    if opts.model.is_none() && !opts.learning && opts.shards == 0 && !opts.next {
        eprintln!("auspex bench: engine threads (auspexd --threads), {cores} cores");
        report.threads =
            tokio::task::spawn_blocking(move || thread_scaling(&[(1024, 64)], cores.max(2)))
                .await??;
    }
    if opts.next {
        report.latency = next_latency(opts.latency_seconds, opts.latency_size).await?;
    } else if opts.shards > 0 {
        report.latency =
            sharded_latencies(opts.latency_seconds, opts.latency_size, opts.shards).await?;
    } else if opts.learning {
        report.latency = learning_latencies(opts.latency_seconds, opts.latency_size).await?;
    } else if opts.latency {
        report.latency = latencies(opts.latency_seconds, opts.latency_size, opts.threads).await?;
    }
    eprintln!("bench finished in {:.1} s", t0.elapsed().as_secs_f64());
    Ok(report)
}

async fn ladder() -> anyhow::Result<Vec<EnginePoint>> {
    eprintln!("auspex bench: engine per-bin cost (order statistics, negative binomial counts, ~16 spikes/s per unit)");
    println!(
        "{:>6} × {:<4} {:>12} {:>10}",
        "units", "stim", "µs per bin", "headroom"
    );
    let mut points = Vec::new();
    for &(nu, ns) in &LADDER {
        let p =
            tokio::task::spawn_blocking(move || engine_point(nu, ns, Duration::from_millis(600)))
                .await?;
        println!(
            "{:>6} × {:<4} {:>12.1} {:>9.1}×",
            p.units, p.stimuli, p.us_per_bin, p.headroom
        );
        let stop = p.headroom < 2.0;
        points.push(p);
        if stop {
            break;
        }
    }
    let best = points.iter().rfind(|p| p.headroom >= 10.0);
    match best {
        Some(b) => println!(
            "→ this machine decodes {} units × {} stimuli in real time with ≥ 10× headroom ({:.1} µs per 1 ms bin)",
            b.units, b.stimuli, b.us_per_bin
        ),
        None => println!("→ even {} × {} does not reach 10× headroom here", LADDER[0].0, LADDER[0].1),
    }
    Ok(points)
}

async fn latencies(
    seconds: f64,
    size: (usize, usize),
    threads: u32,
) -> anyhow::Result<Vec<Latency>> {
    let dir = tempfile::tempdir()?;
    let mut lats = Vec::new();
    for transport in ["tcp", "ipc"] {
        eprintln!(
            "latency over {transport} loopback: {} units × {} stimuli, 1 kHz batches for {seconds} s …",
            size.0, size.1
        );
        let l = latency(
            size.0,
            size.1,
            seconds,
            transport,
            dir.path(),
            false,
            threads,
        )
        .await?;
        println!(
            "batch → posterior frame over {}: p50 {:.0} µs, p99 {:.0} µs, p99.9 {:.0} µs, worst {:.0} µs ({} frames)",
            l.transport, l.p50_us, l.p99_us, l.p999_us, l.max_us, l.frames
        );
        lats.push(l);
    }
    Ok(lats)
}

/// `next --policy find-tuning` (and improve-decoding) answered while the daemon decodes in real time: a daemon with
/// the synthetic model of `size` (its stimuli the set find-tuning chooses from), 1 kHz spike
/// batches and trials back to back over TCP as in [`latency`], and a task program asking
/// `next` every 25 ms over control (in turn find-tuning, balanced-blocks and improve-decoding);
/// the request's round trip (µs), beside the frames' latency in the same run.
pub async fn next_latency(seconds: f64, size: (usize, usize)) -> anyhow::Result<Vec<Latency>> {
    let dir = tempfile::tempdir()?;
    eprintln!(
        "`next --policy find-tuning` while decoding: {} units × {} stimuli over tcp, 1 kHz batches for {seconds} s, a request every 25 ms …",
        size.0, size.1
    );
    let running = start_daemon(size.0, size.1, "tcp", dir.path(), false, 1).await?;
    let eps = running.endpoints.clone();
    let mut push = zeromq::PushSocket::new();
    push.connect(&eps.ingest).await?;
    let n_batches = (seconds * 1000.0).round() as usize;
    let msgs = latency_messages(size.0, size.1, n_batches)
        .into_iter()
        .map(|(b, m)| (b, 0, m))
        .collect();
    // A task program keeps its control socket open: one REQ socket for every request.
    let mut req = zeromq::ReqSocket::new();
    req.connect(&eps.control).await?;
    let asking = tokio::spawn(async move {
        use zeromq::{SocketRecv, SocketSend};
        // find-tuning (the steering thread) and balanced-blocks (answered on the engine thread)
        // in turn: the second is the control path's own cost, for reference.
        let mut rtt = [Vec::new(), Vec::new(), Vec::new()];
        let mut refused = Vec::new();
        let t0 = Instant::now();
        let asks: Vec<Vec<u8>> = ["find-tuning", "balanced-blocks", "improve-decoding"]
            .iter()
            .map(|p| {
                v1::ControlRequest {
                    body: Some(v1::control_request::Body::NextStimulus(v1::NextStimulus {
                        policy: p.to_string(),
                    })),
                }
                .encode_to_vec()
            })
            .collect();
        let mut turn = 0;
        // Past the first trials (the warm-up block is cheap), then a request every 25 ms.
        tokio::time::sleep(Duration::from_millis(500)).await;
        while t0.elapsed().as_secs_f64() < seconds - 0.5 {
            let t = Instant::now();
            turn = (turn + 1) % 3;
            if let Err(e) = req
                .send(zeromq::ZmqMessage::from(bytes::Bytes::from(
                    asks[turn].clone(),
                )))
                .await
            {
                refused.push(e.to_string());
                break;
            }
            match req.recv().await {
                Ok(m) => {
                    let bytes = m.into_vec().pop().unwrap_or_default();
                    match v1::ControlReply::decode(bytes.as_ref()) {
                        Ok(r) if r.ok => rtt[turn].push(t.elapsed().as_secs_f64() * 1e6),
                        Ok(r) => refused.push(r.error),
                        Err(e) => refused.push(e.to_string()),
                    }
                }
                Err(e) => {
                    refused.push(e.to_string());
                    break;
                }
            }
            tokio::time::sleep(Duration::from_millis(25)).await;
        }
        (rtt, refused)
    });
    let frames = measure(&eps.publish, vec![push], msgs).await?;
    let (rtt, refused) = asking.await?;
    let choices = crate::live::status(&eps.control)
        .await
        .ok()
        .and_then(|s| s.steering)
        .map_or(0, |s| s.choices);
    running.stop().await;
    if let Some(e) = refused.first() {
        anyhow::bail!("{} of the `next` requests were refused: {e}", refused.len());
    }
    let [find, blocks, decoding] = rtt;
    let f = summarise("tcp frames", frames, n_batches);
    let n = summarise("next find-tuning round trip", find, n_batches);
    let b = summarise("next balanced-blocks round trip", blocks, n_batches);
    let d = summarise("next improve-decoding round trip", decoding, n_batches);
    println!(
        "`next --policy find-tuning` round trip: p50 {:.0} µs, p99 {:.0} µs, worst {:.0} µs ({} requests; {choices} choices made)",
        n.p50_us, n.p99_us, n.max_us, n.frames
    );
    println!(
        "`next --policy balanced-blocks` (the engine thread's; the control path's own cost) in turn: p50 {:.0} µs, p99 {:.0} µs, worst {:.0} µs ({} requests)",
        b.p50_us, b.p99_us, b.max_us, b.frames
    );
    println!(
        "`next --policy improve-decoding` in turn: p50 {:.0} µs, p99 {:.0} µs, worst {:.0} µs ({} requests)",
        d.p50_us, d.p99_us, d.max_us, d.frames
    );
    println!(
        "batch → posterior frame in the same run: p50 {:.0} µs, p99 {:.0} µs, worst {:.0} µs",
        f.p50_us, f.p99_us, f.max_us
    );
    println!("real-time mode: {}", auspexd::realtime::summary());
    Ok(vec![f, n, b, d])
}

/// Batch → posterior latency over TCP loopback of one whole daemon and of `shards` shards + a
/// combiner, interleaved in one run ([`latency_interleaved`]).
async fn sharded_latencies(
    seconds: f64,
    size: (usize, usize),
    shards: u32,
) -> anyhow::Result<Vec<Latency>> {
    let dir = tempfile::tempdir()?;
    eprintln!(
        "latency over tcp loopback, {} units × {} stimuli, 1 kHz batches: one whole daemon and {shards} shards + combiner (each shard sent its units' spikes), taking turns of {} s, {seconds} s each …",
        size.0,
        size.1,
        TURN_MS / 1000
    );
    let (whole, sharded) = latency_interleaved(size.0, size.1, seconds, dir.path(), shards).await?;
    for l in [&whole, &sharded] {
        println!(
            "batch → posterior frame over {}: p50 {:.0} µs, p99 {:.0} µs, p99.9 {:.0} µs, worst {:.0} µs ({} frames)",
            l.transport, l.p50_us, l.p99_us, l.p999_us, l.max_us, l.frames
        );
    }
    println!(
        "→ the deployment adds p50 {:+.0} µs, p99 {:+.0} µs (target: p99 ≤ 300 µs extra)",
        sharded.p50_us - whole.p50_us,
        sharded.p99_us - whole.p99_us
    );
    Ok(vec![whole, sharded])
}

/// Batch → posterior latency over TCP without and with learning (a refit after every labelled
/// trial, each swapped in at the next trial boundary), in one run.
async fn learning_latencies(seconds: f64, size: (usize, usize)) -> anyhow::Result<Vec<Latency>> {
    let dir = tempfile::tempdir()?;
    let mut lats = Vec::new();
    for learning in [false, true] {
        eprintln!(
            "latency over tcp loopback, learning {}: {} units × {} stimuli, 1 kHz batches for {seconds} s …",
            if learning { "on (refit after every trial)" } else { "off" },
            size.0,
            size.1
        );
        let l = latency(size.0, size.1, seconds, "tcp", dir.path(), learning, 1).await?;
        println!(
            "batch → posterior frame over {}: p50 {:.0} µs, p99 {:.0} µs, p99.9 {:.0} µs, worst {:.0} µs ({} frames)",
            l.transport, l.p50_us, l.p99_us, l.p999_us, l.max_us, l.frames
        );
        lats.push(l);
    }
    if let [off, on] = &lats[..] {
        println!(
            "→ p99 with refits / without: {:.2} (p50 {:.2})",
            on.p99_us / off.p99_us,
            on.p50_us / off.p50_us
        );
    }
    Ok(lats)
}

/// What a competing process does in [`under_load`]: spin on the CPU, or stream through memory.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Burn {
    /// A tight arithmetic loop (a CPU-bound program of ordinary priority).
    Cpu,
    /// Reads and writes a 64 MB buffer over and over (a program streaming data, as acquisition
    /// or a display does): it competes for the memory bus and caches.
    Memory,
}

/// Runs one competing load until killed (the hidden `auspex bench --burn` the load bench starts).
pub fn burn(kind: Burn) -> ! {
    match kind {
        Burn::Cpu => {
            let mut x = 0x9e37_79b9_7f4a_7c15u64;
            loop {
                for _ in 0..1_000_000 {
                    x = x.rotate_left(7).wrapping_mul(0x2545_f491_4f6c_dd1d) ^ 1;
                }
                std::hint::black_box(x);
            }
        }
        Burn::Memory => {
            let mut buf = vec![1u64; 8 << 20];
            let mut i = 0u64;
            loop {
                for v in buf.iter_mut() {
                    *v = v.wrapping_add(i);
                }
                i = i.wrapping_add(std::hint::black_box(buf[(i as usize * 4099) % buf.len()]));
            }
        }
    }
}

/// One latency run measured in a child process (`auspex bench --latency-once`), so that each
/// run's daemon has a fresh process whose scheduling is its own.
pub fn latency_child(
    exe: &std::path::Path,
    transport: &str,
    seconds: f64,
    size: (usize, usize),
    realtime: Option<&auspexd::realtime::Plan>,
    learning: bool,
) -> anyhow::Result<Latency> {
    let mut cmd = std::process::Command::new(exe);
    cmd.args(["bench", "--latency-once", transport, "--seconds"])
        .arg(seconds.to_string())
        .args([
            "--units",
            &size.0.to_string(),
            "--stimuli",
            &size.1.to_string(),
        ]);
    if learning {
        cmd.arg("--learning");
    }
    if let Some(p) = realtime {
        cmd.args(["--realtime", "--realtime-priority", &p.priority.to_string()]);
        if !p.cpus.is_empty() {
            let cpus: Vec<String> = p.cpus.iter().map(|c| c.to_string()).collect();
            cmd.args(["--realtime-cpus", &cpus.join(",")]);
        }
    }
    let out = cmd.stderr(std::process::Stdio::inherit()).output()?;
    if !out.status.success() {
        anyhow::bail!("the latency run over {transport} failed ({})", out.status);
    }
    let text = String::from_utf8_lossy(&out.stdout);
    let line = text
        .lines()
        .rev()
        .find(|l| l.starts_with('{'))
        .ok_or_else(|| anyhow::anyhow!("the latency run printed no figures"))?;
    Ok(serde_json::from_str(line)?)
}

/// The figures of one mode over the turns of [`under_load`].
#[derive(Clone, Debug, serde::Serialize)]
pub struct LoadedMode {
    /// "tcp, normal", "ipc, real-time", …
    pub name: String,
    /// Each turn's run.
    pub runs: Vec<Latency>,
}

/// Batch → posterior latency with `cpu` CPU-bound and `memory` memory-streaming processes of
/// ordinary priority running beside it (started here, ended here), in normal and in real-time
/// mode (`plan`: `SCHED_FIFO` at its priority, on its cores), over tcp and ipc: `turns` turns, each running every mode
/// once, the order of normal and real-time alternating from turn to turn so that a drift in the
/// machine's load falls on both.
pub fn under_load(
    cpu: usize,
    memory: usize,
    turns: usize,
    seconds: f64,
    size: (usize, usize),
    plan: &auspexd::realtime::Plan,
    learning: bool,
) -> anyhow::Result<Vec<LoadedMode>> {
    let priority = plan.priority;
    let exe = std::env::current_exe()?;
    struct Loads(Vec<std::process::Child>);
    impl Drop for Loads {
        fn drop(&mut self) {
            for c in &mut self.0 {
                let _ = c.kill();
                let _ = c.wait();
            }
        }
    }
    let mut loads = Loads(Vec::new());
    for (n, kind) in [(cpu, "cpu"), (memory, "memory")] {
        for _ in 0..n {
            loads.0.push(
                std::process::Command::new(&exe)
                    .args(["bench", "--burn", kind])
                    .stdin(std::process::Stdio::null())
                    .stdout(std::process::Stdio::null())
                    .spawn()?,
            );
        }
    }
    eprintln!(
        "latency under load: {cpu} CPU-bound and {memory} memory-streaming processes of ordinary priority; {} units × {} stimuli, {seconds} s per run, {turns} turns of normal and real-time (SCHED_FIFO {priority}) over tcp and ipc …",
        size.0, size.1
    );
    // (name, real-time plan, learning): with `learning`, a third mode learns in real-time mode
    // (a refit after every trial, the heaviest load the learner puts on the path).
    let mut modes: Vec<(&str, Option<&auspexd::realtime::Plan>, bool)> =
        vec![("normal", None, false), ("real-time", Some(plan), false)];
    if learning {
        modes.push(("real-time, learning + recording", Some(plan), true));
    }
    let nm = modes.len();
    let mut out: Vec<LoadedMode> = Vec::new();
    for transport in ["tcp", "ipc"] {
        for (name, _, _) in &modes {
            out.push(LoadedMode {
                name: format!("{transport}, {name}"),
                runs: Vec::new(),
            });
        }
    }
    for turn in 0..turns {
        let mut order: Vec<usize> = (0..nm).collect();
        if turn % 2 == 1 {
            order.reverse();
        }
        for (ti, transport) in ["tcp", "ipc"].iter().enumerate() {
            for &m in &order {
                let l = latency_child(&exe, transport, seconds, size, modes[m].1, modes[m].2)?;
                eprintln!(
                    "  turn {}: {:<14} p50 {:>6.0} µs  p99 {:>7.0} µs  p99.9 {:>7.0} µs  worst {:>7.0} µs",
                    turn + 1,
                    out[ti * nm + m].name,
                    l.p50_us,
                    l.p99_us,
                    l.p999_us,
                    l.max_us
                );
                out[ti * nm + m].runs.push(l);
            }
        }
    }
    drop(loads);
    println!(
        "batch → posterior under load ({cpu} CPU + {memory} memory processes), median over {turns} turns:"
    );
    println!("| | p50 | p99 | p99.9 | worst | turns with p99 ≤ 1 ms |");
    println!("|---|---|---|---|---|---|");
    for m in &out {
        let med = |f: fn(&Latency) -> f64| {
            let mut v: Vec<f64> = m.runs.iter().map(f).collect();
            v.sort_by(|a, b| a.total_cmp(b));
            v.get(v.len() / 2).copied().unwrap_or(f64::NAN)
        };
        println!(
            "| {} | {:.0} µs | {:.0} µs | {:.0} µs | {:.0} µs | {}/{} |",
            m.name,
            med(|l| l.p50_us),
            med(|l| l.p99_us),
            med(|l| l.p999_us),
            med(|l| l.max_us),
            m.runs.iter().filter(|l| l.p99_us <= 1000.0).count(),
            m.runs.len()
        );
    }
    Ok(out)
}
