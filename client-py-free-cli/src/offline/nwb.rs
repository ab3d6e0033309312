//! Reading Neurodata Without Borders (NWB 2.x) files into a [`Dataset`]: sorted units from the
//! `units` table (`spike_times` split by `spike_times_index`), trials from a `TimeIntervals`
//! table (`intervals/trials` unless another is chosen), the stimulus from one of its columns
//! (text or numbers). Seconds become ticks by the one rule the CSV tables use
//! ([`seconds_to_ticks`]), with the same checks on each time and the same check that spikes and
//! trials fit together ([`crate::tables::check_times`]).
//!
//! HDF5 is read by `hdf5-pure` (pure Rust: no C library to install, and a damaged file is a
//! parse error rather than a crash in C code; its own rare panics on malformed bytes are caught
//! here and reported as a damaged file). Every size the file declares is checked against the
//! process's memory budget before it is read.
//!
//! Must not: drop a unit, spike or trial without an error or a note that says so.

use crate::tables::{ReadReport, TableError};
use auspex_engine::data::{printable, seconds_to_ticks, Dataset, Trial};
use auspex_engine::spikes::{SpikeTable, SpikeTableBuilder};
use hdf5_pure::{AttrValue, DType, File};
use std::collections::{BTreeMap, HashMap};
use std::path::{Path, PathBuf};

/// The largest tick a time may become (as in the CSV tables).
const MAX_TICK: f64 = 4.0e18;
/// Spike times are converted to ticks this many at a time (bounded extra memory).
const ROWS_PER_READ: u64 = 1 << 20;

/// Which units to take from the `units` table.
#[derive(Clone, Debug, PartialEq)]
pub enum UnitPick {
    /// Every unit.
    All,
    /// Units with these ids (the table's `id` column).
    Ids(Vec<u32>),
    /// Units whose `column` is true (a boolean column) or equals `value` (text or numbers).
    Where {
        /// Column of the units table.
        column: String,
        /// The value to keep; None for a boolean column.
        value: Option<String>,
    },
}

impl UnitPick {
    /// Parses `all`, `3,5,9` (ids) or `COLUMN` / `COLUMN=VALUE`.
    pub fn parse(s: &str) -> Result<Self, String> {
        let s = s.trim();
        if s.is_empty() || s.eq_ignore_ascii_case("all") {
            return Ok(UnitPick::All);
        }
        if s.chars()
            .all(|c| c.is_ascii_digit() || c == ',' || c == ' ')
        {
            let ids = s
                .split(',')
                .filter(|x| !x.trim().is_empty())
                .map(|x| {
                    x.trim()
                        .parse::<u32>()
                        .map_err(|e| format!("unit id `{x}`: {e}"))
                })
                .collect::<Result<Vec<_>, _>>()?;
            return Ok(UnitPick::Ids(ids));
        }
        Ok(match s.split_once('=') {
            Some((c, v)) => UnitPick::Where {
                column: c.trim().to_string(),
                value: Some(v.trim().to_string()),
            },
            None => UnitPick::Where {
                column: s.to_string(),
                value: None,
            },
        })
    }
}

impl std::fmt::Display for UnitPick {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            UnitPick::All => write!(f, "all"),
            UnitPick::Ids(v) => write!(
                f,
                "{}",
                v.iter().map(u32::to_string).collect::<Vec<_>>().join(",")
            ),
            UnitPick::Where {
                column,
                value: None,
            } => write!(f, "{column}"),
            UnitPick::Where {
                column,
                value: Some(v),
            } => write!(f, "{column}={v}"),
        }
    }
}

/// What to read from an NWB file.
#[derive(Clone, Debug, PartialEq)]
pub struct NwbChoice {
    /// The trials table: a name under `intervals/` or a path in the file.
    pub table: String,
    /// The column naming the stimulus; None: `stimulus` if the table has one.
    pub stimulus: Option<String>,
    /// The onset column (seconds).
    pub onset: String,
    /// Which units.
    pub units: UnitPick,
}

impl Default for NwbChoice {
    fn default() -> Self {
        NwbChoice {
            table: "trials".into(),
            stimulus: None,
            onset: "start_time".into(),
            units: UnitPick::All,
        }
    }
}

impl NwbChoice {
    /// The table's path in the file.
    fn table_path(&self) -> String {
        let t = self.table.trim_matches('/');
        if t.contains('/') {
            t.to_string()
        } else {
            format!("intervals/{t}")
        }
    }

    /// The choice in words (provenance, messages).
    pub fn describe(&self) -> String {
        format!(
            "trials from {}, onset {}, stimulus {}, units {}",
            self.table_path(),
            self.onset,
            self.stimulus.as_deref().unwrap_or("stimulus"),
            self.units
        )
    }
}

/// An error about `file`, optionally a table and a row in it.
fn err(file: &str, what: impl std::fmt::Display) -> TableError {
    TableError(format!("{file}: {what}"))
}

