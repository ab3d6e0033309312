//! Reading the CSV spike and trial tables into a [`Dataset`], with errors that name the file,
//! the line and what is wrong. Seconds become integer ticks here, once.
//!
//! Accepted: a header line naming the columns (any order, extra columns ignored), then one row
//! per line; blank lines and lines starting with `#` are skipped; fields may be double-quoted.

use auspex_engine::data::{seconds_to_ticks, Dataset, Trial};
use std::collections::HashMap;
use std::path::Path;

/// A table problem, already formatted as `file:line: what is wrong`.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct TableError(pub String);

fn split_fields(line: &str, delim: char) -> Vec<String> {
    let mut out = Vec::new();
    let mut cur = String::new();
    let mut quoted = false;
    let mut chars = line.chars().peekable();
    while let Some(c) = chars.next() {
        match c {
            '"' if quoted && chars.peek() == Some(&'"') => {
                cur.push('"');
                chars.next();
            }
            '"' => quoted = !quoted,
            c if c == delim && !quoted => out.push(std::mem::take(&mut cur)),
            _ => cur.push(c),
        }
    }
    out.push(cur);
    out.into_iter().map(|s| s.trim().to_string()).collect()
}

/// The largest tick a table may hold: half the tick range, so an onset plus its window, or a
/// spike's distance from an onset, never overflows.
const MAX_TICK: f64 = 4.0e18;

/// A table read as text: rows are split one at a time as they are used, so memory follows the
/// file's size, not the number of its fields (a row-of-strings buffer cost ~25× the file).
struct Table {
    path: String,
    tick_rate_hz: f64,
    text: String,
    /// Index (0-based) of the header line.
    header_line: usize,
    delim: char,
    n_names: usize,
    cols: HashMap<String, usize>,
}

impl Table {
    /// Data rows, as (1-based line number, fields); a row with fewer fields than the header is an
    /// error naming its line.
    fn rows(&self) -> impl Iterator<Item = Result<(usize, Vec<String>), TableError>> + '_ {
        self.text
            .lines()
            .enumerate()
            .skip(self.header_line + 1)
            .filter(|(_, l)| {
                let t = l.trim();
                !t.is_empty() && !t.starts_with('#')
            })
            .map(|(i, l)| {
                let f = split_fields(l, self.delim);
                if f.len() < self.n_names {
                    Err(TableError(format!(
                        "{}:{}: expected {} fields like the header, found {}",
                        self.path,
                        i + 1,
                        self.n_names,
                        f.len()
                    )))
                } else {
                    Ok((i + 1, f))
                }
            })
    }
    /// Lines in the file (an upper bound on its rows, for reserving).
    fn lines_upper_bound(&self) -> usize {
        self.text.bytes().filter(|&b| b == b'\n').count() + 1
    }
}

fn read_table(path: &Path, required: &[&str], tick_rate_hz: f64) -> Result<Table, TableError> {
    let p = path.display().to_string();
    let text =
        std::fs::read_to_string(path).map_err(|e| TableError(format!("{p}: cannot read: {e}")))?;
    // Lines ended by a carriage return alone (old spreadsheet exports) are lines too.
    let text = if text.contains('\r') && !text.contains('\n') {
        text.replace('\r', "\n")
    } else {
        text
    };
    let mut lines = text.lines().enumerate().filter(|(_, l)| {
        let t = l.trim();
        !t.is_empty() && !t.starts_with('#')
    });
    let (hline, header) = lines.next().ok_or_else(|| {
        TableError(format!(
            "{p}: the file is empty; expected a header line with {}",
            required.join(",")
        ))
    })?;
    let header = header.trim_start_matches('\u{feff}');
    // Comma-separated as written by Auspex; tab- and semicolon-separated tables (spreadsheet
    // exports) are read too, the separator taken from the header line.
    let delim = [',', '\t', ';']
        .into_iter()
        .max_by_key(|d| (header.matches(*d).count(), *d == ','))
        .unwrap_or(',');
    let names = split_fields(header, delim);
    let cols: HashMap<String, usize> = names
        .iter()
        .enumerate()
        .map(|(i, n)| (n.to_ascii_lowercase(), i))
        .collect();
    for r in required {
        if !cols.contains_key(*r) {
            return Err(TableError(format!(
                "{p}:{}: missing column `{r}` (the header has: {}); expected columns {}",
                hline + 1,
                shortened(&names),
                required.join(",")
            )));
        }
    }
    drop(lines);
    let n_names = names.len();
    Ok(Table {
        path: p,
        tick_rate_hz,
        text,
        header_line: hline,
        delim,
        n_names,
        cols,
    })
}

