#![no_main]
//! Fuzz target `engine_ops`: see `auspex_e2e::fuzzing::engine_ops`.
libfuzzer_sys::fuzz_target!(|data: &[u8]| auspex_e2e::fuzzing::engine_ops(data));
