//! Calibration as the engine applies it: the method a model's factors came from, the factors
//! β(b) and prior share ε, their checks, the held-out threshold record a model file carries, and
//! [`posterior_into`], the one calibrated posterior every consumer computes.
//!
//! Fitting the factors and replaying held-out trials is `auspex_modelling::calibrate`; this file
//! must not fit, replay or know about datasets.

use crate::special::softmax_in_place;
use serde::{Deserialize, Serialize};

/// How the posterior is recalibrated.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize, Hash)]
#[serde(rename_all = "kebab-case")]
pub enum CalibrationMethod {
    /// No correction: β = 1.
    #[default]
    None,
    /// One temperature for the whole window.
    Temperature,
    /// One temperature per band of time since onset.
    BandedTemperature,
    /// One temperature, and a share ε of the prior mixed into the posterior (Huber's
    /// ε-contamination model): the posterior never claims more than the model's rate of
    /// confident errors allows.
    TemperatureFloor,
}

impl CalibrationMethod {
    /// Every method, in the order reports compare them.
    pub const ALL: [CalibrationMethod; 4] = [
        CalibrationMethod::None,
        CalibrationMethod::Temperature,
        CalibrationMethod::BandedTemperature,
        CalibrationMethod::TemperatureFloor,
    ];
    /// Name used on the command line and in files.
    pub fn name(self) -> &'static str {
        match self {
            CalibrationMethod::None => "none",
            CalibrationMethod::Temperature => "temperature",
            CalibrationMethod::BandedTemperature => "banded-temperature",
            CalibrationMethod::TemperatureFloor => "temperature-floor",
        }
    }
    /// Parses a method name.
    pub fn parse(s: &str) -> Option<Self> {
        match s.trim().to_ascii_lowercase().replace('_', "-").as_str() {
            "none" | "off" => Some(CalibrationMethod::None),
            "temperature" => Some(CalibrationMethod::Temperature),
            "banded-temperature" | "banded" => Some(CalibrationMethod::BandedTemperature),
            "temperature-floor" | "floor" => Some(CalibrationMethod::TemperatureFloor),
            _ => None,
        }
    }
}

/// Held-out record of deciding at one threshold (calibrated as the model is).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ThresholdEvidence {
    /// The threshold on the top posterior.
    pub threshold: f64,
    /// Held-out trials replayed.
    pub trials: u32,
    /// Decisions that named the presented stimulus.
    pub correct: u32,
    /// 95% Clopper–Pearson interval of the accuracy, lower bound.
    pub lo: f64,
    /// Upper bound.
    pub hi: f64,
    /// Median decision time, ms after onset (end of the deciding bin).
    pub median_decision_ms: f64,
    /// Decisions taken by the threshold (the rest came at the window end).
    #[serde(default)]
    pub early: u32,
    /// Of which right.
    #[serde(default)]
    pub early_correct: u32,
}

impl ThresholdEvidence {
    /// The record in one line, as status and logs give it.
    pub fn held_out_line(&self) -> String {
        format!(
            "held out at θ {}: {}/{} right = {:.3} [{:.3}–{:.3}], median decision {:.0} ms",
            self.threshold,
            self.correct,
            self.trials,
            self.accuracy(),
            self.lo,
            self.hi,
            self.median_decision_ms
        )
    }
    /// Realised accuracy of every decision.
    pub fn accuracy(&self) -> f64 {
        self.correct as f64 / self.trials.max(1) as f64
    }
}

/// A model's calibration: the factors the engine applies and the evidence behind them.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct Calibration {
    /// The method that produced `factors`.
    pub method: CalibrationMethod,
    /// β(b) for every bin (empty: none, β = 1).
    pub factors: Vec<f64>,
    /// ε: share of the prior mixed into the posterior, `(1 − ε)·π + ε·prior` (0: none).
    #[serde(default)]
    pub floor: f64,
    /// Held-out trials the factors and the evidence come from.
    pub held_out_trials: u32,
    /// Cross-validation folds.
    pub folds: u32,
    /// Mean held-out log loss per trial and bin (nats), uncalibrated.
    pub log_loss_uncalibrated: f64,
    /// The same with the cross-fitted calibration.
    pub log_loss_calibrated: f64,
    /// Minimum decision time the threshold evidence was replayed with, seconds.
    pub min_time_s: f64,
    /// Held-out accuracy of deciding at each of [`EVIDENCE_THRESHOLDS`] (order statistics).
    pub evidence: Vec<ThresholdEvidence>,
}

