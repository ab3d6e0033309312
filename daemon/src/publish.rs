//! Publishing: a bounded queue from the engine thread to one tokio task that owns the PUB
//! socket. Posterior frames (and other non-decision topics) are offered without waiting and
//! counted per topic when the queue is full; decisions wait for room, so they are never dropped
//! by us. Each message is two frames: topic, payload.

use auspex_proto::v1::Outbound;
use bytes::Bytes;
use prost::Message;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Arc;
use tokio::sync::mpsc;
use zeromq::{Socket, SocketSend, ZmqMessage};

/// An encoded message for the publisher.
pub struct OutMsg {
    /// Topic frame.
    pub topic: &'static str,
    /// Payload frame.
    pub payload: Bytes,
}

/// Drop counters shared with health.
#[derive(Default, Debug)]
pub struct PublishStats {
    /// Posterior frames we could not queue.
    pub dropped_posterior: AtomicU64,
    /// Other non-decision messages we could not queue.
    pub dropped_other: AtomicU64,
    /// Messages handed to the socket.
    pub sent: AtomicU64,
}

/// The engine thread's side: per-topic sequence numbers and the queue.
pub struct Publisher {
    tx: mpsc::Sender<OutMsg>,
    seq: [u64; 6],
    /// Shared counters.
    pub stats: Arc<PublishStats>,
}

impl Publisher {
    /// Wraps the queue.
    pub fn new(tx: mpsc::Sender<OutMsg>, stats: Arc<PublishStats>) -> Self {
        Publisher {
            tx,
            seq: [0; 6],
            stats,
        }
    }

    fn topic_index(topic: &str) -> usize {
        auspex_proto::topic::ALL
            .iter()
            .position(|t| *t == topic)
            .unwrap_or(0)
    }

    /// Queues a message; `must_deliver` waits for room (decisions), otherwise a full queue
    /// drops and counts it.
    pub fn publish(
        &mut self,
        topic: &'static str,
        body: auspex_proto::v1::outbound::Body,
        must_deliver: bool,
    ) {
        let i = Self::topic_index(topic);
        self.seq[i] += 1;
        let msg = Outbound {
            seq: self.seq[i],
            body: Some(body),
        };
        let out = OutMsg {
            topic,
            payload: Bytes::from(msg.encode_to_vec()),
        };
        if must_deliver {
            // The engine thread is not a tokio worker, so blocking here is allowed.
            let _ = self.tx.blocking_send(out);
        } else if self.tx.try_send(out).is_err() {
            if topic == auspex_proto::topic::POSTERIOR {
                self.stats.dropped_posterior.fetch_add(1, Ordering::Relaxed);
            } else {
                self.stats.dropped_other.fetch_add(1, Ordering::Relaxed);
            }
        }
    }
}

/// The publisher task: binds PUB and sends until the queue closes.
pub async fn run_publisher(
    mut sock: zeromq::PubSocket,
    mut rx: mpsc::Receiver<OutMsg>,
    stats: Arc<PublishStats>,
) {
    while let Some(m) = rx.recv().await {
        let mut z = ZmqMessage::from(Bytes::from_static(m.topic.as_bytes()));
        z.push_back(m.payload);
        if let Err(e) = sock.send(z).await {
            tracing::warn!(error = %e, "publish failed");
        } else {
            stats.sent.fetch_add(1, Ordering::Relaxed);
        }
    }
    let _ = sock.close().await;
}

/// Binds a PUB socket.
pub async fn bind_pub(endpoint: &str) -> Result<(zeromq::PubSocket, String), zeromq::ZmqError> {
    let mut s = zeromq::PubSocket::new();
    let ep = s.bind(endpoint).await?;
    Ok((s, ep.to_string()))
}
