//! `auspex send`: a bridge for acquisition and task programs in any language. It reads plain
//! text lines — from standard input, a named pipe, or a file being appended to (`--follow`) —
//! and sends them to the daemon's ingest as `Inbound` messages with the sender's name and
//! sequence numbers. The line format (one message or spike per line; `#` starts a comment):
//!
//! ```text
//! session TICKS_PER_S [UNIT ...] [name=NAME]   declare the clock and units (first)
//! spike UNIT TICK                              a spike, sent with the next `through`
//! through TICK                                 every spike up to TICK has been given
//! onset TRIAL TICK [STIMULUS]                  a stimulus was shown
//! label TRIAL STIMULUS                         name a trial's stimulus later
//! cancel TRIAL [REASON ...]                    abandon a trial
//! units UNIT ... from TICK                     units isolated part-way through
//! end                                          nothing more (sent at end of input too)
//! ```
//!
//! Must not: invent watermarks (silence is evidence only when the producer says `through`), or
//! drop a bad line silently (each is reported with its line number and counted).

use anyhow::Context;
use auspex_proto::v1::{self, inbound::Body};
use bytes::Bytes;
use prost::Message;
use std::io::BufRead;
use std::time::Duration;
use zeromq::{SocketSend, ZmqMessage};

/// Parses one line; spikes accumulate in `pending` until a `through` line sends them.
/// `Ok(None)`: nothing to send yet (a spike, a blank line or a comment).
pub fn parse_line(line: &str, pending: &mut Vec<(u32, i64)>) -> Result<Option<Body>, String> {
    let line = line.split('#').next().unwrap_or("").trim();
    let mut w = line.split_whitespace();
    let Some(kind) = w.next() else {
        return Ok(None);
    };
    let rest: Vec<&str> = w.collect();
    let int = |s: Option<&&str>, what: &str| -> Result<i64, String> {
        let s = s.ok_or_else(|| format!("`{kind}` needs {what}"))?;
        s.parse::<i64>()
            .map_err(|_| format!("`{kind}`: {what} `{s}` is not an integer"))
    };
    let id = |s: Option<&&str>, what: &str| -> Result<u64, String> {
        let s = s.ok_or_else(|| format!("`{kind}` needs {what}"))?;
        s.parse::<u64>()
            .map_err(|_| format!("`{kind}`: {what} `{s}` is not a non-negative integer"))
    };
    let unit = |s: &str| -> Result<u32, String> {
        s.parse::<u32>()
            .map_err(|_| format!("`{kind}`: unit `{s}` is not a unit id"))
    };
    match kind {
        "session" => {
            let rate: f64 = rest
                .first()
                .ok_or("`session` needs the clock in ticks per second")?
                .parse()
                .map_err(|_| format!("`session`: clock `{}` is not a number", rest[0]))?;
            let mut units = Vec::new();
            let mut name = String::new();
            let mut stimuli = Vec::new();
            for r in &rest[1..] {
                if let Some(n) = r.strip_prefix("name=") {
                    name = n.to_string();
                } else if let Some(list) = r.strip_prefix("stimuli=") {
                    stimuli = list.split(',').map(str::to_string).collect();
                    if stimuli.iter().any(String::is_empty) {
                        return Err(format!("`session`: `{r}` names an empty stimulus"));
                    }
                } else {
                    units.push(unit(r)?);
                }
            }
            Ok(Some(Body::SessionStart(v1::SessionStart {
                stimuli,
                tick_rate_hz: rate,
                units,
                session_name: name,
                learn_in_step: false,
            })))
        }
        "spike" => {
            if rest.len() != 2 {
                return Err("`spike` takes UNIT TICK".into());
            }
            pending.push((unit(rest[0])?, int(rest.get(1), "a tick")?));
            Ok(None)
        }
        "through" => {
            let t = int(rest.first(), "a tick")?;
            if pending.is_empty() {
                Ok(Some(Body::Heartbeat(v1::Heartbeat {
                    complete_through: t,
                })))
            } else {
                let (units, ticks) = pending.drain(..).unzip();
                Ok(Some(Body::Spikes(v1::SpikeBatch {
                    units,
                    ticks,
                    complete_through: t,
                })))
            }
        }
        "onset" => Ok(Some(Body::Onset(v1::TrialOnset {
            trial: id(rest.first(), "a trial id")?,
            onset_tick: int(rest.get(1), "an onset tick")?,
            stimulus: rest.get(2).map(|s| s.to_string()).unwrap_or_default(),
        }))),
        "label" => Ok(Some(Body::Label(v1::TrialLabel {
            trial: id(rest.first(), "a trial id")?,
            stimulus: rest
                .get(1)
                .ok_or("`label` needs TRIAL STIMULUS")?
                .to_string(),
        }))),
        "cancel" => Ok(Some(Body::Cancel(v1::TrialCancel {
            trial: id(rest.first(), "a trial id")?,
            reason: rest.get(1..).map(|r| r.join(" ")).unwrap_or_default(),
        }))),
        "units" => {
            let at = rest
                .iter()
                .position(|r| *r == "from")
                .ok_or("`units` takes UNIT ... from TICK")?;
            Ok(Some(Body::UnitsAdded(v1::UnitsAdded {
                units: rest[..at].iter().map(|u| unit(u)).collect::<Result<_, _>>()?,
                from_tick: int(rest.get(at + 1), "a tick after `from`")?,
            })))
        }
        "end" => Ok(Some(Body::EndOfStream(v1::EndOfStream {}))),
        other => Err(format!(
            "unknown line kind `{other}`: use session, spike, through, onset, label, cancel, units or end"
        )),
    }
}

