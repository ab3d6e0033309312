//! Choosing the next stimulus to learn what each unit encodes in the fewest trials.
//!
//! **find-tuning** learns each unit's preferred stimulus: every unit × stimulus mean count has a
//! conjugate Gamma posterior (Poisson likelihood tempered by the unit's pooled Fano factor, so
//! over-dispersed counts are not taken for more evidence than they are), and the next stimulus
//! is chosen by top-two Thompson sampling (Russo 2016, "Simple Bayesian algorithms for best arm
//! identification", COLT; Operations Research 2020) for the unit whose preferred stimulus is
//! least settled — so a population is served unit by unit, the least known first. The rig's
//! constraints hold for every choice: whole blocks first (warm-up), every stimulus at least a
//! share of its equal share of trials, never more than `max_run` of one stimulus in a row.
//! **balanced-blocks** (every stimulus once per block, seeded order) is the reference.
//!
//! A unit's tuning is **settled** when, over draws from its posterior, the stimulus of largest
//! mean is within one neighbour (stimuli in circular order) of one stimulus — the unit's
//! preferred one as known within one neighbour — in at least [`SETTLED`] of them.

use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use statrs::distribution::{Gamma, Poisson};

/// Share of posterior draws that must agree (within one neighbour) for a unit to be settled.
pub const SETTLED: f64 = 0.95;
/// Posterior draws per settledness check.
const DRAWS: usize = 400;
/// Redraws for top-two sampling's challenger before the first draw's best is kept.
const CHALLENGER_DRAWS: usize = 12;

/// The policies.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Policy {
    /// Every stimulus once per block, in a seeded random order.
    BalancedBlocks,
    /// Top-two Thompson sampling for the least settled unit's preferred stimulus.
    FindTuning,
    /// The stimulus whose next trial most raises the expected accuracy of decoding one trial
    /// from the units' counts ([`Design::decoding_gains`]), as judged on every trial but the
    /// last ([`Design::decoding_gains_before_last`]).
    ImproveDecoding,
}

impl Policy {
    /// The policy's name as the command line writes it.
    pub fn name(self) -> &'static str {
        match self {
            Policy::BalancedBlocks => "balanced-blocks",
            Policy::FindTuning => "find-tuning",
            Policy::ImproveDecoding => "improve-decoding",
        }
    }
}

/// The rig's constraints, honoured by every policy.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Constraints {
    /// Whole balanced blocks before any policy choice.
    pub warmup_blocks: usize,
    /// Every stimulus gets at least this share of its equal share of the trials so far (0..=1).
    pub min_share: f64,
    /// No stimulus more than this many times in a row (≥ 1).
    pub max_run: usize,
}

impl Default for Constraints {
    fn default() -> Self {
        Constraints {
            warmup_blocks: 1,
            min_share: 0.25,
            max_run: 3,
        }
    }
}

impl Constraints {
    /// Checks the constraints can be honoured with `ns` stimuli.
    pub fn check(&self, ns: usize) -> Result<(), String> {
        if !(0.0..=1.0).contains(&self.min_share) {
            return Err(format!("minimum share {} must be 0..=1", self.min_share));
        }
        if self.max_run == 0 {
            return Err("a stimulus must be allowed at least once in a row".into());
        }
        if ns < 2 {
            return Err("choosing needs at least two stimuli".into());
        }
        Ok(())
    }
}

/// Why a stimulus was chosen.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Why {
    /// The policy is balanced blocks.
    Block,
    /// A warm-up block (every stimulus once before any policy choice).
    WarmUp,
    /// The stimulus was below its minimum share of the trials.
    Owed,
    /// Top-two Thompson sampling for the least clear unit: its posterior draw's best (`first`)
    /// or the challenger from outside that best's neighbourhood.
    TopTwo {
        /// The first draw's best (else the challenger).
        first: bool,
    },
    /// improve-decoding: the largest expected gain in decoding accuracy from one more trial.
    Accuracy {
        /// Its expected gain (accuracy, 0..1).
        gain: f64,
        /// The expected accuracy now.
        now: f64,
        /// The runner-up stimulus and its expected gain.
        runner_up: (u32, f64),
    },
    /// The policy's choice would have been shown more than the run limit in a row.
    RunLimit {
        /// What the policy chose.
        instead_of: u32,
    },
}

/// A choice with its reason.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Choice {
    /// The stimulus (index).
    pub stimulus: u32,
    /// Why.
    pub why: Why,
    /// The unit (index) the choice serves, for a policy choice.
    pub unit: Option<usize>,
    /// That unit's [`Design::margin`] before this trial (NaN: no unit served).
    pub margin: f64,
}

/// A unit's posterior per stimulus — (mean count, variance of the mean, Gamma rate) — and its
/// Fano factor.
type Predictive = (Vec<(f64, f64, f64)>, f64);

/// The running state of a design: counts per unit × stimulus, choices so far.
#[derive(Clone, Debug)]
pub struct Design {
    policy: Policy,
    constraints: Constraints,
    ns: usize,
    /// Per unit, per stimulus: (trials, Σ count, Σ count²).
    stats: Vec<Vec<(f64, f64, f64)>>,
    shown: Vec<u64>,
    history: Vec<u32>,
    block: Vec<u32>,
    rng: ChaCha8Rng,
    /// The last trial recorded (stimulus, counts): improve-decoding chooses on the counts
    /// without it ([`Design::decoding_gains_before_last`]).
    last: Option<(u32, Vec<u32>)>,
}

impl Design {
    /// A design for `nu` units and `ns` stimuli.
    pub fn new(policy: Policy, constraints: Constraints, nu: usize, ns: usize, seed: u64) -> Self {
        Design {
            policy,
            constraints,
            ns,
            stats: vec![vec![(0.0, 0.0, 0.0); ns]; nu],
            shown: vec![0; ns],
            history: Vec::new(),
            block: Vec::new(),
            rng: ChaCha8Rng::seed_from_u64(seed ^ 0xde51),
            last: None,
        }
    }

    /// Units in the design.
    pub fn n_units(&self) -> usize {
        self.stats.len()
    }

    /// Stimuli in the design.
    pub fn n_stimuli(&self) -> usize {
        self.ns
    }

    /// The policy.
    pub fn policy(&self) -> Policy {
        self.policy
    }

    /// Adds `n` units with nothing recorded yet (units isolated part-way through a session).
    pub fn add_units(&mut self, n: usize) {
        self.stats
            .extend(std::iter::repeat_n(vec![(0.0, 0.0, 0.0); self.ns], n));
    }

    /// Trials recorded.
    pub fn recorded(&self) -> u64 {
        self.stats
            .first()
            .map_or(0, |u| u.iter().map(|e| e.0).sum::<f64>() as u64)
    }

