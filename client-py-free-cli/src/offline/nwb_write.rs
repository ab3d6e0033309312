//! Writing a recorded session as an NWB 2.x file (`auspex export --nwb`): the units and their
//! spike times (`units`, with `obs_intervals` for units declared part-way), the trials with the
//! presented stimulus and Auspex's decision for each (`intervals/trials`: the decided stimulus,
//! its time, confidence, reason and the posterior over every stimulus at that moment), the
//! per-bin posterior as time series in the processing module `auspex`, and the model's summary in
//! `general/notes`.
//!
//! The HDF5 is written by `hdf5-pure`. Its writer has no object-reference attributes, which a
//! ragged column's index needs (`VectorIndex.target`), so each is written as an 8-byte marker
//! string and then patched in place into a reference to its column: the attribute's datatype
//! becomes an object reference, its value the column's header address (found from the group's
//! link to it), and the header's checksum is recomputed (Jenkins' lookup3, as HDF5 uses).
//!
//! Must not: write a file that the reader in `nwb.rs` or the standard's reference API cannot read
//! back (both checked by tests).

use auspex_engine::data::Dataset;
use hdf5_pure::{AttrValue, FileBuilder};

/// What goes into the file besides the dataset.
pub struct ExportInput<'a> {
    /// Units, spikes and trials (with their presented stimuli).
    pub data: &'a Dataset,
    /// The session's name (the NWB `identifier` is built from it).
    pub session: String,
    /// When the session started, ISO 8601 (UTC).
    pub start_time: String,
    /// The window after onset (trials' `stop_time` = onset + window), seconds.
    pub window_s: f64,
    /// The model's stimuli, in its order (the posterior's columns); empty: no decoding results.
    pub stimuli: Vec<String>,
    /// Per trial id: (decided stimulus index, decision tick, its posterior, reason, the full
    /// posterior at the decision).
    pub decisions: std::collections::HashMap<u64, (u32, i64, f64, String, Vec<f64>)>,
    /// Posterior frames: (bin end tick, trial, posterior).
    pub frames: Vec<(i64, u64, Vec<f64>)>,
    /// What decoded them (model summary, decoder, threshold), for `general/notes`.
    pub notes: String,
    /// Why a trial without a decision has none, where it is known (else "not decided
    /// (cancelled, or outside the model)").
    pub no_decision: std::collections::HashMap<u64, String>,
}

/// A deterministic object id in UUID form (unique per path within a file).
fn object_id(session: &str, path: &str) -> String {
    // FNV-1a, twice with different seeds, is enough to make ids unique within one file.
    let h = |seed: u64| {
        let mut x = seed;
        for b in session.bytes().chain([0]).chain(path.bytes()) {
            x ^= b as u64;
            x = x.wrapping_mul(0x100_0000_01b3);
        }
        x
    };
    let (a, b) = (h(0xcbf2_9ce4_8422_2325), h(0x6c62_272e_07bb_0142));
    format!(
        "{:08x}-{:04x}-4{:03x}-8{:03x}-{:012x}",
        a >> 32,
        (a >> 16) & 0xffff,
        a & 0xfff,
        b >> 52,
        b & 0xffff_ffff_ffff
    )
}

/// Unix nanoseconds as ISO 8601 UTC.
pub fn iso_utc(unix_ns: i64) -> String {
    let [y, m, d, hh, mm, ss] = auspex_proto::civil::civil_utc(unix_ns.div_euclid(1_000_000_000));
    format!("{y:04}-{m:02}-{d:02}T{hh:02}:{mm:02}:{ss:02}+00:00")
}

struct Typed<'a> {
    session: &'a str,
}

impl Typed<'_> {
    fn attrs(&self, path: &str, kind: &str, ns: &str) -> Vec<(&'static str, AttrValue)> {
        vec![
            ("neurodata_type", AttrValue::VarLenString(kind.into())),
            ("namespace", AttrValue::VarLenString(ns.into())),
            (
                "object_id",
                AttrValue::VarLenString(object_id(self.session, path)),
            ),
        ]
    }
}

