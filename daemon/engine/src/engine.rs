//! The decoding engine: a pure state machine. Input: trial opened at an onset tick, spike
//! (unit, tick), advance to a watermark tick, label, cancel. Output, through an [`EngineSink`]:
//! a posterior frame for each completed bin, a decision when the policy fires, the trial's end,
//! and per-unit summaries once the presented stimulus is known.
//!
//! Must not: read clocks, touch sockets or files, spawn threads, or allocate per bin once a trial
//! is open (trial states are pooled; spike buffers keep their capacity). The daemon, offline
//! decoding, validation and replay all drive this one type, so equal inputs give equal outputs.

use crate::calibration::posterior_into;
pub use crate::decision::{
    fires, min_bin_for, Decision, DecisionPolicy, DecisionReason, DEFAULT_MIN_TIME_MS,
    DEFAULT_THRESHOLD,
};
use crate::model::{CellKernel, Model};
use crate::prepared::PreparedModel;
use crate::special::{entropy_bits, softmax_in_place};
use crate::table::{ProductAcc, NO_SLOT};
use crate::tally::UnitTally;
use serde::{Deserialize, Serialize};
use std::collections::{HashSet, VecDeque};
use std::sync::Arc;

/// The policy that keeps `target` accuracy with `model` under `config`'s decoder and calibration
/// switch (the threshold its held-out record supports, and the record's minimum time), and the
/// line stating that evidence; Err says why it cannot be kept. Used by the daemon's promise and
/// by offline decoding alike.
pub fn policy_for_target(
    target: f64,
    model: Option<&Model>,
    config: &EngineConfig,
) -> Result<(DecisionPolicy, String), String> {
    if !(target > 0.0 && target < 1.0) {
        return Err(format!("target accuracy {target} must be in (0, 1)"));
    }
    let Some(m) = model else {
        return Err("no model yet: the target needs a model's held-out record".into());
    };
    if config.decoder != Decoder::OrderStats {
        return Err(format!(
            "the target needs the order-stats decoder (the held-out record is of it), not {}",
            config.decoder.name()
        ));
    }
    let c = m.calibration();
    if !config.calibrated && c.is_active() {
        return Err(
            "the held-out record is of the calibrated posterior; calibration is switched off"
                .into(),
        );
    }
    let e = c.threshold_for(target).map_err(|e| e.to_string())?;
    Ok((
        DecisionPolicy {
            threshold: e.threshold,
            min_time_s: c.min_time_s,
        },
        e.held_out_line(),
    ))
}

/// Which likelihood turns spikes into a posterior.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize, Default, Hash)]
#[serde(rename_all = "kebab-case")]
pub enum Decoder {
    /// Count-conditioned order statistics through the count distribution's generating function.
    #[default]
    OrderStats,
    /// Inhomogeneous Poisson process with rate mean·q(b)/Δ.
    InhomogeneousPoisson,
    /// The window's spike count alone, evaluated at the end of the window.
    CountOnly,
}

impl Decoder {
    /// All decoders.
    pub const ALL: [Decoder; 3] = [
        Decoder::OrderStats,
        Decoder::InhomogeneousPoisson,
        Decoder::CountOnly,
    ];
    /// Name used on the command line and in files.
    pub fn name(self) -> &'static str {
        match self {
            Decoder::OrderStats => "order-stats",
            Decoder::InhomogeneousPoisson => "inhomogeneous-poisson",
            Decoder::CountOnly => "count-only",
        }
    }
    /// Parses a decoder name.
    pub fn parse(s: &str) -> Option<Self> {
        match s.trim().to_ascii_lowercase().as_str() {
            "order-stats" | "order_stats" | "orderstats" => Some(Decoder::OrderStats),
            "inhomogeneous-poisson" | "inhomogeneous_poisson" | "poisson" => {
                Some(Decoder::InhomogeneousPoisson)
            }
            "count-only" | "count_only" | "count" => Some(Decoder::CountOnly),
            _ => None,
        }
    }
}

/// The one check of a prior override: one finite positive weight per stimulus.
pub fn check_prior(prior: &[f64], n_stimuli: usize) -> Result<(), String> {
    if prior.len() != n_stimuli || prior.iter().any(|x| !(x.is_finite() && *x > 0.0)) {
        return Err(format!(
            "prior must have {n_stimuli} finite positive entries (got {})",
            prior.len()
        ));
    }
    Ok(())
}

/// Engine settings; validated by [`Engine::new`] and the setters.
#[derive(Clone, Debug, PartialEq)]
pub struct EngineConfig {
    /// Acquisition clock ticks per second (declared once per session).
    pub tick_rate_hz: f64,
    /// The decoder.
    pub decoder: Decoder,
    /// Decision policy.
    pub policy: DecisionPolicy,
    /// Prior override (None: the model's prior).
    pub prior: Option<Vec<f64>>,
    /// How far behind the watermark an onset may arrive and still be decoded, seconds.
    pub history_s: f64,
    /// Evaluate every cell's count term every bin (the straightforward reference path) instead
    /// of the per-model sums plus spiking units. Same mathematics, different summation order;
    /// kept for benchmarks and cross-checks.
    pub per_cell_reference: bool,
    /// Apply the model's calibration (its factors β(b); see `calibration.rs`). Off: β = 1, the
    /// raw posterior. A calibration belongs to the decoder it was fitted for — the order
    /// statistics decoder — so other decoders always run raw ([`EngineConfig::applies_calibration`]).
    pub calibrated: bool,
    /// Which blocks of the population sum this engine computes, and what it emits.
    pub role: Role,
}

/// Which blocks of the population sum (see [`crate::model::UNIT_BLOCK`]) an engine computes
/// itself, and whether it emits posteriors or block partials. Parts are an even split of a
/// model's blocks ([`Model::part_blocks`]); at most [`MAX_PARTS`].
#[derive(Clone, Copy, Debug, PartialEq, Eq, Default)]
pub enum Role {
    /// Every block: posteriors, decisions, trial ends, per-unit summaries.
    #[default]
    Whole,
    /// Part `part` of `parts` only; emits [`Partial`]s and nothing else.
    Shard {
        /// Which part.
        part: u32,
        /// Of how many.
        parts: u32,
    },
    /// Slice `slice` of `slices` (an even split of whole blocks) of part `part` of `parts`: one
    /// of a shard's engine threads. Emits [`Partial`]s only, like [`Role::Shard`]; a combiner
    /// takes the slices' partials as its part's blocks.
    ShardSlice {
        /// Which part.
        part: u32,
        /// Of how many.
        parts: u32,
        /// Which slice of the part.
        slice: u32,
        /// Of how many.
        slices: u32,
    },
    /// Part `part` of `parts` itself (None: no block) and every other block from the shards'
    /// partials ([`Engine::add_partial`]); emits what a whole engine emits.
    Combiner {
        /// The part computed here.
        part: Option<u32>,
        /// Of how many.
        parts: u32,
    },
}

/// Most parts a model's blocks can be split into (frames carry the lost ones as a bit mask).
pub const MAX_PARTS: u32 = 64;

impl Role {
    fn check(&self) -> Result<(), String> {
        let (part, parts) = match *self {
            Role::Whole => return Ok(()),
            Role::Shard { part, parts } => (Some(part), parts),
            Role::ShardSlice {
                part,
                parts,
                slice,
                slices,
            } => {
                if !(1..=MAX_PARTS).contains(&slices) || slice >= slices {
                    return Err(format!(
                        "slice {slice} of {slices}: slices must be 1..={MAX_PARTS} and the slice below them"
                    ));
                }
                (Some(part), parts)
            }
            Role::Combiner { part, parts } => (part, parts),
        };
        if !(1..=MAX_PARTS).contains(&parts) || part.is_some_and(|p| p >= parts) {
            return Err(format!(
                "part {part:?} of {parts}: parts must be 1..={MAX_PARTS} and the part below them"
            ));
        }
        Ok(())
    }
    /// The blocks of `m` computed by an engine in this role.
    pub fn local_blocks(&self, m: &Model) -> std::ops::Range<usize> {
        match *self {
            Role::Whole => 0..m.n_blocks(),
            Role::Shard { part, parts } => m.part_blocks(part, parts),
            Role::ShardSlice {
                part,
                parts,
                slice,
                slices,
            } => {
                let r = m.part_blocks(part, parts);
                let (n, s) = (r.len(), slices.max(1) as usize);
                let i = (slice as usize).min(s);
                r.start + n * i / s..r.start + n * (i + 1).min(s) / s
            }
            Role::Combiner {
                part: Some(part),
                parts,
            } => m.part_blocks(part, parts),
            Role::Combiner { part: None, .. } => 0..0,
        }
    }
    /// The part holding block `j` of `m` (0 for a whole engine).
    pub fn part_of_block(&self, m: &Model, j: usize) -> u32 {
        let parts = match *self {
            Role::Whole => return 0,
            Role::ShardSlice { part, .. } => return part,
            Role::Shard { parts, .. } | Role::Combiner { parts, .. } => parts,
        };
        (0..parts)
            .find(|&p| m.part_blocks(p, parts).contains(&j))
            .unwrap_or(0)
    }
}

