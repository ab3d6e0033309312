//! `auspex`: the command-line client. Thin glue over the `auspex` library.

use auspex::commands::{self, DecodeArgs};
use auspex::live::{Pace, ReplaySource};
use auspex::session::View;
use auspex::tables::Source;
use auspex_engine::engine::Decoder;
use auspex_engine::LookupBudget;
use auspex_proto::v1;
use clap::{Parser, Subcommand};
use std::io::IsTerminal;
use std::path::PathBuf;

#[derive(Parser)]
#[command(
    name = "auspex",
    version,
    about = "Decode which stimulus spiking units signal, bin by bin — offline and live"
)]
struct Cli {
    /// Memory budget, MB: a fit, validation, model, scenario or replay whose tables would need
    /// more is refused before the memory is asked for (give it before the command:
    /// `auspex --memory-budget-mb 8192 validate …`; the daemon takes its own)
    #[arg(long, default_value_t = auspex_engine::budget::DEFAULT_MB, value_parser = clap::value_parser!(u64).range(64..=(1 << 24)))]
    memory_budget_mb: u64,
    #[command(subcommand)]
    cmd: Cmd,
}

fn parse_decoder(s: &str) -> Result<Decoder, String> {
    Decoder::parse(s).ok_or_else(|| {
        format!("unknown decoder `{s}`: use order-stats, inhomogeneous-poisson or count-only")
    })
}

fn lookup_budget(s: &str) -> Result<LookupBudget, String> {
    let mb: u64 = s
        .parse()
        .map_err(|e| format!("{s:?}: {e}; give MB, e.g. 2048"))?;
    LookupBudget::from_mb(mb).map_err(|e| e.to_string())
}

/// A replay speed: a finite number above 0 and at most 10⁶ (times real time).
fn positive_speed(s: &str) -> Result<f64, String> {
    let x: f64 = s.parse().map_err(|_| format!("`{s}` is not a number"))?;
    if x.is_finite() && x > 0.0 && x <= 1e6 {
        Ok(x)
    } else {
        Err(format!(
            "{x} must be above 0 and at most 1000000 (--fast sends without pacing)"
        ))
    }
}

/// A number in (0, 1).
fn unit_interval(s: &str) -> Result<f64, String> {
    let x: f64 = s.parse().map_err(|_| format!("`{s}` is not a number"))?;
    if x > 0.0 && x < 1.0 {
        Ok(x)
    } else {
        Err(format!("{x} must be between 0 and 1 (exclusive)"))
    }
}

/// A share of the circle: 0 (one preference for every unit) to 1 (anywhere).
fn share_of_circle(s: &str) -> Result<f64, String> {
    let x: f64 = s.parse().map_err(|_| format!("`{s}` is not a number"))?;
    if (0.0..=1.0).contains(&x) {
        Ok(x)
    } else {
        Err(format!(
            "{x} is not a share of the circle: give 0 (every unit prefers the same stimulus) to 1 (anywhere)"
        ))
    }
}

fn parse_prior(s: &str) -> Result<Vec<f64>, String> {
    s.split(',')
        .map(|x| {
            x.trim()
                .parse::<f64>()
                .map_err(|_| format!("prior entry `{x}` is not a number"))
        })
        .collect()
}

/// What to take from an NWB file (`--nwb`); `auspex inspect --nwb FILE` lists the choices.
#[derive(clap::Args, Clone)]
struct NwbOpts {
    /// With --nwb: the trials table, a name under intervals/ (default trials) or a path in the file
    #[arg(long, default_value = "trials", value_name = "TABLE")]
    nwb_trials: String,
    /// With --nwb: the trials table's column naming the stimulus, text or numbers (default: the
    /// column named stimulus)
    #[arg(long, value_name = "COLUMN")]
    nwb_stimulus: Option<String>,
    /// With --nwb: the trials table's onset column, seconds
    #[arg(long, default_value = "start_time", value_name = "COLUMN")]
    nwb_onset: String,
    /// With --nwb: which units — all, ids (3,5,9), a true/false column of the units table
    /// (is_good) or COLUMN=VALUE (quality=good)
    #[arg(long, default_value = "all", value_name = "WHICH", value_parser = auspex::nwb::UnitPick::parse)]
    nwb_units: auspex::nwb::UnitPick,
}

impl NwbOpts {
    fn choice(&self) -> auspex::nwb::NwbChoice {
        auspex::nwb::NwbChoice {
            table: self.nwb_trials.clone(),
            stimulus: self.nwb_stimulus.clone(),
            onset: self.nwb_onset.clone(),
            units: self.nwb_units.clone(),
        }
    }
}

#[derive(clap::Args, Clone)]
struct Tables {
    /// Spike table: CSV with columns unit,time_s
    #[arg(long, requires = "trials", required_unless_present_any = ["session", "nwb"])]
    spikes: Option<PathBuf>,
    /// Trial table: CSV with columns trial,onset_s,stimulus
    #[arg(long, requires = "spikes", required_unless_present_any = ["session", "nwb"])]
    trials: Option<PathBuf>,
    /// A session recorded by the daemon (.apxs) instead of the two tables
    #[arg(long, conflicts_with_all = ["spikes", "trials", "tick_rate", "nwb"])]
    session: Option<PathBuf>,
    /// An NWB 2.x file instead of the two tables: its units and a trials table (--nwb-*)
    #[arg(long, conflicts_with_all = ["spikes", "trials"])]
    nwb: Option<PathBuf>,
    #[command(flatten)]
    nwb_opts: NwbOpts,
    /// Acquisition clock ticks per second for the tables (times are rounded to ticks on reading)
    #[arg(long, default_value_t = 1e6)]
    tick_rate: f64,
    /// Accept tables whose times look wrong together (no overlap, a hundredfold difference in
    /// span, nearly every spike outside every trial window)
    #[arg(long)]
    trust_times: bool,
}

