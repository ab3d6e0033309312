//! `auspex steer`: the control requests that change a running daemon (decision policy or target
//! accuracy, prior, decoder, model reload, next stimulus, learning, saving the learned model),
//! sent and their replies printed.
//!
//! Must not: change anything itself; the daemon checks and applies every request.

use auspex_proto::v1::{self, control_request::Body};
use std::path::Path;
use std::time::Duration;

/// A policy request. The request sets threshold and minimum time together: what was not given
/// comes from the daemon's status.
pub async fn policy(
    control: &str,
    threshold: Option<f64>,
    min_time_ms: Option<f64>,
    target_accuracy: Option<f64>,
) -> anyhow::Result<Body> {
    if threshold.is_none() && min_time_ms.is_none() && target_accuracy.is_none() {
        anyhow::bail!("give --threshold, --min-time-ms (or both), or --target-accuracy");
    }
    let st = crate::live::status(control).await?;
    Ok(Body::SetPolicy(v1::SetPolicy {
        threshold: threshold.unwrap_or(st.threshold),
        min_time_s: min_time_ms.map(|m| m / 1000.0).unwrap_or(st.min_time_s),
        target_accuracy: target_accuracy.unwrap_or(0.0),
    }))
}

/// A reload request; the daemon opens the file, so the path is made absolute when it exists.
pub fn reload(model: &Path) -> Body {
    let path = std::fs::canonicalize(model).unwrap_or_else(|_| model.to_path_buf());
    Body::Reload(v1::ReloadModel {
        path: path.display().to_string(),
    })
}

/// A request to save the learned model; the daemon writes the file, so the path is absolute.
pub fn save_learned(path: &Path) -> anyhow::Result<Body> {
    let abs = if path.is_absolute() {
        path.to_path_buf()
    } else {
        std::env::current_dir()?.join(path)
    };
    Ok(Body::SaveLearned(v1::SaveLearned {
        path: abs.display().to_string(),
    }))
}

/// Sends `body` and prints the reply: the daemon's note, the next stimulus, or the settings now
/// in force with the promise they keep.
pub async fn send(control: &str, body: Body) -> anyhow::Result<()> {
    // Saving a large learned model can take a while.
    let wait = if matches!(body, Body::SaveLearned(_)) {
        600
    } else {
        5
    };
    let r = crate::live::control(control, body, Duration::from_secs(wait)).await?;
    if !r.note.is_empty() {
        println!("{}", r.note);
        return Ok(());
    }
    match r.body {
        Some(v1::control_reply::Body::Next(n)) => {
            // The stimulus alone on standard output (a script reads it); why, on stderr.
            println!("{}", auspex_engine::data::printable(&n.stimulus));
            if let Some(why) = next_reason(&n) {
                eprintln!("{why}");
            }
        }
        Some(v1::control_reply::Body::Status(s)) => {
            println!(
                "ok: decoder {}, threshold {}, minimum {} ms, model {}",
                s.decoder,
                s.threshold,
                s.min_time_s * 1000.0,
                s.model_path
            );
            for l in crate::monitor::promise_lines(&s) {
                println!("{l}");
            }
        }
        None => println!("ok"),
    }
    Ok(())
}

/// find-tuning's reason for a choice in one line (None for the other policies).
pub fn next_reason(n: &v1::NextStimulusReply) -> Option<String> {
    if n.reason.is_empty() {
        return None;
    }
    let mut line = format!("choice {} · {}", n.choice, n.reason);
    if n.serves_unit && n.p_preferred.is_finite() {
        line += &format!(" · P(preferred) {:.2}", n.p_preferred);
        if !n.runner_up.is_empty() && n.runner_up_p_preferred.is_finite() {
            line += &format!(
                ", runner-up {} {:.2}",
                auspex_engine::data::printable(&n.runner_up),
                n.runner_up_p_preferred
            );
        }
        line += &format!(" (as of trial {})", n.as_of_trials);
    }
    if n.policy == "improve-decoding" {
        // Its reason already carries the expected accuracy and the gains.
        return Some(line);
    }
    line += &format!(" · {}/{} units settled", n.units_settled, n.units);
    Some(line)
}