/// Runs `f`, turning a panic inside the HDF5 reader (malformed bytes it did not foresee) into an
/// error naming the file.
fn guarded<T>(file: &str, f: impl FnOnce() -> Result<T, TableError>) -> Result<T, TableError> {
    let prev = std::panic::take_hook();
    std::panic::set_hook(Box::new(|_| {}));
    let out = std::panic::catch_unwind(std::panic::AssertUnwindSafe(f));
    std::panic::set_hook(prev);
    match out {
        Ok(r) => r,
        Err(p) => {
            let why = p
                .downcast_ref::<&str>()
                .map(|s| s.to_string())
                .or_else(|| p.downcast_ref::<String>().cloned())
                .unwrap_or_default();
            Err(err(
                file,
                format!(
                    "the HDF5 data are damaged (the reader stopped: {why}); is the file complete?"
                ),
            ))
        }
    }
}

/// Where the file should end, by its superblock.
fn nwb_superblock_end(file: &File) -> u64 {
    let sb = file.superblock();
    sb.base_address.get().saturating_add(sb.eof_address)
}

/// An open NWB file.
pub struct Nwb {
    file: File,
    /// The path as given, for messages.
    pub name: String,
}

/// One column of a table, read whole.
#[derive(Clone, Debug)]
pub enum Column {
    /// Floating point.
    Float(Vec<f64>),
    /// Signed integers.
    Int(Vec<i64>),
    /// Booleans (HDF5's enum FALSE/TRUE, as h5py writes them).
    Bool(Vec<bool>),
    /// Text.
    Text(Vec<String>),
}

impl Column {
    fn len(&self) -> usize {
        match self {
            Column::Float(v) => v.len(),
            Column::Int(v) => v.len(),
            Column::Bool(v) => v.len(),
            Column::Text(v) => v.len(),
        }
    }
    /// Row `i` as text (numbers as Rust prints them: 90.0 → "90"), None for a missing value
    /// (NaN, an empty string).
    fn text(&self, i: usize) -> Option<String> {
        match self {
            Column::Float(v) => v[i].is_finite().then(|| format!("{}", v[i])),
            Column::Int(v) => Some(v[i].to_string()),
            Column::Bool(v) => Some(v[i].to_string()),
            Column::Text(v) => (!v[i].is_empty()).then(|| v[i].clone()),
        }
    }
}

fn type_name(d: &DType) -> String {
    match d {
        DType::String | DType::VariableLengthString => "text".into(),
        DType::Enum(names) if is_bool_enum(names) => "bool".into(),
        other => other.to_string(),
    }
}

fn is_bool_enum(names: &[String]) -> bool {
    names.len() == 2
        && names[0].eq_ignore_ascii_case("false")
        && names[1].eq_ignore_ascii_case("true")
}

fn attr_text(v: &AttrValue) -> Option<String> {
    match v {
        AttrValue::String(s)
        | AttrValue::AsciiString(s)
        | AttrValue::VarLenString(s)
        | AttrValue::VarLenAsciiString(s) => Some(s.clone()),
        AttrValue::StringSized { value, .. } => Some(value.clone()),
        _ => None,
    }
}

fn attr_list(v: &AttrValue) -> Option<Vec<String>> {
    match v {
        AttrValue::StringArray(s)
        | AttrValue::AsciiStringArray(s)
        | AttrValue::VarLenStringArray(s)
        | AttrValue::VarLenAsciiStringArray(s)
        | AttrValue::VarLenAsciiCharArray(s) => Some(s.clone()),
        other => attr_text(other).map(|s| vec![s]),
    }
}

/// A table of the file (a DynamicTable: columns of equal length, `id`, ragged columns with an
/// `_index`).
pub struct TableInfo {
    /// Path in the file.
    pub path: String,
    /// Its NWB type (TimeIntervals, Units, …).
    pub kind: String,
    /// Rows (length of `id`).
    pub rows: u64,
    /// Columns in the file's order: name, type, ragged.
    pub columns: Vec<(String, String, bool)>,
}

impl Nwb {
    /// Opens `path`, refusing what is not HDF5 or not NWB with what was found.
    pub fn open(path: &Path) -> Result<Self, TableError> {
        let name = path.display().to_string();
        let meta = std::fs::metadata(path).map_err(|e| err(&name, format!("cannot read: {e}")))?;
        if meta.is_dir() {
            return Err(err(&name, "is a directory; give an NWB file"));
        }
        let mut head = [0u8; 8];
        {
            use std::io::Read;
            let mut f =
                std::fs::File::open(path).map_err(|e| err(&name, format!("cannot read: {e}")))?;
            let n = f.read(&mut head).unwrap_or(0);
            if n < 8 || &head != b"\x89HDF\r\n\x1a\n" {
                // An HDF5 file may carry a user block before its signature; let the reader look.
                if !hdf5_pure::is_hdf5(path).unwrap_or(false) {
                    return Err(err(
                        &name,
                        "is not an HDF5 file (no HDF5 signature); NWB files are HDF5 — give the .nwb file",
                    ));
                }
            }
        }
        let file = guarded(&name, || {
            File::open_streaming(path).map_err(|e| {
                err(
                    &name,
                    format!("cannot be read as HDF5: {e} (is the file truncated?)"),
                )
            })
        })?;
        let sb = nwb_superblock_end(&file);
        if sb > meta.len() {
            return Err(err(
                &name,
                format!(
                    "is truncated: {} bytes of the {sb} its HDF5 header declares (was the copy interrupted, or is the file still being written?)",
                    meta.len()
                ),
            ));
        }
        let nwb = Nwb { file, name };
        let root = nwb.guard(|| {
            nwb.file
                .root()
                .attrs()
                .map_err(|e| nwb.fail("", &format!("cannot read the root attributes: {e}")))
        })?;
        let kind = root.get("neurodata_type").and_then(attr_text);
        if kind.as_deref() != Some("NWBFile") {
            return Err(err(
                &nwb.name,
                format!(
                    "is HDF5 but not an NWB file (its root has neurodata_type {}, not NWBFile)",
                    kind.map(|k| format!("`{}`", printable(&k)))
                        .unwrap_or_else(|| "missing".into())
                ),
            ));
        }
        if let Some(v) = root.get("nwb_version").and_then(attr_text) {
            if !v.starts_with('2') {
                return Err(err(
                    &nwb.name,
                    format!("is NWB version {}; Auspex reads NWB 2.x", printable(&v)),
                ));
            }
        }
        Ok(nwb)
    }