/// The marker an index's `target` is written as before it is patched into a reference.
fn marker(k: usize) -> String {
    format!("@AXR{k:03}@")
}

/// Writes the session to `path`.
pub fn write(path: &std::path::Path, x: &ExportInput<'_>) -> anyhow::Result<()> {
    let bytes = build(x)?;
    std::fs::write(path, &bytes)
        .map_err(|e| anyhow::anyhow!("{}: cannot write: {e}", path.display()))?;
    Ok(())
}

/// The file's bytes.
pub fn build(x: &ExportInput<'_>) -> anyhow::Result<Vec<u8>> {
    let t = Typed {
        session: &x.session,
    };
    let vs = |s: &str| AttrValue::VarLenString(s.to_string());
    let rate = x.data.tick_rate_hz;
    let sec = |tick: i64| tick as f64 / rate;
    let mut fb = FileBuilder::new();
    for (k, v) in t.attrs("/", "NWBFile", "core") {
        fb.set_attr(k, v);
    }
    fb.set_attr("nwb_version", vs("2.7.0"));
    let scalar_text = |fb: &mut FileBuilder, name: &str, v: &str| {
        fb.create_dataset(name)
            .with_vlen_strings(&[v])
            .with_shape(&[]);
    };
    scalar_text(
        &mut fb,
        "identifier",
        &format!("auspex:{}:{}", x.session, x.start_time),
    );
    scalar_text(
        &mut fb,
        "session_description",
        &format!(
            "Auspex session `{}`, recorded by auspexd and exported by auspex {}",
            x.session,
            env!("CARGO_PKG_VERSION")
        ),
    );
    scalar_text(&mut fb, "session_start_time", &x.start_time);
    scalar_text(&mut fb, "timestamps_reference_time", &x.start_time);
    let now = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_nanos() as i64)
        .unwrap_or(0);
    fb.create_dataset("file_create_date")
        .with_vlen_strings(&[&iso_utc(now)]);
    for g in ["acquisition", "analysis"] {
        let g = fb.create_group(g);
        fb.add_group(g.finish());
    }
    let mut general = fb.create_group("general");
    general
        .create_dataset("notes")
        .with_vlen_strings(&[&x.notes])
        .with_shape(&[]);
    general
        .create_dataset("source_script")
        .with_vlen_strings(&[&format!(
            "auspex {} (export --nwb)",
            env!("CARGO_PKG_VERSION")
        )])
        .with_shape(&[])
        .set_attr("file_name", vs("auspex"));
    fb.add_group(general.finish());
    let mut stim = fb.create_group("stimulus");
    for g in ["presentation", "templates"] {
        let g = stim.create_group(g);
        stim.add_group(g.finish());
    }
    fb.add_group(stim.finish());

    // Units: spike times in seconds, split per unit, in the dataset's unit order.
    let mut per_unit: std::collections::HashMap<u32, Vec<f64>> = std::collections::HashMap::new();
    for (tick, u) in x.data.spikes.iter() {
        per_unit.entry(u).or_default().push(sec(tick));
    }
    let mut times = Vec::with_capacity(x.data.spikes.len());
    let mut index = Vec::with_capacity(x.data.units.len());
    for u in &x.data.units {
        if let Some(v) = per_unit.get(u) {
            times.extend_from_slice(v);
        }
        index.push(times.len() as u64);
    }
    let last = x
        .data
        .spikes
        .last()
        .map(|s| s.0)
        .into_iter()
        .chain(
            x.data
                .trials
                .last()
                .map(|t| t.onset + (x.window_s * rate) as i64),
        )
        .max()
        .unwrap_or(0);
    let partway = !x.data.declared_from.is_empty();
    let mut units = fb.create_group("units");
    for (k, v) in t.attrs("/units", "Units", "core") {
        units.set_attr(k, v);
    }
    units.set_attr(
        "description",
        vs("units sorted during the recording, as sent to auspexd"),
    );
    let mut cols = vec!["spike_times".to_string()];
    if partway {
        cols.push("obs_intervals".into());
    }
    units.set_attr("colnames", AttrValue::VarLenStringArray(cols));
    let ids: Vec<i64> = x.data.units.iter().map(|&u| u as i64).collect();
    let set = |d: &mut hdf5_pure::DatasetBuilder, attrs: Vec<(&'static str, AttrValue)>| {
        for (k, v) in attrs {
            d.set_attr(k, v);
        }
    };
    set(
        units.create_dataset("id").with_i64_data(&ids),
        t.attrs("/units/id", "ElementIdentifiers", "hdmf-common"),
    );
    let d = units.create_dataset("spike_times").with_f64_data(&times);
    set(
        d,
        t.attrs("/units/spike_times", "VectorData", "hdmf-common"),
    );
    d.set_attr(
        "description",
        vs("the spike times for each unit in seconds"),
    )
    .set_attr("resolution", AttrValue::F64(1.0 / rate));
    let mut patches = vec![("spike_times".to_string(), marker(0))];
    let d = units
        .create_dataset("spike_times_index")
        .with_u64_data(&index);
    set(
        d,
        t.attrs("/units/spike_times_index", "VectorIndex", "hdmf-common"),
    );
    d.set_attr("description", vs("Index for VectorData 'spike_times'"))
        .set_attr("target", AttrValue::ascii_string_sized(marker(0), 8)?);
    if partway {
        let iv: Vec<f64> = x
            .data
            .units
            .iter()
            .flat_map(|u| {
                let from = x.data.declared_from.get(u).copied().unwrap_or(0);
                [sec(from), sec(last)]
            })
            .collect();
        let n = x.data.units.len() as u64;
        let d = units
            .create_dataset("obs_intervals")
            .with_f64_data(&iv)
            .with_shape(&[n, 2]);
        set(
            d,
            t.attrs("/units/obs_intervals", "VectorData", "hdmf-common"),
        );
        d.set_attr("description", vs("the observation intervals for each unit"));
        let oi: Vec<u64> = (1..=n).collect();
        let d = units
            .create_dataset("obs_intervals_index")
            .with_u64_data(&oi);
        set(
            d,
            t.attrs("/units/obs_intervals_index", "VectorIndex", "hdmf-common"),
        );
        d.set_attr("description", vs("Index for VectorData 'obs_intervals'"))
            .set_attr("target", AttrValue::ascii_string_sized(marker(1), 8)?);
        patches.push(("obs_intervals".into(), marker(1)));
    }
    fb.add_group(units.finish());

    // Trials, with the decision for each.
    let trials = &x.data.trials;
    let mut intervals = fb.create_group("intervals");
    let mut tr = intervals.create_group("trials");
    for (k, v) in t.attrs("/intervals/trials", "TimeIntervals", "core") {
        tr.set_attr(k, v);
    }
    tr.set_attr(
        "description",
        vs("trials of the session: the presented stimulus and Auspex's decision"),
    );
    let mut cols = vec!["start_time", "stop_time", "stimulus"];
    let decoded = !x.stimuli.is_empty();
    if decoded {
        cols.extend([
            "decided_stimulus",
            "decision_time",
            "decision_confidence",
            "decision_reason",
            "decision_posterior",
        ]);
    }
    tr.set_attr(
        "colnames",
        AttrValue::VarLenStringArray(cols.iter().map(|s| s.to_string()).collect()),
    );
    let tids: Vec<i64> = trials.iter().map(|t| t.id as i64).collect();
    set(
        tr.create_dataset("id").with_i64_data(&tids),
        t.attrs("/intervals/trials/id", "ElementIdentifiers", "hdmf-common"),
    );
    let column_f64 = |tr: &mut hdf5_pure::GroupBuilder, name: &str, v: &[f64], desc: &str| {
        let d = tr.create_dataset(name).with_f64_data(v);
        set(
            d,
            t.attrs(
                &format!("/intervals/trials/{name}"),
                "VectorData",
                "hdmf-common",
            ),
        );
        d.set_attr("description", vs(desc));
    };
    let column_text = |tr: &mut hdf5_pure::GroupBuilder, name: &str, v: &[String], desc: &str| {
        let v: Vec<&str> = v.iter().map(String::as_str).collect();
        let d = tr.create_dataset(name).with_vlen_strings(&v);
        set(
            d,
            t.attrs(
                &format!("/intervals/trials/{name}"),
                "VectorData",
                "hdmf-common",
            ),
        );
        d.set_attr("description", vs(desc));
    };
    let on: Vec<f64> = trials.iter().map(|t| sec(t.onset)).collect();
    let off: Vec<f64> = on.iter().map(|o| o + x.window_s).collect();
    column_f64(
        &mut tr,
        "start_time",
        &on,
        "Start time of epoch, in seconds",
    );
    column_f64(
        &mut tr,
        "stop_time",
        &off,
        "Stop time of epoch, in seconds (the decoding window's end)",
    );
    let presented: Vec<String> = trials
        .iter()
        .map(|t| t.stimulus.clone().unwrap_or_default())
        .collect();
    column_text(
        &mut tr,
        "stimulus",
        &presented,
        "the presented stimulus (empty: never labelled)",
    );
    if decoded {
        let s = x.stimuli.len();
        let mut name = Vec::with_capacity(trials.len());
        let mut when = Vec::with_capacity(trials.len());
        let mut conf = Vec::with_capacity(trials.len());
        let mut why = Vec::with_capacity(trials.len());
        let mut post = Vec::with_capacity(trials.len() * s);
        for t in trials {
            match x.decisions.get(&t.id) {
                Some((k, tick, p, r, full)) => {
                    name.push(x.stimuli.get(*k as usize).cloned().unwrap_or_default());
                    when.push(sec(*tick));
                    conf.push(*p);
                    why.push(r.clone());
                    post.extend(
                        full.iter()
                            .copied()
                            .chain(std::iter::repeat(f64::NAN))
                            .take(s),
                    );
                }
                None => {
                    name.push(String::new());
                    when.push(f64::NAN);
                    conf.push(f64::NAN);
                    why.push(
                        x.no_decision.get(&t.id).cloned().unwrap_or_else(|| {
                            "not decided (cancelled, or outside the model)".into()
                        }),
                    );
                    post.extend(std::iter::repeat_n(f64::NAN, s));
                }
            }
        }
        column_text(
            &mut tr,
            "decided_stimulus",
            &name,
            "the stimulus Auspex decided on",
        );
        column_f64(
            &mut tr,
            "decision_time",
            &when,
            "when the decision was made (the end of its bin), in seconds",
        );
        column_f64(
            &mut tr,
            "decision_confidence",
            &conf,
            "the decided stimulus's posterior at the decision",
        );
        column_text(
            &mut tr,
            "decision_reason",
            &why,
            "why the decision was made then",
        );
        let d = tr
            .create_dataset("decision_posterior")
            .with_f64_data(&post)
            .with_shape(&[trials.len() as u64, s as u64]);
        set(
            d,
            t.attrs(
                "/intervals/trials/decision_posterior",
                "VectorData",
                "hdmf-common",
            ),
        );
        d.set_attr(
            "description",
            vs(&format!(
                "the posterior over the stimuli at the decision, columns in this order: {}",
                x.stimuli.join(", ")
            )),
        );
    }
    intervals.add_group(tr.finish());
    fb.add_group(intervals.finish());

    // The per-bin posterior as time series.
    let mut processing = fb.create_group("processing");
    if decoded && !x.frames.is_empty() {
        let s = x.stimuli.len();
        let mut frames: Vec<&(i64, u64, Vec<f64>)> = x.frames.iter().collect();
        frames.sort_by_key(|f| (f.0, f.1));
        let ts: Vec<f64> = frames.iter().map(|f| sec(f.0)).collect();
        let data: Vec<f64> = frames
            .iter()
            .flat_map(|f| {
                f.2.iter()
                    .copied()
                    .chain(std::iter::repeat(f64::NAN))
                    .take(s)
            })
            .collect();
        let tid: Vec<f64> = frames.iter().map(|f| f.1 as f64).collect();
        let mut m = processing.create_group("auspex");
        for (k, v) in t.attrs("/processing/auspex", "ProcessingModule", "core") {
            m.set_attr(k, v);
        }
        m.set_attr(
            "description",
            vs("Auspex's decoding of the session, bin by bin"),
        );
        let series = |m: &mut hdf5_pure::GroupBuilder,
                      name: &str,
                      data: &[f64],
                      cols: u64,
                      unit: &str,
                      desc: &str| {
            let mut g = m.create_group(name);
            for (k, v) in t.attrs(&format!("/processing/auspex/{name}"), "TimeSeries", "core") {
                g.set_attr(k, v);
            }
            g.set_attr("description", vs(desc));
            g.set_attr("comments", vs("no comments"));
            let d = g.create_dataset("data").with_f64_data(data);
            if cols > 1 {
                d.with_shape(&[ts.len() as u64, cols]);
            }
            d.set_attr("unit", vs(unit))
                .set_attr("conversion", AttrValue::F32(1.0))
                .set_attr("offset", AttrValue::F32(0.0))
                .set_attr("resolution", AttrValue::F32(-1.0));
            g.create_dataset("timestamps")
                .with_f64_data(&ts)
                .set_attr("interval", AttrValue::I32(1))
                .set_attr("unit", vs("seconds"));
            m.add_group(g.finish());
        };
        series(
            &mut m,
            "posterior",
            &data,
            s as u64,
            "probability",
            &format!(
                "the posterior over the stimuli at the end of each bin of each open trial (the trial is in posterior_trial); columns in this order: {}",
                x.stimuli.join(", ")
            ),
        );
        series(
            &mut m,
            "posterior_trial",
            &tid,
            1,
            "trial id",
            "the trial each posterior row belongs to",
        );
        processing.add_group(m.finish());
    }
    fb.add_group(processing.finish());

    let mut bytes = fb.finish()?;
    for (column, mark) in patches {
        patch_reference(&mut bytes, &column, &mark)?;
    }
    Ok(bytes)
}