    /// How clearly unit `u`'s best stimulus stands above its nearest rival outside a
    /// neighbourhood that holds it: the difference of their posterior mean counts in posterior
    /// standard deviations (Gamma posteriors, [`Design::posterior`]), for the best of the three
    /// neighbourhoods holding the best stimulus (its own and its two neighbours') — as settled
    /// is judged on the best neighbourhood, a best stimulus at the edge of a broad peak is not
    /// held unclear by the peak's other side. Small: the unit's preference is not known yet.
    /// Cheap (three passes over the stimuli), so every choice can use it.
    pub fn margin(&self, u: usize) -> f64 {
        let post = self.posterior(u);
        let mean = |s: usize| post[s].0 / post[s].1;
        let var = |s: usize| post[s].0 / (post[s].1 * post[s].1);
        let best = (0..self.ns)
            .max_by(|&a, &b| mean(a).total_cmp(&mean(b)))
            .unwrap_or(0);
        neighbours(best, self.ns)
            .into_iter()
            .map(|centre| {
                let near = neighbours(centre, self.ns);
                (0..self.ns)
                    .filter(|s| !near.contains(s))
                    .max_by(|&a, &b| mean(a).total_cmp(&mean(b)))
                    .map_or(f64::INFINITY, |rival| {
                        (mean(best) - mean(rival)) / (var(best) + var(rival)).sqrt()
                    })
            })
            .fold(f64::NEG_INFINITY, f64::max)
    }

    /// Records a trial: the stimulus shown and each unit's spike count in its window.
    pub fn record(&mut self, stimulus: u32, counts: &[u32]) {
        let s = stimulus as usize;
        if s >= self.ns {
            return;
        }
        for (u, &k) in counts.iter().enumerate().take(self.stats.len()) {
            let e = &mut self.stats[u][s];
            let k = k as f64;
            *e = (e.0 + 1.0, e.1 + k, e.2 + k * k);
        }
        let last = self.last.get_or_insert_with(|| (0, Vec::new()));
        last.0 = stimulus;
        last.1.clear();
        last.1
            .extend_from_slice(&counts[..counts.len().min(self.stats.len())]);
    }

    /// improve-decoding's [`Design::decoding_gains`] on every trial recorded but the last (all
    /// of them before the first): what the choice after the last trial is made on. A trial's
    /// gains are then ready a whole trial before they are needed — the daemon's estimator
    /// thread computes them while the next trial runs, and a `next` asked the moment a trial is
    /// labelled does not wait for stimuli² × units of arithmetic — and the choice is still a
    /// function of the recorded trials alone, so a replay makes it again. (Counts are whole
    /// numbers: taking the trial back out restores the sums exactly.)
    pub fn decoding_gains_before_last(&self) -> (f64, Vec<f64>) {
        let Some((s, counts)) = &self.last else {
            return self.decoding_gains();
        };
        // Only the counts are read by the gains.
        let mut before = Design {
            policy: self.policy,
            constraints: self.constraints,
            ns: self.ns,
            stats: self.stats.clone(),
            shown: Vec::new(),
            history: Vec::new(),
            block: Vec::new(),
            rng: self.rng.clone(),
            last: None,
        };
        for (u, &k) in counts.iter().enumerate() {
            let e = &mut before.stats[u][*s as usize];
            let k = k as f64;
            *e = (e.0 - 1.0, e.1 - k, e.2 - k * k);
        }
        before.decoding_gains()
    }

    fn balanced(&mut self) -> u32 {
        if self.block.is_empty() {
            self.block = (0..self.ns as u32).collect();
            for i in (1..self.ns).rev() {
                let j = self.rng.gen_range(0..=i);
                self.block.swap(i, j);
            }
        }
        self.block.pop().unwrap_or(0)
    }

    /// The unit's pooled Fano factor (at least 1: counts are not taken as more regular than
    /// Poisson), from its within-stimulus variances.
    fn fano(&self, u: usize) -> f64 {
        let (mut ss, mut df, mut mean_sum, mut n_sum) = (0.0, 0.0, 0.0, 0.0);
        for &(n, s, q) in &self.stats[u] {
            if n >= 2.0 {
                ss += q - s * s / n;
                df += n - 1.0;
            }
            mean_sum += s;
            n_sum += n;
        }
        let mean = mean_sum / n_sum.max(1.0);
        if df < 2.0 || mean <= 0.0 {
            return 1.0;
        }
        (ss / df / mean).max(1.0)
    }

    /// Gamma posteriors (shape, rate) of the unit's mean count per stimulus: a prior worth one
    /// trial, and the counts tempered by its Fano factor.
    ///
    /// The prior's mean is the mean over the stimuli shown of each one's mean count, every
    /// stimulus weighted alike however often it was shown (with half a spike over one more
    /// stimulus, so a silent start is not a zero). Weighting by trials instead would let a
    /// policy that shows the preferred stimulus often raise every other stimulus's prior, and
    /// the rarely shown ones would look like rivals they are not.
    pub fn posterior(&self, u: usize) -> Vec<(f64, f64)> {
        let f = self.fano(u);
        let (means, shown) = self.stats[u]
            .iter()
            .filter(|&&(n, _, _)| n > 0.0)
            .fold((0.0, 0.0), |a, &(n, s, _)| (a.0 + s / n, a.1 + 1.0));
        let prior_mean = ((means + 0.5) / (shown + 1.0)).max(0.05);
        self.stats[u]
            .iter()
            .map(|&(n, s, _)| (prior_mean + s / f, 1.0 + n / f))
            .collect()
    }

    fn draw_argmax(&mut self, post: &[(f64, f64)]) -> usize {
        argmax_draw(post, &mut self.rng)
    }

    /// How settled unit `u`'s preferred stimulus is: (the stimulus within one neighbour of which
    /// the most posterior draws have their best, that share). Draws from the design's own
    /// random stream (see [`Design::preferred_shares`] for one that leaves it alone).
    pub fn settledness(&mut self, u: usize) -> (usize, f64) {
        let post = self.posterior(u);
        let mut hits = vec![0usize; self.ns];
        for _ in 0..DRAWS {
            let s = argmax_draw(&post, &mut self.rng);
            hits[s] += 1;
        }
        settled_of(&hits)
    }

    /// [`Design::preferred_shares`] with a random stream of its own, seeded by `seed`: the
    /// estimate is a function of the recorded trials and the seed.
    pub fn preferred_shares_seeded(
        &self,
        u: usize,
        draws: usize,
        seed: u64,
    ) -> (Vec<f64>, (usize, f64)) {
        self.preferred_shares(u, draws, &mut ChaCha8Rng::seed_from_u64(seed))
    }

