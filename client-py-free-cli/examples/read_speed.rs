//! Reading speed and peak memory of the same data as an NWB file and as CSV tables (BENCHMARKS.md
//! "Reading NWB"). Each read runs in a fresh child process (so each peak is its own), three times;
//! the median time and the largest peak are printed.
//!
//! Data: `python tests/nwb/make_test_files.py --large` (400 units × 2 h at 10 spikes/s).
//! Run: `cargo run --release -p auspex --example read_speed -- large.nwb large.spikes.csv large.trials.csv`

use std::time::Instant;

fn peak_rss_mb() -> f64 {
    let s = std::fs::read_to_string("/proc/self/status").unwrap_or_default();
    s.lines()
        .find(|l| l.starts_with("VmHWM:"))
        .and_then(|l| l.split_whitespace().nth(1))
        .and_then(|k| k.parse::<f64>().ok())
        .map(|kb| kb / 1024.0)
        .unwrap_or(f64::NAN)
}

fn main() -> anyhow::Result<()> {
    let args: Vec<String> = std::env::args().collect();
    if args.len() >= 3 && args[1] == "--child" {
        let t0 = Instant::now();
        let (data, _) = match args[2].as_str() {
            "nwb" => auspex::nwb::read_dataset(
                args[3].as_ref(),
                &auspex::nwb::NwbChoice::default(),
                1e6,
                0.25,
                &mut Vec::new(),
            )?,
            _ => auspex::tables::read_dataset(args[3].as_ref(), args[4].as_ref(), 1e6, 0.25)?,
        };
        println!(
            "{} {} {:.3} {:.1}",
            data.spikes.len(),
            data.trials.len(),
            t0.elapsed().as_secs_f64(),
            peak_rss_mb()
        );
        return Ok(());
    }
    let (nwb, spikes, trials) = (&args[1], &args[2], &args[3]);
    let me = std::env::current_exe()?;
    let mut rows = Vec::new();
    for (name, extra) in [
        ("nwb", vec![nwb.clone()]),
        ("csv", vec![spikes.clone(), trials.clone()]),
    ] {
        let mut times = Vec::new();
        let mut peak: f64 = 0.0;
        let mut counts = String::new();
        for _ in 0..3 {
            let out = std::process::Command::new(&me)
                .args(["--child", name])
                .args(&extra)
                .output()?;
            anyhow::ensure!(
                out.status.success(),
                "{}",
                String::from_utf8_lossy(&out.stderr)
            );
            let line = String::from_utf8(out.stdout)?;
            let f: Vec<&str> = line.split_whitespace().collect();
            counts = format!("{} spikes, {} trials", f[0], f[1]);
            times.push(f[2].parse::<f64>()?);
            peak = peak.max(f[3].parse::<f64>()?);
        }
        times.sort_by(f64::total_cmp);
        println!(
            "{name}: {counts}; median {:.2} s of {:?}; peak RSS {peak:.0} MB",
            times[1], times
        );
        rows.push((times[1], peak));
    }
    println!(
        "nwb/csv time ratio {:.2}, peak ratio {:.2}",
        rows[0].0 / rows[1].0,
        rows[0].1 / rows[1].1
    );
    Ok(())
}
