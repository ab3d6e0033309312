//! `auspex closed-loop-sim --through-daemon`: simulated tuned units (the project's own scenario,
//! `auspex_modelling::design::SimulatedUnits`) answer whatever stimulus a running daemon's
//! `next` chooses, trial after trial, until the daemon's own status says every unit's
//! preferred stimulus is settled — the policy judged through the very path a rig uses (the
//! daemon's e2e test runs the same function).
//!
//! Must not: decide anything itself; the daemon chooses and judges, the units only answer.

use crate::live::{connect_push, control, status};
use auspex_modelling::design::{SimulatedUnits, SETTLED};
use auspex_proto::v1::{self, control_reply, control_request, inbound::Body};
use bytes::Bytes;
use prost::Message;
use std::time::{Duration, Instant};
use zeromq::{SocketSend, ZmqMessage};

/// What to play.
#[derive(Clone, Debug)]
pub struct ThroughDaemon {
    /// The daemon's ingest endpoint.
    pub ingest: String,
    /// Its control endpoint.
    pub control: String,
    /// The `next` policy asked.
    pub policy: String,
    /// Simulated units (ids 1, 2, …).
    pub units: usize,
    /// Stimuli evenly spaced on a circle.
    pub stimuli: usize,
    /// Seed of the units (their preferences and their counts).
    pub seed: u64,
    /// Share of the circle the units' preferences lie in (1: anywhere;
    /// `auspex_modelling::design::units_within`).
    pub spread: f64,
    /// Give up after this many trials.
    pub max_trials: u64,
}

/// How it went.
#[derive(Clone, Debug)]
pub struct Outcome {
    /// Every reply, in order.
    pub choices: Vec<v1::NextStimulusReply>,
    /// The trial after which the daemon's status showed every unit settled (None: not within
    /// the cap).
    pub settled_at: Option<u64>,
    /// Whether the settled preferences were right (within one neighbour of the truth).
    pub right: bool,
    /// The units' true preferred stimuli.
    pub truth: Vec<String>,
    /// What the daemon concluded, per unit.
    pub concluded: Vec<String>,
    /// Wall time.
    pub elapsed: Duration,
}

/// The stimulus names of `ns` directions: degrees, one decimal where needed.
pub fn direction_names(ns: usize) -> Vec<String> {
    (0..ns)
        .map(|s| {
            let d = s as f64 * 360.0 / ns as f64;
            if d.fract() == 0.0 {
                format!("{d:.0}")
            } else {
                format!("{d:.1}")
            }
        })
        .collect()
}

