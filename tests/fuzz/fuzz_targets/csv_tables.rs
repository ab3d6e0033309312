#![no_main]
//! Fuzz target `csv_tables`: see `auspex_e2e::fuzzing::csv_tables`.
libfuzzer_sys::fuzz_target!(|data: &[u8]| auspex_e2e::fuzzing::csv_tables(data));
