//! Arbitrary validated slates through every registered diversifier.
#![no_main]

libfuzzer_sys::fuzz_target!(|data: &[u8]| medley_core::fuzz::diversifiers(data));