/// Names from a header line as an error message quotes them: at most 12, each at most 40
/// characters, control characters escaped — a damaged file is not echoed whole.
fn shortened(names: &[String]) -> String {
    let one = |n: &String| {
        let n = auspex_engine::data::printable(n);
        if n.chars().count() > 40 {
            format!("{}…", n.chars().take(40).collect::<String>())
        } else {
            n.into_owned()
        }
    };
    let mut v: Vec<String> = names.iter().take(12).map(one).collect();
    if names.len() > 12 {
        v.push(format!("… {} more", names.len() - 12));
    }
    v.join(", ")
}

/// Shares and spans that say the two tables' times do not fit together.
const MOST_OUTSIDE: f64 = 0.95;
const SPAN_RATIO: f64 = 100.0;

/// Refuses tables whose times cannot be right together: time ranges that do not overlap,
/// spans a hundredfold apart (one table in milliseconds?), or nearly every spike outside every
/// trial window. `--trust-times` skips it.
pub fn check_times(
    data: &Dataset,
    report: &ReadReport,
    spikes: impl std::fmt::Display,
    trials: impl std::fmt::Display,
) -> Result<(), TableError> {
    let (Some(s0), Some(s1)) = (data.spikes.first(), data.spikes.last()) else {
        return Ok(());
    };
    let (Some(t0), Some(t1)) = (data.trials.first(), data.trials.last()) else {
        return Ok(());
    };
    let sec = |t: i64| t as f64 / data.tick_rate_hz;
    let (ss, se, ts, te) = (sec(s0.0), sec(s1.0), sec(t0.onset), sec(t1.onset));
    let what = format!(
        "spikes in {spikes} span {ss:.3}–{se:.3} s and trial onsets in {trials} span {ts:.3}–{te:.3} s"
    );
    let hint = "both tables must give seconds from the same start of the recording (a table in milliseconds must be divided by 1000); if the times are right, pass --trust-times";
    let (sspan, tspan) = ((se - ss).max(1e-9), (te - ts).max(1e-9));
    if se.max(te) > 0.0
        && (sspan / tspan >= SPAN_RATIO || tspan / sspan >= SPAN_RATIO)
        && data.trials.len() > 1
    {
        return Err(TableError(format!(
            "the times look like different units: {what}, a {:.0}-fold difference; {hint}",
            (sspan / tspan).max(tspan / sspan)
        )));
    }
    if se < ts || te < ss {
        return Err(TableError(format!(
            "the tables do not overlap in time: {what}; {hint}"
        )));
    }
    let share = report.spikes_outside_windows as f64 / report.spikes.max(1) as f64;
    if share > MOST_OUTSIDE {
        return Err(TableError(format!(
            "{:.1}% of the spikes ({} of {}) fall in no trial window: {what}; {hint}, or give the right --window-ms",
            100.0 * share,
            report.spikes_outside_windows,
            report.spikes
        )));
    }
    Ok(())
}

impl Table {
    fn get<'a>(&self, row: &'a [String], col: &str) -> &'a str {
        &row[self.cols[col]]
    }
    fn seconds(&self, line: usize, row: &[String], col: &str) -> Result<f64, TableError> {
        let v = self.get(row, col);
        let x: f64 = v.parse().map_err(|_| {
            TableError(format!(
                "{}:{line}: column `{col}`: `{v}` is not a number (seconds expected)",
                self.path
            ))
        })?;
        if !x.is_finite() {
            return Err(TableError(format!(
                "{}:{line}: column `{col}`: `{v}` is not a finite number",
                self.path
            )));
        }
        if x < 0.0 {
            return Err(TableError(format!(
                "{}:{line}: column `{col}`: {v} is negative; times are seconds from the start of the recording",
                self.path
            )));
        }
        if x * self.tick_rate_hz > MAX_TICK {
            return Err(TableError(format!(
                "{}:{line}: column `{col}`: {v} s is beyond what the clock can count at {} ticks/s (at most {:.3e} s); times are seconds from the start of the recording",
                self.path,
                self.tick_rate_hz,
                MAX_TICK / self.tick_rate_hz
            )));
        }
        Ok(x)
    }
    fn id(&self, line: usize, row: &[String], col: &str, what: &str) -> Result<u64, TableError> {
        let v = self.get(row, col);
        v.parse::<u64>().map_err(|_| {
            TableError(format!(
                "{}:{line}: column `{col}`: `{v}` is not a valid {what} (a non-negative integer)",
                self.path
            ))
        })
    }
}

