//! Real-time mode: the threads on the spike → frame → decision path (the socket thread that
//! runs ingest, publish and the shard link; the engine thread; its worker threads) run under
//! `SCHED_FIFO`, memory is locked so a page fault never stalls a bin, and the threads may be
//! pinned to given cores. The learner, the recorder's disk writes and everything else stay
//! ordinary (the learner even runs at nice 10).
//!
//! Safety first — a real-time thread that never blocks freezes every ordinary process on its
//! core. Three guards:
//! * every path thread blocks when idle (channels and the runtime's park; nothing spins);
//! * a guard thread at the top priority wakes every [`GUARD_PERIOD`] and demotes to the ordinary
//!   policy any path thread busy without a pause for more than [`BUSY_BOUND`] (counted in
//!   `Health.realtime_demotions`, logged); the thread takes its real-time policy back by itself
//!   when it next goes idle;
//! * `RLIMIT_RTTIME` is set to [`RTTIME_LIMIT`]: should the guard ever fail, the kernel stops a
//!   thread that ran that long under a real-time policy without blocking (it ends the daemon,
//!   never the machine).
//!
//! Without the privilege (no `CAP_SYS_NICE`, an `rtprio` limit of 0, a container) the daemon
//! runs as without the mode, logs once what was refused and how to allow it, and `status` says so.

use std::sync::atomic::{AtomicBool, AtomicI32, AtomicI64, AtomicU64, Ordering};
use std::sync::{Arc, Mutex, OnceLock};
use std::time::Duration;

/// How often the guard looks.
pub const GUARD_PERIOD: Duration = Duration::from_millis(20);
/// A path thread busy this long without a pause loses its real-time policy until it idles.
pub const BUSY_BOUND: Duration = Duration::from_millis(200);
/// The kernel's backstop (`RLIMIT_RTTIME`, soft and hard): real-time CPU time without blocking.
pub const RTTIME_LIMIT: Duration = Duration::from_secs(5);
/// The default `SCHED_FIFO` priority of the engine and worker threads (the socket thread runs
/// one above, the guard two above). Below the kernel's own interrupt threads (50).
pub const DEFAULT_PRIORITY: i32 = 20;

/// What was asked for.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Plan {
    /// `SCHED_FIFO` priority of the engine and worker threads, 1..=97.
    pub priority: i32,
    /// Cores the path threads may run on (empty: any).
    pub cpus: Vec<usize>,
}

impl Plan {
    /// Checks the priority and the cores against this machine.
    pub fn check(&self) -> Result<(), String> {
        if !(1..=97).contains(&self.priority) {
            return Err(format!(
                "real-time priority {} must be 1..=97 (the socket thread runs one above, the guard two above)",
                self.priority
            ));
        }
        let n = std::thread::available_parallelism().map_or(1, |n| n.get());
        if let Some(c) = self.cpus.iter().find(|&&c| c >= n) {
            return Err(format!(
                "core {c} does not exist: this machine has {n} (0 to {})",
                n - 1
            ));
        }
        Ok(())
    }
}

/// One thread on the path, as the guard sees it.
pub struct PathThread {
    name: &'static str,
    priority: i32,
    tid: AtomicI32,
    /// When it last woke (ns, [`crate::clock::now_ns`]); 0 while idle.
    busy_since: AtomicI64,
    /// The guard took its real-time policy away.
    demoted: AtomicBool,
}

impl PathThread {
    /// It woke up: work starts.
    #[inline]
    pub fn busy(&self) {
        if self.busy_since.load(Ordering::Relaxed) == 0 {
            self.busy_since
                .store(crate::clock::now_ns().max(1), Ordering::Relaxed);
        }
    }

    /// It is about to block: work is over. A demoted thread takes its policy back.
    #[inline]
    pub fn idle(&self) {
        self.busy_since.store(0, Ordering::Relaxed);
        if self.demoted.load(Ordering::Relaxed) {
            self.demoted.store(false, Ordering::Relaxed);
            let _ = set_fifo(0, self.priority);
        }
    }
}

/// The process's real-time state.
struct State {
    plan: Plan,
    threads: Mutex<Vec<Arc<PathThread>>>,
    /// Threads that got their real-time policy.
    granted: AtomicU64,
    /// The first refusal, in words (with how to allow it).
    refused: Mutex<Option<String>>,
    memory: Mutex<String>,
    demotions: AtomicU64,
}

static STATE: OnceLock<State> = OnceLock::new();

/// Turns the mode on for this process (once; later calls are ignored): locks memory, sets the
/// kernel's backstop and starts the guard. Path threads started after this take their policy.
pub fn configure(plan: Plan) {
    if STATE.get().is_some() {
        return;
    }
    let st = State {
        plan,
        threads: Mutex::new(Vec::new()),
        granted: AtomicU64::new(0),
        refused: Mutex::new(None),
        memory: Mutex::new(lock_memory()),
        demotions: AtomicU64::new(0),
    };
    if STATE.set(st).is_err() {
        return;
    }
    set_rttime_limit();
    if let Some(st) = STATE.get() {
        hold_off_deep_idle(st);
    }
    let _ = std::thread::Builder::new()
        .name("auspex-rt-guard".into())
        .spawn(guard);
}

