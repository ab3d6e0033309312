//! find-tuning through a real daemon, in closed loop: a daemon with no model and the stimulus set
//! declared in the session's start message chooses every trial's stimulus; simulated tuned units
//! (the project's own scenario, `auspex_modelling::design::units_of`) answer whatever it
//! chooses. From the first trial it chooses (no "no model yet"), its choices honour the rig's
//! constraints, it learns each unit's preferred stimulus (right within one neighbour), the
//! reasons are in every reply and the status, every choice is in the session recording, and
//! bad requests get clear errors while the daemon goes on.

use auspex_proto::v1::{self, control_request};
use auspexd::config::{validate, FileConfig};
use std::time::Duration;

mod common;
use common::{control, runtime, serial, status, wait_for};

const NS: usize = 16;

/// A daemon with no model, not learning (the counts alone drive the choices), recording to
/// `record` if given.
fn config(record: Option<std::path::PathBuf>) -> auspexd::config::DaemonConfig {
    let mut c = validate(
        FileConfig {
            ingest: Some("tcp://127.0.0.1:0".into()),
            task_ingest: Some("tcp://127.0.0.1:0".into()),
            publish: Some("tcp://127.0.0.1:0".into()),
            control: Some("tcp://127.0.0.1:0".into()),
            record,
            learn_frozen: Some(true),
            ..Default::default()
        },
        &mut Vec::new(),
    )
    .unwrap();
    c.health_period = Duration::from_millis(200);
    c
}

/// Replays a recording into a fresh daemon, asking again at every recorded request's point:
/// (requests asked, answered as recorded).
fn replay_choices(rt: &tokio::runtime::Runtime, file: &std::path::Path) -> (usize, usize) {
    let d2 = rt.block_on(auspexd::service::start(config(None))).unwrap();
    let ep2 = d2.endpoints.clone();
    let rec = auspex::wire::read_recording(file).unwrap();
    let asks = auspex::live::Choices::of(&rec);
    let (msgs, rate) = rt
        .block_on(auspex::live::replay_messages(
            &auspex::live::ReplaySource::Session(file.to_path_buf()),
            &ep2.control,
            "replay",
            false,
        ))
        .unwrap();
    let (_, check) = rt
        .block_on(auspex::live::replay_asking(
            &ep2.ingest,
            &ep2.control,
            &msgs,
            "replay",
            rate,
            auspex::live::Pace::Max,
            false,
            &asks,
        ))
        .unwrap();
    rt.block_on(d2.stop());
    assert!(check.same == check.asked, "differences: {:?}", check.differ);
    (check.asked, check.same)
}

fn next(ctx: &zmq::Context, ep: &str, policy: &str) -> v1::ControlReply {
    control(
        ctx,
        ep,
        control_request::Body::NextStimulus(v1::NextStimulus {
            policy: policy.into(),
        }),
    )
}

