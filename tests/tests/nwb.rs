//! Reading NWB files. The four files in `tests/nwb/` were written by the standard's reference
//! Python API (pynwb 4.2.0, `tests/nwb/make_test_files.py`), each with the same data as Auspex's
//! CSV tables beside it: reading the NWB file must give the dataset the tables give (spikes,
//! units, trials, labels, ticks). Damaged and oversized files, built here with `hdf5-pure`'s
//! writer (`auspex_e2e::nwb_build`), must be refused with the file, the table and the row.

use auspex::nwb::{Nwb, NwbChoice, UnitPick};
use auspex_e2e::nwb_build::{MiniNwb, Stimulus};
use std::path::{Path, PathBuf};

fn dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("nwb")
}

fn read_nwb(file: &str, choice: &NwbChoice) -> auspex_engine::data::Dataset {
    let mut notes = Vec::new();
    auspex::nwb::read_dataset(&dir().join(file), choice, 1e6, 0.25, &mut notes)
        .unwrap_or_else(|e| panic!("{file}: {e}"))
        .0
}

fn read_csv(stem: &str) -> auspex_engine::data::Dataset {
    auspex::tables::read_dataset(
        &dir().join(format!("{stem}.spikes.csv")),
        &dir().join(format!("{stem}.trials.csv")),
        1e6,
        0.25,
    )
    .unwrap()
    .0
}

fn same(a: &auspex_engine::data::Dataset, b: &auspex_engine::data::Dataset, what: &str) {
    assert_eq!(a.units, b.units, "{what}: units");
    assert_eq!(a.trials, b.trials, "{what}: trials");
    assert_eq!(a.spikes.len(), b.spikes.len(), "{what}: spike count");
    assert!(a.spikes == b.spikes, "{what}: spikes differ");
    assert_eq!(a.tick_rate_hz, b.tick_rate_hz);
}

#[test]
fn files_written_by_pynwb_read_as_their_csv_twins() {
    let string = read_nwb("string_stimulus.nwb", &NwbChoice::default());
    same(&string, &read_csv("string_stimulus"), "string stimulus");
    assert!(string.declared_from.is_empty());

    let numeric = read_nwb(
        "numeric_stimulus.nwb",
        &NwbChoice {
            stimulus: Some("direction_deg".into()),
            ..Default::default()
        },
    );
    same(&numeric, &read_csv("numeric_stimulus"), "numeric stimulus");
    // The lab's own unit ids, and numbers printed as the CSV path reads them (90.0 → "90").
    assert_eq!(numeric.units, vec![7, 12, 30, 31]);
    assert!(numeric
        .trials
        .iter()
        .any(|t| t.stimulus.as_deref() == Some("22.5")));
    assert!(numeric
        .trials
        .iter()
        .any(|t| t.stimulus.as_deref() == Some("90")));

    let flashes = read_nwb(
        "two_tables.nwb",
        &NwbChoice {
            table: "flashes".into(),
            stimulus: Some("luminance".into()),
            ..Default::default()
        },
    );
    same(
        &flashes,
        &read_csv("two_tables_flashes"),
        "second interval table",
    );
    // The same file's default table is the other one.
    let trials = read_nwb("two_tables.nwb", &NwbChoice::default());
    assert_ne!(trials.trials, flashes.trials);

    // Units chosen by the quality column; the two isolated part-way are declared from the start
    // of their observation (obs_intervals), so their earlier silence is not fitted as evidence.
    let partway = read_nwb(
        "units_partway.nwb",
        &NwbChoice {
            units: UnitPick::parse("quality=good").unwrap(),
            ..Default::default()
        },
    );
    let twin = read_csv("units_partway");
    same(&partway, &twin, "units added part-way");
    let half = twin.trials[15].onset;
    assert_eq!(
        partway.declared_from.into_iter().collect::<Vec<_>>(),
        vec![(2, half), (3, half)]
    );
    let by_id = read_nwb(
        "units_partway.nwb",
        &NwbChoice {
            units: UnitPick::parse("0,2,3").unwrap(),
            ..Default::default()
        },
    );
    assert_eq!(by_id.units, vec![0, 2, 3]);
}

