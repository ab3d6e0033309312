//! Offline decoding: runs a dataset through the very engine the daemon uses, batch by batch in
//! acquisition order, and writes `posteriors.csv` and `decisions.csv`.

use auspex_engine::data::Dataset;
use auspex_engine::engine::{Counters, Decision, EngineConfig, EngineSink, Frame, TrialEnd};
use auspex_engine::{LookupBudget, Model};
use std::collections::HashMap;
use std::io::Write;
use std::sync::Arc;

/// One decided trial.
#[derive(Clone, Debug, PartialEq)]
pub struct DecisionRow {
    /// The decision.
    pub decision: Decision,
    /// Presented stimulus name from the trial table (may be unknown to the model).
    pub true_stimulus: Option<String>,
}

/// Feeds a dataset to an engine as acquisition would: 1-bin batches with watermarks, onsets
/// before the batch that contains them. Returns the engine's counters. The model is prepared
/// with the default lookup budget, as the daemon's default (`--table-memory-mb`), so offline
/// and live frames are the same bits.
pub fn run_dataset(
    model: Arc<Model>,
    data: &Dataset,
    cfg: EngineConfig,
    sink: &mut dyn EngineSink,
) -> anyhow::Result<Counters> {
    Ok(auspex_engine::engine::run_dataset(
        model.prepare(LookupBudget::DEFAULT),
        data,
        cfg,
        sink,
    )?)
}

/// Collects decisions and streams posterior rows to a writer.
pub struct CsvSink<'a, W: Write> {
    stimuli: &'a [String],
    out: Option<W>,
    truth: HashMap<u64, Option<String>>,
    /// Decisions in the order they fired.
    pub decisions: Vec<DecisionRow>,
    /// First write error, if any.
    pub error: Option<std::io::Error>,
    /// Completed trials' final posteriors: (trial, posterior).
    pub finals: Vec<(u64, Vec<f64>)>,
}

impl<'a, W: Write> CsvSink<'a, W> {
    /// A sink for `model`'s stimuli; `out` receives `trial,bin,stimulus,posterior` rows if given.
    pub fn new(stimuli: &'a [String], data: &Dataset, mut out: Option<W>) -> Self {
        let mut error = None;
        if let Some(w) = out.as_mut() {
            if let Err(e) = writeln!(w, "trial,bin,stimulus,posterior") {
                error = Some(e);
            }
        }
        CsvSink {
            stimuli,
            out,
            truth: data
                .trials
                .iter()
                .map(|t| (t.id, t.stimulus.clone()))
                .collect(),
            decisions: Vec::new(),
            error,
            finals: Vec::new(),
        }
    }
    /// Flushes the posterior writer.
    pub fn finish(mut self) -> Result<Vec<DecisionRow>, std::io::Error> {
        if let Some(e) = self.error.take() {
            return Err(e);
        }
        if let Some(w) = self.out.as_mut() {
            w.flush()?;
        }
        Ok(self.decisions)
    }
}

impl<W: Write> EngineSink for CsvSink<'_, W> {
    fn frame(&mut self, f: &Frame<'_>) {
        if self.error.is_some() {
            return;
        }
        if let Some(w) = self.out.as_mut() {
            for (s, p) in f.posterior.iter().enumerate() {
                if let Err(e) = writeln!(w, "{},{},{},{}", f.trial, f.bin, self.stimuli[s], p) {
                    self.error = Some(e);
                    return;
                }
            }
        }
    }
    fn decision(&mut self, d: &Decision) {
        self.decisions.push(DecisionRow {
            decision: *d,
            true_stimulus: self.truth.get(&d.trial).cloned().flatten(),
        });
    }
    fn trial_end(&mut self, end: &TrialEnd<'_>) {
        self.finals.push((end.trial, end.posterior.to_vec()));
    }
}

/// Writes `decisions.csv`, names from the model's stimuli.
pub fn write_decisions(
    path: &std::path::Path,
    stimuli: &[String],
    rows: &[DecisionRow],
) -> std::io::Result<()> {
    write_named_decisions(
        path,
        rows.iter()
            .map(|r| (r, stimuli[r.decision.stimulus as usize].as_str())),
    )
}

/// Writes `decisions.csv` from (row, decided stimulus name) pairs.
pub fn write_named_decisions<'a>(
    path: &std::path::Path,
    rows: impl Iterator<Item = (&'a DecisionRow, &'a str)>,
) -> std::io::Result<()> {
    let mut w = std::io::BufWriter::new(std::fs::File::create(path)?);
    writeln!(w, "trial,stimulus,posterior,bin,reason,true_stimulus")?;
    for (r, name) in rows {
        let d = &r.decision;
        writeln!(
            w,
            "{},{},{},{},{},{}",
            d.trial,
            name,
            d.posterior,
            d.bin,
            d.reason.name(),
            r.true_stimulus.as_deref().unwrap_or("")
        )?;
    }
    w.flush()
}

/// Accuracy summary of decisions against the trial table.
#[derive(Clone, Debug, Default)]
pub struct Score {
    /// Decisions with a known presented stimulus.
    pub labelled: usize,
    /// Of which correct.
    pub correct: usize,
    /// Mean decision bin over labelled decisions.
    pub mean_bin: f64,
    /// Share that fired on the threshold (before the window end).
    pub early_share: f64,
}

impl Score {
    /// Accuracy in [0, 1] (0 when nothing is labelled).
    pub fn accuracy(&self) -> f64 {
        if self.labelled == 0 {
            0.0
        } else {
            self.correct as f64 / self.labelled as f64
        }
    }
}

/// Scores decisions.
pub fn score(stimuli: &[String], rows: &[DecisionRow]) -> Score {
    let lab: Vec<&DecisionRow> = rows.iter().filter(|r| r.true_stimulus.is_some()).collect();
    let correct = lab
        .iter()
        .filter(|r| {
            r.true_stimulus.as_deref() == Some(stimuli[r.decision.stimulus as usize].as_str())
        })
        .count();
    let n = lab.len().max(1) as f64;
    Score {
        labelled: lab.len(),
        correct,
        mean_bin: lab.iter().map(|r| r.decision.bin as f64).sum::<f64>() / n,
        early_share: lab
            .iter()
            .filter(|r| r.decision.reason == auspex_engine::DecisionReason::Threshold)
            .count() as f64
            / n,
    }
}
