#![no_main]
//! Fuzz target `inbound`: see `auspex_e2e::fuzzing::inbound_messages`.
libfuzzer_sys::fuzz_target!(|data: &[u8]| auspex_e2e::fuzzing::inbound_messages(data));