fn refusal(f: &MiniNwb, choice: &NwbChoice) -> String {
    let d = tempfile::tempdir().unwrap();
    let p = d.path().join("crafted.nwb");
    std::fs::write(&p, f.bytes()).unwrap();
    let mut notes = Vec::new();
    match Nwb::open(&p).and_then(|n| n.dataset(choice, 1e6, &mut notes)) {
        Ok(ds) => panic!(
            "read {} spikes and {} trials from a damaged file",
            ds.spikes.len(),
            ds.trials.len()
        ),
        Err(e) => e.to_string(),
    }
}

#[test]
fn damaged_files_are_refused_naming_the_file_table_and_row() {
    let good = MiniNwb::regular(3, 10, 6);
    let d = tempfile::tempdir().unwrap();
    let p = d.path().join("good.nwb");
    std::fs::write(&p, good.bytes()).unwrap();
    let mut notes = Vec::new();
    let ds = Nwb::open(&p)
        .unwrap()
        .dataset(&NwbChoice::default(), 1e6, &mut notes)
        .unwrap();
    assert_eq!(
        (ds.units.len(), ds.spikes.len(), ds.trials.len()),
        (3, 30, 6)
    );
    let all = NwbChoice::default();

    // Truncated: the superblock says where the file ends.
    let bytes = good.bytes();
    let cut = d.path().join("cut.nwb");
    std::fs::write(&cut, &bytes[..bytes.len() * 2 / 3]).unwrap();
    let e = Nwb::open(&cut).err().unwrap().to_string();
    assert!(e.contains("cut.nwb") && e.contains("truncated"), "{e}");

    // HDF5 but not NWB; not HDF5 at all.
    let mut f = good.clone();
    f.root_type = "SomethingElse".into();
    let e = refusal(&f, &all);
    assert!(e.contains("is HDF5 but not an NWB file"), "{e}");
    let txt = d.path().join("table.nwb");
    std::fs::write(&txt, "unit,time_s\n1,0.5\n").unwrap();
    let e = Nwb::open(&txt).err().unwrap().to_string();
    assert!(e.contains("not an HDF5 file"), "{e}");

    // A ragged index past its data, or going back.
    let mut f = good.clone();
    f.index[1] = 99;
    let e = refusal(&f, &all);
    assert!(
        e.contains("crafted.nwb: units: row 1") && e.contains("past the end of `spike_times`"),
        "{e}"
    );
    let mut f = good.clone();
    f.index[2] = 5;
    let e = refusal(&f, &all);
    assert!(
        e.contains("row 2") && e.contains("must not decrease"),
        "{e}"
    );

    // Negative and non-finite times, in spikes and onsets.
    let mut f = good.clone();
    f.spike_times[13] = -0.5;
    let e = refusal(&f, &all);
    assert!(
        e.contains("units: row 1 (unit 1): spike 3") && e.contains("negative"),
        "{e}"
    );
    let mut f = good.clone();
    f.spike_times[0] = f64::NAN;
    let e = refusal(&f, &all);
    assert!(
        e.contains("row 0 (unit 0): spike 0") && e.contains("not a finite number"),
        "{e}"
    );
    let mut f = good.clone();
    f.onsets[4] = f64::INFINITY;
    let e = refusal(&f, &all);
    assert!(
        e.contains("intervals/trials: row 4: column `start_time`"),
        "{e}"
    );

    // A stimulus column with a missing value (NaN in numbers, an empty string in text).
    let mut f = good.clone();
    f.stimulus = Stimulus::Float(vec![0.0, 45.0, f64::NAN, 0.0, 45.0, 0.0]);
    let e = refusal(&f, &all);
    assert!(
        e.contains("intervals/trials: row 2: column `stimulus` has no value"),
        "{e}"
    );
    // An empty text label is a trial never labelled, as in the CSV tables: read, and counted.
    let mut f = good.clone();
    f.stimulus = Stimulus::Text(["a", "b", "a", "", "a", "b"].map(String::from).to_vec());
    let p2 = d.path().join("unlabelled.nwb");
    std::fs::write(&p2, f.bytes()).unwrap();
    let (ds, report) = auspex::nwb::read_dataset(&p2, &all, 1e6, 0.25, &mut Vec::new()).unwrap();
    assert_eq!(ds.trials.iter().filter(|t| t.stimulus.is_none()).count(), 1);
    assert_eq!(report.unlabelled_trials, 1);

    // Ids: duplicated, negative, too large for a unit.
    let mut f = good.clone();
    f.unit_ids[2] = 0;
    assert!(refusal(&f, &all).contains("row 2: unit id 0 is already used by row 0"));
    let mut f = good.clone();
    f.unit_ids[1] = 1 << 40;
    assert!(refusal(&f, &all).contains("row 1: unit id 1099511627776 is not between 0"));
    let mut f = good.clone();
    f.trial_ids[5] = -2;
    assert!(refusal(&f, &all).contains("intervals/trials: row 5: trial id -2 is negative"));

    // Columns of different lengths.
    let mut f = good.clone();
    f.onsets.pop();
    let e = refusal(&f, &all);
    assert!(e.contains("columns of different lengths"), "{e}");

    // Choices that name nothing.
    let e = refusal(
        &good,
        &NwbChoice {
            table: "flashes".into(),
            ..Default::default()
        },
    );
    assert!(
        e.contains("has no table `intervals/flashes` (its interval tables: intervals/trials)"),
        "{e}"
    );
    let e = refusal(
        &good,
        &NwbChoice {
            stimulus: Some("contrast".into()),
            ..Default::default()
        },
    );
    assert!(e.contains("has no column `contrast`"), "{e}");
    let e = refusal(
        &good,
        &NwbChoice {
            units: UnitPick::Ids(vec![1, 8]),
            ..Default::default()
        },
    );
    assert!(e.contains("has no unit with id 8"), "{e}");
}