/// What reading found besides the data: nothing is dropped without being reported.
#[derive(Debug, Default, Clone)]
pub struct ReadReport {
    /// Spike rows read.
    pub spikes: usize,
    /// Trial rows read.
    pub trials: usize,
    /// Spikes inside no trial window (of the given window length).
    pub spikes_outside_windows: usize,
    /// Units with no spikes at all in any trial window.
    pub units_without_window_spikes: Vec<u32>,
    /// Trials with no stimulus label.
    pub unlabelled_trials: usize,
}

impl std::fmt::Display for ReadReport {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "read {} and {}; {} fell in no trial window; {} no spikes in any window",
            crate::counted(self.spikes as u64, "spike", "spikes"),
            crate::counted(self.trials as u64, "trial", "trials"),
            crate::counted(self.spikes_outside_windows as u64, "spike", "spikes"),
            crate::counted(
                self.units_without_window_spikes.len() as u64,
                "unit had",
                "units had"
            )
        )?;
        if !self.units_without_window_spikes.is_empty() {
            let list: Vec<String> = self
                .units_without_window_spikes
                .iter()
                .take(20)
                .map(|u| u.to_string())
                .collect();
            write!(
                f,
                " ({}{})",
                list.join(", "),
                if self.units_without_window_spikes.len() > 20 {
                    ", …"
                } else {
                    ""
                }
            )?;
        }
        if self.unlabelled_trials > 0 {
            write!(
                f,
                "; {} trials have no stimulus label",
                self.unlabelled_trials
            )?;
        }
        Ok(())
    }
}

/// Reads `spikes` (`unit,time_s`) and `trials` (`trial,onset_s,stimulus`) at `tick_rate_hz`.
/// `window_s` is used only to report spikes outside every window.
pub fn read_dataset(
    spikes: &Path,
    trials: &Path,
    tick_rate_hz: f64,
    window_s: f64,
) -> Result<(Dataset, ReadReport), TableError> {
    if !(tick_rate_hz.is_finite() && tick_rate_hz >= 1.0) {
        return Err(TableError(format!(
            "tick rate {tick_rate_hz} must be at least 1 tick per second"
        )));
    }
    let st = read_table(spikes, &["unit", "time_s"], tick_rate_hz)?;
    let mut sp = Vec::with_capacity(st.lines_upper_bound());
    let mut units = std::collections::BTreeSet::new();
    for r in st.rows() {
        let (line, row) = r?;
        let (line, row) = (&line, &row);
        let unit = st.id(*line, row, "unit", "unit id")?;
        let unit = u32::try_from(unit).map_err(|_| {
            TableError(format!(
                "{}:{line}: unit id {unit} is larger than {}",
                st.path,
                u32::MAX
            ))
        })?;
        let t = st.seconds(*line, row, "time_s")?;
        units.insert(unit);
        sp.push((seconds_to_ticks(t, tick_rate_hz), unit));
    }
    // The file's text goes before the spikes are packed (8 bytes each), so the two are never
    // held together with the pairs.
    drop(st);
    let sp = auspex_engine::SpikeTable::new(sp);
    let tt = read_table(trials, &["trial", "onset_s", "stimulus"], tick_rate_hz)?;
    let mut tr = Vec::with_capacity(tt.lines_upper_bound());
    let mut seen: HashMap<u64, usize> = HashMap::new();
    for r in tt.rows() {
        let (line, row) = r?;
        let (line, row) = (&line, &row);
        let id = tt.id(*line, row, "trial", "trial id")?;
        if let Some(prev) = seen.insert(id, *line) {
            return Err(TableError(format!(
                "{}:{line}: trial {id} is already defined on line {prev}",
                tt.path
            )));
        }
        let onset = tt.seconds(*line, row, "onset_s")?;
        let s = tt.get(row, "stimulus");
        tr.push(Trial {
            id,
            onset: seconds_to_ticks(onset, tick_rate_hz),
            stimulus: (!s.is_empty()).then(|| s.to_string()),
        });
    }
    tr.sort_by_key(|t| (t.onset, t.id));
    let data = Dataset {
        tick_rate_hz,
        trials: tr,
        spikes: sp,
        units: units.into_iter().collect(),
        declared_from: Default::default(),
        stimulus_order: Vec::new(),
    };
    let report = report_for(&data, window_s);
    Ok((data, report))
}

