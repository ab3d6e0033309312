//! The command implementations behind `auspex <command>`.

use crate::fitting::{cell_table, fit_dataset, parse_families};
use crate::offline::{run_dataset, score, write_decisions, CsvSink};
use crate::tables::{write_dataset, Source};
use anyhow::{bail, Context};
use auspex_engine::calibration::{Calibration, CalibrationMethod};
use auspex_engine::engine::{DecisionPolicy, Decoder, EngineConfig};
use auspex_engine::{Dataset, Model};
use auspex_modelling::calibrate::EvidenceRecord;
use auspex_modelling::calibrate::{calibrate, held_out_set};
use auspex_modelling::fit::FitOptions;
use auspex_modelling::simulate::{simulate, Scenario, SimOptions};
use auspex_proto::model_file::{load_model, save_model};
use std::collections::HashMap;
use std::io::IsTerminal;
use std::path::{Path, PathBuf};
use std::sync::Arc;

/// Below this many labelled trials a stimulus gets a warning at fit.
pub const FEW_TRIALS: usize = 3;

/// Reads a scenario file (TOML).
pub fn read_scenario(path: &Path) -> anyhow::Result<Scenario> {
    let text = std::fs::read_to_string(path)
        .with_context(|| format!("{}: cannot read scenario", path.display()))?;
    toml::from_str(&text).map_err(|e| anyhow::anyhow!("{}: {}", path.display(), e))
}

/// `simulate`: from a scenario, or from a model with explicit settings.
pub fn simulate_cmd(
    scenario: Option<&Path>,
    model: Option<&Path>,
    out_dir: &Path,
    trials: Option<u32>,
    seed: Option<u64>,
    tick_rate: f64,
    true_model_out: Option<&Path>,
) -> anyhow::Result<()> {
    let (model, mut opts) = match (scenario, model) {
        (Some(s), None) => {
            let sc = read_scenario(s)?;
            let spec = sc
                .true_model()
                .map_err(|e| anyhow::anyhow!("{}: {e}", s.display()))?;
            if let Some(p) = true_model_out {
                save_model(p, &spec, &format!("true model of scenario {}", s.display()))?;
                eprintln!("true model written to {}", p.display());
            }
            (Model::new(spec)?, sc.sim_options())
        }
        (None, Some(m)) => {
            if true_model_out.is_some() {
                bail!("--write-true-model needs --scenario (the model given is already the truth)");
            }
            let (_, model) = load_model(m)?;
            (
                model,
                SimOptions {
                    trials_per_stimulus: 20,
                    gap_s: (0.2, 0.4),
                    spontaneous_hz: 2.0,
                    tick_rate_hz: tick_rate,
                    seed: 1,
                },
            )
        }
        _ => bail!("give exactly one of --scenario or --model"),
    };
    if let Some(t) = trials {
        opts.trials_per_stimulus = t;
    }
    if let Some(s) = seed {
        opts.seed = s;
    }
    opts.check(
        model.bin_width_s() * model.n_bins() as f64,
        model.n_stimuli(),
    )
    .map_err(|e| anyhow::anyhow!("{e}"))?;
    let data = simulate(&model, &opts);
    std::fs::create_dir_all(out_dir)
        .with_context(|| format!("{}: cannot create directory", out_dir.display()))?;
    let (sp, tr) = (out_dir.join("spikes.csv"), out_dir.join("trials.csv"));
    write_dataset(&data, &sp, &tr).with_context(|| format!("writing {}", out_dir.display()))?;
    eprintln!(
        "wrote {} spikes to {} and {} trials to {} (seed {})",
        data.spikes.len(),
        sp.display(),
        data.trials.len(),
        tr.display(),
        opts.seed
    );
    Ok(())
}

/// Settings of `fit`.
#[derive(Clone, Debug)]
pub struct FitArgs {
    /// Window after onset, ms.
    pub window_ms: f64,
    /// Bin width, ms.
    pub bin_ms: f64,
    /// Count families (comma-separated or `all`).
    pub families: String,
    /// Prior from training frequencies.
    pub prior_from_frequencies: bool,
    /// Empirical Bayes shrinkage of few-trial cells.
    pub shrink: bool,
    /// Recalibration of the posterior, fitted on held-out folds.
    pub calibration: CalibrationMethod,
    /// Folds for the calibration's held-out decoding (0: none, no threshold evidence).
    pub calibration_folds: usize,
    /// Minimum decision time the threshold evidence is replayed with, ms.
    pub min_time_ms: f64,
    /// The order to list stimuli in (empty: numeric if every name is a number, else as first met).
    pub stimulus_order: Vec<String>,
    /// Unit ids at which a new unit group starts (empty: one group; see `auspexd --role shard`).
    pub unit_groups: Vec<u32>,
    /// Print the per-cell table (else one line of the families chosen).
    pub cells: bool,
    /// Print nothing about the cells.
    pub quiet: bool,
}

impl Default for FitArgs {
    fn default() -> Self {
        FitArgs {
            window_ms: 250.0,
            bin_ms: 1.0,
            families: "all".into(),
            prior_from_frequencies: false,
            shrink: true,
            calibration: DEFAULT_CALIBRATION,
            calibration_folds: 5,
            min_time_ms: DecisionPolicy::default().min_time_s * 1000.0,
            stimulus_order: Vec::new(),
            unit_groups: Vec::new(),
            cells: false,
            quiet: false,
        }
    }
}