#[test]
fn a_million_units_and_a_million_trials_are_read_or_refused_by_the_budget() {
    // 10⁶ units with one spike each, 10⁶ trials.
    let n = 1_000_000usize;
    let f = MiniNwb {
        root_type: "NWBFile".into(),
        unit_ids: (0..n as i64).collect(),
        spike_times: (0..n).map(|i| i as f64 * 1e-3).collect(),
        index: (1..=n as u64).collect(),
        quality: None,
        trial_ids: (0..n as i64).collect(),
        onsets: (0..n).map(|i| i as f64 * 1e-3).collect(),
        stimulus: Stimulus::Float((0..n).map(|i| (i % 4) as f64).collect()),
    };
    let d = tempfile::tempdir().unwrap();
    let p = d.path().join("big.nwb");
    std::fs::write(&p, f.bytes()).unwrap();
    let mut notes = Vec::new();
    let ds = auspex::nwb::read_dataset(&p, &NwbChoice::default(), 1e6, 0.25, &mut notes)
        .unwrap()
        .0;
    assert_eq!(
        (ds.units.len(), ds.spikes.len(), ds.trials.len()),
        (n, n, n)
    );
    // Under a small budget the same file is refused before its columns are read, with the sizes.
    auspex_engine::budget::set_mb(8);
    let e = auspex::nwb::read_dataset(&p, &NwbChoice::default(), 1e6, 0.25, &mut notes)
        .err()
        .unwrap()
        .to_string();
    auspex_engine::budget::set_mb(auspex_engine::budget::DEFAULT_MB);
    assert!(
        e.contains("big.nwb") && e.contains("1000000 rows") && e.contains("memory budget"),
        "{e}"
    );
}

mod common;

/// A daemon on free loopback ports with `model`, recording to `record` if given.
async fn daemon(model: Option<&Path>, record: Option<&Path>) -> auspexd::service::Running {
    let fc = auspexd::config::FileConfig {
        model: model.map(Path::to_path_buf),
        ingest: Some("tcp://127.0.0.1:0".into()),
        task_ingest: Some("tcp://127.0.0.1:0".into()),
        publish: Some("tcp://127.0.0.1:0".into()),
        control: Some("tcp://127.0.0.1:0".into()),
        record: record.map(Path::to_path_buf),
        ..Default::default()
    };
    let cfg = auspexd::config::validate(fc, &mut Vec::new()).unwrap();
    auspexd::service::start(cfg).await.unwrap()
}

