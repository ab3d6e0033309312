//! Engine worker threads (`auspexd --threads N`): N − 1 threads, each running an engine in the
//! [`Role::Shard`] role on one part of the model's unit blocks; the engine thread's own engine is
//! the combiner and computes part 0. Every inbound body the combiner applies is handed to every
//! worker as one shared `Arc` (no copy per spike per worker; each worker keeps only its own units'
//! spikes), and each worker sends its partials back. Because the population sum is always taken
//! block by block in block order, frames are bit-identical for every thread count.
//!
//! Must not: decide, publish, touch sockets, or apply anything the combiner did not apply in the
//! same order (model and configuration changes travel in the same channel as the bodies).

use auspex_engine::engine::{Engine, EngineConfig, EngineSink, Partial, Role, TrialOutcome};
use auspex_engine::PreparedModel;
use auspex_proto::stream::{apply_body, TrialStimuli};
use auspex_proto::v1::inbound;
use crossbeam_channel::{Receiver, Sender};
use std::sync::Arc;
use std::thread::JoinHandle;

/// Most threads `--threads` accepts (each thread computes one part of the unit blocks).
pub const MAX_THREADS: u32 = 64;

/// One worker's partials for one bin, owned (sent to the engine thread).
pub use auspex_engine::engine::OwnedPartial;

enum WorkerMsg {
    /// A fresh engine (a new session, or the first model).
    New(Arc<PreparedModel>, EngineConfig),
    /// The combiner's model changed (for trials opened from now on).
    SetModel(Arc<PreparedModel>),
    /// The combiner's configuration changed.
    SetConfig(EngineConfig),
    /// An inbound body, as the combiner applies it.
    Body(Arc<inbound::Body>),
    /// End open trials.
    CloseAll(TrialOutcome),
    /// No engine (the session ended).
    Drop,
    /// Reply once everything before this is done (its partials are sent by then).
    Barrier(Sender<()>),
    /// Stop as a panic would (tests of the engine thread's recovery only).
    #[cfg(test)]
    Crash,
}

/// The worker threads and what the engine thread last told them.
pub struct Workers {
    parts: u32,
    txs: Vec<Sender<WorkerMsg>>,
    /// Partials from every worker.
    pub partials: Receiver<OwnedPartial>,
    /// Used value buffers going back to the workers.
    recycle: Sender<Vec<f64>>,
    handles: Vec<JoinHandle<()>>,
    /// (engine generation, model, configuration) last sent.
    sent: Option<(u64, Arc<PreparedModel>, EngineConfig)>,
    /// Parts whose worker has stopped (bit p: part p), found when a send fails.
    dead: std::cell::Cell<u64>,
}

struct PartialSink<'a> {
    tx: &'a Sender<OwnedPartial>,
    recycled: &'a Receiver<Vec<f64>>,
}

impl EngineSink for PartialSink<'_> {
    fn partial(&mut self, p: &Partial<'_>) {
        let values = self.recycled.try_recv().unwrap_or_default();
        let _ = self.tx.send(OwnedPartial::copied(p, values));
    }
}

/// The combiner's configuration for `threads` threads (Whole for one).
pub fn combiner_role(threads: u32) -> Role {
    if threads <= 1 {
        Role::Whole
    } else {
        Role::Combiner {
            part: Some(0),
            parts: threads,
        }
    }
}

impl Workers {
    /// Starts `threads − 1` workers (None for one thread).
    pub fn start(threads: u32) -> std::io::Result<Option<Workers>> {
        if threads <= 1 {
            return Ok(None);
        }
        let (ptx, prx) = crossbeam_channel::unbounded();
        let (rtx, rrx) = crossbeam_channel::bounded::<Vec<f64>>(4096);
        let mut txs = Vec::new();
        let mut handles = Vec::new();
        for part in 1..threads {
            // Bounded: a worker that falls behind holds the engine thread back (and so ingest,
            // whose backlog health reports) instead of queueing without limit.
            let (tx, rx) = crossbeam_channel::bounded::<WorkerMsg>(65536);
            let (ptx, rrx) = (ptx.clone(), rrx.clone());
            handles.push(
                std::thread::Builder::new()
                    .name(format!("auspex-part-{part}"))
                    .spawn(move || worker(part, threads, rx, ptx, rrx))?,
            );
            txs.push(tx);
        }
        Ok(Some(Workers {
            parts: threads,
            txs,
            partials: prx,
            recycle: rtx,
            handles,
            sent: None,
            dead: std::cell::Cell::new(0),
        }))
    }