/// The recalibration `fit` applies unless told otherwise.
pub const DEFAULT_CALIBRATION: CalibrationMethod = auspex_modelling::calibrate::DEFAULT_METHOD;

/// `fit`: plans and fits the cells, calibrates on held-out folds, writes the model file.
pub fn fit_cmd(source: &Source, out: &Path, args: &FitArgs) -> anyhow::Result<Model> {
    let opts = FitOptions {
        bin_width_s: args.bin_ms / 1000.0,
        window_s: args.window_ms / 1000.0,
        families: parse_families(&args.families)?,
        prior_from_frequencies: args.prior_from_frequencies,
        bandwidth: Default::default(),
        shrinkage: if args.shrink {
            auspex_modelling::fit::Shrinkage::EmpiricalBayes
        } else {
            auspex_modelling::fit::Shrinkage::Off
        },
    };
    let quiet = args.quiet;
    let t_all = std::time::Instant::now();
    let (mut data, report) = source.load(opts.window_s)?;
    eprintln!("{report}");
    order_stimuli(&mut data, &args.stimulus_order, source)?;
    if !args.unit_groups.is_empty() {
        // Checked before the fit, which takes a while.
        let mut ids = data.units.clone();
        ids.sort_unstable();
        ids.dedup();
        group_starts(&ids, &args.unit_groups)?;
    }
    let t0 = std::time::Instant::now();
    // Fitted and calibrated with the stimuli in the order they are met, stored in the order
    // they are presented: no figure depends on a listing order or on names.
    let presented = data.stimulus_names();
    let data = data.in_met_order();
    let (mut spec, plan) = fit_dataset(&data, &opts, std::io::stderr().is_terminal() && !quiet)?;
    for (name, &n) in plan.stimuli.iter().zip(&plan.trials_per_stimulus) {
        if (n as usize) < FEW_TRIALS {
            eprintln!(
                "warning: stimulus {name:?} has only {n} labelled trial{} in {}: its cells lean on each unit's pooled data (see \"Few trials\" in the README), and `auspex validate` needs at least 2",
                if n == 1 { "" } else { "s" },
                source.describe()
            );
        }
    }
    if !quiet {
        let table = cell_table(&auspex_modelling::fit::reorder_spec(
            spec.clone(),
            &presented,
        )?);
        if args.cells {
            print!("{table}");
        } else if let Some(last) = table.lines().last() {
            // The families chosen; the table itself with --cells (or `auspex inspect`).
            println!("{last} (--cells for the table)");
        }
    }
    let cells_s = t0.elapsed().as_secs_f64();
    eprintln!(
        "fitted {} units × {} stimuli ({} cells, {} bins of {} ms) in {cells_s:.1} s; {} without a label were not used",
        spec.units.len(),
        spec.stimuli.len(),
        spec.cells.len(),
        spec.n_bins,
        args.bin_ms,
        crate::counted(plan.unlabelled_trials as u64, "trial", "trials"),
    );
    if args.calibration_folds > 0 {
        match calibrate_spec(&data, &opts, &spec.stimuli, args) {
            Ok(c) => {
                eprint!("{}", calibration_summary(&c));
                spec.calibration = c;
            }
            Err(e) => eprintln!(
                "warning: the model is not calibrated ({e}); its thresholds carry no held-out evidence and `--target-accuracy` will refuse it"
            ),
        }
    }
    let mut spec = auspex_modelling::fit::reorder_spec(spec, &presented)?;
    spec.unit_groups = group_starts(&spec.units, &args.unit_groups)?;
    if !spec.unit_groups.is_empty() {
        let mut sizes = Vec::new();
        let mut a = 0;
        for &s in spec
            .unit_groups
            .iter()
            .chain([spec.units.len() as u32].iter())
        {
            sizes.push(format!(
                "{} units from id {}",
                s - a,
                spec.units[a as usize]
            ));
            a = s;
        }
        eprintln!("unit groups (one per shard machine): {}", sizes.join("; "));
    }
    let model = Model::new(spec.clone())?;
    save_model(out, &spec, &source.canonical())?;
    eprintln!(
        "model written to {} ({:.1} s in all: the cells {:.1} s, calibration and the rest {:.1} s)",
        out.display(),
        t_all.elapsed().as_secs_f64(),
        cells_s,
        t_all.elapsed().as_secs_f64() - cells_s
    );
    Ok(model)
}

/// The unit index at which each group starts, from the unit ids that start them (`fit
/// --unit-groups`): group g holds the units with ids from its starting id up to the next one.
pub fn group_starts(units: &[u32], first_ids: &[u32]) -> anyhow::Result<Vec<u32>> {
    if first_ids.is_empty() {
        return Ok(Vec::new());
    }
    if units.windows(2).any(|w| w[0] >= w[1]) {
        anyhow::bail!("--unit-groups needs the model's units in ascending id order");
    }
    let mut out = Vec::new();
    let mut prev: Option<u32> = None;
    for &id in first_ids {
        if prev.is_some_and(|p| id <= p) {
            anyhow::bail!("--unit-groups {id}: give the first unit ids in ascending order");
        }
        let i = units.partition_point(|&u| u < id) as u32;
        let before = out.last().copied().unwrap_or(0);
        if i == before || i as usize == units.len() {
            anyhow::bail!(
                "--unit-groups {id}: the group {} would have no unit (the model's unit ids run {}..={})",
                if i as usize == units.len() { "starting there" } else { "before it" },
                units.first().copied().unwrap_or(0),
                units.last().copied().unwrap_or(0)
            );
        }
        out.push(i);
        prev = Some(id);
    }
    Ok(out)
}

