//! The monitor through a real daemon, drawn at 80 × 24 as text: it follows a policy changed
//! from elsewhere within a couple of seconds, says so when the daemon falls silent, and starts a
//! new tally for a new daemon (never adding the old one's decisions to it) — its figures are
//! the daemon's own.

use auspex::monitor::screen_words;
use auspex::session::{monitor_on, TextScreen, View};
use auspex::wire::dataset_messages;
use auspex_engine::{Dataset, Model};
use auspex_modelling::simulate::{simulate, SimOptions};
use auspex_proto::v1::{self, control_request};
use auspexd::config::{validate, DaemonConfig, FileConfig};
use prost::Message;
use std::sync::{Arc, Mutex};
use std::time::Duration;

mod common;
use common::{control, runtime, serial, status, wait_for};

struct Fixture {
    _dir: tempfile::TempDir,
    model_path: std::path::PathBuf,
    bin_ticks: i64,
    n_bins: usize,
}

fn fixture() -> Fixture {
    let sc = common::demo_scenario(10, 4);
    let dir = tempfile::tempdir().unwrap();
    let (model_path, spec) = common::fitted_model(&sc, 10, dir.path());
    let model = Model::new(spec).unwrap();
    Fixture {
        bin_ticks: (model.bin_width_s() * sc.tick_rate_hz).round() as i64,
        n_bins: model.n_bins(),
        model_path,
        _dir: dir,
    }
}

fn session(seed: u64, trials: u32) -> Dataset {
    let sc = common::demo_scenario(10, 4);
    let truth = Model::new(sc.true_model().unwrap()).unwrap();
    simulate(
        &truth,
        &SimOptions {
            trials_per_stimulus: trials,
            seed,
            ..sc.sim_options()
        },
    )
}

fn config(f: &Fixture, eps: Option<&auspexd::service::BoundEndpoints>) -> DaemonConfig {
    let ep = |e: Option<String>| Some(e.unwrap_or_else(|| "tcp://127.0.0.1:0".into()));
    let fc = FileConfig {
        model: Some(f.model_path.clone()),
        ingest: ep(eps.map(|e| e.ingest.clone())),
        task_ingest: ep(eps.and_then(|e| e.task_ingest.clone())),
        publish: ep(eps.map(|e| e.publish.clone())),
        control: ep(eps.map(|e| e.control.clone())),
        ..Default::default()
    };
    let mut c = validate(fc, &mut Vec::new()).unwrap();
    c.health_period = Duration::from_millis(200);
    c
}

/// Streams a whole session flat out into `ingest`.
fn stream(ctx: &zmq::Context, ingest: &str, f: &Fixture, data: &Dataset) {
    let s = ctx.socket(zmq::PUSH).unwrap();
    s.set_sndhwm(0).unwrap();
    s.connect(ingest).unwrap();
    for m in dataset_messages(data, "acq", f.bin_ticks, f.bin_ticks * f.n_bins as i64) {
        s.send(m.encode_to_vec(), 0).unwrap();
    }
}

/// Waits up to 30 s for the 80 × 24 screen to satisfy `cond` (and keeps it in `text`); the
/// panic shows the screen. Whenever it looks, every word and figure on the 80-column screen
/// must be whole: found, as it is, on the wide screen of the same state.
fn wait_screen(
    views: &Mutex<Vec<String>>,
    text: &Mutex<String>,
    cond: impl Fn(&str) -> bool,
    what: &str,
) {
    let t0 = std::time::Instant::now();
    loop {
        let v = views.lock().unwrap().clone();
        let s = v.first().cloned().unwrap_or_default();
        if let [narrow, wide] = &v[..] {
            let all = screen_words(wide);
            for w in screen_words(narrow) {
                assert!(all.contains(&w), "`{w}` is cut at 80 × 24:\n{narrow}");
            }
        }
        *text.lock().unwrap() = s.clone();
        if cond(&s) {
            return;
        }
        assert!(
            t0.elapsed() < Duration::from_secs(30),
            "timed out waiting for {what}; the screen:\n{s}"
        );
        std::thread::sleep(Duration::from_millis(20));
    }
}

/// The number after "right of" in the decisions line.
fn decided(screen: &str) -> Option<u64> {
    let rest = &screen[screen.find("right of ")? + "right of ".len()..];
    rest.split(|c: char| !c.is_ascii_digit())
        .next()?
        .parse()
        .ok()
}