    fn guard<T>(&self, f: impl FnOnce() -> Result<T, TableError>) -> Result<T, TableError> {
        guarded(&self.name, f)
    }

    fn fail(&self, table: &str, what: &str) -> TableError {
        if table.is_empty() {
            err(&self.name, what)
        } else {
            err(&self.name, format!("{table}: {what}"))
        }
    }

    /// The file's session start time and identifier, as written.
    pub fn session(&self) -> (Option<String>, Option<String>) {
        let s = |p: &str| {
            self.guard(|| {
                Ok(self
                    .file
                    .dataset(p)
                    .ok()
                    .and_then(|d| d.read_string().ok())
                    .and_then(|v| v.into_iter().next()))
            })
            .ok()
            .flatten()
        };
        (s("session_start_time"), s("identifier"))
    }

    /// A table's columns and length, refusing what is not a table.
    pub fn table(&self, path: &str) -> Result<TableInfo, TableError> {
        self.guard(|| {
            let g = self.file.group(path).map_err(|_| {
                let known = self.time_interval_tables().unwrap_or_default();
                self.fail(
                    "",
                    &format!(
                        "has no table `{path}`{}",
                        if known.is_empty() {
                            String::new()
                        } else {
                            format!(" (its interval tables: {})", known.join(", "))
                        }
                    ),
                )
            })?;
            let attrs = g
                .attrs()
                .map_err(|e| self.fail(path, &format!("cannot read its attributes: {e}")))?;
            let kind = attrs
                .get("neurodata_type")
                .and_then(attr_text)
                .unwrap_or_default();
            let colnames = attrs.get("colnames").and_then(attr_list).unwrap_or_default();
            let datasets = g
                .datasets()
                .map_err(|e| self.fail(path, &format!("cannot list its columns: {e}")))?;
            if !datasets.iter().any(|d| d == "id") {
                return Err(self.fail(
                    path,
                    "is not a table (it has no `id` column); give a TimeIntervals table such as intervals/trials",
                ));
            }
            let rows = self.shape_1d(path, "id")?;
            let mut columns = Vec::new();
            let mut names: Vec<String> = colnames.clone();
            for d in &datasets {
                if d != "id" && !d.ends_with("_index") && !names.contains(d) {
                    names.push(d.clone());
                }
            }
            for c in names {
                if !datasets.contains(&c) {
                    continue;
                }
                let ragged = datasets.contains(&format!("{c}_index"));
                let ty = g
                    .dataset(&c)
                    .and_then(|d| d.dtype())
                    .map(|t| type_name(&t))
                    .unwrap_or_else(|_| "unreadable".into());
                columns.push((c, ty, ragged));
            }
            Ok(TableInfo {
                path: path.to_string(),
                kind,
                rows,
                columns,
            })
        })
    }

    /// The `TimeIntervals` tables under `intervals/` (and at the root's `intervals`).
    pub fn time_interval_tables(&self) -> Result<Vec<String>, TableError> {
        self.guard(|| {
            let Ok(g) = self.file.group("intervals") else {
                return Ok(Vec::new());
            };
            let mut out = Vec::new();
            for name in g.groups().unwrap_or_default() {
                out.push(format!("intervals/{name}"));
            }
            Ok(out)
        })
    }

    fn shape_1d(&self, table: &str, col: &str) -> Result<u64, TableError> {
        let d = self
            .file
            .dataset(&format!("{table}/{col}"))
            .map_err(|_| self.fail(table, &format!("has no column `{col}`")))?;
        let shape = d.shape().map_err(|e| {
            self.fail(
                table,
                &format!("column `{col}`: cannot read its shape: {e}"),
            )
        })?;
        match shape.as_slice() {
            [n] => Ok(*n),
            other => Err(self.fail(
                table,
                &format!("column `{col}` has shape {other:?}; Auspex reads one value per row"),
            )),
        }
    }