/// Cross-validated calibration of a model fitted on `data` with `opts`.
fn calibrate_spec(
    data: &auspex_engine::Dataset,
    opts: &FitOptions,
    stimuli: &[String],
    args: &FitArgs,
) -> anyhow::Result<Calibration> {
    let t0 = std::time::Instant::now();
    let bar = crate::progress::spinner(
        std::io::stderr().is_terminal() && !args.quiet,
        "calibrating on held-out folds",
    );
    let set = held_out_set(data, opts, stimuli, args.calibration_folds, 1, &|p| {
        bar.tick();
        p.assemble(crate::fitting::fit_cells(p, false))
    })?;
    bar.finish_and_clear();
    let c = calibrate(&set, args.calibration, args.min_time_ms / 1000.0);
    tracing::debug!(seconds = t0.elapsed().as_secs_f64(), "calibrated");
    Ok(c)
}

/// The lines `fit` prints about a calibration.
pub fn calibration_summary(c: &Calibration) -> String {
    use std::fmt::Write;
    let mut s = String::new();
    let _ = writeln!(
        s,
        "calibration: {} (β {}{}), fitted on {} held-out trials ({} folds); held-out log loss {:.4} → {:.4} nats per bin",
        c.method.name(),
        c.beta_text(),
        if c.floor > 0.0 {
            format!(", prior share ε {}", c.floor)
        } else {
            String::new()
        },
        c.held_out_trials,
        c.folds,
        c.log_loss_uncalibrated,
        c.log_loss_calibrated
    );
    let kept: Vec<String> = c
        .evidence
        .iter()
        .filter(|e| e.threshold >= 0.8 && e.threshold <= 0.99)
        .map(|e| {
            format!(
                "{} → {:.3}{}",
                e.threshold,
                e.accuracy(),
                if e.kept() { "" } else { " (broken)" }
            )
        })
        .collect();
    let broken = c
        .evidence
        .iter()
        .filter(|e| e.threshold >= 0.8 && e.threshold <= 0.99 && !e.kept())
        .count();
    let _ = writeln!(
        s,
        "promises (held-out accuracy of all decisions at each threshold, cross-fitted; a promise is the threshold decisions'): {} — {}",
        if broken == 0 {
            "every threshold from 0.8 to 0.99 kept".to_string()
        } else {
            format!("{broken} broken")
        },
        kept.join(", ")
    );
    s
}

/// Decoding settings from the command line.
#[derive(Clone, Debug)]
pub struct DecodeArgs {
    /// Decoder.
    pub decoder: Decoder,
    /// Threshold.
    pub threshold: f64,
    /// Minimum time, ms.
    pub min_time_ms: f64,
    /// Prior override.
    pub prior: Option<Vec<f64>>,
    /// Choose the threshold from the model's held-out record so decisions keep this accuracy.
    pub target_accuracy: Option<f64>,
    /// Apply the model's calibration.
    pub calibrated: bool,
}

impl Default for DecodeArgs {
    fn default() -> Self {
        let p = DecisionPolicy::default();
        DecodeArgs {
            decoder: Decoder::default(),
            threshold: p.threshold,
            min_time_ms: p.min_time_s * 1000.0,
            prior: None,
            target_accuracy: None,
            calibrated: true,
        }
    }
}

impl DecodeArgs {
    /// Engine config for a clock.
    pub fn config(&self, tick_rate: f64) -> EngineConfig {
        let mut c = EngineConfig::new(tick_rate);
        c.decoder = self.decoder;
        c.policy = DecisionPolicy {
            threshold: self.threshold,
            min_time_s: self.min_time_ms / 1000.0,
        };
        c.prior = self.prior.clone();
        c.calibrated = self.calibrated;
        c
    }

    /// With a target accuracy: the threshold and minimum time from `model`'s held-out record
    /// (printed with their evidence), or a refusal that says why.
    pub fn resolve_target(&mut self, model: &Model) -> anyhow::Result<()> {
        let Some(target) = self.target_accuracy else {
            return Ok(());
        };
        let (threshold, min_time_s, line) =
            promise_for(model, target, self.decoder, self.calibrated)?;
        eprintln!("{line}");
        self.threshold = threshold;
        self.min_time_ms = min_time_s * 1000.0;
        Ok(())
    }
}

/// The threshold and minimum time that keep `target` by `model`'s held-out record, with a line
/// stating the evidence; refused where the evidence does not apply or cannot support the target.
pub fn promise_for(
    model: &Model,
    target: f64,
    decoder: Decoder,
    calibrated: bool,
) -> anyhow::Result<(f64, f64, String)> {
    // The daemon's rule, so decode and the daemon choose and refuse alike.
    let mut cfg = EngineConfig::new(1.0);
    cfg.decoder = decoder;
    cfg.calibrated = calibrated;
    let (policy, evidence) = auspex_engine::engine::policy_for_target(target, Some(model), &cfg)
        .map_err(|e| anyhow::anyhow!("--target-accuracy {target}: {e}"))?;
    let line = format!(
        "target accuracy {target}: deciding at threshold {} after {:.0} ms — {evidence}",
        policy.threshold,
        policy.min_time_s * 1000.0
    );
    Ok((policy.threshold, policy.min_time_s, line))
}

