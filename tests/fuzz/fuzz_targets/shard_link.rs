#![no_main]
//! Fuzz target `shard_link`: see `auspex_e2e::fuzzing::shard_link`.
libfuzzer_sys::fuzz_target!(|data: &[u8]| auspex_e2e::fuzzing::shard_link(data));