    /// Reads a whole column after checking its size against the memory budget.
    pub fn column(&self, table: &str, col: &str) -> Result<Column, TableError> {
        self.guard(|| {
            let n = self.shape_1d(table, col)?;
            let d = self.file.dataset(&format!("{table}/{col}")).map_err(|e| {
                self.fail(table, &format!("column `{col}`: {e}"))
            })?;
            let ty = d
                .dtype()
                .map_err(|e| self.fail(table, &format!("column `{col}`: {e}")))?;
            let width = d.element_size().unwrap_or(8).max(8) as u128;
            auspex_engine::budget::check(
                &format!("{}: {table}/{col}", self.name),
                || format!("{n} rows of {width} bytes"),
                (n as u128).saturating_mul(width + 24),
            )
            .map_err(|e| TableError(e.to_string()))?;
            let bad = |e: hdf5_pure::Error| self.fail(table, &format!("column `{col}`: cannot read it: {e}"));
            let c = match &ty {
                DType::F32 | DType::F64 => Column::Float(d.read_f64().map_err(bad)?),
                DType::I8 | DType::I16 | DType::I32 | DType::I64 | DType::U8 | DType::U16
                | DType::U32 => Column::Int(d.read_i64().map_err(bad)?),
                DType::U64 => {
                    let v = d.read_u64().map_err(bad)?;
                    let mut out = Vec::with_capacity(v.len());
                    for (row, x) in v.into_iter().enumerate() {
                        out.push(i64::try_from(x).map_err(|_| {
                            self.fail(table, &format!("row {row}: column `{col}`: {x} is too large"))
                        })?);
                    }
                    Column::Int(out)
                }
                DType::String | DType::VariableLengthString => {
                    Column::Text(d.read_string().map_err(bad)?)
                }
                DType::Enum(names) if is_bool_enum(names) => {
                    Column::Bool(d.read_i64().map_err(bad)?.into_iter().map(|x| x != 0).collect())
                }
                other => {
                    return Err(self.fail(
                        table,
                        &format!("column `{col}` holds {other}, which Auspex does not read (text, numbers or booleans)"),
                    ))
                }
            };
            if c.len() as u64 != n {
                return Err(self.fail(
                    table,
                    &format!("column `{col}`: {} values read of {n} declared", c.len()),
                ));
            }
            Ok(c)
        })
    }

    /// A ragged column's index (one end offset per row), checked: non-decreasing and within
    /// `data_len`.
    fn index(&self, table: &str, col: &str, data_len: u64) -> Result<Vec<u64>, TableError> {
        let idx = format!("{col}_index");
        let v = match self.column(table, &idx)? {
            Column::Int(v) => v,
            _ => return Err(self.fail(table, &format!("`{idx}` is not a column of integers"))),
        };
        let mut prev = 0u64;
        let mut out = Vec::with_capacity(v.len());
        for (row, x) in v.into_iter().enumerate() {
            let x = u64::try_from(x)
                .map_err(|_| self.fail(table, &format!("row {row}: `{idx}` is negative ({x})")))?;
            if x < prev {
                return Err(self.fail(
                    table,
                    &format!("row {row}: `{idx}` goes back ({x} after {prev}); the index must not decrease"),
                ));
            }
            if x > data_len {
                return Err(self.fail(
                    table,
                    &format!("row {row}: `{idx}` points past the end of `{col}` ({x} of {data_len} values)"),
                ));
            }
            prev = x;
            out.push(x);
        }
        Ok(out)
    }

    fn check_seconds(
        &self,
        table: &str,
        row: usize,
        col: &str,
        x: f64,
        tick_rate_hz: f64,
    ) -> Result<(), TableError> {
        let why = if !x.is_finite() {
            format!("{x} is not a finite number")
        } else if x < 0.0 {
            format!("{x} is negative; times are seconds from the file's reference time")
        } else if x * tick_rate_hz > MAX_TICK {
            format!(
                "{x} s is beyond what the clock can count at {tick_rate_hz} ticks/s (at most {:.3e} s)",
                MAX_TICK / tick_rate_hz
            )
        } else {
            return Ok(());
        };
        Err(self.fail(table, &format!("row {row}: column `{col}`: {why}")))
    }

    /// Reads the chosen units and trials into a dataset at `tick_rate_hz`; `notes` gets what
    /// the reader decided that a user should know (units left out, part-way units).
    pub fn dataset(
        &self,
        choice: &NwbChoice,
        tick_rate_hz: f64,
        notes: &mut Vec<String>,
    ) -> Result<Dataset, TableError> {
        if !(tick_rate_hz.is_finite() && tick_rate_hz >= 1.0) {
            return Err(TableError(format!(
                "tick rate {tick_rate_hz} must be at least 1 tick per second"
            )));
        }
        let trials = self.trials(choice, tick_rate_hz)?;
        let (spikes, units, declared_from) = self.units(choice, tick_rate_hz, &trials, notes)?;
        Ok(Dataset {
            tick_rate_hz,
            trials,
            spikes,
            units,
            declared_from,
            stimulus_order: Vec::new(),
        })
    }