/// Replaces the 8-byte marker string attribute `mark` with an object reference to the dataset
/// linked as `column`, and fixes its object header's checksum.
fn patch_reference(bytes: &mut [u8], column: &str, mark: &str) -> anyhow::Result<()> {
    let find_all = |hay: &[u8], needle: &[u8]| -> Vec<usize> {
        hay.windows(needle.len())
            .enumerate()
            .filter(|(_, w)| *w == needle)
            .map(|(i, _)| i)
            .collect()
    };
    // The column's header address, from the one link to it: the name's length, the name, then
    // an 8-byte address of an object header.
    let name = column.as_bytes();
    let targets: Vec<u64> = find_all(bytes, name)
        .into_iter()
        .filter(|&i| i > 0 && bytes[i - 1] as usize == name.len())
        .filter_map(|i| {
            let a = bytes.get(i + name.len()..i + name.len() + 8)?;
            let a = u64::from_le_bytes(a.try_into().ok()?);
            (bytes.get(a as usize..a as usize + 4)? == b"OHDR").then_some(a)
        })
        .collect();
    let [target] = targets[..] else {
        anyhow::bail!(
            "writing NWB: found {} links to `{column}`, expected one",
            targets.len()
        );
    };
    let at = find_all(bytes, mark.as_bytes());
    let [p] = at[..] else {
        anyhow::bail!(
            "writing NWB: found the index marker {} times, expected once",
            at.len()
        );
    };
    // Attribute layout before the value: datatype (8 bytes: fixed string of 8) and a scalar
    // dataspace (4 bytes).
    anyhow::ensure!(
        p >= 12 && bytes[p - 12] == 0x13 && bytes[p - 8..p - 4] == [8, 0, 0, 0],
        "writing NWB: unexpected attribute layout around the index marker"
    );
    bytes[p - 12..p - 4].copy_from_slice(&[0x17, 0, 0, 0, 8, 0, 0, 0]);
    bytes[p..p + 8].copy_from_slice(&target.to_le_bytes());
    // The object header holding it (version 2: "OHDR", a checksum at the end of its first chunk).
    let o = (0..p)
        .rev()
        .find(|&i| &bytes[i..i + 4] == b"OHDR")
        .ok_or_else(|| anyhow::anyhow!("writing NWB: no object header before the index marker"))?;
    let flags = bytes[o + 5];
    let mut q = o + 6;
    if flags & 0x20 != 0 {
        q += 16;
    }
    if flags & 0x10 != 0 {
        q += 4;
    }
    let w = 1usize << (flags & 3);
    let size = (0..w).fold(0u64, |acc, k| acc | (bytes[q + k] as u64) << (8 * k));
    let end = q + w + size as usize;
    anyhow::ensure!(
        p < end && end + 4 <= bytes.len(),
        "writing NWB: the index marker is not in its header's first chunk"
    );
    let c = lookup3(&bytes[o..end]);
    bytes[end..end + 4].copy_from_slice(&c.to_le_bytes());
    Ok(())
}

