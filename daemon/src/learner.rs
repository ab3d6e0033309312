//! The learner thread: owns the session's [`Learner`] (the labelled trials' windows), refits on
//! a cadence with the very code `auspex fit` runs (plan, family choice, bandwidth, shrinkage),
//! builds and prepares the model, and hands it to the engine thread, which swaps it in at the
//! next trial boundary and records where it did. Saving the learned model fits on everything
//! learned so far.
//!
//! Must not: run on the engine thread or the I/O runtime (a refit takes from milliseconds to
//! seconds), or touch the engine: models travel as messages.

use crate::messages::{EngineInput, Learned};
use auspex_engine::{LookupBudget, Model, ModelSpec, PreparedModel};
use auspex_modelling::learn::{LearnOptions, Learner, TrialWindow};
use crossbeam_channel::{Receiver, RecvTimeoutError, Sender};
use std::sync::Arc;
use std::time::{Duration, Instant};
use tokio::sync::oneshot;

/// When the learner refits.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Cadence {
    /// After this many new labelled trials.
    pub every_trials: u32,
    /// Or after this long with at least one new labelled trial.
    pub every: Duration,
}

impl Default for Cadence {
    fn default() -> Self {
        Cadence {
            every_trials: 8,
            every: Duration::from_secs(30),
        }
    }
}

/// What the engine thread tells the learner thread, in stream order.
pub enum LearnMsg {
    /// A session started: forget everything, learn at this clock.
    Session {
        /// Session counter (models of older sessions are discarded on arrival).
        epoch: u64,
        /// Ticks per second.
        tick_rate_hz: f64,
        /// Units declared at the start.
        units: Vec<u32>,
        /// Session name (for saved files).
        name: String,
        /// Learn in step with the session's trials (a replay): no refit of its own cadence,
        /// only on [`LearnMsg::FitNow`].
        in_step: bool,
    },
    /// Units added part-way.
    Units {
        /// Units.
        units: Vec<u32>,
        /// Learned from trials with onset at or after this tick.
        from_tick: i64,
    },
    /// A labelled, completed, uncancelled trial.
    Trial(TrialWindow),
    /// Freeze (false) or resume (true) refitting; trials keep being taken.
    Enable(bool),
    /// Forget every trial taken so far.
    Reset,
    /// A model the engine thread no longer opens trials with: kept here until the trials
    /// still decoding with it have ended, then freed on this thread, so freeing a large model's
    /// tables never stalls the engine thread.
    Retire(Arc<PreparedModel>),
    /// Fit on everything so far and save it.
    Save {
        /// Model file path.
        path: std::path::PathBuf,
        /// The recording of exactly the session learned from, if one was made: the model's
        /// training data is then that recording, as `auspex fit --session` of it writes.
        recording: Option<std::path::PathBuf>,
        /// The reply.
        reply: oneshot::Sender<Result<String, String>>,
    },
    /// Fit now on every trial sent so far and answer (learning in step).
    FitNow {
        /// The model, or why there is none yet.
        reply: Sender<Result<Learned, String>>,
    },
}

/// Handle to the learner thread.
pub struct LearnerThread {
    tx: Sender<LearnMsg>,
    join: std::thread::JoinHandle<()>,
}

impl LearnerThread {
    /// Starts the thread; learned models and notes go to `engine`.
    pub fn start(
        opts: LearnOptions,
        cadence: Cadence,
        table_memory: LookupBudget,
        engine: Sender<EngineInput>,
    ) -> std::io::Result<Self> {
        // Unbounded: the engine thread must never wait on the learner; what it sends is bounded
        // by the labelled trials of the session.
        let (tx, rx) = crossbeam_channel::unbounded();
        let join = std::thread::Builder::new()
            .name("auspex-learner".into())
            .spawn(move || run(opts, cadence, table_memory, rx, engine))?;
        Ok(LearnerThread { tx, join })
    }
    /// A sender for the engine thread.
    pub fn sender(&self) -> Sender<LearnMsg> {
        self.tx.clone()
    }
    /// Stops after what is queued.
    pub fn finish(self) {
        drop(self.tx);
        let _ = self.join.join();
    }
}

struct State {
    learner: Option<Learner>,
    epoch: u64,
    name: String,
    enabled: bool,
    fitted_at: u64,
    last_fit: Instant,
    in_step: bool,
}

/// Lowers this thread's scheduling priority (nice 10), so on a busy machine the engine thread
/// and the socket thread win the cores and a refit mostly takes what they leave. (The idle
/// class, `SCHED_IDLE`, was tried and made the p99 latency 8× worse on the 2-core benchmark
/// machine: a starved refit can hold a lock the engine thread then waits for, such as an
/// allocator arena's.)
pub(crate) fn lower_priority() {
    #[cfg(target_os = "linux")]
    {
        // SAFETY: gettid and setpriority take plain integers and touch no memory of ours; on
        // Linux a thread id names this thread alone, so only the learner's priority changes.
        let r = unsafe {
            let tid = libc::syscall(libc::SYS_gettid) as libc::id_t;
            libc::setpriority(libc::PRIO_PROCESS, tid, 10)
        };
        if r != 0 {
            tracing::debug!("could not lower the learner thread's priority");
        }
    }
}

