//! Decisions that keep their promise, end to end through the daemon with a libzmq peer: a target
//! accuracy picks the threshold the model's held-out record supports (and is refused where it
//! cannot), the live watch tallies the labelled threshold decisions exactly as offline decoding
//! takes them, and a model that is confidently wrong raises the alarm in health.

use auspex::offline::run_dataset;
use auspex::wire::dataset_messages;
use auspex_engine::calibration::CalibrationMethod;
use auspex_engine::engine::{Decision, DecisionReason, EngineConfig, EngineSink};
use auspex_engine::{Dataset, Model, ModelSpec};
use auspex_modelling::calibrate::{calibrate, held_out_set};
use auspex_modelling::fit::{plan, FitOptions};
use auspex_modelling::simulate::{simulate, SimOptions};
use auspex_proto::v1::{self, control_request};
use auspexd::config::{validate, FileConfig};
use prost::Message;
use std::sync::Arc;
use std::time::Duration;

mod common;
use common::{control, runtime, serial, status, wait_for};

/// A calibrated model (temperature, with its threshold record) fitted on 25 trials per stimulus,
/// and 30 fresh trials per stimulus to stream.
fn calibrated() -> (ModelSpec, Dataset) {
    let sc = common::demo_scenario(10, 4);
    let truth = Model::new(sc.true_model().unwrap()).unwrap();
    let train = simulate(
        &truth,
        &SimOptions {
            trials_per_stimulus: 25,
            ..sc.sim_options()
        },
    );
    let opts = FitOptions {
        window_s: sc.window_ms / 1000.0,
        ..FitOptions::default()
    };
    let mut spec = plan(&train, &opts).unwrap().fit_all();
    let set = held_out_set(&train, &opts, &spec.stimuli, 5, 1, &|p| p.fit_all()).unwrap();
    spec.calibration = calibrate(&set, CalibrationMethod::Temperature, 0.02);
    let data = simulate(
        &truth,
        &SimOptions {
            trials_per_stimulus: 30,
            seed: 4242,
            ..sc.sim_options()
        },
    );
    (spec, data)
}

fn config(model: &std::path::Path, target: Option<f64>) -> auspexd::config::DaemonConfig {
    let fc = FileConfig {
        model: Some(model.to_path_buf()),
        ingest: Some("tcp://127.0.0.1:0".into()),
        task_ingest: Some(String::new()),
        publish: Some("tcp://127.0.0.1:0".into()),
        control: Some("tcp://127.0.0.1:0".into()),
        target_accuracy: target,
        ..Default::default()
    };
    let mut c = validate(fc, &mut Vec::new()).unwrap();
    c.health_period = Duration::from_millis(100);
    c
}

/// Labelled threshold decisions offline: (decisions, right).
#[derive(Default)]
struct Tally(u64, u64);
impl EngineSink for Tally {
    fn decision(&mut self, d: &Decision) {
        if d.reason == DecisionReason::Threshold {
            if let Some(p) = d.presented {
                self.0 += 1;
                self.1 += (p == d.stimulus) as u64;
            }
        }
    }
}

/// Streams `data` into a running daemon and waits until every message is processed.
fn stream(
    ctx: &zmq::Context,
    ep: &auspexd::service::BoundEndpoints,
    model: &Model,
    data: &Dataset,
    sender: &str,
) {
    let push = ctx.socket(zmq::PUSH).unwrap();
    push.set_sndhwm(0).unwrap();
    push.connect(&ep.ingest).unwrap();
    let bt = (model.bin_width_s() * data.tick_rate_hz).round() as i64;
    let msgs = dataset_messages(data, sender, bt, bt * model.n_bins() as i64);
    for m in &msgs {
        push.send(m.encode_to_vec(), 0).unwrap();
    }
    let n = msgs.len() as u64;
    wait_for(
        || {
            status(ctx, &ep.control)
                .senders
                .iter()
                .any(|s| s.sender == sender && s.last_seq == n && s.ended)
        },
        "the whole session",
    );
    std::thread::sleep(Duration::from_millis(300));
}

