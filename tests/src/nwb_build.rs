//! Small NWB-shaped HDF5 files built in memory (with `hdf5-pure`'s writer) for tests and the
//! `nwb_file` fuzz target: the parts Auspex reads — the root's `neurodata_type`, the `units`
//! table (`id`, `spike_times`, `spike_times_index`, an optional quality column) and a trials
//! table — each of which a test can damage on purpose (an index past its data, a negative time,
//! a missing stimulus, a million rows).
//!
//! Must not: stand in for files written by the standard's reference API in equality tests (those
//! are `tests/nwb/*.nwb`, written by pynwb).

use hdf5_pure::{AttrValue, FileBuilder};

/// A stimulus column.
#[derive(Clone, Debug)]
pub enum Stimulus {
    /// Text labels (variable-length strings, as pynwb writes them).
    Text(Vec<String>),
    /// Numbers.
    Float(Vec<f64>),
}

/// The content of a small NWB file.
#[derive(Clone, Debug)]
pub struct MiniNwb {
    /// The root's `neurodata_type` (`NWBFile` for an NWB file).
    pub root_type: String,
    /// `units/id`.
    pub unit_ids: Vec<i64>,
    /// `units/spike_times`, seconds.
    pub spike_times: Vec<f64>,
    /// `units/spike_times_index`: each unit's end in `spike_times`.
    pub index: Vec<u64>,
    /// `units/quality`, if any.
    pub quality: Option<Vec<String>>,
    /// `intervals/trials/id`.
    pub trial_ids: Vec<i64>,
    /// `intervals/trials/start_time`, seconds.
    pub onsets: Vec<f64>,
    /// `intervals/trials/stimulus`.
    pub stimulus: Stimulus,
}

impl MiniNwb {
    /// `units` units with `spikes_per_unit` spikes each over `trials` trials of two stimuli, one
    /// trial a second.
    pub fn regular(units: usize, spikes_per_unit: usize, trials: usize) -> Self {
        let span = trials.max(1) as f64;
        let mut spike_times = Vec::with_capacity(units * spikes_per_unit);
        let mut index = Vec::with_capacity(units);
        for u in 0..units {
            for k in 0..spikes_per_unit {
                spike_times
                    .push(((k as f64 + 0.5) / spikes_per_unit as f64) * span + u as f64 * 1e-4);
            }
            index.push(((u + 1) * spikes_per_unit) as u64);
        }
        MiniNwb {
            root_type: "NWBFile".into(),
            unit_ids: (0..units as i64).collect(),
            spike_times,
            index,
            quality: None,
            trial_ids: (0..trials as i64).collect(),
            onsets: (0..trials).map(|i| i as f64 + 0.25).collect(),
            stimulus: Stimulus::Text(
                (0..trials)
                    .map(|i| if i % 2 == 0 { "left" } else { "right" }.to_string())
                    .collect(),
            ),
        }
    }

    /// The file's bytes.
    pub fn bytes(&self) -> Vec<u8> {
        let vs = |s: &str| AttrValue::VarLenString(s.to_string());
        let mut fb = FileBuilder::new();
        fb.set_attr("neurodata_type", vs(&self.root_type));
        fb.set_attr("namespace", vs("core"));
        fb.set_attr("nwb_version", vs("2.7.0"));

        let mut units = fb.create_group("units");
        units.set_attr("neurodata_type", vs("Units"));
        units.set_attr("namespace", vs("core"));
        let mut cols = vec!["spike_times".to_string()];
        if self.quality.is_some() {
            cols.insert(0, "quality".into());
        }
        units.set_attr("colnames", AttrValue::VarLenStringArray(cols));
        units.set_attr("description", vs("units (built by Auspex's tests)"));
        units.create_dataset("id").with_i64_data(&self.unit_ids);
        units
            .create_dataset("spike_times")
            .with_f64_data(&self.spike_times);
        units
            .create_dataset("spike_times_index")
            .with_u64_data(&self.index);
        if let Some(q) = &self.quality {
            let q: Vec<&str> = q.iter().map(String::as_str).collect();
            units.create_dataset("quality").with_vlen_strings(&q);
        }
        fb.add_group(units.finish());

        let mut intervals = fb.create_group("intervals");
        let mut trials = intervals.create_group("trials");
        trials.set_attr("neurodata_type", vs("TimeIntervals"));
        trials.set_attr("namespace", vs("core"));
        trials.set_attr(
            "colnames",
            AttrValue::VarLenStringArray(vec![
                "start_time".into(),
                "stop_time".into(),
                "stimulus".into(),
            ]),
        );
        trials.set_attr("description", vs("trials (built by Auspex's tests)"));
        trials.create_dataset("id").with_i64_data(&self.trial_ids);
        trials
            .create_dataset("start_time")
            .with_f64_data(&self.onsets);
        let stops: Vec<f64> = self.onsets.iter().map(|t| t + 0.5).collect();
        trials.create_dataset("stop_time").with_f64_data(&stops);
        match &self.stimulus {
            Stimulus::Text(v) => {
                let v: Vec<&str> = v.iter().map(String::as_str).collect();
                trials.create_dataset("stimulus").with_vlen_strings(&v);
            }
            Stimulus::Float(v) => {
                trials.create_dataset("stimulus").with_f64_data(v);
            }
        }
        intervals.add_group(trials.finish());
        fb.add_group(intervals.finish());
        fb.finish().expect("an in-memory HDF5 file")
    }
}