/// `decode`: returns the accuracy.
pub fn decode_cmd(
    model_path: &Path,
    source: &Source,
    out_dir: &Path,
    args: &DecodeArgs,
) -> anyhow::Result<f64> {
    let (_, model) = load_model(model_path)?;
    let model = Arc::new(model);
    let mut args = args.clone();
    args.resolve_target(&model)
        .with_context(|| format!("{}", model_path.display()))?;
    let args = &args;
    let window_s = model.bin_width_s() * model.n_bins() as f64;
    let (data, report) = source.load(window_s)?;
    eprintln!("{report}");
    let cfg = args.config(data.tick_rate_hz);
    if cfg.calibrated && model.calibration().is_active() && !cfg.applies_calibration() {
        eprintln!(
            "note: the model's calibration ({}) was fitted for the order-stats decoder; {} posteriors are raw",
            model.calibration().method.name(),
            cfg.decoder.name()
        );
    }
    std::fs::create_dir_all(out_dir)
        .with_context(|| format!("{}: cannot create directory", out_dir.display()))?;
    let post_path = out_dir.join("posteriors.csv");
    let f = std::fs::File::create(&post_path)
        .with_context(|| format!("{}: cannot create", post_path.display()))?;
    let mut sink = CsvSink::new(
        model.stimuli(),
        &data,
        Some(std::io::BufWriter::with_capacity(1 << 20, f)),
    );
    let counters = run_dataset(model.clone(), &data, cfg, &mut sink)?;
    let rows = sink
        .finish()
        .with_context(|| format!("writing {}", post_path.display()))?;
    let dec_path = out_dir.join("decisions.csv");
    write_decisions(&dec_path, model.stimuli(), &rows)
        .with_context(|| format!("writing {}", dec_path.display()))?;
    let sc = score(model.stimuli(), &rows);
    if rows.is_empty() {
        bail!(
            "{}: no trial to decode (the data hold {} trials; is this the right file?)",
            source.describe(),
            data.trials.len()
        );
    }
    // Decoding the very trials the model was fitted on flatters it: say so.
    let in_sample = auspex_proto::model_file::training_data(model_path) == source.canonical();
    if counters.unknown_unit_spikes > 0 {
        eprintln!(
            "note: {} spikes came from units the model does not have and were not used",
            counters.unknown_unit_spikes
        );
    }
    println!(
        "{}: {} trials decided, {}accuracy {:.1}% of {} labelled ({} correct), mean decision at {:.1} ms, {:.0}% before the window end",
        args.decoder.name(),
        rows.len(),
        if in_sample { "IN-SAMPLE " } else { "" },
        100.0 * sc.accuracy(),
        sc.labelled,
        sc.correct,
        (sc.mean_bin + 1.0) * model.bin_width_s() * 1000.0,
        100.0 * sc.early_share
    );
    if in_sample {
        eprintln!("note: in sample — the model was fitted on these very trials, so this accuracy flatters it; `auspex validate` gives held-out figures");
    }
    eprintln!("wrote {} and {}", post_path.display(), dec_path.display());
    Ok(sc.accuracy())
}

/// Settings of `decode --prequential`.
#[derive(Clone, Debug)]
pub struct PrequentialArgs {
    /// Window, ms (tables, or a recording made without learning).
    pub window_ms: f64,
    /// Bin width, ms.
    pub bin_ms: f64,
    /// Count families.
    pub families: String,
    /// Minimum labelled trials per stimulus before a stimulus or unit enters the model.
    pub min_trials: u32,
    /// Refit after this many labelled trials (where the recording does not say).
    pub every_trials: u32,
}

