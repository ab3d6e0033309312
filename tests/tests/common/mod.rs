//! Helpers every end-to-end test file shares: one daemon test at a time, a libzmq SUB that
//! collects everything, control requests over a libzmq REQ, waiting for a condition, and the
//! posterior frames of what was collected.
#![allow(dead_code)]

use auspex_proto::v1::{self, control_reply, control_request, outbound};
use prost::Message;
use std::sync::mpsc;
use std::time::{Duration, Instant};

/// The tests here each run a daemon, a libzmq peer and a flat-out sender; on a two-core CI
/// machine running them side by side starves some of them for seconds. One at a time.
pub fn serial() -> std::sync::MutexGuard<'static, ()> {
    static LOCK: std::sync::Mutex<()> = std::sync::Mutex::new(());
    LOCK.lock().unwrap_or_else(|e| e.into_inner())
}

pub fn subscriber(
    ctx: &zmq::Context,
    endpoint: &str,
) -> (
    mpsc::Sender<()>,
    std::thread::JoinHandle<Vec<(String, v1::Outbound)>>,
) {
    let sub = ctx.socket(zmq::SUB).unwrap();
    sub.set_rcvhwm(0).unwrap();
    sub.connect(endpoint).unwrap();
    sub.set_subscribe(b"").unwrap();
    let (tx, rx) = mpsc::channel();
    let h = std::thread::spawn(move || {
        let mut out = Vec::new();
        sub.set_rcvtimeo(50).unwrap();
        loop {
            if rx.try_recv().is_ok() {
                // Drain what is still queued.
                while let Ok(parts) = sub.recv_multipart(0) {
                    out.push((
                        String::from_utf8_lossy(&parts[0]).to_string(),
                        v1::Outbound::decode(parts[1].as_slice()).unwrap(),
                    ));
                }
                return out;
            }
            if let Ok(parts) = sub.recv_multipart(0) {
                out.push((
                    String::from_utf8_lossy(&parts[0]).to_string(),
                    v1::Outbound::decode(parts[1].as_slice()).unwrap(),
                ));
            }
        }
    });
    (tx, h)
}

pub fn control(
    ctx: &zmq::Context,
    endpoint: &str,
    body: control_request::Body,
) -> v1::ControlReply {
    control_waiting(ctx, endpoint, body, 5000)
}

/// A control request whose reply may take a while (saving a learned model fits it first).
pub fn control_waiting(
    ctx: &zmq::Context,
    endpoint: &str,
    body: control_request::Body,
    timeout_ms: i32,
) -> v1::ControlReply {
    let req = ctx.socket(zmq::REQ).unwrap();
    req.set_rcvtimeo(timeout_ms).unwrap();
    req.set_linger(0).unwrap();
    req.connect(endpoint).unwrap();
    req.send(v1::ControlRequest { body: Some(body) }.encode_to_vec(), 0)
        .unwrap();
    v1::ControlReply::decode(req.recv_bytes(0).unwrap().as_slice()).unwrap()
}

pub fn status(ctx: &zmq::Context, endpoint: &str) -> v1::Status {
    match control(
        ctx,
        endpoint,
        control_request::Body::Status(v1::StatusQuery {}),
    )
    .body
    {
        Some(control_reply::Body::Status(s)) => s,
        other => panic!("no status: {other:?}"),
    }
}

/// Status, or None when the daemon answers with an error instead (a learning daemon busy with
/// an in-step refit answers "did not reply in time" after 3 s).
#[allow(dead_code)]
pub fn try_status(ctx: &zmq::Context, endpoint: &str) -> Option<v1::Status> {
    match control(
        ctx,
        endpoint,
        control_request::Body::Status(v1::StatusQuery {}),
    )
    .body
    {
        Some(control_reply::Body::Status(s)) => Some(s),
        _ => None,
    }
}

pub fn wait_for(mut cond: impl FnMut() -> bool, what: &str) {
    let t0 = Instant::now();
    while !cond() {
        assert!(
            t0.elapsed() < Duration::from_secs(30),
            "timed out waiting for {what}"
        );
        std::thread::sleep(Duration::from_millis(20));
    }
}

pub fn frames_of(got: &[(String, v1::Outbound)]) -> Vec<(u64, u32, Vec<f64>)> {
    let mut v: Vec<_> = got
        .iter()
        .filter_map(|(t, m)| match &m.body {
            Some(outbound::Body::Posterior(p)) if t == "posterior" => {
                Some((p.trial, p.bin, p.posterior.clone()))
            }
            _ => None,
        })
        .collect();
    v.sort_by_key(|x| (x.0, x.1));
    v
}

/// The demo scenario cut to its first `units` units and `stimuli` stimuli.
pub fn demo_scenario(units: usize, stimuli: usize) -> auspex_modelling::simulate::Scenario {
    let text = std::fs::read_to_string(auspex::demo_dir().join("scenario.toml")).unwrap();
    let mut s: auspex_modelling::simulate::Scenario = toml::from_str(&text).unwrap();
    s.units.truncate(units);
    s.stimuli.truncate(stimuli);
    s
}

/// The two-worker runtime the daemon tests start their daemons on.
pub fn runtime() -> tokio::runtime::Runtime {
    tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .unwrap()
}

/// The demo scenario grown to `units` units (the demo's 24 repeated with new ids and turned
/// preferred directions), for models of several unit blocks.
#[allow(dead_code)]
pub fn many_units_scenario(units: usize, stimuli: usize) -> auspex_modelling::simulate::Scenario {
    let mut s = demo_scenario(usize::MAX, stimuli);
    if units <= s.units.len() {
        return demo_scenario(units, stimuli);
    }
    let base = s.units.clone();
    s.units = (0..units)
        .map(|i| {
            let mut u = base[i % base.len()].clone();
            u.id = 1000 + i as u32;
            u.preferred_deg = (u.preferred_deg + 15.0 * (i / base.len()) as f64) % 360.0;
            u
        })
        .collect();
    s
}

/// Fits a model of `sc` on `train_trials` simulated trials per stimulus (seed of the scenario)
/// as `auspex fit` would, and saves it as `dir/m.apxm`: (its path, the spec).
pub fn fitted_model(
    sc: &auspex_modelling::simulate::Scenario,
    train_trials: u32,
    dir: &std::path::Path,
) -> (std::path::PathBuf, auspex_engine::model::ModelSpec) {
    use auspex_modelling::simulate::{simulate, SimOptions};
    let truth = auspex_engine::Model::new(sc.true_model().unwrap()).unwrap();
    let train = simulate(
        &truth,
        &SimOptions {
            trials_per_stimulus: train_trials,
            ..sc.sim_options()
        },
    );
    let opts = auspex_modelling::fit::FitOptions {
        window_s: sc.window_ms / 1000.0,
        ..Default::default()
    };
    let spec = auspex_modelling::fit::plan(&train, &opts)
        .unwrap()
        .fit_all();
    let path = dir.join("m.apxm");
    auspex_proto::model_file::save_model(&path, &spec, "e2e").unwrap();
    (path, spec)
}
