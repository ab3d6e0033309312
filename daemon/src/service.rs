//! Wiring: binds every socket, starts the engine thread, the recorder, the publisher, ingest
//! and control tasks, and stops them in order. `run(config, shutdown)` takes its shutdown
//! trigger as an argument so tests can drive it; `start` returns the bound endpoints (useful
//! with port 0) and a handle to stop.

use crate::clock::mono_ns;
use crate::config::{DaemonConfig, Deployment, IngestPattern};
use crate::engine_thread::{EngineThread, EngineThreadSetup, LearnSetup};
use crate::learner::LearnerThread;
use crate::messages::EngineInput;
use crate::publish::{bind_pub, run_publisher, PublishStats, Publisher};
use crate::recorder::{resolve_path, Recorder};
use crate::shard_link::{Link, ShardView};
use auspex_engine::engine::EngineConfig;
use auspex_modelling::fit::FitOptions;
use auspex_modelling::learn::LearnOptions;
use std::future::Future;
use std::sync::Arc;
use tokio::sync::watch;
use tokio::task::JoinHandle;
use zeromq::Socket;

pub use crate::start_error::StartError;

fn bind_error(socket: &'static str, endpoint: &str) -> impl FnOnce(zeromq::ZmqError) -> StartError {
    let endpoint = endpoint.to_string();
    move |cause| StartError::Bind {
        socket,
        endpoint,
        cause,
    }
}

/// Endpoints as bound (ports resolved).
#[derive(Clone, Debug)]
pub struct BoundEndpoints {
    /// Main ingest.
    pub ingest: String,
    /// Task ingest.
    pub task_ingest: Option<String>,
    /// Publish.
    pub publish: String,
    /// Control.
    pub control: String,
    /// Recording file.
    pub recording: Option<std::path::PathBuf>,
    /// A shard's link endpoint.
    pub link: Option<String>,
}

/// A running daemon.
pub struct Running {
    /// Where it listens.
    pub endpoints: BoundEndpoints,
    stop_tx: watch::Sender<bool>,
    engine_tx: crossbeam_channel::Sender<EngineInput>,
    tasks: Vec<JoinHandle<()>>,
    publisher: JoinHandle<()>,
    engine: std::thread::JoinHandle<()>,
    recorder: Option<Recorder>,
    learner: Option<LearnerThread>,
}

/// What a stopped daemon reports.
#[derive(Debug)]
pub struct StopSummary {
    /// Recording write errors.
    pub recorder_errors: u64,
}

/// The runtime the daemon's sockets run on: a single worker thread. The I/O tasks only move
/// bytes (decoding and encoding happen on the engine thread), and with one worker a batch's
/// path — ingest task, engine thread, publisher and the PUB socket's tasks — needs fewer
/// cross-thread wake-ups: on the 2-core benchmark machine this halved the median spike-batch →
/// posterior latency and cut its 99.9th percentile from ~1.5–2 ms to ~0.7 ms (`BENCHMARKS.md`).
///
/// In real-time mode ([`crate::realtime::configure`] called first) its worker thread — the
/// first the runtime starts — runs under `SCHED_FIFO` one above the engine thread, and tells
/// the guard when it parks and wakes.
pub fn io_runtime() -> std::io::Result<tokio::runtime::Runtime> {
    use std::sync::atomic::{AtomicBool, Ordering};
    thread_local! {
        static PATH: std::cell::RefCell<Option<std::sync::Arc<crate::realtime::PathThread>>> =
            const { std::cell::RefCell::new(None) };
    }
    let first = std::sync::Arc::new(AtomicBool::new(true));
    tokio::runtime::Builder::new_multi_thread()
        .worker_threads(1)
        .thread_name("auspexd-io")
        .on_thread_start(move || {
            // Only the worker (started with the runtime); blocking-pool threads stay ordinary.
            if crate::realtime::configured() && first.swap(false, Ordering::Relaxed) {
                let t = crate::realtime::enter("socket thread", 1);
                PATH.with(|p| *p.borrow_mut() = t);
            }
        })
        .on_thread_park(|| {
            PATH.with(|p| {
                if let Some(t) = p.borrow().as_ref() {
                    t.idle();
                }
            })
        })
        .on_thread_unpark(|| {
            PATH.with(|p| {
                if let Some(t) = p.borrow().as_ref() {
                    t.busy();
                }
            })
        })
        .enable_all()
        .build()
}