/// One shard's partial log-likelihoods for one bin of one trial: the sums over the units of
/// blocks `first_block ..` (one row of stimuli per block, no prior, no calibration).
#[derive(Debug, Clone, Copy)]
pub struct Partial<'a> {
    /// Trial id.
    pub trial: u64,
    /// Bin index.
    pub bin: u32,
    /// First block.
    pub first_block: u32,
    /// Blocks × stimuli.
    pub values: &'a [f64],
    /// Spikes of the blocks' units in the trial so far.
    pub spikes: u32,
    /// At the last bin: the blocks' units' full-window log-likelihoods (units × stimuli, for the
    /// per-unit summaries) and spike counts.
    pub units: Option<(&'a [f64], &'a [u32])>,
}

/// A [`Partial`] that owns its values (to send to another thread or machine).
#[derive(Debug, Clone, PartialEq)]
pub struct OwnedPartial {
    /// Trial id.
    pub trial: u64,
    /// Bin.
    pub bin: u32,
    /// First block.
    pub first_block: u32,
    /// Blocks × stimuli.
    pub values: Vec<f64>,
    /// Spikes of the blocks' units so far.
    pub spikes: u32,
    /// At the last bin: per-unit log-likelihoods and counts.
    pub units: Option<(Vec<f64>, Vec<u32>)>,
}

impl OwnedPartial {
    /// Borrowed as the engine takes it.
    pub fn as_partial(&self) -> Partial<'_> {
        Partial {
            trial: self.trial,
            bin: self.bin,
            first_block: self.first_block,
            values: &self.values,
            spikes: self.spikes,
            units: self.units.as_ref().map(|(l, k)| (&l[..], &k[..])),
        }
    }

    /// A copy of `p`, reusing `values`' allocation.
    pub fn copied(p: &Partial<'_>, mut values: Vec<f64>) -> Self {
        values.clear();
        values.extend_from_slice(p.values);
        OwnedPartial {
            trial: p.trial,
            bin: p.bin,
            first_block: p.first_block,
            values,
            spikes: p.spikes,
            units: p.units.map(|(l, k)| (l.to_vec(), k.to_vec())),
        }
    }
}

impl EngineConfig {
    /// Whether a trial opened now applies the model's calibration: asked for, and the decoder
    /// is the one a calibration is fitted for (order statistics; `fit`, the learner and the
    /// held-out record all calibrate that decoder's posterior). Other decoders run raw.
    pub fn applies_calibration(&self) -> bool {
        self.calibrated && self.decoder == Decoder::OrderStats
    }

    /// Defaults for a clock of `tick_rate_hz`.
    pub fn new(tick_rate_hz: f64) -> Self {
        EngineConfig {
            tick_rate_hz,
            decoder: Decoder::default(),
            policy: DecisionPolicy::default(),
            prior: None,
            history_s: 2.0,
            per_cell_reference: false,
            calibrated: true,
            role: Role::Whole,
        }
    }
}

/// The most trials open at once (onset seen, window not yet ended). A rig opens a handful
/// (windows overlap when trials follow closely); a stream that opens thousands is broken, and
/// refusing its excess (counted) keeps every step bounded.
pub const MAX_OPEN_TRIALS: usize = 1024;

/// Why the engine refused an input. Every one is also counted in [`Counters`].
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum EngineError {
    /// Configuration that cannot work.
    #[error("engine configuration: {0}")]
    Config(String),
    /// Spike at or before the watermark.
    #[error("spike of unit {unit} at tick {tick} is at or behind the watermark {watermark}")]
    LateSpike {
        /// Unit id.
        unit: u32,
        /// Tick.
        tick: i64,
        /// Watermark.
        watermark: i64,
    },
    /// Spike of a unit the model does not have.
    #[error("unit {0} is not in the model")]
    UnknownUnit(u32),
    /// A watermark earlier than the current one.
    #[error("watermark went backwards from {from} to {to}")]
    WatermarkBackwards {
        /// Current.
        from: i64,
        /// Offered.
        to: i64,
    },
    /// A trial id already open or recently ended.
    #[error("trial {0} was already opened")]
    DuplicateTrial(u64),
    /// More trials open at once than [`MAX_OPEN_TRIALS`].
    #[error("trial {0} refused: {MAX_OPEN_TRIALS} trials are open already (onsets far faster than their windows end?)")]
    TooManyOpen(u64),
    /// Onset too far behind the watermark for the retained spike history.
    #[error("trial {trial} onset tick {onset} is more than the history allowance behind the watermark {watermark}")]
    StaleOnset {
        /// Trial id.
        trial: u64,
        /// Onset tick.
        onset: i64,
        /// Watermark.
        watermark: i64,
    },
    /// Label or cancel for a trial the engine does not hold.
    #[error("trial {0} is not open")]
    UnknownTrial(u64),
    /// Stimulus index outside the model.
    #[error("stimulus index {0} is not in the model")]
    UnknownStimulus(u32),
    /// A partial for a trial, bin or blocks this combiner is not waiting for.
    #[error("partial for trial {trial} bin {bin} (blocks from {first_block}) is not awaited")]
    StrayPartial {
        /// Trial id.
        trial: u64,
        /// Bin.
        bin: u32,
        /// First block.
        first_block: u32,
    },
}

/// Running counts of everything the engine saw or refused.
#[derive(Clone, Debug, Default, PartialEq, Serialize, Deserialize)]
pub struct Counters {
    /// Spikes accepted.
    pub spikes: u64,
    /// Spikes refused as late.
    pub late_spikes: u64,
    /// Spikes of units not in the model.
    pub unknown_unit_spikes: u64,
    /// Watermarks that went backwards.
    pub watermark_backwards: u64,
    /// Duplicate trial ids.
    pub duplicate_trials: u64,
    /// Onsets too far in the past, or whose window would run past the end of the tick range.
    pub stale_onsets: u64,
    /// Onsets refused because [`MAX_OPEN_TRIALS`] trials were open.
    pub trials_over_limit: u64,
    /// Labels or cancels for trials not held.
    pub unknown_trials: u64,
    /// Stimulus indices outside the model.
    pub unknown_stimuli: u64,
    /// Trials opened.
    pub trials_opened: u64,
    /// Trials that ran to the end of their window.
    pub trials_completed: u64,
    /// Trials cancelled.
    pub trials_cancelled: u64,
    /// Posterior frames produced.
    pub frames: u64,
    /// Decisions produced.
    pub decisions: u64,
    /// Completed trials whose label never came before they were evicted.
    pub labels_missing: u64,
    /// Partials refused by a combiner (trial not open, bin passed, blocks not awaited).
    #[serde(default)]
    pub stray_partials: u64,
}

/// A posterior frame for one completed bin of one trial.
#[derive(Debug)]
pub struct Frame<'a> {
    /// Trial id.
    pub trial: u64,
    /// Bin index (0-based).
    pub bin: u32,
    /// Tick at which the bin ended (last tick inside it).
    pub bin_end_tick: i64,
    /// Posterior over stimuli.
    pub posterior: &'a [f64],
    /// The population log-likelihood of the trial so far, per stimulus, without the prior and
    /// before calibration (up to a constant shared by all stimuli).
    pub log_likelihood: &'a [f64],
    /// Top stimulus.
    pub top: u32,
    /// Its posterior.
    pub top_posterior: f64,
    /// Entropy of the posterior in bits.
    pub entropy_bits: f64,
    /// Spikes of model units in the trial so far.
    pub spikes: u32,
    /// Parts whose blocks this frame lacks (bit p: part p was lost; 0 for a whole engine).
    pub lost_parts: u64,
}

/// How a trial ended.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum TrialOutcome {
    /// Ran to the end of its window.
    Completed,
    /// Cancelled by task control.
    Cancelled,
    /// Cancelled because the engine is stopping.
    Shutdown,
    /// Cancelled because its session ended (a new one started, or every sender ended).
    SessionEnded,
}

