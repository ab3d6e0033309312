//! Live sessions from the command line: monitor, replay, and the live demo that starts the
//! daemon as a child process on free loopback ports, replays the demo session into it while the
//! monitor shows it, and checks the live decisions against offline decoding.

use crate::live::{replay, status, Pace};
use crate::monitor::{json_line, plain_line, MonitorState};
use anyhow::{bail, Context};
use auspex_proto::v1;
use prost::Message;
use std::io::{IsTerminal, Write};
use std::time::Duration;
use tokio::sync::watch;
use zeromq::{Socket, SocketRecv};

/// How the monitor shows things.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum View {
    /// Full-screen terminal view.
    Screen,
    /// Plain text lines.
    Lines,
    /// JSON lines.
    Json,
    /// Nothing shown: only the decisions are collected (for checks).
    Quiet,
}

impl View {
    /// Screen on a terminal, plain lines otherwise.
    pub fn auto() -> Self {
        if std::io::stdout().is_terminal() {
            View::Screen
        } else {
            View::Lines
        }
    }
}

/// Decisions seen by a monitor: (trial, stimulus index, posterior bits, bin).
pub type SeenDecisions = Vec<(u64, u32, u64, u32)>;

/// Where the monitor's full-screen view goes: the terminal, or (in tests) a text buffer.
pub trait Screen: Send {
    /// Called every 50 ms: takes the keys pressed since (which change `state`, and `frozen`
    /// while paused), then draws `frozen` when paused, else `state`. False: the user quit.
    fn show(
        &mut self,
        state: &mut MonitorState,
        frozen: &mut Option<MonitorState>,
    ) -> anyhow::Result<bool>;
}

/// The terminal, in raw mode on the alternate screen until dropped.
struct Terminal(ratatui::Terminal<ratatui::backend::CrosstermBackend<std::io::Stdout>>);

impl Terminal {
    fn open() -> anyhow::Result<Self> {
        crossterm::terminal::enable_raw_mode()?;
        crossterm::execute!(std::io::stdout(), crossterm::terminal::EnterAlternateScreen)?;
        Ok(Terminal(ratatui::Terminal::new(
            ratatui::backend::CrosstermBackend::new(std::io::stdout()),
        )?))
    }
}

impl Drop for Terminal {
    fn drop(&mut self) {
        let _ = crossterm::terminal::disable_raw_mode();
        let _ = crossterm::execute!(std::io::stdout(), crossterm::terminal::LeaveAlternateScreen);
    }
}

impl Screen for Terminal {
    fn show(
        &mut self,
        state: &mut MonitorState,
        frozen: &mut Option<MonitorState>,
    ) -> anyhow::Result<bool> {
        while crossterm::event::poll(Duration::ZERO)? {
            if let crossterm::event::Event::Key(k) = crossterm::event::read()? {
                if !key(k, state, frozen) {
                    return Ok(false);
                }
            }
        }
        let shown = frozen.as_ref().unwrap_or(state);
        self.0.draw(|f| shown.draw(f))?;
        Ok(true)
    }
}

/// Applies one key: q, Esc or Ctrl-C quit (false); p pauses the view (a snapshot is shown,
/// the accounting goes on); o changes the unit order; ↑/↓ (k/j) move the selection.
pub fn key(
    k: crossterm::event::KeyEvent,
    state: &mut MonitorState,
    frozen: &mut Option<MonitorState>,
) -> bool {
    use crossterm::event::KeyCode::*;
    match k.code {
        Char('q') | Esc => return false,
        Char('c')
            if k.modifiers
                .contains(crossterm::event::KeyModifiers::CONTROL) =>
        {
            return false
        }
        Char('p') => {
            *frozen = match frozen.take() {
                Some(_) => None,
                None => {
                    let mut f = state.clone();
                    f.paused = true;
                    Some(f)
                }
            };
        }
        Char('o') => {
            state.next_sort();
            if let Some(f) = frozen.as_mut() {
                f.next_sort();
            }
        }
        Up | Char('k') => {
            state.select(-1);
            if let Some(f) = frozen.as_mut() {
                f.select(-1);
            }
        }
        Down | Char('j') => {
            state.select(1);
            if let Some(f) = frozen.as_mut() {
                f.select(1);
            }
        }
        _ => {}
    }
    true
}