impl Tables {
    fn source(&self) -> Source {
        if let Some(path) = &self.nwb {
            return Source::Nwb {
                path: path.clone(),
                choice: self.nwb_opts.choice(),
                tick_rate_hz: self.tick_rate,
                trust_times: self.trust_times,
            };
        }
        match (&self.session, &self.spikes, &self.trials) {
            (Some(p), _, _) => Source::Session(p.clone()),
            (None, Some(s), Some(t)) => Source::Tables {
                spikes: s.clone(),
                trials: t.clone(),
                tick_rate_hz: self.tick_rate,
                trust_times: self.trust_times,
            },
            // clap enforces one of the two forms.
            _ => unreachable!("clap requires --session, --nwb or --spikes with --trials"),
        }
    }
}

#[derive(clap::Args, Clone)]
struct DecodeOpts {
    /// order-stats (default), inhomogeneous-poisson or count-only
    #[arg(long, default_value = "order-stats", value_parser = parse_decoder)]
    decoder: Decoder,
    /// Decide when the top posterior reaches this
    #[arg(long, default_value_t = auspex_engine::engine::DEFAULT_THRESHOLD)]
    threshold: f64,
    /// Instead of --threshold: the accuracy decisions must keep; the threshold (and minimum time)
    /// come from the model's held-out record, and decoding is refused when no threshold keeps it
    #[arg(long, conflicts_with = "threshold")]
    target_accuracy: Option<f64>,
    /// ... but not before this many ms after onset
    #[arg(long, default_value_t = auspex_engine::engine::DEFAULT_MIN_TIME_MS)]
    min_time_ms: f64,
    /// Prior over stimuli, comma-separated in model order (default: the model's)
    #[arg(long, value_parser = parse_prior)]
    prior: Option<Vec<f64>>,
    /// Ignore the model's calibration (raw posterior, β = 1)
    #[arg(long)]
    uncalibrated: bool,
}

impl DecodeOpts {
    fn args(self) -> DecodeArgs {
        DecodeArgs {
            decoder: self.decoder,
            threshold: self.threshold,
            min_time_ms: self.min_time_ms,
            prior: self.prior,
            target_accuracy: self.target_accuracy,
            calibrated: !self.uncalibrated,
        }
    }
}

