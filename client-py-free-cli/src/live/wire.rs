//! Session recordings read from files (the conversions themselves live in
//! `auspex_proto::recording`), and the replay command's unit ranges.

pub use auspex_proto::recording::{
    dataset_messages, select_messages, watermark_of, RecordedSession,
};
#[cfg(test)]
use auspex_proto::v1::{self, inbound::Body};

/// Reads a session recording (`.apxs`).
pub fn read_recording(path: &std::path::Path) -> anyhow::Result<RecordedSession> {
    let bytes =
        std::fs::read(path).map_err(|e| anyhow::anyhow!("{}: cannot read: {e}", path.display()))?;
    let contents = auspex_proto::session::read_session(&bytes)
        .map_err(|e| anyhow::anyhow!("{}: {e}", path.display()))?;
    if let Some(p) = &contents.tail_problem {
        eprintln!(
            "note: {}: the last record is torn ({p}); every complete record before it was read",
            path.display()
        );
    }
    auspex_proto::recording::decode_recording(contents)
        .map_err(|e| anyhow::anyhow!("{}: {e}", path.display()))
}

/// Unit ids from `101-112,130` (ranges inclusive).
pub fn parse_unit_ranges(text: &str) -> anyhow::Result<std::collections::BTreeSet<u32>> {
    let mut out = std::collections::BTreeSet::new();
    for part in text.split(',').map(str::trim).filter(|p| !p.is_empty()) {
        let num = |x: &str| {
            x.trim()
                .parse::<u32>()
                .map_err(|_| anyhow::anyhow!("--units {text}: `{x}` is not a unit id"))
        };
        match part.split_once('-') {
            Some((a, b)) => {
                let (a, b) = (num(a)?, num(b)?);
                if a > b || b - a > 1_000_000 {
                    anyhow::bail!("--units {text}: `{part}` is not a range from low to high");
                }
                out.extend(a..=b);
            }
            None => {
                out.insert(num(part)?);
            }
        }
    }
    if out.is_empty() {
        anyhow::bail!("--units {text}: no unit id given");
    }
    Ok(out)
}

#[cfg(test)]
mod selection_tests {
    use super::*;

    #[test]
    fn a_replay_share_keeps_its_units_every_watermark_and_the_session_ends() {
        let ids = parse_unit_ranges("101-103, 130").unwrap();
        assert_eq!(
            ids.iter().copied().collect::<Vec<_>>(),
            [101, 102, 103, 130]
        );
        assert!(parse_unit_ranges("5-2").is_err() && parse_unit_ranges("x").is_err());
        let m = |body| v1::Inbound {
            sender: "s".into(),
            seq: 0,
            body: Some(body),
        };
        let msgs = vec![
            m(Body::SessionStart(Default::default())),
            m(Body::Onset(Default::default())),
            m(Body::Spikes(v1::SpikeBatch {
                units: vec![101, 200, 130],
                ticks: vec![1, 2, 3],
                complete_through: 9,
            })),
            m(Body::Heartbeat(v1::Heartbeat {
                complete_through: 19,
            })),
            m(Body::Label(Default::default())),
            m(Body::EndOfStream(Default::default())),
        ];
        let spikes = select_messages(msgs.clone(), Some(&ids), Some("spikes"), "acq-a");
        let kinds = |v: &[v1::Inbound]| -> Vec<&'static str> {
            v.iter()
                .map(|m| match m.body.as_ref().unwrap() {
                    Body::SessionStart(_) => "start",
                    Body::Onset(_) => "onset",
                    Body::Spikes(_) => "spikes",
                    Body::Heartbeat(_) => "beat",
                    Body::Label(_) => "label",
                    Body::EndOfStream(_) => "end",
                    _ => "other",
                })
                .collect()
        };
        assert_eq!(kinds(&spikes), ["start", "spikes", "beat", "end"]);
        match spikes[1].body.as_ref().unwrap() {
            Body::Spikes(b) => {
                assert_eq!(
                    (&b.units[..], &b.ticks[..], b.complete_through),
                    (&[101, 130][..], &[1, 3][..], 9)
                )
            }
            _ => unreachable!(),
        }
        assert!(spikes
            .iter()
            .enumerate()
            .all(|(i, m)| m.sender == "acq-a" && m.seq == i as u64 + 1));
        let trials = select_messages(msgs, None, Some("trials"), "task");
        assert_eq!(kinds(&trials), ["start", "onset", "label", "end"]);
    }
}