    /// For reports: each stimulus's posterior probability of being unit `u`'s preferred one,
    /// estimated from `draws` posterior draws with `rng` (the design's own stream, and so its
    /// choices, are left alone), and [`Design::settledness`]'s (centre, share) from the same draws.
    pub fn preferred_shares(
        &self,
        u: usize,
        draws: usize,
        rng: &mut ChaCha8Rng,
    ) -> (Vec<f64>, (usize, f64)) {
        let post = self.posterior(u);
        let mut hits = vec![0usize; self.ns];
        for _ in 0..draws.max(1) {
            hits[argmax_draw(&post, rng)] += 1;
        }
        let (centre, share) = settled_of(&hits);
        let n = draws.max(1) as f64;
        (
            hits.iter().map(|&h| h as f64 / n).collect(),
            (centre, share),
        )
    }

    /// Whether every unit's preferred stimulus is settled: each one's (within one neighbour)
    /// when so.
    pub fn all_settled(&mut self) -> Option<Vec<usize>> {
        let mut modes = Vec::new();
        for u in 0..self.stats.len() {
            let (mode, p) = self.settledness(u);
            if p < SETTLED {
                return None;
            }
            modes.push(mode);
        }
        Some(modes)
    }

    /// The next stimulus, every constraint honoured.
    pub fn choose(&mut self) -> u32 {
        self.choose_explained().stimulus
    }

    /// The next stimulus, every constraint honoured, and why it was chosen.
    pub fn choose_explained(&mut self) -> Choice {
        self.choose_explained_given(None)
    }

    /// [`Design::choose_explained`], with improve-decoding's gains already computed (by another
    /// thread, from a snapshot of the design before its last trial: what
    /// [`Design::decoding_gains_before_last`] returns): the same choice, without the
    /// stimuli² × units pass on the caller's thread.
    pub fn choose_explained_given(&mut self, gains: Option<(f64, Vec<f64>)>) -> Choice {
        let t = self.history.len();
        let warm = self.constraints.warmup_blocks * self.ns;
        let (choice, why, unit) = if self.policy == Policy::BalancedBlocks {
            (self.balanced(), Why::Block, None)
        } else if t < warm {
            (self.balanced(), Why::WarmUp, None)
        } else if let Some(s) = self.owed() {
            (s, Why::Owed, None)
        } else if self.policy == Policy::ImproveDecoding {
            let (now, gains) = gains
                .filter(|g| g.1.len() == self.ns)
                .unwrap_or_else(|| self.decoding_gains_before_last());
            let mut order: Vec<usize> = (0..self.ns).collect();
            // Largest gain first; ties (no gain anywhere) go to the least shown.
            order.sort_by(|&a, &b| {
                gains[b]
                    .total_cmp(&gains[a])
                    .then(self.shown[a].cmp(&self.shown[b]))
                    .then(a.cmp(&b))
            });
            let (best, second) = (order[0], order[1]);
            (
                best as u32,
                Why::Accuracy {
                    gain: gains[best],
                    now,
                    runner_up: (second as u32, gains[second]),
                },
                None,
            )
        } else {
            let (s, u, first) = self.find_tuning();
            (s, Why::TopTwo { first }, Some(u))
        };
        let kept = self.not_too_long(choice);
        let why = if kept == choice {
            why
        } else {
            Why::RunLimit { instead_of: choice }
        };
        self.shown[kept as usize] += 1;
        self.history.push(kept);
        Choice {
            stimulus: kept,
            why,
            unit,
            margin: unit.map_or(f64::NAN, |u| self.margin(u)),
        }
    }

    /// A stimulus below its minimum share of the trials so far (the least shown).
    fn owed(&mut self) -> Option<u32> {
        let t = self.history.len() as f64;
        let floor = self.constraints.min_share * t / self.ns as f64;
        let least = (0..self.ns).min_by_key(|&s| self.shown[s])?;
        ((self.shown[least] as f64) < floor).then_some(least as u32)
    }

    /// `choice`, unless it would be shown more than `max_run` times in a row: then another
    /// (the least shown of the rest).
    fn not_too_long(&mut self, choice: u32) -> u32 {
        let k = self.constraints.max_run;
        let run = self
            .history
            .iter()
            .rev()
            .take_while(|&&c| c == choice)
            .count();
        if run < k {
            return choice;
        }
        (0..self.ns as u32)
            .filter(|&s| s != choice)
            .min_by_key(|&s| self.shown[s as usize])
            .unwrap_or(choice)
    }

    /// Top-two Thompson sampling for the unit whose preference is least clear (smallest
    /// [`Design::margin`]): (the stimulus, the unit, whether it is the first draw's best).
    fn find_tuning(&mut self) -> (u32, usize, bool) {
        let target = (0..self.stats.len())
            .map(|u| (u, self.margin(u)))
            .min_by(|a, b| a.1.total_cmp(&b.1))
            .map_or(0, |x| x.0);
        let post = self.posterior(target);
        let first = self.draw_argmax(&post);
        if self.rng.gen::<bool>() {
            return (first as u32, target, true);
        }
        // The challenger: the best of a draw that disagrees with the first about the preferred
        // stimulus's neighbourhood (the criterion is "within one neighbour", so a neighbour of
        // the first is no rival worth a trial).
        // At most CHALLENGER_DRAWS redraws: when the unit's posterior leaves almost no chance
        // outside the first's neighbourhood there is no challenger worth a trial, and drawing
        // on would only cost the engine thread time (each draw samples every stimulus).
        let near = neighbours(first, self.ns);
        for _ in 0..CHALLENGER_DRAWS {
            let second = self.draw_argmax(&post);
            if !near.contains(&second) {
                return (second as u32, target, false);
            }
        }
        (first as u32, target, true)
    }

    /// Choices so far.
    pub fn history(&self) -> &[u32] {
        &self.history
    }

    /// Each unit's (mean, variance of the mean, Gamma rate) per stimulus, and its Fano factor.
    fn predictive(&self) -> Vec<Predictive> {
        (0..self.stats.len())
            .map(|u| {
                let f = self.fano(u);
                let p = self
                    .posterior(u)
                    .into_iter()
                    .map(|(a, b)| (a / b, a / (b * b), b))
                    .collect();
                (p, f)
            })
            .collect()
    }

