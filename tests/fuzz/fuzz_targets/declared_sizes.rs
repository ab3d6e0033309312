#![no_main]
//! Fuzz target `declared_sizes`: see `auspex_e2e::fuzzing::declared_sizes`. Run it with a
//! malloc limit a little above its budget (`tests/fuzz/run.sh` does).
libfuzzer_sys::fuzz_target!(|data: &[u8]| auspex_e2e::fuzzing::declared_sizes(data));
