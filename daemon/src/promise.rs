//! The promise a decision threshold makes, kept by the engine thread: with a target accuracy the
//! threshold and minimum time come from the model's held-out record (and threshold decisions are
//! withheld when the record cannot support the target); once trials are labelled, every
//! threshold decision is added to the watch of its promised level (Page's CUSUM, see
//! `auspex_modelling::calibrate::PromiseWatch`), and a level whose watch raises its alarm is
//! reported in health and logged once.
//!
//! Must not: touch the engine (the engine thread applies the policy this returns) or block.

use auspex_engine::engine::{DecisionPolicy, EngineConfig};
use auspex_engine::Model;
use auspex_modelling::calibrate::{PromiseWatch, WATCH_ALARM};
use auspex_proto::v1;

/// How the threshold is chosen, and the session's watches.
#[derive(Debug, Default)]
pub struct PromiseKeeper {
    target: Option<f64>,
    withheld: bool,
    evidence: String,
    /// (threshold, promise) pairs that have been in force.
    promise_of: Vec<(f64, f64)>,
    /// One watch per promised level, in order of first decision.
    watches: Vec<(f64, PromiseWatch)>,
}

/// The policy of a target accuracy that cannot be kept: every decision at the window end.
fn withheld_policy(model: Option<&Model>) -> DecisionPolicy {
    DecisionPolicy {
        threshold: 1.0,
        min_time_s: model
            .map(|m| m.n_bins() as f64 * m.bin_width_s())
            .unwrap_or(0.0),
    }
}

/// A one-line description of a model's calibration.
pub fn calibration_line(model: Option<&Model>) -> String {
    let Some(m) = model else {
        return "no model".into();
    };
    let c = m.calibration();
    if !c.is_active() {
        return "none".into();
    }
    format!("{} (β {})", c.method.name(), c.beta_text())
}

impl PromiseKeeper {
    /// A keeper with an optional target accuracy.
    pub fn new(target: Option<f64>) -> Self {
        PromiseKeeper {
            target,
            ..Default::default()
        }
    }

    /// The target accuracy, if any.
    pub fn target(&self) -> Option<f64> {
        self.target
    }

    /// The policy that keeps `target` with `model` under `config`'s decoder and calibration
    /// switch, and the line stating its evidence; Err says why it cannot be kept.
    pub fn policy_for(
        target: f64,
        model: Option<&Model>,
        config: &EngineConfig,
    ) -> Result<(DecisionPolicy, String), String> {
        auspex_engine::engine::policy_for_target(target, model, config)
    }

    /// Sets (or clears) the target; with a target, the policy to apply, or Err when `model`
    /// cannot support it (nothing changes then).
    pub fn set_target(
        &mut self,
        target: Option<f64>,
        model: Option<&Model>,
        config: &EngineConfig,
    ) -> Result<DecisionPolicy, String> {
        match target {
            None => {
                self.target = None;
                self.withheld = false;
                self.evidence = Self::record_line(model, config.policy.threshold);
                self.promise_of
                    .push((config.policy.threshold, config.policy.threshold));
                Ok(config.policy)
            }
            Some(t) => {
                let (p, line) = Self::policy_for(t, model, config)?;
                self.target = Some(t);
                self.withheld = false;
                self.evidence = line;
                self.promise_of.push((p.threshold, t));
                Ok(p)
            }
        }
    }

    /// After the model changed (reload, learned): the policy that keeps the target, or the
    /// withheld policy with the reason kept for status. Without a target, `config`'s policy.
    pub fn model_changed(
        &mut self,
        model: Option<&Model>,
        config: &EngineConfig,
    ) -> DecisionPolicy {
        let Some(t) = self.target else {
            self.evidence = Self::record_line(model, config.policy.threshold);
            return config.policy;
        };
        match Self::policy_for(t, model, config) {
            Ok((p, line)) => {
                if self.withheld {
                    tracing::info!(
                        target = t,
                        threshold = p.threshold,
                        "the model's record now supports the target: threshold decisions resume"
                    );
                }
                self.withheld = false;
                self.evidence = line;
                self.promise_of.push((p.threshold, t));
                p
            }
            Err(why) => {
                if !self.withheld {
                    tracing::warn!(target = t, reason = %why, "threshold decisions withheld: every decision comes at the window end until a model's record supports the target");
                }
                self.withheld = true;
                self.evidence = why;
                withheld_policy(model)
            }
        }
    }