    /// The expected accuracy of decoding one trial from the units' counts, and each stimulus's
    /// expected gain in it from one more trial of that stimulus.
    ///
    /// A trial of stimulus s is confused with t with probability Φ(−D/2), D² = Σ_u (m_us −
    /// m_ut)² / (f_u (m_us + m_ut)/2 + v_us + v_ut): each unit's count is approximately normal
    /// with its predictive variance — the counts' own (Fano f_u times the mean) plus what is
    /// not yet known about the means (v, the Gamma posterior's variance), as a Bayesian decoder
    /// with these posteriors would see them. A stimulus is decoded right when it is taken for
    /// none of its rivals, Π_t (1 − error(s, t)) (pairs treated as independent); the accuracy
    /// is the mean of that over stimuli. One more trial of s shrinks
    /// every v_us to m_us / (β_us + 1/f_u) (the conjugate update with its expected count); the
    /// gain is the accuracy after that minus the accuracy now. Cost: stimuli² × units.
    pub fn decoding_gains(&self) -> (f64, Vec<f64>) {
        let (ns, nu) = (self.ns, self.stats.len());
        // Flat [stimulus][unit] tables: mean, variance of the mean now, and after one more
        // trial of that stimulus; the units' Fano factors.
        let (mut m, mut v, mut w) = (vec![0.0; ns * nu], vec![0.0; ns * nu], vec![0.0; ns * nu]);
        let mut f = vec![1.0; nu];
        for (u, (post, fu)) in self.predictive().into_iter().enumerate() {
            f[u] = fu;
            for (s, (mean, var, rate)) in post.into_iter().enumerate() {
                m[s * nu + u] = mean;
                v[s * nu + u] = var;
                w[s * nu + u] = mean / (rate + 1.0 / fu);
            }
        }
        let phi = |d2: f64| {
            0.5 * statrs::function::erf::erfc(d2.max(0.0).sqrt() / 2.0 / std::f64::consts::SQRT_2)
        };
        // err[s][t]: P(a trial of s is taken for t) now; after[s][t]: the same after one more
        // trial of s (which also changes err[t][s] to after[s][t]: the pair's error is symmetric).
        let mut err = vec![0.0; ns * ns];
        let mut after = vec![0.0; ns * ns];
        let row = |s: usize| s * nu..s * nu + nu;
        for s in 0..ns {
            let (ms, vs, ws) = (&m[row(s)], &v[row(s)], &w[row(s)]);
            for t in s + 1..ns {
                let (mt, vt, wt) = (&m[row(t)], &v[row(t)], &w[row(t)]);
                let mut d0 = 0.0;
                for u in 0..nu {
                    let dm = ms[u] - mt[u];
                    d0 += dm * dm / (f[u] * (ms[u] + mt[u]) / 2.0 + vs[u] + vt[u]).max(1e-12);
                }
                let e = phi(d0);
                err[s * ns + t] = e;
                err[t * ns + s] = e;
                if e < 1e-7 {
                    // Pairs already told apart: one more trial changes nothing worth a choice.
                    after[s * ns + t] = e;
                    after[t * ns + s] = e;
                    continue;
                }
                let (mut ds, mut dt) = (0.0, 0.0);
                for u in 0..nu {
                    let dm = ms[u] - mt[u];
                    let noise = f[u] * (ms[u] + mt[u]) / 2.0;
                    ds += dm * dm / (noise + ws[u] + vt[u]).max(1e-12);
                    dt += dm * dm / (noise + vs[u] + wt[u]).max(1e-12);
                }
                after[s * ns + t] = phi(ds);
                after[t * ns + s] = phi(dt);
            }
        }
        // A trial of s is decoded right when it is taken for none of its rivals: per stimulus,
        // the sum over rivals of ln(1 − error) (each pair's error treated as independent of
        // the others'; a sum of errors would pass 1 with many close rivals and stop moving).
        let ln_ok = |e: f64| (1.0 - e).max(1e-300).ln();
        let rows: Vec<f64> = (0..ns)
            .map(|s| {
                (0..ns)
                    .filter(|&t| t != s)
                    .map(|t| ln_ok(err[s * ns + t]))
                    .sum()
            })
            .collect();
        let accuracy = |rows: &[f64]| rows.iter().map(|r| r.exp()).sum::<f64>() / ns as f64;
        let now = accuracy(&rows);
        let mut next = rows.clone();
        let gains = (0..ns)
            .map(|s| {
                next.copy_from_slice(&rows);
                next[s] = 0.0;
                for t in (0..ns).filter(|&t| t != s) {
                    let e = after[s * ns + t];
                    next[s] += ln_ok(e);
                    next[t] += ln_ok(e) - ln_ok(err[t * ns + s]);
                }
                accuracy(&next) - now
            })
            .collect();
        (now, gains)
    }
}

/// The best stimulus of one draw from Gamma posteriors (shape, rate).
fn argmax_draw(post: &[(f64, f64)], rng: &mut ChaCha8Rng) -> usize {
    let mut best = (0, f64::NEG_INFINITY);
    for (s, &(a, b)) in post.iter().enumerate() {
        let x = Gamma::new(a, b).map_or(a / b, |g| rng.sample(g));
        if x > best.1 {
            best = (s, x);
        }
    }
    best.0
}

/// (the stimulus whose neighbourhood holds the most draws' best stimulus, that share): the
/// preferred stimulus as known within one neighbour, and how probably. Ties go to the centre
/// that is itself the best more often.
///
/// Not the most frequent best stimulus's neighbourhood: on a broad peak the draws split between
/// the peak and its two neighbours, and when one neighbour is by chance the most frequent, the
/// other one lies outside its neighbourhood although the peak's holds both.
fn settled_of(hits: &[usize]) -> (usize, f64) {
    let ns = hits.len();
    let total: usize = hits.iter().sum();
    let near = |c: usize| -> usize { neighbours(c, ns).iter().map(|&s| hits[s]).sum() };
    let centre = (0..ns).max_by_key(|&c| (near(c), hits[c])).unwrap_or(0);
    (centre, near(centre) as f64 / total.max(1) as f64)
}

/// A stimulus and its two neighbours in circular order.
pub fn neighbours(s: usize, ns: usize) -> [usize; 3] {
    [(s + ns - 1) % ns, s, (s + 1) % ns]
}

/// A simulated unit with von Mises tuning over `ns` stimuli evenly spaced on the circle and
/// negative binomial counts (Gamma–Poisson mixture).
#[derive(Clone, Copy, Debug)]
pub struct TunedUnit {
    /// Index of the preferred stimulus.
    pub preferred: usize,
    /// Mean count far from the preference.
    pub baseline: f64,
    /// Mean count at the preference.
    pub peak: f64,
    /// Tuning concentration (larger: sharper).
    pub kappa: f64,
    /// Fano factor (> 1).
    pub fano: f64,
}

impl TunedUnit {
    /// The mean count for stimulus `s` of `ns`.
    pub fn mean(&self, s: usize, ns: usize) -> f64 {
        let d = 2.0 * std::f64::consts::PI * (s as f64 - self.preferred as f64) / ns as f64;
        self.baseline + (self.peak - self.baseline) * (self.kappa * (d.cos() - 1.0)).exp()
    }

