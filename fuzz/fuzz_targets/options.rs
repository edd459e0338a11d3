//! Arbitrary options strings applied to the default fit settings: errors, no panics.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| {
    ratesheet::sql::model::fuzzing::apply_arbitrary_options(data);
});
