//! Live jobs against a running daemon: control requests, status and replay (`client`, its items
//! re-exported here), the monitor (`monitor`) and its loop with the live demo (`session`),
//! `auspex status` text (`status`), `auspex steer`'s requests (`steer`), the text-line bridge (`send`) and recordings read from files
//! (`wire`).
//!
//! Must not: decode (the daemon and the offline jobs run the engine).

pub mod client;
pub mod closed_loop;
pub mod monitor;
pub mod send;
pub mod session;
pub mod status;
pub mod steer;
pub mod wire;

pub use client::*;