    /// One trial's count for stimulus `s` of `ns`.
    pub fn draw(&self, s: usize, ns: usize, rng: &mut ChaCha8Rng) -> u32 {
        let m = self.mean(s, ns);
        let lambda = if self.fano > 1.0 {
            let shape = m / (self.fano - 1.0);
            Gamma::new(shape, shape / m).map_or(m, |g| rng.sample(g))
        } else {
            m
        };
        Poisson::new(lambda.max(1e-9)).map_or(0, |p| rng.sample::<f64, _>(p) as u32)
    }
}

/// The simulated units of one seed: preferred stimuli drawn at random, tuning of moderate
/// width, baseline firing, over-dispersed counts (Fano 1.2–2) — the project's own scenario.
pub fn units_of(seed: u64, nu: usize, ns: usize) -> Vec<TunedUnit> {
    units_within(seed, nu, ns, 1.0)
}

/// [`units_of`] with the preferred stimuli within a share `spread` (0..=1) of the circle around
/// a centre drawn for the seed — units recorded close together often share their preference,
/// and then stimuli far from it drive every unit weakly and are harder to tell apart. 1: each
/// unit's preference anywhere (exactly [`units_of`]); the units' other parameters are the same
/// draws whatever the spread.
pub fn units_within(seed: u64, nu: usize, ns: usize, spread: f64) -> Vec<TunedUnit> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0x0717);
    let centre = ChaCha8Rng::seed_from_u64(seed ^ 0xce47).gen_range(0..ns.max(1)) as f64;
    let place = |r: usize| {
        if spread >= 1.0 {
            r
        } else {
            let off = (r as f64 + 0.5 - ns as f64 / 2.0) * spread.max(0.0);
            (centre + off).round().rem_euclid(ns as f64) as usize % ns
        }
    };
    (0..nu)
        .map(|_| TunedUnit {
            preferred: place(rng.gen_range(0..ns)),
            baseline: rng.gen_range(1.0..3.0),
            peak: rng.gen_range(6.0..12.0),
            kappa: rng.gen_range(1.5..3.0),
            fano: rng.gen_range(1.2..2.0),
        })
        .collect()
}

/// [`units_within`]'s spread in words, for a report's header.
pub fn spread_words(spread: f64) -> String {
    if spread >= 1.0 {
        "preferences anywhere on the circle".into()
    } else {
        format!("preferences within {:.0}% of the circle", 100.0 * spread)
    }
}

/// Simulated tuned units answering whatever stimulus is chosen (a closed loop through a real
/// daemon: `auspex closed-loop-sim --through-daemon`, the daemon's e2e test): the units of
/// [`units_within`] and their own seeded random stream.
pub struct SimulatedUnits {
    /// The units.
    pub units: Vec<TunedUnit>,
    ns: usize,
    rng: ChaCha8Rng,
}

impl SimulatedUnits {
    /// The `nu` units of seed `seed` over `ns` stimuli, their preferences within `spread` of
    /// the circle ([`units_within`]).
    pub fn new(seed: u64, nu: usize, ns: usize, spread: f64) -> Self {
        SimulatedUnits {
            units: units_within(seed, nu, ns, spread),
            ns,
            rng: ChaCha8Rng::seed_from_u64(seed ^ 0x005e_ed0f_7e57),
        }
    }

    /// Each unit's spike count for one trial of stimulus `s`.
    pub fn respond(&mut self, s: usize) -> Vec<u32> {
        let ns = self.ns;
        self.units
            .iter()
            .map(|u| u.draw(s, ns, &mut self.rng))
            .collect()
    }

    /// Whether `preferred` (a stimulus index per unit) is right within one neighbour.
    pub fn right(&self, preferred: &[usize]) -> bool {
        preferred.len() == self.units.len()
            && self
                .units
                .iter()
                .zip(preferred)
                .all(|(u, &p)| neighbours(u.preferred, self.ns).contains(&p))
    }
}

/// Plays `units` against `policy` until every unit's preferred stimulus is settled and right
/// (within one neighbour of the truth): (the trials it took, or None within `max_trials`; the
/// first look — trials so far — at which every unit read settled but some unit's preference was
/// wrong, where an experiment stopped on "settled" would have stopped with a wrong answer). The
/// looks are those of `play`: after every trial for the first four blocks, then every four
/// trials.
pub fn tuning_run(
    units: &[TunedUnit],
    ns: usize,
    policy: Policy,
    constraints: Constraints,
    seed: u64,
    max_trials: usize,
) -> (Option<usize>, Option<usize>) {
    let mut wrong_at = None;
    let trials = play(units, ns, policy, constraints, seed, max_trials, |d| {
        d.all_settled().is_some_and(|modes| {
            let right = units
                .iter()
                .zip(&modes)
                .all(|(u, &m)| neighbours(u.preferred, ns).contains(&m));
            if !right && wrong_at.is_none() {
                wrong_at = Some(d.history().len());
            }
            right
        })
    });
    (trials, wrong_at)
}

/// Plays `units` against `policy` for up to `max_trials` trials: the first trial after which
/// `done` holds (checked every trial for the first four blocks, then every four: checking may
/// cost draws).
fn play(
    units: &[TunedUnit],
    ns: usize,
    policy: Policy,
    constraints: Constraints,
    seed: u64,
    max_trials: usize,
    mut done: impl FnMut(&mut Design) -> bool,
) -> Option<usize> {
    let mut d = Design::new(policy, constraints, units.len(), ns, seed);
    let mut world = ChaCha8Rng::seed_from_u64(seed ^ 0x005e_ed0f_7e57);
    for t in 1..=max_trials {
        let s = d.choose() as usize;
        let counts: Vec<u32> = units.iter().map(|u| u.draw(s, ns, &mut world)).collect();
        d.record(s as u32, &counts);
        if t >= ns && (t < 4 * ns || t % 4 == 0) && done(&mut d) {
            return Some(t);
        }
    }
    None
}

/// Held-out accuracy of decoding one trial of each of `test` (stimulus, counts) with the design's
/// posterior mean counts (negative binomial likelihoods with each unit's Fano factor; the
/// most probable stimulus wins).
pub fn held_out_accuracy(d: &Design, test: &[(usize, Vec<u32>)]) -> f64 {
    let pred = d.predictive();
    let ns = d.ns;
    let mut right = 0usize;
    for (s, counts) in test {
        let mut best = (usize::MAX, f64::NEG_INFINITY);
        for t in 0..ns {
            let ll: f64 = pred
                .iter()
                .zip(counts)
                .map(|((p, f), &k)| {
                    // Poisson log-likelihood tempered by the Fano factor (a quasi-likelihood):
                    // (k log m − m) / f.
                    let m = p[t].0.max(1e-9);
                    (k as f64 * m.ln() - m) / f
                })
                .sum();
            if ll > best.1 {
                best = (t, ll);
            }
        }
        right += usize::from(best.0 == *s);
    }
    right as f64 / test.len().max(1) as f64
}