    fn trials(&self, choice: &NwbChoice, tick_rate_hz: f64) -> Result<Vec<Trial>, TableError> {
        let path = choice.table_path();
        let info = self.table(&path)?;
        let cols: Vec<&str> = info.columns.iter().map(|c| c.0.as_str()).collect();
        let stim_col = match &choice.stimulus {
            Some(c) => c.clone(),
            None if cols.contains(&"stimulus") => "stimulus".into(),
            None => {
                let own: Vec<&str> = cols
                    .iter()
                    .copied()
                    .filter(|c| !["start_time", "stop_time", "tags", "timeseries"].contains(c))
                    .collect();
                return Err(self.fail(
                    &path,
                    &format!(
                        "has no column named `stimulus`; say which column names the stimulus with --nwb-stimulus (its columns: {})",
                        if own.is_empty() { "none besides the times".to_string() } else { own.join(", ") }
                    ),
                ));
            }
        };
        for c in [&stim_col, &choice.onset] {
            match info.columns.iter().find(|x| &x.0 == c) {
                None => {
                    return Err(self.fail(
                        &path,
                        &format!("has no column `{c}` (its columns: {})", cols.join(", ")),
                    ))
                }
                Some((_, _, true)) => {
                    return Err(self.fail(
                        &path,
                        &format!("column `{c}` is ragged (several values per row); Auspex needs one value per trial"),
                    ))
                }
                _ => {}
            }
        }
        let ids = match self.column(&path, "id")? {
            Column::Int(v) => v,
            _ => return Err(self.fail(&path, "`id` is not a column of integers")),
        };
        let onsets = match self.column(&path, &choice.onset)? {
            Column::Float(v) => v,
            Column::Int(v) => v.into_iter().map(|x| x as f64).collect(),
            _ => {
                return Err(self.fail(
                    &path,
                    &format!(
                        "column `{}` is not numbers (seconds expected)",
                        choice.onset
                    ),
                ))
            }
        };
        let stim = self.column(&path, &stim_col)?;
        let n = ids.len();
        if onsets.len() != n || stim.len() != n {
            return Err(self.fail(
                &path,
                &format!(
                    "columns of different lengths: id {n}, {} {}, {stim_col} {}",
                    choice.onset,
                    onsets.len(),
                    stim.len()
                ),
            ));
        }
        let mut seen: HashMap<u64, usize> = HashMap::with_capacity(n);
        let mut out = Vec::with_capacity(n);
        for row in 0..n {
            let id = u64::try_from(ids[row]).map_err(|_| {
                self.fail(
                    &path,
                    &format!("row {row}: trial id {} is negative", ids[row]),
                )
            })?;
            if let Some(prev) = seen.insert(id, row) {
                return Err(self.fail(
                    &path,
                    &format!("row {row}: trial id {id} is already used by row {prev}"),
                ));
            }
            self.check_seconds(&path, row, &choice.onset, onsets[row], tick_rate_hz)?;
            // An empty text label is a trial never labelled, as in the CSV tables (decoded, not
            // fitted, counted in the read report); a number that is missing (NaN) is refused.
            let label = match (&stim, stim.text(row)) {
                (_, Some(s)) => Some(s),
                (Column::Text(_), None) => None,
                _ => {
                    return Err(self.fail(
                        &path,
                        &format!(
                            "row {row}: column `{stim_col}` has no value (NaN); every trial needs its stimulus (pick another table or column, or fill it in the file)"
                        ),
                    ))
                }
            };
            out.push(Trial {
                id,
                onset: seconds_to_ticks(onsets[row], tick_rate_hz),
                stimulus: label,
            });
        }
        out.sort_by_key(|t| (t.onset, t.id));
        Ok(out)
    }