/// `decode --prequential`: every trial decoded with a model learned only from the trials
/// labelled before it opened. Returns the accuracy of the decided, labelled trials.
pub fn decode_prequential_cmd(
    source: &Source,
    out_dir: &Path,
    args: &DecodeArgs,
    p: &PrequentialArgs,
) -> anyhow::Result<f64> {
    use crate::prequential::{run_recording, tables_as_recording, write_decisions, Schedule};
    if args.target_accuracy.is_some() {
        bail!("--target-accuracy needs a fitted model's held-out record; with --prequential give --threshold");
    }
    let mut opts = auspex_modelling::learn::LearnOptions {
        fit: FitOptions {
            bin_width_s: p.bin_ms / 1000.0,
            window_s: p.window_ms / 1000.0,
            families: parse_families(&p.families)?,
            ..FitOptions::default()
        },
        min_trials_per_stimulus: p.min_trials.max(1),
        ..Default::default()
    };
    let rec = match source {
        Source::Session(path) => crate::wire::read_recording(path)?,
        Source::Tables { .. } | Source::Nwb { .. } => {
            let (data, report) = source.load(opts.fit.window_s)?;
            eprintln!("{report}");
            let wt = (opts.fit.window_s * data.tick_rate_hz).round() as i64;
            tables_as_recording(&data, wt)
        }
    };
    if let Some(o) = crate::prequential::recorded_options(&rec) {
        eprintln!(
            "the recording is of a learning daemon with {} learned-model swaps: refitting at the same points with its settings ({} ms window, {} ms bins)",
            rec.learned.iter().filter(|(_, m)| !m.reset).count(),
            o.fit.window_s * 1000.0,
            o.fit.bin_width_s * 1000.0
        );
        opts = o;
    } else {
        eprintln!(
            "refitting every {} labelled trials; a refit applies to the trials that open after it",
            p.every_trials
        );
    }
    std::fs::create_dir_all(out_dir)
        .with_context(|| format!("{}: cannot create directory", out_dir.display()))?;
    let post_path = out_dir.join("posteriors.csv");
    let mut f = std::io::BufWriter::with_capacity(
        1 << 20,
        std::fs::File::create(&post_path)
            .with_context(|| format!("{}: cannot create", post_path.display()))?,
    );
    use std::io::Write;
    writeln!(f, "trial,bin,stimulus,posterior")?;
    let (run, names, _) = run_recording(
        &rec,
        &opts,
        &args.config(rec.dataset.tick_rate_hz),
        &Schedule {
            every_trials: p.every_trials,
        },
        Some(&mut f),
        false,
    )?;
    f.flush()
        .with_context(|| format!("writing {}", post_path.display()))?;
    let dec_path = out_dir.join("decisions.csv");
    write_decisions(&dec_path, &run.decisions, &names)
        .with_context(|| format!("writing {}", dec_path.display()))?;
    let labelled: Vec<(&crate::offline::DecisionRow, &String)> = run
        .decisions
        .iter()
        .zip(&names)
        .filter(|(r, _)| r.true_stimulus.is_some())
        .collect();
    let correct = labelled
        .iter()
        .filter(|(r, n)| r.true_stimulus.as_deref() == Some(n.as_str()))
        .count();
    let acc = correct as f64 / labelled.len().max(1) as f64;
    println!(
        "prequential {}: {} applied ({} from the recording's swap points), {} decided, accuracy {:.1}% of {} labelled ({} correct); {} trials opened before the first model (learned from, not decoded); {} labelled trials learned",
        args.decoder.name(),
        crate::counted(run.models.len() as u64, "model", "models"),
        if run.recorded_swaps { "all" } else { "none" },
        crate::counted(run.decisions.len() as u64, "trial", "trials"),
        100.0 * acc,
        labelled.len(),
        correct,
        run.undecoded_trials,
        run.trials_learned
    );
    if let Some((k, u, s)) = run.models.last() {
        println!("last model: fitted on {k} labelled trials, {u} units × {s} stimuli");
    }
    eprintln!("wrote {} and {}", post_path.display(), dec_path.display());
    Ok(acc)
}

/// `export`.
pub fn export_cmd(model_path: &Path, out: Option<&Path>) -> anyhow::Result<()> {
    let (_, model) = load_model(model_path)?;
    let j = crate::export::model_json(&model);
    match out {
        Some(p) => {
            std::fs::write(p, j).with_context(|| format!("{}: cannot write", p.display()))?;
            eprintln!("wrote {}", p.display());
        }
        None => println!("{j}"),
    }
    Ok(())
}

/// `inspect`: the per-cell summary of a model file.
pub fn inspect_cmd(model_path: &Path) -> anyhow::Result<()> {
    let (spec, model) = load_model(model_path)?;
    println!(
        "{}: {} units × {} stimuli, window {} ms in {} bins of {} ms; stimuli: {}",
        model_path.display(),
        model.n_units(),
        model.n_stimuli(),
        model.n_bins() as f64 * model.bin_width_s() * 1000.0,
        model.n_bins(),
        model.bin_width_s() * 1000.0,
        model
            .stimuli()
            .iter()
            .map(|s| auspex_engine::data::printable(s))
            .collect::<Vec<_>>()
            .join(", ")
    );
    print!("{}", cell_table(&spec));
    print!("{}", promise_table(model.calibration()));
    Ok(())
}

/// The calibration and its held-out threshold record as a table (what `inspect` shows).
pub fn promise_table(c: &Calibration) -> String {
    use std::fmt::Write;
    let mut s = String::new();
    if c.evidence.is_empty() {
        let _ = writeln!(
            s,
            "no held-out threshold record (fitted with --calibration-folds 0, or by an older version): --target-accuracy refuses this model"
        );
        return s;
    }
    s.push_str(calibration_summary(c).lines().next().unwrap_or(""));
    s.push('\n');
    let _ = writeln!(
        s,
        "held-out record of the decision rule (minimum time {:.0} ms; a promise is kept when the interval reaches the threshold):",
        c.min_time_s * 1000.0
    );
    let _ = writeln!(
        s,
        "  threshold   all decisions: right  accuracy  95% interval   median   by threshold: right  accuracy  promise"
    );
    for e in &c.evidence {
        let (ea, _, _) = e.early_accuracy();
        let _ = writeln!(
            s,
            "  {:<9}   {:>8}/{:<4}         {:.3}     {:.3}–{:.3}    {:>4.0} ms  {:>8}/{:<4}        {}     {}",
            e.threshold,
            e.correct,
            e.trials,
            e.accuracy(),
            e.lo,
            e.hi,
            e.median_decision_ms,
            e.early_correct,
            e.early,
            if e.early > 0 { format!("{ea:.3}") } else { "  –  ".into() },
            if e.kept() { "kept" } else { "BROKEN" }
        );
    }
    s
}

