//! `gather`: merges the `validation.json` of many sessions (one `auspex validate` per session,
//! run for example as a cluster job array) into one table, one row per session, as CSV, with a
//! terminal summary. Directories are searched for `validation.json` files. A file that cannot be
//! read is named with the reason and the command fails after writing the rows it could read.
//!
//! Must not: recompute anything (the figures are the sessions' own), or drop a file silently.

use anyhow::{bail, Context};
use serde_json::Value;
use std::path::{Path, PathBuf};

/// One session's headline figures.
#[derive(Clone, Debug, PartialEq)]
pub struct Row {
    /// The file's directory (the session's output directory).
    pub session: String,
    /// Where the data came from.
    pub source: String,
    /// Labelled trials.
    pub trials: u64,
    /// Units.
    pub units: u64,
    /// Stimuli.
    pub stimuli: u64,
    /// Chance accuracy.
    pub chance: f64,
    /// Order statistics: window-end accuracy with its 95% interval.
    pub accuracy_end: (f64, f64, f64),
    /// Inhomogeneous Poisson and count-only window-end accuracy.
    pub poisson_end: f64,
    /// Count-only window-end accuracy.
    pub count_end: f64,
    /// Earliest reliable time, ms (order statistics).
    pub earliest_ms: Option<f64>,
    /// Headline threshold.
    pub threshold: f64,
    /// Decision accuracy and median decision time at the headline threshold.
    pub decision: (f64, f64),
    /// Population information, bits, and its shuffle p-value.
    pub info: (f64, f64),
    /// Thresholds whose promise is kept with the default recalibration (kept, tested).
    pub kept: (u64, u64),
    /// Cells outside the time-rescaling band (failed, tested).
    pub fit_flags: (u64, u64),
}

/// The column names of the CSV, in order.
pub const COLUMNS: [&str; 20] = [
    "session",
    "source",
    "trials",
    "units",
    "stimuli",
    "chance",
    "accuracy_end",
    "accuracy_end_lo",
    "accuracy_end_hi",
    "poisson_accuracy_end",
    "count_accuracy_end",
    "earliest_reliable_ms",
    "threshold",
    "decision_accuracy",
    "median_decision_ms",
    "info_bits",
    "info_p",
    "thresholds_kept",
    "thresholds_tested",
    "cells_flagged",
];

/// Every `validation.json` under `paths` (files as given; directories searched), sorted.
pub fn find_files(paths: &[PathBuf]) -> anyhow::Result<Vec<PathBuf>> {
    let mut out = Vec::new();
    for p in paths {
        if p.is_dir() {
            walk(p, &mut out)?;
        } else if p.exists() {
            out.push(p.clone());
        } else {
            bail!("{}: no such file or directory", p.display());
        }
    }
    out.sort();
    out.dedup();
    Ok(out)
}

fn walk(dir: &Path, out: &mut Vec<PathBuf>) -> anyhow::Result<()> {
    let entries =
        std::fs::read_dir(dir).with_context(|| format!("{}: cannot list", dir.display()))?;
    for e in entries {
        let p = e?.path();
        if p.is_dir() {
            walk(&p, out)?;
        } else if p.file_name().is_some_and(|n| n == "validation.json") {
            out.push(p);
        }
    }
    Ok(())
}

fn num(v: &Value, path: &[&str]) -> Result<f64, String> {
    let mut x = v;
    for k in path {
        x = x
            .get(k)
            .ok_or_else(|| format!("no field {}", path.join(".")))?;
    }
    x.as_f64()
        .ok_or_else(|| format!("field {} is not a number", path.join(".")))
}

fn decoder<'a>(v: &'a Value, name: &str) -> Result<&'a Value, String> {
    v.get("decoders")
        .and_then(|d| d.as_array())
        .and_then(|d| d.iter().find(|x| x["decoder"] == name))
        .ok_or_else(|| format!("no {name} decoder in decoders"))
}

