//! Daemon configuration in two stages: what the user wrote (flags and an optional TOML file)
//! and the validated [`DaemonConfig`] built from it, where every bound is checked once.

use auspex_engine::engine::{DecisionPolicy, Decoder};
use serde::Deserialize;
use std::path::PathBuf;

/// How acquisition delivers spikes to the main ingest endpoint.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum IngestPattern {
    /// The daemon binds PULL; senders connect PUSH.
    #[default]
    Pull,
    /// The daemon binds SUB (subscribed to everything); senders connect PUB.
    Sub,
}

/// Settings as written in a TOML file; every field optional, flags override.
#[derive(Clone, Debug, Default, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct FileConfig {
    /// Model file.
    pub model: Option<PathBuf>,
    /// Main ingest endpoint.
    pub ingest: Option<String>,
    /// Ingest socket pattern.
    pub ingest_pattern: Option<IngestPattern>,
    /// Optional second ingest endpoint for task control ("" disables).
    pub task_ingest: Option<String>,
    /// Publish endpoint.
    pub publish: Option<String>,
    /// Control endpoint.
    pub control: Option<String>,
    /// Session recording file or directory.
    pub record: Option<PathBuf>,
    /// Allow non-loopback binds.
    pub allow_remote: Option<bool>,
    /// Clock rate, if known before SessionStart.
    pub tick_rate_hz: Option<f64>,
    /// Decoder name.
    pub decoder: Option<String>,
    /// Decision threshold.
    pub threshold: Option<f64>,
    /// Minimum decision time, ms.
    pub min_time_ms: Option<f64>,
    /// Largest inbound message accepted, bytes.
    pub max_message_bytes: Option<usize>,
    /// Seed of the next-stimulus policy.
    pub seed: Option<u64>,
    /// Log as JSON lines.
    pub log_json: Option<bool>,
    /// Memory for looked-up COM-Poisson/empirical terms, MB.
    pub table_memory_mb: Option<u64>,
}

/// The validated configuration.
#[derive(Clone, Debug)]
pub struct DaemonConfig {
    /// Model file.
    pub model: PathBuf,
    /// Main ingest endpoint.
    pub ingest: String,
    /// Ingest pattern.
    pub ingest_pattern: IngestPattern,
    /// Task-control ingest endpoint.
    pub task_ingest: Option<String>,
    /// Publish endpoint.
    pub publish: String,
    /// Control endpoint.
    pub control: String,
    /// Recording file.
    pub record: Option<PathBuf>,
    /// Clock rate, if known before SessionStart.
    pub tick_rate_hz: Option<f64>,
    /// Decoder.
    pub decoder: Decoder,
    /// Decision policy.
    pub policy: DecisionPolicy,
    /// Largest inbound message accepted.
    pub max_message_bytes: usize,
    /// Seed of the next-stimulus policy.
    pub seed: u64,
    /// Capacity of the ingest → engine channel (messages).
    pub engine_queue: usize,
    /// Capacity of the engine → publisher queue (messages).
    pub publish_queue: usize,
    /// Health period.
    pub health_period: std::time::Duration,
    /// Bytes a model may spend on looked-up COM-Poisson/empirical terms (at load and reload).
    pub table_memory_bytes: usize,
}

/// Default endpoints: loopback only.
pub mod defaults {
    /// Main ingest.
    pub const INGEST: &str = "tcp://127.0.0.1:7710";
    /// Task-control ingest.
    pub const TASK_INGEST: &str = "tcp://127.0.0.1:7711";
    /// Publish.
    pub const PUBLISH: &str = "tcp://127.0.0.1:7712";
    /// Control.
    pub const CONTROL: &str = "tcp://127.0.0.1:7713";
}

/// True when the endpoint only listens on this machine (ipc, inproc, or a loopback address).
pub fn is_local_endpoint(ep: &str) -> bool {
    if ep.starts_with("ipc://") || ep.starts_with("inproc://") {
        return true;
    }
    let Some(rest) = ep.strip_prefix("tcp://") else {
        return false;
    };
    let host = match rest.rfind(':') {
        Some(i) => &rest[..i],
        None => rest,
    };
    let host = host.trim_start_matches('[').trim_end_matches(']');
    host == "localhost" || host == "::1" || host.starts_with("127.")
}

