//! `auspex`: the command-line client. Thin glue over the `auspex` library.

use auspex::commands::{self, DecodeArgs};
use auspex_engine::engine::Decoder;
use clap::{Parser, Subcommand};
use std::path::PathBuf;

#[derive(Parser)]
#[command(
    name = "auspex",
    version,
    about = "Decode which stimulus spiking units signal, bin by bin — offline and live"
)]
struct Cli {
    #[command(subcommand)]
    cmd: Cmd,
}

fn parse_decoder(s: &str) -> Result<Decoder, String> {
    Decoder::parse(s).ok_or_else(|| {
        format!("unknown decoder `{s}`: use order-stats, inhomogeneous-poisson or count-only")
    })
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

#[derive(clap::Args, Clone)]
struct Tables {
    /// Spike table: CSV with columns unit,time_s
    #[arg(long)]
    spikes: PathBuf,
    /// Trial table: CSV with columns trial,onset_s,stimulus
    #[arg(long)]
    trials: PathBuf,
    /// Acquisition clock ticks per second (times are rounded to ticks on reading)
    #[arg(long, default_value_t = 1e6)]
    tick_rate: f64,
}

#[derive(clap::Args, Clone)]
struct DecodeOpts {
    /// order-stats (default), inhomogeneous-poisson or count-only
    #[arg(long, default_value = "order-stats", value_parser = parse_decoder)]
    decoder: Decoder,
    /// Decide when the top posterior reaches this
    #[arg(long, default_value_t = 0.9)]
    threshold: f64,
    /// ... but not before this many ms after onset
    #[arg(long, default_value_t = 20.0)]
    min_time_ms: f64,
    /// Prior over stimuli, comma-separated in model order (default: the model's)
    #[arg(long, value_parser = parse_prior)]
    prior: Option<Vec<f64>>,
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
        /// Count families to choose among: comma-separated (poisson, nb, com, empirical) or all
        #[arg(long, default_value = "all")]
        families: String,
        /// Prior from the stimuli's training frequencies instead of equal
        #[arg(long)]
        prior_from_frequencies: bool,
        /// Do not print the per-cell table
        #[arg(long)]
        quiet: bool,
    },
    /// Decode every trial offline: posteriors.csv and decisions.csv
    Decode {
        /// Model file
        #[arg(long)]
        model: PathBuf,
        #[command(flatten)]
        tables: Tables,
        #[command(flatten)]
        opts: DecodeOpts,
        /// Output directory
        #[arg(long, default_value = ".")]
        out_dir: PathBuf,
    },
    /// Write a model as interchange JSON (the numbers the engine uses)
    Export {
        /// Model file
        #[arg(long)]
        model: PathBuf,
        /// Output file (default: standard output)
        #[arg(long, short)]
        out: Option<PathBuf>,
    },
    /// Print a model file's per-cell summary
    Inspect {
        /// Model file
        #[arg(long)]
        model: PathBuf,
    },
    /// Run the bundled demo end to end
    Demo {
        /// Output directory
        #[arg(long, default_value = "auspex-demo-out")]
        out_dir: PathBuf,
        /// Fewer tables on screen
        #[arg(long)]
        quiet: bool,
    },
}

fn main() {
    let cli = Cli::parse();
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
            quiet,
        } => commands::fit_cmd(
            &tables.spikes,
            &tables.trials,
            &out,
            window_ms,
            bin_ms,
            &families,
            prior_from_frequencies,
            tables.tick_rate,
            quiet,
        )
        .map(|_| ()),
        Cmd::Decode {
            model,
            tables,
            opts,
            out_dir,
        } => {
            let args = DecodeArgs {
                decoder: opts.decoder,
                threshold: opts.threshold,
                min_time_ms: opts.min_time_ms,
                prior: opts.prior,
            };
            commands::decode_cmd(
                &model,
                &tables.spikes,
                &tables.trials,
                &out_dir,
                &args,
                tables.tick_rate,
            )
            .map(|_| ())
        }
        Cmd::Export { model, out } => commands::export_cmd(&model, out.as_deref()),
        Cmd::Inspect { model } => commands::inspect_cmd(&model),
        Cmd::Demo { out_dir, quiet } => commands::demo_offline(&out_dir, quiet).map(|_| ()),
    };
    if let Err(e) = r {
        eprintln!("auspex: error: {e:#}");
        std::process::exit(1);
    }
}