/// Where a dataset comes from: the two CSV tables, or a session recorded by the daemon.
#[derive(Clone, Debug)]
pub enum Source {
    /// `spikes.csv` + `trials.csv` at a clock rate.
    Tables {
        /// Spike table.
        spikes: std::path::PathBuf,
        /// Trial table.
        trials: std::path::PathBuf,
        /// Ticks per second used to round times.
        tick_rate_hz: f64,
        /// Skip [`check_times`].
        trust_times: bool,
    },
    /// A session recording (`.apxs`); labels sent after onsets are applied to their trials.
    Session(std::path::PathBuf),
    /// An NWB 2.x file: units, and trials from one of its interval tables.
    Nwb {
        /// The file.
        path: std::path::PathBuf,
        /// Which table, columns and units.
        choice: crate::nwb::NwbChoice,
        /// Ticks per second used to round times.
        tick_rate_hz: f64,
        /// Skip [`check_times`].
        trust_times: bool,
    },
}

impl Source {
    /// The CSV tables at the default clock (1 MHz).
    pub fn tables(spikes: &Path, trials: &Path) -> Self {
        Source::Tables {
            spikes: spikes.to_path_buf(),
            trials: trials.to_path_buf(),
            tick_rate_hz: 1e6,
            trust_times: false,
        }
    }

    /// Reads the data; `window_s` is used only for the report.
    pub fn load(&self, window_s: f64) -> anyhow::Result<(Dataset, ReadReport)> {
        match self {
            Source::Tables {
                spikes,
                trials,
                tick_rate_hz,
                trust_times,
            } => {
                let (data, report) = read_dataset(spikes, trials, *tick_rate_hz, window_s)?;
                if !trust_times {
                    check_times(&data, &report, spikes.display(), trials.display())?;
                }
                Ok((data, report))
            }
            Source::Session(p) => {
                let rec = crate::wire::read_recording(p)?;
                if rec.undecodable > 0 {
                    eprintln!(
                        "note: {}: {} recorded messages were not valid Auspex messages and were skipped (the daemon counted them as malformed when they arrived)",
                        p.display(),
                        rec.undecodable
                    );
                }
                let report = report_for(&rec.dataset, window_s);
                Ok((rec.dataset, report))
            }
            Source::Nwb {
                path,
                choice,
                tick_rate_hz,
                trust_times,
            } => {
                let mut notes = Vec::new();
                let (data, report) =
                    crate::nwb::read_dataset(path, choice, *tick_rate_hz, window_s, &mut notes)?;
                for n in notes {
                    eprintln!("note: {n}");
                }
                if !trust_times {
                    let sp = format!("{} (units)", path.display());
                    let tr = format!("{} ({})", path.display(), choice.table);
                    check_times(&data, &report, sp, tr)?;
                }
                Ok((data, report))
            }
        }
    }

    /// A short description for provenance fields.
    pub fn describe(&self) -> String {
        match self {
            Source::Tables { spikes, trials, .. } => {
                format!("{} + {}", spikes.display(), trials.display())
            }
            Source::Session(p) => format!("session {}", p.display()),
            Source::Nwb { path, choice, .. } => crate::nwb::describe(path, choice),
        }
    }

    /// [`Source::describe`] with absolute paths: what a model file records as its training data,
    /// so decoding the same files later can say that its figures are in sample.
    pub fn canonical(&self) -> String {
        let abs = |p: &Path| {
            std::fs::canonicalize(p)
                .unwrap_or_else(|_| p.to_path_buf())
                .display()
                .to_string()
        };
        match self {
            Source::Tables { spikes, trials, .. } => format!("{} + {}", abs(spikes), abs(trials)),
            Source::Session(p) => format!("session {}", abs(p)),
            Source::Nwb { path, choice, .. } => {
                crate::nwb::describe(&crate::nwb::absolute(path), choice)
            }
        }
    }
}

