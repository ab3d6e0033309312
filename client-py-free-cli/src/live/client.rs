//! Talking to a running daemon: control requests (REQ), replay of a dataset or recorded session
//! through the same ZeroMQ path acquisition uses (PUSH), paced by the recorded ticks.
//! The pure-Rust ZeroMQ crate has no linger, so a replay ends with an end-of-stream marker and
//! waits until the daemon's status acknowledges the last sequence number.

use anyhow::{bail, Context};
use auspex_proto::v1::{self, control_reply, control_request};
use bytes::Bytes;
use prost::Message;
use std::time::{Duration, Instant};
use zeromq::{Socket, SocketRecv, SocketSend, ZmqMessage};

/// Default endpoints of a local daemon.
pub use auspex_proto::endpoints as defaults;

/// One control request and its reply, with a timeout.
pub async fn control(
    endpoint: &str,
    body: control_request::Body,
    timeout: Duration,
) -> anyhow::Result<v1::ControlReply> {
    let mut s = zeromq::ReqSocket::new();
    tokio::time::timeout(timeout, s.connect(endpoint))
        .await
        .map_err(|_| anyhow::anyhow!("no daemon answered at {endpoint} (is auspexd running?)"))?
        .with_context(|| format!("cannot connect to {endpoint}"))?;
    s.send(ZmqMessage::from(Bytes::from(
        v1::ControlRequest { body: Some(body) }.encode_to_vec(),
    )))
    .await?;
    let m = tokio::time::timeout(timeout, s.recv())
        .await
        .map_err(|_| {
            anyhow::anyhow!("the daemon at {endpoint} did not reply within {timeout:?}")
        })??;
    let bytes = m.into_vec().pop().unwrap_or_default();
    let r = v1::ControlReply::decode(bytes.as_ref()).context("the reply is not a ControlReply")?;
    if !r.ok {
        bail!("the daemon refused: {}", r.error);
    }
    Ok(r)
}

/// The daemon's status.
pub async fn status(endpoint: &str) -> anyhow::Result<v1::Status> {
    match control(
        endpoint,
        control_request::Body::Status(v1::StatusQuery {}),
        Duration::from_secs(3),
    )
    .await?
    .body
    {
        Some(control_reply::Body::Status(s)) => Ok(s),
        _ => bail!("the daemon's reply held no status"),
    }
}

/// Replay pacing.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Pace {
    /// Follow the recorded ticks at this many times real time.
    Speed(f64),
    /// As fast as the daemon accepts.
    Max,
}

/// A PUSH socket connected to a daemon's ingest endpoint (an error after 5 s without one).
pub async fn connect_push(ingest: &str) -> anyhow::Result<zeromq::PushSocket> {
    let mut push = zeromq::PushSocket::new();
    tokio::time::timeout(Duration::from_secs(5), push.connect(ingest))
        .await
        .map_err(|_| anyhow::anyhow!("no daemon is listening at {ingest}"))?
        .with_context(|| format!("cannot connect to {ingest}"))?;
    Ok(push)
}

/// Sends encoded inbound messages to `ingest`, paced by their watermarks, then waits for the
/// daemon (via `control`) to acknowledge the last sequence number of `sender`.
pub async fn replay(
    ingest: &str,
    control_ep: &str,
    messages: &[v1::Inbound],
    sender: &str,
    tick_rate_hz: f64,
    pace: Pace,
    progress: bool,
) -> anyhow::Result<Duration> {
    let asks = Choices::default();
    let (took, _) = replay_asking(
        ingest,
        control_ep,
        messages,
        sender,
        tick_rate_hz,
        pace,
        progress,
        &asks,
    )
    .await?;
    Ok(took)
}

/// A recording's find-tuning requests and answers, to ask again during a replay.
#[derive(Clone, Debug, Default)]
pub struct Choices {
    /// (number of messages before it, the request marker).
    pub asked: Vec<(usize, v1::StimulusChoice)>,
    /// The answers, by ordinal.
    pub answered: std::collections::HashMap<u64, v1::NextStimulusReply>,
}

