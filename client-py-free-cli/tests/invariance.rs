//! Order is presentation only. `fit`, `decode` and `validate` read the same session from CSV
//! tables whose rows are shuffled, whose stimuli are renamed and whose units are renumbered, and
//! must give the same figures once the names and numbers are mapped back:
//!
//! * rows shuffled, stimuli renamed and units renumbered in the same order: identical to the
//!   last bit (the model file's cells and calibration, every posterior, every validation figure);
//! * units renumbered in another order, or the stimuli listed in another order
//!   (`--stimulus-order`): the population sums run over units and stimuli in another order, so
//!   floating-point results may differ in the last bits — every figure agrees to 1e-9 (relative),
//!   and every count, decision and verdict is identical.
//!
//! (Before this, `--stimulus-order` changed accuracies by up to 5 points: folds were drawn in
//! stimulus order.)

use auspex::commands::{fit_cmd, FitArgs};
use auspex::tables::{read_dataset, Source};
use auspex::validate::{validate, ValidateOptions};
use auspex_engine::engine::{EngineConfig, EngineSink, Frame};
use auspex_engine::{Dataset, Model, ModelSpec};
use auspex_modelling::fit::FitOptions;
use auspex_modelling::simulate::{simulate, Scenario, SimOptions};
use proptest::prelude::*;
use rand::seq::SliceRandom;
use rand::{Rng, SeedableRng};
use serde_json::{json, Value};
use std::collections::{BTreeMap, HashMap};
use std::path::Path;
use std::sync::Arc;

/// Three demo units and the four cardinal directions (two opposite pairs share their counts).
fn scenario() -> Scenario {
    let text = std::fs::read_to_string(auspex::demo_dir().join("scenario.toml")).unwrap();
    let mut s: Scenario = toml::from_str(&text).unwrap();
    s.units.truncate(3);
    s.stimuli = s.stimuli.into_iter().step_by(2).collect();
    s
}

/// One way of writing the session down: the rows, and how to map names and ids back.
struct Tables {
    spikes: Vec<(u32, i64)>,
    trials: Vec<(u64, i64, String)>,
    /// Written name → original name.
    stimulus: HashMap<String, String>,
    /// Written id → original id.
    unit: HashMap<u32, u32>,
    /// `--stimulus-order` (written names), or none.
    order: Vec<String>,
}

fn original(data: &Dataset) -> Tables {
    let names = data.stimulus_names();
    Tables {
        spikes: data.spikes.iter().map(|(t, u)| (u, t)).collect(),
        trials: data
            .trials
            .iter()
            .map(|t| (t.id, t.onset, t.stimulus.clone().unwrap()))
            .collect(),
        stimulus: names.iter().map(|s| (s.clone(), s.clone())).collect(),
        unit: data.units.iter().map(|&u| (u, u)).collect(),
        order: Vec::new(),
    }
}

/// The same session written differently: rows shuffled; stimuli renamed (not numbers, so they
/// keep the order they are first met in); units renumbered, keeping their order or not; and a
/// stimulus order for the listing, or none.
fn rewritten(data: &Dataset, seed: u64, keep_unit_order: bool, list_order: bool) -> Tables {
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(seed);
    let names = data.stimulus_names();
    let mut new_names: Vec<String> = Vec::new();
    while new_names.len() < names.len() {
        let n = format!("stim-{:x}", rng.gen::<u32>());
        if !new_names.contains(&n) {
            new_names.push(n);
        }
    }
    let rename: HashMap<String, String> = names
        .iter()
        .cloned()
        .zip(new_names.iter().cloned())
        .collect();
    let mut ids: Vec<u32> = Vec::new();
    while ids.len() < data.units.len() {
        let id = rng.gen_range(1..100_000u32);
        if !ids.contains(&id) {
            ids.push(id);
        }
    }
    if keep_unit_order {
        ids.sort_unstable();
    }
    let renumber: HashMap<u32, u32> = data
        .units
        .iter()
        .copied()
        .zip(ids.iter().copied())
        .collect();
    let mut spikes: Vec<(u32, i64)> = data.spikes.iter().map(|(t, u)| (renumber[&u], t)).collect();
    let mut trials: Vec<(u64, i64, String)> = data
        .trials
        .iter()
        .map(|t| (t.id, t.onset, rename[t.stimulus.as_ref().unwrap()].clone()))
        .collect();
    spikes.shuffle(&mut rng);
    trials.shuffle(&mut rng);
    let mut order = new_names.clone();
    order.shuffle(&mut rng);
    Tables {
        spikes,
        trials,
        stimulus: rename.iter().map(|(a, b)| (b.clone(), a.clone())).collect(),
        unit: renumber.iter().map(|(a, b)| (*b, *a)).collect(),
        order: if list_order { order } else { Vec::new() },
    }
}