/// `demo`: the offline path on the bundled demo data.
pub fn demo_offline(out_dir: &Path, quiet: bool) -> anyhow::Result<PathBuf> {
    let demo = crate::demo_dir();
    let (sp, tr) = (demo.join("spikes.csv"), demo.join("trials.csv"));
    if !sp.exists() || !tr.exists() {
        bail!("{}: the demo data is missing; regenerate it with `auspex simulate --scenario {}/scenario.toml --out-dir {}`", demo.display(), demo.display(), demo.display());
    }
    std::fs::create_dir_all(out_dir)
        .with_context(|| format!("{}: cannot create directory", out_dir.display()))?;
    let model_path = out_dir.join("demo.apxm");
    // The scenario's own order (N, NE, E, … round the compass), so neighbouring directions sit
    // side by side in every table and confusion matrix.
    let order: Vec<String> = read_scenario(&demo.join("scenario.toml"))
        .map(|sc| sc.stimuli.into_iter().map(|(name, _)| name).collect())
        .unwrap_or_default();
    eprintln!("── 1/4 fitting the demo model (on {}) ──", demo.display());
    let source = Source::tables(&sp, &tr);
    fit_cmd(
        &source,
        &model_path,
        &FitArgs {
            quiet,
            stimulus_order: order.clone(),
            ..Default::default()
        },
    )?;
    eprintln!("── 2/4 decoding every trial with each decoder ──");
    for dec in Decoder::ALL {
        let args = DecodeArgs {
            decoder: dec,
            threshold: auspex_engine::engine::DEFAULT_THRESHOLD,
            min_time_ms: auspex_engine::engine::DEFAULT_MIN_TIME_MS,
            prior: None,
            ..Default::default()
        };
        decode_cmd(&model_path, &source, &out_dir.join(dec.name()), &args)?;
    }
    eprintln!("── 3/4 exporting the model as JSON ──");
    export_cmd(&model_path, Some(&out_dir.join("demo-model.json")))?;
    eprintln!("── 4/4 cross-validating: accuracy against time, decisions, information, fit ──");
    validate_cmd(
        &source,
        &out_dir.join("validation"),
        &ValidateArgs {
            window_ms: 250.0,
            bin_ms: 1.0,
            families: "all".into(),
            folds: 5,
            shuffles: 200,
            seed: 1,
            threshold: auspex_engine::engine::DEFAULT_THRESHOLD,
            min_time_ms: auspex_engine::engine::DEFAULT_MIN_TIME_MS,
            stimulus_order: order.clone(),
        },
        quiet,
    )?;
    Ok(model_path)
}

/// Settings of `validate` from the command line.
#[derive(Clone, Debug)]
pub struct ValidateArgs {
    /// Window, ms.
    pub window_ms: f64,
    /// Bin, ms.
    pub bin_ms: f64,
    /// Count families.
    pub families: String,
    /// Folds.
    pub folds: usize,
    /// Shuffles.
    pub shuffles: usize,
    /// Seed.
    pub seed: u64,
    /// Headline threshold.
    pub threshold: f64,
    /// Minimum decision time, ms.
    pub min_time_ms: f64,
    /// The order to list stimuli in (empty: numeric if every name is a number, else as first met).
    pub stimulus_order: Vec<String>,
}

/// Sets the order stimuli are listed in; every name must be a stimulus of the data, and every
/// stimulus of the data must be named.
pub fn order_stimuli(data: &mut Dataset, order: &[String], source: &Source) -> anyhow::Result<()> {
    if order.is_empty() {
        return Ok(());
    }
    let names = data.stimulus_names();
    let unknown: Vec<&String> = order.iter().filter(|s| !names.contains(s)).collect();
    let missing: Vec<&String> = names.iter().filter(|s| !order.contains(s)).collect();
    if !unknown.is_empty() || !missing.is_empty() {
        bail!(
            "--stimulus-order must name every stimulus of {} exactly once: {}{}(the data has: {})",
            source.describe(),
            if unknown.is_empty() {
                String::new()
            } else {
                format!("not in the data: {:?}; ", unknown)
            },
            if missing.is_empty() {
                String::new()
            } else {
                format!("missing: {:?}; ", missing)
            },
            names.join(", ")
        );
    }
    data.stimulus_order = order.to_vec();
    Ok(())
}

/// `validate`: writes `report.html` and `validation.json` to `out_dir`, prints the summary.
pub fn validate_cmd(
    source: &Source,
    out_dir: &Path,
    a: &ValidateArgs,
    quiet: bool,
) -> anyhow::Result<crate::validate::Validation> {
    if a.shuffles < 1 {
        bail!("--shuffles must be at least 1 (200 or more for a p-value worth quoting)");
    }
    let opts = crate::validate::ValidateOptions {
        folds: a.folds,
        shuffles: a.shuffles,
        seed: a.seed,
        fit: FitOptions {
            bin_width_s: a.bin_ms / 1000.0,
            window_s: a.window_ms / 1000.0,
            families: parse_families(&a.families)?,
            prior_from_frequencies: false,
            bandwidth: Default::default(),
            shrinkage: Default::default(),
        },
        threshold: a.threshold,
        min_time_ms: a.min_time_ms,
        progress: std::io::stderr().is_terminal() && !quiet,
    };
    let (mut data, report) = source.load(opts.fit.window_s)?;
    eprintln!("{report}");
    order_stimuli(&mut data, &a.stimulus_order, source)?;
    let (v, extras) = crate::validate::validate(&data, &source.describe(), &opts)?;
    if !v.closed_form_agrees {
        eprintln!("warning: closed-form window-end decoding differs from the engine's; the shuffle null may not be comparable");
    }
    std::fs::create_dir_all(out_dir)
        .with_context(|| format!("{}: cannot create directory", out_dir.display()))?;
    let html_path = out_dir.join("report.html");
    std::fs::write(&html_path, crate::report::html(&v, &extras))
        .with_context(|| format!("{}: cannot write", html_path.display()))?;
    let json_path = out_dir.join("validation.json");
    std::fs::write(&json_path, serde_json::to_string_pretty(&v)?)
        .with_context(|| format!("{}: cannot write", json_path.display()))?;
    print!("{}", crate::validate::terminal_summary(&v));
    eprintln!(
        "validated in {:.1} s; wrote {} (open it in a browser) and {}",
        v.seconds,
        html_path.display(),
        json_path.display()
    );
    Ok(v)
}

