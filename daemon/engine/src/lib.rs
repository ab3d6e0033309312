//! # auspex-engine
//!
//! What runs bin by bin, and nothing else: the per-(unit, stimulus) spike-train model (count
//! distribution plus spike density after onset) as the engine evaluates it, its prepared tables,
//! the count-conditioned order-statistics likelihood through the count distribution's generating
//! function, the calibrated posterior over stimuli every bin, the decision rule, and ticks.
//!
//! ```text
//! Model ──prepare(budget)──▶ PreparedModel ──▶ Engine ◀── open_trial / spike / advance / label
//!                                                 │
//!                                                 ▼ EngineSink: frames, decisions, trial ends, unit summaries
//! ```
//!
//! Lives here: `count` and `model` (evaluation only), `prepared`/`table` (budgeted lookup
//! tables), `engine` (the state machine), `calibration` (β(b), ε as applied), `decision`,
//! `tally` (the running per-unit tally the engine reports), `data` (a dataset as the engine's
//! input events), `spikes` (a dataset's spikes, 8 bytes each), `ticks`, `special` (numerics).
//!
//! Must not live here: fitting, calibration fitting, validation, simulation, any statistic of a
//! session (those are `auspex-modelling`, which depends on this crate, never the reverse); I/O of
//! any kind — no tokio, zeromq, prost, sockets, files, clocks or threads. The daemon, offline
//! decoding, validation and replay all run [`engine::Engine`], so the same inputs give
//! bit-identical outputs everywhere.
#![deny(missing_docs)]

pub mod budget;
pub mod calibration;
pub mod count;
pub mod data;
pub mod decision;
pub mod engine;
pub mod information;
pub mod model;
pub mod prepared;
pub mod special;
pub mod spikes;
mod table;
pub mod tally;
pub mod ticks;

pub use count::{CountDist, CountFamily, CountParams};
pub use data::{Dataset, Trial};
pub use engine::{
    Decision, DecisionPolicy, DecisionReason, Decoder, Engine, EngineConfig, EngineSink, Frame,
};
pub use model::{CellSpec, CellSummary, Model, ModelSpec};
pub use prepared::{LookupBudget, PreparedModel};
pub use spikes::SpikeTable;
