//! The engine thread's part in a deployment across machines (`shard_link.rs` holds the
//! sockets): a combiner relays trial messages to its shards and turns their reports into
//! `lose_part`/`restore_part`/`add_partial`; a shard applies relayed messages with the
//! combiner's decoder.
//!
//! Must not: block on a link task (relays are unbounded sends; partials `try_send`).

use super::*;

impl EngineThread {
    /// A combiner relays what its shards need of a message it applies: everything but spikes
    /// and heartbeats (which belong to each shard's own acquisition). Spikes reaching a
    /// combiner are counted: their units are decoded by no one here.
    pub(super) fn relay(&mut self, body: &inbound::Body, bytes: &Bytes) {
        let Link::Combine {
            shards,
            misrouted_spikes,
            ..
        } = &mut self.link
        else {
            return;
        };
        match body {
            inbound::Body::Spikes(b) => {
                *misrouted_spikes += b.units.len() as u64;
                if self.log.allow("misrouted") {
                    tracing::warn!(
                        spikes = b.units.len(),
                        "spikes reached the combiner: send each acquisition machine's spikes to its shard's ingest"
                    );
                }
            }
            inbound::Body::Heartbeat(_) => {}
            _ => {
                let item = crate::shard_link::RelayItem {
                    relay: v1::ShardRelay {
                        inbound: bytes.to_vec(),
                        decoder: self.config.decoder.name().into(),
                    },
                    session_start: matches!(body, inbound::Body::SessionStart(_)),
                };
                for s in shards.iter() {
                    let _ = s.relay.send(item.clone());
                }
            }
        }
    }

    /// A shard applies a relayed message with the combiner's decoder.
    pub(super) fn relayed(&mut self, bytes: Bytes, decoder: &str, received_ns: i64) {
        self.last_from_link = Instant::now();
        if let Some(d) = auspex_engine::engine::Decoder::parse(decoder) {
            if d != self.config.decoder {
                let mut c = self.config.clone();
                c.decoder = d;
                if let Err(e) = self.apply_config(c) {
                    tracing::warn!(error = %e, "cannot take the combiner's decoder");
                }
            }
        }
        self.inbound(RELAY_ENDPOINT, bytes, received_ns);
    }

    /// A combiner's link tasks report: a shard joined, was lost, or sent a partial.
    pub(super) fn shard_event(&mut self, ev: ShardEvent) {
        let Link::Combine {
            shards,
            lost_events,
            ..
        } = &mut self.link
        else {
            return;
        };
        match ev {
            ShardEvent::Joined { part } => {
                let Some(v) = shards.get_mut(part as usize) else {
                    return;
                };
                tracing::info!(part, endpoint = %v.endpoint, rejoined = v.lost, "shard joined: its units count from the next trial");
                v.joined = true;
                v.lost = false;
                v.note.clear();
                if let Some(e) = self.engine.as_mut() {
                    e.restore_part(part);
                }
            }
            ShardEvent::Lost { part, why } => {
                let Some(v) = shards.get_mut(part as usize) else {
                    return;
                };
                tracing::error!(part, endpoint = %v.endpoint, "shard lost: {why}; its units contribute nothing until it rejoins (frames say which parts they lack)");
                v.joined = false;
                v.lost = true;
                v.times_lost += 1;
                v.note = why;
                *lost_events += 1;
                if let Some(e) = self.engine.as_mut() {
                    let mut sink = pub_sink!(self);
                    e.lose_part(part, &mut sink);
                }
            }
            ShardEvent::Partial { part, partial } => {
                self.last_from_link = Instant::now();
                if let Some(v) = shards.get_mut(part as usize) {
                    v.partials += 1;
                }
                let parts = shards.len() as u32;
                let Some(e) = self.engine.as_mut() else {
                    return;
                };
                let own = e.model().part_blocks(part, parts);
                let n = partial.values.len() / e.model().n_stimuli().max(1);
                let first = partial.first_block as usize;
                let mut sink = pub_sink!(self);
                let r = if first >= own.start && first + n <= own.end {
                    e.add_partial(&partial.as_partial(), &mut sink)
                } else {
                    Err(EngineError::StrayPartial {
                        trial: partial.trial,
                        bin: partial.bin,
                        first_block: partial.first_block,
                    })
                };
                if let Err(err) = r {
                    self.warn("stray-partial", || format!("shard part {part}: {err}"));
                }
            }
        }
    }

    /// A fresh engine of a combiner starts without the shards that are lost.
    pub(super) fn mark_lost_shards(&mut self) {
        let Link::Combine { shards, .. } = &self.link else {
            return;
        };
        let lost: Vec<u32> = (0..shards.len() as u32)
            .filter(|&p| shards[p as usize].lost)
            .collect();
        if let Some(e) = self.engine.as_mut() {
            let mut sink = pub_sink!(self);
            for p in lost {
                e.lose_part(p, &mut sink);
            }
        }
    }
}