/// Plays `units` against `policy` until decoding reaches `target` accuracy on a held-out set
/// (`per_stimulus` trials of every stimulus drawn once, the same for every policy of a seed):
/// the trials it took, or None within `max_trials`.
pub fn trials_to_accuracy(
    units: &[TunedUnit],
    ns: usize,
    policy: Policy,
    constraints: Constraints,
    seed: u64,
    max_trials: usize,
    target: f64,
) -> Option<usize> {
    let mut test_rng = ChaCha8Rng::seed_from_u64(seed ^ 0x07e5_75e7);
    let per_stimulus = 40;
    let test: Vec<(usize, Vec<u32>)> = (0..ns * per_stimulus)
        .map(|i| {
            let s = i % ns;
            (
                s,
                units.iter().map(|u| u.draw(s, ns, &mut test_rng)).collect(),
            )
        })
        .collect();
    play(units, ns, policy, constraints, seed, max_trials, |d| {
        held_out_accuracy(d, &test) >= target
    })
}

#[cfg(test)]
mod tests {
    use super::*;
    use proptest::prelude::*;

    /// A hand-computed case: one unit, two stimuli, counts 2 and 4 over one trial each, Fano 1
    /// (too few trials to estimate it): prior mean, the stimuli's mean counts averaged with
    /// half a spike over one more, (2 + 4 + 0.5) / (2 + 1) = 13/6 worth one trial,
    /// so the posteriors are Gamma(13/6 + 2, 2) and Gamma(13/6 + 4, 2).
    #[test]
    fn the_posterior_is_the_conjugate_update() {
        let mut d = Design::new(Policy::FindTuning, Constraints::default(), 1, 2, 1);
        d.record(0, &[2]);
        d.record(1, &[4]);
        let p = d.posterior(0);
        let a0 = 13.0 / 6.0;
        assert!((p[0].0 - (a0 + 2.0)).abs() < 1e-12 && (p[0].1 - 2.0).abs() < 1e-12);
        assert!((p[1].0 - (a0 + 4.0)).abs() < 1e-12 && (p[1].1 - 2.0).abs() < 1e-12);
    }

    /// Showing the preferred stimulus again and again (with the same count, so the Fano factor
    /// stays 1) leaves the other stimuli's posteriors exactly where they were: the prior weighs
    /// stimuli, not trials. Weighted by trials, the prior mean here would climb from
    /// (10 + 2 + 2 + 0.5) / 4 towards 10 and make stimuli 1 and 2 look like rivals.
    #[test]
    fn a_stimulus_shown_more_does_not_move_the_others_prior() {
        let mut d = Design::new(Policy::FindTuning, Constraints::default(), 1, 3, 1);
        d.record(0, &[10]);
        d.record(1, &[2]);
        d.record(2, &[2]);
        let before = d.posterior(0);
        let a0 = 14.5 / 4.0;
        assert!((before[1].0 - (a0 + 2.0)).abs() < 1e-12 && (before[1].1 - 2.0).abs() < 1e-12);
        for _ in 0..20 {
            d.record(0, &[10]);
        }
        let after = d.posterior(0);
        assert_eq!(before[1..], after[1..]);
        assert!((after[0].0 - (a0 + 210.0)).abs() < 1e-12 && (after[0].1 - 22.0).abs() < 1e-12);
    }

    /// The margin by hand, a best stimulus at the edge of a broad peak: one trial each with
    /// counts 1, 1, 9, 9, 10, 1, 1, 1 (Fano 1: one trial per stimulus). Prior mean
    /// (33 + 0.5) / (8 + 1) worth one trial, so stimulus s has Gamma(33.5/9 + count, 2): mean
    /// a/2, variance a/4. The best is 4; the neighbourhood of 3 holds it and the 9 at 2, so its
    /// nearest rival outside is a 1: margin (10 − 1)/2 / √((a₄ + a₀)/4) = 9 / √(67/9 + 11) —
    /// not (10 − 9)/2 / √((a₄ + a₂)/4) = 1 / √(67/9 + 19), as taken around 4 alone.
    #[test]
    fn the_margin_by_hand_on_a_broad_peak() {
        let mut d = Design::new(Policy::FindTuning, Constraints::default(), 1, 8, 1);
        for (s, k) in [1, 1, 9, 9, 10, 1, 1, 1].into_iter().enumerate() {
            d.record(s as u32, &[k]);
        }
        let expected = 9.0 / (67.0_f64 / 9.0 + 11.0).sqrt();
        assert!(
            (d.margin(0) - expected).abs() < 1e-12,
            "{} vs {expected}",
            d.margin(0)
        );
    }

    /// The settled share is that of the best neighbourhood, not the most frequent best
    /// stimulus's: draws split 40 / 35 / 20 over stimuli 3, 4, 5 (5 left over, at 0) are 95%
    /// within one neighbour of 4, though 3 is the most frequent and its neighbourhood holds
    /// only 75%. Ties between centres go to the one that is itself the best more often.
    #[test]
    fn settled_is_the_best_neighbourhood() {
        let mut hits = vec![0usize; 8];
        (hits[3], hits[4], hits[5], hits[0]) = (40, 35, 20, 5);
        let (centre, share) = settled_of(&hits);
        assert_eq!(centre, 4);
        assert!((share - 0.95).abs() < 1e-12);
        // 2, 3, 4 and 3, 4, 5 both hold 40 of 60: centre 3 (20 itself) beats 4 (10 itself).
        let hits = [0, 0, 10, 20, 10, 10, 0, 10];
        assert_eq!(settled_of(&hits), (3, 40.0 / 60.0));
        let hits = [0, 0, 10, 20, 20, 10, 0, 0];
        let (c, s) = settled_of(&hits);
        assert!((c == 3 || c == 4) && (s - 50.0 / 60.0).abs() < 1e-12);
    }