impl Choices {
    /// The requests and answers of a recording.
    pub fn of(rec: &crate::wire::RecordedSession) -> Self {
        Choices {
            asked: rec.choices_asked.clone(),
            answered: rec
                .choices_answered
                .iter()
                .filter_map(|c| c.reply.clone().map(|r| (c.ordinal, r)))
                .collect(),
        }
    }
}

/// How the choices asked again compare with the recorded ones.
#[derive(Clone, Debug, Default)]
pub struct ChoiceCheck {
    /// Requests asked again.
    pub asked: usize,
    /// Answered as recorded (the same stimulus, or refused as it was).
    pub same: usize,
    /// The first differences: (ordinal, recorded stimulus or "refused", answered now).
    pub differ: Vec<(u64, String, String)>,
}

/// [`replay`], asking find-tuning again at every recorded request's point — once the daemon
/// has taken every message before it — and comparing its answers with the recorded ones.
#[allow(clippy::too_many_arguments)]
pub async fn replay_asking(
    ingest: &str,
    control_ep: &str,
    messages: &[v1::Inbound],
    sender: &str,
    tick_rate_hz: f64,
    pace: Pace,
    progress: bool,
    choices: &Choices,
) -> anyhow::Result<(Duration, ChoiceCheck)> {
    let mut check = ChoiceCheck::default();
    let mut next_ask = 0usize;
    let mut push = connect_push(ingest).await?;
    let bar = crate::progress::bar(
        progress,
        messages.len() as u64,
        "replaying",
        "{pos}/{len} messages {msg}",
    );
    let t0 = Instant::now();
    let first_wm = messages.iter().find_map(crate::wire::watermark_of);
    let mut last_seq = 0;
    let ctrl_c = tokio::signal::ctrl_c();
    tokio::pin!(ctrl_c);
    for (i, m) in messages.iter().enumerate() {
        while let Some((at, ask)) = choices.asked.get(next_ask).filter(|(at, _)| *at <= i) {
            let _ = at;
            next_ask += 1;
            ask_again(control_ep, sender, last_seq, ask, choices, &mut check).await?;
        }
        let send_one = async {
            if let (Pace::Speed(x), Some(w0), Some(w)) =
                (pace, first_wm, crate::wire::watermark_of(m))
            {
                let secs = ((w as f64 - w0 as f64) / tick_rate_hz / x).max(0.0);
                let due = Duration::try_from_secs_f64(secs)
                    .ok()
                    .filter(|d| d.as_secs() < 366 * 86_400)
                    .ok_or_else(|| {
                        anyhow::anyhow!(
                            "message {} of the replay comes {secs:.3e} s after the first watermark at {x}× real time (its clock: {tick_rate_hz} ticks/s, watermark {w}); a replay will not wait a year or more — is the recording's clock or a watermark wrong? (--fast sends without pacing)",
                            i + 1
                        )
                    })?;
                let now = t0.elapsed();
                if due > now {
                    tokio::time::sleep(due - now).await;
                }
            }
            push.send(ZmqMessage::from(Bytes::from(m.encode_to_vec())))
                .await
                .context("sending to the daemon")
        };
        tokio::select! {
            biased;
            _ = &mut ctrl_c => {
                bar.abandon();
                end_stream(&mut push, sender, last_seq + 1).await?;
                return Err(Interrupted(format!(
                    "interrupted after {i} of {} messages: an end of stream was sent, so the daemon ends the session; a rerun starts a new one",
                    messages.len()
                ))
                .into());
            }
            r = send_one => r?,
        }
        last_seq = m.seq;
        if i % 256 == 0 {
            bar.set_position(i as u64);
        }
    }
    while let Some((_, ask)) = choices.asked.get(next_ask) {
        next_ask += 1;
        ask_again(control_ep, sender, last_seq, ask, choices, &mut check).await?;
    }
    bar.set_message("waiting for the daemon to take everything");
    bar.set_position(messages.len() as u64);
    // A daemon learning in step pauses at each refit, and answers control only between
    // messages: a slow reply is patience, not failure, as long as the daemon keeps taking
    // messages. It fails after 120 s without progress.
    let mut progress = (0u64, Instant::now());
    loop {
        let st = control(
            control_ep,
            control_request::Body::Status(v1::StatusQuery {}),
            Duration::from_secs(30),
        )
        .await
        .and_then(|r| match r.body {
            Some(control_reply::Body::Status(s)) => Ok(s),
            _ => bail!("the daemon's reply held no status"),
        });
        match st {
            Ok(st) => {
                let mine = st.senders.iter().find(|s| s.sender == sender);
                if mine.is_some_and(|s| s.last_seq >= last_seq && s.ended) {
                    break;
                }
                let seq = mine.map(|s| s.last_seq).unwrap_or(0);
                if seq > progress.0 {
                    progress = (seq, Instant::now());
                }
            }
            Err(e) if progress.1.elapsed() > Duration::from_secs(120) => return Err(e),
            Err(_) => {}
        }
        if progress.1.elapsed() > Duration::from_secs(120) {
            bail!(
                "the daemon did not acknowledge message {last_seq} of sender {sender:?}: no progress for 120 s (it took {} of them)",
                progress.0
            );
        }
        tokio::select! {
            _ = &mut ctrl_c => {
                bar.abandon();
                return Err(Interrupted(format!(
                    "interrupted while the daemon was still taking the replay (message {} of {last_seq}); every message was sent, the end of stream last",
                    progress.0
                ))
                .into());
            }
            _ = tokio::time::sleep(Duration::from_millis(20)) => {}
        }
    }
    bar.finish_and_clear();
    drop(push);
    Ok((t0.elapsed(), check))
}

