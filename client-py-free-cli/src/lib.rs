//! # auspex (client library)
//!
//! The command-line client's jobs as a library so tests can drive them: reading tables,
//! fitting with progress, offline decoding, export, and the demo. `main.rs` is thin glue.
#![deny(missing_docs)]

pub mod bench;
pub mod commands;
pub mod export;
pub mod fitting;
pub mod gather;
pub mod live;
pub mod monitor;
pub mod offline;
pub mod prequential;
pub mod report;
pub mod send;
pub mod session;
pub mod status;
pub mod tables;
pub mod validate;
pub mod wire;

/// Where the bundled demo data lives (the repository's `demo-data/`).
pub fn demo_dir() -> std::path::PathBuf {
    std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("..")
        .join("demo-data")
}
