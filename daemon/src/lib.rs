//! # auspexd
//!
//! The Auspex service: ingest of spike batches and trial events over ZeroMQ, the engine on its
//! own OS thread, publishing of posteriors, decisions, per-unit reports and health, control,
//! and the session recorder. The binary is thin glue over this library.
#![deny(missing_docs)]

pub mod cli;
pub mod config;
pub mod control;
pub mod engine_thread;
pub mod ingest;
pub mod learner;
/// Model files (kept here for existing callers; they live in `auspex_proto::model_file`).
pub mod model_file {
    pub use auspex_proto::model_file::*;
}
pub mod next_stimulus;
pub mod promise;
pub mod publish;
pub mod ratelog;
pub mod recorder;
pub mod service;
pub mod shard_link;
pub mod workers;