    /// Threads in all (the engine thread included).
    pub fn threads(&self) -> u32 {
        self.parts
    }

    fn send(&self, f: impl Fn() -> WorkerMsg) {
        for (i, tx) in self.txs.iter().enumerate() {
            if tx.send(f()).is_err() {
                // The worker has stopped (it can only have panicked): its part is lost.
                self.dead.set(self.dead.get() | 1u64 << (i + 1));
            }
        }
    }

    /// Parts whose worker has stopped (bit p: part p). The engine thread gives them up
    /// (`Engine::lose_part`) so decoding goes on without their units, said in every frame.
    pub fn dead_parts(&self) -> u64 {
        self.dead.get()
    }

    /// Brings the workers to the combiner's model and configuration (`generation` changes each
    /// time the engine thread makes a fresh engine). Call before handing them the next body.
    pub fn sync(&mut self, engine: Option<&Engine>, generation: u64) {
        let Some(e) = engine else {
            if self.sent.take().is_some() {
                self.send(|| WorkerMsg::Drop);
            }
            return;
        };
        match &self.sent {
            Some((g, m, c)) if *g == generation => {
                if !Arc::ptr_eq(m, e.model()) {
                    let m = e.model().clone();
                    self.send(|| WorkerMsg::SetModel(m.clone()));
                    let c = e.config().clone();
                    self.send(|| WorkerMsg::SetConfig(c.clone()));
                } else if c != e.config() {
                    let c = e.config().clone();
                    self.send(|| WorkerMsg::SetConfig(c.clone()));
                } else {
                    return;
                }
            }
            _ => {
                let (m, c) = (e.model().clone(), e.config().clone());
                self.send(|| WorkerMsg::New(m.clone(), c.clone()));
            }
        }
        self.sent = Some((generation, e.model().clone(), e.config().clone()));
    }

    /// Hands a body the combiner is about to apply to every worker.
    pub fn body(&self, body: &Arc<inbound::Body>) {
        self.send(|| WorkerMsg::Body(body.clone()));
    }

    /// Ends the workers' open trials (the combiner ends its own).
    pub fn close_all(&self, outcome: TrialOutcome) {
        self.send(|| WorkerMsg::CloseAll(outcome));
    }

    /// Waits until every worker has done everything handed to it so far; their partials are
    /// then all in [`Workers::partials`]. Used before trials are closed, so a session that ends
    /// right after its last spikes still completes those trials as one engine would.
    pub fn barrier(&self) {
        let (tx, rx) = crossbeam_channel::bounded(self.txs.len());
        self.send(|| WorkerMsg::Barrier(tx.clone()));
        drop(tx);
        for _ in 0..self.txs.len() {
            // A worker that stopped never answers; its part is marked dead by `send`.
            if rx.recv_timeout(std::time::Duration::from_secs(5)).is_err() {
                break;
            }
        }
    }

    /// Gives a used value buffer back.
    pub fn recycle(&self, p: OwnedPartial) {
        let _ = self.recycle.try_send(p.values);
    }
}

impl Drop for Workers {
    fn drop(&mut self) {
        self.txs.clear();
        for h in self.handles.drain(..) {
            let _ = h.join();
        }
    }
}

/// The next message: a short spin first (bins arrive every few µs when decoding flat out, and
/// parking and waking a thread per bin costs more than the bin), then a blocking wait.
fn next(rx: &Receiver<WorkerMsg>, rt: Option<&crate::realtime::PathThread>) -> Option<WorkerMsg> {
    if let Some(t) = rt {
        // Real-time threads never spin: they block, and tell the guard.
        if let Ok(m) = rx.try_recv() {
            return Some(m);
        }
        t.idle();
        let m = rx.recv().ok();
        t.busy();
        return m;
    }
    let t0 = std::time::Instant::now();
    loop {
        match rx.try_recv() {
            Ok(m) => return Some(m),
            Err(crossbeam_channel::TryRecvError::Disconnected) => return None,
            Err(crossbeam_channel::TryRecvError::Empty) => {}
        }
        if t0.elapsed() > SPIN {
            return rx.recv().ok();
        }
        std::hint::spin_loop();
    }
}

/// How long a worker spins for its next message before it parks.
const SPIN: std::time::Duration = std::time::Duration::from_micros(50);