    /// improve-decoding's figures by hand, one unit and two stimuli: counts 2 and 6 over two
    /// trials each (Fano 1: within-stimulus variances 0 and 0 are below Poisson). Prior mean
    /// (2 + 6 + 0.5) / (2 + 1) = 8.5/3 worth one trial, so the posteriors are
    /// Gamma(8.5/3 + 4, 3) and Gamma(8.5/3 + 12, 3): means 20.5/9 and 44.5/9, variances
    /// 20.5/27 and 44.5/27.
    /// D² = (8/3)² / ((20.5/9 + 44.5/9)/2 + 20.5/27 + 44.5/27); error Φ(−D/2) for each stimulus;
    /// accuracy 1 − Φ(−D/2). One more trial of stimulus 0 shrinks its variance to
    /// (20.5/9) / (3 + 1).
    #[test]
    fn decoding_gain_by_hand() {
        let mut d = Design::new(Policy::ImproveDecoding, Constraints::default(), 1, 2, 1);
        for _ in 0..2 {
            d.record(0, &[2]);
            d.record(1, &[6]);
        }
        let (m0, m1): (f64, f64) = (20.5 / 9.0, 44.5 / 9.0);
        let (v0, v1) = (20.5 / 27.0, 44.5 / 27.0);
        let phi = |x: f64| 0.5 * statrs::function::erf::erfc(-x / std::f64::consts::SQRT_2);
        let d2 = (m1 - m0).powi(2) / ((m0 + m1) / 2.0 + v0 + v1);
        let now = 1.0 - phi(-d2.sqrt() / 2.0);
        let d2_after = (m1 - m0).powi(2) / ((m0 + m1) / 2.0 + m0 / 4.0 + v1);
        let gain0 = phi(-d2.sqrt() / 2.0) - phi(-d2_after.sqrt() / 2.0);
        let (acc, gains) = d.decoding_gains();
        assert!((acc - now).abs() < 1e-12, "{acc} vs {now}");
        assert!((gains[0] - gain0).abs() < 1e-12, "{} vs {gain0}", gains[0]);
        // Stimulus 1's mean is less certain (larger variance): a trial of it helps more.
        assert!(gains[1] > gains[0] && gains[0] > 0.0);
    }

    /// The pairwise error the gain is built on, Φ(−D/2) for two normal responses with a shared
    /// variance per unit, against a Monte Carlo estimate: trials drawn with statrs' Normal and
    /// decided by the nearer mean in the variance-weighted distance (the optimal rule for equal
    /// priors). 200 000 trials: standard error below 0.0011, checked within 0.005.
    #[test]
    fn pairwise_error_matches_monte_carlo() {
        use statrs::distribution::Normal;
        let mut rng = ChaCha8Rng::seed_from_u64(7);
        // Three units: means under stimulus a and b, and the shared variance.
        let units = [(2.0, 3.1, 2.6), (5.0, 4.2, 4.7), (1.0, 1.9, 1.5)];
        let d2: f64 = units.iter().map(|&(a, b, v)| (a - b) * (a - b) / v).sum();
        let predicted =
            0.5 * statrs::function::erf::erfc(d2.sqrt() / 2.0 / std::f64::consts::SQRT_2);
        let n = 200_000;
        let mut wrong = 0;
        for i in 0..n {
            let from_a = i % 2 == 0;
            let (mut da, mut db) = (0.0, 0.0);
            for &(a, b, v) in &units {
                let m = if from_a { a } else { b };
                let x: f64 = rand::Rng::sample(&mut rng, Normal::new(m, f64::sqrt(v)).unwrap());
                da += (x - a) * (x - a) / v;
                db += (x - b) * (x - b) / v;
            }
            if (da < db) != from_a {
                wrong += 1;
            }
        }
        let mc = wrong as f64 / n as f64;
        assert!(
            (mc - predicted).abs() < 0.005,
            "Monte Carlo {mc} vs Φ(−D/2) {predicted}"
        );
    }

    /// Gains computed elsewhere from a snapshot taken a trial earlier (the daemon's estimator
    /// thread: `decoding_gains` of the design as it was before the last trial) give the very
    /// choices the design makes computing them itself by taking the last trial back out — bit
    /// for bit, so a replay that computes them on the spot chooses as the live session did.
    #[test]
    fn precomputed_gains_choose_the_same() {
        let units = units_of(4, 6, 8);
        let mut rng = ChaCha8Rng::seed_from_u64(9);
        let mut a = Design::new(Policy::ImproveDecoding, Constraints::default(), 6, 8, 2);
        let mut b = a.clone();
        let mut snapshot = b.clone();
        for _ in 0..200 {
            let gains = snapshot.decoding_gains();
            assert_eq!(gains, a.decoding_gains_before_last());
            let (x, y) = (a.choose_explained(), b.choose_explained_given(Some(gains)));
            assert_eq!((x.stimulus, x.why), (y.stimulus, y.why));
            let counts: Vec<u32> = units
                .iter()
                .map(|u| u.draw(x.stimulus as usize, 8, &mut rng))
                .collect();
            snapshot = b.clone();
            a.record(x.stimulus, &counts);
            b.record(y.stimulus, &counts);
        }
    }

