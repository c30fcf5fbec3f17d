#![no_main]
// Bytes from outside, through the same check the property tests run: linewarden::fuzz_checks.
libfuzzer_sys::fuzz_target!(|data: &[u8]| linewarden::fuzz_checks::extreme_numbers(data));
