//! The link between a shard and its combiner (`auspexd --role shard` / `--role combine`): the
//! shard binds a ROUTER socket on its link endpoint and the combiner connects a DEALER.
//! Messages are `ShardLink` frames (wire.proto): the combiner greets with the model it loaded,
//! the shard answers with its own, the combiner relays the trial messages it applies (in its
//! order) and the shard returns one partial per trial and completed bin; both sides beat every
//! [`BEAT`] so silence can be told from a quiet session.
//!
//! A shard serves one combiner: the first to greet. Another combiner's greeting is answered
//! with `ShardBusy` (its status then says why the shard is not joined) until the first has been
//! silent for [`COMBINER_SILENCE`] or has gone, so a restarted combiner takes over within
//! seconds and two combiners never split one shard's partials between them.
//!
//! The combiner's side of each shard is one task: it connects (and reconnects), checks the
//! greeting, forwards partials to the engine thread, and declares the shard lost when nothing
//! has come for the deadline. A lost shard's units contribute nothing to trials opened until it
//! rejoins (it greets again: the next trial counts it). Every frame says which parts it lacks.
//!
//! Must not: decode, decide or reorder anything; block the engine thread (it only ever
//! `try_send`s to these tasks).

use crate::clock::mono_ns;
use crate::ingest::forward;
use crate::messages::{EngineInput, ShardEvent};
use auspex_engine::engine::Partial;
use auspex_proto::v1::{self, shard_link};
use crossbeam_channel::Sender;
use prost::Message;
use std::sync::atomic::{AtomicI64, AtomicU64, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};
use tokio::sync::{mpsc, watch};
use zeromq::{Socket, SocketRecv, SocketSend, ZmqMessage};

/// How often a shard says it is alive when it has nothing else to send.
pub const BEAT: Duration = Duration::from_millis(100);
/// A shard forgets its combiner after this long without a word from it (it beats every
/// [`BEAT`]), and then serves the next one that greets.
pub const COMBINER_SILENCE: Duration = Duration::from_secs(2);
/// How long a refused combiner waits before it greets the shard again.
const BUSY_RETRY: Duration = Duration::from_secs(1);
/// Longest a send to the other side may wait (a full queue to a peer that has stopped reading).
const SEND_WAIT: Duration = Duration::from_millis(200);

/// A shard's partial as it travels.
pub fn partial_msg(p: &Partial<'_>) -> Vec<u8> {
    v1::ShardLink {
        body: Some(shard_link::Body::Partial(
            auspex_proto::convert::partial_msg(p),
        )),
    }
    .encode_to_vec()
}

fn link_bytes(body: shard_link::Body) -> Vec<u8> {
    v1::ShardLink { body: Some(body) }.encode_to_vec()
}

fn frame(body: shard_link::Body) -> ZmqMessage {
    ZmqMessage::from(link_bytes(body))
}

fn decode(m: ZmqMessage) -> Option<shard_link::Body> {
    let bytes = crate::ingest::payload(m);
    v1::ShardLink::decode(bytes.as_ref()).ok()?.body
}