/// Worker `part` of `parts`' configuration: the engine thread's, with the worker's role — part
/// `part` of the blocks beside a combiner, or slice `part` of a shard daemon's part.
fn shard_config(c: &EngineConfig, part: u32, parts: u32) -> EngineConfig {
    let mut c = c.clone();
    c.role = match c.role {
        Role::ShardSlice {
            part: p, parts: pp, ..
        } => Role::ShardSlice {
            part: p,
            parts: pp,
            slice: part,
            slices: parts,
        },
        _ => Role::Shard { part, parts },
    };
    c
}

fn worker(
    part: u32,
    parts: u32,
    rx: Receiver<WorkerMsg>,
    tx: Sender<OwnedPartial>,
    recycled: Receiver<Vec<f64>>,
) {
    let mut engine: Option<Engine> = None;
    let names = TrialStimuli::default();
    let current: Arc<[String]> = Arc::from(Vec::new());
    let mut windows = Vec::new();
    let mut sink = PartialSink {
        tx: &tx,
        recycled: &recycled,
    };
    let rt = crate::realtime::enter("engine worker", 0);
    while let Some(msg) = next(&rx, rt.as_deref()) {
        match msg {
            WorkerMsg::New(m, c) => {
                // The combiner built the same engine with the same model and settings.
                engine = Engine::new(m, shard_config(&c, part, parts)).ok();
            }
            WorkerMsg::SetModel(m) => {
                if let Some(e) = engine.as_mut() {
                    let _ = e.set_model(m);
                }
            }
            WorkerMsg::SetConfig(c) => {
                if let Some(e) = engine.as_mut() {
                    let _ = e.set_config(shard_config(&c, part, parts));
                }
            }
            WorkerMsg::Body(b) => {
                // Refusals are the combiner's to count and report; labels do not concern a
                // shard (the empty stimulus list makes them no-ops).
                let _ = apply_body(
                    engine.as_mut(),
                    None,
                    false,
                    &names,
                    &current,
                    &b,
                    &mut sink,
                    &mut windows,
                );
            }
            WorkerMsg::CloseAll(o) => {
                if let Some(e) = engine.as_mut() {
                    e.close_all(o, &mut sink);
                }
            }
            WorkerMsg::Drop => engine = None,
            WorkerMsg::Barrier(done) => {
                let _ = done.send(());
            }
            #[cfg(test)]
            WorkerMsg::Crash => return,
        }
    }
}

/// The daemon's threaded engine outside the daemon, for measuring it (`auspex bench`'s thread
/// scaling): a combiner and `threads − 1` workers fed exactly as the engine thread feeds them —
/// one shared body per bin, partials added as they come back.
pub struct ThreadedDecoder {
    engine: Engine,
    workers: Option<Workers>,
    sink: TrialCounter,
}

/// The worker threads stopped answering while a trial waited for their partials.
#[derive(Debug, thiserror::Error)]
#[error("engine threads stopped answering for 10 s")]
pub struct WorkersStalled;

#[derive(Default)]
struct TrialCounter {
    ends: u64,
    frames: u64,
}

impl EngineSink for TrialCounter {
    fn trial_end(&mut self, _: &auspex_engine::engine::TrialEnd<'_>) {
        self.ends += 1;
    }
    fn frame(&mut self, _: &auspex_engine::engine::Frame<'_>) {
        self.frames += 1;
    }
}

impl ThreadedDecoder {
    /// `threads` engine threads (1: the combiner alone) on `model`, ticks of 1 ms.
    pub fn start(
        model: Arc<PreparedModel>,
        threads: u32,
    ) -> Result<Self, crate::start_error::StartError> {
        let mut cfg = EngineConfig::new(1000.0);
        cfg.role = combiner_role(threads);
        let engine =
            Engine::new(model, cfg).map_err(|cause| crate::start_error::StartError::Engine {
                model: "benchmark model".into(),
                cause,
            })?;
        let mut workers =
            Workers::start(threads).map_err(|e| crate::start_error::StartError::Spawn {
                what: "engine worker threads",
                cause: e.to_string(),
            })?;
        if let Some(w) = workers.as_mut() {
            w.sync(Some(&engine), 1);
        }
        Ok(ThreadedDecoder {
            engine,
            workers,
            sink: TrialCounter::default(),
        })
    }

