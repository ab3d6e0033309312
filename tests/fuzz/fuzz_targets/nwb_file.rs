#![no_main]
//! Fuzz target `nwb_file`: see `auspex_e2e::fuzzing::nwb_file`.
libfuzzer_sys::fuzz_target!(|data: &[u8]| auspex_e2e::fuzzing::nwb_file(data));
