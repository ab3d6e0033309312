//! The session lifecycle on the engine thread: a session's start (naming, recording rotation,
//! a fresh engine), open trials closed, the summary published, the session's end; and the file
//! names it derives.
//!
//! Must not: block on the recorder's disk (it only sends the recorder messages).

use super::*;

impl EngineThread {
    pub(super) fn session_start(&mut self, ss: &v1::SessionStart, sender: &str) {
        if !(ss.tick_rate_hz.is_finite() && ss.tick_rate_hz >= 1.0 && ss.tick_rate_hz <= 1e12) {
            self.counters.malformed += 1;
            let r = ss.tick_rate_hz;
            self.warn("session", || {
                format!("SessionStart tick rate {r} is not usable (1 to 1e12 ticks/s)")
            });
            return;
        }
        if self.session.is_some() {
            // A task program that knows the stimulus set may announce the session after
            // acquisition did: its set is taken when none was declared yet.
            if !ss.stimuli.is_empty() && self.declared_stimuli.is_empty() {
                self.declared_stimuli = ss.stimuli.clone().into();
                self.steering
                    .send(crate::steering::SteerMsg::Declared(ss.stimuli.clone()));
            }
            // The same session announced again (another sender, or a repeat): harmless, but
            // its clock must agree.
            if self.tick_rate.is_some_and(|r| r != ss.tick_rate_hz) {
                self.counters.malformed += 1;
                let (nr, r) = (ss.tick_rate_hz, self.tick_rate.unwrap_or(0.0));
                self.warn("session", || {
                    format!(
                        "SessionStart declares {nr} ticks/s but the session runs at {r}; ignored"
                    )
                });
            }
            return;
        }
        if let Some(r) = self.fixed_tick_rate {
            if r != ss.tick_rate_hz {
                self.counters.malformed += 1;
                let nr = ss.tick_rate_hz;
                self.warn("session", || {
                    format!("SessionStart declares {nr} ticks/s but the daemon was started with --tick-rate {r}; ignored")
                });
                return;
            }
        }
        if let Some(m) = &self.model {
            let model_units: std::collections::HashSet<u32> = m.units().iter().copied().collect();
            let session: std::collections::HashSet<u32> = ss.units.iter().copied().collect();
            let missing = model_units.difference(&session).count();
            let extra = session.difference(&model_units).count();
            if !ss.units.is_empty() && (missing > 0 || extra > 0) && self.learn.is_none() {
                self.counters.model_mismatches += (missing + extra) as u64;
                tracing::warn!(
                    model_units_not_in_session = missing,
                    session_units_not_in_model = extra,
                    "session and model units differ: spikes of unknown units are counted and ignored; missing units contribute silence"
                );
            }
        }
        self.epoch += 1;
        // Sequence tracking starts afresh: the senders of the last session stay visible in
        // status until this one starts.
        // (A sender that spoke while no session ran belongs to this one: a task program's onset
        // may overtake acquisition's SessionStart on its own socket.)
        self.senders
            .retain(|k, s| k == sender || (s.between_sessions && !s.ended));
        for s in self.senders.values_mut() {
            s.between_sessions = false;
        }
        if let Some(s) = self.senders.get_mut(sender) {
            s.gaps = 0;
            s.messages = 1;
            s.ended = false;
        }
        self.tick_rate = Some(ss.tick_rate_hz);
        self.config.tick_rate_hz = ss.tick_rate_hz;
        // Name the recording after the session (the file of the first session was opened at
        // start, before its name was known; later ones are opened at their session's start).
        if let (Some(dir), Some(r)) = (&self.record_dir, &self.recorder) {
            let stem = format!(
                "{}-{}",
                file_safe(&ss.session_name),
                utc_stamp(unix_now_s())
            );
            let path = (1..)
                .map(|i| match i {
                    1 => dir.join(format!("{stem}.apxs")),
                    i => dir.join(format!("{stem}-{i}.apxs")),
                })
                .find(|p| !p.exists())
                .unwrap_or_else(|| dir.join(format!("{stem}.apxs")));
            let _ = r.send(RecorderMsg::Rename(path.clone()));
            self.recording_path = path.display().to_string();
        }
        self.session = Some(SessionTally::new(
            &ss.session_name,
            self.recording_path.clone(),
        ));
        self.promise.new_session();
        // Labelled trials' windows: for the learner (its window) and find-tuning's counts (the
        // learner's window, else the model's).
        let window_s = self
            .learn
            .as_ref()
            .map(|l| l.setup.options.fit.window_s)
            .or(self.steer_window_s);
        if let Some(w) = window_s {
            let window_ticks = (w * ss.tick_rate_hz).round() as i64;
            let history = (self.config.history_s * ss.tick_rate_hz).round() as i64;
            self.collector = Some(WindowCollector::new(window_ticks, history));
        }
        self.choices_asked = 0;
        self.declared_stimuli = if ss.stimuli.is_empty() {
            self.daemon_stimuli.clone()
        } else {
            ss.stimuli.clone().into()
        };
        self.steering.send(crate::steering::SteerMsg::Session {
            units: ss.units.clone(),
            stimuli: ss.stimuli.clone(),
            from: "session start",
        });
        if !self.current.is_empty() {
            self.steering.send(crate::steering::SteerMsg::ModelStimuli(
                self.current.to_vec(),
            ));
        }
        if let Some(l) = self.learn.as_mut() {
            l.trials_sent = 0;
            l.model_trials = 0;
            l.applied_at = None;
            l.in_step = ss.learn_in_step;
            l.in_step_fitted_at = 0;
            l.waiting_for = "no labelled trial yet".into();
            let _ = l.tx.send(LearnMsg::Session {
                epoch: self.epoch,
                tick_rate_hz: ss.tick_rate_hz,
                units: ss.units.clone(),
                name: ss.session_name.clone(),
                in_step: ss.learn_in_step,
            });
            let _ = l.tx.send(LearnMsg::Enable(l.enabled));
            // Mark the recording as a learning session from its start (with the learner's
            // settings), so a replay knows to follow the swap points even if none come.
            if let Some(r) = &self.recorder {
                let _ = r.send(RecorderMsg::Record(swap_record(&l.setup.options, 0, None)));
            }
        }
        if let (None, Some(m)) = (&self.engine, self.model.clone()) {
            match Engine::new(m, self.config.clone()) {
                Ok(e) => {
                    self.engine = Some(e);
                    self.engine_gen += 1;
                    self.mark_lost_shards();
                }
                Err(e) => {
                    self.counters.malformed += 1;
                    tracing::error!(error = %e, "cannot decode this session with the loaded model");
                }
            }
        }
        tracing::info!(tick_rate_hz = ss.tick_rate_hz, units = ss.units.len(), name = %auspex_engine::data::printable(&ss.session_name), held = self.held.len(), learning = self.learn.is_some(), "session started");
        for body in std::mem::take(&mut self.held) {
            self.apply(body);
        }
    }

