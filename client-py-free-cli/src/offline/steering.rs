//! `auspex closed-loop-sim`: simulated experiments in which the stimulus-choice policies pick
//! every trial's stimulus and simulated units answer, counting the trials until every unit's
//! preferred stimulus is known (`--goal tuning`) or until decoding one trial reaches a held-out
//! accuracy (`--goal decoding`) (`auspex_modelling::design`). Policies side by side, seeds in
//! parallel on every core, a progress bar.

use auspex_modelling::design::{trials_to_accuracy, tuning_run, units_within, Constraints, Policy};

/// What an experiment runs until.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Goal {
    /// Every unit's preferred stimulus known (find-tuning against balanced blocks).
    Tuning,
    /// Decoding one trial reaches this held-out accuracy (improve-decoding against balanced
    /// blocks).
    Decoding(f64),
}

impl Goal {
    /// The two policies compared: balanced blocks, then the goal's own.
    pub fn policies(self) -> [Policy; 2] {
        match self {
            Goal::Tuning => [Policy::BalancedBlocks, Policy::FindTuning],
            Goal::Decoding(_) => [Policy::BalancedBlocks, Policy::ImproveDecoding],
        }
    }
}

/// Figures of one (units, stimuli) cell for one policy over the seeds.
#[derive(Clone, Debug, serde::Serialize)]
pub struct PolicyFigures {
    /// Policy name.
    pub policy: &'static str,
    /// Trials to the criterion per seed (None: not reached within the cap).
    pub trials: Vec<Option<usize>>,
    /// With `--goal tuning`: per seed, the first look at which every unit read settled with
    /// some preference wrong (None: never) — a stop on "settled" there would have been wrong.
    pub settled_wrong_at: Vec<Option<usize>>,
}

impl PolicyFigures {
    /// The q-quantile of the trials (a seed that never reached the criterion counts as the cap).
    pub fn quantile(&self, q: f64, cap: usize) -> f64 {
        let mut v: Vec<f64> = self
            .trials
            .iter()
            .map(|t| t.unwrap_or(cap) as f64)
            .collect();
        v.sort_by(|a, b| a.total_cmp(b));
        if v.is_empty() {
            return f64::NAN;
        }
        let i = ((v.len() - 1) as f64 * q).round() as usize;
        v[i]
    }
}

/// Runs every policy on `seeds` seeds of (nu, ns): trials to the criterion.
#[allow(clippy::too_many_arguments)]
pub fn compare(
    nu: usize,
    ns: usize,
    spread: f64,
    seeds: u64,
    cap: usize,
    constraints: Constraints,
    goal: Goal,
    tick: &(dyn Fn() + Sync),
) -> Vec<PolicyFigures> {
    goal.policies()
        .iter()
        .map(|&p| {
            let next = std::sync::atomic::AtomicU64::new(0);
            let threads = std::thread::available_parallelism().map_or(1, |n| n.get());
            let mut all: Vec<(u64, Option<usize>, Option<usize>)> = std::thread::scope(|sc| {
                let hs: Vec<_> = (0..threads)
                    .map(|_| {
                        sc.spawn(|| {
                            let mut mine = Vec::new();
                            loop {
                                let s = next.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
                                if s >= seeds {
                                    break;
                                }
                                let units = units_within(s, nu, ns, spread);
                                let (t, wrong) = match goal {
                                    Goal::Tuning => tuning_run(&units, ns, p, constraints, s, cap),
                                    Goal::Decoding(a) => (
                                        trials_to_accuracy(&units, ns, p, constraints, s, cap, a),
                                        None,
                                    ),
                                };
                                mine.push((s, t, wrong));
                                tick();
                            }
                            mine
                        })
                    })
                    .collect();
                hs.into_iter()
                    .flat_map(|h| h.join().unwrap_or_default())
                    .collect()
            });
            all.sort_by_key(|x| x.0);
            PolicyFigures {
                policy: p.name(),
                trials: all.iter().map(|x| x.1).collect(),
                settled_wrong_at: all.iter().map(|x| x.2).collect(),
            }
        })
        .collect()
}

