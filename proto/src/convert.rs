//! Engine outputs as wire messages, and back: posterior frames, decisions, and the partial
//! log-likelihoods shards send their combiner. The daemon publishes with these; the shard link
//! and its tests decode with them.
//!
//! Must not: decide, reorder or drop anything.

use crate::v1;
use auspex_engine::engine::{Decision, DecisionReason, Frame, OwnedPartial, Partial};

/// The published form of a posterior frame.
pub fn frame_msg(f: &Frame<'_>) -> v1::PosteriorFrame {
    v1::PosteriorFrame {
        trial: f.trial,
        bin: f.bin,
        bin_end_tick: f.bin_end_tick,
        posterior: f.posterior.to_vec(),
        top: f.top,
        top_posterior: f.top_posterior,
        entropy_bits: f.entropy_bits,
        spikes: f.spikes,
        missing_parts: f.lost_parts,
    }
}

/// The published form of a decision, named in the order of the trial's model.
pub fn decision_msg(d: &Decision, stimuli: &[String]) -> v1::DecisionEvent {
    v1::DecisionEvent {
        trial: d.trial,
        stimulus: d.stimulus,
        stimulus_name: stimuli
            .get(d.stimulus as usize)
            .cloned()
            .unwrap_or_default(),
        posterior: d.posterior,
        bin: d.bin,
        reason: match d.reason {
            DecisionReason::Threshold => v1::DecisionReason::Threshold,
            DecisionReason::WindowEnd => v1::DecisionReason::WindowEnd,
        } as i32,
        presented: d
            .presented
            .and_then(|p| stimuli.get(p as usize).cloned())
            .unwrap_or_default(),
        bin_end_tick: d.bin_end_tick,
    }
}

/// A shard's partial as it travels to the combiner.
pub fn partial_msg(p: &Partial<'_>) -> v1::ShardPartial {
    let (unit_ll, unit_counts) = p
        .units
        .map(|(l, k)| (l.to_vec(), k.to_vec()))
        .unwrap_or_default();
    v1::ShardPartial {
        trial: p.trial,
        bin: p.bin,
        first_block: p.first_block,
        values: p.values.to_vec(),
        spikes: p.spikes,
        last: p.units.is_some(),
        unit_ll,
        unit_counts,
    }
}

/// A shard's partial as the combiner's engine takes it (the engine checks its shape).
pub fn partial_from_msg(p: v1::ShardPartial) -> OwnedPartial {
    OwnedPartial {
        trial: p.trial,
        bin: p.bin,
        first_block: p.first_block,
        values: p.values,
        spikes: p.spikes,
        units: p.last.then_some((p.unit_ll, p.unit_counts)),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_partial_survives_the_wire_bit_for_bit() {
        let values = [0.1, -1e-300, f64::MIN_POSITIVE, -7.25];
        let (ll, k) = ([1.5, -2.0, 3.0, 0.0], [3u32, 0]);
        for units in [None, Some((&ll[..], &k[..]))] {
            let p = Partial {
                trial: 7,
                bin: 3,
                first_block: 2,
                values: &values,
                spikes: 11,
                units,
            };
            let bytes = prost::Message::encode_to_vec(&partial_msg(&p));
            let back = partial_from_msg(prost::Message::decode(bytes.as_slice()).unwrap());
            assert_eq!(back, OwnedPartial::copied(&p, Vec::new()));
        }
    }
}