/// Asks the kernel to keep the cores out of deep idle states while the daemon runs (the PM QoS
/// interface `/dev/cpu_dma_latency`: a request of 0 µs holds while the file stays open): waking
/// a core from a deep idle state costs tens of microseconds on every batch of an idle machine.
/// Root only; skipped quietly otherwise (the status line says which).
fn hold_off_deep_idle(st: &State) {
    use std::io::Write;
    let held = std::fs::OpenOptions::new()
        .write(true)
        .open("/dev/cpu_dma_latency")
        .and_then(|mut f| {
            f.write_all(&0i32.to_ne_bytes())?;
            Ok(f)
        });
    if let Ok(mut m) = st.memory.lock() {
        match held {
            Ok(f) => {
                // Kept open for the process's life: closing it ends the request.
                std::mem::forget(f);
                m.push_str("; deep idle states held off");
            }
            Err(_) => m.push_str("; deep idle states allowed (/dev/cpu_dma_latency needs root)"),
        }
    }
}

/// Whether the mode was asked for in this process.
pub fn configured() -> bool {
    STATE.get().is_some()
}

/// The calling thread joins the path: it takes `SCHED_FIFO` (the plan's priority plus `above`)
/// and the plan's cores. None when the mode is off. A refusal is logged once and shown in status.
pub fn enter(name: &'static str, above: i32) -> Option<Arc<PathThread>> {
    let st = STATE.get()?;
    let priority = (st.plan.priority + above).min(99);
    let t = Arc::new(PathThread {
        name,
        priority,
        tid: AtomicI32::new(gettid()),
        busy_since: AtomicI64::new(0),
        demoted: AtomicBool::new(false),
    });
    if !st.plan.cpus.is_empty() {
        if let Err(e) = pin(&st.plan.cpus) {
            refuse(
                st,
                format!("pinning {name} to cores {:?}: {e}", st.plan.cpus),
            );
        }
    }
    match set_fifo(0, priority) {
        Ok(()) => {
            st.granted.fetch_add(1, Ordering::Relaxed);
            if let Ok(mut v) = st.threads.lock() {
                v.push(t.clone());
            }
            Some(t)
        }
        Err(e) => {
            refuse(st, format!("SCHED_FIFO {priority} for {name}: {e}"));
            None
        }
    }
}

fn refuse(st: &State, what: String) {
    let Ok(mut r) = st.refused.lock() else { return };
    if r.is_none() {
        tracing::warn!(
            "real-time mode refused ({what}); the daemon runs with ordinary scheduling. To allow it: run with CAP_SYS_NICE (`setcap cap_sys_nice+ep $(which auspexd)`, or `AmbientCapabilities=CAP_SYS_NICE` in a systemd unit), or give the user an rtprio limit (`@lab - rtprio 98` in /etc/security/limits.conf, or `LimitRTPRIO=98` in the unit); in a container, allow sys_nice"
        );
        *r = Some(what);
    }
}

/// One line for status: off, on (what was granted), or refused (and why).
pub fn summary() -> String {
    let Some(st) = STATE.get() else {
        return "off".into();
    };
    let memory = st.memory.lock().map(|m| m.clone()).unwrap_or_default();
    let cpus = if st.plan.cpus.is_empty() {
        String::new()
    } else {
        format!(", cores {:?}", st.plan.cpus)
    };
    match st.refused.lock().ok().and_then(|r| r.clone()) {
        Some(why) => format!(
            "REFUSED: {why} — running with ordinary scheduling ({} thread(s) granted); memory {memory}",
            st.granted.load(Ordering::Relaxed)
        ),
        None => format!(
            "on: SCHED_FIFO {} for {} path thread(s){cpus}; memory {memory}; guard demotes a thread busy over {} ms",
            st.plan.priority,
            st.granted.load(Ordering::Relaxed),
            BUSY_BOUND.as_millis()
        ),
    }
}

/// Path threads demoted by the guard so far.
pub fn demotions() -> u64 {
    STATE
        .get()
        .map_or(0, |s| s.demotions.load(Ordering::Relaxed))
}