fn write(dir: &Path, t: &Tables) -> (std::path::PathBuf, std::path::PathBuf) {
    use std::fmt::Write;
    let mut s = String::from("unit,time_s\n");
    for (u, tick) in &t.spikes {
        let _ = writeln!(s, "{u},{}.{:06}", tick / 1_000_000, tick % 1_000_000);
    }
    let mut tr = String::from("trial,onset_s,stimulus\n");
    for (id, onset, name) in &t.trials {
        let _ = writeln!(
            tr,
            "{id},{}.{:06},{name}",
            onset / 1_000_000,
            onset % 1_000_000
        );
    }
    let (sp, tp) = (dir.join("spikes.csv"), dir.join("trials.csv"));
    std::fs::write(&sp, s).unwrap();
    std::fs::write(&tp, tr).unwrap();
    (sp, tp)
}

#[derive(Default)]
struct Frames(Vec<(u64, u32, Vec<f64>)>);
impl EngineSink for Frames {
    fn frame(&mut self, f: &Frame<'_>) {
        self.0.push((f.trial, f.bin, f.posterior.to_vec()));
    }
}

/// Fit (as `auspex fit`, calibration included), decode the same tables with the model, and
/// validate them; every output in a form that names stimuli and units by their original names
/// and ids, in a canonical order.
fn run(dir: &Path, t: &Tables) -> (Value, Value, Value) {
    let (sp, tp) = write(dir, t);
    let model_path = dir.join("m.apxm");
    fit_cmd(
        &Source::tables(&sp, &tp),
        &model_path,
        &FitArgs {
            stimulus_order: t.order.clone(),
            quiet: true,
            ..Default::default()
        },
    )
    .unwrap();
    let (spec, _) = auspex_proto::model_file::load_model(&model_path).unwrap();
    let (mut data, _) = read_dataset(&sp, &tp, 1e6, 0.25).unwrap();
    data.stimulus_order = t.order.clone();
    let model = Arc::new(Model::new(spec.clone()).unwrap());
    let mut frames = Frames::default();
    auspex::offline::run_dataset(model, &data, EngineConfig::new(1e6), &mut frames).unwrap();
    let (v, _) = validate(
        &data,
        "invariance",
        &ValidateOptions {
            shuffles: 9,
            fit: FitOptions {
                window_s: 0.25,
                ..FitOptions::default()
            },
            ..ValidateOptions::default()
        },
    )
    .unwrap();
    let stim = |s: &str| t.stimulus[s].clone();
    (
        canonical_model(&spec, t),
        canonical_frames(&frames.0, &spec.stimuli, &stim),
        canonical_validation(serde_json::to_value(&v).unwrap(), t),
    )
}

fn canonical_model(spec: &ModelSpec, t: &Tables) -> Value {
    let ns = spec.stimuli.len();
    let mut cells = BTreeMap::new();
    for (ui, u) in spec.units.iter().enumerate() {
        for (si, s) in spec.stimuli.iter().enumerate() {
            let key = format!("{} {}", t.unit[u], t.stimulus[s]);
            cells.insert(
                key,
                serde_json::to_value(&spec.cells[ui * ns + si]).unwrap(),
            );
        }
    }
    let prior: BTreeMap<String, f64> = spec
        .stimuli
        .iter()
        .zip(&spec.prior)
        .map(|(s, p)| (t.stimulus[s].clone(), *p))
        .collect();
    json!({
        "bin_width_s": spec.bin_width_s,
        "n_bins": spec.n_bins,
        "cells": cells,
        "prior": prior,
        "calibration": serde_json::to_value(&spec.calibration).unwrap(),
    })
}

fn canonical_frames(
    frames: &[(u64, u32, Vec<f64>)],
    stimuli: &[String],
    stim: &dyn Fn(&str) -> String,
) -> Value {
    let mut out = BTreeMap::new();
    for (trial, bin, p) in frames {
        let by: BTreeMap<String, f64> = stimuli
            .iter()
            .map(|s| stim(s))
            .zip(p.iter().copied())
            .collect();
        out.insert(format!("{trial:08} {bin:05}"), json!(by));
    }
    json!(out)
}

