#![no_main]
//! Fuzz target `session_file`: see `auspex_e2e::fuzzing::session_file`.
libfuzzer_sys::fuzz_target!(|data: &[u8]| auspex_e2e::fuzzing::session_file(data));
