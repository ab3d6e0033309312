//! Inbound messages on the engine thread: size, decoding, sender sequence checks and the
//! session's senders; each body applied to the engine through the shared stream rule (and to the worker
//! threads and shards), the learning windows sent on, units added.
//!
//! Must not: block, or allocate per spike.

use super::*;

impl EngineThread {
    pub(super) fn inbound(&mut self, endpoint: u32, bytes: Bytes, received_ns: i64) {
        self.counters.messages_in += 1;
        // Decoded once; oversized messages are not decoded at all.
        let msg =
            (bytes.len() <= self.max_message_bytes).then(|| v1::Inbound::decode(bytes.as_ref()));
        // A new session ends the current one before its first message is recorded, so each
        // recording holds one session.
        if let Some(Ok(v1::Inbound {
            body: Some(inbound::Body::SessionStart(ss)),
            ..
        })) = &msg
        {
            if self
                .session
                .as_ref()
                .is_some_and(|s| s.name != ss.session_name)
            {
                self.end_session("new session");
            }
        }
        if let (Some(r), false) = (&self.recorder, endpoint == RELAY_ENDPOINT) {
            let _ = r.send(RecorderMsg::Record(v1::SessionRecord {
                choice: Default::default(),
                received_unix_ns: received_ns,
                endpoint,
                message: bytes.to_vec(),
                header: None,
                learned: None,
            }));
        }
        if bytes.len() > self.max_message_bytes {
            self.counters.oversized += 1;
            let n = bytes.len();
            let max = self.max_message_bytes;
            self.warn("oversized", || {
                format!("message of {n} bytes exceeds {max}; ignored")
            });
            return;
        }
        let msg = match msg {
            Some(Ok(m)) => m,
            // Oversized messages were counted above.
            None => return,
            Some(Err(e)) => {
                self.counters.malformed += 1;
                self.warn("malformed", || {
                    format!("endpoint {endpoint}: not an Inbound message ({e})")
                });
                return;
            }
        };
        // Bytes that decode as neither a sender nor a body are garbage, not a sender named ""
        // (a named sender's unknown message kind still advances its numbering, below).
        if msg.body.is_none() && msg.sender.is_empty() {
            self.counters.malformed += 1;
            self.warn("malformed", || {
                "message without a body (unknown kind?)".into()
            });
            return;
        }
        let restart = matches!(msg.body, Some(inbound::Body::SessionStart(_)));
        let between = self.session.is_none();
        let s = sender_mut(&mut self.senders, &msg.sender);
        s.messages += 1;
        s.relayed |= endpoint == RELAY_ENDPOINT;
        s.between_sessions |= between;
        if s.last_seq != 0 && msg.seq <= s.last_seq {
            if restart || (s.ended && msg.seq == 1) {
                // A sender that restarts announces itself (SessionStart, or seq 1 after its
                // end of stream): its numbering starts afresh.
                s.last_seq = msg.seq;
                s.ended = false;
            } else {
                // Already seen: a retransmission. Applying it again would count spikes twice.
                self.counters.duplicate_messages += 1;
                let (sender, last, seq) = (msg.sender.clone(), s.last_seq, msg.seq);
                self.warn("duplicate", || {
                    format!("sender {sender:?}: message #{seq} is not after #{last}; dropped")
                });
                return;
            }
        } else {
            if s.last_seq != 0 && msg.seq != s.last_seq + 1 {
                s.gaps += 1;
                self.counters.sequence_gaps += 1;
                let (sender, last, seq) = (msg.sender.clone(), s.last_seq, msg.seq);
                self.warn("sequence", || {
                    format!("sender {sender:?}: sequence jumped from {last} to {seq}")
                });
            }
            sender_mut(&mut self.senders, &msg.sender).last_seq = msg.seq;
        }
        let Some(body) = msg.body else {
            self.counters.malformed += 1;
            self.warn("malformed", || {
                "message without a body (unknown kind?)".into()
            });
            return;
        };
        self.relay(&body, &bytes);
        match body {
            inbound::Body::SessionStart(ss) => {
                self.session_start(&ss, &msg.sender);
                return;
            }
            inbound::Body::EndOfStream(_) => {
                if let Some(s) = self.senders.get_mut(&msg.sender) {
                    s.ended = true;
                }
                // A shard's session is its acquisition's: the task program's end (relayed by
                // the combiner) may come before the last spikes of its own senders. But the
                // task's last onsets, relayed, may also come after its acquisition's end: a
                // shard waits for the relayed end too (or, without one, a pause).
                let shard = matches!(self.link, Link::Shard { .. });
                let own = |s: &&SenderInfo| !s.relayed || !shard;
                let ended = self.senders.values().filter(own).all(|s| s.ended)
                    && self.senders.values().find(own).is_some();
                if self.session.is_some() && ended {
                    let waiting = match self.link {
                        Link::Combine { .. } => self
                            .engine
                            .as_ref()
                            .is_some_and(|e| e.open_trials().next().is_some()),
                        Link::Shard { .. } => {
                            let mut relayed = self.senders.values().filter(|s| s.relayed);
                            relayed.clone().next().is_none() || relayed.any(|s| !s.ended)
                        }
                        Link::None => false,
                    };
                    if waiting {
                        // The shards' last partials, or the task's last relayed onsets, may
                        // still be on their way.
                        self.pending_end.get_or_insert_with(Instant::now);
                    } else {
                        self.end_session("every sender ended");
                    }
                }
                return;
            }
            inbound::Body::UnitsAdded(ua) => {
                self.units_added(&ua);
                return;
            }
            _ => {}
        }
        if self.tick_rate.is_none() || self.session.is_none() && self.engine.is_none() {
            // Task programs may announce trials before acquisition has declared the clock:
            // hold their messages (bounded) and apply them when the session starts.
            let task_kind = matches!(
                body,
                inbound::Body::Onset(_) | inbound::Body::Label(_) | inbound::Body::Cancel(_)
            );
            if task_kind && self.held.len() < MAX_HELD_BEFORE_SESSION {
                self.held.push(body);
            } else {
                self.counters.before_session += 1;
                self.warn("no-session", || {
                    "spikes or watermark before SessionStart declared the clock; ignored".into()
                });
            }
            return;
        }
        self.apply(body);
    }

