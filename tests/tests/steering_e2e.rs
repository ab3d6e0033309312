//! find-tuning through a real daemon, in closed loop: a daemon with no model and the stimulus set
//! declared in the session's start message chooses every trial's stimulus; simulated tuned units
//! (the project's own scenario, `auspex_modelling::design::units_of`) answer whatever it
//! chooses. From the first trial it chooses (no "no model yet"), its choices honour the rig's
//! constraints, it learns each unit's preferred stimulus (right within one neighbour), the
//! reasons are in every reply and the status, every choice is in the session recording, and
//! bad requests get clear errors while the daemon goes on.

use auspex_modelling::design::{neighbours, units_of};
use auspex_proto::v1::{self, control_reply, control_request, inbound};
use auspexd::config::{validate, FileConfig};
use prost::Message;
use rand::SeedableRng;
use std::time::Duration;

mod common;
use common::{control, runtime, serial, status, wait_for};

const NS: usize = 16;

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
    let mut c = validate(
        FileConfig {
            ingest: Some("tcp://127.0.0.1:0".into()),
            task_ingest: Some("tcp://127.0.0.1:0".into()),
            publish: Some("tcp://127.0.0.1:0".into()),
            control: Some("tcp://127.0.0.1:0".into()),
            record: Some(rec.clone()),
            learn_frozen: Some(true),
            ..Default::default()
        },
        &mut Vec::new(),
    )
    .unwrap();
    c.health_period = Duration::from_millis(200);
    let d = rt.block_on(auspexd::service::start(c)).unwrap();
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

    let names: Vec<String> = (0..NS).map(|s| format!("{}", s * 360 / NS)).collect();
    let truth = units_of(7, 2, NS);
    let push = ctx.socket(zmq::PUSH).unwrap();
    push.set_sndhwm(0).unwrap();
    push.connect(&ep.ingest).unwrap();
    let mut seq = 0;
    let mut send = |body: inbound::Body| {
        seq += 1;
        let m = v1::Inbound {
            sender: "rig".into(),
            seq,
            body: Some(body),
        };
        push.send(m.encode_to_vec(), 0).unwrap();
    };
    send(inbound::Body::SessionStart(v1::SessionStart {
        tick_rate_hz: 1000.0,
        units: vec![11, 12],
        session_name: "closed-loop".into(),
        stimuli: names.clone(),
        ..Default::default()
    }));
    wait_for(
        || status(&ctx, &ep.control).steering.is_some(),
        "the session's stimulus set at the steering thread",
    );

    let mut world = rand_chacha::ChaCha8Rng::seed_from_u64(99);
    let mut chosen = Vec::new();
    let mut t = 1000i64;
    let mut settled_at = None;
    for trial in 1..=400u64 {
        let r = next(&ctx, &ep.control, "find-tuning");
        assert!(r.ok, "trial {trial}: {}", r.error);
        let Some(control_reply::Body::Next(n)) = r.body else {
            panic!("no choice")
        };
        assert_eq!(n.policy, "find-tuning");
        assert_eq!(n.choice, trial);
        assert!(!n.reason.is_empty());
        assert_eq!(names[n.index as usize], n.stimulus);
        if trial <= NS as u64 {
            assert!(n.reason.starts_with("warm-up"), "{}", n.reason);
        }
        if n.serves_unit {
            assert!([11, 12].contains(&n.unit), "serves unit {}", n.unit);
            assert!(n.margin.is_finite());
        }
        let s = n.index as usize;
        chosen.push(s);
        send(inbound::Body::Onset(v1::TrialOnset {
            trial,
            onset_tick: t,
            stimulus: n.stimulus.clone(),
        }));
        // Each unit's count for this stimulus, its spikes spread over the 250 ms window.
        let mut spikes: Vec<(i64, u32)> = Vec::new();
        for (u, unit) in truth.iter().enumerate() {
            let k = unit.draw(s, NS, &mut world) as i64;
            for j in 0..k {
                spikes.push((t + 1 + j * 249 / k.max(1), 11 + u as u32));
            }
        }
        spikes.sort_unstable();
        send(inbound::Body::Spikes(v1::SpikeBatch {
            units: spikes.iter().map(|x| x.1).collect(),
            ticks: spikes.iter().map(|x| x.0).collect(),
            complete_through: t + 300,
        }));
        t += 400;
        // The window is complete at the daemon before the next choice (as a task program that
        // waits for the trial's end would have it).
        wait_for(
            || {
                status(&ctx, &ep.control)
                    .steering
                    .is_some_and(|s| s.trials == trial)
            },
            "the trial recorded by the steering thread",
        );
        if trial % 16 == 0 {
            let st = status(&ctx, &ep.control).steering.unwrap();
            let right = st.units.iter().zip(&truth).all(|(u, tu)| {
                let p = names.iter().position(|x| *x == u.preferred);
                u.settled >= 0.95 && p.is_some_and(|p| neighbours(tu.preferred, NS).contains(&p))
            });
            if st.units.iter().all(|u| u.settled >= 0.95) {
                assert!(right, "settled on a wrong preference: {st:?}");
                settled_at = Some(trial);
                break;
            }
        }
    }
    let settled_at = settled_at.expect("both units' preferences settled within 400 trials");
    eprintln!("settled after {settled_at} trials: {:?}", &chosen);
    // The constraints: a whole warm-up block, never more than 3 in a row.
    let mut first: Vec<usize> = chosen[..NS].to_vec();
    first.sort_unstable();
    assert_eq!(first, (0..NS).collect::<Vec<_>>());
    assert!(chosen.windows(4).all(|w| w.iter().any(|&x| x != w[0])));
    let st = status(&ctx, &ep.control).steering.unwrap();
    assert_eq!(st.stimuli_from, "session start");
    assert_eq!(st.choices, settled_at);
    assert!(st.last.is_some());

    // The daemon keeps answering everything else after a refused request.
    let r = next(&ctx, &ep.control, "");
    assert!(r.ok, "{}", r.error);
    assert!(status(&ctx, &ep.control).health.is_some());

    rt.block_on(d.stop());
    // Every choice is in the recording, with its reason, in order.
    let file = std::fs::read_dir(&rec)
        .unwrap()
        .filter_map(|e| e.ok())
        .map(|e| e.path())
        .find(|p| p.to_string_lossy().contains("closed-loop"))
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
}
