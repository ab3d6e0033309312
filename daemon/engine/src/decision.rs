//! The decision rule, in one place: the policy and its checks, the first bin that may decide,
//! and when a bin's posterior fires a decision. The engine decides with it, and every replay of
//! held-out trajectories (validation, calibration's threshold record) uses the same functions,
//! so an offline promise is about the rule the daemon runs.
//!
//! Must not: know about trials, sinks or models; it is arithmetic on numbers it is given.

use serde::{Deserialize, Serialize};

/// When a trial's decision fires.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct DecisionPolicy {
    /// Fire at the first bin whose top posterior reaches this (in (0, 1]).
    pub threshold: f64,
    /// ... but not before this much time after onset, in seconds.
    pub min_time_s: f64,
}

/// The decision threshold used unless one is given (everywhere: CLI, daemon, reports).
pub const DEFAULT_THRESHOLD: f64 = 0.9;
/// The minimum decision time used unless one is given, ms.
pub const DEFAULT_MIN_TIME_MS: f64 = 20.0;

impl Default for DecisionPolicy {
    fn default() -> Self {
        DecisionPolicy {
            threshold: DEFAULT_THRESHOLD,
            min_time_s: DEFAULT_MIN_TIME_MS / 1000.0,
        }
    }
}

impl DecisionPolicy {
    /// The one check of a policy's values (the engine, the daemon's configuration and its
    /// control requests all use it).
    pub fn check(&self) -> Result<(), String> {
        if !(self.threshold > 0.0 && self.threshold <= 1.0) {
            return Err(format!("threshold {} must be in (0, 1]", self.threshold));
        }
        if !(self.min_time_s.is_finite() && self.min_time_s >= 0.0) {
            return Err(format!(
                "minimum time {} ms must be ≥ 0",
                self.min_time_s * 1000.0
            ));
        }
        Ok(())
    }
}

/// Whether bin `bin` decides: at or after the first deciding bin, with the top posterior at
/// or above the threshold. (A trial that never fires decides at its window end.)
#[inline]
pub fn fires(bin: usize, min_bin: usize, top_posterior: f64, threshold: f64) -> bool {
    bin >= min_bin && top_posterior >= threshold
}

/// The first bin that may take a threshold decision: bin b may once (b + 1)·Δ ≥ the minimum
/// time. The one rule the engine and every replay of held-out trials use.
pub fn min_bin_for(min_time_s: f64, bin_width_s: f64) -> u32 {
    ((min_time_s / bin_width_s - 1e-9).ceil() as i64 - 1).clamp(0, u32::MAX as i64) as u32
}

/// Why a decision fired.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "kebab-case")]
pub enum DecisionReason {
    /// The top posterior reached the threshold after the minimum time.
    Threshold,
    /// The window ended: maximum a posteriori.
    WindowEnd,
}

impl DecisionReason {
    /// Name used in files.
    pub fn name(self) -> &'static str {
        match self {
            DecisionReason::Threshold => "threshold",
            DecisionReason::WindowEnd => "window-end",
        }
    }
}

/// One trial's decision.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Decision {
    /// Trial id.
    pub trial: u64,
    /// Decided stimulus index.
    pub stimulus: u32,
    /// Its posterior.
    pub posterior: f64,
    /// Bin in which it fired.
    pub bin: u32,
    /// The last tick of that bin.
    pub bin_end_tick: i64,
    /// Why.
    pub reason: DecisionReason,
    /// Presented stimulus, if known at the time.
    pub presented: Option<u32>,
    /// The threshold in force for the trial (the promise a threshold decision keeps).
    pub threshold: f64,
}