    /// Decodes trial `trial` (stimulus 0) at tick `onset`, one batch per 1-tick bin holding the
    /// units in `bins[b]`; returns once the trial has ended.
    pub fn decode_trial(
        &mut self,
        trial: u64,
        onset: i64,
        bins: &[Vec<u32>],
    ) -> Result<(), WorkersStalled> {
        let ended = self.sink.ends + 1;
        let (e, sink) = (&mut self.engine, &mut self.sink);
        let onset_body = Arc::new(inbound::Body::Onset(auspex_proto::v1::TrialOnset {
            trial,
            onset_tick: onset,
            ..Default::default()
        }));
        if let Some(w) = &self.workers {
            w.body(&onset_body);
        }
        let _ = e.open_trial(trial, onset, Some(0), sink);
        for (b, units) in bins.iter().enumerate() {
            let tick = onset + b as i64;
            let body = Arc::new(inbound::Body::Spikes(auspex_proto::v1::SpikeBatch {
                units: units.clone(),
                ticks: vec![tick; units.len()],
                complete_through: tick,
            }));
            if let Some(w) = &self.workers {
                w.body(&body);
            }
            for &u in units {
                let _ = e.spike(u, tick);
            }
            let _ = e.advance(tick, sink);
            if let Some(w) = &self.workers {
                while let Ok(p) = w.partials.try_recv() {
                    let _ = e.add_partial(&p.as_partial(), sink);
                    w.recycle(p);
                }
            }
        }
        // The trial is decoded once every worker's last partial is in.
        while self.sink.ends < ended {
            let Some(w) = &self.workers else { break };
            match w.partials.recv_timeout(std::time::Duration::from_secs(10)) {
                Ok(p) => {
                    let _ = self.engine.add_partial(&p.as_partial(), &mut self.sink);
                    w.recycle(p);
                }
                Err(_) => return Err(WorkersStalled),
            }
        }
        Ok(())
    }

