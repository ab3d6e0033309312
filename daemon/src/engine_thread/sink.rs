//! The engine's outputs as published messages: frames, decisions, trial ends and per-unit
//! reports become `Outbound` messages, and the session's running tally and the promise watch
//! are kept as they pass.
//!
//! Must not: decide anything the engine did not, or block on a subscriber.

use super::*;

/// The running session's figures, for its summary.
#[derive(Debug, Clone)]
pub(super) struct SessionTally {
    pub(super) name: String,
    pub(super) started: Instant,
    pub(super) completed: u64,
    pub(super) cancelled: u64,
    pub(super) decisions: u64,
    pub(super) labelled: u64,
    pub(super) correct: u64,
    /// Decided trials that ended before their label: (trial, decided stimulus name, the
    /// threshold of a threshold decision).
    pub(super) awaiting_label: VecDeque<(u64, String, Option<f64>)>,
    pub(super) recording: String,
}

impl SessionTally {
    pub(super) fn new(name: &str, recording: String) -> Self {
        SessionTally {
            name: name.to_string(),
            started: Instant::now(),
            completed: 0,
            cancelled: 0,
            decisions: 0,
            labelled: 0,
            correct: 0,
            awaiting_label: VecDeque::new(),
            recording,
        }
    }
}

/// Turns engine outputs into published messages.
pub(super) struct PubSink<'a> {
    pub(super) publisher: &'a mut Publisher,
    pub(super) recorder: Option<&'a Sender<RecorderMsg>>,
    pub(super) names: &'a TrialStimuli,
    pub(super) current: &'a Arc<[String]>,
    pub(super) chooser: &'a mut StimulusChooser,
    pub(super) tally: Option<&'a mut SessionTally>,
    pub(super) promise: &'a mut PromiseKeeper,
    /// A shard's partials go here (None: not a shard).
    pub(super) link_out: Option<(
        &'a tokio::sync::mpsc::Sender<Vec<u8>>,
        &'a std::sync::atomic::AtomicU64,
    )>,
}

impl PubSink<'_> {
    pub(super) fn names(&self, trial: u64) -> &[String] {
        self.names
            .get(trial)
            .map(|a| &a[..])
            .unwrap_or(&self.current[..])
    }
    pub(super) fn name(&self, trial: u64, i: u32) -> String {
        self.names(trial)
            .get(i as usize)
            .cloned()
            .unwrap_or_default()
    }
}