#[test]
fn the_monitor_follows_the_daemon_it_watches() {
    let _serial = serial();
    let f = fixture();
    let rt = runtime();
    let ctx = zmq::Context::new();
    let first = rt
        .block_on(auspexd::service::start(config(&f, None)))
        .unwrap();
    let ep = first.endpoints.clone();
    // The operator's 80 × 24 terminal, and a wide one to check that nothing on it is cut.
    let views = Arc::new(Mutex::new(Vec::new()));
    let text = Arc::new(Mutex::new(String::new()));
    let screen = || text.lock().unwrap().clone();
    let (stop_tx, stop_rx) = tokio::sync::watch::channel(false);
    let mon = {
        let (p, c) = (ep.publish.clone(), ep.control.clone());
        let shown = TextScreen {
            sizes: vec![(80, 24), (250, 60)],
            text: views.clone(),
        };
        rt.spawn(
            async move { monitor_on(&p, &c, View::Quiet, Some(Box::new(shown)), stop_rx).await },
        )
    };
    wait_screen(
        &views,
        &text,
        |s| s.contains("decide at θ"),
        "the monitor's first view",
    );
    std::thread::sleep(Duration::from_millis(300));

    // A session: the monitor's tally is the daemon's.
    stream(&ctx, &ep.ingest, &f, &session(5, 3));
    wait_for(
        || status(&ctx, &ep.control).health.unwrap().trials_completed == 12,
        "the first session's trials to complete",
    );
    let decisions = status(&ctx, &ep.control).health.unwrap().decisions;
    assert!(decisions > 0);
    wait_screen(
        &views,
        &text,
        |s| decided(s) == Some(decisions),
        "the monitor's tally to be the daemon's",
    );

    // A policy changed from elsewhere shows within a couple of seconds.
    let r = control(
        &ctx,
        &ep.control,
        control_request::Body::SetPolicy(v1::SetPolicy {
            threshold: 0.97,
            min_time_s: 0.025,
            target_accuracy: 0.0,
        }),
    );
    assert!(r.ok, "{}", r.error);
    let t0 = std::time::Instant::now();
    wait_screen(
        &views,
        &text,
        |s| s.contains("decide at θ 0.97 after 25 ms"),
        "the new policy on screen",
    );
    assert!(
        t0.elapsed() < Duration::from_secs(3),
        "shown within a couple of seconds"
    );

    // The daemon goes away: the monitor says so.
    rt.block_on(first.stop());
    wait_screen(
        &views,
        &text,
        |s| s.contains("NO WORD FROM THE DAEMON"),
        "the monitor to say the daemon is silent",
    );
    let silent = screen();
    eprintln!("the monitor, its daemon gone:\n{silent}");
    assert_eq!(
        decided(&silent),
        Some(decisions),
        "the last tally stays in view: {silent}"
    );

    // A new daemon on the same endpoints: the warning goes, a new tally starts, and the
    // policy shown is the new daemon's (its default, not the one set on the old daemon).
    let second = rt
        .block_on(auspexd::service::start(config(&f, Some(&ep))))
        .unwrap();
    wait_screen(
        &views,
        &text,
        |s| !s.contains("NO WORD FROM THE DAEMON"),
        "the monitor to hear the new daemon",
    );
    wait_screen(
        &views,
        &text,
        |s| s.contains("decide at θ 0.9 after 20 ms"),
        "the new daemon's policy",
    );
    stream(&ctx, &ep.ingest, &f, &session(6, 1));
    wait_for(
        || status(&ctx, &ep.control).health.unwrap().trials_completed == 4,
        "the second daemon's trials to complete",
    );
    let again = status(&ctx, &ep.control).health.unwrap().decisions;
    wait_screen(
        &views,
        &text,
        |s| decided(s) == Some(again),
        "a tally of the new daemon's decisions alone",
    );
    let last = screen();
    eprintln!("the monitor, a new daemon's session done:\n{last}");
    // Every line fits 80 columns, whole.
    assert!(last.lines().all(|l| l.chars().count() <= 80), "{last}");
    stop_tx.send(true).unwrap();
    rt.block_on(mon).unwrap().unwrap();
    rt.block_on(second.stop());
}
