//! Fuzz target: the model-file reader (`Model::from_json_slice`) and what a loaded model is used for.
#![no_main]

use libfuzzer_sys::fuzz_target;

fuzz_target!(|data: &[u8]| {
    outcore::fuzzing::model(data);
});
