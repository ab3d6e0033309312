#![no_main]
//! Fuzz target `monitor`: see `auspex_e2e::fuzzing::monitor`.
libfuzzer_sys::fuzz_target!(|data: &[u8]| auspex_e2e::fuzzing::monitor(data));
