//! # auspex (client library)
//!
//! The command-line client's jobs as a library so tests can drive them, grouped by job:
//! `offline/` (tables, fit, decode, export, gather), `live/` (replay, monitor, status, the
//! text-line bridge, the demo), `report/` (validation and its HTML report) and `bench`.
//! `main.rs` is thin glue.
#![deny(missing_docs)]

pub mod bench;
pub mod live;
pub mod offline;
pub mod progress;
pub mod report;

// The jobs' modules by their short names (as the commands call them).
pub use live::{monitor, send, session, status, wire};
pub use offline::{commands, export, fitting, gather, nwb, nwb_write, prequential, tables};
pub use report::validate;

/// Where the bundled demo data lives (the repository's `demo-data/`).
/// The path is the repository's own, written plainly (no `client-py-free-cli/..` in reports).
pub fn demo_dir() -> std::path::PathBuf {
    let d = std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("..")
        .join("demo-data");
    std::fs::canonicalize(&d).unwrap_or(d)
}

/// `n` and the noun in its number: "1 spike", "2 spikes", "0 spikes".
pub fn counted(n: impl Into<u64>, one: &str, many: &str) -> String {
    let n = n.into();
    format!("{n} {}", if n == 1 { one } else { many })
}