    /// The model's held-out record at `threshold`, if it has one.
    fn record_line(model: Option<&Model>, threshold: f64) -> String {
        model
            .and_then(|m| {
                m.calibration()
                    .evidence
                    .iter()
                    .find(|e| e.threshold == threshold)
            })
            .map(|e| e.held_out_line())
            .unwrap_or_default()
    }

    /// One labelled threshold decision made at `threshold`. Returns the watch when this
    /// decision raised its alarm.
    pub fn record(&mut self, threshold: f64, right: bool) -> Option<&PromiseWatch> {
        let promise = self
            .promise_of
            .iter()
            .rev()
            .find(|(th, _)| *th == threshold)
            .map(|(_, p)| *p)
            .unwrap_or(threshold);
        let i = match self
            .watches
            .iter()
            .position(|(_, w)| w.threshold == promise)
        {
            Some(i) => i,
            None => {
                self.watches.push((threshold, PromiseWatch::new(promise)));
                self.watches.len() - 1
            }
        };
        let (th, w) = &mut self.watches[i];
        *th = threshold;
        if w.add(right) {
            let (acc, lo, hi) = w.accuracy();
            tracing::warn!(
                promise,
                threshold,
                decisions = w.decisions,
                accuracy = acc,
                lo,
                hi,
                alarm = WATCH_ALARM,
                "promise broken: labelled threshold decisions are right less often than promised (CUSUM alarm)"
            );
            return Some(&self.watches[i].1);
        }
        None
    }

    /// A new session: the watches start over.
    pub fn new_session(&mut self) {
        self.watches.clear();
    }

    /// The watches, for health.
    pub fn records(&self) -> Vec<v1::PromiseRecord> {
        self.watches
            .iter()
            .map(|(th, w)| {
                let (_, lo, hi) = w.accuracy();
                v1::PromiseRecord {
                    promise: w.threshold,
                    threshold: *th,
                    decisions: w.decisions,
                    correct: w.correct,
                    accuracy_lo: lo,
                    accuracy_hi: hi,
                    cusum: w.cusum,
                    broken: w.alarm,
                }
            })
            .collect()
    }

    /// Whether any watch has raised its alarm this session.
    pub fn broken(&self) -> bool {
        self.watches.iter().any(|(_, w)| w.alarm)
    }

    /// For status.
    pub fn state(&self, model: Option<&Model>, config: &EngineConfig) -> v1::PromiseState {
        v1::PromiseState {
            target_accuracy: self.target.unwrap_or(0.0),
            withheld: self.withheld,
            evidence: self.evidence.clone(),
            calibrated: config.applies_calibration(),
            calibration: if config.calibrated && !config.applies_calibration() {
                format!(
                    "{} — not applied: fitted for order-stats, decoding with {} (raw posterior)",
                    calibration_line(model),
                    config.decoder.name()
                )
            } else {
                calibration_line(model)
            },
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn decisions_count_toward_their_promise_and_a_broken_one_is_flagged_once() {
        let mut k = PromiseKeeper::new(None);
        let cfg = EngineConfig::new(1000.0);
        k.set_target(None, None, &cfg).unwrap();
        for _ in 0..5 {
            assert!(k.record(0.9, true).is_none());
        }
        // Ten wrong in a row at 0.9 (each adds ln 2 to the CUSUM) reach ln 1000.
        let raised = (0..12).filter(|_| k.record(0.9, false).is_some()).count();
        assert_eq!(raised, 1);
        let r = k.records();
        assert_eq!(r.len(), 1);
        assert_eq!((r[0].decisions, r[0].correct, r[0].broken), (17, 5, true));
        assert!(k.broken());
        k.new_session();
        assert!(!k.broken() && k.records().is_empty());
    }

    #[test]
    fn a_target_without_a_record_is_refused_and_withheld_after_a_swap() {
        let mut k = PromiseKeeper::new(None);
        let cfg = EngineConfig::new(1000.0);
        assert!(k.set_target(Some(0.95), None, &cfg).is_err());
        assert_eq!(k.target(), None, "a refused target changes nothing");
        let mut k = PromiseKeeper::new(Some(0.95));
        let p = k.model_changed(None, &cfg);
        assert_eq!(p.threshold, 1.0);
        assert!(k.state(None, &cfg).withheld);
    }
}