#[test]
fn a_target_accuracy_is_kept_refused_and_watched_live() {
    let _serial = serial();
    let dir = tempfile::tempdir().unwrap();
    let (spec, data) = calibrated();
    let path = dir.path().join("m.apxm");
    auspex_proto::model_file::save_model(&path, &spec, "promise e2e").unwrap();
    let model = Arc::new(Model::new(spec.clone()).unwrap());
    let cal = model.calibration();
    // A target the record supports: the accuracy bound of its 0.8 threshold.
    let target =
        (cal.evidence.iter().find(|e| e.threshold == 0.8).unwrap().lo * 100.0).floor() / 100.0;
    let chosen = cal.threshold_for(target).unwrap().clone();

    // A target no threshold's record supports: the daemon refuses to start.
    let rt = runtime();
    let e = match rt.block_on(auspexd::service::start(config(&path, Some(0.9999)))) {
        Err(e) => format!("{e:#}"),
        Ok(_) => panic!("a daemon started with a target its model cannot support"),
    };
    assert!(e.contains("cannot support this promise"), "{e}");

    let running = rt
        .block_on(auspexd::service::start(config(&path, Some(target))))
        .unwrap();
    let ep = running.endpoints.clone();
    let ctx = zmq::Context::new();
    let st = status(&ctx, &ep.control);
    assert_eq!(st.threshold, chosen.threshold);
    assert_eq!(st.min_time_s, cal.min_time_s);
    let p = st.promise.clone().unwrap();
    assert_eq!(p.target_accuracy, target);
    assert!(!p.withheld && p.calibrated, "{p:?}");
    assert!(
        p.evidence.starts_with(&format!(
            "held out at θ {}: {}/{}",
            chosen.threshold, chosen.correct, chosen.trials
        )),
        "{}",
        p.evidence
    );
    assert!(
        p.calibration.starts_with("temperature (β "),
        "{}",
        p.calibration
    );

    // Steering to a target the record cannot support is refused and changes nothing.
    let r = control(
        &ctx,
        &ep.control,
        control_request::Body::SetPolicy(v1::SetPolicy {
            threshold: 0.5,
            min_time_s: 0.0,
            target_accuracy: 0.9999,
        }),
    );
    assert!(!r.ok && r.error.contains("cannot support"), "{}", r.error);
    assert_eq!(status(&ctx, &ep.control).threshold, chosen.threshold);

    // The live watch counts exactly the labelled threshold decisions offline decoding takes.
    stream(&ctx, &ep, &model, &data, "promise");
    let h = status(&ctx, &ep.control).health.unwrap();
    let mut cfg = EngineConfig::new(data.tick_rate_hz);
    cfg.policy.threshold = chosen.threshold;
    cfg.policy.min_time_s = cal.min_time_s;
    let mut offline = Tally::default();
    run_dataset(model.clone(), &data, cfg, &mut offline).unwrap();
    assert!(
        offline.0 > 50,
        "too few threshold decisions to watch: {}",
        offline.0
    );
    assert_eq!(h.promises.len(), 1, "{:?}", h.promises);
    let rec = &h.promises[0];
    assert_eq!((rec.promise, rec.threshold), (target, chosen.threshold));
    assert_eq!((rec.decisions, rec.correct), (offline.0, offline.1));
    assert!(
        !rec.broken && !h.promise_broken,
        "a kept promise raised the alarm: {rec:?}"
    );
    rt.block_on(running.stop());
}

#[test]
fn a_confidently_wrong_model_breaks_its_promise_and_health_says_so() {
    let _serial = serial();
    let dir = tempfile::tempdir().unwrap();
    let (mut spec, data) = calibrated();
    // The stimulus names rotated: every cell now describes another stimulus than its name says.
    spec.stimuli.rotate_left(1);
    spec.calibration = Default::default();
    let path = dir.path().join("wrong.apxm");
    auspex_proto::model_file::save_model(&path, &spec, "promise e2e, wrong names").unwrap();
    let model = Model::new(spec).unwrap();
    let rt = runtime();
    let running = rt
        .block_on(auspexd::service::start(config(&path, None)))
        .unwrap();
    let ep = running.endpoints.clone();
    let ctx = zmq::Context::new();
    stream(&ctx, &ep, &model, &data, "wrong");
    let st = status(&ctx, &ep.control);
    let h = st.health.clone().unwrap();
    assert!(h.promise_broken, "{:?}", h.promises);
    let rec = &h.promises[0];
    assert_eq!(rec.promise, 0.9);
    assert!(rec.broken && rec.accuracy_hi < 0.9, "{rec:?}");
    // `auspex status` says so in words.
    let lines = auspex::monitor::promise_lines(&st).join("\n");
    assert!(lines.contains("BROKEN"), "{lines}");
    rt.block_on(running.stop());
}
