//! # auspexd
//!
//! The Auspex service: ingest of spike batches and trial events over ZeroMQ, the engine on its
//! own OS thread, publishing of posteriors, decisions, per-unit reports and health, control,
//! and the session recorder. The binary is thin glue over this library.
//!
//! Public is only what running the daemon needs: [`cli`] (the binary's entry), [`config`] (the
//! settings and their checks), [`service`] (start, stop, the bound endpoints) and
//! [`ThreadedDecoder`] (the `--threads` engine, for `auspex bench`). Everything else is the
//! daemon's own; the `fuzzing` feature opens the engine thread, publisher and shard link to the
//! fuzz harness (`tests/src/fuzzing.rs`), which drives them without sockets.
#![deny(missing_docs)]

pub mod cli;
mod clock;
pub mod config;
mod control;
#[cfg(feature = "fuzzing")]
pub mod engine_thread;
#[cfg(not(feature = "fuzzing"))]
mod engine_thread;
mod ingest;
#[cfg(feature = "fuzzing")]
pub mod learner;
#[cfg(not(feature = "fuzzing"))]
mod learner;
#[cfg(feature = "fuzzing")]
pub mod messages;
#[cfg(not(feature = "fuzzing"))]
mod messages;
mod next_stimulus;
mod promise;
#[cfg(feature = "fuzzing")]
pub mod publish;
#[cfg(not(feature = "fuzzing"))]
mod publish;
mod ratelog;
pub mod realtime;
mod recorder;
pub mod service;
#[cfg(feature = "fuzzing")]
pub mod shard_link;
#[cfg(not(feature = "fuzzing"))]
mod shard_link;
mod start_error;
#[cfg(feature = "fuzzing")]
pub mod steering;
#[cfg(not(feature = "fuzzing"))]
mod steering;
mod workers;

pub use workers::{ThreadedDecoder, WorkersStalled};