/// Why a target accuracy cannot be promised.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
pub enum PromiseError {
    /// The model carries no threshold evidence.
    #[error("the model carries no held-out threshold evidence (refit it with `auspex fit`, which calibrates by default)")]
    NoEvidence,
    /// The target is out of range.
    #[error("target accuracy {0} must be in (0, 1)")]
    BadTarget(f64),
    /// No threshold's lower bound reaches the target.
    #[error("no threshold keeps {target}: the best held-out record is {best} (lower 95% bound {lo:.3}); the data cannot support this promise — lower the target or record more trials")]
    Unsupported {
        /// The target.
        target: f64,
        /// The best record, as text.
        best: String,
        /// Its lower bound.
        lo: f64,
    },
}

impl Calibration {
    /// Whether the engine applies anything.
    pub fn is_active(&self) -> bool {
        !self.factors.is_empty() || self.floor > 0.0
    }

    /// β as text: one value, or the range over bins ("1" when there are no factors).
    pub fn beta_text(&self) -> String {
        let (lo, hi) = self
            .factors
            .iter()
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &f| {
                (a.min(f), b.max(f))
            });
        if !lo.is_finite() {
            "1".into()
        } else if hi - lo < 1e-12 {
            format!("{lo:.3}")
        } else {
            format!("{lo:.3}–{hi:.3}")
        }
    }

    /// The parameters the engine applies.
    pub fn fitted(&self) -> Fitted {
        Fitted {
            factors: self.factors.clone(),
            floor: self.floor,
        }
    }

    /// Checks shapes and values against a model of `n_bins` bins.
    pub fn check(&self, n_bins: usize) -> Result<(), String> {
        if !self.factors.is_empty() && self.factors.len() != n_bins {
            return Err(format!(
                "calibration has {} factors for {n_bins} bins",
                self.factors.len()
            ));
        }
        if let Some((b, f)) = self
            .factors
            .iter()
            .enumerate()
            .find(|(_, f)| !(f.is_finite() && **f > 0.0 && **f <= MAX_FACTOR))
        {
            return Err(format!(
                "calibration factor {f} of bin {b} must be in (0, {MAX_FACTOR}]"
            ));
        }
        if !(self.floor >= 0.0 && self.floor <= MAX_FLOOR) {
            return Err(format!(
                "calibration floor {} must be in [0, {MAX_FLOOR}]",
                self.floor
            ));
        }
        for e in &self.evidence {
            if !(e.threshold > 0.0 && e.threshold <= 1.0) || e.correct > e.trials {
                return Err(format!(
                    "threshold evidence {} ({}/{}) is out of range",
                    e.threshold, e.correct, e.trials
                ));
            }
        }
        Ok(())
    }

    /// The smallest threshold whose held-out accuracy has a lower 95% bound of at least
    /// `target`; refuses when the evidence cannot support the target.
    pub fn threshold_for(&self, target: f64) -> Result<&ThresholdEvidence, PromiseError> {
        if !(target > 0.0 && target < 1.0) {
            return Err(PromiseError::BadTarget(target));
        }
        if self.evidence.is_empty() {
            return Err(PromiseError::NoEvidence);
        }
        let mut sorted: Vec<&ThresholdEvidence> = self.evidence.iter().collect();
        sorted.sort_by(|a, b| a.threshold.total_cmp(&b.threshold));
        if let Some(e) = sorted.iter().find(|e| e.lo >= target) {
            return Ok(e);
        }
        let best = sorted
            .iter()
            .max_by(|a, b| a.lo.total_cmp(&b.lo))
            .expect("evidence is not empty");
        Err(PromiseError::Unsupported {
            target,
            best: format!(
                "θ = {} with {}/{} right",
                best.threshold, best.correct, best.trials
            ),
            lo: best.lo,
        })
    }
}

/// Largest factor accepted in a model file (β > 1 sharpens the posterior; more than this would
/// be a fit gone wrong).
pub const MAX_FACTOR: f64 = 16.0;

/// Largest prior share ε accepted.
pub const MAX_FLOOR: f64 = 0.5;

/// A calibration's parameters: β(b) per bin (empty: 1) and the prior share ε.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct Fitted {
    /// β(b).
    pub factors: Vec<f64>,
    /// ε.
    pub floor: f64,
}

impl Fitted {
    /// β of bin `b`.
    #[inline]
    pub fn beta(&self, b: usize) -> f64 {
        self.factors.get(b).copied().unwrap_or(1.0)
    }
}

/// The engine's calibrated posterior of one bin:
/// `out = (1 − ε)·softmax(ln_prior + β · ll) + ε·prior`. The engine and every replay of
/// held-out trials use this one function, so they agree bit for bit.
#[inline]
pub fn posterior_into(ln_prior: &[f64], ll: &[f64], beta: f64, floor: f64, out: &mut [f64]) {
    for ((o, p), l) in out.iter_mut().zip(ln_prior).zip(ll) {
        *o = p + beta * l;
    }
    softmax_in_place(out);
    if floor > 0.0 {
        for (o, p) in out.iter_mut().zip(ln_prior) {
            *o = (1.0 - floor) * *o + floor * p.exp();
        }
    }
}
