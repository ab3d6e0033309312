//! Validation and its report: `validate` computes every figure (cross-validated decoding,
//! thresholds, information with its null, per-unit pictures' data); `html` only draws them
//! (its [`html`] function is re-exported here).
//!
//! Must not: draw while computing, or compute while drawing.

pub mod html;
pub mod validate;

pub use html::html;