/// A learning daemon's recording exported without `--model`: each trial's decision and the
/// per-bin posterior as the daemon gave them — decoded prequentially, each trial with the model
/// learned before it opened, refitted at the recording's own swap points (`decode
/// --prequential`'s path). The models' stimulus sets grow as labels arrive: the posterior's
/// columns are every stimulus any model knew, in order of first appearance, and a stimulus a
/// trial's model did not know has probability 0 in that trial.
fn prequential_results(
    rec: &crate::wire::RecordedSession,
    opts: &auspex_modelling::learn::LearnOptions,
    args: &DecodeArgs,
    session: &Path,
    input: &mut crate::nwb_write::ExportInput<'_>,
) -> anyhow::Result<()> {
    use crate::prequential::{run_recording, Schedule};
    if args.target_accuracy.is_some() {
        bail!("--target-accuracy needs a fitted model's held-out record; a learning recording is exported with --threshold");
    }
    let data = &rec.dataset;
    let n_bins = (opts.fit.window_s / opts.fit.bin_width_s).round().max(1.0) as u128;
    let s = data.stimulus_names().len().max(2) as u128;
    auspex_engine::budget::check(
        "the per-bin posteriors to export",
        || format!("{} trials × {n_bins} bins × {s} stimuli", data.trials.len()),
        auspex_engine::budget::product(&[data.trials.len() as u128, n_bins, s + 3, 8 * 2]),
    )?;
    let (run, names, frames) = run_recording(
        rec,
        opts,
        &args.config(data.tick_rate_hz),
        &Schedule { every_trials: 1 },
        None::<std::io::Sink>,
        true,
    )?;
    let frames = frames.unwrap_or_default();
    let mut union: Vec<String> = Vec::new();
    let mut at: HashMap<String, usize> = HashMap::new();
    for (_, n) in &run.frame_meta {
        for name in n.iter() {
            if !at.contains_key(name) {
                at.insert(name.clone(), union.len());
                union.push(name.clone());
            }
        }
    }
    let widen = |post: &[f64], names: &[String]| -> Vec<f64> {
        let mut v = vec![0.0; union.len()];
        for (p, n) in post.iter().zip(names) {
            v[at[n]] = *p;
        }
        v
    };
    let mut last: HashMap<(u64, u32), usize> = HashMap::new();
    let mut wide = Vec::with_capacity(frames.len());
    for (k, ((trial, bin, post), (tick, names))) in frames.iter().zip(&run.frame_meta).enumerate() {
        last.insert((*trial, *bin), k);
        wide.push((*tick, *trial, widen(post, names)));
    }
    for (row, name) in run.decisions.iter().zip(&names) {
        let d = &row.decision;
        let Some(&s) = at.get(name) else { continue };
        let full = last
            .get(&(d.trial, d.bin))
            .map(|&k| wide[k].2.clone())
            .unwrap_or_default();
        input.decisions.insert(
            d.trial,
            (
                s as u32,
                d.bin_end_tick,
                d.posterior,
                d.reason.name().to_string(),
                full,
            ),
        );
    }
    let decoded: std::collections::HashSet<u64> = frames.iter().map(|f| f.0).collect();
    for t in &data.trials {
        if !decoded.contains(&t.id) {
            input.no_decision.insert(
                t.id,
                "not decoded: opened before the first learned model".into(),
            );
        }
    }
    input.window_s = opts.fit.window_s;
    input.stimuli = union;
    input.frames = wide;
    input.notes = format!(
        "decoded by Auspex {} prequentially with the recording's learned models ({} applied at the daemon's swap points; the last fitted on {} labelled trials; {} ms window in {} ms bins), decoder {}, threshold {}, minimum time {} ms; {} trials opened before the first model were not decoded; session recording {}",
        env!("CARGO_PKG_VERSION"),
        run.models.len(),
        run.models.last().map_or(0, |m| m.0),
        opts.fit.window_s * 1000.0,
        opts.fit.bin_width_s * 1000.0,
        args.decoder.name(),
        args.threshold,
        args.min_time_ms,
        run.undecoded_trials,
        session.display()
    );
    Ok(())
}