/// A figure within its bounds, or why the file is refused (a damaged or hand-edited file must
/// not put 18446744073709551615 trials or an accuracy of 7 into a table of sessions).
fn within(name: &str, x: f64, lo: f64, hi: f64) -> Result<f64, String> {
    if x.is_finite() && (lo..=hi).contains(&x) {
        Ok(x)
    } else {
        Err(format!("{name} = {x} is outside [{lo}, {hi}]"))
    }
}

/// A count: a whole number in 0..=10¹².
fn count_of(name: &str, x: f64) -> Result<u64, String> {
    if x.fract() != 0.0 {
        return Err(format!("{name} = {x} is not a whole number"));
    }
    within(name, x, 0.0, 1e12).map(|x| x as u64)
}

/// Reads one file's row, every figure checked against its bounds.
pub fn read_row(path: &Path) -> Result<Row, String> {
    let r = read_row_unchecked(path)?;
    let p = |name: &str, x: f64| within(name, x, 0.0, 1.0);
    p("chance", r.chance)?;
    p("window-end accuracy", r.accuracy_end.0)?;
    p("its interval's lower end", r.accuracy_end.1)?;
    p("its interval's upper end", r.accuracy_end.2)?;
    p("inhomogeneous-Poisson accuracy", r.poisson_end)?;
    p("count-only accuracy", r.count_end)?;
    p("threshold", r.threshold)?;
    p("decision accuracy", r.decision.0)?;
    within("median decision time (ms)", r.decision.1, 0.0, 1e9)?;
    if let Some(t) = r.earliest_ms {
        within("earliest reliable time (ms)", t, 0.0, 1e9)?;
    }
    within(
        "information (bits)",
        r.info.0,
        0.0,
        (r.stimuli.max(1) as f64).log2() + 1e-9,
    )?;
    p("information p-value", r.info.1)?;
    if r.kept.0 > r.kept.1 || r.fit_flags.0 > r.fit_flags.1 {
        return Err("more thresholds kept or cells flagged than tested".into());
    }
    Ok(r)
}

fn read_row_unchecked(path: &Path) -> Result<Row, String> {
    let text = std::fs::read_to_string(path).map_err(|e| format!("cannot read ({e})"))?;
    let v: Value = serde_json::from_str(&text).map_err(|e| {
        format!(
            "not JSON at line {}, column {} ({e}); was `auspex validate` still writing it?",
            e.line(),
            e.column()
        )
    })?;
    if v.get("decoders").is_none() || v.get("information").is_none() {
        return Err("not a validation.json written by `auspex validate`".into());
    }
    let os = decoder(&v, "order-stats")?;
    let cal = &v["calibration"];
    let method = cal["default_method"].as_str().unwrap_or("temperature");
    let kept = cal["methods"]
        .as_array()
        .and_then(|m| m.iter().find(|x| x["method"] == method))
        .map(|m| {
            (
                m["kept"][0].as_u64().unwrap_or(0),
                m["kept"][1].as_u64().unwrap_or(0),
            )
        })
        .unwrap_or((0, 0));
    let session = path
        .parent()
        .and_then(|p| p.file_name())
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| path.display().to_string());
    let count = |k: &str| v.get(k).and_then(|x| x.as_array()).map(|a| a.len() as u64);
    Ok(Row {
        session,
        source: v["source"].as_str().unwrap_or_default().to_string(),
        trials: count_of("trials", num(&v, &["trials"])?)?,
        units: count("units").ok_or("no units list")?,
        stimuli: count("stimuli").ok_or("no stimuli list")?,
        chance: num(&v, &["chance"])?,
        accuracy_end: (
            num(os, &["accuracy_end", "accuracy"])?,
            num(os, &["accuracy_end", "lo"])?,
            num(os, &["accuracy_end", "hi"])?,
        ),
        poisson_end: num(
            decoder(&v, "inhomogeneous-poisson")?,
            &["accuracy_end", "accuracy"],
        )?,
        count_end: num(decoder(&v, "count-only")?, &["accuracy_end", "accuracy"])?,
        earliest_ms: os["earliest_reliable_ms"].as_f64(),
        threshold: num(&v, &["threshold"])?,
        decision: (
            num(os, &["decision", "accuracy"])?,
            num(os, &["decision", "median_time_ms"])?,
        ),
        info: (
            num(&v, &["information", "bits"])?,
            num(&v, &["information", "p_value"])?,
        ),
        kept,
        fit_flags: (
            count_of(
                "cells flagged",
                num(&v, &["goodness_of_fit", "cells_failed"])?,
            )?,
            count_of(
                "cells tested",
                num(&v, &["goodness_of_fit", "cells_tested"])?,
            )?,
        ),
    })
}

