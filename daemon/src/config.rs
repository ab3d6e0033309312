//! Daemon configuration in two stages: what the user wrote (flags and an optional TOML file)
//! and the validated [`DaemonConfig`] built from it, where every bound is checked once.

use auspex_engine::engine::{DecisionPolicy, Decoder};
use auspex_engine::LookupBudget;
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
    /// Choose threshold and minimum time from the model's held-out record to keep this accuracy.
    pub target_accuracy: Option<f64>,
    /// Ignore the model's calibration (raw posterior).
    pub uncalibrated: Option<bool>,
    /// Largest inbound message accepted, bytes.
    pub max_message_bytes: Option<usize>,
    /// Seed of the next-stimulus policy.
    pub seed: Option<u64>,
    /// Log as JSON lines.
    pub log_json: Option<bool>,
    /// Memory for looked-up COM-Poisson/empirical terms, MB.
    pub table_memory_mb: Option<u64>,
    /// The process's memory budget, MB ([`auspex_engine::budget`]): models, sessions and
    /// learned fits that would need more are refused before the memory is asked for.
    pub memory_budget_mb: Option<u64>,
    /// Engine threads sharing the units (frames are identical for any number).
    pub threads: Option<u32>,
    /// Real-time mode for the threads on the spike → frame → decision path ([`crate::realtime`]).
    pub realtime: Option<bool>,
    /// Their `SCHED_FIFO` priority (1..=97; the socket thread one above).
    pub realtime_priority: Option<i32>,
    /// Cores the path threads run on (empty or absent: any).
    pub realtime_cpus: Option<Vec<usize>>,
    /// Learn from the session's labelled trials (default: on without a model, off with one).
    pub learn: Option<bool>,
    /// Start with learning frozen (trials are kept, no refits until resumed).
    pub learn_frozen: Option<bool>,
    /// Window after onset the learner fits, ms (without a model; with one, the model's).
    pub learn_window_ms: Option<f64>,
    /// Bin width the learner fits, ms (without a model; with one, the model's).
    pub learn_bin_ms: Option<f64>,
    /// Count families the learner may choose among (comma-separated, or "all").
    pub learn_families: Option<String>,
    /// Labelled trials of every stimulus a unit needs before it contributes.
    pub learn_min_trials: Option<u32>,
    /// Refit after this many new labelled trials.
    pub refit_every_trials: Option<u32>,
    /// ... or after this many seconds with at least one.
    pub refit_every_s: Option<f64>,
    /// "whole" (default), "shard" or "combine": see [`Deployment`].
    pub role: Option<String>,
    /// A shard's part (0-based, of `parts`).
    pub part: Option<u32>,
    /// Parts of the deployment (a shard's; a combiner counts its `shards`).
    pub parts: Option<u32>,
    /// A shard's link endpoint (bound; its combiner connects).
    pub link: Option<String>,
    /// A combiner's shards' link endpoints, in part order.
    pub shards: Option<Vec<String>>,
    /// How long a shard may stay silent before the combiner goes on without it, ms.
    pub shard_deadline_ms: Option<f64>,
    /// The stimuli `next --policy find-tuning` chooses among before a model names them.
    pub stimuli: Option<Vec<String>>,
    /// find-tuning: whole balanced blocks first.
    pub steer_warmup_blocks: Option<u32>,
    /// find-tuning: every stimulus's minimum share of its equal share of the trials.
    pub steer_min_share: Option<f64>,
    /// find-tuning: most times one stimulus is shown in a row.
    pub steer_max_run: Option<u32>,
}

/// Where this daemon sits in a deployment across machines.
#[derive(Clone, Debug, PartialEq)]
pub enum Deployment {
    /// Decodes every unit itself (possibly on several threads).
    Whole,
    /// Decodes part `part` of `parts` of the units and sends their partial log-likelihoods to
    /// the combiner connected to its link endpoint; takes trial messages from it.
    Shard {
        /// Which part (0-based).
        part: u32,
        /// Of how many.
        parts: u32,
        /// Link endpoint (bound).
        link: String,
    },
    /// Adds its shards' partials, publishes posteriors and decisions, serves control, relays
    /// trial messages to the shards.
    Combine {
        /// The shards' link endpoints (connected), in part order.
        shards: Vec<String>,
        /// Silence after which a shard's units are given up.
        deadline: std::time::Duration,
    },
}