fn guard() {
    let Some(st) = STATE.get() else { return };
    // The guard must run when the path threads hog the cores: it sits above them.
    let _ = set_fifo(0, (st.plan.priority + 2).min(99));
    loop {
        std::thread::sleep(GUARD_PERIOD);
        let now = crate::clock::now_ns();
        let Ok(threads) = st.threads.lock() else {
            return;
        };
        for t in threads.iter() {
            let since = t.busy_since.load(Ordering::Relaxed);
            if since != 0
                && now - since > BUSY_BOUND.as_nanos() as i64
                && !t.demoted.load(Ordering::Relaxed)
            {
                t.demoted.store(true, Ordering::Relaxed);
                if set_other(t.tid.load(Ordering::Relaxed)).is_ok() {
                    st.demotions.fetch_add(1, Ordering::Relaxed);
                    tracing::warn!(
                        thread = t.name,
                        busy_ms = (now - since) / 1_000_000,
                        "a real-time thread was busy without a pause past the bound: it runs with ordinary scheduling until it next idles, so the machine's other programs keep running"
                    );
                }
            }
        }
    }
}

fn gettid() -> i32 {
    // SAFETY: gettid has no preconditions.
    unsafe { libc::syscall(libc::SYS_gettid) as i32 }
}

fn set_fifo(tid: i32, priority: i32) -> std::io::Result<()> {
    let p = libc::sched_param {
        sched_priority: priority,
    };
    // SAFETY: a valid sched_param; tid 0 is the calling thread.
    let r = unsafe { libc::sched_setscheduler(tid, libc::SCHED_FIFO, &p) };
    if r == 0 {
        Ok(())
    } else {
        Err(std::io::Error::last_os_error())
    }
}

fn set_other(tid: i32) -> std::io::Result<()> {
    let p = libc::sched_param { sched_priority: 0 };
    // SAFETY: a valid sched_param.
    let r = unsafe { libc::sched_setscheduler(tid, libc::SCHED_OTHER, &p) };
    if r == 0 {
        Ok(())
    } else {
        Err(std::io::Error::last_os_error())
    }
}

fn pin(cpus: &[usize]) -> std::io::Result<()> {
    // SAFETY: cpu_set_t is plain data; CPU_SET stays within its bits for cpu < CPU_SETSIZE.
    unsafe {
        let mut set: libc::cpu_set_t = std::mem::zeroed();
        for &c in cpus {
            if c < libc::CPU_SETSIZE as usize {
                libc::CPU_SET(c, &mut set);
            }
        }
        if libc::sched_setaffinity(0, std::mem::size_of::<libc::cpu_set_t>(), &set) == 0 {
            Ok(())
        } else {
            Err(std::io::Error::last_os_error())
        }
    }
}

/// Locks the process's memory: current and future pages when the `memlock` limit allows any
/// amount (else an allocation past it would fail), current pages only otherwise.
fn lock_memory() -> String {
    let mut lim = libc::rlimit {
        rlim_cur: 0,
        rlim_max: 0,
    };
    // SAFETY: a valid rlimit to fill, then to set (raising the soft limit up to the hard one,
    // or past it with CAP_SYS_RESOURCE, as root has).
    let unlimited = unsafe {
        let _ = libc::getrlimit(libc::RLIMIT_MEMLOCK, &mut lim);
        let all = libc::rlimit {
            rlim_cur: libc::RLIM_INFINITY,
            rlim_max: libc::RLIM_INFINITY,
        };
        if libc::setrlimit(libc::RLIMIT_MEMLOCK, &all) == 0 {
            lim = all;
        }
        lim.rlim_cur == libc::RLIM_INFINITY
    };
    let flags = if unlimited {
        libc::MCL_CURRENT | libc::MCL_FUTURE
    } else {
        libc::MCL_CURRENT
    };
    // SAFETY: mlockall has no memory-safety preconditions.
    let r = unsafe { libc::mlockall(flags) };
    let what = if r != 0 {
        format!(
            "not locked ({}; raise the memlock limit: `@lab - memlock unlimited` or LimitMEMLOCK=infinity)",
            std::io::Error::last_os_error()
        )
    } else if unlimited {
        "locked (present and future pages)".to_string()
    } else {
        format!(
            "locked (pages present at start; the memlock limit of {} KB is not unlimited, so later allocations are not locked)",
            lim.rlim_cur / 1024
        )
    };
    if r != 0 {
        tracing::warn!("real-time mode: memory {what}");
    }
    what
}

fn set_rttime_limit() {
    let us = RTTIME_LIMIT.as_micros() as libc::rlim_t;
    let lim = libc::rlimit {
        rlim_cur: us,
        rlim_max: us,
    };
    // SAFETY: a valid rlimit. Lowering a limit needs no privilege.
    unsafe {
        libc::setrlimit(libc::RLIMIT_RTTIME, &lim);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_plan_outside_the_priority_range_is_refused() {
        let ok = Plan {
            priority: DEFAULT_PRIORITY,
            cpus: vec![],
        };
        assert!(ok.check().is_ok());
        for p in [0, 98, -1] {
            let e = Plan {
                priority: p,
                ..ok.clone()
            }
            .check()
            .unwrap_err();
            assert!(e.contains("1..=97"), "{e}");
        }
    }
}
