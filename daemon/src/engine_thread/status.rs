//! Health and status: the figures the engine thread publishes once a second and answers
//! control's status requests with.
//!
//! Must not: change any state but the rates it measures.

use super::*;

impl EngineThread {
    fn percentile(&self, p: f64) -> f64 {
        if self.latencies_us.is_empty() {
            return 0.0;
        }
        let mut v = self.latencies_us.clone();
        v.sort_by(|a, b| a.total_cmp(b));
        v[((v.len() - 1) as f64 * p).round() as usize]
    }

    pub(super) fn health(&mut self) -> v1::Health {
        let mut ec = self.carried.clone();
        if let Some(e) = self.engine.as_ref() {
            add_counters(&mut ec, e.counters());
        }
        let st = &self.publisher.stats;
        let now = Instant::now();
        let dt = now.duration_since(self.last_rates.0).as_secs_f64();
        if dt >= 0.5 {
            self.rates = (
                ec.spikes.saturating_sub(self.last_rates.1) as f64 / dt,
                ec.frames.saturating_sub(self.last_rates.2) as f64 / dt,
            );
            self.last_rates = (now, ec.spikes, ec.frames);
        }
        v1::Health {
            uptime_s: self.started.elapsed().as_secs_f64(),
            incarnation: self.incarnation,
            realtime_demotions: crate::realtime::demotions(),
            messages_in: self.counters.messages_in,
            spikes_in: ec.spikes,
            frames_out: ec.frames,
            spikes_per_s: self.rates.0,
            frames_per_s: self.rates.1,
            late_spikes: ec.late_spikes,
            unknown_unit_spikes: ec.unknown_unit_spikes,
            malformed_messages: self.counters.malformed + self.counters.before_session,
            sequence_gaps: self.counters.sequence_gaps,
            watermark_backwards: ec.watermark_backwards,
            duplicate_trials: ec.duplicate_trials,
            stale_onsets: ec.stale_onsets,
            trials_over_limit: ec.trials_over_limit,
            oversized_batches: self.counters.oversized,
            unknown_trials: ec.unknown_trials,
            unknown_stimuli: ec.unknown_stimuli + self.counters.unknown_stimuli,
            dropped_posterior: st.dropped_posterior.load(Ordering::Relaxed),
            dropped_other: st.dropped_other.load(Ordering::Relaxed),
            engine_backlog: self.backlog.len() as u64,
            update_p50_us: self.percentile(0.5),
            update_p99_us: self.percentile(0.99),
            watermark: self.engine.as_ref().map(|e| e.watermark()).unwrap_or(0),
            open_trials: self
                .engine
                .as_ref()
                .map(|e| e.open_trials().count() as u32)
                .unwrap_or(0),
            trials_completed: ec.trials_completed,
            decisions: ec.decisions,
            model_mismatches: self.counters.model_mismatches,
            recorder_errors: self.recorder_errors.load(Ordering::Relaxed),
            unlabelled_trials_dropped: ec.labels_missing,
            duplicate_messages: self.counters.duplicate_messages,
            learning: self.learn.is_some(),
            trials_learned: self.learn.as_ref().map(|l| l.trials_sent).unwrap_or(0),
            learned_model_trials: self.learn.as_ref().map(|l| l.model_trials).unwrap_or(0),
            learning_frozen: self.learn.as_ref().is_some_and(|l| !l.enabled),
            promises: self.promise.records(),
            promise_broken: self.promise.broken(),
            shards_lost: match &self.link {
                Link::Combine { lost_events, .. } => *lost_events,
                _ => 0,
            },
            missing_parts: self.engine.as_ref().map_or(0, |e| e.lost_parts()),
            misrouted_spikes: match &self.link {
                Link::Combine {
                    misrouted_spikes, ..
                } => *misrouted_spikes,
                _ => 0,
            },
            partials_unsent: match &self.link {
                Link::Shard { unsent, .. } => unsent.load(Ordering::Relaxed),
                _ => 0,
            },
        }
    }

    pub(super) fn publish_health(&mut self) {
        let h = self.health();
        self.publisher
            .publish(topic::HEALTH, outbound::Body::Health(h), false);
        self.last_health = Instant::now();
    }

    pub(super) fn status(&mut self) -> v1::Status {
        let prior = match (&self.config.prior, &self.model) {
            (Some(p), _) => {
                let s: f64 = p.iter().sum();
                p.iter().map(|x| x / s).collect()
            }
            (None, Some(m)) => m.ln_prior().iter().map(|l| l.exp()).collect(),
            (None, None) => Vec::new(),
        };
        let learning = self.learn.as_ref().map(|l| v1::LearningState {
            enabled: l.enabled,
            trials_learned: l.trials_sent,
            model_trials: l.model_trials,
            last_refit_age_s: l
                .applied_at
                .map(|t| t.elapsed().as_secs_f64())
                .unwrap_or(-1.0),
            last_refit_s: l.last_refit_s,
            waiting_for: l.waiting_for.clone(),
            refits: l.refits,
            refit_every_trials: l.setup.cadence.every_trials,
            refit_every_s: l.setup.cadence.every.as_secs_f64(),
        });
        v1::Status {
            version: env!("CARGO_PKG_VERSION").into(),
            model_path: self.model_path.clone(),
            stimuli: self.current.to_vec(),
            units: self
                .model
                .as_ref()
                .map(|m| m.units().to_vec())
                .unwrap_or_default(),
            threshold: self.config.policy.threshold,
            min_time_s: self.config.policy.min_time_s,
            prior,
            decoder: self.config.decoder.name().into(),
            engine_threads: self.workers.as_ref().map_or(1, |w| w.threads()),
            tick_rate_hz: self.tick_rate.unwrap_or(0.0),
            senders: self
                .senders
                .iter()
                .map(|(k, s)| v1::SenderState {
                    sender: k.clone(),
                    last_seq: s.last_seq,
                    gaps: s.gaps,
                    ended: s.ended,
                    messages: s.messages,
                })
                .collect(),
            health: Some(self.health()),
            recording_path: self.recording_path.clone(),
            open_trials: self
                .engine
                .as_ref()
                .map(|e| e.open_trials().collect())
                .unwrap_or_default(),
            n_bins: match (&self.model, &self.learn) {
                (Some(m), _) => m.n_bins() as u32,
                (None, Some(l)) => {
                    let f = &l.setup.options.fit;
                    (f.window_s / f.bin_width_s).round() as u32
                }
                (None, None) => 0,
            },
            bin_width_s: match (&self.model, &self.learn) {
                (Some(m), _) => m.bin_width_s(),
                (None, Some(l)) => l.setup.options.fit.bin_width_s,
                (None, None) => 0.0,
            },
            session_name: self
                .session
                .as_ref()
                .map(|s| s.name.clone())
                .unwrap_or_default(),
            ended_sessions: self.ended.clone(),
            learning,
            promise: Some(
                self.promise
                    .state(self.model.as_deref().map(|m| &**m), &self.config),
            ),
            role: self.link.name().into(),
            shards: self.link.shard_states(),
            part: match &self.link {
                Link::Shard { part, .. } => *part,
                _ => 0,
            },
            parts: match &self.link {
                Link::Shard { parts, .. } => *parts,
                Link::Combine { shards, .. } => shards.len() as u32,
                Link::None => 0,
            },
            realtime: crate::realtime::summary(),
            steering: self.steering.status(),
        }
    }
}