/// `auspex export --nwb OUT --session REC [--model M]`: the recorded session as an NWB file —
/// its units, spikes and trials, and each trial's decision and the per-bin posterior decoded
/// through the same engine as live (so they are the daemon's own figures for the same model
/// and settings): with `--model`, by that model; without, for a learning daemon's recording, by
/// the models it learned, as it learned them ([`prequential_results`]).
pub fn export_nwb_cmd(
    out: &Path,
    session: &Path,
    model_path: Option<&Path>,
    args: &DecodeArgs,
) -> anyhow::Result<()> {
    use auspex_engine::engine::{EngineSink, Frame};
    let rec = crate::wire::read_recording(session)?;
    let raw =
        std::fs::read(session).with_context(|| format!("{}: cannot read", session.display()))?;
    let first_ns = auspex_proto::session::read_session(&raw)
        .ok()
        .and_then(|c| c.records.first().map(|r| r.received_unix_ns))
        .unwrap_or(0);
    let name = rec
        .messages
        .iter()
        .find_map(|(_, m)| match &m.body {
            Some(auspex_proto::v1::inbound::Body::SessionStart(ss))
                if !ss.session_name.is_empty() =>
            {
                Some(ss.session_name.clone())
            }
            _ => None,
        })
        .unwrap_or_else(|| {
            session
                .file_stem()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_default()
        });
    let data = &rec.dataset;
    let mut input = crate::nwb_write::ExportInput {
        data,
        session: name,
        start_time: crate::nwb_write::iso_utc(first_ns),
        window_s: 0.25,
        stimuli: Vec::new(),
        decisions: Default::default(),
        frames: Vec::new(),
        notes: format!("session recording {}", session.display()),
        no_decision: Default::default(),
    };
    if let Some(mp) = model_path {
        let (_, model) = load_model(mp)?;
        let model = Arc::new(model);
        let mut args = args.clone();
        args.resolve_target(&model)
            .with_context(|| format!("{}", mp.display()))?;
        let cfg = args.config(data.tick_rate_hz);
        struct Keep {
            frames: Vec<(i64, u64, Vec<f64>)>,
            last: HashMap<(u64, u32), usize>,
            decisions: HashMap<u64, (u32, i64, f64, String, Vec<f64>)>,
        }
        impl EngineSink for Keep {
            fn frame(&mut self, f: &Frame<'_>) {
                self.last.insert((f.trial, f.bin), self.frames.len());
                self.frames
                    .push((f.bin_end_tick, f.trial, f.posterior.to_vec()));
            }
            fn decision(&mut self, d: &auspex_engine::decision::Decision) {
                let full = self
                    .last
                    .get(&(d.trial, d.bin))
                    .map(|&i| self.frames[i].2.clone())
                    .unwrap_or_default();
                self.decisions.insert(
                    d.trial,
                    (
                        d.stimulus,
                        d.bin_end_tick,
                        d.posterior,
                        d.reason.name().to_string(),
                        full,
                    ),
                );
            }
        }
        let window_s = model.bin_width_s() * model.n_bins() as f64;
        let s = model.n_stimuli() as u128;
        auspex_engine::budget::check(
            "the per-bin posteriors to export",
            || {
                format!(
                    "{} trials × {} bins × {s} stimuli",
                    data.trials.len(),
                    model.n_bins()
                )
            },
            auspex_engine::budget::product(&[
                data.trials.len() as u128,
                model.n_bins() as u128,
                s + 3,
                8,
            ]),
        )?;
        let mut keep = Keep {
            frames: Vec::new(),
            last: HashMap::new(),
            decisions: HashMap::new(),
        };
        run_dataset(model.clone(), data, cfg, &mut keep)?;
        input.window_s = window_s;
        input.stimuli = model.stimuli().to_vec();
        input.frames = keep.frames;
        input.decisions = keep.decisions;
        input.notes = format!(
            "decoded by Auspex {} with the model {} ({} units × {} stimuli, {} bins of {} ms; calibration {}; fitted on {}), decoder {}, threshold {}, minimum time {} ms; session recording {}",
            env!("CARGO_PKG_VERSION"),
            mp.display(),
            model.n_units(),
            model.n_stimuli(),
            model.n_bins(),
            model.bin_width_s() * 1000.0,
            model.calibration().method.name(),
            auspex_proto::model_file::training_data(mp),
            args.decoder.name(),
            args.threshold,
            args.min_time_ms,
            session.display()
        );
    }
    if model_path.is_none() {
        if let Some(opts) = crate::prequential::recorded_options(&rec) {
            prequential_results(&rec, &opts, args, session, &mut input)?;
        }
    }
    crate::nwb_write::write(out, &input)?;
    eprintln!(
        "wrote {}: {} units, {} spikes, {} trials{}",
        out.display(),
        data.units.len(),
        data.spikes.len(),
        data.trials.len(),
        if input.stimuli.is_empty() {
            " (no --model: no decisions or posteriors)".to_string()
        } else {
            format!(
                ", {} decisions, {} posterior rows",
                input.decisions.len(),
                input.frames.len()
            )
        }
    );
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::group_starts;

    #[test]
    fn unit_groups_start_at_the_given_ids() {
        let units = [101, 102, 105, 113, 120];
        assert_eq!(group_starts(&units, &[]).unwrap(), Vec::<u32>::new());
        // Ids between units start the group at the next unit.
        assert_eq!(group_starts(&units, &[103, 113]).unwrap(), [2, 3]);
        for bad in [&[101][..], &[121], &[113, 110], &[115, 119]] {
            assert!(group_starts(&units, bad).is_err(), "{bad:?}");
        }
        assert!(group_starts(&[5, 3], &[4]).is_err(), "units out of order");
    }
}