/// Plays the session; `on_trial` sees every reply as it comes.
pub async fn run(
    o: &ThroughDaemon,
    on_trial: &mut dyn FnMut(&v1::NextStimulusReply),
) -> anyhow::Result<Outcome> {
    if o.units == 0 || o.stimuli < 2 || o.max_trials == 0 {
        anyhow::bail!("give at least one unit, two stimuli and one trial");
    }
    let t0 = Instant::now();
    let names = direction_names(o.stimuli);
    let mut world = SimulatedUnits::new(o.seed, o.units, o.stimuli, o.spread);
    let mut push = connect_push(&o.ingest).await?;
    let sender = "closed-loop-sim";
    let mut seq = 0u64;
    let mut msgs: Vec<Vec<u8>> = Vec::new();
    let mut queue = |msgs: &mut Vec<Vec<u8>>, body: Body| {
        seq += 1;
        msgs.push(
            v1::Inbound {
                sender: sender.into(),
                seq,
                body: Some(body),
            }
            .encode_to_vec(),
        );
        seq
    };
    queue(
        &mut msgs,
        Body::SessionStart(v1::SessionStart {
            tick_rate_hz: 1000.0,
            units: (1..=o.units as u32).collect(),
            session_name: format!("closed-loop-{}-seed{}", o.policy, o.seed),
            stimuli: names.clone(),
            ..Default::default()
        }),
    );
    for m in msgs.drain(..) {
        push.send(ZmqMessage::from(Bytes::from(m))).await?;
    }
    let ready = Instant::now();
    loop {
        let st = status(&o.control).await?;
        if st.steering.as_ref().is_some_and(|s| s.stimuli == names) {
            break;
        }
        if ready.elapsed() > Duration::from_secs(5) {
            anyhow::bail!(
                "the daemon at {} did not take the session's start within 5 s (is it the daemon listening on {}?)",
                o.control,
                o.ingest
            );
        }
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    let mut out = Outcome {
        choices: Vec::new(),
        settled_at: None,
        right: false,
        truth: world
            .units
            .iter()
            .map(|u| names[u.preferred].clone())
            .collect(),
        concluded: Vec::new(),
        elapsed: Duration::ZERO,
    };
    let mut t = 1000i64;
    let mut last_seq = 1;
    for trial in 1..=o.max_trials {
        let r = control(
            &o.control,
            control_request::Body::NextStimulus(v1::NextStimulus {
                policy: o.policy.clone(),
            }),
            Duration::from_secs(5),
        )
        .await?;
        let Some(control_reply::Body::Next(n)) = r.body else {
            anyhow::bail!("the daemon's reply to `next` held no stimulus");
        };
        on_trial(&n);
        let s = n.index as usize;
        if s >= o.stimuli {
            anyhow::bail!("the daemon chose stimulus {s} of {}", o.stimuli);
        }
        out.choices.push(n.clone());
        queue(
            &mut msgs,
            Body::Onset(v1::TrialOnset {
                trial,
                onset_tick: t,
                stimulus: names[s].clone(),
            }),
        );
        // Each unit's count, its spikes spread over a 250 ms window.
        let mut spikes: Vec<(i64, u32)> = Vec::new();
        for (u, k) in world.respond(s).into_iter().enumerate() {
            let k = k as i64;
            for j in 0..k {
                spikes.push((t + 1 + j * 249 / k.max(1), 1 + u as u32));
            }
        }
        spikes.sort_unstable();
        last_seq = queue(
            &mut msgs,
            Body::Spikes(v1::SpikeBatch {
                units: spikes.iter().map(|x| x.1).collect(),
                ticks: spikes.iter().map(|x| x.0).collect(),
                complete_through: t + 300,
            }),
        );
        for m in msgs.drain(..) {
            push.send(ZmqMessage::from(Bytes::from(m))).await?;
        }
        t += 400;
        // The trial's window must be complete at the daemon before the next choice (a task
        // program that waits for the trial's end has it so).
        let asked = Instant::now();
        let st = loop {
            let st = status(&o.control).await?;
            if st.steering.as_ref().is_some_and(|s| s.trials >= trial) {
                break st;
            }
            if asked.elapsed() > Duration::from_secs(5) {
                anyhow::bail!("the daemon did not count trial {trial} within 5 s");
            }
            tokio::time::sleep(Duration::from_millis(2)).await;
        };
        let steering = st.steering.unwrap_or_default();
        if trial >= o.stimuli as u64
            && steering.units.len() == o.units
            && steering.units.iter().all(|u| u.settled >= SETTLED)
        {
            out.concluded = steering.units.iter().map(|u| u.preferred.clone()).collect();
            let idx: Vec<usize> = out
                .concluded
                .iter()
                .map(|p| names.iter().position(|x| x == p).unwrap_or(usize::MAX))
                .collect();
            out.right = world.right(&idx);
            out.settled_at = Some(trial);
            break;
        }
    }
    crate::live::end_stream(&mut push, sender, last_seq + 1).await?;
    out.elapsed = t0.elapsed();
    Ok(out)
}

/// `auspex closed-loop-sim --through-daemon`: every (units, stimuli) size, seed and policy in
/// turn against the running daemon; a line per experiment, medians per policy at the end.
#[allow(clippy::too_many_arguments)]
pub async fn through_daemon_cmd(
    units: &[usize],
    stimuli: &[usize],
    spread: f64,
    seeds: u64,
    max_trials: u64,
    policies: &[String],
    ingest: &str,
    control: &str,
) -> anyhow::Result<()> {
    if seeds == 0 || policies.is_empty() {
        anyhow::bail!("give at least one seed and one policy");
    }
    let st = status(control).await?;
    if let Some(s) = st.steering.as_ref().filter(|_| st.tick_rate_hz > 0.0) {
        if !s.stimuli.is_empty() {
            eprintln!("note: the daemon is in a session ({:?}); each experiment here starts a session of its own", st.session_name);
        }
    }
    println!("trials until the daemon's status shows every unit's preferred stimulus settled (≥ {:.0}% within one neighbour), and whether it is right; {}; the daemon's own constraints apply", 100.0 * SETTLED, auspex_modelling::design::spread_words(spread));
    let mut rows: Vec<(usize, usize, String, Vec<Option<u64>>)> = Vec::new();
    for &nu in units {
        for &ns in stimuli {
            for p in policies {
                let mut got = Vec::new();
                for seed in 0..seeds {
                    let o = ThroughDaemon {
                        ingest: ingest.into(),
                        control: control.into(),
                        policy: p.clone(),
                        units: nu,
                        stimuli: ns,
                        seed,
                        spread,
                        max_trials,
                    };
                    let r = run(&o, &mut |_| {}).await?;
                    println!(
                        "{nu} × {ns} {p} seed {seed}: {} in {:.1} s{}",
                        match r.settled_at {
                            Some(t) => format!(
                                "settled after {t} trials ({:.0} s of recording at 400 ms a trial)",
                                t as f64 * 0.4
                            ),
                            None => format!("not settled within {max_trials} trials"),
                        },
                        r.elapsed.as_secs_f64(),
                        if r.settled_at.is_some() {
                            format!(
                                " · {} (true {}, concluded {})",
                                if r.right { "right" } else { "WRONG" },
                                r.truth.join("/"),
                                r.concluded.join("/")
                            )
                        } else {
                            String::new()
                        }
                    );
                    got.push(r.settled_at);
                }
                rows.push((nu, ns, p.clone(), got));
            }
        }
    }
    println!("| units × stimuli | policy | median trials | settled |");
    println!("|---|---|---|---|");
    for (nu, ns, p, got) in rows {
        let mut v: Vec<u64> = got.iter().map(|t| t.unwrap_or(max_trials)).collect();
        v.sort_unstable();
        println!(
            "| {nu} × {ns} | {p} | {} | {}/{} |",
            v[(v.len() - 1) / 2],
            got.iter().filter(|t| t.is_some()).count(),
            got.len()
        );
    }
    Ok(())
}
