//! Control requests and model changes on the engine thread: reload at the trial boundary,
//! learned models swapped in (and recorded where), configuration and learning switches, status.
//!
//! Must not: fit or load models (the learner thread and the control task's blocking pool do).

use super::*;

/// Longest the engine thread waits for an in-step refit (a fit of a session's trials takes
/// seconds at most; a stuck learner must not stop the daemon).
const IN_STEP_WAIT: Duration = Duration::from_secs(120);

impl EngineThread {
    /// Learning in step (a replay asked for it): once `every_trials` more windows have gone to
    /// the learner than at the last refit, ask it to fit on exactly those and wait for the model
    /// (or its reason for none) before reading another message — the point a real-time session's
    /// refit would have been due, whatever the replay's speed. Inbound messages wait in the
    /// bounded channel meanwhile (backpressure reaches the sender); the wait is bounded.
    pub(super) fn refit_in_step(&mut self) {
        let Some(l) = self.learn.as_mut() else {
            return;
        };
        let every = l.setup.cadence.every_trials.max(1) as u64;
        if !l.in_step || !l.enabled || l.trials_sent < l.in_step_fitted_at + every {
            return;
        }
        l.in_step_fitted_at = l.trials_sent;
        let (tx, rx) = crossbeam_channel::bounded(1);
        if l.tx.send(LearnMsg::FitNow { reply: tx }).is_err() {
            return;
        }
        match rx.recv_timeout(IN_STEP_WAIT) {
            Ok(Ok(learned)) => self.learned(learned),
            Ok(Err(text)) => l.waiting_for = text,
            Err(_) => {
                tracing::warn!(
                    wait_s = IN_STEP_WAIT.as_secs(),
                    "learning in step: no refit within the wait; going on with the current model"
                );
            }
        }
    }

    pub(super) fn learned(&mut self, l: Learned) {
        let Some(link) = self.learn.as_mut() else {
            return;
        };
        if l.epoch != self.epoch || self.session.is_none() {
            return;
        }
        let mut cfg = self.config.clone();
        cfg.policy = self.promise.model_changed(Some(&l.model), &cfg);
        let r = match self.engine.as_mut() {
            Some(e) => e
                .set_model(l.model.clone())
                .and_then(|()| e.set_config(cfg.clone())),
            None => Engine::new(l.model.clone(), cfg.clone()).map(|e| {
                self.engine = Some(e);
                self.engine_gen += 1;
            }),
        };
        self.config.policy = cfg.policy;
        if let Err(e) = r {
            link.waiting_for = format!("the learned model could not be used: {e}");
            return;
        }
        link.model_trials = l.trials;
        link.applied_at = Some(Instant::now());
        link.last_refit_s = l.fit_s;
        link.refits += 1;
        link.waiting_for.clear();
        if let Some(r) = &self.recorder {
            let _ = r.send(RecorderMsg::Record(swap_record(
                &link.setup.options,
                l.trials,
                Some(&l.model),
            )));
        }
        tracing::info!(
            trials = l.trials,
            units = l.model.n_units(),
            stimuli = l.model.n_stimuli(),
            fit_s = l.fit_s,
            "learned model applies to trials that open from now on"
        );
        self.current = l.model.stimuli().to_vec().into();
        self.chooser.resize(l.model.n_stimuli());
        self.steering.send(crate::steering::SteerMsg::ModelStimuli(
            self.current.to_vec(),
        ));
        if let Some(e) = &self.engine {
            self.config = e.config().clone();
        }
        self.model_path = format!("learned from {} labelled trials", l.trials);
        if let Some(old) = self.model.replace(l.model) {
            let _ = link.tx.send(LearnMsg::Retire(old));
        }
    }

    pub(super) fn reload(&mut self, model: Arc<PreparedModel>, path: String) -> ControlReply {
        if !matches!(self.link, Link::None) {
            // Shards and combiner must sum the same model's blocks.
            return ControlReply {
                ok: false,
                error: format!(
                    "{path}: not loaded: this daemon is a {} of a deployment across machines, whose shards and combiner must load the same model; restart each of them with --model {path}",
                    self.link.name()
                ),
                note: String::new(),
                body: None,
            };
        }
        // A target accuracy the new model's record cannot support refuses the reload.
        let mut cfg = self.config.clone();
        if let Some(t) = self.promise.target() {
            match PromiseKeeper::policy_for(t, Some(&model), &cfg) {
                Ok((p, _)) => cfg.policy = p,
                Err(e) => {
                    return ControlReply {
                        ok: false,
                        error: format!("{path}: not loaded: target accuracy {t}: {e}"),
                        note: String::new(),
                        body: None,
                    }
                }
            }
        }
        let r = match self.engine.as_mut() {
            Some(e) => e
                .set_model(model.clone())
                .and_then(|()| e.set_config(cfg.clone())),
            None => Ok(()),
        };
        if r.is_ok() {
            self.config.policy = self.promise.model_changed(Some(&model), &cfg);
        }
        match r {
            Ok(()) => {
                self.current = model.stimuli().to_vec().into();
                self.chooser.resize(model.n_stimuli());
                self.steer_window_s = Some(model.n_bins() as f64 * model.bin_width_s());
                self.steering.send(crate::steering::SteerMsg::ModelStimuli(
                    self.current.to_vec(),
                ));
                self.model = Some(model);
                self.model_path = path.clone();
                if let Some(e) = &self.engine {
                    self.config = e.config().clone();
                }
                tracing::info!(model = %path, "model reloaded; applies to trials that open from now on");
                ControlReply {
                    ok: true,
                    error: String::new(),
                    note: String::new(),
                    body: Some(v1::control_reply::Body::Status(self.status())),
                }
            }
            Err(e) => ControlReply {
                ok: false,
                error: format!("{path}: {e}"),
                note: String::new(),
                body: None,
            },
        }
    }