/// The shard's side: answers its combiner's greeting (and refuses any other combiner's), hands
/// relayed messages to the engine thread, sends the engine thread's partials (`out`) and a beat
/// every [`BEAT`] to its combiner. Partials that find no combiner are counted in `unsent`.
pub async fn run_shard_link(
    sock: zeromq::RouterSocket,
    hello: v1::ShardHello,
    engine_tx: Sender<EngineInput>,
    mut out: mpsc::Receiver<Vec<u8>>,
    unsent: Arc<AtomicU64>,
    mut stop: watch::Receiver<bool>,
) {
    let (mut tx, mut rx) = sock.split();
    let mut beat = tokio::time::interval(BEAT);
    beat.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
    // The combiner served: its identity on this socket and when it was last heard.
    let mut combiner: Option<(bytes::Bytes, Instant)> = None;
    // A refused combiner retries every second: it is logged once per combiner served.
    let mut refusal_logged = false;
    let to = |id: &bytes::Bytes, payload: Vec<u8>| {
        let mut m = ZmqMessage::from(id.clone());
        m.push_back(payload.into());
        m
    };
    loop {
        tokio::select! {
            _ = stop.changed() => break,
            m = rx.recv() => {
                let Ok(m) = m else {
                    // No combiner connected to read from.
                    tokio::time::sleep(Duration::from_millis(10)).await;
                    continue;
                };
                let Some(id) = m.get(0).cloned() else { continue };
                let body = decode(m);
                let ours = combiner.as_ref().is_some_and(|(c, _)| *c == id);
                match body {
                    Some(shard_link::Body::Hello(h)) => {
                        let free = combiner.as_ref().is_none_or(|(_, heard)| heard.elapsed() > COMBINER_SILENCE);
                        if ours || free {
                            if !ours {
                                refusal_logged = false;
                                tracing::info!(combiner_model_crc32 = format!("{:08x}", h.model_crc32), "combiner connected");
                            }
                            combiner = Some((id.clone(), Instant::now()));
                            let reply = to(&id, link_bytes(shard_link::Body::Hello(hello.clone())));
                            let _ = tokio::time::timeout(SEND_WAIT, tx.send(reply)).await;
                        } else {
                            if !refusal_logged {
                                refusal_logged = true;
                                tracing::warn!("a second combiner greeted this shard; refused (a shard serves one combiner; its greetings are refused quietly from now on)");
                            }
                            let why = format!(
                                "part {} of {} already serves another combiner (a shard serves one; it takes a new one {} s after the first falls silent)",
                                hello.part, hello.parts, COMBINER_SILENCE.as_secs()
                            );
                            let reply = to(&id, link_bytes(shard_link::Body::Busy(v1::ShardBusy { reason: why })));
                            let _ = tokio::time::timeout(SEND_WAIT, tx.send(reply)).await;
                        }
                    }
                    Some(shard_link::Body::Relay(r)) if ours => {
                        combiner = Some((id, Instant::now()));
                        let item = EngineInput::Relay { bytes: r.inbound.into(), decoder: r.decoder, received_ns: crate::clock::now_ns() };
                        if !forward(&engine_tx, item).await {
                            break;
                        }
                    }
                    Some(shard_link::Body::Beat(_)) if ours => combiner = Some((id, Instant::now())),
                    // A refused combiner's relays and beats, until it greets again.
                    Some(shard_link::Body::Relay(_) | shard_link::Body::Beat(_)) => {}
                    Some(_) | None => {
                        tracing::warn!("link: a message that is neither a greeting, a relay nor a beat; ignored");
                    }
                }
            },
            p = out.recv() => match p {
                Some(bytes) => {
                    let sent = match &combiner {
                        Some((id, _)) => tokio::time::timeout(SEND_WAIT, tx.send(to(id, bytes))).await,
                        None => Ok(Err(zeromq::ZmqError::NoMessage)),
                    };
                    if !matches!(sent, Ok(Ok(()))) {
                        unsent.fetch_add(1, Ordering::Relaxed);
                    }
                }
                None => break,
            },
            _ = beat.tick() => {
                if let Some((id, heard)) = &combiner {
                    if heard.elapsed() > COMBINER_SILENCE {
                        tracing::warn!("the combiner has been silent for {} s; waiting for one to greet", COMBINER_SILENCE.as_secs());
                        combiner = None;
                    } else {
                        let _ = tokio::time::timeout(SEND_WAIT, tx.send(to(id, link_bytes(shard_link::Body::Beat(v1::ShardBeat {}))))).await;
                    }
                }
            }
        }
    }
}

/// What the combiner's engine thread relays to one shard.
#[derive(Debug, Clone)]
pub struct RelayItem {
    /// The relay message.
    pub relay: v1::ShardRelay,
    /// It is a SessionStart (resent to a shard that (re)joins).
    pub session_start: bool,
}

