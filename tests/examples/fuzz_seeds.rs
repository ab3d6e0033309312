//! Writes the fuzz targets' seed inputs into `tests/fuzz/seeds/<target>/` (run once when a
//! format changes): a small model file, a short recording, published messages in the monitor
//! target's framing, a small NWB file, the demo's tables, scenario and a daemon configuration, and structured
//! operation streams for the engine and inbound targets.
//! Run: `cargo run --release -p auspex-e2e --example fuzz_seeds`.

use auspex_e2e::fuzzing::small_model;
use auspex_proto::v1::{self, outbound};
use prost::Message;
use std::path::Path;

fn put(target: &str, name: &str, bytes: &[u8]) -> anyhow::Result<()> {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fuzz/seeds")
        .join(target);
    std::fs::create_dir_all(&dir)?;
    std::fs::write(dir.join(name), bytes)?;
    Ok(())
}

fn main() -> anyhow::Result<()> {
    let tmp = tempfile::tempdir()?;
    let m = small_model();
    let mp = tmp.path().join("m.apxm");
    auspex_proto::model_file::save_model(&mp, m.spec(), "fuzz seed")?;
    put("model_file", "small.apxm", &std::fs::read(&mp)?)?;

    // NWB: a small file as raw bytes (leading 0), and a structured input (leading 1: 3 units,
    // 5 spikes each, 4 trials, then a few damaging operations).
    let mut raw = vec![0u8];
    raw.extend(auspex_e2e::nwb_build::MiniNwb::regular(3, 5, 4).bytes());
    put("nwb_file", "small.nwb.bin", &raw)?;
    put(
        "nwb_file",
        "ops.bin",
        &[1, 3, 5, 4, 6, 0, 0, 0, 1, 9, 5, 2, 0, 7],
    )?;

    // Engine operations: open trial 1 at tick 5 as stimulus 1, spikes, advance, label, cancel.
    let ops: Vec<u8> = vec![
        0, 0, 1, 45, 1, 1, 0, 50, 2, 3, 52, 3, 70, 3, 120, 4, 1, 1, 0, 2, 60, 0, 3, 200, 5, 2, 6,
        180, 3, 250, 7,
    ];
    put("engine_ops", "trial.bin", &ops)?;
    // Shard link: open trial 1 at tick 0, then a well-formed partial per bin for bin 0..2 (one
    // block of 3 stimuli), a loss, a restoration.
    let mut link: Vec<u8> = vec![0, 1, 0];
    for bin in 0..3u8 {
        link.extend([1, 1, bin, 0, 2, 1, 3, 40, 50, 60]);
    }
    link.extend([4, 5]);
    put("shard_link", "partials.bin", &link)?;
    // Inbound: with a model, one thread; session start, onset, batches, label, end.
    let inbound: Vec<u8> = vec![
        1, 0, 0, 0, 1, 2, 5, 0, 5, 1, 2, 5, 0, 2, 2, 0, 50, 60, 1, 0, 3, 2, 1, 45, 2, 50, 9, 120,
        4, 0, 4, 250, 7, 1, 5, 1, 1, 9, 0, 6,
    ];
    put("inbound", "session.bin", &inbound)?;
    put("session_file", "ops.bin", &inbound)?;

    // Published messages: (topic index, length, payload) as the monitor target reads them.
    let mut pubs = Vec::new();
    let msgs = [
        (
            0u8,
            outbound::Body::Posterior(v1::PosteriorFrame {
                trial: 1,
                bin: 3,
                bin_end_tick: 3,
                posterior: vec![0.2, 0.5, 0.3],
                top: 1,
                top_posterior: 0.5,
                entropy_bits: 1.4,
                spikes: 2,
                missing_parts: 0,
            }),
        ),
        (
            1u8,
            outbound::Body::Decision(v1::DecisionEvent {
                trial: 1,
                stimulus: 1,
                posterior: 0.95,
                bin: 12,
                ..Default::default()
            }),
        ),
        (4u8, outbound::Body::Health(v1::Health::default())),
    ];
    for (t, body) in msgs {
        let bytes = v1::Outbound {
            seq: 1,
            body: Some(body),
        }
        .encode_to_vec();
        pubs.push(t);
        pubs.push(bytes.len() as u8);
        pubs.extend_from_slice(&bytes);
    }
    put("monitor", "three.bin", &pubs)?;

    let demo = auspex::demo_dir();
    let head = |p: &str, n: usize| -> anyhow::Result<Vec<u8>> {
        let t = std::fs::read_to_string(demo.join(p))?;
        Ok(t.lines()
            .take(n)
            .collect::<Vec<_>>()
            .join("\n")
            .into_bytes())
    };
    let mut tables = head("spikes.csv", 40)?;
    tables.push(0xFF);
    tables.extend(head("trials.csv", 6)?);
    put("csv_tables", "demo-head.bin", &tables)?;
    put(
        "scenario",
        "demo.toml",
        &std::fs::read(demo.join("scenario.toml"))?,
    )?;
    put(
        "toml_config",
        "daemon.toml",
        b"model = \"model.apxm\"\nthreshold = 0.95\nmin_time_ms = 30\nthreads = 2\ntable_memory_mb = 256\nrecord = \"sessions/\"\n",
    )?;
    println!("seeds written");
    Ok(())
}