/// Builds and checks the configuration. `warnings` receives what should be printed.
pub fn validate(f: FileConfig, warnings: &mut Vec<String>) -> Result<DaemonConfig, String> {
    let model = f
        .model
        .ok_or("no model file: give --model PATH (fit one with `auspex fit`)")?;
    let allow_remote = f.allow_remote.unwrap_or(false);
    let ingest = f.ingest.unwrap_or_else(|| defaults::INGEST.into());
    let task_ingest = match f.task_ingest {
        Some(s) if s.is_empty() => None,
        Some(s) => Some(s),
        None => Some(defaults::TASK_INGEST.into()),
    };
    let publish = f.publish.unwrap_or_else(|| defaults::PUBLISH.into());
    let control = f.control.unwrap_or_else(|| defaults::CONTROL.into());
    let mut all = vec![
        ("ingest", &ingest),
        ("publish", &publish),
        ("control", &control),
    ];
    if let Some(t) = &task_ingest {
        all.push(("task ingest", t));
    }
    let mut seen = std::collections::HashSet::new();
    for (name, ep) in &all {
        if !(ep.starts_with("tcp://") || ep.starts_with("ipc://")) {
            return Err(format!(
                "{name} endpoint `{ep}` must start with tcp:// or ipc://"
            ));
        }
        if !ep.ends_with(":0") && !seen.insert(ep.to_string()) {
            return Err(format!("{name} endpoint `{ep}` is used twice"));
        }
        if !is_local_endpoint(ep) {
            if !allow_remote {
                return Err(format!(
                    "{name} endpoint `{ep}` is not on loopback; pass --allow-remote to bind it (traffic is unencrypted)"
                ));
            }
            warnings.push(format!(
                "{name} endpoint `{ep}` accepts connections from other machines; ZeroMQ traffic is unencrypted and unauthenticated"
            ));
        }
    }
    let decoder = match f.decoder {
        None => Decoder::default(),
        Some(d) => Decoder::parse(&d).ok_or(format!(
            "unknown decoder `{d}`: use order-stats, inhomogeneous-poisson or count-only"
        ))?,
    };
    let threshold = f.threshold.unwrap_or(0.9);
    if !(threshold > 0.0 && threshold <= 1.0) {
        return Err(format!("threshold {threshold} must be in (0, 1]"));
    }
    let min_time_ms = f.min_time_ms.unwrap_or(20.0);
    if !(min_time_ms.is_finite() && min_time_ms >= 0.0) {
        return Err(format!("minimum time {min_time_ms} ms must be ≥ 0"));
    }
    if let Some(r) = f.tick_rate_hz {
        if !(r.is_finite() && r >= 1.0) {
            return Err(format!("tick rate {r} must be ≥ 1 tick per second"));
        }
    }
    let max_message_bytes = f.max_message_bytes.unwrap_or(16 << 20);
    if max_message_bytes < 1024 {
        return Err(format!(
            "max message size {max_message_bytes} bytes is too small (≥ 1024)"
        ));
    }
    let table_mb = f
        .table_memory_mb
        .unwrap_or((auspex_engine::model::TABLE_LOOKUP_BUDGET_BYTES >> 20) as u64);
    if table_mb > 1 << 20 {
        return Err(format!(
            "table memory {table_mb} MB is more than 1 TB; give MB, e.g. 2048"
        ));
    }
    Ok(DaemonConfig {
        table_memory_bytes: (table_mb as usize) << 20,
        model,
        ingest,
        ingest_pattern: f.ingest_pattern.unwrap_or_default(),
        task_ingest,
        publish,
        control,
        record: f.record,
        tick_rate_hz: f.tick_rate_hz,
        decoder,
        policy: DecisionPolicy {
            threshold,
            min_time_s: min_time_ms / 1000.0,
        },
        max_message_bytes,
        seed: f.seed.unwrap_or(1),
        engine_queue: 1 << 16,
        publish_queue: 1 << 14,
        health_period: std::time::Duration::from_secs(1),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn loopback_detection() {
        assert!(is_local_endpoint("tcp://127.0.0.1:5"));
        assert!(is_local_endpoint("tcp://localhost:5"));
        assert!(is_local_endpoint("tcp://[::1]:5"));
        assert!(is_local_endpoint("ipc:///tmp/x"));
        assert!(!is_local_endpoint("tcp://0.0.0.0:5"));
        assert!(!is_local_endpoint("tcp://10.1.2.3:5"));
    }

    #[test]
    fn remote_bind_needs_the_flag_and_warns() {
        let f = FileConfig {
            model: Some("m".into()),
            ingest: Some("tcp://0.0.0.0:7710".into()),
            ..Default::default()
        };
        let mut w = Vec::new();
        assert!(validate(f.clone(), &mut w)
            .unwrap_err()
            .contains("--allow-remote"));
        let f = FileConfig {
            allow_remote: Some(true),
            ..f
        };
        validate(f, &mut w).unwrap();
        assert!(w[0].contains("unencrypted"));
    }

    #[test]
    fn table_memory_from_toml_default_and_bound() {
        let mut w = Vec::new();
        let f: FileConfig = toml::from_str("model = \"m\"\ntable_memory_mb = 256\n").unwrap();
        assert_eq!(validate(f, &mut w).unwrap().table_memory_bytes, 256 << 20);
        let f: FileConfig = toml::from_str("model = \"m\"\n").unwrap();
        assert_eq!(
            validate(f, &mut w).unwrap().table_memory_bytes,
            auspex_engine::model::TABLE_LOOKUP_BUDGET_BYTES
        );
        let f: FileConfig = toml::from_str("model = \"m\"\ntable_memory_mb = 5000000\n").unwrap();
        assert!(validate(f, &mut w).unwrap_err().contains("1 TB"));
    }

    #[test]
    fn bad_values_are_refused() {
        let base = FileConfig {
            model: Some("m".into()),
            ..Default::default()
        };
        let mut w = Vec::new();
        assert!(validate(
            FileConfig {
                threshold: Some(1.5),
                ..base.clone()
            },
            &mut w
        )
        .is_err());
        assert!(validate(
            FileConfig {
                decoder: Some("x".into()),
                ..base.clone()
            },
            &mut w
        )
        .is_err());
        assert!(validate(
            FileConfig {
                publish: Some(defaults::INGEST.into()),
                ..base.clone()
            },
            &mut w
        )
        .is_err());
        assert!(validate(
            FileConfig {
                model: None,
                ..base
            },
            &mut w
        )
        .is_err());
    }
}