/// A screen that keeps the last view drawn at each of some sizes as text (for tests, and for
/// checking what the monitor shows without a terminal).
pub struct TextScreen {
    /// Columns and rows of each view.
    pub sizes: Vec<(u16, u16)>,
    /// The last view drawn at each size, in the order of `sizes`.
    pub text: std::sync::Arc<std::sync::Mutex<Vec<String>>>,
}

impl Screen for TextScreen {
    fn show(
        &mut self,
        state: &mut MonitorState,
        frozen: &mut Option<MonitorState>,
    ) -> anyhow::Result<bool> {
        let shown = frozen.as_ref().unwrap_or(state);
        let views = self
            .sizes
            .iter()
            .map(|&(w, h)| crate::monitor::render_at(shown, w, h))
            .collect();
        if let Ok(mut t) = self.text.lock() {
            *t = views;
        }
        Ok(true)
    }
}

/// Subscribes to `publish` and shows the stream until `stop` turns true (or `q` on screen).
pub async fn monitor(
    publish: &str,
    control_ep: &str,
    view: View,
    stop: watch::Receiver<bool>,
) -> anyhow::Result<SeenDecisions> {
    let screen: Option<Box<dyn Screen>> = match view {
        View::Screen => Some(Box::new(Terminal::open()?)),
        _ => None,
    };
    monitor_on(publish, control_ep, view, screen, stop).await
}

/// [`monitor`] drawing its full-screen view on `screen` (every 50 ms), whatever `view` says of
/// the lines it prints.
pub async fn monitor_on(
    publish: &str,
    control_ep: &str,
    view: View,
    mut screen: Option<Box<dyn Screen>>,
    mut stop: watch::Receiver<bool>,
) -> anyhow::Result<SeenDecisions> {
    let st = status(control_ep)
        .await
        .with_context(|| format!("asking the daemon at {control_ep} for its model"))?;
    let mut state = MonitorState::new(st.stimuli.clone(), st.bin_width_s);
    state.follow_status(&st);
    let mut sub = subscribe(publish).await?;
    let mut seen = Vec::new();
    let mut tick = tokio::time::interval(Duration::from_millis(50));
    let out = std::io::stdout();
    // Pausing freezes the view, not the accounting: messages still go into `state`, the
    // screen shows the snapshot taken at the pause.
    let mut frozen: Option<MonitorState> = None;
    let mut last_heard = std::time::Instant::now();
    let mut last_status = std::time::Instant::now();
    loop {
        tokio::select! {
            _ = stop.changed() => if *stop.borrow() { break },
            _ = tick.tick() => {
                // Every second: the daemon's current settings (changed by `steer` from
                // elsewhere), and whether it is still there.
                if last_status.elapsed() >= Duration::from_secs(1) {
                    last_status = std::time::Instant::now();
                    if let Ok(Ok(st)) = tokio::time::timeout(Duration::from_millis(500), status(control_ep)).await {
                        let was_silent = state.silent_s.is_some();
                        if state.follow_status(&st) || was_silent {
                            // Another daemon, or the same one back: subscribe afresh rather
                            // than wait for the old subscription to find it again (its
                            // reconnection backs off for seconds, and messages meanwhile are lost).
                            if let Ok(s) = subscribe(publish).await {
                                sub = s;
                            }
                        }
                        last_heard = std::time::Instant::now();
                    }
                }
                let quiet_s = last_heard.elapsed().as_secs_f64();
                state.silent_s = (quiet_s >= SILENT_AFTER_S).then_some(quiet_s);
                if let Some(sc) = screen.as_mut() {
                    if !sc.show(&mut state, &mut frozen)? {
                        break;
                    }
                }
            }
            m = sub.recv() => {
                let m = m?;
                let parts = m.into_vec();
                if parts.len() != 2 { continue; }
                let topic = String::from_utf8_lossy(&parts[0]).to_string();
                let Ok(msg) = v1::Outbound::decode(parts[1].as_ref()) else { continue };
                if let Some(v1::outbound::Body::Decision(d)) = &msg.body {
                    seen.push((d.trial, d.stimulus, d.posterior.to_bits(), d.bin));
                }
                last_heard = std::time::Instant::now();
                state.apply(&topic, &msg);
                match view {
                    View::Lines => if let Some(l) = plain_line(&state, &topic, &msg) { let _ = writeln!(out.lock(), "{l}"); },
                    View::Json => { let _ = writeln!(out.lock(), "{}", json_line(&topic, &msg)); },
                    View::Screen | View::Quiet => {}
                }
            }
        }
    }
    Ok(seen)
}