    pub(super) fn apply_config(&mut self, c: EngineConfig) -> Result<(), String> {
        if let Some(e) = self.engine.as_mut() {
            e.set_config(c.clone()).map_err(|e| e.to_string())?;
        } else {
            // No engine yet (no session): the same checks the engine makes.
            c.policy.check()?;
            match (&c.prior, &self.model) {
                (Some(p), Some(m)) => auspex_engine::engine::check_prior(p, m.n_stimuli())?,
                (Some(_), None) => {
                    return Err("no model yet: a prior needs the model's stimuli".into())
                }
                (None, _) => {}
            }
        }
        self.config = c;
        Ok(())
    }

    /// A learning action; the reply says what now holds.
    pub(super) fn set_learning(&mut self, action: &str) -> Result<String, String> {
        let Some(l) = self.learn.as_mut() else {
            return Err("learning is off: start auspexd without --model, or with --learn".into());
        };
        let in_use = if l.model_trials > 0 {
            format!(
                "the model learned from {} trials stays in use",
                l.model_trials
            )
        } else {
            "no learned model is in use yet".to_string()
        };
        let note = match action {
            "freeze" => {
                l.enabled = false;
                let _ = l.tx.send(LearnMsg::Enable(false));
                format!("learning frozen: {in_use}; labelled trials are still collected ({} so far) and fitted on after `auspex steer learn resume`", l.trials_sent)
            }
            "resume" => {
                l.enabled = true;
                let _ = l.tx.send(LearnMsg::Enable(true));
                format!(
                    "learning on: {in_use}; refits every {} labelled trials or {:.0} s ({} taken so far)",
                    l.setup.cadence.every_trials,
                    l.setup.cadence.every.as_secs_f64(),
                    l.trials_sent
                )
            }
            "reset" => {
                let _ = l.tx.send(LearnMsg::Reset);
                if let Some(r) = &self.recorder {
                    let _ = r.send(RecorderMsg::Record(swap_record(
                        &l.setup.options,
                        l.trials_sent,
                        None,
                    )));
                }
                if self.session.is_none() {
                    l.waiting_for = "the next session".into();
                }
                let next = if l.model_trials > 0 {
                    format!(
                        "the model learned from {} trials stays in use until the next refit",
                        l.model_trials
                    )
                } else {
                    "the first model comes once enough new trials are labelled".to_string()
                };
                format!(
                    "learning reset: the {} labelled trials taken so far are forgotten; {next}",
                    l.trials_sent
                )
            }
            other => {
                return Err(format!(
                    "unknown learning action `{other}`: use freeze, resume or reset"
                ))
            }
        };
        tracing::info!(action, "learning");
        Ok(note)
    }