/// What a `send` run did.
#[derive(Debug, Default, Clone, PartialEq)]
pub struct SendSummary {
    /// Messages sent (the last one is the end of stream).
    pub messages: u64,
    /// Spikes sent.
    pub spikes: u64,
    /// Lines refused (each reported on standard error with its number).
    pub bad_lines: u64,
}

/// Reads lines from `input` until `end` (or the end of input; with `follow`, a file being
/// appended to is polled until an `end` line) and sends them to `to` as `sender`.
pub async fn send(
    input: Box<dyn BufRead + Send>,
    to: &str,
    sender: &str,
    follow: bool,
) -> anyhow::Result<SendSummary> {
    let mut push = crate::live::connect_push(to).await?;
    // Lines are read on a thread of their own: standard input and pipes block.
    let (tx, mut rx) = tokio::sync::mpsc::channel::<(usize, String)>(4096);
    std::thread::spawn(move || {
        let mut input = input;
        let mut n = 0usize;
        let mut buf = String::new();
        loop {
            buf.clear();
            match input.read_line(&mut buf) {
                Ok(0) if follow => std::thread::sleep(Duration::from_millis(5)),
                Ok(0) | Err(_) => break,
                Ok(_) => {
                    n += 1;
                    let end = buf.trim() == "end";
                    if tx.blocking_send((n, buf.clone())).is_err() || end {
                        break;
                    }
                }
            }
        }
    });
    let mut summary = SendSummary::default();
    let mut pending = Vec::new();
    let mut seq = 0u64;
    let mut ended = false;
    let mut interrupted = false;
    let ctrl_c = tokio::signal::ctrl_c();
    tokio::pin!(ctrl_c);
    loop {
        let (n, line) = tokio::select! {
            biased;
            _ = &mut ctrl_c => {
                interrupted = true;
                break;
            }
            next = rx.recv() => match next {
                Some(x) => x,
                None => break,
            },
        };
        match parse_line(&line, &mut pending) {
            Ok(Some(body)) => {
                ended = matches!(body, Body::EndOfStream(_));
                if let Body::Spikes(b) = &body {
                    summary.spikes += b.units.len() as u64;
                }
                seq += 1;
                let m = v1::Inbound {
                    sender: sender.to_string(),
                    seq,
                    body: Some(body),
                };
                push.send(ZmqMessage::from(Bytes::from(m.encode_to_vec())))
                    .await
                    .context("sending to the daemon")?;
                summary.messages += 1;
                if ended {
                    break;
                }
            }
            Ok(None) => {}
            Err(e) => {
                summary.bad_lines += 1;
                if summary.bad_lines <= 20 {
                    eprintln!("line {n}: {e}; not sent");
                }
            }
        }
    }
    if !pending.is_empty() {
        eprintln!(
            "{} spikes after the last `through` line were not sent (no promise covered them)",
            pending.len()
        );
    }
    if !ended {
        seq += 1;
        crate::live::end_stream(&mut push, sender, seq).await?;
        summary.messages += 1;
    } else {
        // Let the socket hand over what it holds before it is dropped (no linger setting).
        tokio::time::sleep(Duration::from_millis(200)).await;
    }
    if interrupted {
        return Err(crate::live::Interrupted(format!(
            "interrupted: sent {} messages ({} spikes) as {sender:?}, the last an end of stream, so the daemon ends the session; a rerun starts a new one",
            summary.messages, summary.spikes
        ))
        .into());
    }
    Ok(summary)
}

