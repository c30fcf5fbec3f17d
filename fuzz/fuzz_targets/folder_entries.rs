#![no_main]
// Entries of every kind in a scratch watched folder, one per input byte.
use std::sync::OnceLock;

static DIR: OnceLock<tempfile::TempDir> = OnceLock::new();

libfuzzer_sys::fuzz_target!(|data: &[u8]| {
    let dir = DIR.get_or_init(|| tempfile::tempdir().expect("a scratch directory"));
    linewarden::fuzz_checks::folder_entries(data, &dir.path().join("folder"));
});
