//! The messages between the daemon's threads and tasks: what the engine thread receives
//! ([`EngineInput`], from ingest, control, the learner and the shard links) and the payloads it
//! carries. A module of its own so that every sender and the engine thread depend on it, and
//! on nothing of each other.
//!
//! Must not: hold behaviour; these are types.

use auspex_engine::engine::OwnedPartial;
use auspex_engine::PreparedModel;
use auspex_proto::v1::{control_request, ControlReply};
use bytes::Bytes;
use std::path::PathBuf;
use std::sync::Arc;
use tokio::sync::oneshot;

/// What the engine thread receives.
pub enum EngineInput {
    /// Raw bytes from an ingest endpoint.
    Inbound {
        /// 0 main ingest, 1 task ingest.
        endpoint: u32,
        /// The message.
        bytes: Bytes,
        /// Wall-clock receive time.
        received_ns: i64,
    },
    /// A control request (other than reload and save).
    Control {
        /// The request.
        body: control_request::Body,
        /// Where the reply goes.
        reply: oneshot::Sender<ControlReply>,
    },
    /// A model already loaded by the control task.
    Reload {
        /// The model.
        model: Arc<PreparedModel>,
        /// Its path.
        path: String,
        /// Where the reply goes.
        reply: oneshot::Sender<ControlReply>,
    },
    /// Save the learned model (forwarded to the learner thread, which replies).
    SaveLearned {
        /// Model file path.
        path: PathBuf,
        /// The reply.
        reply: oneshot::Sender<Result<String, String>>,
    },
    /// A model the learner thread fitted.
    Learned(Learned),
    /// Why the learner could not fit (yet).
    LearnNote {
        /// Session counter.
        epoch: u64,
        /// The reason.
        text: String,
    },
    /// A message the combiner relayed to this shard (applied like ingest, not recorded: the
    /// combiner records it).
    Relay {
        /// The Inbound message.
        bytes: Bytes,
        /// The combiner's decoder when it applied it.
        decoder: String,
        /// Wall-clock receive time.
        received_ns: i64,
    },
    /// From a combiner's link tasks.
    FromShard(ShardEvent),
    /// Stop: end open trials, publish, flush.
    Shutdown,
}

/// The endpoint number relayed messages carry (0 main ingest, 1 task ingest).
pub const RELAY_ENDPOINT: u32 = 2;

/// A learned model, ready to swap in.
pub struct Learned {
    /// Session counter it belongs to.
    pub epoch: u64,
    /// The prepared model.
    pub model: Arc<PreparedModel>,
    /// Labelled trials it was fitted on (the learner's count, the recording's marker).
    pub trials: u64,
    /// Wall time the fit and preparation took.
    pub fit_s: f64,
}

/// What a combiner's link tasks tell its engine thread.
#[derive(Debug)]
pub enum ShardEvent {
    /// The shard greeted with the same model: its partials count from the next trial.
    Joined {
        /// Part.
        part: u32,
    },
    /// The shard fell silent past the deadline, or answered with another model or part.
    Lost {
        /// Part.
        part: u32,
        /// Why, in words.
        why: String,
    },
    /// One partial.
    Partial {
        /// Part.
        part: u32,
        /// The partial.
        partial: OwnedPartial,
    },
}