/// The combiner's side of one shard: connects (again after a loss), greets, checks the answer,
/// forwards partials, relays trial messages, and declares the shard lost after `deadline` of
/// silence. `last_ns` is the [`mono_ns`] time of the shard's last message (for status).
#[allow(clippy::too_many_arguments)]
pub async fn run_combiner_link(
    part: u32,
    endpoint: String,
    hello: v1::ShardHello,
    deadline: Duration,
    engine_tx: Sender<EngineInput>,
    mut relays: mpsc::UnboundedReceiver<RelayItem>,
    last_ns: Arc<AtomicI64>,
    mut stop: watch::Receiver<bool>,
) {
    let mut session_start: Option<v1::ShardRelay> = None;
    let lost = |why: String| EngineInput::FromShard(ShardEvent::Lost { part, why });
    // Silence counts from start: a shard that never comes is given up after the deadline too.
    last_ns.store(mono_ns(), Ordering::Relaxed);
    let mut declared_lost = false;
    'connect: loop {
        let mut sock = zeromq::DealerSocket::new();
        // Connect, retrying; relays that come meanwhile are not kept (the shard is not there to
        // take them), except the session's start, resent when it joins.
        loop {
            tokio::select! {
                _ = stop.changed() => return,
                r = tokio::time::timeout(Duration::from_millis(500), sock.connect(&endpoint)) => {
                    if let Ok(Ok(())) = r {
                        break;
                    }
                }
                r = relays.recv() => match r {
                    Some(r) if r.session_start => session_start = Some(r.relay),
                    Some(_) => {}
                    None => return,
                },
            }
            if !declared_lost
                && mono_ns() - last_ns.load(Ordering::Relaxed) > deadline.as_nanos() as i64
            {
                declared_lost = true;
                if !forward(
                    &engine_tx,
                    lost(format!(
                        "no answer from {endpoint} within {} ms",
                        deadline.as_millis()
                    )),
                )
                .await
                {
                    return;
                }
            }
            tokio::time::sleep(Duration::from_millis(100)).await;
        }
        let (mut tx, mut rx) = sock.split();
        let _ = tokio::time::timeout(
            SEND_WAIT,
            tx.send(frame(shard_link::Body::Hello(hello.clone()))),
        )
        .await;
        let mut joined = false;
        let mut check = tokio::time::interval(Duration::from_millis(20));
        let mut beat = tokio::time::interval(BEAT);
        beat.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        loop {
            tokio::select! {
                _ = stop.changed() => return,
                m = rx.recv() => {
                    let Ok(m) = m else {
                        // No peer to read from (it went away): the deadline decides.
                        tokio::time::sleep(Duration::from_millis(10)).await;
                        continue;
                    };
                    let Some(body) = decode(m) else { continue };
                    last_ns.store(mono_ns(), Ordering::Relaxed);
                    match body {
                        shard_link::Body::Hello(h) => {
                            let why = if h.model_crc32 != hello.model_crc32 {
                                Some(format!("its model file {} (CRC-32 {:08x}) is not this combiner's (CRC-32 {:08x}): load the same file on every machine", h.model_path, h.model_crc32, hello.model_crc32))
                            } else if h.part != part || h.parts != hello.parts {
                                Some(format!("it is part {} of {}, but {endpoint} is given as part {part} of {} (--shard order)", h.part, h.parts, hello.parts))
                            } else {
                                None
                            };
                            match why {
                                Some(why) => {
                                    tracing::error!(part, endpoint = %endpoint, "shard refused: {why}");
                                    if !declared_lost {
                                        declared_lost = true;
                                        if !forward(&engine_tx, lost(why)).await { return; }
                                    }
                                }
                                None => {
                                    joined = true;
                                    declared_lost = false;
                                    if let Some(s) = &session_start {
                                        let _ = tokio::time::timeout(SEND_WAIT, tx.send(frame(shard_link::Body::Relay(s.clone())))).await;
                                    }
                                    if !forward(&engine_tx, EngineInput::FromShard(ShardEvent::Joined { part })).await { return; }
                                }
                            }
                        }
                        shard_link::Body::Busy(b) => {
                            // Said once; the greeting is retried every second in silence.
                            if !declared_lost {
                                tracing::error!(part, endpoint = %endpoint, "shard refused this combiner: {}", b.reason);
                                declared_lost = true;
                                if !forward(&engine_tx, lost(b.reason)).await { return; }
                            }
                            tokio::select! {
                                _ = stop.changed() => return,
                                _ = tokio::time::sleep(BUSY_RETRY) => continue 'connect,
                            }
                        }
                        shard_link::Body::Partial(p) if joined => {
                            let ev = EngineInput::FromShard(ShardEvent::Partial { part, partial: auspex_proto::convert::partial_from_msg(p) });
                            if !forward(&engine_tx, ev).await { return; }
                        }
                        _ => {}
                    }
                }
                r = relays.recv() => match r {
                    Some(r) => {
                        if r.session_start {
                            session_start = Some(r.relay.clone());
                        }
                        let _ = tokio::time::timeout(SEND_WAIT, tx.send(frame(shard_link::Body::Relay(r.relay)))).await;
                    }
                    None => return,
                },
                _ = beat.tick() => {
                        let _ = tokio::time::timeout(SEND_WAIT, tx.send(frame(shard_link::Body::Beat(v1::ShardBeat {})))).await;
                }
                _ = check.tick() => {
                    let silent = mono_ns() - last_ns.load(Ordering::Relaxed);
                    if silent > deadline.as_nanos() as i64 {
                        if !declared_lost {
                            declared_lost = true;
                            let why = format!("{endpoint} silent for {} ms (deadline {} ms)", silent / 1_000_000, deadline.as_millis());
                            if !forward(&engine_tx, lost(why)).await { return; }
                        }
                        // Start afresh: a restarted shard is a new peer.
                        continue 'connect;
                    }
                }
            }
        }
    }
}