impl EngineSink for PubSink<'_> {
    fn partial(&mut self, p: &auspex_engine::engine::Partial<'_>) {
        if let Some((tx, unsent)) = self.link_out {
            if tx.try_send(crate::shard_link::partial_msg(p)).is_err() {
                unsent.fetch_add(1, Ordering::Relaxed);
            }
        }
    }
    fn frame(&mut self, f: &Frame<'_>) {
        let body = outbound::Body::Posterior(auspex_proto::convert::frame_msg(f));
        self.publisher.publish(topic::POSTERIOR, body, false);
    }
    fn decision(&mut self, d: &Decision) {
        if let Some(t) = self.tally.as_mut() {
            t.decisions += 1;
        }
        let body = outbound::Body::Decision(decision_msg(d, self.names(d.trial)));
        self.publisher.publish(topic::DECISION, body, true);
    }
    fn trial_end(&mut self, e: &TrialEnd<'_>) {
        if let (Some(p), Some(d)) = (e.presented, e.decision) {
            if e.outcome == TrialOutcome::Completed {
                self.chooser.record(p, d.stimulus);
            }
        }
        let decided = e.decision.map(|d| self.name(e.trial, d.stimulus));
        let presented = e.presented.map(|p| self.name(e.trial, p));
        let by_threshold = e
            .decision
            .filter(|d| d.reason == DecisionReason::Threshold)
            .map(|d| d.threshold);
        if let (Some(d), Some(p), Some(th)) = (&decided, &presented, by_threshold) {
            self.promise.record(th, d == p);
        }
        if let Some(t) = self.tally.as_mut() {
            if e.outcome == TrialOutcome::Completed {
                t.completed += 1;
            } else {
                t.cancelled += 1;
            }
            match (&decided, &presented) {
                (Some(d), Some(p)) => {
                    t.labelled += 1;
                    t.correct += (d == p) as u64;
                }
                (Some(d), None) if e.outcome == TrialOutcome::Completed => {
                    if t.awaiting_label.len() == 256 {
                        t.awaiting_label.pop_front();
                    }
                    t.awaiting_label
                        .push_back((e.trial, d.clone(), by_threshold));
                }
                _ => {}
            }
        }
        let body = outbound::Body::Trial(v1::TrialClosed {
            trial: e.trial,
            outcome: match e.outcome {
                TrialOutcome::Completed => v1::TrialOutcome::Completed,
                TrialOutcome::Cancelled => v1::TrialOutcome::Cancelled,
                TrialOutcome::Shutdown => v1::TrialOutcome::Shutdown,
                TrialOutcome::SessionEnded => v1::TrialOutcome::SessionEnded,
            } as i32,
            spikes: e.spikes,
            bins: e.bins,
            presented: presented.unwrap_or_default(),
            posterior: e.posterior.to_vec(),
            onset_tick: e.onset,
            stimuli: self.names(e.trial).to_vec(),
        });
        // Trial ends must reach closed-loop control as surely as decisions.
        self.publisher.publish(topic::TRIAL, body, true);
        if let Some(r) = self.recorder {
            let _ = r.send(RecorderMsg::Flush);
        }
    }
    fn unit_summaries(&mut self, s: &UnitSummaries<'_>) {
        let presented = self.name(s.trial, s.presented);
        if let Some(t) = self.tally.as_mut() {
            if let Some(i) = t
                .awaiting_label
                .iter()
                .position(|(id, _, _)| *id == s.trial)
            {
                if let Some((_, d, th)) = t.awaiting_label.remove(i) {
                    t.labelled += 1;
                    t.correct += (d == presented) as u64;
                    if let Some(th) = th {
                        self.promise.record(th, d == presented);
                    }
                }
            }
        }
        let ns = s.model.n_stimuli();
        let rule = VerdictRule::default();
        let units = (0..s.units.len())
            .map(|i| {
                let a = assess(s.tally.confusion(i), ns, &rule);
                let sums = s.tally.count_sums(i);
                let tuning: Vec<v1::StimulusTuning> = sums
                    .iter()
                    .map(|&(n, sum, sq)| {
                        let t = tuning(n, sum, sq);
                        v1::StimulusTuning {
                            trials: t.trials,
                            mean_count: t.mean,
                            low: t.low,
                            high: t.high,
                        }
                    })
                    .collect();
                let preferred = (0..ns)
                    .max_by(|&x, &y| {
                        s.model
                            .count(i, x)
                            .mean()
                            .total_cmp(&s.model.count(i, y).mean())
                    })
                    .unwrap_or(0);
                v1::UnitLine {
                    unit: s.units[i],
                    presented_posterior: s.presented_posterior[i],
                    decoded: s.decoded[i],
                    accuracy: s.accuracy[i],
                    info_bits: s.info_bits[i],
                    trials: a.trials,
                    accuracy_low: a.accuracy_low,
                    accuracy_high: a.accuracy_high,
                    info_se_bits: a.info_se_bits,
                    p_value: a.p_value,
                    verdict: a.verdict.words().into(),
                    settled: a.settled,
                    latency_ms: peak_ms(s.model.timing(i, preferred), s.model.bin_width_s()),
                    tuning,
                }
            })
            .collect();
        let body = outbound::Body::Units(v1::UnitReport {
            trial: s.trial,
            presented,
            labelled_trials: s.n_trials,
            units,
        });
        self.publisher.publish(topic::UNITS, body, false);
    }
}

use auspex_proto::convert::decision_msg;