    #[allow(clippy::type_complexity)]
    fn units(
        &self,
        choice: &NwbChoice,
        tick_rate_hz: f64,
        trials: &[Trial],
        notes: &mut Vec<String>,
    ) -> Result<(SpikeTable, Vec<u32>, BTreeMap<u32, i64>), TableError> {
        let path = "units";
        let info = self.table(path)?;
        if !info.columns.iter().any(|c| c.0 == "spike_times" && c.2) {
            return Err(self.fail(
                path,
                "has no spike times (no ragged `spike_times` column with `spike_times_index`); Auspex needs sorted units with their spike times",
            ));
        }
        let ids = match self.column(path, "id")? {
            Column::Int(v) => v,
            _ => return Err(self.fail(path, "`id` is not a column of integers")),
        };
        let mut unit_ids = Vec::with_capacity(ids.len());
        let mut seen: HashMap<u32, usize> = HashMap::with_capacity(ids.len());
        for (row, &x) in ids.iter().enumerate() {
            let u = u32::try_from(x).map_err(|_| {
                self.fail(
                    path,
                    &format!("row {row}: unit id {x} is not between 0 and {}", u32::MAX),
                )
            })?;
            if let Some(prev) = seen.insert(u, row) {
                return Err(self.fail(
                    path,
                    &format!("row {row}: unit id {u} is already used by row {prev}"),
                ));
            }
            unit_ids.push(u);
        }
        let keep: Vec<bool> = match &choice.units {
            UnitPick::All => vec![true; unit_ids.len()],
            UnitPick::Ids(want) => {
                let missing: Vec<String> = want
                    .iter()
                    .filter(|u| !seen.contains_key(u))
                    .map(u32::to_string)
                    .collect();
                if !missing.is_empty() {
                    return Err(self.fail(
                        path,
                        &format!("has no unit with id {} (--nwb-units)", missing.join(", ")),
                    ));
                }
                unit_ids.iter().map(|u| want.contains(u)).collect()
            }
            UnitPick::Where { column, value } => {
                if !info.columns.iter().any(|c| &c.0 == column) {
                    let cols: Vec<&str> = info
                        .columns
                        .iter()
                        .map(|c| c.0.as_str())
                        .filter(|c| *c != "spike_times")
                        .collect();
                    return Err(self.fail(
                        path,
                        &format!(
                            "has no column `{column}` to choose units by (its columns: {})",
                            cols.join(", ")
                        ),
                    ));
                }
                let c = self.column(path, column)?;
                if c.len() != unit_ids.len() {
                    return Err(self.fail(
                        path,
                        &format!(
                            "column `{column}` has {} rows, `id` {}",
                            c.len(),
                            unit_ids.len()
                        ),
                    ));
                }
                match (&c, value) {
                    (Column::Bool(v), None) => v.clone(),
                    (_, None) => {
                        return Err(self.fail(
                            path,
                            &format!("column `{column}` is not true/false; give the value to keep: --nwb-units {column}=VALUE"),
                        ))
                    }
                    (c, Some(want)) => {
                        let want_num: Option<f64> = want.parse().ok();
                        (0..c.len())
                            .map(|i| match (c, want_num) {
                                (Column::Float(v), Some(w)) => v[i] == w,
                                (Column::Int(v), Some(w)) => v[i] as f64 == w,
                                (Column::Bool(v), _) => v[i].to_string() == want.to_ascii_lowercase(),
                                _ => c.text(i).as_deref() == Some(want.as_str()),
                            })
                            .collect()
                    }
                }
            }
        };
        let kept = keep.iter().filter(|k| **k).count();
        if kept == 0 {
            return Err(self.fail(
                path,
                &format!(
                    "no unit is chosen by --nwb-units {} (of {} units)",
                    choice.units,
                    unit_ids.len()
                ),
            ));
        }
        if kept < unit_ids.len() {
            notes.push(format!(
                "{}: {} of {} units chosen by --nwb-units {}",
                self.name,
                kept,
                unit_ids.len(),
                choice.units
            ));
        }
        let total = self.shape_1d(path, "spike_times")?;
        let index = self.index(path, "spike_times", total)?;
        if index.len() != unit_ids.len() {
            return Err(self.fail(
                path,
                &format!(
                    "`spike_times_index` has {} rows, `id` {}",
                    index.len(),
                    unit_ids.len()
                ),
            ));
        }
        let wanted: u64 = (0..index.len())
            .filter(|&r| keep[r])
            .map(|r| index[r] - if r == 0 { 0 } else { index[r - 1] })
            .sum();
        auspex_engine::budget::check(
            &format!("{}: the chosen units' spikes", self.name),
            || format!("{wanted} spikes"),
            (wanted as u128).saturating_mul(8),
        )
        .map_err(|e| TableError(e.to_string()))?;
        let d = self.guard(|| {
            self.file
                .dataset(&format!("{path}/spike_times"))
                .map_err(|e| self.fail(path, &format!("column `spike_times`: {e}")))
        })?;
        // Kept units' spikes go straight into the 8-byte-per-spike table (times are checked
        // non-negative, so tick 0 is the floor).
        let kept_ids: Vec<u32> = (0..unit_ids.len())
            .filter(|&r| keep[r])
            .map(|r| unit_ids[r])
            .collect();
        let mut spikes = SpikeTableBuilder::new(&kept_ids, 0, wanted as usize);
        let slots: Vec<usize> = (0..unit_ids.len())
            .map(|r| {
                if keep[r] {
                    spikes.slot(unit_ids[r]).unwrap_or(0)
                } else {
                    0
                }
            })
            .collect();
        // Rows are read a slab at a time and converted at once (bounded extra memory).
        let mut row = 0usize;
        let mut start = 0u64;
        while start < total {
            let n = ROWS_PER_READ.min(total - start);
            let slab = self.guard(|| {
                d.read_f64_rows(start, n).map_err(|e| {
                    self.fail(
                        path,
                        &format!(
                            "column `spike_times`: cannot read rows {start}–{}: {e}",
                            start + n
                        ),
                    )
                })
            })?;
            for (k, &t) in slab.iter().enumerate() {
                let i = start + k as u64;
                while row < index.len() && index[row] <= i {
                    row += 1;
                }
                if row >= index.len() {
                    break; // values past the last unit's end belong to no unit
                }
                if !keep[row] {
                    continue;
                }
                if !t.is_finite() || t < 0.0 || t * tick_rate_hz > MAX_TICK {
                    let first = if row == 0 { 0 } else { index[row - 1] };
                    return Err(self.fail(
                        path,
                        &format!(
                            "row {row} (unit {}): spike {} of its spike_times: {}",
                            unit_ids[row],
                            i - first,
                            if !t.is_finite() {
                                format!("{t} is not a finite number")
                            } else if t < 0.0 {
                                format!("{t} is negative; times are seconds from the file's reference time")
                            } else {
                                format!("{t} s is beyond what the clock can count at {tick_rate_hz} ticks/s")
                            }
                        ),
                    ));
                }
                spikes.push(seconds_to_ticks(t, tick_rate_hz), slots[row]);
            }
            start += n;
        }
        let unused = total - index.last().copied().unwrap_or(0);
        if unused > 0 {
            notes.push(format!(
                "{}: units: {unused} spike times after the last unit's end belong to no unit and were not read",
                self.name
            ));
        }
        let spikes = spikes.finish();
        let mut units = kept_ids;
        units.sort_unstable();
        // Units observed from part-way on (`obs_intervals`): their earlier silence is no evidence.
        let mut declared_from = BTreeMap::new();
        if info.columns.iter().any(|c| c.0 == "obs_intervals" && c.2) {
            let iv = self.obs_intervals(path)?;
            let first_onset = trials.first().map(|t| t.onset).unwrap_or(0);
            let last_onset = trials.last().map(|t| t.onset).unwrap_or(0);
            let mut gaps = Vec::new();
            for (r, spans) in iv.iter().enumerate() {
                if !keep.get(r).copied().unwrap_or(false) || spans.is_empty() {
                    continue;
                }
                for &(a, b) in spans {
                    self.check_seconds(path, r, "obs_intervals", a, tick_rate_hz)?;
                    self.check_seconds(path, r, "obs_intervals", b, tick_rate_hz)?;
                }
                let from = seconds_to_ticks(spans[0].0, tick_rate_hz);
                if from > first_onset {
                    declared_from.insert(unit_ids[r], from);
                }
                let until =
                    seconds_to_ticks(spans.last().map(|s| s.1).unwrap_or(0.0), tick_rate_hz);
                if spans.len() > 1 || until < last_onset {
                    gaps.push(unit_ids[r].to_string());
                }
            }
            if !declared_from.is_empty() {
                notes.push(format!(
                    "{}: {} observed from part-way (obs_intervals): each is fitted only on the trials after its observation starts",
                    self.name,
                    crate::counted(declared_from.len() as u64, "unit is", "units are")
                ));
            }
            if !gaps.is_empty() {
                notes.push(format!(
                    "{}: units {} have gaps in, or an early end of, their observation (obs_intervals); Auspex counts their silence there as evidence",
                    self.name,
                    gaps.join(", ")
                ));
            }
        }
        Ok((spikes, units, declared_from))
    }

