//! # auspex-engine
//!
//! The pure decoding core of Auspex: per-(unit, stimulus) spike-train models (count distribution
//! plus spike density after onset), their fitting, the count-conditioned order-statistics
//! likelihood through the count distribution's generating function, the posterior over stimuli
//! every bin, decisions, the simulator, and the statistics reports need.
//!
//! This crate must stay free of I/O: no tokio, zeromq, prost, sockets, files, clocks or threads.
//! The daemon, offline decoding, validation and replay all run [`engine::Engine`], so the same
//! inputs give bit-identical outputs everywhere.
#![deny(missing_docs)]

pub mod assess;
pub mod calibrate;
pub mod count;
pub mod data;
pub mod decision;
pub mod density;
pub mod engine;
pub mod fit;
pub mod learn;
pub mod model;
pub mod prepared;
pub mod simulate;
pub mod special;
pub mod stats;
mod table;
pub mod tally;
pub mod ticks;
pub mod validation;

pub use count::{CountDist, CountFamily, CountParams};
pub use data::{Dataset, Trial};
pub use engine::{
    Decision, DecisionPolicy, DecisionReason, Decoder, Engine, EngineConfig, EngineSink, Frame,
};
pub use model::{CellSpec, CellSummary, Model, ModelSpec};
pub use prepared::{LookupBudget, PreparedModel};