/// Replays `source` into the daemon as fast as it takes it, waiting for the last message.
async fn replay(source: &auspex::live::ReplaySource, ep: &auspexd::service::BoundEndpoints) {
    let (msgs, rate) = auspex::live::replay_messages(source, &ep.control, "rig", true)
        .await
        .unwrap();
    auspex::live::replay_asking(
        &ep.ingest,
        &ep.control,
        &msgs,
        "rig",
        rate,
        auspex::live::Pace::Max,
        false,
        &auspex::live::Choices::default(),
    )
    .await
    .unwrap();
}

/// A daemon (with `model`, or learning without one) records the replay of the string-stimulus
/// file to `record`; the recording read back.
fn record_replay(model: Option<&Path>, record: &Path) -> auspex::wire::RecordedSession {
    let rt = common::runtime();
    let running = rt.block_on(daemon(model, Some(record)));
    let ep = running.endpoints.clone();
    let source = auspex::live::ReplaySource::Nwb {
        path: dir().join("string_stimulus.nwb"),
        choice: NwbChoice::default(),
    };
    rt.block_on(replay(&source, &ep));
    std::thread::sleep(std::time::Duration::from_millis(200));
    rt.block_on(running.stop());
    auspex::wire::read_recording(record).unwrap()
}

/// `replay --nwb` into a running daemon gives the frames that decoding the same file offline
/// gives (`decode --nwb` runs `run_dataset` on the dataset read here), bit for bit.
#[test]
fn replay_of_an_nwb_file_into_the_daemon_equals_offline_decoding() {
    use auspex_engine::engine::{EngineConfig, EngineSink, Frame};
    use std::time::Duration;
    #[derive(Default)]
    struct Collect(Vec<(u64, u32, Vec<f64>)>);
    impl EngineSink for Collect {
        fn frame(&mut self, f: &Frame<'_>) {
            self.0.push((f.trial, f.bin, f.posterior.to_vec()));
        }
    }
    let _g = common::serial();
    let file = dir().join("string_stimulus.nwb");
    let choice = NwbChoice::default();
    let data = read_nwb("string_stimulus.nwb", &choice);
    let spec = auspex_modelling::fit::plan(&data, &auspex_modelling::fit::FitOptions::default())
        .unwrap()
        .fit_all();
    let tmp = tempfile::tempdir().unwrap();
    let model_path = tmp.path().join("m.apxm");
    auspex_proto::model_file::save_model(&model_path, &spec, "nwb e2e").unwrap();
    let model = std::sync::Arc::new(auspex_engine::Model::new(spec).unwrap());

    let mut offline = Collect::default();
    auspex::offline::run_dataset(
        model,
        &data,
        EngineConfig::new(data.tick_rate_hz),
        &mut offline,
    )
    .unwrap();
    let mut offline = offline.0;
    offline.sort_by_key(|x| (x.0, x.1));

    let rt = common::runtime();
    let running = rt.block_on(daemon(Some(&model_path), None));
    let ep = running.endpoints.clone();
    let ctx = zmq::Context::new();
    let (stop, sub) = common::subscriber(&ctx, &ep.publish);
    std::thread::sleep(Duration::from_millis(300));
    let source = auspex::live::ReplaySource::Nwb { path: file, choice };
    rt.block_on(replay(&source, &ep));
    std::thread::sleep(Duration::from_millis(300));
    stop.send(()).unwrap();
    let got = sub.join().unwrap();
    rt.block_on(running.stop());
    let live = common::frames_of(&got);
    assert!(!live.is_empty());
    assert_eq!(
        live, offline,
        "frames of replay --nwb differ from offline decoding"
    );
}

