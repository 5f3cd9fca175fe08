//! Fuzz target: the block-cache reader (`cache::read_in_memory`), also with the checksums made right.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    outcore::fuzzing::cache(data);
});
