#![no_main]
//! Fuzz target `toml_config`: see `auspex_e2e::fuzzing::toml_config`.
libfuzzer_sys::fuzz_target!(|data: &[u8]| auspex_e2e::fuzzing::toml_config(data));
