//! `auspex status` as text and as JSON: the daemon's model, settings, deployment, promise,
//! session, learning, senders and counters.

use auspex_proto::v1;
use std::fmt::Write;

/// Status as one JSON object (for scripts).
pub fn status_json(s: &v1::Status) -> serde_json::Value {
    serde_json::json!({"version": s.version, "model": s.model_path, "stimuli": s.stimuli, "units": s.units.len(),
                        "decoder": s.decoder, "engine_threads": s.engine_threads, "role": s.role, "part": s.part, "parts": s.parts, "realtime": s.realtime,
                        "shards": s.shards.iter().map(|x| serde_json::json!({"part": x.part, "endpoint": x.endpoint, "joined": x.joined, "partials": x.partials, "times_lost": x.times_lost, "silent_s": x.silent_s, "note": x.note})).collect::<Vec<_>>(), "threshold": s.threshold, "min_time_s": s.min_time_s, "prior": s.prior, "tick_rate_hz": s.tick_rate_hz,
                        "open_trials": s.open_trials, "recording": s.recording_path, "session": s.session_name,
                        "promise": s.promise.as_ref().map(|p| serde_json::json!({"target_accuracy": (p.target_accuracy > 0.0).then_some(p.target_accuracy), "withheld": p.withheld, "evidence": p.evidence, "calibrated": p.calibrated, "calibration": p.calibration})),
                        "promise_records": s.health.as_ref().map(|h| h.promises.iter().map(|r| serde_json::json!({"promise": r.promise, "threshold": r.threshold, "decisions": r.decisions, "correct": r.correct, "lo": r.accuracy_lo, "hi": r.accuracy_hi, "cusum": r.cusum, "broken": r.broken})).collect::<Vec<_>>()),
                        "learning": s.learning.as_ref().map(|l| serde_json::json!({"enabled": l.enabled, "trials_learned": l.trials_learned, "model_trials": l.model_trials, "last_refit_age_s": l.last_refit_age_s, "last_refit_s": l.last_refit_s, "refits": l.refits, "waiting_for": l.waiting_for})),
                        "ended_sessions": s.ended_sessions.iter().map(|e| serde_json::json!({"session": e.session_name, "reason": e.reason, "trials_completed": e.trials_completed, "decisions": e.decisions, "decisions_labelled": e.decisions_labelled, "decisions_correct": e.decisions_correct, "trials_learned": e.trials_learned, "recording": e.recording_path})).collect::<Vec<_>>(),
                        "senders": s.senders.iter().map(|x| serde_json::json!({"sender": x.sender, "last_seq": x.last_seq, "gaps": x.gaps, "ended": x.ended})).collect::<Vec<_>>(),
                        "health": s.health.as_ref().map(health_json)})
}

/// The daemon's counters and rates (`status --json`'s `health`): everything `status` prints.
pub fn health_json(h: &v1::Health) -> serde_json::Value {
    serde_json::json!({
        "uptime_s": h.uptime_s, "incarnation": h.incarnation, "realtime_demotions": h.realtime_demotions, "messages_in": h.messages_in, "spikes_in": h.spikes_in, "frames_out": h.frames_out,
        "spikes_per_s": h.spikes_per_s, "frames_per_s": h.frames_per_s,
        "late_spikes": h.late_spikes, "unknown_unit_spikes": h.unknown_unit_spikes, "malformed_messages": h.malformed_messages,
        "sequence_gaps": h.sequence_gaps, "duplicate_messages": h.duplicate_messages, "watermark_backwards": h.watermark_backwards,
        "duplicate_trials": h.duplicate_trials, "stale_onsets": h.stale_onsets, "trials_over_limit": h.trials_over_limit,
        "oversized_batches": h.oversized_batches, "unknown_trials": h.unknown_trials, "unknown_stimuli": h.unknown_stimuli,
        "dropped_posterior": h.dropped_posterior, "dropped_other": h.dropped_other, "engine_backlog": h.engine_backlog,
        "update_p50_us": h.update_p50_us, "update_p99_us": h.update_p99_us, "watermark": h.watermark,
        "open_trials": h.open_trials, "trials_completed": h.trials_completed, "decisions": h.decisions,
        "model_mismatches": h.model_mismatches, "recorder_errors": h.recorder_errors,
        "unlabelled_trials_dropped": h.unlabelled_trials_dropped, "learning": h.learning, "trials_learned": h.trials_learned,
        "learned_model_trials": h.learned_model_trials, "learning_frozen": h.learning_frozen, "promise_broken": h.promise_broken,
        "shards_lost": h.shards_lost, "missing_parts": h.missing_parts, "misrouted_spikes": h.misrouted_spikes,
        "partials_unsent": h.partials_unsent,
    })
}