#[derive(Subcommand)]
enum Cmd {
    /// Draw a synthetic dataset (spikes.csv, trials.csv) from a scenario or a fitted model
    Simulate {
        /// Scenario file (TOML), e.g. demo-data/scenario.toml
        #[arg(long, conflicts_with = "model")]
        scenario: Option<PathBuf>,
        /// Fitted model file to draw from instead
        #[arg(long)]
        model: Option<PathBuf>,
        /// Directory for spikes.csv and trials.csv
        #[arg(long)]
        out_dir: PathBuf,
        /// Trials per stimulus (overrides the scenario)
        #[arg(long)]
        trials: Option<u32>,
        /// Random seed (overrides the scenario)
        #[arg(long)]
        seed: Option<u64>,
        /// Clock ticks per second when simulating from a model
        #[arg(long, default_value_t = 1e6)]
        tick_rate: f64,
        /// Also write the scenario's true model to this file (ground truth for checks)
        #[arg(long)]
        write_true_model: Option<PathBuf>,
    },
    /// Simulated experiments in which stimulus-choice policies pick every trial's stimulus:
    /// trials until every unit's preferred stimulus is known, policies side by side
    ClosedLoopSim {
        /// Units per experiment (comma-separated sizes)
        #[arg(long, value_delimiter = ',', default_value = "1,2,4")]
        units: Vec<usize>,
        /// Stimuli, evenly spaced on a circle (comma-separated sizes)
        #[arg(long, value_delimiter = ',', default_value = "16,32,64")]
        stimuli: Vec<usize>,
        /// Seeds (simulated experiments) per size and policy
        #[arg(long, default_value_t = 20)]
        seeds: u64,
        /// Give up after this many trials
        #[arg(long, default_value_t = 3000)]
        max_trials: usize,
        /// Share of the circle the units' preferred stimuli lie in, around one centre per
        /// seed: 1 = anywhere, each unit on its own; 0.5 = within half the circle, as units
        /// recorded close together often share a preference (stimuli far from it are then
        /// harder to tell apart)
        #[arg(long, default_value_t = 1.0, value_parser = share_of_circle)]
        preference_spread: f64,
        /// Whole balanced blocks before any policy choice
        #[arg(long, default_value_t = 1)]
        warmup_blocks: usize,
        /// Every stimulus gets at least this share of its equal share of trials
        #[arg(long, default_value_t = 0.25)]
        min_share: f64,
        /// No stimulus more than this many times in a row
        #[arg(long, default_value_t = 3)]
        max_run: usize,
        /// Also print every experiment's trials as JSON
        #[arg(long)]
        json: bool,
        /// What each experiment runs until: tuning (every unit's preferred stimulus known;
        /// find-tuning against balanced blocks) or decoding (one trial decoded at --accuracy on
        /// held-out trials; improve-decoding against balanced blocks)
        #[arg(long, default_value = "tuning", value_parser = ["tuning", "decoding"])]
        goal: String,
        /// With --goal decoding: the held-out accuracy to reach
        #[arg(long, default_value_t = 0.9, value_parser = unit_interval)]
        accuracy: f64,
        /// Play the experiments against a running daemon instead: its `next` chooses every
        /// trial's stimulus (the daemon's own constraints apply) and its status judges when
        /// every unit's preference is settled
        #[arg(long)]
        through_daemon: bool,
        /// With --through-daemon: the policies to ask for, in turn
        #[arg(long, value_delimiter = ',', default_value = "find-tuning,balanced-blocks", value_parser = ["balanced-blocks", "least-certain", "find-tuning", "improve-decoding"])]
        policies: Vec<String>,
        /// With --through-daemon: the daemon's ingest endpoint
        #[arg(long, default_value = auspex_proto::endpoints::INGEST)]
        ingest: String,
        /// With --through-daemon: the daemon's control endpoint
        #[arg(long, default_value = auspex_proto::endpoints::CONTROL)]
        control: String,
    },
    /// Fit per-(unit, stimulus) spike-train models and write a model file
    Fit {
        #[command(flatten)]
        tables: Tables,
        /// Output model file
        #[arg(long, short)]
        out: PathBuf,
        /// Window after onset, ms
        #[arg(long, default_value_t = 250.0)]
        window_ms: f64,
        /// Bin width, ms
        #[arg(long, default_value_t = 1.0)]
        bin_ms: f64,
        /// Count families to choose among: comma-separated poisson, negative_binomial (or nb), com_poisson (or com), empirical; or all
        #[arg(long, default_value = "all")]
        families: String,
        /// Prior from the stimuli's training frequencies instead of equal
        #[arg(long)]
        prior_from_frequencies: bool,
        /// Fit every cell from its own trials alone (no empirical Bayes shrinkage toward the unit's pooled data)
        #[arg(long)]
        no_shrink: bool,
        /// Recalibrate the posterior on held-out folds so thresholds keep their promise: none,
        /// temperature (one factor) or banded-temperature (one per band of time since onset)
        #[arg(long, default_value = "temperature", value_parser = parse_calibration)]
        calibration: auspex_engine::calibration::CalibrationMethod,
        /// Folds of the held-out decoding the calibration and the threshold evidence come from
        /// (0: skip it; the model then carries no evidence for --target-accuracy)
        #[arg(long, default_value_t = 5)]
        calibration_folds: usize,
        /// Minimum decision time the threshold evidence is replayed with, ms (use the daemon's)
        #[arg(long, default_value_t = auspex_engine::engine::DEFAULT_MIN_TIME_MS)]
        min_time_ms: f64,
        /// List the stimuli in this order (comma-separated, every stimulus once) in the model and
        /// its tables [default: numeric when every name is a number, else as first met]
        #[arg(long, value_delimiter = ',')]
        stimulus_order: Vec<String>,
        /// Cut the units into groups, one per shard machine (`auspexd --role shard`): the first
        /// unit id of each group after the first, comma-separated, e.g. 1000,2000
        #[arg(long, value_delimiter = ',', value_name = "ID,...")]
        unit_groups: Vec<u32>,
        /// Print the per-cell table (unit, stimulus, count family, mean, Fano, bandwidth, held-out scores)
        #[arg(long)]
        cells: bool,
        /// Print no summary of the cells at all
        #[arg(long)]
        quiet: bool,
    },
    /// Decode every trial offline: posteriors.csv and decisions.csv
    Decode {
        /// Model file (not with --prequential)
        #[arg(
            long,
            required_unless_present = "prequential",
            conflicts_with = "prequential"
        )]
        model: Option<PathBuf>,
        /// Learn while decoding, as the daemon does: each trial decoded with a model fitted only on
        /// trials labelled before it opened (from a daemon's recording: at the daemon's own swap points)
        #[arg(long)]
        prequential: bool,
        /// With --prequential: window after onset, ms (a learning daemon's recording carries its own)
        #[arg(long, default_value_t = 250.0)]
        window_ms: f64,
        /// With --prequential: bin width, ms
        #[arg(long, default_value_t = 1.0)]
        bin_ms: f64,
        /// With --prequential: count families (as for fit)
        #[arg(long, default_value = "all")]
        families: String,
        /// With --prequential: labelled trials of a stimulus before it (and a unit) enters the model
        #[arg(long, default_value_t = 3)]
        learn_min_trials: u32,
        /// With --prequential: refit after this many new labelled trials
        #[arg(long, default_value_t = 8)]
        refit_every_trials: u32,
        #[command(flatten)]
        tables: Tables,
        #[command(flatten)]
        opts: DecodeOpts,
        /// Output directory
        #[arg(long, default_value = ".")]
        out_dir: PathBuf,
    },
    /// Cross-validate decoding and write an HTML report, a JSON summary and a terminal table
    Validate {
        #[command(flatten)]
        tables: Tables,
        /// Output directory for report.html and validation.json
        #[arg(long, default_value = "auspex-validation")]
        out_dir: PathBuf,
        /// Window after onset, ms
        #[arg(long, default_value_t = 250.0)]
        window_ms: f64,
        /// Bin width, ms
        #[arg(long, default_value_t = 1.0)]
        bin_ms: f64,
        /// Count families to choose among (as for fit)
        #[arg(long, default_value = "all")]
        families: String,
        /// Cross-validation folds (stratified by stimulus)
        #[arg(long, default_value_t = 5)]
        folds: usize,
        /// Label shuffles for the information null
        #[arg(long, default_value_t = 200)]
        shuffles: usize,
        /// Seed for folds, shuffles and the rescaling randomisation
        #[arg(long, default_value_t = 1)]
        seed: u64,
        /// Threshold for the headline decision figures
        #[arg(long, default_value_t = auspex_engine::engine::DEFAULT_THRESHOLD)]
        threshold: f64,
        /// Minimum time before a threshold decision, ms
        #[arg(long, default_value_t = auspex_engine::engine::DEFAULT_MIN_TIME_MS)]
        min_time_ms: f64,
        /// List the stimuli in this order (comma-separated, every stimulus once) in the report
        /// [default: numeric when every name is a number, else as first met]
        #[arg(long, value_delimiter = ',')]
        stimulus_order: Vec<String>,
        /// No progress bar
        #[arg(long)]
        quiet: bool,
    },
    /// Self-test this machine: how many units × stimuli it decodes in real time with 10×
    /// headroom, and the batch → posterior latency over loopback (under a minute)
    Bench {
        /// Seconds of 1 kHz batches for each latency run
        #[arg(long, default_value_t = 10.0)]
        seconds: f64,
        /// Units for the latency runs
        #[arg(long, default_value_t = 256)]
        units: usize,
        /// Stimuli for the latency runs
        #[arg(long, default_value_t = 32)]
        stimuli: usize,
        /// Also print the figures as JSON
        #[arg(long)]
        json: bool,
        /// Time this model file instead of the synthetic size ladder (trials drawn from it)
        #[arg(long)]
        model: Option<PathBuf>,
        /// Decoder to time with --model
        #[arg(long, default_value = "order-stats", value_parser = parse_decoder)]
        decoder: Decoder,
        /// Skip the latency runs
        #[arg(long)]
        no_latency: bool,
        /// Latency over TCP with learning off and on (a refit after every trial), side by side
        #[arg(long, conflicts_with_all = ["model", "no_latency"])]
        learning: bool,
        /// Only the engine threads' scaling (auspexd --threads) at 1024, 2048 and 4096 units × 64 stimuli
        #[arg(long, conflicts_with_all = ["model", "learning"])]
        thread_scaling: bool,
        /// Engine threads of the latency runs' daemon (as auspexd --threads)
        #[arg(long, default_value_t = 1, value_name = "N")]
        threads: u32,
        /// Latency over TCP of one whole daemon and of N shards + a combiner (auspexd --role), side by side
        #[arg(long, value_name = "N", conflicts_with_all = ["model", "learning", "thread_scaling", "no_latency"])]
        shards: Option<u32>,
        /// `next --policy find-tuning`'s round trip over control while the daemon decodes
        /// (the size's stimuli are the set it chooses from), beside the frames' latency
        #[arg(long, conflicts_with_all = ["model", "learning", "thread_scaling", "no_latency", "shards"])]
        next: bool,
        /// Memory for looked-up COM-Poisson/empirical terms with --model, MB (as the daemon's flag)
        #[arg(long, value_name = "MB", default_value_t = LookupBudget::DEFAULT, value_parser = lookup_budget)]
        table_memory_mb: LookupBudget,
        /// Latency with N CPU-bound processes of ordinary priority beside it (started and ended
        /// here), normal vs real-time mode (auspexd --realtime), over tcp and ipc, in turns
        #[arg(long, value_name = "N", conflicts_with_all = ["model", "thread_scaling", "no_latency", "shards"])]
        under_load: Option<usize>,
        /// With --under-load: also M processes streaming through memory
        #[arg(long, value_name = "M", default_value_t = 0, requires = "under_load")]
        memory_load: usize,
        /// With --under-load: turns (each runs every mode once; normal and real-time alternate in order)
        #[arg(long, default_value_t = 5, requires = "under_load")]
        turns: usize,
        /// SCHED_FIFO priority of the real-time runs (as auspexd --realtime-priority)
        #[arg(long, value_name = "P", default_value_t = auspexd::realtime::DEFAULT_PRIORITY)]
        realtime_priority: i32,
        /// Cores of the real-time runs' threads (as auspexd --realtime-cpus)
        #[arg(long, value_name = "LIST", value_delimiter = ',')]
        realtime_cpus: Vec<usize>,
        /// One latency run over this transport, printed as JSON (what --under-load runs in each child)
        #[arg(long, hide = true, value_parser = ["tcp", "ipc"])]
        latency_once: Option<String>,
        /// With --next: the daemon in real-time mode (auspexd --realtime, with --realtime-priority
        /// and --realtime-cpus), as a rig runs it on a busy machine
        #[arg(long)]
        realtime: bool,
        /// Be a competing load until killed (what --under-load starts)
        #[arg(long, hide = true, value_parser = ["cpu", "memory"])]
        burn: Option<String>,
    },
    /// Merge many sessions' validation.json (e.g. from a cluster job array) into one CSV table
    Gather {
        /// validation.json files, or directories to search for them
        #[arg(required = true)]
        paths: Vec<PathBuf>,
        /// Output CSV (default: standard output)
        #[arg(long, short)]
        out: Option<PathBuf>,
    },
    /// Write a model as interchange JSON (the numbers the engine uses), or a recorded session as
    /// an NWB file (--nwb OUT --session REC [--model M])
    Export {
        /// Model file (with --nwb: decode the session with it, so each trial's decision and the
        /// per-bin posterior go into the file; without it, a learning daemon's recording is
        /// decoded with the models it learned, as it learned them)
        #[arg(long, required_unless_present = "nwb")]
        model: Option<PathBuf>,
        /// Output file (default: standard output)
        #[arg(long, short, conflicts_with = "nwb")]
        out: Option<PathBuf>,
        /// Write a recorded session (--session) as an NWB file here instead of the model as JSON
        #[arg(long, requires = "session")]
        nwb: Option<PathBuf>,
        /// With --nwb: the session recording (.apxs)
        #[arg(long, requires = "nwb")]
        session: Option<PathBuf>,
        #[command(flatten)]
        opts: DecodeOpts,
    },
    /// Print a model file's per-cell summary, or an NWB file's tables, columns and units (--nwb)
    Inspect {
        /// Model file (`auspex inspect today.apxm` or `--model today.apxm`)
        #[arg(value_name = "MODEL", required_unless_present_any = ["model", "nwb"])]
        file: Option<PathBuf>,
        /// Model file
        #[arg(long, conflicts_with = "file")]
        model: Option<PathBuf>,
        /// An NWB file instead: list its tables, their columns (type, example values) and its
        /// units with their spike counts — what the --nwb-* options can choose
        #[arg(long, conflicts_with_all = ["file", "model"])]
        nwb: Option<PathBuf>,
    },
    /// Run the bundled demo end to end: fit, start the daemon, replay the session live, monitor
    Demo {
        /// Output directory
        #[arg(long, default_value = "auspex-demo-out")]
        out_dir: PathBuf,
        /// Fewer tables on screen
        #[arg(long)]
        quiet: bool,
        /// Replay speed (times real time, a positive number)
        #[arg(long, default_value_t = 1.0, value_parser = positive_speed)]
        speed: f64,
        /// Replay as fast as the daemon accepts
        #[arg(long)]
        fast: bool,
        /// Plain text lines instead of the full-screen monitor
        #[arg(long)]
        plain: bool,
        /// Only the offline part (fit, decode, export)
        #[arg(long)]
        offline_only: bool,
        /// Live part without a model: the daemon learns from the session's labelled trials as
        /// they come (checked against `decode --prequential` of its recording)
        #[arg(long, conflicts_with = "offline_only")]
        learn: bool,
    },
    /// Run the daemon (same flags as `auspexd`)
    Daemon {
        #[command(flatten)]
        args: Box<auspexd::cli::DaemonArgs>,
    },
    /// Send a recorded session or CSV tables to a running daemon through its ingest socket
    Replay {
        /// Session recording (.apxs)
        #[arg(long, conflicts_with_all = ["spikes", "trials", "nwb"])]
        session: Option<PathBuf>,
        /// An NWB 2.x file (units and a trials table, --nwb-*), paced by its times
        #[arg(long, conflicts_with_all = ["spikes", "trials"])]
        nwb: Option<PathBuf>,
        #[command(flatten)]
        nwb_opts: NwbOpts,
        /// Spike table (with --trials)
        #[arg(long, requires = "trials")]
        spikes: Option<PathBuf>,
        /// Trial table (with --spikes)
        #[arg(long, requires = "spikes")]
        trials: Option<PathBuf>,
        /// Daemon ingest endpoint
        #[arg(long, default_value = auspex_proto::endpoints::INGEST)]
        to: String,
        /// Daemon control endpoint (for the acknowledgement)
        #[arg(long, default_value = auspex_proto::endpoints::CONTROL)]
        control: String,
        /// Times real time (a positive number)
        #[arg(long, default_value_t = 1.0, value_parser = positive_speed)]
        speed: f64,
        /// As fast as the daemon accepts
        #[arg(long)]
        fast: bool,
        /// Sender name
        #[arg(long, default_value = "auspex-replay")]
        sender: String,
        /// Send only these units' spikes, e.g. 101-112,130 (one acquisition machine's share for
        /// its shard; every watermark is kept)
        #[arg(long, value_name = "IDS")]
        units: Option<String>,
        /// Send only the spikes (with watermarks) or only the trial messages (onsets, labels,
        /// cancels); the session's start and end go with both. For a shard deployment: spikes to
        /// each shard, trials to the combiner's task endpoint
        #[arg(long, value_parser = ["spikes", "trials"])]
        only: Option<String>,
        /// Let a learning daemon refit at its own pace, as during a live recording (by default a
        /// replay asks it to learn in step with the session's trials, so any speed gives the
        /// frames of the real-time session and of `decode --prequential`)
        #[arg(long)]
        learn_at_own_pace: bool,
    },
    /// Send plain text lines (spike UNIT TICK, through TICK, onset TRIAL TICK [STIM], label, cancel,
    /// units … from TICK, session, end) to a daemon: a bridge for programs in any language
    Send {
        /// File or named pipe to read (default: standard input)
        input: Option<PathBuf>,
        /// Keep reading a file that is being appended to, until an `end` line
        #[arg(long)]
        follow: bool,
        /// Daemon ingest endpoint (or its task endpoint for task-control lines)
        #[arg(long, default_value = auspex_proto::endpoints::INGEST)]
        to: String,
        /// Sender name (each program that sends needs its own)
        #[arg(long, default_value = "auspex-send")]
        sender: String,
        /// Daemon control endpoint, asked at the end what it made of the lines
        #[arg(long, default_value = auspex_proto::endpoints::CONTROL)]
        control: String,
    },
    /// Show a daemon's state, model and counters
    Status {
        /// Daemon control endpoint
        #[arg(long, default_value = auspex_proto::endpoints::CONTROL)]
        control: String,
        /// Print JSON
        #[arg(long)]
        json: bool,
    },
    /// Change a running daemon's settings, reload its model, or ask for the next stimulus
    Steer {
        /// Daemon control endpoint
        #[arg(long, default_value = auspex_proto::endpoints::CONTROL)]
        control: String,
        #[command(subcommand)]
        what: Steer,
    },
    /// Watch a daemon live (full screen on a terminal, plain lines otherwise)
    Monitor {
        /// Daemon publish endpoint
        #[arg(long, default_value = auspex_proto::endpoints::PUBLISH)]
        from: String,
        /// Daemon control endpoint
        #[arg(long, default_value = auspex_proto::endpoints::CONTROL)]
        control: String,
        /// Plain text lines
        #[arg(long, conflicts_with = "json")]
        plain: bool,
        /// JSON lines
        #[arg(long)]
        json: bool,
    },
}