fn run(
    opts: LearnOptions,
    cadence: Cadence,
    table_memory: LookupBudget,
    rx: Receiver<LearnMsg>,
    engine: Sender<EngineInput>,
) {
    lower_priority();
    let mut st = State {
        learner: None,
        epoch: 0,
        name: String::new(),
        enabled: true,
        fitted_at: 0,
        last_fit: Instant::now(),
        in_step: false,
    };
    let mut retired: Vec<Arc<PreparedModel>> = Vec::new();
    loop {
        let msg = rx.recv_timeout(Duration::from_millis(200));
        // Free retired models nobody else holds any more.
        retired.retain(|m| Arc::strong_count(m) > 1);
        match msg {
            Ok(LearnMsg::Retire(m)) => retired.push(m),
            Ok(LearnMsg::Session {
                epoch,
                tick_rate_hz,
                units,
                name,
                in_step,
            }) => {
                st.epoch = epoch;
                st.name = name;
                st.in_step = in_step;
                st.fitted_at = 0;
                st.learner = match Learner::new(opts.clone(), tick_rate_hz) {
                    Ok(mut l) => {
                        l.add_units(units);
                        Some(l)
                    }
                    Err(e) => {
                        note(&engine, epoch, format!("cannot learn at this clock: {e}"));
                        None
                    }
                };
            }
            Ok(LearnMsg::Units { units, from_tick }) => {
                if let Some(l) = st.learner.as_mut() {
                    l.declare_units_from(&units, from_tick);
                }
            }
            Ok(LearnMsg::Trial(w)) => {
                if let Some(l) = st.learner.as_mut() {
                    l.add(w);
                }
            }
            Ok(LearnMsg::Enable(on)) => st.enabled = on,
            Ok(LearnMsg::Reset) => {
                if let Some(l) = st.learner.as_mut() {
                    l.reset();
                }
                st.fitted_at = st.learner.as_ref().map(|l| l.added()).unwrap_or(0);
            }
            Ok(LearnMsg::Save {
                path,
                recording,
                reply,
            }) => {
                let r = match st.learner.as_ref() {
                    None => Err("no session has started: nothing learned yet".to_string()),
                    Some(l) => match fit(l, false) {
                        Ok((spec, n)) => {
                            let what = format!(
                                "learned during session {:?} from {n} labelled trials",
                                st.name
                            );
                            // The same provenance `fit --session` writes, so decoding that
                            // recording with this model is known to be in sample.
                            let source = recording
                                .as_deref()
                                .and_then(|p| std::fs::canonicalize(p).ok())
                                .map(|p| format!("session {}", p.display()))
                                .unwrap_or_else(|| what.clone());
                            auspex_proto::model_file::save_model(&path, &spec, &source)
                                .map(|_| {
                                    format!(
                                        "{}: {} units × {} stimuli, {what}",
                                        path.display(),
                                        spec.units.len(),
                                        spec.stimuli.len()
                                    )
                                })
                                .map_err(|e| format!("{e:#}"))
                        }
                        Err(e) => Err(format!("nothing to save yet: {e}")),
                    },
                };
                let _ = reply.send(r);
            }
            Ok(LearnMsg::FitNow { reply }) => {
                let r = match st.learner.as_ref() {
                    None => Err("no session has started: nothing learned yet".to_string()),
                    Some(l) => {
                        st.fitted_at = l.added();
                        st.last_fit = Instant::now();
                        fit_prepared(l, st.epoch, table_memory, true)
                    }
                };
                let _ = reply.send(r);
            }
            Err(RecvTimeoutError::Timeout) => {}
            Err(RecvTimeoutError::Disconnected) => break,
        }
        if st.in_step {
            // In step: the engine thread says when (FitNow); no cadence of this thread's own.
            continue;
        }
        let Some(l) = st.learner.as_ref() else {
            continue;
        };
        let new = l.added() - st.fitted_at;
        let due = new >= cadence.every_trials.max(1) as u64
            || (new > 0 && st.last_fit.elapsed() >= cadence.every);
        // Fit on every trial already queued first: the newest model is the one worth building.
        if !st.enabled || !due || !rx.is_empty() {
            continue;
        }
        st.fitted_at = l.added();
        st.last_fit = Instant::now();
        match fit_prepared(l, st.epoch, table_memory, false) {
            Ok(learned) => {
                if engine.send(EngineInput::Learned(learned)).is_err() {
                    break;
                }
            }
            Err(e) => note(&engine, st.epoch, e),
        }
    }
}

fn note(engine: &Sender<EngineInput>, epoch: u64, text: String) {
    let _ = engine.send(EngineInput::LearnNote { epoch, text });
}

/// The fit of every trial held, prepared for the engine.
fn fit_prepared(
    l: &Learner,
    epoch: u64,
    table_memory: LookupBudget,
    all_cores: bool,
) -> Result<Learned, String> {
    let t0 = Instant::now();
    let (spec, trials) = fit(l, all_cores)?;
    let m = Model::new(spec).map_err(|e| e.to_string())?;
    Ok(Learned {
        epoch,
        model: Arc::new(m).prepare(table_memory),
        trials,
        fit_s: t0.elapsed().as_secs_f64(),
    })
}

/// The fit of every trial held, exactly as `auspex fit` fits: cell by cell on this thread
/// while the session runs live (the engine thread must keep its cores), on every core when
/// learning in step (the engine thread is waiting for this very fit). The cells are the same
/// either way.
fn fit(l: &Learner, all_cores: bool) -> Result<(ModelSpec, u64), String> {
    let plan = l.plan().map_err(|e| e.to_string())?;
    let spec = if all_cores {
        let cells = auspex_modelling::fit::fit_cells(&plan, &|| {});
        l.calibrated(plan.assemble(cells), &|p| {
            p.assemble(auspex_modelling::fit::fit_cells(p, &|| {}))
        })
    } else {
        l.calibrated(plan.fit_all(), &|p| p.fit_all())
    };
    Ok((spec, l.added()))
}
