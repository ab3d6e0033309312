//! Real-time mode (`auspexd --realtime`) from outside: without the privilege the daemon runs as
//! usual and says so (status and log); with it, a runaway stretch of work on a real-time thread
//! is demoted by the guard, so an ordinary program on the same core keeps running.

use auspex::live::status;
use std::io::Write;
use std::os::unix::process::CommandExt;
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

mod common;
use common::{free_port, serial};

/// A child daemon killed however the test ends.
struct KillOnDrop(Child);

impl Drop for KillOnDrop {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

/// Drops what lets a process take a real-time policy: `CAP_SYS_NICE` (capability 23) from its
/// bounding, effective, permitted and inheritable sets, and the `rtprio` limit to 0. Runs in the child
/// between fork and exec (only system calls).
fn unprivileged() -> std::io::Result<()> {
    #[repr(C)]
    struct Header {
        version: u32,
        pid: i32,
    }
    #[repr(C)]
    #[derive(Clone, Copy)]
    struct Data {
        effective: u32,
        permitted: u32,
        inheritable: u32,
    }
    const LINUX_CAPABILITY_VERSION_3: u32 = 0x2008_0522;
    const CAP_SYS_NICE: u32 = 23;
    let mut h = Header {
        version: LINUX_CAPABILITY_VERSION_3,
        pid: 0,
    };
    let mut d = [Data {
        effective: 0,
        permitted: 0,
        inheritable: 0,
    }; 2];
    // SAFETY: prctl, capget and capset with the arguments the kernel documents (a version-3
    // header and two data words).
    unsafe {
        // From the bounding set first: exec gives root every capability the set holds. A
        // process without the right to change its capabilities (EPERM) has none to drop here;
        // the test checks the outcome in the daemon's status.
        libc::prctl(
            libc::PR_CAPBSET_DROP,
            CAP_SYS_NICE as libc::c_ulong,
            0,
            0,
            0,
        );
        if libc::syscall(libc::SYS_capget, &mut h as *mut Header, d.as_mut_ptr()) == 0 {
            for w in &mut d[..1] {
                w.effective &= !(1 << CAP_SYS_NICE);
                w.permitted &= !(1 << CAP_SYS_NICE);
                w.inheritable &= !(1 << CAP_SYS_NICE);
            }
            libc::syscall(libc::SYS_capset, &mut h as *mut Header, d.as_ptr());
        }
        let zero = libc::rlimit {
            rlim_cur: 0,
            rlim_max: 0,
        };
        if libc::setrlimit(libc::RLIMIT_RTPRIO, &zero) != 0 {
            return Err(std::io::Error::last_os_error());
        }
    }
    Ok(())
}

/// Whether a child of this process can be started without CAP_SYS_NICE: it does not hold it, or
/// it may drop it from the bounding set (CAP_SETPCAP), per `/proc/self/status`.
fn can_drop_sys_nice() -> bool {
    let text = std::fs::read_to_string("/proc/self/status").unwrap_or_default();
    let eff = text
        .lines()
        .find_map(|l| l.strip_prefix("CapEff:"))
        .and_then(|h| u64::from_str_radix(h.trim(), 16).ok())
        .unwrap_or(0);
    eff & (1 << 23) == 0 || eff & (1 << 8) != 0
}

/// `auspex daemon` on free loopback ports with `args`: (child, ingest, control).
fn daemon(
    args: &[&str],
    log: &std::path::Path,
    drop_privilege: bool,
) -> (KillOnDrop, String, String) {
    let ep = |p: u16| format!("tcp://127.0.0.1:{p}");
    let (ingest, publish, control) = (ep(free_port()), ep(free_port()), ep(free_port()));
    let mut cmd = Command::new(env!("CARGO_BIN_EXE_auspex"));
    cmd.arg("daemon")
        .args(args)
        .args([
            "--ingest",
            &ingest,
            "--publish",
            &publish,
            "--control",
            &control,
        ])
        .args(["--task-ingest", ""])
        .stdout(Stdio::null())
        .stderr(std::fs::File::create(log).unwrap());
    if drop_privilege {
        // SAFETY: the closure makes system calls only.
        unsafe {
            cmd.pre_exec(unprivileged);
        }
    }
    (KillOnDrop(cmd.spawn().unwrap()), ingest, control)
}

async fn wait_started(control: &str) -> auspex_proto::v1::Status {
    let t0 = Instant::now();
    loop {
        if let Ok(s) = status(control).await {
            return s;
        }
        assert!(
            t0.elapsed() < Duration::from_secs(20),
            "daemon did not start"
        );
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
}

fn demo_model(dir: &std::path::Path) -> std::path::PathBuf {
    let demo = auspex::demo_dir();
    let model = dir.join("demo.apxm");
    let out = Command::new(env!("CARGO_BIN_EXE_auspex"))
        .args(["fit", "--spikes"])
        .arg(demo.join("spikes.csv"))
        .arg("--trials")
        .arg(demo.join("trials.csv"))
        .arg("-o")
        .arg(&model)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    model
}

/// Without CAP_SYS_NICE and with an rtprio limit of 0, `--realtime` is refused: the daemon
/// starts anyway, decodes the demo session as usual, says so once in its log with how to allow
/// it, and `status` shows the refusal.
#[test]
fn without_the_privilege_the_daemon_runs_as_usual_and_says_so() {
    let _serial = serial();
    let dir = tempfile::tempdir().unwrap();
    let model = demo_model(dir.path());
    let log = dir.path().join("daemon.log");
    let (_d, ingest, control) = daemon(
        &["--model", model.to_str().unwrap(), "--realtime"],
        &log,
        true,
    );
    let rt = tokio::runtime::Runtime::new().unwrap();
    let st = rt.block_on(wait_started(&control));
    if !can_drop_sys_nice() {
        eprintln!(
            "note: this process holds CAP_SYS_NICE but may not drop it (no CAP_SETPCAP); the refusal is not exercised (status: {})",
            st.realtime
        );
        return;
    }
    assert!(
        st.realtime.starts_with("REFUSED") && st.realtime.contains("SCHED_FIFO"),
        "status: {}",
        st.realtime
    );
    let demo = auspex::demo_dir();
    let out = Command::new(env!("CARGO_BIN_EXE_auspex"))
        .args(["replay", "--fast", "--spikes"])
        .arg(demo.join("spikes.csv"))
        .arg("--trials")
        .arg(demo.join("trials.csv"))
        .args(["--to", &ingest, "--control", &control])
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let h = rt.block_on(status(&control)).unwrap().health.unwrap();
    assert_eq!(h.trials_completed, 320, "every demo trial decoded");
    assert!(h.decisions > 0);
    let text = std::fs::read_to_string(&log).unwrap();
    assert_eq!(
        text.matches("real-time mode refused").count(),
        1,
        "said once: {text}"
    );
    assert!(
        text.contains("limits.conf") && text.contains("CAP_SYS_NICE"),
        "{text}"
    );
}

/// In real-time mode on core 0, one message that asks for seconds of decoding (30 trials of
/// a 1024 × 64 model opened at once, then a watermark past all their windows) keeps the engine
/// thread busy without a pause: the guard demotes it after its bound, and an ordinary thread
/// of this test pinned to the same core keeps making progress throughout (with the kernel's
/// own real-time throttling alone it would get 50 ms in every second; with none, nothing).
/// Needs the privilege to take SCHED_FIFO: where it is refused the test says so and checks the
/// refusal instead.
#[test]
fn a_runaway_real_time_thread_is_demoted_and_the_core_stays_shared() {
    let _serial = serial();
    let dir = tempfile::tempdir().unwrap();
    let (nu, ns) = (1024, 64);
    let model = dir.path().join("big.apxm");
    auspex_proto::model_file::save_model(
        &model,
        auspex::bench::synthetic_model(nu, ns).spec(),
        "realtime test",
    )
    .unwrap();
    let log = dir.path().join("daemon.log");
    let (_d, ingest, control) = daemon(
        &[
            "--model",
            model.to_str().unwrap(),
            "--realtime",
            "--realtime-cpus",
            "0",
        ],
        &log,
        false,
    );
    let rt = tokio::runtime::Runtime::new().unwrap();
    let st = rt.block_on(wait_started(&control));
    if st.realtime.starts_with("REFUSED") {
        eprintln!(
            "note: this machine refuses SCHED_FIFO ({}); the guard is not exercised here",
            st.realtime
        );
        return;
    }
    assert!(st.realtime.starts_with("on:"), "{}", st.realtime);

    // An ordinary thread on core 0 counting its progress in 10 ms slices.
    let stop = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(false));
    let counter = {
        let stop = stop.clone();
        std::thread::spawn(move || {
            // SAFETY: a zeroed cpu_set_t with bit 0 set, for this thread.
            unsafe {
                let mut set: libc::cpu_set_t = std::mem::zeroed();
                libc::CPU_SET(0, &mut set);
                libc::sched_setaffinity(0, std::mem::size_of::<libc::cpu_set_t>(), &set);
            }
            let t0 = Instant::now();
            let mut stamps = Vec::new();
            let mut last = Instant::now();
            while !stop.load(std::sync::atomic::Ordering::Relaxed) {
                std::hint::black_box((0..10_000u64).sum::<u64>());
                if last.elapsed() >= Duration::from_millis(10) {
                    last = Instant::now();
                    stamps.push(t0.elapsed());
                }
            }
            stamps
        })
    };
    let trials = 30u64;
    let mut send = Command::new(env!("CARGO_BIN_EXE_auspex"))
        .args(["send", "--to", &ingest, "--sender", "runaway"])
        .stdin(Stdio::piped())
        .stderr(Stdio::null())
        .stdout(Stdio::null())
        .spawn()
        .unwrap();
    {
        let mut input = send.stdin.take().unwrap();
        writeln!(input, "session 1000 name=runaway").unwrap();
        for i in 1..=trials {
            writeln!(input, "onset {i} 10 s{}", i % ns as u64).unwrap();
        }
        for u in 0..nu {
            writeln!(input, "spike {u} {}", 20 + u % 200).unwrap();
        }
        // Past every window in one message: every trial's 250 bins at once.
        writeln!(input, "through 400").unwrap();
    }
    let sent_at = Instant::now();
    let t0 = Instant::now();
    loop {
        let done = rt
            .block_on(status(&control))
            .ok()
            .and_then(|s| s.health)
            .is_some_and(|h| h.trials_completed == trials);
        if done {
            break;
        }
        assert!(
            t0.elapsed() < Duration::from_secs(120),
            "the daemon never finished the runaway message"
        );
        std::thread::sleep(Duration::from_millis(100));
    }
    let busy = sent_at.elapsed();
    stop.store(true, std::sync::atomic::Ordering::Relaxed);
    let stamps = counter.join().unwrap();
    let _ = send.wait();
    let h = rt.block_on(status(&control)).unwrap().health.unwrap();
    assert!(
        h.realtime_demotions >= 1,
        "the guard demoted the busy engine thread (busy for {busy:?})"
    );
    let gaps: Vec<Duration> = stamps.windows(2).map(|w| w[1] - w[0]).collect();
    let worst = gaps.iter().max().copied().unwrap_or_default();
    eprintln!(
        "runaway work for {busy:?}: the ordinary thread on the same core made {} steps, its longest wait {worst:?}; {} demotion(s)",
        stamps.len(),
        h.realtime_demotions
    );
    assert!(
        worst < Duration::from_millis(600),
        "an ordinary thread on the real-time core waited {worst:?} (the guard's bound is 200 ms)"
    );
}