impl Deployment {
    /// The role's name as flags and status give it.
    pub fn name(&self) -> &'static str {
        match self {
            Deployment::Whole => "whole",
            Deployment::Shard { .. } => "shard",
            Deployment::Combine { .. } => "combine",
        }
    }
}

/// Learning settings as validated (window and bin settled at start when a model is loaded).
#[derive(Clone, Debug)]
pub struct LearnConfig {
    /// Start frozen.
    pub frozen: bool,
    /// Window, seconds (None: the loaded model's).
    pub window_s: Option<f64>,
    /// Bin width, seconds (None: the loaded model's).
    pub bin_width_s: Option<f64>,
    /// Families.
    pub families: Vec<auspex_engine::CountFamily>,
    /// Minimum labelled trials per stimulus.
    pub min_trials: u32,
    /// Refit cadence.
    pub cadence: crate::learner::Cadence,
}

/// The validated configuration.
#[derive(Clone, Debug)]
pub struct DaemonConfig {
    /// Model file (None: learn one during the session).
    pub model: Option<PathBuf>,
    /// Learning during the recording (None: off).
    pub learn: Option<LearnConfig>,
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
    /// Target accuracy (the threshold then comes from the model's held-out record).
    pub target_accuracy: Option<f64>,
    /// Apply the model's calibration.
    pub calibrated: bool,
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
    /// Memory a model may spend on looked-up COM-Poisson/empirical terms (at load, reload and
    /// each learned model).
    pub table_memory: LookupBudget,
    /// Engine threads (1: the engine thread alone).
    pub threads: u32,
    /// Real-time mode (None: off).
    pub realtime: Option<crate::realtime::Plan>,
    /// Whole daemon, shard or combiner.
    pub deployment: Deployment,
    /// find-tuning's constraints.
    pub steer: auspex_modelling::design::Constraints,
    /// Its stimulus set, declared at start (empty: the session's or the model's).
    pub stimuli: Vec<String>,
}

