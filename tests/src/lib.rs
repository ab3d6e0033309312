//! End-to-end tests live in tests/; this library holds what the fuzz targets do with their
//! bytes (`fuzzing`), small NWB files built for tests (`nwb_build`), shared by the cargo-fuzz binaries in `fuzz/` and the stable regression
//! test `tests/fuzz_corpus.rs`.
#![deny(missing_docs)]

pub mod fuzzing;
pub mod nwb_build;
