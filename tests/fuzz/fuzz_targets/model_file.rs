#![no_main]
//! Fuzz target `model_file`: see `auspex_e2e::fuzzing::model_file`.
libfuzzer_sys::fuzz_target!(|data: &[u8]| auspex_e2e::fuzzing::model_file(data));