/// Whether `--record PATH` names a directory to record into: one that exists, a path written
/// with a trailing `/`, or a path that does not exist and has no extension (`--record
/// sessions`); a path with an extension (`today.apxs`) is a file.
pub fn wants_directory(p: &std::path::Path) -> bool {
    p.is_dir()
        || p.as_os_str()
            .to_string_lossy()
            .ends_with(std::path::MAIN_SEPARATOR)
        || (!p.exists() && p.extension().is_none())
}

/// Binds and starts everything.
pub async fn start(cfg: DaemonConfig) -> Result<Running, StartError> {
    let model = match &cfg.model {
        Some(path) => {
            let (_, model) = auspex_proto::model_file::load_model(path)?;
            let t0 = std::time::Instant::now();
            let model = Arc::new(model).prepare(cfg.table_memory);
            tracing::info!(
                model = %path.display(),
                units = model.n_units(),
                stimuli = model.n_stimuli(),
                prepare_s = t0.elapsed().as_secs_f64(),
                table_mb = model.table_bytes() >> 20,
                looked_up_counts = %model
                    .table_lookup_counts()
                    .map(|n| format!("up to {n}"))
                    .unwrap_or_else(|| "none (no table-family cells)".into()),
                "model prepared"
            );
            Some(model)
        }
        None => None,
    };
    let model_label = cfg
        .model
        .as_ref()
        .map(|p| p.display().to_string())
        .unwrap_or_default();
    let (engine_tx, engine_rx) = crossbeam_channel::bounded(cfg.engine_queue);
    let (pub_tx, pub_rx) = tokio::sync::mpsc::channel(cfg.publish_queue);
    let stats = Arc::new(PublishStats::default());
    let (stop_tx, stop_rx) = watch::channel(false);

    let (pub_sock, publish_ep) = bind_pub(&cfg.publish)
        .await
        .map_err(bind_error("publish", &cfg.publish))?;
    let mut tasks = Vec::new();
    let ingest_ep = match cfg.ingest_pattern {
        IngestPattern::Pull => {
            let mut s = zeromq::PullSocket::new();
            let ep = s
                .bind(&cfg.ingest)
                .await
                .map_err(bind_error("ingest", &cfg.ingest))?;
            tasks.push(tokio::spawn(crate::ingest::run_ingest(
                s,
                0,
                engine_tx.clone(),
                stop_rx.clone(),
            )));
            ep.to_string()
        }
        IngestPattern::Sub => {
            let mut s = zeromq::SubSocket::new();
            let ep = s
                .bind(&cfg.ingest)
                .await
                .map_err(bind_error("ingest", &cfg.ingest))?;
            s.subscribe("").await.map_err(|e| StartError::Spawn {
                what: "ingest subscription",
                cause: e.to_string(),
            })?;
            tasks.push(tokio::spawn(crate::ingest::run_ingest(
                s,
                0,
                engine_tx.clone(),
                stop_rx.clone(),
            )));
            ep.to_string()
        }
    };
    let task_ep = match &cfg.task_ingest {
        Some(t) => {
            let mut s = zeromq::PullSocket::new();
            let ep = s.bind(t).await.map_err(bind_error("task ingest", t))?;
            tasks.push(tokio::spawn(crate::ingest::run_ingest(
                s,
                1,
                engine_tx.clone(),
                stop_rx.clone(),
            )));
            Some(ep.to_string())
        }
        None => None,
    };
    let mut rep = zeromq::RouterSocket::new();
    let control_ep = rep
        .bind(&cfg.control)
        .await
        .map_err(bind_error("control", &cfg.control))?;
    tasks.push(tokio::spawn(crate::control::run_control(
        rep,
        engine_tx.clone(),
        stop_rx.clone(),
        cfg.table_memory,
    )));

    let (link, link_ep) = start_link(
        &cfg,
        model.as_deref().map(|m| &**m),
        &engine_tx,
        &stop_rx,
        &mut tasks,
    )
    .await?;

    let recorder = match &cfg.record {
        Some(p) => {
            if wants_directory(p) && !p.is_dir() {
                std::fs::create_dir_all(p).map_err(|cause| StartError::Recording {
                    path: p.clone(),
                    cause,
                })?;
            }
            if p.is_dir() {
                tracing::info!(directory = %p.display(), "recording each session into a file of its own in this directory");
            } else {
                tracing::info!(file = %p.display(), "recording into this file (sessions after the first into numbered files beside it)");
            }
            let now_s = std::time::SystemTime::now()
                .duration_since(std::time::UNIX_EPOCH)
                .map(|d| d.as_secs())
                .unwrap_or(0);
            let path = resolve_path(p, now_s);
            Some(
                Recorder::start(
                    path.clone(),
                    &model_label,
                    crate::clock::now_ns(),
                    p.is_dir(),
                )
                .map_err(|cause| StartError::Recording {
                    path: path.clone(),
                    cause,
                })?,
            )
        }
        None => None,
    };
    if let Some(m) = &model {
        let window_s = m.n_bins() as f64 * m.bin_width_s();
        if cfg.target_accuracy.is_none() && cfg.policy.min_time_s > window_s + 1e-9 {
            tracing::warn!(
                min_time_ms = cfg.policy.min_time_s * 1000.0,
                window_ms = window_s * 1000.0,
                "the minimum decision time is past the window end: every decision will come at the window end"
            );
        }
        if cfg.threads as usize > m.n_blocks() {
            tracing::warn!(
                threads = cfg.threads,
                units = m.n_units(),
                blocks = m.n_blocks(),
                "more engine threads than blocks of {} units: the extra threads have nothing to do (use --threads {})",
                auspex_engine::model::UNIT_BLOCK,
                m.n_blocks()
            );
        }
    }
    let mut ec = EngineConfig::new(cfg.tick_rate_hz.unwrap_or(1e6));
    ec.decoder = cfg.decoder;
    ec.policy = cfg.policy;
    ec.calibrated = cfg.calibrated;
    if let (Some(t), Some(m)) = (cfg.target_accuracy, &model) {
        // Refuse rather than promise: a loaded model whose record cannot support the target.
        let (_, line) =
            crate::promise::PromiseKeeper::policy_for(t, Some(m), &ec).map_err(|reason| {
                StartError::Promise {
                    model: model_label.clone(),
                    target: t,
                    reason,
                }
            })?;
        tracing::info!("{line}");
    }
    let learner = match &cfg.learn {
        Some(l) => {
            let (window_s, bin_width_s) = match &model {
                Some(m) => (m.bin_width_s() * m.n_bins() as f64, m.bin_width_s()),
                None => (l.window_s.unwrap_or(0.25), l.bin_width_s.unwrap_or(0.001)),
            };
            let options = LearnOptions {
                fit: FitOptions {
                    bin_width_s,
                    window_s,
                    families: l.families.clone(),
                    ..FitOptions::default()
                },
                min_trials_per_stimulus: l.min_trials,
                ..LearnOptions::default()
            };
            // Refuse now what could never fit (a window that is no whole number of bins).
            auspex_modelling::fit::window_bins(bin_width_s, window_s, 1.0 / bin_width_s)
                .map_err(|e| StartError::Learning(e.to_string()))?;
            let thread = LearnerThread::start(
                options.clone(),
                l.cadence,
                cfg.table_memory,
                engine_tx.clone(),
            )
            .map_err(|e| StartError::Spawn {
                what: "learner thread",
                cause: e.to_string(),
            })?;
            let setup = LearnSetup {
                options,
                cadence: l.cadence,
                enabled: !l.frozen,
            };
            tracing::info!(
                window_s,
                bin_width_s,
                min_trials = l.min_trials,
                refit_every_trials = l.cadence.every_trials,
                refit_every_s = l.cadence.every.as_secs_f64(),
                frozen = l.frozen,
                "learning from labelled trials"
            );
            Some((thread, setup))
        }
        None => None,
    };
    let steering = crate::steering::Steering::spawn(
        cfg.steer,
        cfg.seed,
        cfg.stimuli.clone(),
        recorder.as_ref().map(|r| r.sender()),
    )
    .map_err(|e| StartError::Spawn {
        what: "steering thread",
        cause: e.to_string(),
    })?;
    let setup = EngineThreadSetup {
        steering,
        stimuli: cfg.stimuli.clone(),
        steer_window_s: model.as_ref().map(|m| m.n_bins() as f64 * m.bin_width_s()),
        model: model.clone(),
        model_path: model_label.clone(),
        record_dir: cfg.record.as_ref().filter(|p| p.is_dir()).cloned(),
        learn: learner.as_ref().map(|(t, s)| (s.clone(), t.sender())),
        config: ec,
        tick_rate: cfg.tick_rate_hz,
        link,
        recorder_errors: recorder.as_ref().map(|r| r.errors()).unwrap_or_default(),
        publisher: Publisher::new(pub_tx, stats.clone()),
        recorder: recorder.as_ref().map(|r| r.sender()),
        recording_path: recorder
            .as_ref()
            .map(|r| r.path.display().to_string())
            .unwrap_or_default(),
        max_message_bytes: cfg.max_message_bytes,
        threads: cfg.threads,
        seed: cfg.seed,
        health_period: cfg.health_period,
        target_accuracy: cfg.target_accuracy,
    };
    let et = EngineThread::new(setup, engine_rx.clone()).map_err(|cause| StartError::Engine {
        model: model_label.clone(),
        cause,
    })?;
    let engine = std::thread::Builder::new()
        .name("auspex-engine".into())
        .spawn(move || et.run(engine_rx))
        .map_err(|e| StartError::Spawn {
            what: "engine thread",
            cause: e.to_string(),
        })?;
    let publisher = tokio::spawn(run_publisher(pub_sock, pub_rx, stats));
    let endpoints = BoundEndpoints {
        ingest: ingest_ep,
        task_ingest: task_ep,
        publish: publish_ep,
        control: control_ep.to_string(),
        recording: recorder.as_ref().map(|r| r.path.clone()),
        link: link_ep,
    };
    tracing::info!(ingest = %endpoints.ingest,
        task_ingest = %endpoints.task_ingest.as_deref().unwrap_or("off"),
        publish = %endpoints.publish, control = %endpoints.control,
        recording = %endpoints.recording.as_ref().map(|p| p.display().to_string()).unwrap_or_else(|| "off".into()),
        model = %model_label, learning = cfg.learn.is_some(), role = cfg.deployment.name(),
        link = %endpoints.link.as_deref().unwrap_or("none"),
        realtime = if crate::realtime::configured() { "requested (`auspex status` says what was granted)" } else { "off" },
        "auspexd listening");
    Ok(Running {
        endpoints,
        stop_tx,
        engine_tx,
        tasks,
        publisher,
        engine,
        recorder,
        learner: learner.map(|l| l.0),
    })
}

