//! Fuzz target: the checkpoint reader (`checkpoint::decode`), also with the checksum made right.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    outcore::fuzzing::checkpoint(data);
});
