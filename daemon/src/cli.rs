//! The daemon's command line, shared by the `auspexd` binary and `auspex daemon`: flags and an
//! optional TOML file merged into a validated config, logging set up, then `service::run`.

use crate::config::{validate, FileConfig, IngestPattern};
use std::path::PathBuf;

/// The daemon's command-line flags (shared by `auspexd` and `auspex daemon`).
#[derive(clap::Args, Debug, Clone, Default)]
pub struct DaemonArgs {
    /// TOML configuration file (flags override it)
    #[arg(long)]
    pub config: Option<PathBuf>,
    /// Model file from `auspex fit` (leave out to learn one from the session's labelled trials)
    #[arg(long)]
    pub model: Option<PathBuf>,
    /// Learn from labelled trials during the session: on by default without --model; with
    /// --model, learned models replace it once they can be fitted
    #[arg(long, num_args = 0..=1, default_missing_value = "true", value_name = "BOOL")]
    pub learn: Option<bool>,
    /// Start with learning frozen: trials are kept, no refit until `auspex steer learn resume`
    #[arg(long)]
    pub learn_frozen: bool,
    /// Window after onset the learner fits, ms (without --model) [default: 250]
    #[arg(long)]
    pub learn_window_ms: Option<f64>,
    /// Bin width the learner fits, ms (without --model) [default: 1]
    #[arg(long)]
    pub learn_bin_ms: Option<f64>,
    /// Count families the learner chooses among: comma-separated poisson, negative_binomial (or nb), com_poisson (or com), empirical; or all [default: all]
    #[arg(long)]
    pub learn_families: Option<String>,
    /// Labelled trials a stimulus needs before it enters the learned model, and a unit of every stimulus before it contributes [default: 3]
    #[arg(long)]
    pub learn_min_trials: Option<u32>,
    /// Refit after this many new labelled trials [default: 8]
    #[arg(long)]
    pub refit_every_trials: Option<u32>,
    /// ... or after this many seconds with at least one new labelled trial [default: 30]
    #[arg(long)]
    pub refit_every_s: Option<f64>,
    /// Main ingest endpoint (acquisition connects here) [default: tcp://127.0.0.1:7710]
    #[arg(long)]
    pub ingest: Option<String>,
    /// Socket pattern of the main ingest: pull (senders PUSH) or sub (senders PUB)
    #[arg(long, value_parser = ["pull", "sub"])]
    pub ingest_pattern: Option<String>,
    /// Task-control ingest endpoint; "" disables [default: tcp://127.0.0.1:7711]
    #[arg(long)]
    pub task_ingest: Option<String>,
    /// Publish endpoint (monitors and closed-loop control subscribe here) [default: tcp://127.0.0.1:7712]
    #[arg(long)]
    pub publish: Option<String>,
    /// Control endpoint (clients connect a REQ socket) [default: tcp://127.0.0.1:7713]
    #[arg(long)]
    pub control: Option<String>,
    /// Record every inbound message to this file (or a timestamped file in this directory)
    #[arg(long)]
    pub record: Option<PathBuf>,
    /// Allow binding endpoints that are not on loopback (traffic is unencrypted)
    #[arg(long)]
    pub allow_remote: bool,
    /// Clock ticks per second, if known before the session starts
    #[arg(long)]
    pub tick_rate: Option<f64>,
    /// order-stats, inhomogeneous-poisson or count-only
    #[arg(long)]
    pub decoder: Option<String>,
    /// Decision threshold on the top posterior
    #[arg(long)]
    pub threshold: Option<f64>,
    /// Minimum time after onset before a threshold decision, ms
    #[arg(long)]
    pub min_time_ms: Option<f64>,
    /// Instead of --threshold: the accuracy threshold decisions must keep; threshold and minimum
    /// time come from the model's held-out record (start refused when it cannot support it)
    #[arg(long, conflicts_with = "threshold")]
    pub target_accuracy: Option<f64>,
    /// Ignore the model's calibration (raw posterior, β = 1)
    #[arg(long)]
    pub uncalibrated: bool,
    /// Log JSON lines instead of text
    #[arg(long)]
    pub log_json: bool,
    /// Memory for looked-up COM-Poisson/empirical count terms, MB (more: fewer evaluated per bin) [default: 1024]
    #[arg(long)]
    pub table_memory_mb: Option<u64>,
    /// Memory budget, MB: a model, session or learned fit whose tables would need more is
    /// refused (and counted) before the memory is asked for, and the daemon keeps what it had [default: 2048]
    #[arg(long)]
    pub memory_budget_mb: Option<u64>,
    /// Real-time mode: the threads from spike to decision run under SCHED_FIFO, memory is
    /// locked; a guard demotes a thread busy over 200 ms. Without the privilege the daemon runs
    /// as usual and says so (log, status)
    #[arg(long)]
    pub realtime: bool,
    /// SCHED_FIFO priority of the engine threads in real-time mode, 1..=97 (implies --realtime) [default: 20]
    #[arg(long, value_name = "P")]
    pub realtime_priority: Option<i32>,
    /// Cores the real-time threads run on, e.g. 2,3 (implies --realtime; leave the acquisition its own)
    #[arg(long, value_name = "LIST", value_delimiter = ',')]
    pub realtime_cpus: Vec<usize>,
    /// Engine threads sharing the model's units; frames are identical for any number (`auspex bench` recommends one) [default: 1]
    #[arg(long, value_name = "N")]
    pub threads: Option<u32>,
    /// Place in a deployment across machines: whole (decode every unit here), shard (decode one
    /// part of the units, for a combiner) or combine (add the shards' parts, publish, serve control) [default: whole]
    #[arg(long, value_parser = ["whole", "shard", "combine"])]
    pub role: Option<String>,
    /// A shard's part, 0-based (the model's unit group when it has one per shard)
    #[arg(long, value_name = "P")]
    pub part: Option<u32>,
    /// A shard's number of parts: the combiner's --shard count
    #[arg(long, value_name = "N")]
    pub parts: Option<u32>,
    /// A shard's link endpoint, bound; its combiner connects here [default: tcp://127.0.0.1:7714]
    #[arg(long, value_name = "ENDPOINT")]
    pub link: Option<String>,
    /// A combiner's shard: its link endpoint; once per shard, in part order
    #[arg(long = "shard", value_name = "ENDPOINT")]
    pub shards: Vec<String>,
    /// How long a shard may stay silent before the combiner goes on without its units, ms [default: 500]
    #[arg(long, value_name = "MS")]
    pub shard_deadline_ms: Option<f64>,
    /// The stimuli the task program may present, in order around the circle for directions
    /// (e.g. 0,45,90,…): `next --policy find-tuning` chooses among them from the first trial,
    /// with no model (a session's start message may declare its own instead)
    #[arg(long, value_name = "LIST", value_delimiter = ',')]
    pub stimuli: Vec<String>,
    /// Seed of the next-stimulus policies' random streams (a replay checks find-tuning's
    /// recorded choices with the same seed) [default: 1]
    #[arg(long)]
    pub seed: Option<u64>,
    /// find-tuning: whole balanced blocks before its first own choice [default: 1]
    #[arg(long, value_name = "N")]
    pub steer_warmup_blocks: Option<u32>,
    /// find-tuning: every stimulus gets at least this share of its equal share of the trials, 0..=1 [default: 0.25]
    #[arg(long, value_name = "SHARE")]
    pub steer_min_share: Option<f64>,
    /// find-tuning: no stimulus more than this many times in a row [default: 3]
    #[arg(long, value_name = "N")]
    pub steer_max_run: Option<u32>,
}

