//! Ingest: bound PULL (or SUB) sockets whose messages go, with their receive time, into the
//! bounded channel to the engine thread. Nothing is dropped here: when the channel is full the
//! task waits (backpressure reaches the sender through ZeroMQ), and health reports the backlog.

use crate::clock::now_ns;
use crate::messages::EngineInput;
use bytes::Bytes;
use crossbeam_channel::{Sender, TrySendError};
use std::time::Duration;
use tokio::sync::watch;
use zeromq::{Socket, SocketRecv, ZmqMessage};

/// The payload of an inbound ZeroMQ message: its last frame (so PUB senders may prefix a topic).
pub fn payload(m: ZmqMessage) -> Bytes {
    let mut v = m.into_vec();
    v.pop().unwrap_or_default()
}

/// Hands one message to the engine thread, waiting while the channel is full.
pub async fn forward(tx: &Sender<EngineInput>, mut item: EngineInput) -> bool {
    loop {
        match tx.try_send(item) {
            Ok(()) => return true,
            Err(TrySendError::Full(back)) => {
                item = back;
                tokio::time::sleep(Duration::from_micros(200)).await;
            }
            Err(TrySendError::Disconnected(_)) => return false,
        }
    }
}

/// Receives until shutdown.
pub async fn run_ingest<S: SocketRecv + Socket + Send>(
    mut sock: S,
    endpoint: u32,
    tx: Sender<EngineInput>,
    mut stop: watch::Receiver<bool>,
) {
    loop {
        tokio::select! {
            _ = stop.changed() => break,
            r = sock.recv() => match r {
                Ok(m) => {
                    let item = EngineInput::Inbound { endpoint, bytes: payload(m), received_ns: now_ns() };
                    if !forward(&tx, item).await {
                        break;
                    }
                }
                Err(e) => {
                    tracing::warn!(endpoint, error = %e, "ingest receive failed");
                    tokio::time::sleep(Duration::from_millis(10)).await;
                }
            }
        }
    }
    let _ = sock.close().await;
}