/// Binds a shard's link or starts a combiner's link tasks (one per shard).
async fn start_link(
    cfg: &DaemonConfig,
    model: Option<&auspex_engine::Model>,
    engine_tx: &crossbeam_channel::Sender<EngineInput>,
    stop_rx: &watch::Receiver<bool>,
    tasks: &mut Vec<JoinHandle<()>>,
) -> Result<(Link, Option<String>), StartError> {
    let (Some(path), Some(m)) = (&cfg.model, model) else {
        return Ok((Link::None, None));
    };
    let crc = std::fs::read(path)
        .map(|b| auspex_proto::crc32::crc32(&b))
        .map_err(|cause| StartError::ModelRead {
            path: path.clone(),
            cause,
        })?;
    let hello = |part: u32, parts: u32| auspex_proto::v1::ShardHello {
        part,
        parts,
        model_crc32: crc,
        model_path: path.display().to_string(),
    };
    let parts = match &cfg.deployment {
        Deployment::Whole => return Ok((Link::None, None)),
        Deployment::Shard { parts, .. } => *parts,
        Deployment::Combine { shards, .. } => shards.len() as u32,
    };
    if m.n_groups() > 1 && m.n_groups() != parts as usize {
        tracing::warn!(
            groups = m.n_groups(),
            parts,
            "the model has {} unit groups but the deployment {parts} parts: parts split its blocks evenly, not by group",
            m.n_groups()
        );
    }
    match &cfg.deployment {
        Deployment::Whole => Ok((Link::None, None)),
        Deployment::Shard { part, parts, link } => {
            let mut s = zeromq::RouterSocket::new();
            let ep = s.bind(link).await.map_err(bind_error("link", link))?;
            let units = m.part_units(*part, *parts);
            let ids = m.units();
            tracing::info!(
                part,
                parts,
                units = units.len(),
                first_unit = ids.get(units.start).copied().unwrap_or(0),
                last_unit = units
                    .end
                    .checked_sub(1)
                    .and_then(|i| ids.get(i))
                    .copied()
                    .unwrap_or(0),
                "shard: decoding these units; send their spikes to this shard's ingest"
            );
            let (out_tx, out_rx) = tokio::sync::mpsc::channel(1 << 16);
            let unsent = Arc::new(std::sync::atomic::AtomicU64::new(0));
            tasks.push(tokio::spawn(crate::shard_link::run_shard_link(
                s,
                hello(*part, *parts),
                engine_tx.clone(),
                out_rx,
                unsent.clone(),
                stop_rx.clone(),
            )));
            Ok((
                Link::Shard {
                    out: out_tx,
                    unsent,
                    part: *part,
                    parts: *parts,
                },
                Some(ep.to_string()),
            ))
        }
        Deployment::Combine { shards, deadline } => {
            let mut views = Vec::new();
            for (i, ep) in shards.iter().enumerate() {
                let (rtx, rrx) = tokio::sync::mpsc::unbounded_channel();
                let last = Arc::new(std::sync::atomic::AtomicI64::new(mono_ns()));
                tasks.push(tokio::spawn(crate::shard_link::run_combiner_link(
                    i as u32,
                    ep.clone(),
                    hello(i as u32, parts),
                    *deadline,
                    engine_tx.clone(),
                    rrx,
                    last.clone(),
                    stop_rx.clone(),
                )));
                views.push(ShardView {
                    endpoint: ep.clone(),
                    relay: rtx,
                    last_ns: last,
                    joined: false,
                    lost: false,
                    partials: 0,
                    times_lost: 0,
                    note: "not greeted yet".into(),
                });
            }
            Ok((
                Link::Combine {
                    shards: views,
                    deadline: *deadline,
                    lost_events: 0,
                    misrouted_spikes: 0,
                },
                None,
            ))
        }
    }
}