    pub(super) fn close_trials(&mut self, outcome: TrialOutcome) {
        if let (Some(w), Some(_)) = (self.workers.as_mut(), self.engine.as_ref()) {
            // Bins the workers have computed but not yet reported complete the trials first.
            w.sync(self.engine.as_ref(), self.engine_gen);
            w.barrier();
            w.close_all(outcome);
            self.drain_partials();
        }
        if let Some(e) = self.engine.as_mut() {
            let mut sink = pub_sink!(self);
            e.close_all(outcome, &mut sink);
        }
    }

    pub(super) fn publish_summary(&mut self, reason: &str) {
        let Some(t) = self.session.take() else {
            return;
        };
        let learned = self.learn.as_ref().map(|l| l.trials_sent).unwrap_or(0);
        let s = v1::SessionSummary {
            session_name: t.name.clone(),
            trials_completed: t.completed,
            trials_cancelled: t.cancelled,
            decisions: t.decisions,
            decisions_labelled: t.labelled,
            decisions_correct: t.correct,
            recording_path: t.recording.clone(),
            trials_learned: learned,
            reason: reason.into(),
            duration_s: t.started.elapsed().as_secs_f64(),
        };
        tracing::info!(session = %auspex_engine::data::printable(&t.name), reason, completed = t.completed, decisions = t.decisions, labelled = t.labelled, correct = t.correct, "session ended");
        self.publisher
            .publish(topic::SESSION, outbound::Body::Session(s.clone()), true);
        if self.ended.len() == ENDED_KEPT {
            self.ended.remove(0);
        }
        self.ended.push(s);
    }

    /// Ends the current session: open trials closed, summary published, recording rotated,
    /// sequence tracking and learning started afresh for the next.
    pub(super) fn end_session(&mut self, reason: &str) {
        self.pending_end = None;
        self.close_trials(TrialOutcome::SessionEnded);
        self.publish_summary(reason);
        if let Some(e) = self.engine.take() {
            add_counters(&mut self.carried, e.counters());
        }
        self.names.clear();
        self.held.clear();
        self.collector = None;
        self.steering.send(crate::steering::SteerMsg::End);
        self.tick_rate = self.fixed_tick_rate;
        if let Some(l) = self.learn.as_mut() {
            // The learned model leaves with its session (below): status must not show it in use.
            l.model_trials = 0;
            l.applied_at = None;
            l.waiting_for = if l.trials_sent > 0 {
                format!(
                    "the next session (it learns afresh; the last one's {} labelled trials are kept until then: `auspex steer save-learned FILE` saves their model)",
                    l.trials_sent
                )
            } else {
                "the next session".into()
            };
        }
        if self.learn.is_some() {
            // Learning starts from the loaded model (or none) in every session.
            self.model = self.base.as_ref().map(|b| b.0.clone());
            self.model_path = self.base.as_ref().map(|b| b.1.clone()).unwrap_or_default();
            self.config.policy = self
                .promise
                .model_changed(self.model.as_deref().map(|m| &**m), &self.config);
            self.current = self
                .model
                .as_ref()
                .map(|m| m.stimuli().to_vec())
                .unwrap_or_default()
                .into();
        }
        if let Some(r) = &self.recorder {
            // The next session gets a file of its own; its name is settled at its start.
            let next = match &self.record_dir {
                Some(dir) => dir.join(format!("next-session-{}.apxs", utc_stamp(unix_now_s()))),
                None => numbered_sibling(std::path::Path::new(&self.recording_path)),
            };
            let _ = r.send(RecorderMsg::Rotate {
                to: next.clone(),
                named_later: self.record_dir.is_some(),
            });
            self.recording_path = next.display().to_string();
        }
    }
}