#[derive(Subcommand)]
enum Steer {
    /// Decision threshold and minimum time (apply to trials that open from now on)
    Policy {
        /// Decide when the top posterior reaches this, in (0, 1] (default: keep the current one)
        #[arg(long)]
        threshold: Option<f64>,
        /// ... but not before this many ms after onset (default: keep the current one)
        #[arg(long)]
        min_time_ms: Option<f64>,
        /// Instead: the accuracy threshold decisions must keep; threshold and minimum time come
        /// from the model's held-out record, refused when it cannot support the target
        /// (--threshold or --min-time-ms later replace the target)
        #[arg(long, conflicts_with_all = ["threshold", "min_time_ms"])]
        target_accuracy: Option<f64>,
    },
    /// Prior over stimuli, comma-separated in model order; "model" restores the model's
    Prior { prior: String },
    /// order-stats, inhomogeneous-poisson or count-only
    Decoder {
        #[arg(value_parser = ["order-stats", "inhomogeneous-poisson", "count-only"])]
        decoder: String,
    },
    /// Load a model file; open trials finish on the old one
    Reload { model: PathBuf },
    /// Learning during the session: freeze (keep the model, keep collecting trials), resume, or
    /// reset (forget the trials learned so far)
    Learn {
        #[arg(value_parser = ["freeze", "resume", "reset"])]
        action: String,
    },
    /// Fit on every trial learned so far and write it as a model file (as `auspex fit` writes)
    SaveLearned { path: PathBuf },
    /// Ask which stimulus to present next
    Next {
        /// balanced-blocks (every stimulus once per block), least-certain (the stimulus decoded
        /// worst so far) or find-tuning (learn each unit's preferred stimulus in the fewest
        /// trials; prints why on stderr)
        #[arg(long, default_value = "balanced-blocks", value_parser = ["balanced-blocks", "least-certain", "find-tuning", "improve-decoding"])]
        policy: String,
    },
}