/// Default endpoints (loopback only, `auspex_proto::endpoints`) and the shard deadline.
pub mod defaults {
    pub use auspex_proto::endpoints::{CONTROL, INGEST, LINK, PUBLISH, TASK_INGEST};
    /// How long a shard may stay silent before its combiner goes on without it, ms.
    pub const SHARD_DEADLINE_MS: f64 = 500.0;
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

/// A configuration the daemon refuses to run, with what to change.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum ConfigError {
    /// No model to decode with and learning switched off.
    #[error("no model and learning off: give --model PATH (fit one with `auspex fit`), or let the daemon learn (leave out --learn false)")]
    NothingToDecode,
    /// An endpoint that cannot be bound as given.
    #[error("{name} endpoint `{endpoint}` {problem}")]
    Endpoint {
        /// Which socket (ingest, publish, control, task ingest, link).
        name: &'static str,
        /// The endpoint as given.
        endpoint: String,
        /// What is wrong with it.
        problem: &'static str,
    },
    /// The table memory is out of range.
    #[error(transparent)]
    TableMemory(#[from] auspex_engine::prepared::BudgetError),
    /// The role and its flags do not fit together.
    #[error("{0}")]
    Deployment(String),
    /// A setting out of range or in conflict with another.
    #[error("{0}")]
    Invalid(String),
}

impl From<String> for ConfigError {
    fn from(s: String) -> Self {
        ConfigError::Invalid(s)
    }
}

/// Builds and checks the configuration. `warnings` receives what should be printed.
pub fn validate(f: FileConfig, warnings: &mut Vec<String>) -> Result<DaemonConfig, ConfigError> {
    let deployment = deployment(&f)?;
    // The budget holds from here on: the model below is loaded under it.
    let budget_mb = f
        .memory_budget_mb
        .unwrap_or(auspex_engine::budget::DEFAULT_MB);
    if !(64..=(1 << 24)).contains(&budget_mb) {
        return Err(ConfigError::Invalid(format!(
            "memory budget {budget_mb} MB must be 64..=16777216"
        )));
    }
    auspex_engine::budget::set_mb(budget_mb);
    let model = f.model;
    let learn_on = f.learn.unwrap_or(model.is_none());
    if model.is_none() && !learn_on {
        return Err(ConfigError::NothingToDecode);
    }
    let learn = if learn_on {
        let with_model = model.is_some();
        let ms = |name: &str, v: Option<f64>, default: f64| -> Result<Option<f64>, String> {
            match (v, with_model) {
                (Some(_), true) => Err(format!(
                    "{name} is for learning without a model; with --model the learner uses the model's window and bins"
                )),
                (Some(x), false) if !(x.is_finite() && x > 0.0 && x <= 60_000.0) => {
                    Err(format!("{name} {x} ms must be in (0, 60000]"))
                }
                (Some(x), false) => Ok(Some(x / 1000.0)),
                (None, true) => Ok(None),
                (None, false) => Ok(Some(default / 1000.0)),
            }
        };
        let window_s = ms("learn window", f.learn_window_ms, 250.0)?;
        let bin_width_s = ms("learn bin", f.learn_bin_ms, 1.0)?;
        let families = match f.learn_families.as_deref().map(str::trim) {
            None | Some("all") => auspex_engine::CountFamily::ALL.to_vec(),
            Some(list) => list
                .split(',')
                .map(|x| {
                    auspex_engine::CountFamily::parse(x).ok_or(format!(
                        "unknown count family `{x}`: use poisson, negative_binomial (nb), com_poisson (com), empirical or all"
                    ))
                })
                .collect::<Result<Vec<_>, _>>()?,
        };
        let min_trials = f.learn_min_trials.unwrap_or(3);
        if !(1..=1000).contains(&min_trials) {
            return Err(ConfigError::Invalid(format!(
                "learn minimum {min_trials} trials per stimulus must be in 1..=1000"
            )));
        }
        let every_trials = f.refit_every_trials.unwrap_or(8);
        if every_trials == 0 {
            return Err(ConfigError::Invalid(
                "refit every 0 trials: give at least 1".to_string(),
            ));
        }
        let every_s = f.refit_every_s.unwrap_or(30.0);
        if !(every_s.is_finite() && every_s > 0.0 && every_s <= 86_400.0) {
            return Err(ConfigError::Invalid(format!(
                "refit every {every_s} s must be in (0, 86400]"
            )));
        }
        Some(LearnConfig {
            frozen: f.learn_frozen.unwrap_or(false),
            window_s,
            bin_width_s,
            families,
            min_trials,
            cadence: crate::learner::Cadence {
                every_trials,
                every: std::time::Duration::from_secs_f64(every_s),
            },
        })
    } else {
        None
    };
    if deployment != Deployment::Whole {
        if model.is_none() || f.learn == Some(true) {
            return Err(ConfigError::Invalid(format!(
                "--role {} decodes with a fixed model: give --model (every shard and the combiner load the same file) and leave learning to a whole daemon",
                deployment.name()
            )));
        }
        if f.threads.is_some_and(|t| t > 1) && matches!(deployment, Deployment::Combine { .. }) {
            return Err(ConfigError::Invalid(
                "--threads is for a whole daemon or a shard; a combiner runs one engine thread (it only adds the shards' partials)".to_string(),
            ));
        }
    }
    let learn = if deployment == Deployment::Whole {
        learn
    } else {
        None
    };
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
    if let Deployment::Shard { link, .. } = &deployment {
        all.push(("link", link));
    }
    let mut seen = std::collections::HashSet::new();
    for (name, ep) in &all {
        let bad = |problem| ConfigError::Endpoint {
            name,
            endpoint: ep.to_string(),
            problem,
        };
        if !(ep.starts_with("tcp://") || ep.starts_with("ipc://")) {
            return Err(bad("must start with tcp:// or ipc://"));
        }
        if !ep.ends_with(":0") && !seen.insert(ep.to_string()) {
            return Err(bad("is used twice"));
        }
        if !is_local_endpoint(ep) {
            if !allow_remote {
                return Err(bad(
                    "is not on loopback; pass --allow-remote to bind it (traffic is unencrypted)",
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
    let policy = DecisionPolicy {
        threshold: f
            .threshold
            .unwrap_or(auspex_engine::engine::DEFAULT_THRESHOLD),
        min_time_s: f
            .min_time_ms
            .unwrap_or(auspex_engine::engine::DEFAULT_MIN_TIME_MS)
            / 1000.0,
    };
    policy.check()?;
    if let Some(t) = f.target_accuracy {
        if !(t > 0.0 && t < 1.0) {
            return Err(ConfigError::Invalid(format!(
                "target accuracy {t} must be in (0, 1), e.g. 0.95"
            )));
        }
        if f.threshold.is_some() {
            return Err(ConfigError::Invalid(
                "give either a threshold or a target accuracy, not both".to_string(),
            ));
        }
    }
    if let Some(r) = f.tick_rate_hz {
        if !(r.is_finite() && r >= 1.0) {
            return Err(ConfigError::Invalid(format!(
                "tick rate {r} must be ≥ 1 tick per second"
            )));
        }
    }
    let max_message_bytes = f.max_message_bytes.unwrap_or(16 << 20);
    if max_message_bytes < 1024 {
        return Err(ConfigError::Invalid(format!(
            "max message size {max_message_bytes} bytes is too small (≥ 1024)"
        )));
    }
    let table_memory = match f.table_memory_mb {
        Some(mb) => LookupBudget::from_mb(mb)?,
        None => LookupBudget::DEFAULT,
    };
    let threads = f.threads.unwrap_or(1);
    if !(1..=crate::workers::MAX_THREADS).contains(&threads) {
        return Err(ConfigError::Invalid(format!(
            "threads {threads} must be 1..={} (`auspex bench --threads` measures what helps)",
            crate::workers::MAX_THREADS
        )));
    }
    let realtime = if f.realtime.unwrap_or(false)
        || f.realtime_priority.is_some()
        || f.realtime_cpus.as_ref().is_some_and(|c| !c.is_empty())
    {
        let plan = crate::realtime::Plan {
            priority: f
                .realtime_priority
                .unwrap_or(crate::realtime::DEFAULT_PRIORITY),
            cpus: f.realtime_cpus.clone().unwrap_or_default(),
        };
        plan.check()?;
        Some(plan)
    } else {
        None
    };
    let steer = auspex_modelling::design::Constraints {
        warmup_blocks: f.steer_warmup_blocks.unwrap_or(1) as usize,
        min_share: f.steer_min_share.unwrap_or(0.25),
        max_run: f.steer_max_run.unwrap_or(3) as usize,
    };
    let stimuli: Vec<String> = f
        .stimuli
        .clone()
        .unwrap_or_default()
        .into_iter()
        .map(|s| s.trim().to_string())
        .collect();
    if stimuli.iter().any(|s| s.is_empty()) {
        return Err(ConfigError::Invalid(
            "a declared stimulus has an empty name (--stimuli A,B,…)".into(),
        ));
    }
    if let Some(d) = stimuli
        .iter()
        .enumerate()
        .find(|(i, s)| stimuli[..*i].contains(s))
    {
        return Err(ConfigError::Invalid(format!(
            "stimulus {:?} is declared twice",
            auspex_engine::data::printable(d.1)
        )));
    }
    if steer.warmup_blocks > 1000 {
        return Err(ConfigError::Invalid(format!(
            "steer warm-up {} blocks must be at most 1000",
            steer.warmup_blocks
        )));
    }
    steer
        .check(if stimuli.is_empty() { 2 } else { stimuli.len() })
        .map_err(|e| ConfigError::Invalid(format!("steering: {e}")))?;
    Ok(DaemonConfig {
        steer,
        stimuli,
        deployment,
        threads,
        realtime,
        table_memory,
        model,
        learn,
        ingest,
        ingest_pattern: f.ingest_pattern.unwrap_or_default(),
        task_ingest,
        publish,
        control,
        record: f.record,
        tick_rate_hz: f.tick_rate_hz,
        decoder,
        policy,
        target_accuracy: f.target_accuracy,
        calibrated: !f.uncalibrated.unwrap_or(false),
        max_message_bytes,
        seed: f.seed.unwrap_or(1),
        engine_queue: 1 << 16,
        publish_queue: 1 << 14,
        health_period: std::time::Duration::from_secs(1),
    })
}

/// The deployment role from the flags, checked.
fn deployment(f: &FileConfig) -> Result<Deployment, ConfigError> {
    let role = f.role.as_deref().unwrap_or("whole");
    let only = |what: &str, given: bool, role_needed: &str| -> Result<(), ConfigError> {
        if given && role != role_needed {
            return Err(ConfigError::Deployment(format!(
                "{what} is for --role {role_needed}"
            )));
        }
        Ok(())
    };
    only(
        "--part/--parts",
        f.part.is_some() || f.parts.is_some(),
        "shard",
    )?;
    only("--link", f.link.is_some(), "shard")?;
    only("--shard", f.shards.is_some(), "combine")?;
    only(
        "--shard-deadline-ms",
        f.shard_deadline_ms.is_some(),
        "combine",
    )?;
    match role {
        "whole" => Ok(Deployment::Whole),
        "shard" => {
            let (Some(part), Some(parts)) = (f.part, f.parts) else {
                return Err(ConfigError::Deployment("--role shard needs --part P --parts N: this shard's part (0-based) of the combiner's N shards".to_string()));
            };
            let max = auspex_engine::engine::MAX_PARTS;
            if !(1..=max).contains(&parts) || part >= parts {
                return Err(ConfigError::Deployment(format!(
                    "--part {part} --parts {parts}: parts must be 1..={max} and the part 0..parts"
                )));
            }
            Ok(Deployment::Shard {
                part,
                parts,
                link: f.link.clone().unwrap_or_else(|| defaults::LINK.into()),
            })
        }
        "combine" => {
            let shards = f.shards.clone().unwrap_or_default();
            let max = auspex_engine::engine::MAX_PARTS as usize;
            if shards.is_empty() || shards.len() > max {
                return Err(ConfigError::Deployment(format!(
                    "--role combine needs --shard ENDPOINT once per shard, in part order (1 to {max})"
                )));
            }
            for ep in &shards {
                if !ep.starts_with("tcp://") && !ep.starts_with("ipc://") {
                    return Err(ConfigError::Deployment(format!(
                        "--shard `{ep}` must be a shard's link endpoint, tcp://HOST:PORT or ipc://PATH"
                    )));
                }
            }
            let ms = f.shard_deadline_ms.unwrap_or(defaults::SHARD_DEADLINE_MS);
            if !(ms.is_finite() && (10.0..=600_000.0).contains(&ms)) {
                return Err(ConfigError::Deployment(format!(
                    "--shard-deadline-ms {ms} must be in [10, 600000]"
                )));
            }
            Ok(Deployment::Combine {
                shards,
                deadline: std::time::Duration::from_secs_f64(ms / 1000.0),
            })
        }
        other => Err(ConfigError::Deployment(format!(
            "--role {other}: use whole (the default), shard or combine"
        ))),
    }
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
            .to_string()
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
        assert_eq!(validate(f, &mut w).unwrap().table_memory.bytes(), 256 << 20);
        let f: FileConfig = toml::from_str("model = \"m\"\n").unwrap();
        assert_eq!(
            validate(f, &mut w).unwrap().table_memory,
            LookupBudget::DEFAULT
        );
        let f: FileConfig = toml::from_str("model = \"m\"\ntable_memory_mb = 5000000\n").unwrap();
        assert!(matches!(
            validate(f, &mut w),
            Err(ConfigError::TableMemory(_))
        ));
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
        // No model means learning; no model and no learning is refused.
        let learning = validate(
            FileConfig {
                model: None,
                ..base.clone()
            },
            &mut w,
        )
        .unwrap();
        assert!(learning.learn.is_some() && learning.model.is_none());
        assert!(validate(
            FileConfig {
                model: None,
                learn: Some(false),
                ..base.clone()
            },
            &mut w
        )
        .is_err());
        // A model fixes the learner's window and bins.
        assert!(validate(
            FileConfig {
                learn: Some(true),
                learn_window_ms: Some(100.0),
                ..base
            },
            &mut w
        )
        .unwrap_err()
        .to_string()
        .contains("model's window"));
    }

    #[test]
    fn deployment_roles_are_checked() {
        let mut w = Vec::new();
        let base = FileConfig {
            model: Some("m".into()),
            ..Default::default()
        };
        let with = |f: FileConfig| validate(f, &mut Vec::new());
        assert_eq!(
            validate(base.clone(), &mut w).unwrap().deployment,
            Deployment::Whole
        );
        let shard = with(FileConfig {
            role: Some("shard".into()),
            part: Some(1),
            parts: Some(2),
            ..base.clone()
        })
        .unwrap();
        assert_eq!(
            shard.deployment,
            Deployment::Shard {
                part: 1,
                parts: 2,
                link: defaults::LINK.into()
            }
        );
        // A shard may use several engine threads (slices of its part); a combiner may not.
        let threaded = with(FileConfig {
            role: Some("shard".into()),
            part: Some(0),
            parts: Some(2),
            threads: Some(3),
            ..base.clone()
        })
        .unwrap();
        assert_eq!(threaded.threads, 3);
        let refused = |f: FileConfig, says: &str| {
            let e = with(f).unwrap_err().to_string();
            assert!(e.contains(says), "{e}");
        };
        refused(
            FileConfig {
                role: Some("shard".into()),
                ..base.clone()
            },
            "--part P --parts N",
        );
        refused(
            FileConfig {
                role: Some("shard".into()),
                part: Some(2),
                parts: Some(2),
                ..base.clone()
            },
            "the part 0..parts",
        );
        refused(
            FileConfig {
                role: Some("combine".into()),
                ..base.clone()
            },
            "--shard ENDPOINT",
        );
        refused(
            FileConfig {
                part: Some(0),
                ..base.clone()
            },
            "for --role shard",
        );
        refused(
            FileConfig {
                shards: Some(vec!["tcp://a:1".into()]),
                ..base.clone()
            },
            "for --role combine",
        );
        refused(
            FileConfig {
                role: Some("combine".into()),
                shards: Some(vec!["a:1".into()]),
                ..base.clone()
            },
            "link endpoint",
        );
        refused(
            FileConfig {
                role: Some("combine".into()),
                shards: Some(vec!["tcp://a:1".into()]),
                threads: Some(2),
                ..base.clone()
            },
            "one engine thread",
        );
        refused(
            FileConfig {
                role: Some("combine".into()),
                shards: Some(vec!["tcp://a:1".into()]),
                model: None,
                ..base.clone()
            },
            "fixed model",
        );
        refused(
            FileConfig {
                role: Some("shard".into()),
                part: Some(0),
                parts: Some(2),
                link: Some("tcp://0.0.0.0:7714".into()),
                ..base.clone()
            },
            "--allow-remote",
        );
        refused(
            FileConfig {
                role: Some("middle".into()),
                ..base
            },
            "whole (the default), shard or combine",
        );
    }
}