impl EngineThread {
    /// The recording of the session the learner holds (the running one, else the last ended
    /// one): each session is recorded into a file of its own. None when not recording.
    pub(super) fn learned_recording(&self) -> Option<std::path::PathBuf> {
        self.recorder.as_ref()?;
        let path = if self.session.is_some() {
            self.recording_path.clone()
        } else {
            self.ended.last()?.recording_path.clone()
        };
        (!path.is_empty()).then(|| path.into())
    }
}

/// Adds one set of engine counters to another.
pub(super) fn add_counters(a: &mut Counters, b: &Counters) {
    a.spikes += b.spikes;
    a.stray_partials += b.stray_partials;
    a.late_spikes += b.late_spikes;
    a.unknown_unit_spikes += b.unknown_unit_spikes;
    a.watermark_backwards += b.watermark_backwards;
    a.duplicate_trials += b.duplicate_trials;
    a.stale_onsets += b.stale_onsets;
    a.trials_over_limit += b.trials_over_limit;
    a.unknown_trials += b.unknown_trials;
    a.unknown_stimuli += b.unknown_stimuli;
    a.trials_opened += b.trials_opened;
    a.trials_completed += b.trials_completed;
    a.trials_cancelled += b.trials_cancelled;
    a.frames += b.frames;
    a.decisions += b.decisions;
    a.labels_missing += b.labels_missing;
}

/// A file-name-safe form of a session name ("session" when empty).
pub(super) fn file_safe(name: &str) -> String {
    let s: String = name
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || c == '-' || c == '_' || c == '.' {
                c
            } else {
                '_'
            }
        })
        .collect();
    let s = s.trim_start_matches('.').to_string();
    if s.is_empty() {
        "session".into()
    } else {
        s
    }
}

/// UTC date and time of a Unix time as `YYYYMMDDTHHMMSSZ` (civil-from-days conversion of the
/// proleptic Gregorian calendar).
pub(super) fn utc_stamp(unix_s: u64) -> String {
    let [y, m, d, hh, mm, ss] = auspex_proto::civil::civil_utc(unix_s as i64);
    format!("{y:04}{m:02}{d:02}T{hh:02}{mm:02}{ss:02}Z")
}

pub(super) fn unix_now_s() -> u64 {
    std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_secs())
        .unwrap_or(0)
}

/// `name-2.ext`, `name-3.ext`, … beside `path`: the next free numbered file.
pub(super) fn numbered_sibling(path: &std::path::Path) -> PathBuf {
    let stem = path
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| "session".into());
    let ext = path
        .extension()
        .map(|e| format!(".{}", e.to_string_lossy()))
        .unwrap_or_default();
    let base = stem
        .rsplit_once('-')
        .filter(|(_, n)| n.parse::<u32>().is_ok())
        .map(|(b, _)| b.to_string())
        .unwrap_or(stem);
    (2..)
        .map(|i| path.with_file_name(format!("{base}-{i}{ext}")))
        .find(|p| !p.exists())
        .unwrap_or_else(|| path.to_path_buf())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    pub(super) fn utc_stamp_matches_known_dates() {
        // 2000-03-01 00:00:00 UTC = 951868800; 2026-12-02 05:30:00 UTC = 1796189400
        // (both computed with Python's datetime, a general-purpose reference).
        assert_eq!(utc_stamp(0), "19700101T000000Z");
        assert_eq!(utc_stamp(951_868_800), "20000301T000000Z");
        assert_eq!(utc_stamp(1_796_189_400), "20261202T053000Z");
    }

    #[test]
    pub(super) fn session_names_become_safe_file_names() {
        assert_eq!(file_safe("rat 7 / day 2"), "rat_7___day_2");
        assert_eq!(file_safe(""), "session");
        assert_eq!(file_safe("../x"), "_x");
    }
}