/// A session recorded by the daemon, exported with `auspex export --nwb`: read back by Auspex it
/// is the recording's dataset and fits the same model; read back by the standard's reference API
/// (pynwb, when `AUSPEX_NWB_PYTHON` names a Python that has it — CI makes one) it shows every
/// unit, spike, trial and decision.
#[test]
fn a_recorded_session_exported_to_nwb_reads_back_whole() {
    let _g = common::serial();
    let data = read_nwb("string_stimulus.nwb", &NwbChoice::default());
    let spec = auspex_modelling::fit::plan(&data, &auspex_modelling::fit::FitOptions::default())
        .unwrap()
        .fit_all();
    let tmp = tempfile::tempdir().unwrap();
    let model_path = tmp.path().join("m.apxm");
    auspex_proto::model_file::save_model(&model_path, &spec, "nwb export e2e").unwrap();
    let record = tmp.path().join("s.apxs");
    let rec = record_replay(Some(&model_path), &record);
    let out = tmp.path().join("s.nwb");
    auspex::commands::export_nwb_cmd(
        &out,
        &record,
        Some(&model_path),
        &auspex::commands::DecodeArgs::default(),
    )
    .unwrap();

    // Auspex reads back the recording's dataset, and fits the same model from it.
    let back = auspex::nwb::read_dataset(&out, &NwbChoice::default(), 1e6, 0.25, &mut Vec::new())
        .unwrap()
        .0;
    same(&back, &rec.dataset, "exported session");
    assert_eq!(back.declared_from, rec.dataset.declared_from);
    let fit = |d: &auspex_engine::data::Dataset| {
        let s = auspex_modelling::fit::plan(d, &auspex_modelling::fit::FitOptions::default())
            .unwrap()
            .fit_all();
        auspex_proto::encode_model_file(&auspex_proto::model_file::spec_to_proto(&s, ""))
    };
    assert!(
        fit(&back) == fit(&rec.dataset),
        "the exported session fits another model"
    );

    // Every trial has the decision offline decoding gives.
    let (_, model) = auspex_proto::model_file::load_model(&model_path).unwrap();
    let model = std::sync::Arc::new(model);
    let mut sink =
        auspex::offline::CsvSink::<std::io::Sink>::new(model.stimuli(), &rec.dataset, None);
    auspex::offline::run_dataset(
        model.clone(),
        &rec.dataset,
        auspex::commands::DecodeArgs::default().config(1e6),
        &mut sink,
    )
    .unwrap();
    let rows = sink.finish().unwrap();
    let decided: std::collections::HashMap<u64, String> = rows
        .iter()
        .map(|r| {
            (
                r.decision.trial,
                model.stimuli()[r.decision.stimulus as usize].clone(),
            )
        })
        .collect();

    pynwb_reads_back(
        &out,
        &rec.dataset,
        &decided,
        model.stimuli(),
        rec.dataset.trials.len() * model.n_bins(),
    );
}

/// The reference API (pynwb), when CI provides it (`AUSPEX_NWB_PYTHON`), reads the exported
/// `file` and finds every unit, spike and trial of `data`, each trial's decision (`decided`,
/// by trial id; none: an empty name), the posterior's columns `stimuli` and `frames` rows.
fn pynwb_reads_back(
    file: &Path,
    data: &auspex_engine::data::Dataset,
    decided: &std::collections::HashMap<u64, String>,
    stimuli: &[String],
    frames: usize,
) {
    let Some(python) = std::env::var_os("AUSPEX_NWB_PYTHON") else {
        assert!(
            std::env::var_os("AUSPEX_REQUIRE_PYNWB").is_none(),
            "AUSPEX_REQUIRE_PYNWB is set but AUSPEX_NWB_PYTHON is not"
        );
        eprintln!(
            "note: AUSPEX_NWB_PYTHON is not set; the pynwb read-back is skipped (CI runs it)"
        );
        return;
    };
    let mut spikes: std::collections::BTreeMap<String, Vec<f64>> = Default::default();
    for (t, u) in data.spikes.iter() {
        spikes
            .entry(u.to_string())
            .or_default()
            .push(t as f64 / 1e6);
    }
    let trials: Vec<u64> = data.trials.iter().map(|t| t.id).collect();
    let want = serde_json::json!({
        "units": data.units,
        "spikes": spikes,
        "trials": trials,
        "onsets": data.trials.iter().map(|t| t.onset as f64 / 1e6).collect::<Vec<_>>(),
        "stimuli": data.trials.iter().map(|t| t.stimulus.clone().unwrap_or_default()).collect::<Vec<_>>(),
        "decided": trials.iter().map(|t| decided.get(t).cloned().unwrap_or_default()).collect::<Vec<_>>(),
        "model_stimuli": stimuli,
        "frames": frames,
    });
    let tmp = tempfile::tempdir().unwrap();
    let wp = tmp.path().join("expected.json");
    std::fs::write(&wp, want.to_string()).unwrap();
    let out = std::process::Command::new(python)
        .arg(dir().join("read_back.py"))
        .arg(file)
        .arg(&wp)
        .output()
        .unwrap();
    let text = format!(
        "{}{}",
        String::from_utf8_lossy(&out.stdout),
        String::from_utf8_lossy(&out.stderr)
    );
    eprintln!("{text}");
    assert!(out.status.success(), "pynwb's read-back failed:\n{text}");
}