/// Status as the lines `auspex status` prints.
pub fn status_text(s: &v1::Status) -> String {
    let mut o = String::new();
    macro_rules! out {
        ($($a:tt)*) => {{
            let _ = writeln!(o, $($a)*);
        }};
    }
    if s.model_path.is_empty() {
        out!(
            "auspexd {} · no model yet{}",
            s.version,
            if s.learning.is_some() {
                " (learning: one comes once enough trials are labelled)"
            } else {
                ""
            }
        );
    } else {
        out!(
            "auspexd {} · model {} ({} units × {} stimuli: {})",
            s.version,
            s.model_path,
            s.units.len(),
            s.stimuli.len(),
            s.stimuli.join(", ")
        );
    }
    out!(
        "decoder {} · threshold {} after {} ms · prior {}{}",
        s.decoder,
        s.threshold,
        s.min_time_s * 1000.0,
        if s.prior.is_empty() {
            "(the model's)".to_string()
        } else {
            format!(
                "[{}]",
                s.prior
                    .iter()
                    .map(|p| format!("{p:.3}"))
                    .collect::<Vec<_>>()
                    .join(", ")
            )
        },
        if s.engine_threads > 1 {
            format!(" · {} engine threads", s.engine_threads)
        } else {
            String::new()
        }
    );
    for l in crate::monitor::deployment_lines(s) {
        out!("{l}");
    }
    if !s.realtime.is_empty() && s.realtime != "off" {
        let demoted = s.health.as_ref().map_or(0, |h| h.realtime_demotions);
        out!(
            "real-time {}{}",
            s.realtime,
            if demoted > 0 {
                format!(" · {demoted} demotion(s) by the guard")
            } else {
                String::new()
            }
        );
    }
    for l in crate::monitor::promise_lines(s) {
        out!("{l}");
    }
    for l in crate::monitor::steering_lines(s) {
        out!("{l}");
    }
    if s.tick_rate_hz > 0.0 {
        out!(
            "session {:?} · clock {} ticks/s · open trials {:?} · recording {}",
            s.session_name,
            s.tick_rate_hz,
            s.open_trials,
            if s.recording_path.is_empty() {
                "off"
            } else {
                &s.recording_path
            }
        );
    } else {
        let ended = if s.ended_sessions.is_empty() {
            String::new()
        } else {
            format!(" ({} ended)", s.ended_sessions.len())
        };
        out!(
            "no session running{ended}: waiting for a SessionStart · recording {}",
            if s.recording_path.is_empty() {
                "off"
            } else {
                &s.recording_path
            }
        );
    }
    if let Some(l) = &s.learning {
        let state = if l.enabled { "on" } else { "frozen" };
        let model = if l.model_trials > 0 {
            format!(
                "model in use fitted on {} trials, applied {:.0} s ago after a {:.2} s refit",
                l.model_trials, l.last_refit_age_s, l.last_refit_s
            )
        } else {
            "no learned model in use".to_string()
        };
        out!("learning {state}: {} labelled trials taken · {model} · {} refits (every {} trials or {:.0} s){}", l.trials_learned, l.refits, l.refit_every_trials, l.refit_every_s,
            if !l.enabled { " · no refits while frozen (`auspex steer learn resume`)".to_string() } else if l.waiting_for.is_empty() { String::new() } else { format!(" · not yet: {}", l.waiting_for) });
    }
    for e in &s.ended_sessions {
        out!("{}", crate::monitor::session_line(e));
    }
    for x in &s.senders {
        out!(
            "sender {:?}: {} messages, last #{}, {} gaps{}",
            x.sender,
            x.messages,
            x.last_seq,
            x.gaps,
            if x.ended { ", ended" } else { "" }
        );
    }
    let mut st = crate::monitor::MonitorState::new(vec![], 0.001);
    if let Some(h) = s.health.clone() {
        st.apply(
            "health",
            &v1::Outbound {
                seq: 1,
                body: Some(v1::outbound::Body::Health(h.clone())),
            },
        );
        out!("{}", st.health_line());
        out!("trials completed {} · decisions {} · duplicate trials {} · stale onsets {} · unknown trials {} · unknown stimuli {} · oversized {} · model mismatches {}{}",
            h.trials_completed, h.decisions, h.duplicate_trials, h.stale_onsets, h.unknown_trials, h.unknown_stimuli, h.oversized_batches, h.model_mismatches,
            if h.trials_over_limit > 0 { format!(" · onsets refused over the open-trial bound {}", h.trials_over_limit) } else { String::new() });
    }
    o
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A combiner that has lost a shard says so, names it and why, and what trials lack.
    #[test]
    fn a_combiner_status_names_the_lost_shard() {
        let s = v1::Status {
            version: "0.1.0".into(),
            model_path: "probes.apxm".into(),
            stimuli: vec!["A".into(), "B".into()],
            role: "combine".into(),
            parts: 2,
            shards: vec![
                v1::ShardState {
                    part: 0,
                    endpoint: "tcp://rig-a:7714".into(),
                    joined: true,
                    partials: 500,
                    ..Default::default()
                },
                v1::ShardState {
                    part: 1,
                    endpoint: "tcp://rig-b:7714".into(),
                    joined: false,
                    partials: 120,
                    times_lost: 1,
                    note: "tcp://rig-b:7714 silent for 501 ms (deadline 500 ms)".into(),
                    silent_s: 2.5,
                },
            ],
            health: Some(v1::Health {
                shards_lost: 1,
                missing_parts: 0b10,
                ..Default::default()
            }),
            ..Default::default()
        };
        let text = status_text(&s);
        assert!(
            text.contains(
                "combiner of 2 shards · a shard lost once · trials opened now LACK parts 1"
            ),
            "{text}"
        );
        assert!(text.contains("part 1 tcp://rig-b:7714 · NOT JOINED · 120 partials · last heard 2.5 s ago · lost 1 time · tcp://rig-b:7714 silent for 501 ms"), "{text}");
        let j = status_json(&s);
        assert_eq!(j["role"], "combine");
        assert_eq!(j["shards"][1]["joined"], false);
        // The counters `status` prints are in the JSON too.
        assert_eq!(j["health"]["shards_lost"], 1);
        assert_eq!(j["health"]["late_spikes"], 0);
        // A whole daemon prints no deployment line.
        let whole = status_text(&v1::Status {
            role: "whole".into(),
            ..Default::default()
        });
        assert!(
            !whole.contains("combiner") && !whole.contains("shard"),
            "{whole}"
        );
    }
}