fn runtime() -> anyhow::Result<tokio::runtime::Runtime> {
    Ok(tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()?)
}

fn main() {
    // Output piped into `head` or a closed pager ends the program quietly, as command-line tools
    // do, instead of a panic on the failed write.
    #[cfg(unix)]
    // SAFETY: restoring the default disposition of SIGPIPE at the start of main, before any
    // thread is spawned; no handler is installed.
    unsafe {
        libc::signal(libc::SIGPIPE, libc::SIG_DFL);
    }
    let cli = Cli::parse();
    auspex_engine::budget::set_mb(cli.memory_budget_mb);
    let r = match cli.cmd {
        Cmd::Simulate {
            scenario,
            model,
            out_dir,
            trials,
            seed,
            tick_rate,
            write_true_model,
        } => commands::simulate_cmd(
            scenario.as_deref(),
            model.as_deref(),
            &out_dir,
            trials,
            seed,
            tick_rate,
            write_true_model.as_deref(),
        ),
        Cmd::Fit {
            tables,
            out,
            window_ms,
            bin_ms,
            families,
            prior_from_frequencies,
            no_shrink,
            calibration,
            calibration_folds,
            min_time_ms,
            stimulus_order,
            unit_groups,
            cells,
            quiet,
        } => commands::fit_cmd(
            &tables.source(),
            &out,
            &commands::FitArgs {
                window_ms,
                bin_ms,
                families,
                prior_from_frequencies,
                shrink: !no_shrink,
                calibration,
                calibration_folds,
                min_time_ms,
                stimulus_order,
                unit_groups,
                cells,
                quiet,
            },
        )
        .map(|_| ()),
        Cmd::Decode {
            model,
            prequential: _,
            window_ms,
            bin_ms,
            families,
            learn_min_trials,
            refit_every_trials,
            tables,
            opts,
            out_dir,
        } => {
            let args = opts.args();
            match model {
                Some(m) => commands::decode_cmd(&m, &tables.source(), &out_dir, &args),
                None => commands::decode_prequential_cmd(
                    &tables.source(),
                    &out_dir,
                    &args,
                    &commands::PrequentialArgs {
                        window_ms,
                        bin_ms,
                        families,
                        min_trials: learn_min_trials,
                        every_trials: refit_every_trials,
                    },
                ),
            }
            .map(|_| ())
        }
        Cmd::Validate {
            tables,
            out_dir,
            window_ms,
            bin_ms,
            families,
            folds,
            shuffles,
            seed,
            threshold,
            min_time_ms,
            stimulus_order,
            quiet,
        } => commands::validate_cmd(
            &tables.source(),
            &out_dir,
            &commands::ValidateArgs {
                window_ms,
                bin_ms,
                families,
                folds,
                shuffles,
                seed,
                threshold,
                min_time_ms,
                stimulus_order,
            },
            quiet,
        )
        .map(|_| ()),
        // The daemon runs in this process on the runtime it has when deployed.
        Cmd::Bench { burn: Some(kind), .. } => auspex::bench::burn(if kind == "memory" { auspex::bench::Burn::Memory } else { auspex::bench::Burn::Cpu }),
        Cmd::Bench { latency_once: Some(transport), seconds, units, stimuli, realtime, realtime_priority, realtime_cpus, learning, .. } => (|| {
            if realtime {
                let plan = auspexd::realtime::Plan { priority: realtime_priority, cpus: realtime_cpus };
                plan.check().map_err(anyhow::Error::msg)?;
                // Before the runtime: its thread (the daemon's sockets and the measuring
                // client's, as a closed-loop program at the rig would run) takes the policy.
                auspexd::realtime::configure(plan);
            }
            auspexd::service::io_runtime().map_err(anyhow::Error::from).and_then(|rt| {
                rt.block_on(async {
                    let dir = tempfile::tempdir()?;
                    let l = auspex::bench::latency(units, stimuli, seconds, &transport, dir.path(), learning, 1).await?;
                    if realtime && auspexd::realtime::summary().starts_with("REFUSED") {
                        anyhow::bail!("real-time mode was refused: {}", auspexd::realtime::summary());
                    }
                    println!("{}", serde_json::to_string(&l)?);
                    Ok(())
                })
            })
        })(),
        Cmd::Bench { under_load: Some(cpu), memory_load, turns, seconds, units, stimuli, realtime_priority, realtime_cpus, json, learning, .. } => (|| {
            if !(seconds > 0.0 && units > 0 && stimuli > 1 && turns > 0) {
                anyhow::bail!("--seconds must be > 0, --units ≥ 1, --stimuli ≥ 2 and --turns ≥ 1");
            }
            let plan = auspexd::realtime::Plan { priority: realtime_priority, cpus: realtime_cpus };
            plan.check().map_err(anyhow::Error::msg)?;
            let out = auspex::bench::under_load(cpu, memory_load, turns, seconds, (units, stimuli), &plan, learning)?;
            if json {
                println!("{}", serde_json::to_string(&out)?);
            }
            Ok(())
        })(),
        Cmd::Bench { seconds, units, stimuli, json, model, decoder, no_latency, learning, thread_scaling, threads, shards, table_memory_mb, next, realtime, realtime_priority, realtime_cpus, .. } => (|| {
            if realtime {
                if !next {
                    anyhow::bail!("--realtime goes with --next (--under-load runs both modes itself)");
                }
                let plan = auspexd::realtime::Plan { priority: realtime_priority, cpus: realtime_cpus };
                plan.check().map_err(anyhow::Error::msg)?;
                auspexd::realtime::configure(plan);
            }
            Ok(())
        })().and_then(|()| auspexd::service::io_runtime().map_err(anyhow::Error::from)).and_then(|rt| {
            rt.block_on(async {
                if !(seconds > 0.0 && units > 0 && stimuli > 1) {
                    anyhow::bail!("--seconds must be > 0, --units ≥ 1 and --stimuli ≥ 2");
                }
                let opts = auspex::bench::Options {
                    latency_seconds: seconds,
                    latency_size: (units, stimuli),
                    model,
                    decoder,
                    latency: !no_latency,
                    table_memory: table_memory_mb,
                    learning,
                    thread_scaling,
                    threads,
                    shards: shards.unwrap_or(0),
                    next,
                };
                if !(0..=64).contains(&opts.shards) || opts.shards == 1 {
                    anyhow::bail!("--shards {}: give 2 to 64", opts.shards);
                }
                let out = auspex::bench::run(&opts).await?;
                if json {
                    println!("{}", serde_json::to_string(&out)?);
                }
                Ok(())
            })
        }),
        Cmd::Export { model, out, nwb: Some(nwb), session: Some(session), opts } => {
            let _ = out;
            let args = opts.args();
            commands::export_nwb_cmd(&nwb, &session, model.as_deref(), &args)
        }
        Cmd::Export { model, out, .. } => match model {
            Some(m) => commands::export_cmd(&m, out.as_deref()),
            None => Err(anyhow::anyhow!("give --model FILE (or --nwb OUT --session REC)")),
        },
        Cmd::ClosedLoopSim { units, stimuli, preference_spread, seeds, max_trials, through_daemon: true, policies, ingest, control, .. } => runtime().and_then(|rt| {
            rt.block_on(auspex::live::closed_loop::through_daemon_cmd(&units, &stimuli, preference_spread, seeds, max_trials as u64, &policies, &ingest, &control))
        }),
        Cmd::ClosedLoopSim { units, stimuli, preference_spread, seeds, max_trials, warmup_blocks, min_share, max_run, json, goal, accuracy, .. } => auspex::offline::steering::closed_loop_cmd(
            &units,
            &stimuli,
            preference_spread,
            seeds,
            max_trials,
            auspex_modelling::design::Constraints { warmup_blocks, min_share, max_run },
            if goal == "decoding" { auspex::offline::steering::Goal::Decoding(accuracy) } else { auspex::offline::steering::Goal::Tuning },
            json,
        ),
        Cmd::Gather { paths, out } => auspex::gather::gather_cmd(&paths, out.as_deref()),
        Cmd::Inspect { nwb: Some(path), .. } => auspex::nwb::Nwb::open(&path)
            .and_then(|f| f.summary())
            .map(|s| print!("{s}"))
            .map_err(anyhow::Error::from),
        Cmd::Inspect { file, model, .. } => match file.or(model) {
            Some(m) => commands::inspect_cmd(&m),
            None => Err(anyhow::anyhow!("give the model file: auspex inspect FILE")),
        },
        Cmd::Demo { out_dir, quiet, speed, fast, plain, offline_only, learn } => commands::demo_offline(&out_dir, quiet).and_then(|model| {
            if offline_only {
                return Ok(());
            }
            let model = (!learn).then_some(model);
            if learn && fast {
                eprintln!("note: with --fast the whole session passes before the learner's first refit, so nothing is decoded live; try --speed 10");
            }
            eprintln!("── live: starting the daemon{} and replaying the demo session {} ──", if learn { " with no model (it learns from the labelled trials)" } else { "" }, if fast { "as fast as it goes".to_string() } else { format!("at {speed}× real time") });
            let pace = if fast { Pace::Max } else { Pace::Speed(speed) };
            let view = if plain { View::Lines } else { View::auto() };
            runtime()?.block_on(auspex::session::live_demo(model.as_deref(), &out_dir, pace, view))?;
            eprintln!("validation report: {} (open it in a browser)", out_dir.join("validation").join("report.html").display());
            Ok(())
        }),
        Cmd::Daemon { args } => std::process::exit(auspexd::cli::run_cli(*args)),
        Cmd::Replay { session, nwb, nwb_opts, spikes, trials, to, control, speed, fast, sender, units, only, learn_at_own_pace } => runtime().and_then(|rt| {
            rt.block_on(async {
                let source = match (session, spikes, trials) {
                    _ if nwb.is_some() => ReplaySource::Nwb { path: nwb.unwrap_or_default(), choice: nwb_opts.choice() },
                    (Some(p), _, _) => ReplaySource::Session(p),
                    (None, Some(spikes), Some(trials)) => ReplaySource::Tables { spikes, trials },
                    _ => anyhow::bail!("give --session FILE, --nwb FILE, or --spikes and --trials"),
                };
                let (msgs, rate) = auspex::live::replay_messages(&source, &control, &sender, !learn_at_own_pace).await?;
                // A whole recording's find-tuning requests are asked again at their points.
                let choices = match &source {
                    ReplaySource::Session(p) if units.is_none() && only.is_none() => auspex::live::Choices::of(&auspex::wire::read_recording(p)?),
                    _ => auspex::live::Choices::default(),
                };
                let units = units.as_deref().map(auspex::wire::parse_unit_ranges).transpose()?;
                let msgs = auspex::wire::select_messages(msgs, units.as_ref(), only.as_deref(), &sender);
                let pace = if fast { Pace::Max } else { Pace::Speed(speed) };
                let before = auspex::live::health_now(&control).await;
                let (took, check) = auspex::live::replay_asking(&to, &control, &msgs, &sender, rate, pace, std::io::stderr().is_terminal(), &choices).await?;
                eprintln!("sent {} messages in {:.2} s; the daemon acknowledged the last one", msgs.len(), took.as_secs_f64());
                if check.asked > 0 {
                    eprintln!("next asked again at the recording's {} find-tuning and improve-decoding requests: {} answered as recorded", check.asked, check.same);
                    if check.same < check.asked {
                        for (n, want, got) in &check.differ {
                            eprintln!("  request {n}: recorded {want}, now {got}");
                        }
                        anyhow::bail!("{} of {} choices differ from the recording's: is the daemon started with the recording's --seed and --steer-* settings (and --stimuli, if the session did not declare its set)?", check.asked - check.same, check.asked);
                    }
                }
                let last = msgs.last().map(|m| m.seq).unwrap_or(0);
                let taken = auspex::live::taken_since(&control, before, &sender, last).await;
                if let Some(line) = taken.as_ref().and_then(|t| t.line()) {
                    eprintln!("{line}");
                }
                let spikes: u64 = msgs.iter().map(|m| match &m.body {
                    Some(v1::inbound::Body::Spikes(b)) => b.units.len() as u64,
                    _ => 0,
                }).sum();
                if taken.as_ref().is_some_and(|t| t.nothing_matched(spikes)) {
                    anyhow::bail!("the session does not fit the daemon's model (see the counts above): check unit ids and stimulus names against `auspex status`");
                }
                Ok(())
            })
        }),
        Cmd::Send { input, follow, to, sender, control } => runtime().and_then(|rt| rt.block_on(async {
            let reader: Box<dyn std::io::BufRead + Send> = match &input {
                Some(p) => Box::new(std::io::BufReader::new(
                    std::fs::File::open(p).map_err(|e| anyhow::anyhow!("{}: cannot open: {e}", p.display()))?,
                )),
                None => Box::new(std::io::BufReader::new(std::io::stdin())),
            };
            let before = auspex::live::health_now(&control).await;
            let s = auspex::send::send(reader, &to, &sender, follow).await?;
            eprintln!("sent {} ({}) as {sender:?}{}", auspex::counted(s.messages, "message", "messages"), auspex::counted(s.spikes, "spike", "spikes"),
                if s.bad_lines > 0 { format!("; {} lines were refused (see above)", s.bad_lines) } else { String::new() });
            // What the daemon made of them (it has taken them once it answers after the end).
            let taken = auspex::live::taken_since(&control, before, &sender, s.messages).await;
            if let Some(line) = taken.as_ref().and_then(|t| t.line()) {
                eprintln!("{line}");
            }
            if s.bad_lines > 0 {
                anyhow::bail!("{} lines were refused", s.bad_lines);
            }
            if taken.as_ref().is_some_and(|t| t.nothing_matched(s.spikes)) {
                anyhow::bail!("the lines do not fit the daemon's model (see the counts above): check unit ids and stimulus names against `auspex status`");
            }
            Ok(())
        })),
        Cmd::Status { control, json } => runtime().and_then(|rt| rt.block_on(async {
            let s = auspex::live::status(&control).await?;
            if json {
                println!("{}", auspex::status::status_json(&s));
            } else {
                print!("{}", auspex::status::status_text(&s));
            }
            Ok(())
        })),
        Cmd::Steer { control, what } => runtime().and_then(|rt| rt.block_on(async {
            use auspex::live::steer;
            use v1::control_request::Body as B;
            let body = match what {
                Steer::Policy { threshold, min_time_ms, target_accuracy } => steer::policy(&control, threshold, min_time_ms, target_accuracy).await?,
                Steer::Prior { prior } => B::SetPrior(v1::SetPrior { prior: if prior == "model" { vec![] } else { parse_prior(&prior).map_err(|e| anyhow::anyhow!(e))? } }),
                Steer::Decoder { decoder } => B::SetDecoder(v1::SetDecoder { decoder }),
                Steer::Reload { model } => steer::reload(&model),
                Steer::Next { policy } => B::NextStimulus(v1::NextStimulus { policy }),
                Steer::Learn { action } => B::SetLearning(v1::SetLearning { action }),
                Steer::SaveLearned { path } => steer::save_learned(&path)?,
            };
            steer::send(&control, body).await
        })),
        Cmd::Monitor { from, control, plain, json } => runtime().and_then(|rt| rt.block_on(async {
            let view = if json { View::Json } else if plain { View::Lines } else { View::auto() };
            let (tx, rx) = tokio::sync::watch::channel(false);
            tokio::spawn(async move {
                let _ = tokio::signal::ctrl_c().await;
                let _ = tx.send(true);
            });
            auspex::session::monitor(&from, &control, view, rx).await.map(|_| ())
        })),
    };
    if let Err(e) = r {
        if let Some(i) = e.downcast_ref::<auspex::live::Interrupted>() {
            eprintln!("auspex: {i}");
            std::process::exit(130);
        }
        eprintln!("auspex: error: {e:#}");
        std::process::exit(1);
    }
}

/// Parses a calibration method name, listing the choices when it is unknown.
fn parse_calibration(s: &str) -> Result<auspex_engine::calibration::CalibrationMethod, String> {
    use auspex_engine::calibration::CalibrationMethod;
    CalibrationMethod::parse(s).ok_or_else(|| {
        format!(
            "unknown calibration {s:?}; choose one of: {}",
            CalibrationMethod::ALL.map(|m| m.name()).join(", ")
        )
    })
}