#[test]
fn find_tuning_learns_each_units_preference_in_closed_loop_from_the_first_trial() {
    let _serial = serial();
    let rt = runtime();
    let ctx = zmq::Context::new();
    let dir = tempfile::tempdir().unwrap();
    let rec = dir.path().join("sessions");
    let d = rt
        .block_on(auspexd::service::start(config(Some(rec.clone()))))
        .unwrap();
    let ep = d.endpoints.clone();

    // Before any session: a clear refusal, and the daemon answers status after it.
    let r = next(&ctx, &ep.control, "find-tuning");
    assert!(!r.ok && r.error.contains("no session"), "{}", r.error);
    let r = next(&ctx, &ep.control, "find-the-best");
    assert!(
        !r.ok && r.error.contains("unknown next-stimulus policy"),
        "{}",
        r.error
    );

    // The closed loop `auspex closed-loop-sim --through-daemon` plays: 2 tuned units, 16
    // directions, declared in the session's start message.
    let names = auspex::live::closed_loop::direction_names(NS);
    let play = auspex::live::closed_loop::ThroughDaemon {
        ingest: ep.ingest.clone(),
        control: ep.control.clone(),
        policy: "find-tuning".into(),
        units: 2,
        stimuli: NS,
        seed: 7,
        spread: 1.0,
        max_trials: 600,
    };
    let mut seen = 0u64;
    let out = rt
        .block_on(auspex::live::closed_loop::run(&play, &mut |n| {
            seen += 1;
            assert_eq!(n.policy, "find-tuning");
            assert_eq!(n.choice, seen);
            assert!(!n.reason.is_empty());
            assert_eq!(names[n.index as usize], n.stimulus);
            if seen <= NS as u64 {
                assert!(n.reason.starts_with("warm-up"), "{}", n.reason);
            }
            if n.serves_unit {
                assert!([1, 2].contains(&n.unit), "serves unit {}", n.unit);
                assert!(n.margin.is_finite());
            }
        }))
        .unwrap();
    let settled_at = out
        .settled_at
        .expect("both units' preferences settled within 600 trials");
    assert!(out.right, "settled on a wrong preference: {out:?}");
    let chosen: Vec<usize> = out.choices.iter().map(|n| n.index as usize).collect();
    eprintln!("settled after {settled_at} trials: {chosen:?}");
    // The constraints: a whole warm-up block, never more than 3 in a row.
    let mut first: Vec<usize> = chosen[..NS].to_vec();
    first.sort_unstable();
    assert_eq!(first, (0..NS).collect::<Vec<_>>());
    assert!(chosen.windows(4).all(|w| w.iter().any(|&x| x != w[0])));
    // The session ended with the experiment: its recording holds every choice (below).

    // Between sessions: find-tuning says why it cannot choose; the daemon answers the rest.
    wait_for(
        || status(&ctx, &ep.control).steering.is_none(),
        "the session's end at the steering thread",
    );
    let r = next(&ctx, &ep.control, "find-tuning");
    assert!(!r.ok && r.error.contains("no session"), "{}", r.error);
    assert!(status(&ctx, &ep.control).health.is_some());

    rt.block_on(d.stop());
    // Every choice is in the recording, with its reason, in order.
    let file = std::fs::read_dir(&rec)
        .unwrap()
        .filter_map(|e| e.ok())
        .map(|e| e.path())
        .find(|p| {
            p.to_string_lossy()
                .contains("closed-loop-find-tuning-seed7")
        })
        .expect("the session's recording");
    let records = auspex_proto::session::read_session(&std::fs::read(&file).unwrap())
        .unwrap()
        .records;
    let choices: Vec<v1::NextStimulusReply> = records
        .into_iter()
        .filter_map(|r| r.choice.and_then(|c| c.reply))
        .collect();
    assert_eq!(choices.len() as u64, settled_at);
    for (c, &s) in choices.iter().zip(&chosen) {
        assert_eq!(c.index as usize, s);
        assert!(!c.reason.is_empty());
    }

    // A replay of the recording into a fresh daemon, asking find-tuning again at every recorded
    // request's point, as fast as it goes: every choice is the recorded one.
    let (asked, _) = replay_choices(&rt, &file);
    assert_eq!(asked as u64, settled_at);
}

/// improve-decoding through the daemon: from the first trial, every choice after the warm-up
/// names the expected decoding accuracy now, the chosen stimulus's expected gain and the
/// runner-up's (no larger); the constraints hold; a replay asks again and gets every choice.
#[test]
fn improve_decoding_explains_its_choices_and_replays() {
    let _serial = serial();
    let rt = runtime();
    let dir = tempfile::tempdir().unwrap();
    let rec = dir.path().join("sessions");
    let d = rt
        .block_on(auspexd::service::start(config(Some(rec.clone()))))
        .unwrap();
    let ep = d.endpoints.clone();
    let ns = 8;
    let play = auspex::live::closed_loop::ThroughDaemon {
        ingest: ep.ingest.clone(),
        control: ep.control.clone(),
        policy: "improve-decoding".into(),
        units: 4,
        stimuli: ns,
        seed: 3,
        spread: 1.0,
        max_trials: 80,
    };
    let mut seen = 0u64;
    let mut accuracies = Vec::new();
    rt.block_on(auspex::live::closed_loop::run(&play, &mut |n| {
        seen += 1;
        assert_eq!(n.policy, "improve-decoding");
        assert_eq!(n.choice, seen);
        if seen <= ns as u64 {
            assert!(n.reason.starts_with("warm-up"), "{}", n.reason);
        } else if n.reason.starts_with("largest expected gain") {
            assert!((0.0..=1.0).contains(&n.expected_accuracy), "{n:?}");
            assert!(n.expected_gain >= n.runner_up_gain, "{n:?}");
            assert!(
                !n.runner_up.is_empty() && n.runner_up != n.stimulus,
                "{n:?}"
            );
            accuracies.push(n.expected_accuracy);
        }
    }))
    .unwrap();
    // (The experiment stops early if the status shows every unit's preference settled.)
    assert!(seen > 2 * ns as u64, "{seen} choices");
    assert!(accuracies.len() >= 4, "{} policy choices", accuracies.len());
    // What it expects of decoding grows as it learns.
    assert!(accuracies.last() > accuracies.first(), "{accuracies:?}");
    rt.block_on(d.stop());
    let file = std::fs::read_dir(&rec)
        .unwrap()
        .filter_map(|e| e.ok())
        .map(|e| e.path())
        .next()
        .expect("the session's recording");
    let (asked, same) = replay_choices(&rt, &file);
    assert_eq!((asked as u64, same as u64), (seen, seen));
}