/// The validation JSON with names and ids mapped back, confusion matrices in a canonical
/// stimulus order, and lists whose order is presentation (units ranked, cells) sorted.
fn canonical_validation(mut v: Value, t: &Tables) -> Value {
    let obj = v.as_object_mut().unwrap();
    obj.remove("seconds");
    obj.remove("source");
    let written: Vec<String> = obj["stimuli"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s.as_str().unwrap().to_string())
        .collect();
    let orig: Vec<String> = written.iter().map(|s| t.stimulus[s].clone()).collect();
    let mut perm: Vec<usize> = (0..orig.len()).collect();
    perm.sort_by(|&a, &b| orig[a].cmp(&orig[b]));
    let mut sorted = orig.clone();
    sorted.sort();
    obj.insert("stimuli".into(), json!(sorted));
    let mut units: Vec<u32> = obj["units"]
        .as_array()
        .unwrap()
        .iter()
        .map(|u| t.unit[&(u.as_u64().unwrap() as u32)])
        .collect();
    units.sort_unstable();
    obj.insert("units".into(), json!(units));
    for d in obj["decoders"].as_array_mut().unwrap() {
        for key in ["confusion_decision", "confusion_end"] {
            let m = d[key].clone();
            let m: Vec<Vec<Value>> = perm
                .iter()
                .map(|&r| perm.iter().map(|&c| m[r][c].clone()).collect())
                .collect();
            d[key] = json!(m);
        }
    }
    let ranked = obj["units_ranked"].as_array_mut().unwrap();
    for r in ranked.iter_mut() {
        let u = t.unit[&(r["unit"].as_u64().unwrap() as u32)];
        r["unit"] = json!(u);
        let cells = r["cells"].as_array_mut().unwrap();
        for c in cells.iter_mut() {
            c["stimulus"] = json!(t.stimulus[c["stimulus"].as_str().unwrap()]);
        }
        cells.sort_by(|a, b| a["stimulus"].as_str().cmp(&b["stimulus"].as_str()));
    }
    ranked.sort_by_key(|r| r["unit"].as_u64());
    let failed = obj["goodness_of_fit"]["failed"].as_array_mut().unwrap();
    for f in failed.iter_mut() {
        let u = t.unit[&(f[0].as_u64().unwrap() as u32)];
        let s = t.stimulus[f[1].as_str().unwrap()].clone();
        *f = json!([u, s]);
    }
    failed.sort_by_key(|f| f.to_string());
    v
}

/// Equal, numbers to within `tol` (relative; 0: bit for bit), at the path given.
fn same(a: &Value, b: &Value, tol: f64, path: &str) -> Result<(), String> {
    match (a, b) {
        (Value::Number(x), Value::Number(y)) => {
            if x.is_f64() || y.is_f64() {
                let (x, y) = (x.as_f64().unwrap(), y.as_f64().unwrap());
                let close = if tol == 0.0 {
                    x.to_bits() == y.to_bits() || x == y
                } else {
                    (x - y).abs() <= tol * x.abs().max(y.abs()).max(1.0)
                };
                close.then_some(()).ok_or(format!("{path}: {x} vs {y}"))
            } else {
                (x == y).then_some(()).ok_or(format!("{path}: {x} vs {y}"))
            }
        }
        (Value::Array(x), Value::Array(y)) => {
            if x.len() != y.len() {
                return Err(format!("{path}: {} vs {} items", x.len(), y.len()));
            }
            for (i, (p, q)) in x.iter().zip(y).enumerate() {
                same(p, q, tol, &format!("{path}[{i}]"))?;
            }
            Ok(())
        }
        (Value::Object(x), Value::Object(y)) => {
            let kx: Vec<_> = x.keys().collect();
            let ky: Vec<_> = y.keys().collect();
            if kx != ky {
                return Err(format!("{path}: keys {kx:?} vs {ky:?}"));
            }
            for (k, p) in x {
                same(p, &y[k], tol, &format!("{path}.{k}"))?;
            }
            Ok(())
        }
        _ => (a == b).then_some(()).ok_or(format!("{path}: {a} vs {b}")),
    }
}