    pub(super) fn control(&mut self, body: control_request::Body) -> ControlReply {
        use control_request::Body as B;
        let ok = |body| ControlReply {
            ok: true,
            error: String::new(),
            note: String::new(),
            body,
        };
        let err = |e: String| ControlReply {
            ok: false,
            error: e,
            note: String::new(),
            body: None,
        };
        let with_status = |this: &mut Self, r: Result<(), String>| match r {
            Ok(()) => ok(Some(v1::control_reply::Body::Status(this.status()))),
            Err(e) => err(e),
        };
        match body {
            B::Status(_) => ok(Some(v1::control_reply::Body::Status(self.status()))),
            B::SetPolicy(p) => {
                let mut c = self.config.clone();
                c.policy.threshold = p.threshold;
                c.policy.min_time_s = p.min_time_s;
                let target = (p.target_accuracy > 0.0).then_some(p.target_accuracy);
                let r = match target {
                    // Checked against the model before anything changes.
                    Some(t) => {
                        PromiseKeeper::policy_for(t, self.model.as_deref().map(|m| &**m), &c)
                            .map(|(pol, _)| c.policy = pol)
                    }
                    None => Ok(()),
                }
                .and_then(|()| self.apply_config(c.clone()));
                if r.is_ok() {
                    let _ =
                        self.promise
                            .set_target(target, self.model.as_deref().map(|m| &**m), &c);
                    tracing::info!(
                        threshold = c.policy.threshold,
                        min_time_s = c.policy.min_time_s,
                        target_accuracy = target.unwrap_or(0.0),
                        "decision policy changed; applies to trials that open from now on"
                    );
                }
                let mut reply = with_status(self, r);
                // A minimum time past the window end leaves only window-end decisions: say so.
                if let (true, Some(m)) = (reply.ok, &self.model) {
                    let window_s = m.n_bins() as f64 * m.bin_width_s();
                    if c.policy.min_time_s > window_s + 1e-9 {
                        reply.note = format!(
                            "policy set, but the minimum time {} ms is past the {} ms window: every decision will come at the window end",
                            c.policy.min_time_s * 1000.0,
                            window_s * 1000.0
                        );
                    }
                }
                reply
            }
            B::SetPrior(p) => {
                let sum: f64 = p.prior.iter().sum();
                let mut c = self.config.clone();
                c.prior = if p.prior.is_empty() {
                    None
                } else {
                    Some(p.prior)
                };
                let r = self.apply_config(c);
                let mut reply = with_status(self, r);
                // Entries that do not sum to 1 are used as weights: say so, never silently.
                if reply.ok && sum > 0.0 && (sum - 1.0).abs() > 1e-6 {
                    reply.note = format!(
                        "prior set: its entries summed to {sum} and were divided by that sum"
                    );
                }
                reply
            }
            B::SetDecoder(d) => match auspex_engine::Decoder::parse(&d.decoder) {
                Some(dec) => {
                    let mut c = self.config.clone();
                    c.decoder = dec;
                    let r = self.apply_config(c);
                    with_status(self, r)
                }
                None => err(format!(
                    "unknown decoder `{}`: use order-stats, inhomogeneous-poisson or count-only",
                    d.decoder
                )),
            },
            B::NextStimulus(n) => {
                if !["", "balanced-blocks", "least-certain"].contains(&n.policy.as_str()) {
                    return err(format!("unknown next-stimulus policy `{}`: use balanced-blocks, least-certain or find-tuning", auspex_engine::data::printable(&n.policy)));
                }
                // The model's stimuli, else the set declared for the session (its start
                // message, or the daemon's --stimuli): choosing works from the first trial.
                let set: Arc<[String]> = if self.current.is_empty() {
                    self.declared_stimuli.clone()
                } else {
                    self.current.clone()
                };
                let ns = set.len();
                if ns == 0 {
                    return err(match (&self.learn, &self.session) {
                        (Some(_), Some(_)) => "no model yet and no stimulus set declared: nothing to choose among (declare the set in SessionStart.stimuli or with auspexd --stimuli, or wait for the learned model)".into(),
                        (Some(_), None) => "no model in use: no session is running, and each session learns afresh (a model loaded with --model or `steer reload` is used from the start)".into(),
                        (None, _) => "no model loaded: nothing to choose among".into(),
                    });
                }
                self.chooser.resize(ns);
                let (idx, policy) = match n.policy.as_str() {
                    "least-certain" => (self.chooser.least_certain(ns), "least-certain"),
                    _ => (self.chooser.balanced(ns), "balanced-blocks"),
                };
                ok(Some(v1::control_reply::Body::Next(v1::NextStimulusReply {
                    stimulus: set[idx as usize].clone(),
                    index: idx,
                    policy: policy.into(),
                    ..Default::default()
                })))
            }
            B::SetLearning(a) => match self.set_learning(a.action.trim()) {
                Ok(note) => ControlReply {
                    ok: true,
                    error: String::new(),
                    note,
                    body: None,
                },
                Err(e) => err(e),
            },
            B::Reload(_) | B::SaveLearned(_) => {
                err("reload and save are handled by the control task".into())
            }
        }
    }
}

/// The recording's marker of a learned model taking over (`model`), or of the learner forgetting
/// its trials (None), after `trials` labelled trials, with the settings a replay needs.
pub(super) fn swap_record(
    opts: &LearnOptions,
    trials: u64,
    model: Option<&Arc<PreparedModel>>,
) -> v1::SessionRecord {
    v1::SessionRecord {
        choice: Default::default(),
        received_unix_ns: crate::clock::now_ns(),
        endpoint: 0,
        message: Vec::new(),
        header: None,
        learned: Some(v1::LearnedSwap {
            trials_learned: trials,
            units: model.map(|m| m.n_units() as u32).unwrap_or(0),
            stimuli: model.map(|m| m.n_stimuli() as u32).unwrap_or(0),
            reset: model.is_none(),
            window_s: opts.fit.window_s,
            bin_width_s: opts.fit.bin_width_s,
            families: opts
                .fit
                .families
                .iter()
                .map(|f| f.name().to_string())
                .collect(),
            min_trials_per_stimulus: opts.min_trials_per_stimulus,
            max_trials_per_stimulus: opts.max_trials_per_stimulus.min(u32::MAX as usize) as u32,
        }),
    }
}
