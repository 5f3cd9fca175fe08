//! Fuzz target: the `fit` settings-file reader (`settings_file::parse`).
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    outcore::fuzzing::settings(data);
});