/// The end of a trial.
#[derive(Debug)]
pub struct TrialEnd<'a> {
    /// Trial id.
    pub trial: u64,
    /// Onset tick.
    pub onset: i64,
    /// Presented stimulus if known.
    pub presented: Option<u32>,
    /// How it ended.
    pub outcome: TrialOutcome,
    /// The decision (None if cancelled before one fired).
    pub decision: Option<Decision>,
    /// Spikes of model units in the window.
    pub spikes: u32,
    /// Last posterior (at the last completed bin).
    pub posterior: &'a [f64],
    /// Bins completed.
    pub bins: u32,
}

/// Per-unit single-unit decoding of one labelled, completed trial, with running figures.
#[derive(Debug)]
pub struct UnitSummaries<'a> {
    /// Trial id.
    pub trial: u64,
    /// Presented stimulus.
    pub presented: u32,
    /// Unit ids.
    pub units: &'a [u32],
    /// Each unit's end-of-window single-unit posterior for the presented stimulus.
    pub presented_posterior: &'a [f64],
    /// Each unit's maximum a posteriori stimulus.
    pub decoded: &'a [u32],
    /// Running single-unit accuracy over labelled trials so far.
    pub accuracy: &'a [f64],
    /// Running bias-corrected mutual information (bits) between presented and decoded stimulus.
    pub info_bits: &'a [f64],
    /// Labelled trials so far.
    pub n_trials: u64,
    /// The running tally (confusion matrices and count sums per unit, in `units` order).
    pub tally: &'a UnitTally,
    /// The trial's model (densities for response latencies).
    pub model: &'a Model,
}