/// A learning daemon's recording exported without `--model`: each trial's decision is the one
/// `decode --prequential` of the recording gives (the models the daemon learned, refitted at its
/// own swap points), the posterior's columns are every stimulus a learned model knew, trials
/// opened before the first model say why they have no decision — read back by Auspex's reader
/// and, in CI, by pynwb.
#[test]
fn a_learning_session_exported_without_a_model_carries_its_learned_decisions() {
    use auspex::nwb::{Column, Nwb};
    let _g = common::serial();
    let tmp = tempfile::tempdir().unwrap();
    let record = tmp.path().join("s.apxs");
    let rec = record_replay(None, &record);
    let out = tmp.path().join("s.nwb");
    let args = auspex::commands::DecodeArgs::default();
    auspex::commands::export_nwb_cmd(&out, &record, None, &args).unwrap();

    // What `decode --prequential --session` gives for the same recording.
    let opts = auspex::prequential::recorded_options(&rec).expect("a learning daemon's recording");
    let (run, names, frames) = auspex::prequential::run_recording(
        &rec,
        &opts,
        &args.config(rec.dataset.tick_rate_hz),
        &auspex::prequential::Schedule { every_trials: 1 },
        None::<std::io::Sink>,
        true,
    )
    .unwrap();
    let frames = frames.unwrap();
    let decided: std::collections::HashMap<u64, String> = run
        .decisions
        .iter()
        .zip(&names)
        .map(|(r, n)| (r.decision.trial, n.clone()))
        .collect();
    assert!(
        run.undecoded_trials > 0 && decided.len() > 10,
        "the session should learn part-way: {} undecoded, {} decided",
        run.undecoded_trials,
        decided.len()
    );

    let f = Nwb::open(&out).unwrap();
    let text = |c: &str| match f.column("intervals/trials", c).unwrap() {
        Column::Text(v) => v,
        other => panic!("{c}: {other:?}"),
    };
    let (got, why) = (text("decided_stimulus"), text("decision_reason"));
    for (k, t) in rec.dataset.trials.iter().enumerate() {
        let want = decided.get(&t.id).cloned().unwrap_or_default();
        assert_eq!(got[k], want, "trial {}", t.id);
        if want.is_empty() {
            assert!(
                why[k].starts_with("not decoded"),
                "trial {}: {}",
                t.id,
                why[k]
            );
        }
    }
    let Column::Float(when) = f.column("intervals/trials", "decision_time").unwrap() else {
        panic!("decision_time is not floating point")
    };
    for r in &run.decisions {
        let k = rec
            .dataset
            .trials
            .iter()
            .position(|t| t.id == r.decision.trial)
            .unwrap();
        assert_eq!(
            when[k],
            r.decision.bin_end_tick as f64 / rec.dataset.tick_rate_hz
        );
    }
    let mut union: Vec<String> = Vec::new();
    for (_, n) in &run.frame_meta {
        for s in n.iter() {
            if !union.contains(s) {
                union.push(s.clone());
            }
        }
    }
    assert!(union.len() >= 2);
    // `inspect --nwb` of the export fits 80 columns (its long decision reasons shortened) and
    // shows decided stimuli, not only the undecoded first trials' "(none)".
    let summary = f.summary().unwrap();
    for line in summary.lines().skip(1) {
        assert!(line.chars().count() <= 80, "{line:?} is wider than 80");
    }
    let decided_line = summary
        .lines()
        .find(|l| l.trim_start().starts_with("decided_stimulus"))
        .unwrap();
    assert!(
        union.iter().any(|s| decided_line.contains(s.as_str())),
        "{decided_line}"
    );
    pynwb_reads_back(&out, &rec.dataset, &decided, &union, frames.len());
}

