//! Control: a bound ROUTER socket answering REQ clients. Each request is decoded here, model files are loaded here (off
//! the engine thread), and everything else is answered by the engine thread through a oneshot
//! reply with a timeout, so a stuck engine gives an error reply rather than a hung client.

use crate::ingest::forward;
use crate::messages::EngineInput;
use auspex_engine::LookupBudget;
use auspex_proto::v1::{control_request::Body, ControlReply, ControlRequest};
use bytes::Bytes;
use crossbeam_channel::Sender;
use prost::Message;
use std::sync::Arc;
use std::time::Duration;
use tokio::sync::{oneshot, watch};
use zeromq::{Socket, SocketRecv, SocketSend, ZmqMessage};

/// How long the engine thread may take to answer.
pub const ENGINE_REPLY_TIMEOUT: Duration = Duration::from_secs(3);
/// How long a save of the learned model (a full fit) may take.
pub const SAVE_REPLY_TIMEOUT: Duration = Duration::from_secs(600);

fn error_reply(msg: impl Into<String>) -> ControlReply {
    ControlReply {
        ok: false,
        error: msg.into(),
        note: String::new(),
        body: None,
    }
}

async fn handle(
    bytes: &[u8],
    tx: &Sender<EngineInput>,
    table_memory: LookupBudget,
) -> ControlReply {
    let req = match ControlRequest::decode(bytes) {
        Ok(r) => r,
        Err(e) => return error_reply(format!("request is not a ControlRequest: {e}")),
    };
    let (rtx, rrx) = oneshot::channel();
    let item = match req.body {
        None => return error_reply("empty request"),
        Some(Body::Reload(r)) => {
            let path = std::path::PathBuf::from(&r.path);
            let loaded = tokio::task::spawn_blocking(move || {
                // Build the model's lookup tables here, off the engine thread.
                auspex_proto::model_file::load_model(&path)
                    .map(|(_, m)| Arc::new(m).prepare(table_memory))
            })
            .await;
            match loaded {
                Ok(Ok(model)) => EngineInput::Reload {
                    model,
                    path: r.path,
                    reply: rtx,
                },
                Ok(Err(e)) => return error_reply(e.to_string()),
                Err(e) => return error_reply(format!("loading failed: {e}")),
            }
        }
        Some(Body::SaveLearned(sv)) => {
            if sv.path.trim().is_empty() {
                return error_reply("save needs a file path");
            }
            let (stx, srx) = oneshot::channel();
            let item = EngineInput::SaveLearned {
                path: sv.path.into(),
                reply: stx,
            };
            if !forward(tx, item).await {
                return error_reply("engine stopped");
            }
            // Saving fits on every trial learned so far: allow for a large model.
            return match tokio::time::timeout(SAVE_REPLY_TIMEOUT, srx).await {
                Ok(Ok(Ok(note))) => ControlReply {
                    ok: true,
                    error: String::new(),
                    note,
                    body: None,
                },
                Ok(Ok(Err(e))) => error_reply(e),
                Ok(Err(_)) => error_reply("the learner stopped before saving"),
                Err(_) => error_reply("saving took longer than 10 minutes; see the daemon log"),
            };
        }
        Some(body) => EngineInput::Control { body, reply: rtx },
    };
    if !forward(tx, item).await {
        return error_reply("engine stopped");
    }
    match tokio::time::timeout(ENGINE_REPLY_TIMEOUT, rrx).await {
        Ok(Ok(r)) => r,
        Ok(Err(_)) => error_reply("engine stopped before replying"),
        Err(_) => error_reply("engine did not reply in time"),
    }
}

/// Serves control requests until shutdown. The socket is a ROUTER speaking the REQ/REP
/// envelope (identity, empty delimiter, body), so any REQ client works unchanged; zeromq 0.7's
/// REP socket was seen to stop receiving for good after a few hundred short-lived REQ peers.
pub async fn run_control(
    mut sock: zeromq::RouterSocket,
    tx: Sender<EngineInput>,
    mut stop: watch::Receiver<bool>,
    table_memory: LookupBudget,
) {
    loop {
        tokio::select! {
            _ = stop.changed() => break,
            r = sock.recv() => match r {
                Ok(m) => {
                    // Envelope: the peer's identity, then (REQ peers) an empty delimiter; then
                    // exactly one frame, the request. Anything else gets one error reply.
                    let mut frames = m.into_vec();
                    if frames.is_empty() {
                        continue;
                    }
                    let identity = frames.remove(0);
                    let delimiter = frames.first().is_some_and(|f| f.is_empty());
                    if delimiter {
                        frames.remove(0);
                    }
                    let reply = match frames.len() {
                        1 => handle(&frames[0], &tx, table_memory).await,
                        n => error_reply(format!(
                            "a control request is one frame (a ControlRequest); this message had {n}"
                        )),
                    };
                    let mut out = ZmqMessage::from(identity);
                    if delimiter {
                        out.push_back(Bytes::new());
                    }
                    out.push_back(Bytes::from(reply.encode_to_vec()));
                    if let Err(e) = sock.send(out).await {
                        tracing::warn!(error = %e, "control reply failed");
                    }
                }
                Err(e) => {
                    tracing::warn!(error = %e, "control receive failed");
                    tokio::time::sleep(Duration::from_millis(10)).await;
                }
            }
        }
    }
    let _ = sock.close().await;
}