/// Waits until the daemon has taken `sender`'s messages through `last_seq`, asks find-tuning
/// again and notes whether the answer is the recorded one.
async fn ask_again(
    control_ep: &str,
    sender: &str,
    last_seq: u64,
    ask: &v1::StimulusChoice,
    choices: &Choices,
    check: &mut ChoiceCheck,
) -> anyhow::Result<()> {
    let t = Instant::now();
    loop {
        let st = status(control_ep).await?;
        let mine = st.senders.iter().find(|s| s.sender == sender);
        if last_seq == 0 || mine.is_some_and(|s| s.last_seq >= last_seq) {
            break;
        }
        if t.elapsed() > Duration::from_secs(60) {
            bail!("the daemon did not take message {last_seq} within 60 s, to ask find-tuning again there");
        }
        tokio::time::sleep(Duration::from_millis(1)).await;
    }
    let got = match control(
        control_ep,
        control_request::Body::NextStimulus(v1::NextStimulus {
            policy: ask.policy.clone(),
        }),
        Duration::from_secs(5),
    )
    .await
    {
        Ok(r) => match r.body {
            Some(control_reply::Body::Next(n)) => Some(n.stimulus),
            _ => None,
        },
        Err(_) => None,
    };
    let want = choices
        .answered
        .get(&ask.ordinal)
        .map(|r| r.stimulus.clone());
    check.asked += 1;
    if got == want {
        check.same += 1;
    } else if check.differ.len() < 5 {
        check.differ.push((
            ask.ordinal,
            want.unwrap_or_else(|| "refused".into()),
            got.unwrap_or_else(|| "refused".into()),
        ));
    }
    Ok(())
}

/// What the daemon made of a sender's messages: its counters' growth between two status
/// replies (taken before the first message and after the daemon took the last).
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Taken {
    /// Spikes the daemon took.
    pub spikes: u64,
    /// Spikes of units its model does not have.
    pub unknown_unit_spikes: u64,
    /// Onsets or labels naming stimuli its model does not have.
    pub unknown_stimuli: u64,
    /// Spikes at or behind a watermark already promised.
    pub late_spikes: u64,
    /// Messages it could not read.
    pub malformed: u64,
    /// Trials refused: opened twice, too old, or past the open-trial bound.
    pub refused_trials: u64,
}