/// The command: every (units, stimuli) cell, a table, JSON on request.
#[allow(clippy::too_many_arguments)]
pub fn closed_loop_cmd(
    units: &[usize],
    stimuli: &[usize],
    spread: f64,
    seeds: u64,
    cap: usize,
    constraints: Constraints,
    goal: Goal,
    json: bool,
) -> anyhow::Result<()> {
    for &ns in stimuli {
        constraints.check(ns).map_err(anyhow::Error::msg)?;
    }
    if seeds == 0 || units.contains(&0) {
        anyhow::bail!("give at least one seed and one unit");
    }
    if cap == 0 {
        anyhow::bail!("--max-trials must be at least 1");
    }
    let total = (units.len() * stimuli.len()) as u64 * seeds * 2;
    let bar = crate::progress::bar(
        std::io::IsTerminal::is_terminal(&std::io::stderr()),
        total,
        "simulating",
        "{pos}/{len} experiments",
    );
    let mut rows = Vec::new();
    for &nu in units {
        for &ns in stimuli {
            let figs = compare(nu, ns, spread, seeds, cap, constraints, goal, &|| {
                bar.inc(1)
            });
            rows.push((nu, ns, figs));
        }
    }
    bar.finish_and_clear();
    let until = match goal {
        Goal::Tuning => format!(
            "every unit's preferred stimulus is known (within one neighbour, ≥ {:.0}% posterior probability, and right)",
            100.0 * auspex_modelling::design::SETTLED
        ),
        Goal::Decoding(a) => format!(
            "decoding one trial from the units' counts reaches {:.0}% accuracy on 40 held-out trials of each stimulus",
            100.0 * a
        ),
    };
    println!(
        "trials until {until}; {seeds} seeds; {}; cap {cap} trials; warm-up {} block(s), minimum share {}, at most {} in a row",
        auspex_modelling::design::spread_words(spread),
        constraints.warmup_blocks,
        constraints.min_share,
        constraints.max_run
    );
    let other = goal.policies()[1].name();
    let tuning = goal == Goal::Tuning;
    if tuning {
        println!("settled wrong first: seeds in which, at an earlier look, every unit read settled with some preference wrong (a stop on \"settled\" there would have been wrong; looks after every trial for 4 blocks, then every 4 trials)");
    }
    let (wrong_head, wrong_rule) = if tuning {
        (" settled wrong first (b / other) |", "---|")
    } else {
        ("", "")
    };
    println!("| units × stimuli | balanced-blocks median [90th pct] | {other} median [90th pct] | ratio of medians | not reached (b / other) |{wrong_head}");
    println!("|---|---|---|---|---|{wrong_rule}");
    for (nu, ns, figs) in &rows {
        let (b, f) = (&figs[0], &figs[1]);
        let miss = |p: &PolicyFigures| p.trials.iter().filter(|t| t.is_none()).count();
        let wrong = |p: &PolicyFigures| p.settled_wrong_at.iter().filter(|t| t.is_some()).count();
        let wrong_cell = if tuning {
            format!(" {} / {} |", wrong(b), wrong(f))
        } else {
            String::new()
        };
        println!(
            "| {nu} × {ns} | {:.0} [{:.0}] | {:.0} [{:.0}] | {:.2} | {} / {} |{wrong_cell}",
            b.quantile(0.5, cap),
            b.quantile(0.9, cap),
            f.quantile(0.5, cap),
            f.quantile(0.9, cap),
            f.quantile(0.5, cap) / b.quantile(0.5, cap),
            miss(b),
            miss(f)
        );
    }
    if json {
        let j: Vec<_> = rows
            .iter()
            .map(|(nu, ns, figs)| serde_json::json!({"units": nu, "stimuli": ns, "policies": figs}))
            .collect();
        println!("{}", serde_json::to_string(&j)?);
    }
    Ok(())
}