    proptest! {
        /// A wrong settlement is seen at a look before the run ends (the run stops at the first
        /// look that is settled and right), never before a whole block.
        #[test]
        fn a_wrong_settlement_comes_before_the_stop(
            seed in 0u64..400,
            nu in 1usize..3,
            ns in 4usize..12,
            find in proptest::bool::ANY,
        ) {
            let policy = if find { Policy::FindTuning } else { Policy::BalancedBlocks };
            let units = units_of(seed, nu, ns);
            let c = Constraints::default();
            let (trials, wrong) = tuning_run(&units, ns, policy, c, seed, 400);
            if let Some(w) = wrong {
                prop_assert!(w >= ns, "{}", w);
                prop_assert!(trials.is_none_or(|t| w < t), "{} vs {:?}", w, trials);
            }
        }

        /// The units of a spread lie within that share of the circle (any two preferences at
        /// most spread × stimuli apart, plus one for rounding), and only the preferences move:
        /// the other parameters are the same draws as with preferences anywhere.
        #[test]
        fn preferences_lie_within_the_spread(
            seed in 0u64..10_000,
            nu in 1usize..20,
            ns in 2usize..70,
            spread in 0.0f64..1.0,
        ) {
            let near = units_within(seed, nu, ns, spread);
            let anywhere = units_of(seed, nu, ns);
            let apart = |a: usize, b: usize| a.abs_diff(b).min(ns - a.abs_diff(b));
            for (x, y) in near.iter().zip(&anywhere) {
                prop_assert_eq!((x.baseline, x.peak, x.kappa, x.fano), (y.baseline, y.peak, y.kappa, y.fano));
                prop_assert!(x.preferred < ns);
                for z in &near {
                    let d = apart(x.preferred, z.preferred) as f64;
                    prop_assert!(d <= spread * ns as f64 + 1.0, "{} apart at spread {} of {}", d, spread, ns);
                }
            }
        }

        /// The settled share is a probability, at least that of the most frequent best
        /// stimulus's neighbourhood, and turning the circle of stimuli turns the centre with it
        /// (where no two centres tie).
        #[test]
        fn settled_share_is_bounded_and_turns_with_the_stimuli(
            hits in proptest::collection::vec(0usize..50, 3..20),
            turn in 0usize..20,
        ) {
            let ns = hits.len();
            let (centre, share) = settled_of(&hits);
            prop_assert!((0.0..=1.0).contains(&share));
            let total = hits.iter().sum::<usize>().max(1) as f64;
            let mode = (0..ns).max_by_key(|&s| hits[s]).unwrap();
            let mode_share = neighbours(mode, ns).iter().map(|&s| hits[s]).sum::<usize>() as f64;
            prop_assert!(share >= mode_share / total - 1e-12);
            let key = |c: usize| (neighbours(c, ns).iter().map(|&s| hits[s]).sum::<usize>(), hits[c]);
            let unique = (0..ns).filter(|&c| key(c) == key(centre)).count() == 1;
            let turned: Vec<usize> = (0..ns).map(|s| hits[(s + ns - turn % ns) % ns]).collect();
            let (c2, s2) = settled_of(&turned);
            prop_assert!((s2 - share).abs() < 1e-12);
            if unique {
                prop_assert_eq!(c2, (centre + turn) % ns);
            }
        }

        /// improve-decoding's figures stay in their bounds (expected accuracy in [0, 1], a gain
        /// no larger than what is left to gain) and do not depend on the order the stimuli are
        /// listed in: relabelling the stimuli relabels the gains, the accuracy is unchanged.
        #[test]
        fn decoding_gains_are_bounded_and_order_free(
            ns in 2usize..7,
            nu in 1usize..4,
            trials in proptest::collection::vec((0usize..7, proptest::collection::vec(0u32..15, 3)), 0..40),
            shift in 1usize..7,
        ) {
            let relabel = |s: usize| (s + shift) % ns;
            let mut a = Design::new(Policy::ImproveDecoding, Constraints::default(), nu, ns, 1);
            let mut b = a.clone();
            for (s, counts) in &trials {
                let s = s % ns;
                a.record(s as u32, &counts[..nu]);
                b.record(relabel(s) as u32, &counts[..nu]);
            }
            let (acc_a, gains_a) = a.decoding_gains();
            let (acc_b, gains_b) = b.decoding_gains();
            prop_assert!((0.0..=1.0).contains(&acc_a), "accuracy {}", acc_a);
            prop_assert!((acc_a - acc_b).abs() < 1e-9, "{} vs {}", acc_a, acc_b);
            for s in 0..ns {
                prop_assert!(gains_a[s] >= -1e-12 && acc_a + gains_a[s] <= 1.0 + 1e-12, "gain {}", gains_a[s]);
                prop_assert!((gains_a[s] - gains_b[relabel(s)]).abs() < 1e-9);
            }
        }

        /// Every policy honours the constraints whatever the counts: whole blocks first, no
        /// stimulus more than max_run in a row, none below its minimum share after warm-up
        /// (by more than the one trial a choice can owe).
        #[test]
        fn constraints_always_hold(
            ns in 2usize..12,
            nu in 1usize..4,
            max_run in 1usize..4,
            min_share in 0.0f64..1.0,
            seed in 0u64..1000,
            counts in proptest::collection::vec(0u32..20, 200),
        ) {
            let c = Constraints { warmup_blocks: 1, min_share, max_run };
            let policy = if seed % 2 == 0 { Policy::FindTuning } else { Policy::ImproveDecoding };
            let mut d = Design::new(policy, c, nu, ns, seed);
            for t in 0..120 {
                let s = d.choose();
                let k: Vec<u32> = (0..nu).map(|u| counts[(t * nu + u) % counts.len()] * (s + 1)).collect();
                d.record(s, &k);
            }
            let h = d.history();
            let mut first: Vec<u32> = h[..ns].to_vec();
            first.sort_unstable();
            prop_assert_eq!(first, (0..ns as u32).collect::<Vec<_>>());
            for w in h.windows(max_run + 1) {
                prop_assert!(w.iter().any(|&x| x != w[0]), "run longer than {}: {:?}", max_run, w);
            }
            let mut shown = vec![0usize; ns];
            for (t, &s) in h.iter().enumerate() {
                if t >= ns {
                    let floor = min_share * t as f64 / ns as f64;
                    for (x, &n) in shown.iter().enumerate() {
                        prop_assert!(n as f64 + 2.0 >= floor, "stimulus {} at {} of floor {} (t {})", x, n, floor, t);
                    }
                }
                shown[s as usize] += 1;
            }
        }
    }

    /// The reported expected gain — each stimulus's probability of being the unit's preferred
    /// one, from posterior draws — against the same probability by numerical integration,
    /// P(s best) = ∫ f_s(x) Π_{j≠s} F_j(x) dx, with statrs' Gamma density and distribution
    /// function (an independent path: quadrature, not sampling). 20 000 draws: the Monte Carlo
    /// standard error is at most 0.0036, so 0.015 is over 4 of them.
    #[test]
    fn preferred_probabilities_match_quadrature() {
        use statrs::distribution::{Continuous, ContinuousCDF};
        let mut d = Design::new(Policy::FindTuning, Constraints::default(), 1, 5, 1);
        for (s, counts) in [
            (0, [3, 4]),
            (1, [6, 5]),
            (2, [7, 9]),
            (3, [5, 6]),
            (4, [2, 3]),
        ] {
            for k in counts {
                d.record(s, &[k]);
            }
        }
        let (mc, _) = d.preferred_shares_seeded(0, 20_000, 5);
        let post = d.posterior(0);
        let g: Vec<Gamma> = post
            .iter()
            .map(|&(a, b)| Gamma::new(a, b).unwrap())
            .collect();
        let (lo, hi, n) = (0.0, 40.0, 40_000);
        let h = (hi - lo) / n as f64;
        for s in 0..5 {
            // Simpson's rule on [0, 40] (the posteriors' mass lies well inside).
            let f = |x: f64| {
                g[s].pdf(x)
                    * (0..5)
                        .filter(|&j| j != s)
                        .map(|j| g[j].cdf(x))
                        .product::<f64>()
            };
            let mut sum = f(lo) + f(hi);
            for i in 1..n {
                let x = lo + i as f64 * h;
                sum += if i % 2 == 1 { 4.0 } else { 2.0 } * f(x);
            }
            let exact = sum * h / 3.0;
            assert!(
                (mc[s] - exact).abs() < 0.015,
                "stimulus {s}: draws {} vs quadrature {exact}",
                mc[s]
            );
        }
    }

    /// On a sharply tuned unit the policy finds the preferred stimulus, and says so.
    #[test]
    fn a_tuned_unit_is_found() {
        let u = TunedUnit {
            preferred: 5,
            baseline: 1.0,
            peak: 8.0,
            kappa: 2.0,
            fano: 1.5,
        };
        let (t, _) = tuning_run(
            &[u],
            16,
            Policy::FindTuning,
            Constraints::default(),
            3,
            2000,
        );
        assert!(t.is_some());
    }
}