impl Taken {
    /// The growth of the counters from `a` to `b`.
    pub fn between(a: &v1::Health, b: &v1::Health) -> Taken {
        let d = |x: u64, y: u64| y.saturating_sub(x);
        Taken {
            spikes: d(a.spikes_in, b.spikes_in),
            unknown_unit_spikes: d(a.unknown_unit_spikes, b.unknown_unit_spikes),
            unknown_stimuli: d(a.unknown_stimuli, b.unknown_stimuli),
            late_spikes: d(a.late_spikes, b.late_spikes),
            malformed: d(a.malformed_messages, b.malformed_messages),
            refused_trials: d(a.duplicate_trials, b.duplicate_trials)
                + d(a.stale_onsets, b.stale_onsets)
                + d(a.trials_over_limit, b.trials_over_limit),
        }
    }

    /// Nothing the daemon could use: every spike was of a unit its model does not have. (Some
    /// unknown stimuli are normal while a daemon learns: a stimulus joins the model once it has
    /// enough trials; they are reported, not failed.)
    pub fn nothing_matched(&self, spikes_sent: u64) -> bool {
        spikes_sent > 0 && self.unknown_unit_spikes >= spikes_sent
    }

    /// One line for the sender's user, or None when everything was taken cleanly.
    pub fn line(&self) -> Option<String> {
        let mut parts = Vec::new();
        let mut add = |n: u64, what: &str| {
            if n > 0 {
                parts.push(format!("{n} {what}"));
            }
        };
        add(
            self.unknown_unit_spikes,
            "spikes of units its model does not have",
        );
        add(
            self.unknown_stimuli,
            "onsets or labels of stimuli its model does not have",
        );
        add(
            self.late_spikes,
            "late spikes (behind a promised `through`)",
        );
        add(self.malformed, "unreadable messages");
        add(
            self.refused_trials,
            "trials refused (duplicate, too old or too many open)",
        );
        (!parts.is_empty()).then(|| format!("the daemon counted {}", parts.join(", ")))
    }
}

/// The daemon's health counters now, if it answers on `control` within a second.
pub async fn health_now(control: &str) -> Option<v1::Health> {
    tokio::time::timeout(Duration::from_secs(1), status(control))
        .await
        .ok()?
        .ok()?
        .health
}

/// The growth of the daemon's counters since `before`, once it has taken message `last_seq`
/// of `sender` (asked for up to 3 s; None if it does not answer or never gets there).
pub async fn taken_since(
    control: &str,
    before: Option<v1::Health>,
    sender: &str,
    last_seq: u64,
) -> Option<Taken> {
    let before = before?;
    let t0 = Instant::now();
    while t0.elapsed() < Duration::from_secs(3) {
        let st = tokio::time::timeout(Duration::from_secs(1), status(control))
            .await
            .ok()?
            .ok()?;
        if st
            .senders
            .iter()
            .any(|s| s.sender == sender && s.last_seq >= last_seq)
        {
            return Some(Taken::between(&before, st.health.as_ref()?));
        }
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    None
}

/// A sender stopped by Ctrl-C, having ended its stream (the text says what was sent). The
/// command exits with status 130, as an interrupted shell command does.
#[derive(Debug)]
pub struct Interrupted(pub String);

impl std::fmt::Display for Interrupted {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(&self.0)
    }
}

impl std::error::Error for Interrupted {}

/// Sends `sender`'s end of stream as message `seq`, and gives the socket time to hand it over
/// before it is dropped (the socket has no linger setting).
pub async fn end_stream(
    push: &mut zeromq::PushSocket,
    sender: &str,
    seq: u64,
) -> anyhow::Result<()> {
    let m = v1::Inbound {
        sender: sender.to_string(),
        seq,
        body: Some(v1::inbound::Body::EndOfStream(v1::EndOfStream {})),
    };
    push.send(ZmqMessage::from(Bytes::from(m.encode_to_vec())))
        .await
        .context("sending the end of stream to the daemon")?;
    tokio::time::sleep(Duration::from_millis(200)).await;
    Ok(())
}