/// The read report of a dataset for a window length.
pub fn report_for(data: &Dataset, window_s: f64) -> ReadReport {
    let window_ticks = seconds_to_ticks(window_s, data.tick_rate_hz).max(1);
    let mut in_window: std::collections::HashSet<u32> = std::collections::HashSet::new();
    for t in &data.trials {
        let r = data
            .spikes
            .between(t.onset, t.onset.saturating_add(window_ticks));
        for (_, unit) in data.spikes.range(r) {
            in_window.insert(unit);
        }
    }
    ReadReport {
        spikes: data.spikes.len(),
        trials: data.trials.len(),
        spikes_outside_windows: data.spikes_outside_windows(window_ticks),
        units_without_window_spikes: data
            .units
            .iter()
            .copied()
            .filter(|u| !in_window.contains(u))
            .collect(),
        unlabelled_trials: data.trials.iter().filter(|t| t.stimulus.is_none()).count(),
    }
}

/// Writes a dataset as the two CSV tables (times in seconds, full precision of the tick).
pub fn write_dataset(data: &Dataset, spikes: &Path, trials: &Path) -> std::io::Result<()> {
    use std::io::Write;
    let digits = (data.tick_rate_hz.log10().ceil().max(0.0)) as usize;
    let mut w = std::io::BufWriter::new(std::fs::File::create(spikes)?);
    writeln!(w, "unit,time_s")?;
    for (tick, unit) in data.spikes.iter() {
        writeln!(w, "{unit},{:.*}", digits, tick as f64 / data.tick_rate_hz)?;
    }
    w.flush()?;
    let mut w = std::io::BufWriter::new(std::fs::File::create(trials)?);
    writeln!(w, "trial,onset_s,stimulus")?;
    for t in &data.trials {
        writeln!(
            w,
            "{},{:.*},{}",
            t.id,
            digits,
            t.onset as f64 / data.tick_rate_hz,
            t.stimulus.as_deref().unwrap_or("")
        )?;
    }
    w.flush()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn write(dir: &Path, name: &str, body: &str) -> std::path::PathBuf {
        let p = dir.join(name);
        std::fs::write(&p, body).unwrap();
        p
    }

    fn err(spikes: &str, trials: &str) -> String {
        let d = tempfile::tempdir().unwrap();
        let s = write(d.path(), "s.csv", spikes);
        let t = write(d.path(), "t.csv", trials);
        read_dataset(&s, &t, 1e6, 0.25).unwrap_err().to_string()
    }

    const GOOD_T: &str = "trial,onset_s,stimulus\n1,0.5,N\n2,1.5,S\n";
    const GOOD_S: &str = "unit,time_s\n3,0.51\n3,0.6\n4,1.6\n";

    #[test]
    fn times_beyond_the_clock_are_refused_not_wrapped() {
        // An onset of 1e13 s at 1 MHz is 1e19 ticks, past the tick range (it used to panic
        // computing the window).
        let e = err(GOOD_S, "trial,onset_s,stimulus\n1,1e13,N\n2,1.5,S\n");
        assert!(
            e.contains("t.csv:2") && e.contains("beyond what the clock can count"),
            "{e}"
        );
    }

    /// Carriage-return-only line endings (old spreadsheet exports) are read as lines; a header
    /// that is not one is quoted shortened, not the whole file on one line.
    #[test]
    fn cr_only_tables_are_read_and_bad_headers_quoted_short() {
        let d = tempfile::tempdir().unwrap();
        let s = write(d.path(), "s.csv", "unit,time_s\r3,0.51\r4,1.6\r");
        let t = write(
            d.path(),
            "t.csv",
            "trial,onset_s,stimulus\r1,0.5,N\r2,1.5,S\r",
        );
        let (data, _) = read_dataset(&s, &t, 1e6, 0.25).unwrap();
        assert_eq!(data.spikes, vec![(510_000, 3), (1_600_000, 4)]);
        let long: String = (0..5000).map(|i| format!("c{i},")).collect();
        let e = err(&format!("{long}\n"), GOOD_T);
        assert!(
            e.contains("missing column `unit`") && e.contains("… 4989 more"),
            "{e}"
        );
        assert!(e.len() < 600, "{} characters: {e}", e.len());
    }

    #[test]
    fn tab_and_semicolon_tables_are_read() {
        let d = tempfile::tempdir().unwrap();
        let s = write(d.path(), "s.tsv", "unit\ttime_s\n3\t0.51\n4\t1.6\n");
        let t = write(
            d.path(),
            "t.csv",
            "trial;onset_s;stimulus\n1;0.5;N\n2;1.5;S\n",
        );
        let (data, _) = read_dataset(&s, &t, 1e6, 0.25).unwrap();
        assert_eq!(data.spikes, vec![(510_000, 3), (1_600_000, 4)]);
        assert_eq!(data.trials[1].stimulus.as_deref(), Some("S"));
    }

    fn check(spikes: &str, trials: &str) -> Result<(), String> {
        let d = tempfile::tempdir().unwrap();
        let s = write(d.path(), "s.csv", spikes);
        let t = write(d.path(), "t.csv", trials);
        let (data, rep) = read_dataset(&s, &t, 1e6, 0.25).unwrap();
        check_times(&data, &rep, s.display(), t.display()).map_err(|e| e.to_string())
    }

    #[test]
    fn times_that_cannot_fit_together_are_refused_with_what_was_found() {
        assert!(check(GOOD_S, GOOD_T).is_ok());
        // Spike times in milliseconds under the time_s header.
        let e = check("unit,time_s\n3,510\n3,600\n4,1600\n", GOOD_T).unwrap_err();
        assert!(
            e.contains("look like different units") && e.contains("milliseconds"),
            "{e}"
        );
        assert!(
            e.contains("s.csv") && e.contains("t.csv") && e.contains("--trust-times"),
            "{e}"
        );
        // No overlap.
        let e = check("unit,time_s\n3,10.1\n3,10.6\n4,11.6\n", GOOD_T).unwrap_err();
        assert!(e.contains("do not overlap"), "{e}");
        // Nearly every spike outside every window.
        let mut many = String::from("unit,time_s\n3,0.51\n");
        for i in 0..100 {
            many.push_str(&format!("3,{}\n", 0.8 + i as f64 * 0.0065));
        }
        let e = check(&many, GOOD_T).unwrap_err();
        assert!(e.contains("fall in no trial window"), "{e}");
    }

    #[test]
    fn reads_good_tables_and_reports() {
        let d = tempfile::tempdir().unwrap();
        let s = write(
            d.path(),
            "s.csv",
            "# comment\nunit,time_s,extra\n3,0.51,x\n\n3,3.0,y\n9,0.1,z\n",
        );
        let t = write(d.path(), "t.csv", "stimulus,trial,onset_s\n\"N\",1,0.5\n");
        let (data, rep) = read_dataset(&s, &t, 1e6, 0.25).unwrap();
        assert_eq!(data.spikes.len(), 3);
        assert_eq!(data.trials[0].onset, 500_000);
        assert_eq!(rep.spikes_outside_windows, 2);
        assert_eq!(rep.units_without_window_spikes, vec![9]);
    }

    #[test]
    fn bad_rows_name_file_line_and_problem() {
        assert!(err("unit,time_s\n3,abc\n", GOOD_T)
            .ends_with("s.csv:2: column `time_s`: `abc` is not a number (seconds expected)"));
        assert!(err("unit,time_s\n3,NaN\n", GOOD_T)
            .contains("s.csv:2: column `time_s`: `NaN` is not a finite number"));
        assert!(err("unit,time_s\n3,inf\n", GOOD_T).contains("s.csv:2"));
        assert!(err("unit,time_s\n3,0.1\n3,-0.2\n", GOOD_T)
            .contains("s.csv:3: column `time_s`: -0.2 is negative"));
        assert!(err("unit,time\n3,0.1\n", GOOD_T).contains("s.csv:1: missing column `time_s`"));
        assert!(err("unit,time_s\nx7,0.1\n", GOOD_T)
            .contains("s.csv:2: column `unit`: `x7` is not a valid unit id"));
        assert!(err("unit,time_s\n3\n", GOOD_T).contains("s.csv:2: expected 2 fields"));
        assert!(err(GOOD_S, "trial,onset_s,stimulus\n1,0.5,N\n1,0.9,S\n")
            .contains("t.csv:3: trial 1 is already defined on line 2"));
        assert!(err(GOOD_S, "trial,onset,stimulus\n").contains("t.csv:1: missing column `onset_s`"));
        assert!(err(GOOD_S, "").contains("t.csv: the file is empty"));
        assert!(
            err(GOOD_S, "trial,onset_s,stimulus\n-1,0.5,N\n").contains("t.csv:2: column `trial`")
        );
    }

    #[test]
    fn missing_file_is_named() {
        let e = read_dataset(
            Path::new("/nonexistent/s.csv"),
            Path::new("/nonexistent/t.csv"),
            1e6,
            0.25,
        )
        .unwrap_err();
        assert!(e.to_string().starts_with("/nonexistent/s.csv: cannot read"));
    }
}