/// Runs the daemon from flags; returns the process exit code.
pub fn run_cli(a: DaemonArgs) -> i32 {
    let mut f: FileConfig = match &a.config {
        Some(p) => match std::fs::read_to_string(p)
            .map_err(|e| e.to_string())
            .and_then(|t| toml::from_str(&t).map_err(|e| e.to_string()))
        {
            Ok(f) => f,
            Err(e) => {
                eprintln!("auspexd: error: {}: {e}", p.display());
                return 2;
            }
        },
        None => FileConfig::default(),
    };
    macro_rules! over {
        ($($field:ident),*) => { $( if a.$field.is_some() { f.$field = a.$field.clone(); } )* };
    }
    over!(
        model,
        ingest,
        task_ingest,
        publish,
        control,
        record,
        decoder,
        threshold,
        target_accuracy
    );
    if a.uncalibrated {
        f.uncalibrated = Some(true);
    }
    over!(
        learn,
        learn_window_ms,
        learn_bin_ms,
        learn_families,
        learn_min_trials,
        refit_every_trials,
        refit_every_s
    );
    if a.learn_frozen {
        f.learn_frozen = Some(true);
    }
    if a.table_memory_mb.is_some() {
        f.table_memory_mb = a.table_memory_mb;
    }
    if a.memory_budget_mb.is_some() {
        f.memory_budget_mb = a.memory_budget_mb;
    }
    if a.threads.is_some() {
        f.threads = a.threads;
    }
    if a.realtime {
        f.realtime = Some(true);
    }
    if a.realtime_priority.is_some() {
        f.realtime_priority = a.realtime_priority;
    }
    if !a.realtime_cpus.is_empty() {
        f.realtime_cpus = Some(a.realtime_cpus.clone());
    }
    over!(role, part, parts, link, shard_deadline_ms);
    over!(steer_warmup_blocks, steer_min_share, steer_max_run, seed);
    if !a.stimuli.is_empty() {
        f.stimuli = Some(a.stimuli.clone());
    }
    if !a.shards.is_empty() {
        f.shards = Some(a.shards.clone());
    }
    if a.tick_rate.is_some() {
        f.tick_rate_hz = a.tick_rate;
    }
    if a.min_time_ms.is_some() {
        f.min_time_ms = a.min_time_ms;
    }
    if let Some(p) = &a.ingest_pattern {
        f.ingest_pattern = Some(if p == "sub" {
            IngestPattern::Sub
        } else {
            IngestPattern::Pull
        });
    }
    if a.allow_remote {
        f.allow_remote = Some(true);
    }
    let json = a.log_json || f.log_json.unwrap_or(false);
    let filter =
        // The socket library's own notes (peers connecting and leaving) only at warn: the log
        // is the operator's, not the library's (RUST_LOG overrides).
        tracing_subscriber::EnvFilter::try_from_default_env()
            .unwrap_or_else(|_| "info,zeromq=warn".into());
    if json {
        tracing_subscriber::fmt()
            .with_env_filter(filter)
            .json()
            .with_writer(std::io::stderr)
            .init();
    } else {
        // Colour only on a terminal: piped into a file or `less`, the log stays plain text.
        use std::io::IsTerminal;
        tracing_subscriber::fmt()
            .with_env_filter(filter)
            .with_ansi(std::io::stderr().is_terminal())
            .with_writer(std::io::stderr)
            .init();
    }
    let mut warnings = Vec::new();
    let cfg = match validate(f, &mut warnings) {
        Ok(c) => c,
        Err(e) => {
            eprintln!("auspexd: error: {e}");
            return 2;
        }
    };
    for w in warnings {
        tracing::warn!("{w}");
    }
    if let Some(plan) = &cfg.realtime {
        // Before the runtime: its socket thread takes the policy as it starts.
        crate::realtime::configure(plan.clone());
    }
    let rt = match crate::service::io_runtime() {
        Ok(rt) => rt,
        Err(e) => {
            eprintln!("auspexd: error: cannot start the runtime: {e}");
            return 1;
        }
    };
    match rt.block_on(crate::service::run(cfg, crate::service::signals())) {
        Ok(s) => {
            if s.recorder_errors > 0 {
                eprintln!(
                    "auspexd: {} recording write errors (see log)",
                    s.recorder_errors
                );
            }
        }
        Err(e) => {
            eprintln!("auspexd: error: {e:#}");
            return 1;
        }
    }
    0
}