    /// Applies a decoded message to the collector and the running engine.
    pub(super) fn apply(&mut self, owned: inbound::Body) {
        if self.engine.is_some() {
            remember_onset(&mut self.names, &owned, &self.current);
        }
        // With engine threads, one shared body for the combiner and every worker (see
        // `workers.rs`); without, the body itself (no allocation per message).
        let shared: Arc<inbound::Body>;
        let body: &inbound::Body = match self.workers.as_mut() {
            None => &owned,
            Some(w) => {
                shared = Arc::new(owned);
                w.sync(self.engine.as_ref(), self.engine_gen);
                if self.engine.is_some() {
                    w.body(&shared);
                }
                &shared
            }
        };
        if let Some(w) = self.workers.as_mut() {
            let dead = w.dead_parts();
            if let Some(e) = self.engine.as_mut() {
                let newly = dead & !e.lost_parts();
                if newly != 0 && matches!(self.config.role, Role::ShardSlice { .. }) {
                    // A shard cannot send what a stopped thread computed: it leaves the
                    // deployment (its link closes), so the combiner gives its part up and every
                    // frame names it, instead of waiting for blocks that never come.
                    tracing::error!(
                        slices = format!("{newly:#b}"),
                        "an engine thread of this shard stopped: the shard leaves its combiner (frames there name its part as missing); restart the shard"
                    );
                    if let Link::Shard { out, .. } = &mut self.link {
                        *out = tokio::sync::mpsc::channel(1).0;
                    }
                    for p in 0..64 {
                        if newly & (1u64 << p) != 0 {
                            e.lose_part(p, &mut auspex_engine::engine::NullSink);
                        }
                    }
                } else if newly != 0 {
                    tracing::error!(
                        parts = format!("{newly:#b}"),
                        "an engine thread stopped: its units contribute nothing from now on (frames say which parts are missing); restart the daemon"
                    );
                    let mut sink = pub_sink!(self);
                    for p in 0..64 {
                        if newly & (1u64 << p) != 0 {
                            e.lose_part(p, &mut sink);
                        }
                    }
                }
            }
        }
        let learning = self.learn.is_some();
        let mut sink = pub_sink!(self);
        let applied = apply_body(
            self.engine.as_mut(),
            self.collector.as_mut(),
            learning,
            &self.names,
            &self.current,
            body,
            &mut sink,
            &mut self.windows,
        );
        if let Some((a, t)) = applied.mismatched_batch {
            self.counters.malformed += 1;
            self.warn("malformed", || {
                format!("spike batch has {a} units but {t} ticks; ignored")
            });
        }
        if let Some((trial, name)) = applied.unknown_stimulus {
            if !learning {
                self.counters.unknown_stimuli += 1;
                self.warn("stimulus", || {
                    format!("trial {trial} names stimulus {name:?}, which the model does not have; decoding without it")
                });
            }
        }
        for e in applied.errors {
            let kind = match &e {
                EngineError::LateSpike { .. } => "late-spike",
                EngineError::UnknownUnit(_) => "unknown-unit",
                EngineError::WatermarkBackwards { .. } => "watermark",
                EngineError::DuplicateTrial(_) => "duplicate-trial",
                EngineError::TooManyOpen(_) => "open-trials",
                EngineError::StaleOnset { .. } => "stale-onset",
                EngineError::UnknownTrial(_) => "unknown-trial",
                EngineError::StrayPartial { .. } => "stray-partial",
                EngineError::Config(_) => "config",
                EngineError::UnknownStimulus(_) => "stimulus",
            };
            self.warn(kind, || e.to_string());
        }
        self.send_windows();
    }

    /// Hands completed labelled windows to find-tuning (each unit's count) and the learner.
    pub(super) fn send_windows(&mut self) {
        if self.windows.is_empty() {
            return;
        }
        for w in self.windows.drain(..) {
            self.steering.trial(&w.stimulus, &w.spikes);
            if let Some(l) = self.learn.as_mut() {
                l.trials_sent += 1;
                let _ = l.tx.send(LearnMsg::Trial(w));
            }
        }
    }

    pub(super) fn units_added(&mut self, ua: &v1::UnitsAdded) {
        if self.session.is_none() {
            self.counters.before_session += 1;
            self.warn("no-session", || {
                "UnitsAdded before SessionStart; ignored".into()
            });
            return;
        }
        tracing::info!(
            units = %ua.units.iter().map(|u| u.to_string()).collect::<Vec<_>>().join(","),
            from_tick = ua.from_tick,
            "units added to the session"
        );
        self.steering
            .send(crate::steering::SteerMsg::Units(ua.units.clone()));
        if let Some(l) = &self.learn {
            let _ = l.tx.send(LearnMsg::Units {
                units: ua.units.clone(),
                from_tick: ua.from_tick,
            });
        }
    }
}

/// The sender's record, created on its first message (no allocation for a known sender).
fn sender_mut<'a>(senders: &'a mut BTreeMap<String, SenderInfo>, name: &str) -> &'a mut SenderInfo {
    if !senders.contains_key(name) {
        senders.insert(name.to_string(), SenderInfo::default());
    }
    senders.get_mut(name).expect("inserted above")
}
