//! The session recorder: every inbound message, with its receive time, appended in arrival
//! order to a session file on its own thread, flushed at least every 100 ms and at each trial
//! end. Disk latency never reaches the engine; nothing is dropped (the channel blocks when full).
//! One file per session: the engine thread renames the file when the session's name is known and
//! rotates to a new file when a new session starts.

use auspex_proto::session::SessionWriter;
use auspex_proto::v1::SessionRecord;
use crossbeam_channel::{Receiver, RecvTimeoutError, Sender};
use std::fs::File;
use std::io::BufWriter;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

/// What the recorder thread is told.
pub enum RecorderMsg {
    /// A message to append.
    Record(SessionRecord),
    /// Flush now (a trial ended).
    Flush,
    /// Give the file being written this name (the session's name became known).
    Rename(PathBuf),
    /// Close the file and continue in a new one at this path (a new session).
    Rotate(PathBuf),
}

/// Handle to the recorder thread.
pub struct Recorder {
    tx: Sender<RecorderMsg>,
    join: std::thread::JoinHandle<u64>,
    errors: Arc<AtomicU64>,
    /// The file being written.
    pub path: PathBuf,
}

/// The file to record into: `path` itself, or a timestamped file inside it if it is a directory.
pub fn resolve_path(path: &Path, now_unix_s: u64) -> PathBuf {
    if path.is_dir() {
        path.join(format!("session-{now_unix_s}.apxs"))
    } else {
        path.to_path_buf()
    }
}

impl Recorder {
    /// Creates the file and starts the thread. Write errors after start are counted (returned
    /// at the end) and logged, never fatal.
    pub fn start(path: PathBuf, model_path: &str, now_ns: i64) -> std::io::Result<Self> {
        let w = open(&path, model_path, now_ns)?;
        let (tx, rx) = crossbeam_channel::bounded(1 << 16);
        let p = path.clone();
        let mp = model_path.to_string();
        let errors = Arc::new(AtomicU64::new(0));
        let e = errors.clone();
        let join = std::thread::Builder::new()
            .name("auspex-recorder".into())
            .spawn(move || run(w, rx, p, &mp, &e))?;
        Ok(Recorder {
            tx,
            join,
            path,
            errors,
        })
    }
    /// Write errors so far (health reports them while the daemon runs).
    pub fn errors(&self) -> Arc<AtomicU64> {
        self.errors.clone()
    }
    /// A sender for the engine thread.
    pub fn sender(&self) -> Sender<RecorderMsg> {
        self.tx.clone()
    }
    /// Stops after writing everything queued; returns the number of write errors.
    pub fn finish(self) -> u64 {
        drop(self.tx);
        self.join.join().unwrap_or(1)
    }
}

fn open(
    path: &Path,
    model_path: &str,
    now_ns: i64,
) -> std::io::Result<SessionWriter<BufWriter<File>>> {
    let f = File::create(path)?;
    let mut w = SessionWriter::new(
        BufWriter::with_capacity(1 << 20, f),
        concat!("auspexd ", env!("CARGO_PKG_VERSION")),
        model_path,
        now_ns,
    )?;
    w.flush()?;
    Ok(w)
}

fn run(
    mut w: SessionWriter<BufWriter<File>>,
    rx: Receiver<RecorderMsg>,
    mut path: PathBuf,
    model_path: &str,
    live: &AtomicU64,
) -> u64 {
    let mut errors = 0u64;
    let count = |errors: &mut u64| {
        *errors += 1;
        live.fetch_add(1, Ordering::Relaxed);
    };
    let mut last = Instant::now();
    let mut dirty = false;
    // Records in the current file: a file left without any (the next session never came) is
    // removed at the end rather than left as an empty recording.
    let mut written = 0u64;
    let period = Duration::from_millis(100);
    loop {
        let msg = rx.recv_timeout(
            period
                .saturating_sub(last.elapsed())
                .max(Duration::from_millis(1)),
        );
        let mut flush = false;
        match msg {
            Ok(RecorderMsg::Record(r)) => {
                written += 1;
                if let Err(e) = w.append(&r) {
                    count(&mut errors);
                    tracing::error!(file = %path.display(), error = %e, "session recording: write failed");
                }
                dirty = true;
            }
            Ok(RecorderMsg::Flush) => flush = true,
            Ok(RecorderMsg::Rename(to)) => match std::fs::rename(&path, &to) {
                Ok(()) => {
                    tracing::info!(file = %to.display(), "session recording");
                    path = to;
                }
                Err(e) => {
                    count(&mut errors);
                    tracing::error!(from = %path.display(), to = %to.display(), error = %e, "session recording: cannot rename; recording continues under the old name");
                }
            },
            Ok(RecorderMsg::Rotate(to)) => {
                if let Err(e) = w.flush() {
                    count(&mut errors);
                    tracing::error!(file = %path.display(), error = %e, "session recording: flush failed");
                }
                match open(&to, model_path, crate::clock::now_ns()) {
                    Ok(nw) => {
                        tracing::info!(closed = %path.display(), "session recording closed; the next session records to a new file");
                        w = nw;
                        path = to;
                        written = 0;
                    }
                    Err(e) => {
                        count(&mut errors);
                        tracing::error!(file = %to.display(), error = %e, "session recording: cannot create the next file; recording continues in the current one");
                    }
                }
                dirty = false;
                last = Instant::now();
                continue;
            }
            Err(RecvTimeoutError::Timeout) => {}
            Err(RecvTimeoutError::Disconnected) => break,
        }
        if dirty && (flush || last.elapsed() >= period) {
            if let Err(e) = w.flush() {
                count(&mut errors);
                tracing::error!(file = %path.display(), error = %e, "session recording: flush failed");
            }
            dirty = false;
            last = Instant::now();
        } else if !dirty {
            last = Instant::now();
        }
    }
    if let Err(e) = w.flush() {
        count(&mut errors);
        tracing::error!(file = %path.display(), error = %e, "session recording: final flush failed");
    }
    drop(w);
    if written == 0 {
        let _ = std::fs::remove_file(&path);
    }
    errors
}
