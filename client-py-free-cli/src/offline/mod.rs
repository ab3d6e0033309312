//! Offline jobs: reading spike and trial tables (`tables`) and NWB files (`nwb`), fitting with progress (`fitting`),
//! decoding a dataset or a recorded session as acquisition would deliver it (`decode`, its
//! items re-exported here) and prequentially (`prequential`), exporting a model (`export`),
//! merging many sessions' validations (`gather`), simulated closed-loop experiments comparing
//! stimulus-choice policies (`steering`), and the commands behind them (`commands`).
//!
//! Must not: open sockets or start the daemon (the live jobs do).

pub mod commands;
pub mod decode;
pub mod export;
pub mod fitting;
pub mod gather;
pub mod nwb;
pub mod nwb_write;
pub mod prequential;
pub mod steering;
pub mod tables;

pub use decode::*;