/// The engine thread's side of a deployment across machines.
pub enum Link {
    /// A whole daemon.
    None,
    /// A shard: partials go out through `out`.
    Shard {
        /// To the link task.
        out: mpsc::Sender<Vec<u8>>,
        /// Partials no combiner took.
        unsent: Arc<AtomicU64>,
        /// Part.
        part: u32,
        /// Of how many.
        parts: u32,
    },
    /// A combiner and what it knows of its shards.
    Combine {
        /// One per shard, in part order.
        shards: Vec<ShardView>,
        /// Silence after which a shard is given up.
        deadline: Duration,
        /// Times a shard was given up.
        lost_events: u64,
        /// Spikes that reached the combiner.
        misrouted_spikes: u64,
    },
}

/// A combiner's view of one shard.
pub struct ShardView {
    /// Its link endpoint.
    pub endpoint: String,
    /// Relays to it.
    pub relay: mpsc::UnboundedSender<RelayItem>,
    /// [`mono_ns`] of its last message.
    pub last_ns: Arc<AtomicI64>,
    /// Greeted with the same model.
    pub joined: bool,
    /// Given up (until it greets again).
    pub lost: bool,
    /// Partials taken.
    pub partials: u64,
    /// Times given up.
    pub times_lost: u64,
    /// Why it is not joined.
    pub note: String,
}

impl Link {
    /// The engine role of this place in the deployment (None: whole, possibly threaded).
    pub fn role(&self) -> Option<auspex_engine::engine::Role> {
        use auspex_engine::engine::Role;
        match self {
            Link::None => None,
            Link::Shard { part, parts, .. } => Some(Role::Shard {
                part: *part,
                parts: *parts,
            }),
            Link::Combine { shards, .. } => Some(Role::Combiner {
                part: None,
                parts: shards.len() as u32,
            }),
        }
    }

    /// Where a shard's partials go.
    pub fn shard_out(&self) -> Option<(&mpsc::Sender<Vec<u8>>, &AtomicU64)> {
        match self {
            Link::Shard { out, unsent, .. } => Some((out, unsent)),
            _ => None,
        }
    }

    /// The role's name in status.
    pub fn name(&self) -> &'static str {
        match self {
            Link::None => "whole",
            Link::Shard { .. } => "shard",
            Link::Combine { .. } => "combine",
        }
    }

    /// The shards as status gives them.
    pub fn shard_states(&self) -> Vec<v1::ShardState> {
        let Link::Combine { shards, .. } = self else {
            return Vec::new();
        };
        let now = mono_ns();
        shards
            .iter()
            .enumerate()
            .map(|(i, s)| v1::ShardState {
                part: i as u32,
                endpoint: s.endpoint.clone(),
                joined: s.joined && !s.lost,
                partials: s.partials,
                times_lost: s.times_lost,
                note: s.note.clone(),
                silent_s: (now - s.last_ns.load(Ordering::Relaxed)).max(0) as f64 * 1e-9,
            })
            .collect()
    }
}
