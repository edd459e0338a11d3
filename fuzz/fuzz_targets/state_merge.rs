//! Arbitrary aggregate states merged into both group buffers, then fitted: errors, no panics.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| {
    ratesheet::sql::model::fuzzing::merge_arbitrary_state(data);
});