/// What `auspex replay` sends: a recorded session, or spike and trial tables.
pub enum ReplaySource {
    /// A session recording (.apxs).
    Session(std::path::PathBuf),
    /// Spike and trial tables (CSV); times are read at 1 µs ticks and windows sized from the
    /// daemon's model.
    Tables {
        /// Spike table.
        spikes: std::path::PathBuf,
        /// Trial table.
        trials: std::path::PathBuf,
    },
    /// An NWB file's units and trials table, read like the tables.
    Nwb {
        /// The file.
        path: std::path::PathBuf,
        /// Which table, columns and units.
        choice: crate::nwb::NwbChoice,
    },
}

/// The messages a replay sends as `sender` (fresh numbering, one end of stream last), asking a
/// learning daemon to learn in step when `in_step`, and their clock rate. Tables are windowed with the daemon's model (asked on `control`), and
/// their session is named after the trial table, so replays of one session's tables by several
/// senders (a shard deployment's) announce the same session.
pub async fn replay_messages(
    source: &ReplaySource,
    control: &str,
    sender: &str,
    in_step: bool,
) -> anyhow::Result<(Vec<v1::Inbound>, f64)> {
    let (mut msgs, rate) = replay_messages_as_sent(source, control, sender).await?;
    if in_step {
        ask_to_learn_in_step(&mut msgs);
    }
    Ok((msgs, rate))
}

/// A replay asks a learning daemon to learn in step with the session's trials
/// (`SessionStart.learn_in_step`): its refits then come at the same trials however fast the
/// replay runs, so a replay equals the real-time session and `decode --prequential`.
pub fn ask_to_learn_in_step(msgs: &mut [v1::Inbound]) {
    for m in msgs {
        if let Some(v1::inbound::Body::SessionStart(ss)) = m.body.as_mut() {
            ss.learn_in_step = true;
        }
    }
}

async fn replay_messages_as_sent(
    source: &ReplaySource,
    control: &str,
    sender: &str,
) -> anyhow::Result<(Vec<v1::Inbound>, f64)> {
    use v1::inbound::Body;
    match source {
        ReplaySource::Session(p) => {
            let rec = crate::wire::read_recording(p)?;
            let mut msgs: Vec<v1::Inbound> = rec.messages.into_iter().map(|(_, m)| m).collect();
            // One sender name and fresh numbering, so the daemon can acknowledge the end.
            msgs.retain(|m| !matches!(m.body, Some(Body::EndOfStream(_))));
            msgs.push(v1::Inbound {
                body: Some(Body::EndOfStream(v1::EndOfStream {})),
                ..Default::default()
            });
            for (i, m) in msgs.iter_mut().enumerate() {
                m.sender = sender.to_string();
                m.seq = i as u64 + 1;
            }
            Ok((msgs, rec.dataset.tick_rate_hz))
        }
        ReplaySource::Tables { .. } | ReplaySource::Nwb { .. } => {
            let st = status(control).await?;
            let window_s = st.bin_width_s * st.n_bins as f64;
            let (data, report, name) = match source {
                ReplaySource::Tables { spikes, trials } => {
                    let (d, r) = crate::tables::read_dataset(spikes, trials, 1e6, window_s)?;
                    (d, r, trials)
                }
                ReplaySource::Nwb { path, choice } => {
                    let mut notes = Vec::new();
                    let (d, r) = crate::nwb::read_dataset(path, choice, 1e6, window_s, &mut notes)?;
                    for n in notes {
                        eprintln!("note: {n}");
                    }
                    (d, r, path)
                }
                ReplaySource::Session(_) => unreachable!(),
            };
            eprintln!("{report}");
            let bt = auspex_engine::ticks::bin_ticks(st.bin_width_s, 1e6)?;
            let mut msgs = crate::wire::dataset_messages(&data, sender, bt, bt * st.n_bins as i64);
            let name = name
                .file_stem()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_default();
            for m in &mut msgs {
                if let Some(Body::SessionStart(ss)) = m.body.as_mut() {
                    ss.session_name = name.clone();
                }
            }
            Ok((msgs, 1e6))
        }
    }
}