/// Bob Jenkins' lookup3 `hashlittle` with initial value 0 (public domain): the checksum HDF5
/// puts on its version-2 metadata.
pub fn lookup3(k: &[u8]) -> u32 {
    let word = |s: &[u8], i: usize| -> u32 {
        (0..4).fold(0u32, |acc, j| {
            acc | (s.get(i + j).copied().unwrap_or(0) as u32) << (8 * j)
        })
    };
    let mut a: u32 = 0xdead_beef_u32.wrapping_add(k.len() as u32);
    let (mut b, mut c) = (a, a);
    let mut k = k;
    while k.len() > 12 {
        a = a.wrapping_add(word(k, 0));
        b = b.wrapping_add(word(k, 4));
        c = c.wrapping_add(word(k, 8));
        a = a.wrapping_sub(c);
        a ^= c.rotate_left(4);
        c = c.wrapping_add(b);
        b = b.wrapping_sub(a);
        b ^= a.rotate_left(6);
        a = a.wrapping_add(c);
        c = c.wrapping_sub(b);
        c ^= b.rotate_left(8);
        b = b.wrapping_add(a);
        a = a.wrapping_sub(c);
        a ^= c.rotate_left(16);
        c = c.wrapping_add(b);
        b = b.wrapping_sub(a);
        b ^= a.rotate_left(19);
        a = a.wrapping_add(c);
        c = c.wrapping_sub(b);
        c ^= b.rotate_left(4);
        b = b.wrapping_add(a);
        k = &k[12..];
    }
    if k.is_empty() {
        return c;
    }
    a = a.wrapping_add(word(k, 0));
    b = b.wrapping_add(word(k, 4));
    c = c.wrapping_add(word(k, 8));
    c ^= b;
    c = c.wrapping_sub(b.rotate_left(14));
    a ^= c;
    a = a.wrapping_sub(c.rotate_left(11));
    b ^= a;
    b = b.wrapping_sub(a.rotate_left(25));
    c ^= b;
    c = c.wrapping_sub(b.rotate_left(16));
    a ^= c;
    a = a.wrapping_sub(c.rotate_left(4));
    b ^= a;
    b = b.wrapping_sub(a.rotate_left(14));
    c ^= b;
    c = c.wrapping_sub(b.rotate_left(24));
    c
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn lookup3_matches_the_published_test_vectors() {
        // Test values printed by lookup3.c's driver5 (Bob Jenkins, public domain):
        // hashlittle("", 0) = 0xdeadbeef, hashlittle("Four score and seven years ago", 0) =
        // 0x17770551 (values taken from memory of that driver's output; the checksum is also
        // checked against files hdf5-pure wrote, whose stored checksums it reproduces).
        assert_eq!(lookup3(b""), 0xdead_beef);
        assert_eq!(lookup3(b"Four score and seven years ago"), 0x1777_0551);
    }

    #[test]
    fn dates_are_civil_utc() {
        assert_eq!(iso_utc(0), "1970-01-01T00:00:00+00:00");
        // 2000-02-29 12:34:56 UTC = 951 827 696 s (leap day of a leap century).
        assert_eq!(
            iso_utc(951_827_696_000_000_000),
            "2000-02-29T12:34:56+00:00"
        );
    }
}