/// A SUB socket on `publish`, subscribed to every topic.
async fn subscribe(publish: &str) -> anyhow::Result<zeromq::SubSocket> {
    let mut sub = zeromq::SubSocket::new();
    sub.connect(publish)
        .await
        .with_context(|| format!("cannot connect to {publish}"))?;
    sub.subscribe("").await?;
    Ok(sub)
}

/// Seconds without a word from the daemon (no published message, no status reply) after which
/// the monitor says so: a few of its health messages (one a second) missed.
const SILENT_AFTER_S: f64 = 3.0;

fn free_port() -> anyhow::Result<u16> {
    Ok(std::net::TcpListener::bind(("127.0.0.1", 0))?
        .local_addr()?
        .port())
}

/// The live demo. Returns when the replay is done and the daemon has stopped. With no model
/// the daemon learns from the session's own labelled trials, and the check is against
/// prequential decoding of its recording.
pub async fn live_demo(
    model_path: Option<&std::path::Path>,
    out_dir: &std::path::Path,
    pace: Pace,
    view: View,
) -> anyhow::Result<()> {
    let demo = crate::demo_dir();
    let (data, _) = crate::tables::read_dataset(
        &demo.join("spikes.csv"),
        &demo.join("trials.csv"),
        1e6,
        0.25,
    )?;
    let ports = [free_port()?, free_port()?, free_port()?];
    let ep = |p: u16| format!("tcp://127.0.0.1:{p}");
    let (ingest, publish, control_ep) = (ep(ports[0]), ep(ports[1]), ep(ports[2]));
    let recording = out_dir.join("demo-session.apxs");
    let exe = std::env::current_exe().context("finding the auspex executable")?;
    let log = std::fs::File::create(out_dir.join("daemon.log"))?;
    let mut cmd = std::process::Command::new(exe);
    cmd.arg("daemon");
    match model_path {
        Some(m) => {
            cmd.arg("--model").arg(m);
        }
        None => {
            cmd.args(["--learn-window-ms", "250"]);
        }
    }
    let mut child = cmd
        .args([
            "--ingest",
            &ingest,
            "--publish",
            &publish,
            "--control",
            &control_ep,
            "--task-ingest",
            "",
            "--record",
        ])
        .arg(&recording)
        .stdout(std::process::Stdio::null())
        .stderr(log)
        .spawn()
        .context("starting the daemon")?;
    let pid = child.id() as i32;
    let outcome = async {
        // Wait for the daemon to answer.
        let mut up = false;
        for _ in 0..100 {
            if status(&control_ep).await.is_ok() {
                up = true;
                break;
            }
            if let Ok(Some(s)) = child.try_wait() {
                bail!("the daemon exited at start ({s}); see {}", out_dir.join("daemon.log").display());
            }
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
        if !up {
            bail!("the daemon did not answer on {control_ep}; see {}", out_dir.join("daemon.log").display());
        }
        let (stop_tx, stop_rx) = watch::channel(false);
        let (p2, c2) = (publish.clone(), control_ep.clone());
        let mon = tokio::spawn(async move { monitor(&p2, &c2, view, stop_rx).await });
        // The decisions for the check are collected apart from the display, so closing the
        // monitor (q) does not stop the replay or skip the check.
        let (p3, c3, rx3) = (publish.clone(), control_ep.clone(), stop_tx.subscribe());
        let collector = tokio::spawn(async move { monitor(&p3, &c3, View::Quiet, rx3).await });
        tokio::time::sleep(Duration::from_millis(300)).await;
        let bt = 1000; // 1 ms batches at 1 µs ticks
        let mut msgs = crate::wire::dataset_messages(&data, "demo-replay", bt, 250 * bt);
        crate::live::client::ask_to_learn_in_step(&mut msgs);
        let progress = view != View::Screen && std::io::stderr().is_terminal();
        let watch_monitor = async {
            loop {
                tokio::time::sleep(Duration::from_millis(100)).await;
                if mon.is_finished() {
                    break;
                }
            }
            if view == View::Screen {
                eprintln!("monitor closed; the replay goes on (ctrl-c stops the demo) …");
            }
            std::future::pending::<()>().await
        };
        let took = tokio::select! {
            r = replay(&ingest, &control_ep, &msgs, "demo-replay", data.tick_rate_hz, pace, progress) => r?,
            _ = tokio::signal::ctrl_c() => { let _ = stop_tx.send(true); bail!("interrupted") }
            _ = watch_monitor => unreachable!("pending never completes"),
        };
        tokio::time::sleep(Duration::from_millis(500)).await;
        let st = status(&control_ep).await?;
        let _ = stop_tx.send(true);
        let _ = mon.await.context("monitor task")?;
        let seen = collector.await.context("decision collector")??;
        Ok((took, st, seen, msgs.len()))
    }
    .await;
    // Clean stop: SIGTERM, then wait.
    // SAFETY: `pid` is the id of the daemon child this function spawned and still owns (not
    // yet waited for, so the id cannot have been reused); kill(2) only sends a signal.
    unsafe {
        libc::kill(pid, libc::SIGTERM);
    }
    let _ = tokio::task::spawn_blocking(move || child.wait()).await;
    let (took, st, seen, n) = outcome?;
    let h = st.health.unwrap_or_default();
    eprintln!(
        "replayed {n} messages in {:.1} s; the daemon decoded {} trials ({} frames, {} decisions), late {}, malformed {}, dropped frames {}",
        took.as_secs_f64(),
        h.trials_completed,
        h.frames_out,
        h.decisions,
        h.late_spikes,
        h.malformed_messages,
        h.dropped_posterior
    );
    // The same session decoded offline must give the same decisions.
    let offline = match model_path {
        Some(m) => offline_decisions(m, &data)?,
        None => prequential_decisions(&recording)?,
    };
    let mut live = seen;
    let mut offline = offline;
    offline.sort();
    live.sort();
    if live == offline {
        eprintln!(
            "live decisions are identical to {} of the same session ({} trials)",
            if model_path.is_some() {
                "offline decoding"
            } else {
                "prequential decoding (`auspex decode --prequential --session`)"
            },
            live.len()
        );
    } else {
        eprintln!(
            "warning: live decisions ({}) differ from offline decoding ({}); see {}",
            live.len(),
            offline.len(),
            out_dir.join("daemon.log").display()
        );
    }
    eprintln!(
        "session recorded to {} (replay it with `auspex replay --session {}`)",
        recording.display(),
        recording.display()
    );
    Ok(())
}

fn to_seen(rows: &[crate::offline::DecisionRow]) -> SeenDecisions {
    rows.iter()
        .map(|r| {
            (
                r.decision.trial,
                r.decision.stimulus,
                r.decision.posterior.to_bits(),
                r.decision.bin,
            )
        })
        .collect()
}

/// The demo session decoded offline with the model.
fn offline_decisions(
    model_path: &std::path::Path,
    data: &auspex_engine::Dataset,
) -> anyhow::Result<SeenDecisions> {
    let (_, model) = auspex_proto::model_file::load_model(model_path)?;
    let model = std::sync::Arc::new(model);
    let mut sink = crate::offline::CsvSink::new(model.stimuli(), data, None::<std::io::Sink>);
    crate::offline::run_dataset(
        model.clone(),
        data,
        auspex_engine::EngineConfig::new(1e6),
        &mut sink,
    )?;
    Ok(to_seen(&sink.decisions))
}

/// The learning daemon's recording decoded prequentially, at the daemon's own swap points.
fn prequential_decisions(recording: &std::path::Path) -> anyhow::Result<SeenDecisions> {
    let rec = crate::wire::read_recording(recording)?;
    let (run, _, _) = crate::prequential::run_recording(
        &rec,
        &Default::default(),
        &auspex_engine::EngineConfig::new(rec.dataset.tick_rate_hz),
        &crate::prequential::Schedule { every_trials: 8 },
        None::<std::io::Sink>,
        false,
    )?;
    eprintln!(
        "the daemon learned {} models during the session ({} trials opened before the first)",
        run.models.len(),
        run.undecoded_trials
    );
    Ok(to_seen(&run.decisions))
}