    /// Frames published so far.
    pub fn frames(&self) -> u64 {
        self.sink.frames
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use auspex_engine::count::CountParams;
    use auspex_engine::engine::{Frame, Role};
    use auspex_engine::model::{CellSpec, CellSummary, ModelSpec};
    use auspex_proto::v1;

    fn model(nu: usize, ns: usize, nb: usize, scale: f64) -> Arc<PreparedModel> {
        let mut cells = Vec::new();
        for u in 0..nu {
            for s in 0..ns {
                let mean = scale * (0.5 + ((u * 5 + s * 3) % 7) as f64 * 0.5);
                let q: Vec<f64> = (0..nb)
                    .map(|b| 1.0 + ((b + u + 2 * s) % 5) as f64)
                    .collect();
                let z: f64 = q.iter().sum();
                cells.push(CellSpec {
                    count: if u % 2 == 0 {
                        CountParams::Poisson { mean }
                    } else {
                        CountParams::NegativeBinomial { mean, shape: 3.0 }
                    },
                    timing: q.iter().map(|x| x / z).collect(),
                    summary: CellSummary::default(),
                });
            }
        }
        Arc::new(auspex_engine::Model::new(ModelSpec::numbered(nu, ns, nb, cells)).unwrap())
            .prepare(auspex_engine::LookupBudget::DEFAULT)
    }

    #[derive(Default)]
    struct Frames(Vec<(u64, u32, Vec<u64>)>);
    impl EngineSink for Frames {
        fn frame(&mut self, f: &Frame<'_>) {
            self.0.push((
                f.trial,
                f.bin,
                f.posterior.iter().map(|p| p.to_bits()).collect(),
            ));
        }
    }

    /// Bodies of a session: trials every 30 ms with 40-bin windows (they overlap), spikes from
    /// a fixed generator, one batch per 1 ms tick; the model is swapped before trial 6 opens and
    /// the policy changed before trial 9.
    fn session() -> Vec<(Option<u32>, inbound::Body)> {
        let mut out = Vec::new();
        let mut x: u64 = 12345;
        for tick in 0..400i64 {
            if tick % 30 == 0 {
                let trial = (tick / 30 + 1) as u64;
                let event = match trial {
                    6 => Some(1),
                    9 => Some(2),
                    _ => None,
                };
                out.push((
                    event,
                    inbound::Body::Onset(v1::TrialOnset {
                        trial,
                        onset_tick: tick,
                        stimulus: String::new(),
                    }),
                ));
            }
            let mut units = Vec::new();
            for _ in 0..(tick % 7) {
                x = x
                    .wrapping_mul(6364136223846793005)
                    .wrapping_add(1442695040888963407);
                units.push((x >> 40) as u32 % 200);
            }
            let n = units.len();
            out.push((
                None,
                inbound::Body::Spikes(v1::SpikeBatch {
                    units,
                    ticks: vec![tick; n],
                    complete_through: tick,
                }),
            ));
        }
        out
    }

    fn run(threads: u32) -> Frames {
        let (a, b) = (model(200, 4, 40, 1.0), model(200, 4, 40, 2.5));
        let mut cfg = EngineConfig::new(1000.0);
        cfg.role = combiner_role(threads);
        let mut e = Engine::new(a, cfg.clone()).unwrap();
        let mut workers = Workers::start(threads).unwrap();
        let mut out = Frames::default();
        let (names, current) = (TrialStimuli::default(), Arc::from(Vec::new()));
        for (event, body) in session() {
            match event {
                Some(1) => e.set_model(b.clone()).unwrap(),
                Some(2) => {
                    cfg.policy.threshold = 0.6;
                    e.set_config(cfg.clone()).unwrap();
                }
                _ => {}
            }
            let body = Arc::new(body);
            if let Some(w) = workers.as_mut() {
                w.sync(Some(&e), 1);
                w.body(&body);
            }
            let _ = apply_body(
                Some(&mut e),
                None,
                false,
                &names,
                &current,
                &body,
                &mut out,
                &mut Vec::new(),
            );
            if let Some(w) = &workers {
                while let Ok(p) = w.partials.try_recv() {
                    e.add_partial(&p.as_partial(), &mut out).unwrap();
                }
            }
        }
        if let Some(w) = &workers {
            w.barrier();
            while let Ok(p) = w.partials.try_recv() {
                e.add_partial(&p.as_partial(), &mut out).unwrap();
            }
        }
        assert_eq!(
            e.open_trials().collect::<Vec<_>>(),
            vec![14],
            "only the last trial, cut by the end of the session, is open"
        );
        out.0.sort_by_key(|f| (f.0, f.1));
        out
    }

    /// A worker that stops is found at the next hand-off; the combiner gives its part up, the
    /// trial still completes, and its frames name the missing part.
    #[test]
    fn a_stopped_worker_is_found_and_its_part_given_up() {
        let m = model(200, 4, 40, 1.0);
        let mut cfg = EngineConfig::new(1000.0);
        cfg.role = combiner_role(3);
        let mut e = Engine::new(m, cfg).unwrap();
        let mut w = Workers::start(3).unwrap().unwrap();
        w.sync(Some(&e), 1);
        let _ = w.txs[1].send(WorkerMsg::Crash);
        w.handles.remove(1).join().unwrap();
        let (names, current) = (TrialStimuli::default(), Arc::from(Vec::new()));
        #[derive(Default)]
        struct Lost(Vec<u64>);
        impl EngineSink for Lost {
            fn frame(&mut self, f: &Frame<'_>) {
                self.0.push(f.lost_parts);
            }
        }
        let mut lost = Lost::default();
        for (_, body) in session().into_iter().take(60) {
            let body = Arc::new(body);
            w.body(&body);
            let dead = w.dead_parts();
            let newly = dead & !e.lost_parts();
            for p in 0..64 {
                if newly & (1u64 << p) != 0 {
                    e.lose_part(p, &mut lost);
                }
            }
            let _ = apply_body(
                Some(&mut e),
                None,
                false,
                &names,
                &current,
                &body,
                &mut lost,
                &mut Vec::new(),
            );
            while let Ok(p) = w.partials.try_recv() {
                let _ = e.add_partial(&p.as_partial(), &mut lost);
            }
        }
        w.barrier();
        while let Ok(p) = w.partials.try_recv() {
            let _ = e.add_partial(&p.as_partial(), &mut lost);
        }
        assert_eq!(w.dead_parts(), 1 << 2, "the second worker computes part 2");
        // 60 bodies: onsets at ticks 0 and 30 and batches for ticks 0..=57.
        assert_eq!(
            lost.0.len(),
            40 + 28,
            "trial 1 whole, trial 2 up to the last batch"
        );
        assert!(
            lost.0.iter().all(|&l| l == 1 << 2),
            "every frame names part 2"
        );
    }

    /// Worker threads, with a model swap and a policy change mid-session, give the frames of one
    /// engine bit for bit; the role check refuses a part outside the parts.
    #[test]
    fn workers_with_a_model_swap_equal_one_engine() {
        let one = run(1);
        assert_eq!(
            one.0.len(),
            13 * 40 + 10,
            "13 full trials and one cut by the end"
        );
        for threads in [2, 3, 5] {
            let got = run(threads);
            assert!(got.0 == one.0, "{threads} threads differ from one");
        }
        let mut c = EngineConfig::new(1000.0);
        c.role = Role::Shard { part: 3, parts: 3 };
        assert!(Engine::new(model(10, 2, 5, 1.0), c).is_err());
    }
}
