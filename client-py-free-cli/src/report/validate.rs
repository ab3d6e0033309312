//! `validate` on the terminal: the progress bar and the summary table. The validation itself
//! (cross-validation, decoders' reports, shuffle null, calibration comparison, learning curve,
//! per-unit reports) is `auspex_modelling::validation::run`; this file only asks and draws.

use auspex_engine::data::Dataset;
pub use auspex_modelling::validation::run::*;

/// Runs the validation with a progress bar on standard error when `opts.progress` is set.
/// `source` names the data for the report.
pub fn validate(
    data: &Dataset,
    source: &str,
    opts: &ValidateOptions,
) -> anyhow::Result<(Validation, Extras)> {
    if !opts.progress {
        return timed(data, source, opts, &());
    }
    let bar = Bar(crate::progress::bar(
        true,
        0,
        "validating",
        "{percent}% {msg}",
    ));
    timed(data, source, opts, &bar)
}

/// The terminal's progress bar.
struct Bar(indicatif::ProgressBar);

impl Progress for Bar {
    fn start(&self, work: u64) {
        self.0.set_length(work);
    }
    fn stage(&self, what: &'static str) {
        self.0.set_message(what);
    }
    fn done(&self, work: u64) {
        self.0.inc(work);
    }
    fn finish(&self) {
        self.0.finish_and_clear();
    }
}

/// The run, with its wall-clock time (the library reads no clock).
fn timed(
    data: &Dataset,
    source: &str,
    opts: &ValidateOptions,
    bar: &dyn Progress,
) -> anyhow::Result<(Validation, Extras)> {
    let t0 = std::time::Instant::now();
    let (mut v, extras) = validate_with(data, source, opts, bar)?;
    v.seconds = t0.elapsed().as_secs_f64();
    Ok((v, extras))
}

/// The ceiling of every information figure of `v`: the entropy of the presented stimuli.
fn max_bits(v: &Validation) -> f64 {
    let ns = v.stimuli.len();
    let conf: Vec<u64> = v
        .decoders
        .first()
        .map(|d| d.confusion_end.iter().flatten().copied().collect())
        .unwrap_or_default();
    auspex_engine::information::presented_entropy_bits(&conf, ns)
}

/// The terminal summary.
pub fn terminal_summary(v: &Validation) -> String {
    use std::fmt::Write;
    let mut s = String::new();
    let _ = writeln!(
        s,
        "{} labelled trials, {} units × {} stimuli, {}-fold cross-validation, chance {:.1}%",
        v.trials,
        v.units.len(),
        v.stimuli.len(),
        v.folds,
        100.0 * v.chance
    );
    let _ = writeln!(
        s,
        "{:<22} {:>16} {:>12} {:>22} {:>10}",
        "decoder", "window end", "reliable at", "decision (θ, mean ms)", "info bits"
    );
    for d in &v.decoders {
        let _ = writeln!(
            s,
            "{:<22} {:>5.1}% [{:>4.1},{:>5.1}] {:>12} {:>9.1}% at {:>5.1} ms {:>10.3}",
            d.decoder,
            100.0 * d.accuracy_end.accuracy,
            100.0 * d.accuracy_end.lo,
            100.0 * d.accuracy_end.hi,
            d.earliest_reliable_ms
                .map(|t| format!("{t:.0} ms"))
                .unwrap_or_else(|| "never".into()),
            100.0 * d.decision.accuracy,
            d.decision.mean_time_ms,
            d.info_bits
        );
    }
    let broken: Vec<String> = v
        .calibration
        .promises
        .iter()
        .filter(|p| !p.kept)
        .map(|p| {
            format!(
                "{} ({:.1}% [{:.1}, {:.1}])",
                p.threshold,
                100.0 * p.accuracy,
                100.0 * p.lo,
                100.0 * p.hi
            )
        })
        .collect();
    let ece = v
        .calibration
        .reliability
        .first()
        .map(|r| r.ece)
        .unwrap_or(f64::NAN);
    if broken.is_empty() {
        let _ = writeln!(
            s,
            "promise (decide at θ ⇒ right ≥ θ): kept at every threshold on held-out trials (calibration error at decision {ece:.3})"
        );
    } else {
        let _ = writeln!(
            s,
            "promise (decide at θ ⇒ right ≥ θ): BROKEN at {} — the whole 95% interval lies below θ (calibration error at decision {ece:.3}; see the report)",
            broken.join(", ")
        );
    }
    if !v.calibration.methods.is_empty() {
        let parts: Vec<String> = v
            .calibration
            .methods
            .iter()
            .map(|m| {
                let ratio = median_ratio(m);
                format!(
                    "{} {}/{} (accuracy ≥ θ: {}/{}; log loss {:.4}{})",
                    m.method,
                    m.kept.0,
                    m.kept.1,
                    m.met.0,
                    m.met.1,
                    m.log_loss,
                    match ratio {
                        Some(r) if m.method != "none" =>
                            format!(", median decision time ×{r:.2} of the raw posterior's at equal accuracy"),
                        _ => String::new(),
                    }
                )
            })
            .collect();
        let _ = writeln!(
            s,
            "recalibration, fitted inside each training fold — promises kept at thresholds {}–{} (interval reaches θ): {}; `auspex fit` applies {}",
            PROMISE_RANGE.0,
            PROMISE_RANGE.1,
            parts.join(" · "),
            v.calibration.default_method
        );
    }
    if !v.learning_curve.is_empty() {
        let pts: Vec<String> = v
            .learning_curve
            .iter()
            .map(|p| format!("{}: {:.0}%", p.trials_per_stimulus, 100.0 * p.accuracy))
            .collect();
        let _ = writeln!(
            s,
            "learning curve (training trials per stimulus: held-out window-end accuracy): {}",
            pts.join(" · ")
        );
    }
    let i = &v.information;
    let _ = writeln!(
        s,
        "information (order statistics, window end): {:.3} bits (plug-in {:.3}, bias correction {:+.3}; at most {:.3}, the entropy of the presented stimuli); shuffle null 95% {:.3} bits, p = {:.4} ({} shuffles)",
        i.bits, i.plugin_bits, i.bits - i.plugin_bits, max_bits(v), i.null_95, i.p_value, v.shuffles
    );
    let _ = writeln!(
        s,
        "{:>6} {:>9} {:>10} {:>8}  best stimulus",
        "unit", "accuracy", "info bits", "p"
    );
    for u in v.units_ranked.iter().take(10) {
        let best = u
            .cells
            .iter()
            .max_by(|a, b| a.mean.total_cmp(&b.mean))
            .map(|c| c.stimulus.as_str())
            .unwrap_or("");
        let _ = writeln!(
            s,
            "{:>6} {:>8.1}% {:>10.3} {:>8.4}  {}",
            u.unit,
            100.0 * u.accuracy,
            u.info.bits,
            u.info.p_value,
            best
        );
    }
    if v.units_ranked.len() > 10 {
        let _ = writeln!(
            s,
            "… {} more units in the report",
            v.units_ranked.len() - 10
        );
    }
    let g = &v.goodness_of_fit;
    let _ = writeln!(
        s,
        "time-rescaling goodness of fit: {} of {} cells outside the 95% KS band{}",
        g.cells_failed,
        g.cells_tested,
        if g.failed.is_empty() {
            String::new()
        } else {
            format!(
                ": {}",
                g.failed
                    .iter()
                    .take(8)
                    .map(|(u, s)| format!("{u}/{s}"))
                    .collect::<Vec<_>>()
                    .join(", ")
            ) + if g.failed.len() > 8 { ", …" } else { "" }
        }
    );
    s
}
