#![no_main]
//! Fuzz target `scenario`: see `auspex_e2e::fuzzing::scenario`.
libfuzzer_sys::fuzz_target!(|data: &[u8]| auspex_e2e::fuzzing::scenario(data));