/// The CSV path's check that spikes and trials fit together applies to NWB files too: trial
/// times in milliseconds beside spike times in seconds are refused with what was found.
#[test]
fn times_in_the_wrong_unit_are_refused_as_for_the_tables() {
    let mut f = MiniNwb::regular(3, 50, 20);
    for t in &mut f.onsets {
        *t *= 1000.0;
    }
    let d = tempfile::tempdir().unwrap();
    let p = d.path().join("ms.nwb");
    std::fs::write(&p, f.bytes()).unwrap();
    let source = |trust_times| auspex::tables::Source::Nwb {
        path: p.clone(),
        choice: NwbChoice::default(),
        tick_rate_hz: 1e6,
        trust_times,
    };
    let e = source(false).load(0.25).err().unwrap().to_string();
    assert!(
        e.contains("the times look like different units")
            && e.contains("ms.nwb (units)")
            && e.contains("ms.nwb (trials)"),
        "{e}"
    );
    assert!(source(true).load(0.25).is_ok());
}

proptest::proptest! {
    #![proptest_config(proptest::test_runner::Config::with_cases(24))]
    /// For random units, spike times and trials: what the reader returns is exactly the file's
    /// content at the CSV path's tick rule (every spike of every unit, every trial with its
    /// label, nothing dropped), and listing the units in another row order gives the same
    /// dataset.
    #[test]
    fn the_reader_returns_the_files_content_whatever_the_unit_order(
        per_unit in proptest::collection::vec(proptest::collection::vec(0.0f64..50.0, 0..30), 1..6),
        onsets in proptest::collection::vec(0.0f64..50.0, 1..12),
        ids in proptest::collection::vec(0u32..1000, 6),
        rotate in 0usize..6,
    ) {
        let mut seen = std::collections::HashSet::new();
        let unit_ids: Vec<u32> = ids.iter().copied().filter(|u| seen.insert(*u)).take(per_unit.len()).collect();
        proptest::prop_assume!(unit_ids.len() == per_unit.len());
        let build = |order: &[usize]| {
            let mut times = Vec::new();
            let mut index = Vec::new();
            for &r in order {
                times.extend_from_slice(&per_unit[r]);
                index.push(times.len() as u64);
            }
            MiniNwb {
                root_type: "NWBFile".into(),
                unit_ids: order.iter().map(|&r| unit_ids[r] as i64).collect(),
                spike_times: times,
                index,
                quality: None,
                trial_ids: (0..onsets.len() as i64).collect(),
                onsets: onsets.clone(),
                stimulus: Stimulus::Text((0..onsets.len()).map(|i| format!("s{}", i % 3)).collect()),
            }
        };
        let n = per_unit.len();
        let order: Vec<usize> = (0..n).collect();
        let rotated: Vec<usize> = (0..n).map(|i| (i + rotate) % n).collect();
        let d = tempfile::tempdir().unwrap();
        let read = |f: &MiniNwb, name: &str| {
            let p = d.path().join(name);
            std::fs::write(&p, f.bytes()).unwrap();
            auspex::nwb::read_dataset(&p, &NwbChoice::default(), 30_000.0, 0.25, &mut Vec::new())
                .unwrap()
                .0
        };
        let a = read(&build(&order), "a.nwb");
        let b = read(&build(&rotated), "b.nwb");
        // Exactly the file's content, by the CSV path's rule.
        let mut want: Vec<(i64, u32)> = per_unit
            .iter()
            .enumerate()
            .flat_map(|(r, v)| v.iter().map(move |&t| (auspex_engine::data::seconds_to_ticks(t, 30_000.0), r)))
            .map(|(t, r)| (t, unit_ids[r]))
            .collect();
        want.sort_unstable();
        proptest::prop_assert!(a.spikes == want);
        let mut units = unit_ids.clone();
        units.sort_unstable();
        proptest::prop_assert_eq!(&a.units, &units);
        proptest::prop_assert_eq!(a.trials.len(), onsets.len());
        proptest::prop_assert!(a.trials.iter().all(|t| t.stimulus.is_some()));
        // The same whatever the units' row order.
        proptest::prop_assert!(a.spikes == b.spikes);
        proptest::prop_assert_eq!(&a.units, &b.units);
        proptest::prop_assert_eq!(&a.trials, &b.trials);
    }
}