/// Receives the engine's outputs. Borrowed data is valid only during the call.
pub trait EngineSink {
    /// A posterior frame.
    fn frame(&mut self, _frame: &Frame<'_>) {}
    /// A decision (exactly one per trial that is not cancelled first).
    fn decision(&mut self, _decision: &Decision) {}
    /// A trial ended.
    fn trial_end(&mut self, _end: &TrialEnd<'_>) {}
    /// Per-unit summaries for a labelled, completed trial.
    fn unit_summaries(&mut self, _s: &UnitSummaries<'_>) {}
    /// A shard's partials for one bin (only engines in the [`Role::Shard`] role emit these).
    fn partial(&mut self, _p: &Partial<'_>) {}
}

/// A sink that ignores everything.
pub struct NullSink;
impl EngineSink for NullSink {}

struct TrialState {
    id: u64,
    onset: i64,
    presented: Option<u32>,
    model: Arc<PreparedModel>,
    decoder: Decoder,
    threshold: f64,
    min_bin: u32,
    ln_prior: Vec<f64>,
    bin_ticks: i64,
    next_bin: u32,
    cursor: u64,
    k: Vec<u32>,
    /// Spikes of the local blocks' units so far.
    total_spikes: u32,
    /// Spikes of the remote blocks' units so far (from the partials consumed).
    remote_spikes: u32,
    /// Per (u, s): the count-dependent constant of the count term.
    cconst: Vec<f64>,
    /// Per (block, s): Σ over the block's units of cconst, kept in step with `cconst`.
    cc_sum: Vec<f64>,
    /// Per block, from the block's first unit index on: its units with at least one spike in the
    /// trial so far, in order of their first spike; `active_n` holds how many.
    active: Vec<u32>,
    active_n: Vec<u32>,
    reference: bool,
    /// Per (u, s): Σ ln q over the unit's spikes; at the end, the unit's full log-likelihood.
    unit_ll: Vec<f64>,
    /// Per (block, s): Σ ln q over the block's spikes.
    pop_spike: Vec<f64>,
    /// Per (block, s): the block's partial log-likelihood of the current bin.
    blk_ll: Vec<f64>,
    /// Blocks computed here.
    local: std::ops::Range<usize>,
    /// Emit partials instead of posteriors (a shard).
    shard: bool,
    /// Per block: computed elsewhere and awaited from a shard.
    awaited: Vec<bool>,
    /// Parts lost (their blocks neither local nor awaited).
    lost_parts: u64,
    /// Remote partials of bins `next_bin ..`, in bin order; `spare` keeps used slots.
    remote: VecDeque<RemoteBin>,
    spare: Vec<RemoteBin>,
    /// Population log-likelihood of the current bin (no prior, no calibration).
    ll: Vec<f64>,
    /// Apply the model's calibration factors.
    calibrated: bool,
    post: Vec<f64>,
    /// Table-family corrections of the current bin, as a product (see `table.rs`).
    table_acc: ProductAcc,
    decision: Option<Decision>,
}

impl TrialState {
    fn blank(model: Arc<PreparedModel>) -> Self {
        let (nu, ns, nblk) = (model.n_units(), model.n_stimuli(), model.n_blocks());
        TrialState {
            id: 0,
            onset: 0,
            presented: None,
            decoder: Decoder::OrderStats,
            threshold: 1.0,
            min_bin: 0,
            ln_prior: vec![0.0; ns],
            bin_ticks: 1,
            next_bin: 0,
            cursor: 0,
            k: vec![0; nu],
            total_spikes: 0,
            remote_spikes: 0,
            cconst: vec![0.0; nu * ns],
            cc_sum: vec![0.0; nblk * ns],
            active: vec![0; nu],
            active_n: vec![0; nblk],
            reference: false,
            unit_ll: vec![0.0; nu * ns],
            pop_spike: vec![0.0; nblk * ns],
            blk_ll: vec![0.0; nblk * ns],
            local: 0..nblk,
            shard: false,
            awaited: vec![false; nblk],
            lost_parts: 0,
            remote: VecDeque::new(),
            spare: Vec::new(),
            ll: vec![0.0; ns],
            calibrated: false,
            post: vec![0.0; ns],
            table_acc: ProductAcc::new(ns),
            decision: None,
            model,
        }
    }

    /// Clears the counts; `start` holds every cell's count constant at k = 0 and their sum.
    fn reset_counts(&mut self, start: &CountStart) {
        self.k.iter_mut().for_each(|x| *x = 0);
        self.total_spikes = 0;
        self.remote_spikes = 0;
        self.unit_ll.iter_mut().for_each(|x| *x = 0.0);
        self.pop_spike.iter_mut().for_each(|x| *x = 0.0);
        self.decision = None;
        self.active_n.iter_mut().for_each(|x| *x = 0);
        self.cconst.copy_from_slice(&start.cconst);
        self.cc_sum.copy_from_slice(&start.sum);
        while let Some(r) = self.remote.pop_front() {
            self.spare.push(r);
        }
    }

    /// Spikes of model units in the trial so far, local and remote.
    fn spikes(&self) -> u32 {
        self.total_spikes.saturating_add(self.remote_spikes)
    }

    /// Whether the remote partials of the next bin are all in.
    fn remote_ready(&self) -> bool {
        let Some(slot) = self.remote.front() else {
            return !self.awaited.iter().any(|&a| a);
        };
        self.awaited
            .iter()
            .zip(&slot.have)
            .all(|(&want, &have)| !want || have)
    }
}

/// The remote blocks' partials of one bin of one trial, as they arrive.
struct RemoteBin {
    /// Blocks × stimuli.
    values: Vec<f64>,
    /// Per block: arrived.
    have: Vec<bool>,
    /// Spikes reported with them.
    spikes: u32,
}

impl RemoteBin {
    fn new(nblk: usize, ns: usize) -> Self {
        RemoteBin {
            values: vec![0.0; nblk * ns],
            have: vec![false; nblk],
            spikes: 0,
        }
    }
    fn clear(&mut self) {
        self.have.iter_mut().for_each(|h| *h = false);
        self.spikes = 0;
    }
}

/// Every cell's count constant at k = 0 for one (model, decoder), and their per-stimulus sums:
/// computed once, copied at each trial opening (a memory copy instead of S·U special-function
/// evaluations).
#[derive(Default)]
struct CountStart {
    /// The model is held (not just its address) so a freed model's address cannot alias.
    key: Option<(Arc<PreparedModel>, Decoder)>,
    cconst: Vec<f64>,
    sum: Vec<f64>,
}

impl CountStart {
    fn ensure(&mut self, m: &Arc<PreparedModel>, dec: Decoder) {
        if let Some((km, kd)) = &self.key {
            if Arc::ptr_eq(km, m) && *kd == dec {
                return;
            }
        }
        let (nu, ns) = (m.n_units(), m.n_stimuli());
        self.cconst.clear();
        self.sum.clear();
        self.sum.resize(m.n_blocks() * ns, 0.0);
        for u in 0..nu {
            let j = m.block_of(u);
            for s in 0..ns {
                let c = count_const(m, dec, u, s, 0);
                self.cconst.push(c);
                self.sum[j * ns + s] += c;
            }
        }
        self.key = Some((m.clone(), dec));
    }
}

/// The k-dependent constant of a cell's count term, so the per-bin work is one table read and an
/// add or a multiply-add for the closed-form families.
#[inline]
fn count_const(m: &Model, dec: Decoder, u: usize, s: usize, k: u32) -> f64 {
    let i = u * m.n_stimuli() + s;
    match dec {
        Decoder::InhomogeneousPoisson => k as f64 * m.ln_means[i] - m.means[i],
        Decoder::CountOnly => 0.0,
        Decoder::OrderStats => match m.kernels[i] {
            CellKernel::Poisson { mean, ln_mean } => k as f64 * ln_mean - mean,
            CellKernel::NegBin { .. } => m.dists[i].nb_ln_gf_const(k),
            CellKernel::Table => 0.0,
        },
    }
}

/// The constant after the unit's count rose from `k − 1` to `k`, updated incrementally where a
/// family allows it (negative binomial: `+ ln(1−p) + ln(r + k − 1)`, no ln Γ per spike).
#[inline]
fn next_count_const(m: &PreparedModel, dec: Decoder, u: usize, s: usize, k: u32, prev: f64) -> f64 {
    let i = u * m.n_stimuli() + s;
    match (dec, m.kernels[i]) {
        (Decoder::InhomogeneousPoisson, _) => prev + m.ln_means[i],
        (Decoder::OrderStats, CellKernel::Poisson { ln_mean, .. }) => prev + ln_mean,
        (Decoder::OrderStats, CellKernel::NegBin { shape }) => {
            prev + match m.nb_step_row(u, k) {
                Some(row) => row[s],
                None => m.nb_step_direct(i, shape, k),
            }
        }
        _ => count_const(m, dec, u, s, k),
    }
}

/// The unit's full count term at bin b: `ln Φ^(k)(S(b))` (or its Poisson form).
#[inline]
fn count_term(m: &Model, dec: Decoder, u: usize, s: usize, b: usize, k: u32, cconst: f64) -> f64 {
    let ns = m.n_stimuli();
    let i = u * ns + s;
    let t = (u * m.n_bins() + b) * ns + s;
    match dec {
        Decoder::InhomogeneousPoisson => cconst + m.means[i] * m.surv[t],
        Decoder::CountOnly => m.dists[i].ln_pmf(k),
        Decoder::OrderStats => match m.kernels[i] {
            CellKernel::Poisson { mean, .. } => cconst + mean * m.surv[t],
            CellKernel::NegBin { shape } => {
                cconst - (shape + k as f64) * m.nb_g[(b * m.n_units() + u) * ns + s]
            }
            CellKernel::Table => m.dists[i].ln_gf_deriv(k, m.surv[t]),
        },
    }
}

/// The decoding engine. See the module documentation.
pub struct Engine {
    model: Arc<PreparedModel>,
    config: EngineConfig,
    bin_ticks: i64,
    min_bin: u32,
    history_ticks: i64,
    ln_prior: Vec<f64>,
    watermark: i64,
    /// Spikes at or before the watermark, sorted by (tick, unit), kept for open trials and for
    /// onsets that arrive up to `history_ticks` late.
    spikes: VecDeque<(i64, u32)>,
    spikes_base: u64,
    /// Spikes after the watermark, unsorted until the next advance.
    pending: Vec<(i64, u32)>,
    trials: Vec<TrialState>,
    parked: VecDeque<TrialState>,
    pool: Vec<TrialState>,
    recent_ids: VecDeque<u64>,
    recent_set: HashSet<u64>,
    counters: Counters,
    tally: UnitTally,
    count_start: CountStart,
    /// Blocks of the current model computed here (from the role).
    local: std::ops::Range<usize>,
    /// Parts lost by a combiner: trials opened from now on do not wait for them.
    lost: u64,
    // Per-unit summary buffers.
    us_post: Vec<f64>,
    us_decoded: Vec<u32>,
    us_acc: Vec<f64>,
    us_info: Vec<f64>,
    scratch_s: Vec<f64>,
}

const RECENT_IDS: usize = 4096;
const PARKED_MAX: usize = 64;

/// Decodes a whole dataset as an acquisition system would deliver it (1-bin batches, each trial
/// opened before the batch holding its onset): offline decoding, validation and calibration.
pub fn run_dataset(
    model: Arc<PreparedModel>,
    data: &crate::data::Dataset,
    cfg: EngineConfig,
    sink: &mut dyn EngineSink,
) -> Result<Counters, EngineError> {
    let mut e = Engine::new(model.clone(), cfg)?;
    let bt = e.bin_ticks();
    let window = bt * model.n_bins() as i64;
    for ev in data.events(bt, window) {
        match ev {
            crate::data::Event::Open {
                trial,
                onset,
                stimulus,
            } => {
                let idx = stimulus
                    .as_deref()
                    .and_then(|s| model.stimulus_index(s))
                    .map(|i| i as u32);
                // Refusals are counted by the engine; offline input is already validated.
                let _ = e.open_trial(trial, onset, idx, sink);
            }
            crate::data::Event::Batch { spikes, watermark } => {
                for (tick, unit) in spikes {
                    let _ = e.spike(unit, tick);
                }
                e.advance(watermark, sink)?;
            }
        }
    }
    Ok(e.counters().clone())
}

fn bin_ticks_for(model: &Model, tick_rate_hz: f64) -> Result<i64, EngineError> {
    crate::ticks::bin_ticks(model.bin_width_s(), tick_rate_hz)
        .map_err(|e| EngineError::Config(e.to_string()))
}

impl Engine {
    /// A new engine for `model` with `config`.
    pub fn new(model: Arc<PreparedModel>, config: EngineConfig) -> Result<Self, EngineError> {
        let bin_ticks = bin_ticks_for(&model, config.tick_rate_hz)?;
        let mut e = Engine {
            tally: UnitTally::new(model.units(), model.n_stimuli()),
            count_start: CountStart::default(),
            local: 0..0,
            lost: 0,
            ln_prior: model.ln_prior().to_vec(),
            min_bin: 0,
            history_ticks: 0,
            bin_ticks,
            model,
            config: config.clone(),
            watermark: i64::MIN,
            spikes: VecDeque::with_capacity(1 << 14),
            spikes_base: 0,
            pending: Vec::with_capacity(1 << 14),
            trials: Vec::with_capacity(16),
            parked: VecDeque::with_capacity(PARKED_MAX),
            pool: Vec::new(),
            recent_ids: VecDeque::with_capacity(RECENT_IDS),
            recent_set: HashSet::with_capacity(RECENT_IDS),
            counters: Counters::default(),
            us_post: Vec::new(),
            us_decoded: Vec::new(),
            us_acc: Vec::new(),
            us_info: Vec::new(),
            scratch_s: Vec::new(),
        };
        e.apply_config(config)?;
        Ok(e)
    }

    fn apply_config(&mut self, c: EngineConfig) -> Result<(), EngineError> {
        let p = &c.policy;
        p.check().map_err(EngineError::Config)?;
        c.role.check().map_err(EngineError::Config)?;
        if !(c.history_s.is_finite() && c.history_s >= 0.0 && c.history_s <= 3600.0) {
            return Err(EngineError::Config(format!(
                "history {} s must be in [0, 3600]",
                c.history_s
            )));
        }
        let ns = self.model.n_stimuli();
        self.ln_prior = match &c.prior {
            None => self.model.ln_prior().to_vec(),
            Some(p) => {
                check_prior(p, ns).map_err(EngineError::Config)?;
                let s: f64 = p.iter().sum();
                p.iter().map(|x| (x / s).ln()).collect()
            }
        };
        // A bin b may decide once (b + 1)·Δ ≥ minimum time.
        self.min_bin = min_bin_for(p.min_time_s, self.model.bin_width_s());
        self.history_ticks = (c.history_s * c.tick_rate_hz).round() as i64;
        self.local = c.role.local_blocks(&self.model);
        self.config = c;
        Ok(())
    }

    /// Current configuration.
    pub fn config(&self) -> &EngineConfig {
        &self.config
    }
    /// Changes decoder, policy or prior; applies to trials opened from now on.
    pub fn set_config(&mut self, c: EngineConfig) -> Result<(), EngineError> {
        if c.tick_rate_hz != self.config.tick_rate_hz {
            bin_ticks_for(&self.model, c.tick_rate_hz)?;
        }
        let old = self.config.clone();
        let r = self.apply_config(c.clone());
        if r.is_err() {
            let _ = self.apply_config(old);
        } else {
            self.bin_ticks = bin_ticks_for(&self.model, c.tick_rate_hz)?;
        }
        r
    }
    /// The model new trials open with.
    pub fn model(&self) -> &Arc<PreparedModel> {
        &self.model
    }
    /// Replaces the model for trials opened from now on; open trials finish on their own model.
    /// A prior override that no longer fits the stimuli is dropped.
    pub fn set_model(&mut self, model: Arc<PreparedModel>) -> Result<(), EngineError> {
        let bt = bin_ticks_for(&model, self.config.tick_rate_hz)?;
        let same_shape =
            model.units() == self.model.units() && model.stimuli() == self.model.stimuli();
        if !same_shape {
            self.tally = UnitTally::new(model.units(), model.n_stimuli());
        }
        let mut c = self.config.clone();
        if c.prior
            .as_ref()
            .is_some_and(|p| p.len() != model.n_stimuli())
        {
            c.prior = None;
        }
        self.model = model;
        self.bin_ticks = bt;
        self.pool.clear();
        self.apply_config(c)
    }
    /// Ticks per bin.
    pub fn bin_ticks(&self) -> i64 {
        self.bin_ticks
    }
    /// Current watermark (i64::MIN before the first).
    pub fn watermark(&self) -> i64 {
        self.watermark
    }
    /// Counters so far.
    pub fn counters(&self) -> &Counters {
        &self.counters
    }
    /// Open trial ids, in opening order.
    pub fn open_trials(&self) -> impl Iterator<Item = u64> + '_ {
        self.trials.iter().map(|t| t.id)
    }
    /// Spikes held (history plus pending): bounded by rate × (history + window).
    pub fn buffered_spikes(&self) -> usize {
        self.spikes.len() + self.pending.len()
    }
    /// The running per-unit tally.
    pub fn tally(&self) -> &UnitTally {
        &self.tally
    }

    /// Opens a trial at `onset` (ticks), optionally with the presented stimulus index.
    /// Bins already complete (onset behind the watermark) are decoded at once.
    pub fn open_trial(
        &mut self,
        id: u64,
        onset: i64,
        presented: Option<u32>,
        sink: &mut dyn EngineSink,
    ) -> Result<(), EngineError> {
        if self.trials.len() >= MAX_OPEN_TRIALS {
            self.counters.trials_over_limit += 1;
            return Err(EngineError::TooManyOpen(id));
        }
        if self.recent_set.contains(&id) || self.trials.iter().any(|t| t.id == id) {
            self.counters.duplicate_trials += 1;
            return Err(EngineError::DuplicateTrial(id));
        }
        if self.watermark != i64::MIN && onset < self.watermark.saturating_sub(self.history_ticks) {
            self.counters.stale_onsets += 1;
            return Err(EngineError::StaleOnset {
                trial: id,
                onset,
                watermark: self.watermark,
            });
        }
        // The window must end inside the tick range (a bogus onset near i64::MAX would wrap).
        if crate::ticks::window_end(onset, self.bin_ticks, self.model.n_bins()).is_none() {
            self.counters.stale_onsets += 1;
            return Err(EngineError::StaleOnset {
                trial: id,
                onset,
                watermark: self.watermark,
            });
        }
        if let Some(p) = presented {
            if p as usize >= self.model.n_stimuli() {
                self.counters.unknown_stimuli += 1;
                return Err(EngineError::UnknownStimulus(p));
            }
        }
        let mut st = match self.pool.pop() {
            Some(st) if Arc::ptr_eq(&st.model, &self.model) => st,
            _ => TrialState::blank(self.model.clone()),
        };
        st.id = id;
        st.onset = onset;
        st.presented = presented;
        st.decoder = self.config.decoder;
        st.reference = self.config.per_cell_reference;
        st.calibrated = self.config.applies_calibration();
        st.threshold = self.config.policy.threshold;
        st.min_bin = self.min_bin;
        st.ln_prior.clone_from(&self.ln_prior);
        st.bin_ticks = self.bin_ticks;
        st.next_bin = 0;
        st.local = self.local.clone();
        st.shard = matches!(
            self.config.role,
            Role::Shard { .. } | Role::ShardSlice { .. }
        );
        st.lost_parts = 0;
        for j in 0..st.awaited.len() {
            let remote =
                matches!(self.config.role, Role::Combiner { .. }) && !st.local.contains(&j);
            let part = self.config.role.part_of_block(&self.model, j);
            let lost = remote && self.lost & (1u64 << part) != 0;
            st.awaited[j] = remote && !lost;
            if lost {
                st.lost_parts |= 1u64 << part;
            }
        }
        st.cursor = self.spikes_base + self.spikes.partition_point(|x| x.0 < onset) as u64;
        self.count_start.ensure(&self.model, st.decoder);
        st.reset_counts(&self.count_start);
        self.counters.trials_opened += 1;
        self.remember_id(id);
        self.trials.push(st);
        if self.watermark != i64::MIN {
            self.run_trials(sink);
        }
        Ok(())
    }

    fn remember_id(&mut self, id: u64) {
        if self.recent_ids.len() == RECENT_IDS {
            if let Some(old) = self.recent_ids.pop_front() {
                self.recent_set.remove(&old);
            }
        }
        self.recent_ids.push_back(id);
        self.recent_set.insert(id);
    }

    /// Accepts one spike. Late spikes and unknown units are counted and refused.
    pub fn spike(&mut self, unit: u32, tick: i64) -> Result<(), EngineError> {
        if tick <= self.watermark {
            self.counters.late_spikes += 1;
            return Err(EngineError::LateSpike {
                unit,
                tick,
                watermark: self.watermark,
            });
        }
        match self.keeps(unit) {
            None => {
                self.counters.unknown_unit_spikes += 1;
                Err(EngineError::UnknownUnit(unit))
            }
            Some(keep) => {
                // A spike of another part's unit is counted (the combiner's counters are the
                // deployment's) but held by the shard computing that part.
                self.counters.spikes += 1;
                if keep {
                    self.pending.push((tick, unit));
                }
                Ok(())
            }
        }
    }

    /// Whether a spike of `unit` is held here: None for a unit of no model in use, Some(false)
    /// for a unit whose blocks another part computes.
    fn keeps(&self, unit: u32) -> Option<bool> {
        let mut known = false;
        if let Some(u) = self.model.unit_index(unit) {
            if self.local.contains(&self.model.block_of(u)) {
                return Some(true);
            }
            known = true;
        }
        for t in &self.trials {
            if Arc::ptr_eq(&t.model, &self.model) {
                continue;
            }
            if let Some(u) = t.model.unit_index(unit) {
                if t.local.contains(&t.model.block_of(u)) {
                    return Some(true);
                }
                known = true;
            }
        }
        known.then_some(false)
    }

    /// Takes a shard's partials for one bin of an open trial (a [`Role::Combiner`] only). The
    /// bin is decoded once the watermark has passed it (for the blocks computed here) and every
    /// awaited block's partial is in; partials may arrive ahead of the watermark.
    pub fn add_partial(
        &mut self,
        p: &Partial<'_>,
        sink: &mut dyn EngineSink,
    ) -> Result<(), EngineError> {
        let stray = EngineError::StrayPartial {
            trial: p.trial,
            bin: p.bin,
            first_block: p.first_block,
        };
        // A log-likelihood may be −∞ (a count the model gives no chance), never NaN or +∞.
        if p.values
            .iter()
            .chain(p.units.map_or(&[][..], |(ll, _)| ll))
            .any(|v| v.is_nan() || *v == f64::INFINITY)
        {
            self.counters.stray_partials += 1;
            return Err(stray);
        }
        let Some(t) = self.trials.iter_mut().find(|t| t.id == p.trial) else {
            // A trial that ended here (cancelled, or its session closed) while the shard's
            // partials were on their way: nothing is missing.
            if self.recent_set.contains(&p.trial) {
                return Ok(());
            }
            self.counters.stray_partials += 1;
            return Err(stray);
        };
        let m = &t.model;
        let (ns, nb) = (m.n_stimuli(), m.n_bins());
        let first = p.first_block as usize;
        let n = p.values.len() / ns;
        // A part given up for this trial (it fell silent, then came back): its bins were
        // combined without it, so what it sends now for the trial is not needed.
        if first < m.n_blocks()
            && t.lost_parts & (1u64 << self.config.role.part_of_block(m, first)) != 0
        {
            return Ok(());
        }
        let ok = p.values.len() == n * ns
            && n > 0
            && first + n <= m.n_blocks()
            && (first..first + n).all(|j| t.awaited[j])
            && p.bin >= t.next_bin
            && (p.bin as usize) < nb
            && p.units.is_none_or(|(ll, k)| {
                let units = m.blocks[first].start..m.blocks[first + n - 1].end;
                p.bin as usize + 1 == nb && ll.len() == units.len() * ns && k.len() == units.len()
            });
        if !ok {
            self.counters.stray_partials += 1;
            return Err(stray);
        }
        let idx = (p.bin - t.next_bin) as usize;
        while t.remote.len() <= idx {
            let mut slot = t
                .spare
                .pop()
                .unwrap_or_else(|| RemoteBin::new(m.n_blocks(), ns));
            slot.clear();
            t.remote.push_back(slot);
        }
        let slot = &mut t.remote[idx];
        slot.values[first * ns..(first + n) * ns].copy_from_slice(p.values);
        for h in &mut slot.have[first..first + n] {
            *h = true;
        }
        slot.spikes = slot.spikes.saturating_add(p.spikes);
        if let Some((ll, k)) = p.units {
            let u0 = m.blocks[first].start;
            t.unit_ll[u0 * ns..u0 * ns + ll.len()].copy_from_slice(ll);
            t.k[u0..u0 + k.len()].copy_from_slice(k);
        }
        self.run_trials(sink);
        Ok(())
    }

    /// A combiner gives up on part `part`: open trials stop waiting for its blocks and so do
    /// trials opened later, until [`Engine::restore_part`]. Its units contribute nothing; every
    /// frame says so in [`Frame::lost_parts`].
    pub fn lose_part(&mut self, part: u32, sink: &mut dyn EngineSink) {
        if part >= MAX_PARTS {
            return;
        }
        self.lost |= 1u64 << part;
        let role = self.config.role;
        for t in &mut self.trials {
            for j in 0..t.awaited.len() {
                if t.awaited[j] && role.part_of_block(&t.model, j) == part {
                    t.awaited[j] = false;
                    t.lost_parts |= 1u64 << part;
                }
            }
        }
        self.run_trials(sink);
    }

    /// Trials opened from now on wait for part `part` again.
    pub fn restore_part(&mut self, part: u32) {
        if part < MAX_PARTS {
            self.lost &= !(1u64 << part);
        }
    }

    /// Parts lost (bit p: part p), as trials opened now would see them.
    pub fn lost_parts(&self) -> u64 {
        self.lost
    }

    /// Sets the presented stimulus of a trial that is open or completed and waiting for its label.
    pub fn label(
        &mut self,
        id: u64,
        stimulus: u32,
        sink: &mut dyn EngineSink,
    ) -> Result<(), EngineError> {
        if let Some(t) = self.trials.iter_mut().find(|t| t.id == id) {
            if stimulus as usize >= t.model.n_stimuli() {
                self.counters.unknown_stimuli += 1;
                return Err(EngineError::UnknownStimulus(stimulus));
            }
            t.presented = Some(stimulus);
            return Ok(());
        }
        if let Some(pos) = self.parked.iter().position(|t| t.id == id) {
            if let Some(mut t) = self.parked.remove(pos) {
                if stimulus as usize >= t.model.n_stimuli() {
                    self.counters.unknown_stimuli += 1;
                    self.parked.insert(pos, t);
                    return Err(EngineError::UnknownStimulus(stimulus));
                }
                t.presented = Some(stimulus);
                self.summarise_units(&t, sink);
                self.recycle(t);
            }
            return Ok(());
        }
        self.counters.unknown_trials += 1;
        Err(EngineError::UnknownTrial(id))
    }

    /// Cancels an open trial; it ends with [`TrialOutcome::Cancelled`] and no per-unit summary.
    pub fn cancel(&mut self, id: u64, sink: &mut dyn EngineSink) -> Result<(), EngineError> {
        match self.trials.iter().position(|t| t.id == id) {
            Some(i) => {
                let t = self.trials.remove(i);
                self.counters.trials_cancelled += 1;
                emit_end(&t, TrialOutcome::Cancelled, sink);
                self.recycle(t);
                Ok(())
            }
            None => {
                self.counters.unknown_trials += 1;
                Err(EngineError::UnknownTrial(id))
            }
        }
    }

    /// Ends every open trial with [`TrialOutcome::Shutdown`].
    pub fn shutdown(&mut self, sink: &mut dyn EngineSink) {
        self.close_all(TrialOutcome::Shutdown, sink);
    }

    /// Ends every open trial with `outcome` (never `Completed`: they did not run their window).
    pub fn close_all(&mut self, outcome: TrialOutcome, sink: &mut dyn EngineSink) {
        while !self.trials.is_empty() {
            let t = self.trials.remove(0);
            self.counters.trials_cancelled += 1;
            emit_end(&t, outcome, sink);
            self.recycle(t);
        }
    }

    /// Advances the watermark: every spike up to and including `watermark` has been given.
    /// Emits a frame for each bin this completes, in trial-opening order.
    pub fn advance(
        &mut self,
        watermark: i64,
        sink: &mut dyn EngineSink,
    ) -> Result<(), EngineError> {
        if watermark < self.watermark {
            self.counters.watermark_backwards += 1;
            return Err(EngineError::WatermarkBackwards {
                from: self.watermark,
                to: watermark,
            });
        }
        self.pending.sort_unstable();
        let cut = self.pending.partition_point(|x| x.0 <= watermark);
        self.spikes.extend(self.pending.drain(..cut));
        self.watermark = watermark;
        self.run_trials(sink);
        // Keep what open trials still need and the history allowance for late onsets.
        let keep_from = self.watermark.saturating_sub(self.history_ticks);
        let min_cursor = self
            .trials
            .iter()
            .map(|t| t.cursor)
            .min()
            .unwrap_or(u64::MAX);
        while let Some(&(tick, _)) = self.spikes.front() {
            if tick < keep_from && self.spikes_base < min_cursor {
                self.spikes.pop_front();
                self.spikes_base += 1;
            } else {
                break;
            }
        }
        Ok(())
    }

    fn run_trials(&mut self, sink: &mut dyn EngineSink) {
        let mut i = 0;
        while i < self.trials.len() {
            let done = {
                let t = &mut self.trials[i];
                run_bins(
                    t,
                    &self.spikes,
                    self.spikes_base,
                    self.watermark,
                    &mut self.counters,
                    sink,
                )
            };
            if done {
                let t = self.trials.remove(i);
                self.counters.trials_completed += 1;
                if t.shard {
                    self.recycle(t);
                    continue;
                }
                emit_end(&t, TrialOutcome::Completed, sink);
                if t.presented.is_some() {
                    self.summarise_units(&t, sink);
                    self.recycle(t);
                } else {
                    if self.parked.len() == PARKED_MAX {
                        if let Some(old) = self.parked.pop_front() {
                            self.counters.labels_missing += 1;
                            self.recycle(old);
                        }
                    }
                    self.parked.push_back(t);
                }
            } else {
                i += 1;
            }
        }
    }

    fn recycle(&mut self, t: TrialState) {
        if Arc::ptr_eq(&t.model, &self.model) && self.pool.len() < 64 {
            self.pool.push(t);
        }
    }

    fn summarise_units(&mut self, t: &TrialState, sink: &mut dyn EngineSink) {
        let Some(presented) = t.presented else { return };
        if t.lost_parts != 0 {
            // Some units contributed nothing to this trial: no per-unit line would be whole.
            return;
        }
        let m = &t.model;
        let (nu, ns) = (m.n_units(), m.n_stimuli());
        self.us_post.resize(nu, 0.0);
        self.us_decoded.resize(nu, 0);
        self.us_acc.resize(nu, 0.0);
        self.us_info.resize(nu, 0.0);
        self.scratch_s.resize(ns, 0.0);
        let same = m.units() == self.tally.units() && ns == self.tally.n_stimuli();
        for u in 0..nu {
            for s in 0..ns {
                self.scratch_s[s] = t.ln_prior[s] + t.unit_ll[u * ns + s];
            }
            softmax_in_place(&mut self.scratch_s);
            let (best, _) = argmax(&self.scratch_s);
            self.us_post[u] = self.scratch_s[presented as usize];
            self.us_decoded[u] = best;
            if same {
                self.tally.record(u, presented, best);
                self.tally.record_count(u, presented, t.k[u]);
            }
        }
        if !same {
            return;
        }
        self.tally.end_trial();
        for u in 0..nu {
            self.us_acc[u] = self.tally.accuracy(u);
            self.us_info[u] = self.tally.info_bits(u);
        }
        sink.unit_summaries(&UnitSummaries {
            trial: t.id,
            presented,
            units: m.units(),
            presented_posterior: &self.us_post,
            decoded: &self.us_decoded,
            accuracy: &self.us_acc,
            info_bits: &self.us_info,
            n_trials: self.tally.n_trials(),
            tally: &self.tally,
            model: m,
        });
    }
}

/// The top entry and its value (the first one on ties; see [`crate::special::argmax`]).
#[inline]
fn argmax(p: &[f64]) -> (u32, f64) {
    let i = crate::special::argmax(p);
    (i as u32, p.get(i).copied().unwrap_or(f64::NEG_INFINITY))
}

fn emit_end(t: &TrialState, outcome: TrialOutcome, sink: &mut dyn EngineSink) {
    sink.trial_end(&TrialEnd {
        trial: t.id,
        onset: t.onset,
        presented: t.presented,
        outcome,
        decision: t.decision,
        spikes: t.spikes(),
        posterior: &t.post,
        bins: t.next_bin,
    });
}

/// How many spikes ahead of the one being applied the engine asks for table rows.
const PREFETCH_AHEAD: usize = 6;

/// Hints the cache to load the rows a spike of unit `u` in bin `b` will read or update.
#[inline]
fn prefetch_rows(m: &PreparedModel, t: &TrialState, u: usize, b: usize) {
    let ns = m.n_stimuli();
    let row = (u * m.n_bins() + b) * ns;
    prefetch(&m.ln_q[row..row + ns]);
    prefetch(&t.unit_ll[u * ns..(u + 1) * ns]);
    if t.decoder == Decoder::OrderStats && m.unit_all_negbin[u] {
        prefetch(&t.cconst[u * ns..(u + 1) * ns]);
        if let Some(r) = m.nb_step_row(u, t.k[u] + 1) {
            prefetch(r);
        }
    }
}

/// How many units ahead the per-bin passes ask for a unit's rows.
const UNIT_PREFETCH_AHEAD: usize = 16;

/// Calls `f` on units `unit_at(0..n)` in order, calling `ahead` on the unit
/// [`UNIT_PREFETCH_AHEAD`] places later first, so its rows are on their way when its turn comes.
#[inline(always)]
fn each_prefetching(
    n: usize,
    unit_at: impl Fn(usize) -> usize,
    mut ahead: impl FnMut(usize),
    mut f: impl FnMut(usize),
) {
    for i in 0..n {
        if i + UNIT_PREFETCH_AHEAD < n {
            ahead(unit_at(i + UNIT_PREFETCH_AHEAD));
        }
        f(unit_at(i));
    }
}

/// Prefetches every cache line of `xs` (no effect on targets without a prefetch hint).
#[inline(always)]
fn prefetch(xs: &[f64]) {
    #[cfg(target_arch = "x86_64")]
    for line in xs.chunks(8) {
        // SAFETY: a prefetch hint never faults and does not change memory; the address is a
        // valid element of `xs`.
        unsafe {
            std::arch::x86_64::_mm_prefetch::<{ std::arch::x86_64::_MM_HINT_T0 }>(
                line.as_ptr() as *const i8
            )
        };
    }
    #[cfg(not(target_arch = "x86_64"))]
    let _ = xs;
}

/// Decodes every bin of `t` the watermark has completed. Returns true when the window is done.
fn run_bins(
    t: &mut TrialState,
    spikes: &VecDeque<(i64, u32)>,
    base: u64,
    watermark: i64,
    counters: &mut Counters,
    sink: &mut dyn EngineSink,
) -> bool {
    let m = t.model.clone();
    let (ns, nb) = (m.n_stimuli(), m.n_bins());
    while (t.next_bin as usize) < nb {
        let b = t.next_bin as usize;
        let bin_end = t.onset + (b as i64 + 1) * t.bin_ticks; // exclusive
                                                              // A combiner computing no block of its own is driven by the partials alone.
        if !t.local.is_empty() && watermark < bin_end - 1 {
            return false;
        }
        if !t.shard && !t.remote_ready() {
            return false;
        }
        // Spikes of this bin.
        loop {
            let pos = (t.cursor - base) as usize;
            let Some(&(tick, unit)) = spikes.get(pos) else {
                break;
            };
            if tick >= bin_end {
                break;
            }
            t.cursor += 1;
            // The rows a spike a few places ahead will touch are scattered over tables far
            // larger than the caches: ask for them now so their loads overlap this spike's work.
            if let Some(&(ahead_tick, ahead_unit)) = spikes.get(pos + PREFETCH_AHEAD) {
                if ahead_tick < bin_end && ahead_tick >= t.onset {
                    if let Some(ua) = m.unit_index(ahead_unit) {
                        if t.local.contains(&m.block_of(ua)) {
                            prefetch_rows(&m, t, ua, b);
                        }
                    }
                }
            }
            // A trial opened before its onset (the onset announced ahead of the watermark)
            // has a cursor placed before the spikes that arrived in between: not its spikes.
            if tick < t.onset {
                continue;
            }
            let Some(u) = m.unit_index(unit) else {
                continue;
            };
            let j = m.block_of(u);
            if !t.local.contains(&j) {
                continue;
            }
            t.k[u] += 1;
            if t.k[u] == 1 {
                t.active[m.blocks[j].start + t.active_n[j] as usize] = u as u32;
                t.active_n[j] += 1;
            }
            t.total_spikes += 1;
            let row = (u * nb + b) * ns;
            let k = t.k[u];
            let lq = &m.ln_q[row..row + ns];
            let cells = u * ns..(u + 1) * ns;
            let blk = j * ns..(j + 1) * ns;
            for ((ll, ps), q) in t.unit_ll[cells.clone()]
                .iter_mut()
                .zip(&mut t.pop_spike[blk.clone()])
                .zip(lq)
            {
                *ll += q;
                *ps += q;
            }
            // The count constant rises by a per-cell constant for Poisson cells (ln μ; 0 for
            // COM-Poisson/empirical cells, whose count term lives in `table.rs`) and for the
            // inhomogeneous Poisson decoder: one branch-free pass over the unit's row.
            let inc = match t.decoder {
                Decoder::InhomogeneousPoisson => Some(&m.ln_means[cells.clone()]),
                Decoder::OrderStats if !m.unit_has_negbin[u] => {
                    Some(&m.poisson_ln_mean[cells.clone()])
                }
                Decoder::OrderStats if m.unit_all_negbin[u] => m.nb_step_row(u, k),
                _ => None,
            };
            match inc {
                Some(inc) => {
                    for ((c, sum), d) in t.cconst[cells].iter_mut().zip(&mut t.cc_sum[blk]).zip(inc)
                    {
                        *c += d;
                        *sum += d;
                    }
                }
                None => {
                    for s in 0..ns {
                        let i = u * ns + s;
                        let old = t.cconst[i];
                        t.cconst[i] = next_count_const(&m, t.decoder, u, s, k, old);
                        t.cc_sum[j * ns + s] += t.cconst[i] - old;
                    }
                }
            }
        }
        let last = b + 1 == nb;
        for j in t.local.clone() {
            block_partial(t, &m, j, b, last);
        }
        if t.shard {
            if last {
                // The last partial carries them to the combiner.
                full_window_unit_ll(t, &m, b);
            }
            let units = local_units(&m, &t.local);
            if !t.local.is_empty() {
                sink.partial(&Partial {
                    trial: t.id,
                    bin: b as u32,
                    first_block: t.local.start as u32,
                    values: &t.blk_ll[t.local.start * ns..t.local.end * ns],
                    spikes: t.total_spikes,
                    units: last.then(|| {
                        (
                            &t.unit_ll[units.start * ns..units.end * ns],
                            &t.k[units.clone()],
                        )
                    }),
                });
            }
            t.next_bin += 1;
            continue;
        }
        // The population sum: block partials added in block order, wherever they were computed.
        let mut first = true;
        {
            let slot = t.remote.front();
            for j in 0..t.awaited.len() {
                let row = if t.local.contains(&j) {
                    &t.blk_ll[j * ns..(j + 1) * ns]
                } else if let (true, Some(slot)) = (t.awaited[j], slot) {
                    &slot.values[j * ns..(j + 1) * ns]
                } else {
                    continue;
                };
                if first {
                    t.ll.copy_from_slice(row);
                    first = false;
                } else {
                    for (l, x) in t.ll.iter_mut().zip(row) {
                        *l += x;
                    }
                }
            }
        }
        if first {
            t.ll.iter_mut().for_each(|l| *l = 0.0);
        }
        if let Some(slot) = t.remote.pop_front() {
            t.remote_spikes = slot.spikes;
            t.spare.push(slot);
        }
        let cal = m.calibration();
        let (beta, floor) = match cal.factors.get(b) {
            Some(&f) if t.calibrated => (f, cal.floor),
            _ if t.calibrated => (1.0, cal.floor),
            _ => (1.0, 0.0),
        };
        posterior_into(&t.ln_prior, &t.ll, beta, floor, &mut t.post);
        let (top, top_p) = argmax(&t.post);
        counters.frames += 1;
        sink.frame(&Frame {
            trial: t.id,
            bin: b as u32,
            bin_end_tick: bin_end - 1,
            posterior: &t.post,
            log_likelihood: &t.ll,
            top,
            top_posterior: top_p,
            entropy_bits: entropy_bits(&t.post),
            spikes: t.spikes(),
            lost_parts: t.lost_parts,
        });
        if t.decision.is_none() {
            let reason = if t.decoder != Decoder::CountOnly
                && fires(b, t.min_bin as usize, top_p, t.threshold)
            {
                Some(DecisionReason::Threshold)
            } else if last {
                Some(DecisionReason::WindowEnd)
            } else {
                None
            };
            if let Some(reason) = reason {
                let d = Decision {
                    trial: t.id,
                    stimulus: top,
                    posterior: top_p,
                    bin: b as u32,
                    bin_end_tick: bin_end - 1,
                    reason,
                    presented: t.presented,
                    threshold: t.threshold,
                };
                t.decision = Some(d);
                counters.decisions += 1;
                sink.decision(&d);
            }
        }
        if last {
            // Only after the frame and the decision: these feed the unit summaries alone, and a
            // closed-loop program waits for this bin's decision (the pass costs ~1.3 ms at
            // 4096 × 64; BENCHMARKS, "The window's last bin").
            full_window_unit_ll(t, &m, b);
        }
        t.next_bin += 1;
    }
    true
}

/// Each local unit's full-window log-likelihood at the window's last bin `b`, into
/// `t.unit_ll`, kept for the per-unit summaries.
fn full_window_unit_ll(t: &mut TrialState, m: &PreparedModel, b: usize) {
    let ns = m.n_stimuli();
    for u in local_units(m, &t.local) {
        let k = t.k[u];
        for s in 0..ns {
            let i = u * ns + s;
            t.unit_ll[i] = match t.decoder {
                Decoder::CountOnly => m.dists[i].ln_pmf(k),
                dec => t.unit_ll[i] + count_term(m, dec, u, s, b, k, t.cconst[i]),
            };
        }
    }
}

/// The units of a range of blocks, as a unit index range.
fn local_units(m: &Model, blocks: &std::ops::Range<usize>) -> std::ops::Range<usize> {
    if blocks.is_empty() {
        return 0..0;
    }
    m.blocks[blocks.start].start..m.blocks[blocks.end - 1].end
}

/// A block's partial before its spiking units' terms: the spikes' `Σ ln q`, the count
/// constants and the block's per-bin silence sums, stimulus by stimulus.
#[inline]
fn silent_sum(out: &mut [f64], pop_spike: &[f64], cc_sum: &[f64], sums: &[f64]) {
    for (((l, p), c), x) in out.iter_mut().zip(pop_spike).zip(cc_sum).zip(sums) {
        *l = p + c + x;
    }
}

/// Block `j`'s partial log-likelihood at the end of bin `b`, into `t.blk_ll`: the same
/// mathematics as a whole-population pass, over the block's units only.
fn block_partial(t: &mut TrialState, m: &PreparedModel, j: usize, b: usize, last: bool) {
    let (nu, ns) = (m.n_units(), m.n_stimuli());
    let units = m.blocks[j].clone();
    let row = j * ns..(j + 1) * ns;
    match t.decoder {
        Decoder::CountOnly => {
            let out = &mut t.blk_ll[row];
            out.iter_mut().for_each(|l| *l = 0.0);
            if last {
                for u in units {
                    for (s, l) in out.iter_mut().enumerate() {
                        *l += m.dists[u * ns + s].ln_pmf(t.k[u]);
                    }
                }
            }
        }
        dec if t.reference => {
            t.blk_ll[row.clone()].copy_from_slice(&t.pop_spike[row.clone()]);
            for u in units {
                let k = t.k[u];
                let cc = &t.cconst[u * ns..(u + 1) * ns];
                for (s, (l, c)) in t.blk_ll[row.clone()].iter_mut().zip(cc).enumerate() {
                    *l += count_term(m, dec, u, s, b, k, *c);
                }
            }
        }
        Decoder::InhomogeneousPoisson => {
            let sums = &m.rate_sum[m.block_bin_row(j, b)];
            let out = &mut t.blk_ll[row.clone()];
            silent_sum(out, &t.pop_spike[row.clone()], &t.cc_sum[row], sums);
        }
        Decoder::OrderStats => {
            let sums = &m.order_stats_sum[m.block_bin_row(j, b)];
            let out = &mut t.blk_ll[row.clone()];
            silent_sum(out, &t.pop_spike[row.clone()], &t.cc_sum[row.clone()], sums);
            let act = &t.active[units.start..units.start + t.active_n[j] as usize];
            let k = &t.k;
            // Negative binomial cells of units that have spiked: the k-dependent part.
            // Once most of the block's units have spiked, walk them in order so this bin's rows
            // of `g` stream from memory; before that, only the spiking ones.
            let nb_term = |out: &mut [f64], u: usize| {
                let k = k[u];
                if k == 0 || !m.unit_has_negbin[u] {
                    return;
                }
                let k = k as f64;
                let r = (b * nu + u) * ns;
                let g = &m.nb_g[r..r + ns];
                if m.unit_all_negbin[u] {
                    for (p, g) in out.iter_mut().zip(g) {
                        *p -= k * g;
                    }
                } else {
                    let kernels = &m.kernels[u * ns..(u + 1) * ns];
                    for ((l, g), kernel) in out.iter_mut().zip(g).zip(kernels) {
                        if let CellKernel::NegBin { .. } = kernel {
                            *l -= k * g;
                        }
                    }
                }
            };
            if m.any_negbin && 2 * act.len() > units.len() {
                // This bin's rows of `g` are one contiguous run over the units (and the next
                // block's follow): ask for the row a few units ahead, past this block's end too.
                // The hardware's own prefetch does not keep up with this stream (a dense bin
                // took twice as long without it: BENCHMARKS, "Engine threads").
                for u in units.clone() {
                    let ahead = (b * nu + u + UNIT_PREFETCH_AHEAD) * ns;
                    if let Some(row) = m.nb_g.get(ahead..ahead + ns) {
                        prefetch(row);
                    }
                    nb_term(out, u);
                }
            } else if m.any_negbin {
                each_prefetching(
                    act.len(),
                    |i| act[i] as usize,
                    |u| {
                        if k[u] > 0 && m.unit_has_negbin[u] {
                            prefetch(&m.nb_g[(b * nu + u) * ns..(b * nu + u + 1) * ns]);
                        }
                    },
                    |u| nb_term(out, u),
                );
            }
            // Table families: silent units through the per-block sums, units that have
            // spiked through their correction.
            let tp = m.table_prep();
            let lo = tp.units.partition_point(|&u| u < units.start);
            let hi = tp.units.partition_point(|&u| u < units.end);
            if lo < hi {
                for (p, s0) in out.iter_mut().zip(&tp.sum0[m.block_bin_row(j, b)]) {
                    *p += s0;
                }
                let acc = &mut t.table_acc;
                let mut add = |u: usize| {
                    if k[u] > 0 && tp.slot[u] != NO_SLOT {
                        tp.add_unit(m, u, b, k[u], out, acc);
                    }
                };
                let ahead = |u: usize| {
                    if k[u] > 0 && tp.slot[u] != NO_SLOT {
                        prefetch(tp.row_for(u, b, k[u], ns));
                    }
                };
                if act.len() < hi - lo {
                    each_prefetching(act.len(), |i| act[i] as usize, ahead, &mut add);
                } else {
                    let tu = &tp.units[lo..hi];
                    each_prefetching(tu.len(), |i| tu[i], ahead, &mut add);
                }
                t.table_acc.flush_into(out);
            }
        }
    }
}