/// Counts and verdicts are identical even where sums may differ in their last bits: every
/// integer, string and boolean of the validation, and every decision (the top stimulus of the
/// last frame of each trial).
fn same_counts(a: &Value, b: &Value, path: &str) -> Result<(), String> {
    match (a, b) {
        (Value::Number(x), Value::Number(y)) if !(x.is_f64() || y.is_f64()) => {
            (x == y).then_some(()).ok_or(format!("{path}: {x} vs {y}"))
        }
        (Value::Number(_), Value::Number(_)) => Ok(()),
        (Value::Array(x), Value::Array(y)) => {
            for (i, (p, q)) in x.iter().zip(y).enumerate() {
                same_counts(p, q, &format!("{path}[{i}]"))?;
            }
            Ok(())
        }
        (Value::Object(x), Value::Object(y)) => {
            for (k, p) in x {
                same_counts(p, &y[k], &format!("{path}.{k}"))?;
            }
            Ok(())
        }
        _ => (a == b).then_some(()).ok_or(format!("{path}: {a} vs {b}")),
    }
}

/// Every probability and accuracy of a validation lies in [0, 1], each interval contains its
/// estimate, and every information figure lies in [0, log2 S].
fn bounded(v: &Value, max_bits: f64, path: &str) -> Result<(), String> {
    match v {
        Value::Object(o) => {
            let f = |k: &str| o.get(k).and_then(Value::as_f64);
            if let (Some(a), Some(lo), Some(hi)) = (f("accuracy"), f("lo"), f("hi")) {
                if !(0.0 <= lo && lo <= a + 1e-12 && a <= hi + 1e-12 && hi <= 1.0) {
                    return Err(format!("{path}: accuracy {a} with interval [{lo}, {hi}]"));
                }
            }
            for k in ["chance", "p_value", "early_share", "threshold"] {
                if let Some(x) = f(k) {
                    if !(0.0..=1.0).contains(&x) {
                        return Err(format!("{path}.{k} = {x}"));
                    }
                }
            }
            for k in ["bits", "plugin_bits", "info_bits", "null_95"] {
                if let Some(x) = f(k) {
                    if !(0.0..=max_bits + 1e-9).contains(&x) {
                        return Err(format!("{path}.{k} = {x} outside [0, {max_bits}]"));
                    }
                }
            }
            for (k, x) in o {
                bounded(x, max_bits, &format!("{path}.{k}"))?;
            }
            Ok(())
        }
        Value::Array(a) => {
            for (i, x) in a.iter().enumerate() {
                bounded(x, max_bits, &format!("{path}[{i}]"))?;
            }
            Ok(())
        }
        _ => Ok(()),
    }
}

fn session(seed: u64) -> Dataset {
    let sc = scenario();
    let truth = Model::new(sc.true_model().unwrap()).unwrap();
    simulate(
        &truth,
        &SimOptions {
            trials_per_stimulus: 6,
            seed,
            ..sc.sim_options()
        },
    )
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 4, ..ProptestConfig::default() })]

    /// Rows shuffled, stimuli renamed, units renumbered in order: identical to the last bit.
    #[test]
    fn rows_names_and_ids_change_nothing(seed in 1u64..10_000, how in any::<u64>()) {
        let data = session(seed);
        let (da, db) = (tempfile::tempdir().unwrap(), tempfile::tempdir().unwrap());
        let a = run(da.path(), &original(&data));
        let b = run(db.path(), &rewritten(&data, how, true, false));
        same(&a.0, &b.0, 0.0, "model").map_err(TestCaseError::fail)?;
        same(&a.1, &b.1, 0.0, "frames").map_err(TestCaseError::fail)?;
        same(&a.2, &b.2, 0.0, "validation").map_err(TestCaseError::fail)?;
        bounded(&a.2, 2.0, "validation").map_err(TestCaseError::fail)?;
    }

    /// Units renumbered in another order and the stimuli listed in another order: every figure
    /// to 1e-9, every count, decision and verdict identical.
    #[test]
    fn unit_and_stimulus_order_change_no_figure(seed in 1u64..10_000, how in any::<u64>()) {
        let data = session(seed);
        let (da, db) = (tempfile::tempdir().unwrap(), tempfile::tempdir().unwrap());
        let a = run(da.path(), &original(&data));
        let b = run(db.path(), &rewritten(&data, how, false, true));
        same(&a.0, &b.0, 1e-9, "model").map_err(TestCaseError::fail)?;
        same(&a.1, &b.1, 1e-9, "frames").map_err(TestCaseError::fail)?;
        same(&a.2, &b.2, 1e-9, "validation").map_err(TestCaseError::fail)?;
        same_counts(&a.2, &b.2, "validation").map_err(TestCaseError::fail)?;
    }
}