/// The lines that describe a dataset, as an acquisition program would print them (1 ms
/// `through` lines; onsets before the batch that contains them, with their stimulus).
pub fn dataset_lines(data: &auspex_engine::Dataset, window_ticks: i64) -> String {
    use std::fmt::Write;
    let mut s = String::new();
    let units: Vec<String> = data.units.iter().map(|u| u.to_string()).collect();
    let _ = writeln!(
        s,
        "session {} {} name=lines",
        data.tick_rate_hz,
        units.join(" ")
    );
    let bt = (data.tick_rate_hz / 1000.0).round().max(1.0) as i64;
    for ev in data.events(bt, window_ticks) {
        match ev {
            auspex_engine::data::Event::Open {
                trial,
                onset,
                stimulus,
            } => {
                let _ = writeln!(s, "onset {trial} {onset} {}", stimulus.unwrap_or_default());
            }
            auspex_engine::data::Event::Batch { spikes, watermark } => {
                for (t, u) in spikes {
                    let _ = writeln!(s, "spike {u} {t}");
                }
                let _ = writeln!(s, "through {watermark}");
            }
        }
    }
    s.push_str("end\n");
    s
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_line_kind_and_every_mistake() {
        let mut p = Vec::new();
        assert!(matches!(
            parse_line("session 30000 3 4 name=rig-2", &mut p),
            Ok(Some(Body::SessionStart(ref s))) if s.units == [3, 4] && s.session_name == "rig-2" && s.tick_rate_hz == 30000.0
        ));
        assert!(matches!(
            parse_line("session 1000 5 stimuli=0,90,180,270", &mut p),
            Ok(Some(Body::SessionStart(ref s))) if s.stimuli == ["0", "90", "180", "270"] && s.units == [5]
        ));
        assert!(parse_line("session 1000 5 stimuli=0,,90", &mut p)
            .unwrap_err()
            .contains("empty stimulus"));
        assert_eq!(parse_line("spike 3 100  # comment", &mut p), Ok(None));
        assert_eq!(parse_line("", &mut p), Ok(None));
        match parse_line("through 120", &mut p) {
            Ok(Some(Body::Spikes(b))) => {
                assert_eq!(
                    (b.units, b.ticks, b.complete_through),
                    (vec![3], vec![100], 120)
                )
            }
            other => panic!("{other:?}"),
        }
        assert!(matches!(
            parse_line("through 130", &mut p),
            Ok(Some(Body::Heartbeat(_)))
        ));
        assert!(matches!(
            parse_line("onset 7 90 N", &mut p),
            Ok(Some(Body::Onset(ref o))) if o.trial == 7 && o.onset_tick == 90 && o.stimulus == "N"
        ));
        assert!(matches!(
            parse_line("label 7 S", &mut p),
            Ok(Some(Body::Label(_)))
        ));
        assert!(matches!(
            parse_line("cancel 7 animal moved", &mut p),
            Ok(Some(Body::Cancel(ref c))) if c.reason == "animal moved"
        ));
        assert!(matches!(
            parse_line("units 9 10 from 5000", &mut p),
            Ok(Some(Body::UnitsAdded(ref u))) if u.units == [9, 10] && u.from_tick == 5000
        ));
        assert!(matches!(
            parse_line("end", &mut p),
            Ok(Some(Body::EndOfStream(_)))
        ));
        for (bad, says) in [
            ("spike x 1", "unit `x`"),
            ("spike 1", "UNIT TICK"),
            ("through soon", "not an integer"),
            ("onset -1 5", "non-negative"),
            ("label 3", "TRIAL STIMULUS"),
            ("units 1 2", "from TICK"),
            ("spikes 1 2", "unknown line kind"),
        ] {
            let e = parse_line(bad, &mut p).unwrap_err();
            assert!(e.contains(says), "{bad}: {e}");
        }
    }
}