fn csv_field(s: &str) -> String {
    if s.contains([',', '"', '\n']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

/// The rows as CSV with a header.
pub fn to_csv(rows: &[Row]) -> String {
    let mut s = COLUMNS.join(",");
    s.push('\n');
    for r in rows {
        let earliest = r.earliest_ms.map(|x| format!("{x}")).unwrap_or_default();
        s.push_str(&format!(
            "{},{},{},{},{},{},{},{},{},{},{},{},{},{},{},{},{},{},{},{}/{}\n",
            csv_field(&r.session),
            csv_field(&r.source),
            r.trials,
            r.units,
            r.stimuli,
            r.chance,
            r.accuracy_end.0,
            r.accuracy_end.1,
            r.accuracy_end.2,
            r.poisson_end,
            r.count_end,
            earliest,
            r.threshold,
            r.decision.0,
            r.decision.1,
            r.info.0,
            r.info.1,
            r.kept.0,
            r.kept.1,
            r.fit_flags.0,
            r.fit_flags.1,
        ));
    }
    s
}

/// `auspex gather`: finds, reads and merges; writes the CSV to `out` (or standard output) and
/// a summary to standard error.
pub fn gather_cmd(paths: &[PathBuf], out: Option<&Path>) -> anyhow::Result<()> {
    let files = find_files(paths)?;
    if files.is_empty() {
        bail!("no validation.json found under the paths given (each `auspex validate --out DIR` writes DIR/validation.json)");
    }
    let mut rows = Vec::new();
    let mut bad = Vec::new();
    for f in &files {
        match read_row(f) {
            Ok(r) => rows.push(r),
            Err(e) => bad.push(format!("{}: {e}", f.display())),
        }
    }
    let csv = to_csv(&rows);
    match out {
        Some(p) => {
            std::fs::write(p, &csv).with_context(|| format!("{}: cannot write", p.display()))?
        }
        None => print!("{csv}"),
    }
    if !rows.is_empty() {
        let acc: Vec<f64> = rows.iter().map(|r| r.accuracy_end.0).collect();
        let mut sorted = acc.clone();
        sorted.sort_by(|a, b| a.total_cmp(b));
        eprintln!(
            "gathered {} sessions ({} trials, {}–{} units): window-end accuracy median {:.3} (range {:.3}–{:.3}); {} with information p < 0.05",
            rows.len(),
            rows.iter().map(|r| r.trials).sum::<u64>(),
            rows.iter().map(|r| r.units).min().unwrap_or(0),
            rows.iter().map(|r| r.units).max().unwrap_or(0),
            sorted[sorted.len() / 2],
            sorted[0],
            sorted[sorted.len() - 1],
            rows.iter().filter(|r| r.info.1 < 0.05).count(),
        );
        if let Some(p) = out {
            eprintln!("wrote {}", p.display());
        }
    }
    if !bad.is_empty() {
        for b in &bad {
            eprintln!("error: {b}");
        }
        bail!(
            "{} of {} files could not be read (listed above); the table holds the other {}",
            bad.len(),
            files.len(),
            rows.len()
        );
    }
    Ok(())
}
