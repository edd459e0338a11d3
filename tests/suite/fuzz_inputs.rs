//! The fuzz targets' entry points (`fuzz/`, run with cargo-fuzz) on seeded random inputs, so
//! every test run covers them: arbitrary aggregate states and options strings must give errors,
//! never panics.

use ratesheet::sql::model::fuzzing::{apply_arbitrary_options, merge_arbitrary_state};

use crate::support::Seeded;

/// `len` reproducible bytes from `seed`.
fn bytes(seed: u64, len: usize) -> Vec<u8> {
    let mut g = Seeded(seed);
    (0..len).map(|_| g.next() as u8).collect()
}

fn cases() -> u64 {
    if std::env::var_os("RATESHEET_LONG").is_some() {
        1_000_000
    } else {
        20_000
    }
}

#[test]
fn arbitrary_states_merge_or_error_without_panicking() {
    let mut accepted = 0;
    for seed in 0..cases() {
        let input = bytes(seed, 16 + (seed % 400) as usize);
        let outcome = std::panic::catch_unwind(|| merge_arbitrary_state(&input));
        assert!(outcome.is_ok(), "seed {seed} panicked; input {input:?}");
        accepted += outcome.unwrap() as u64;
    }
    // Both sides of the checks are reached: states accepted and fitted, and states refused.
    eprintln!("arbitrary states: {accepted} of {} accepted and fitted", cases());
    assert!(
        accepted > cases() / 20 && accepted < cases() * 19 / 20,
        "{accepted} accepted"
    );
}

#[test]
fn arbitrary_options_strings_are_accepted_or_refused_without_panicking() {
    let alphabet = b"level=se,invalid;tol max_iter ref.x=0.95 1e-300 hc1 skip true -= ,,";
    for seed in 0..cases() {
        let raw = bytes(seed, (seed % 60) as usize);
        // Half the inputs are raw bytes, half are built from option-like pieces.
        let input: Vec<u8> = if seed % 2 == 0 {
            raw
        } else {
            raw.iter().map(|b| alphabet[*b as usize % alphabet.len()]).collect()
        };
        let outcome = std::panic::catch_unwind(|| apply_arbitrary_options(&input));
        assert!(
            outcome.is_ok(),
            "seed {seed} panicked; input {:?}",
            String::from_utf8_lossy(&input)
        );
    }
}
