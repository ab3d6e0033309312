//! # auspex-modelling
//!
//! Everything that learns from data, between trials or after a session: fitting count families
//! (`families`) and spike densities (`density`) into models (`fit`, with the few-trials
//! shrinkage), trial windows (`windows`), calibration fitting and the held-out threshold record
//! (`calibrate`), validation (`validation`: folds, shuffle null, learning curve, per-unit reports,
//! goodness of fit), the learner's pure half (`learn`), per-unit verdicts (`assess`), the
//! simulator (`simulate`), the choice of the next stimulus to learn units' tuning (`design`), and
//! the statistics they share (`stats`).
//!
//! ```text
//! Dataset / windows ──fit──▶ ModelSpec ──calibrate (held-out folds, engine replays)──▶ Model
//! ```
//!
//! Depends on `auspex-engine` (it replays held-out trials through the very engine the daemon
//! runs), never the reverse. Must not: do I/O — no files, sockets, clocks, threads of its own,
//! tokio, zeromq or prost. The CLI's `validate` and `fit`, and the daemon's learner thread, call
//! these same functions.
#![deny(missing_docs)]

pub mod assess;
pub mod calibrate;
pub mod density;
pub mod design;
pub mod families;
pub mod fit;
pub mod folds;
pub mod learn;
pub mod simulate;
pub mod stats;
pub mod validation;
pub mod windows;