    /// Each unit's observation intervals, (start, stop) in seconds.
    fn obs_intervals(&self, path: &str) -> Result<Vec<Vec<(f64, f64)>>, TableError> {
        let flat = match self.column(path, "obs_intervals") {
            Ok(Column::Float(v)) => v,
            Ok(_) => return Err(self.fail(path, "`obs_intervals` is not numbers")),
            // A 2-column dataset: read it flat.
            Err(_) => self.guard(|| {
                let d = self
                    .file
                    .dataset(&format!("{path}/obs_intervals"))
                    .map_err(|e| self.fail(path, &format!("`obs_intervals`: {e}")))?;
                let shape = d
                    .shape()
                    .map_err(|e| self.fail(path, &format!("`obs_intervals`: {e}")))?;
                if shape.len() != 2 || shape[1] != 2 {
                    return Err(self.fail(
                        path,
                        &format!("`obs_intervals` has shape {shape:?}, expected (n, 2)"),
                    ));
                }
                auspex_engine::budget::check(
                    &format!("{}: units/obs_intervals", self.name),
                    || format!("{} intervals", shape[0]),
                    (shape[0] as u128).saturating_mul(16),
                )
                .map_err(|e| TableError(e.to_string()))?;
                d.read_f64()
                    .map_err(|e| self.fail(path, &format!("`obs_intervals`: {e}")))
            })?,
        };
        let pairs = (flat.len() / 2) as u64;
        let index = self.index(path, "obs_intervals", pairs)?;
        let mut out = Vec::with_capacity(index.len());
        let mut a = 0usize;
        for &b in &index {
            out.push(
                (a..b as usize)
                    .map(|k| (flat[2 * k], flat[2 * k + 1]))
                    .collect(),
            );
            a = b as usize;
        }
        Ok(out)
    }