impl Running {
    /// Stops ingest and control, lets the engine finish what arrived, ends open trials,
    /// publishes the last messages and flushes the recording.
    pub async fn stop(self) -> StopSummary {
        let _ = self.stop_tx.send(true);
        for t in self.tasks {
            let _ = t.await;
        }
        let _ = self.engine_tx.send(EngineInput::Shutdown);
        drop(self.engine_tx);
        let _ = tokio::task::spawn_blocking(move || self.engine.join()).await;
        if let Some(l) = self.learner {
            let _ = tokio::task::spawn_blocking(move || l.finish()).await;
        }
        let _ = self.publisher.await;
        let recorder_errors = match self.recorder {
            Some(r) => tokio::task::spawn_blocking(move || r.finish())
                .await
                .unwrap_or(1),
            None => 0,
        };
        StopSummary { recorder_errors }
    }
}

/// Runs until `shutdown` completes.
pub async fn run(
    cfg: DaemonConfig,
    shutdown: impl Future<Output = ()>,
) -> Result<StopSummary, StartError> {
    let r = start(cfg).await?;
    shutdown.await;
    tracing::info!("stopping: finishing open trials and flushing the recording");
    Ok(r.stop().await)
}

/// Resolves on SIGINT or SIGTERM.
pub async fn signals() {
    #[cfg(unix)]
    {
        use tokio::signal::unix::{signal, SignalKind};
        match signal(SignalKind::terminate()) {
            Ok(mut term) => {
                tokio::select! {
                    _ = tokio::signal::ctrl_c() => {}
                    _ = term.recv() => {}
                }
            }
            Err(_) => {
                let _ = tokio::signal::ctrl_c().await;
            }
        }
    }
    #[cfg(not(unix))]
    {
        let _ = tokio::signal::ctrl_c().await;
    }
}
