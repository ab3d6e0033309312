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
    /// Close the file and continue in a new one at this path (a new session); `named_later`:
    /// the session's name will come (a `Rename`), so the file is not created before it.
    Rotate {
        /// The next file.
        to: PathBuf,
        /// A `Rename` will name it.
        named_later: bool,
    },
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
    /// Checks the file can be created (and removes the probe) and starts the thread; the file
    /// itself is created with its first record — with `named_later`, once the session's name
    /// is known — so the folder never holds an empty or provisionally named recording. Write
    /// errors after start are counted (returned at the end) and logged, never fatal.
    pub fn start(
        path: PathBuf,
        model_path: &str,
        now_ns: i64,
        named_later: bool,
    ) -> std::io::Result<Self> {
        drop(open(&path, model_path, now_ns)?);
        std::fs::remove_file(&path)?;
        let (tx, rx) = crossbeam_channel::bounded(1 << 16);
        let p = path.clone();
        let mp = model_path.to_string();
        let errors = Arc::new(AtomicU64::new(0));
        let e = errors.clone();
        let join = std::thread::Builder::new()
            .name("auspex-recorder".into())
            .spawn(move || run(rx, p, named_later, &mp, &e))?;
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

/// Records held while a session's name is awaited, at most this many or this long.
const AWAIT_NAME_RECORDS: usize = 4096;
const AWAIT_NAME_FOR: Duration = Duration::from_secs(1);

/// The file being written: created with its first record.
struct Current {
    w: Option<SessionWriter<BufWriter<File>>>,
    path: PathBuf,
    /// Records held until the session's name is known.
    held: Vec<SessionRecord>,
    await_name: bool,
    held_since: Instant,
}

impl Current {
    /// Writes `r` (and anything held), creating the file first if needed.
    fn write(&mut self, r: Option<SessionRecord>, model_path: &str, fail: &mut dyn FnMut(String)) {
        if self.w.is_none() {
            match open(&self.path, model_path, crate::clock::now_ns()) {
                Ok(w) => {
                    tracing::info!(file = %self.path.display(), "session recording");
                    self.w = Some(w);
                }
                Err(e) => {
                    fail(format!(
                        "{}: cannot create the session recording: {e}",
                        self.path.display()
                    ));
                    return;
                }
            }
        }
        let w = self.w.as_mut().expect("opened above");
        for r in self.held.drain(..).chain(r) {
            if let Err(e) = w.append(&r) {
                fail(format!("{}: write failed: {e}", self.path.display()));
            }
        }
    }
}

fn run(
    rx: Receiver<RecorderMsg>,
    path: PathBuf,
    named_later: bool,
    model_path: &str,
    live: &AtomicU64,
) -> u64 {
    let mut errors = 0u64;
    let mut fail = |what: String| {
        errors += 1;
        live.fetch_add(1, Ordering::Relaxed);
        tracing::error!(error = %what, "session recording");
    };
    let mut cur = Current {
        w: None,
        path,
        held: Vec::new(),
        await_name: named_later,
        held_since: Instant::now(),
    };
    let mut last = Instant::now();
    let mut dirty = false;
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
                if cur.await_name && cur.w.is_none() && cur.held.len() < AWAIT_NAME_RECORDS {
                    if cur.held.is_empty() {
                        cur.held_since = Instant::now();
                    }
                    cur.held.push(r);
                } else {
                    cur.write(Some(r), model_path, &mut fail);
                    dirty = true;
                }
            }
            Ok(RecorderMsg::Flush) => flush = true,
            Ok(RecorderMsg::Rename(to)) => {
                cur.await_name = false;
                if cur.w.is_some() {
                    match std::fs::rename(&cur.path, &to) {
                        Ok(()) => {
                            tracing::info!(file = %to.display(), "session recording renamed");
                            cur.path = to;
                        }
                        Err(e) => fail(format!(
                            "cannot rename {} to {}: {e}; recording continues under the old name",
                            cur.path.display(),
                            to.display()
                        )),
                    }
                } else {
                    cur.path = to;
                }
                if !cur.held.is_empty() {
                    cur.write(None, model_path, &mut fail);
                    dirty = true;
                }
            }
            Ok(RecorderMsg::Rotate { to, named_later }) => {
                if !cur.held.is_empty() {
                    cur.write(None, model_path, &mut fail);
                }
                if let Some(mut w) = cur.w.take() {
                    if let Err(e) = w.flush() {
                        fail(format!("{}: flush failed: {e}", cur.path.display()));
                    }
                    tracing::info!(closed = %cur.path.display(), "session recording closed; the next session records to a new file");
                }
                cur.path = to;
                cur.await_name = named_later;
                dirty = false;
                last = Instant::now();
                continue;
            }
            Err(RecvTimeoutError::Timeout) => {}
            Err(RecvTimeoutError::Disconnected) => break,
        }
        // A name that does not come (no SessionStart): record under the provisional one.
        if !cur.held.is_empty() && cur.held_since.elapsed() >= AWAIT_NAME_FOR {
            cur.write(None, model_path, &mut fail);
            dirty = true;
        }
        if dirty && (flush || last.elapsed() >= period) {
            if let Some(w) = cur.w.as_mut() {
                if let Err(e) = w.flush() {
                    fail(format!("{}: flush failed: {e}", cur.path.display()));
                }
            }
            dirty = false;
            last = Instant::now();
        } else if !dirty {
            last = Instant::now();
        }
    }
    if !cur.held.is_empty() {
        cur.write(None, model_path, &mut fail);
    }
    if let Some(mut w) = cur.w.take() {
        if let Err(e) = w.flush() {
            fail(format!("{}: final flush failed: {e}", cur.path.display()));
        }
    }
    errors
}