    /// What `auspex inspect --nwb` prints: the session, every table with its columns (type and
    /// example values), the units and their spike counts.
    pub fn summary(&self) -> Result<String, TableError> {
        use std::fmt::Write;
        let mut s = String::new();
        let (start, ident) = self.session();
        let _ = writeln!(
            s,
            "{}: NWB file{}{}",
            self.name,
            ident
                .map(|i| format!(" `{}`", printable(&i)))
                .unwrap_or_default(),
            start
                .map(|t| format!("\n  session start {}", printable(&t)))
                .unwrap_or_default()
        );
        let mut tables = self.time_interval_tables()?;
        tables.push("units".into());
        for t in tables {
            let info = match self.table(&t) {
                Ok(i) => i,
                Err(e) => {
                    let _ = writeln!(s, "\n{t}: not a table Auspex can read ({e})");
                    continue;
                }
            };
            let _ = writeln!(
                s,
                "\n{t} ({}{} rows){}",
                if info.kind.is_empty() {
                    String::new()
                } else {
                    format!("{}, ", info.kind)
                },
                info.rows,
                if t.starts_with("intervals/") {
                    format!("  → --nwb-trials {}", t.trim_start_matches("intervals/"))
                } else {
                    String::new()
                }
            );
            for (c, ty, ragged) in &info.columns {
                let dims = self
                    .guard(|| {
                        Ok(self
                            .file
                            .dataset(&format!("{t}/{c}"))
                            .and_then(|d| d.shape())
                            .unwrap_or_default())
                    })
                    .unwrap_or_default();
                let ex = if *ragged {
                    "(several values per row)".to_string()
                } else if dims.len() > 1 {
                    format!("({} values per row)", dims[1..].iter().product::<u64>())
                } else {
                    match self.column(&t, c) {
                        // The line's start: two spaces, the name in 20, a space, the type in 6
                        // and a space; what is left of 80 columns goes to the examples.
                        Ok(col) => examples(
                            &col,
                            79usize.saturating_sub(
                                30 + printable(c).chars().count().saturating_sub(20),
                            ),
                        ),
                        Err(_) => "(unreadable)".into(),
                    }
                };
                let _ = writeln!(
                    s,
                    "  {:<20} {:<6} {}",
                    printable(c),
                    if *ragged {
                        "ragged".to_string()
                    } else {
                        ty.clone()
                    },
                    ex
                );
            }
        }
        // Units and their spike counts.
        if let Ok(total) = self.guard(|| self.shape_1d("units", "spike_times")) {
            if let (Ok(Column::Int(ids)), Ok(index)) = (
                self.column("units", "id"),
                self.index("units", "spike_times", total),
            ) {
                let counts: Vec<(i64, u64)> = index
                    .iter()
                    .enumerate()
                    .map(|(r, &b)| {
                        (
                            ids.get(r).copied().unwrap_or(-1),
                            b - if r == 0 { 0 } else { index[r - 1] },
                        )
                    })
                    .collect();
                let _ = writeln!(
                    s,
                    "\n{} with {} spikes in all:",
                    crate::counted(counts.len() as u64, "unit", "units"),
                    total
                );
                let mut shown: Vec<String> = counts
                    .iter()
                    .take(40)
                    .map(|(u, n)| format!("{u}: {n}"))
                    .collect();
                if counts.len() > 40 {
                    shown.push(format!("… {} more", counts.len() - 40));
                }
                // Wrapped to fit 80 columns.
                let mut line = String::from(" ");
                for (i, x) in shown.iter().enumerate() {
                    let piece = if i + 1 < shown.len() {
                        format!(" {x},")
                    } else {
                        format!(" {x}")
                    };
                    if line.len() + piece.len() > 78 {
                        let _ = writeln!(s, "{line}");
                        line = String::from(" ");
                    }
                    line += &piece;
                }
                let _ = writeln!(s, "{line}");
            }
        }
        Ok(s)
    }
}

/// `x` to 6 significant digits, without trailing zeros.
fn short_number(x: f64) -> String {
    if x == 0.0 {
        return "0".into();
    }
    if !(1e-4..1e7).contains(&x.abs()) {
        return format!("{x:.6e}");
    }
    let decimals = (5 - x.abs().log10().floor() as i32).max(0) as usize;
    let t = format!("{x:.decimals$}");
    if t.contains('.') {
        t.trim_end_matches('0').trim_end_matches('.').to_string()
    } else {
        t
    }
}

/// Up to three example values of a column — distinct ones, in the order they first appear, so
/// a column whose first rows repeat one value still shows what else it holds — and how many
/// distinct among the first 10 000, in at most `room` characters (the inspect line fits 80
/// columns; the first example is always shown, shortened if need be).
fn examples(c: &Column, room: usize) -> String {
    let n = c.len();
    let mut distinct = std::collections::BTreeSet::new();
    let mut first: Vec<String> = Vec::new();
    for i in 0..n.min(10_000) {
        let key = c.text(i).unwrap_or_else(|| "(none)".into());
        if distinct.insert(key) && first.len() < 3 {
            // Numbers shown to 6 significant digits (an example, not the value read).
            let t = match c {
                Column::Float(v) if v[i].is_finite() => short_number(v[i]),
                _ => c.text(i).unwrap_or_else(|| "(none)".into()),
            };
            first.push(printable(&t).into_owned());
        }
    }
    let tail = if n > 0 {
        format!(
            "  ({} distinct{})",
            distinct.len(),
            if n > 10_000 {
                " in the first 10 000"
            } else {
                ""
            }
        )
    } else {
        String::new()
    };
    let room = room.saturating_sub(5 + tail.chars().count()).max(12);
    let shorten = |t: &str, max: usize| {
        if t.chars().count() > max {
            format!(
                "{}…",
                t.chars().take(max.saturating_sub(1)).collect::<String>()
            )
        } else {
            t.to_string()
        }
    };
    let mut shown = String::new();
    for (k, t) in first.iter().enumerate() {
        let t = shorten(t, 24);
        let piece = if k == 0 { t } else { format!(", {t}") };
        if k > 0 && shown.chars().count() + piece.chars().count() > room {
            break;
        }
        shown += &piece;
    }
    let shown = shorten(&shown, room);
    format!("e.g. {shown}{tail}")
}

/// Reads a dataset from an NWB file and reports it like the CSV path; `notes` are printed by the
/// caller.
pub fn read_dataset(
    path: &Path,
    choice: &NwbChoice,
    tick_rate_hz: f64,
    window_s: f64,
    notes: &mut Vec<String>,
) -> Result<(Dataset, ReadReport), TableError> {
    let nwb = Nwb::open(path)?;
    let data = nwb.dataset(choice, tick_rate_hz, notes)?;
    let report = crate::tables::report_for(&data, window_s);
    Ok((data, report))
}

/// The path with the table chosen, as error messages and provenance name it.
pub fn describe(path: &Path, choice: &NwbChoice) -> String {
    format!("NWB {} ({})", path.display(), choice.describe())
}

/// An absolute path (provenance).
pub fn absolute(path: &Path) -> PathBuf {
    std::fs::canonicalize(path).unwrap_or_else(|_| path.to_path_buf())
}
