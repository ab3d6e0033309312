//! Batch → posterior-frame latency with a libzmq-based sender and subscriber (the `zmq` crate)
//! against an in-process daemon on loopback: 1 kHz spike batches, trials back to back.
//! Run: `cargo run --release -p auspex-e2e --example latency_libzmq -- [seconds] [units] [stimuli] [tcp|ipc] [threads]`
//! (defaults 60 s, 256 units, 32 stimuli, tcp, 1 engine thread). Prints p50, p99, p99.9 and the worst case.

use prost::Message;
use std::time::{Duration, Instant};

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().collect();
    let seconds: f64 = args.get(1).map(|s| s.parse()).transpose()?.unwrap_or(60.0);
    let nu: usize = args.get(2).map(|s| s.parse()).transpose()?.unwrap_or(256);
    let ns: usize = args.get(3).map(|s| s.parse()).transpose()?.unwrap_or(32);
    let transport = args.get(4).cloned().unwrap_or_else(|| "tcp".into());
    let threads: u32 = args.get(5).map(|s| s.parse()).transpose()?.unwrap_or(1);
    let dir = tempfile::tempdir()?;
    let rt = auspexd::service::io_runtime()?;
    let running = rt.block_on(auspex::bench::start_daemon(
        nu,
        ns,
        &transport,
        dir.path(),
        false,
        threads,
    ))?;
    let eps = running.endpoints.clone();
    let ctx = zmq::Context::new();
    let sub = ctx.socket(zmq::SUB)?;
    sub.set_rcvhwm(0)?;
    sub.connect(&eps.publish)?;
    sub.set_subscribe(auspex_proto::topic::POSTERIOR.as_bytes())?;
    sub.set_rcvtimeo(2000)?;
    let push = ctx.socket(zmq::PUSH)?;
    push.set_sndhwm(0)?;
    push.connect(&eps.ingest)?;
    std::thread::sleep(Duration::from_millis(300));

    let n = (seconds * 1000.0).round() as usize;
    let msgs = auspex::bench::latency_messages(nu, ns, n);
    let t0 = Instant::now();
    let sender = std::thread::spawn(move || -> anyhow::Result<Vec<Option<Instant>>> {
        let mut sent = vec![None; n + 1];
        for (batch, bytes) in msgs {
            if let Some(i) = batch {
                let due = t0 + Duration::from_micros(i as u64 * 1000);
                let now = Instant::now();
                if due > now {
                    std::thread::sleep(due - now);
                }
                sent[i] = Some(Instant::now());
            }
            push.send(bytes, 0)?;
        }
        Ok(sent)
    });
    let mut got: Vec<(i64, Instant)> = Vec::with_capacity(n);
    while let Ok(parts) = sub.recv_multipart(0) {
        let now = Instant::now();
        if let Some(payload) = parts.get(1) {
            if let Ok(auspex_proto::v1::Outbound {
                body: Some(auspex_proto::v1::outbound::Body::Posterior(p)),
                ..
            }) = auspex_proto::v1::Outbound::decode(payload.as_slice())
            {
                got.push((p.bin_end_tick, now));
            }
        }
    }
    let sent = sender
        .join()
        .map_err(|_| anyhow::anyhow!("sender panicked"))??;
    rt.block_on(running.stop());
    let lat: Vec<f64> = got
        .iter()
        .filter_map(|(tick, at)| {
            let i = ((tick + 1) / 1000) as usize;
            sent.get(i)
                .copied()
                .flatten()
                .map(|s| at.duration_since(s).as_secs_f64() * 1e6)
        })
        .collect();
    let l = auspex::bench::summarise(&format!("{transport} (libzmq peer)"), lat, n);
    println!(
        "{nu} units × {ns} stimuli, {seconds} s of 1 kHz batches over {}: p50 {:.0} µs, p99 {:.0} µs, p99.9 {:.0} µs, worst {:.0} µs ({} frames of {} batches)",
        l.transport, l.p50_us, l.p99_us, l.p999_us, l.max_us, l.frames, l.batches
    );
    Ok(())
}
