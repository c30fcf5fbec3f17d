#![no_main]
// Arbitrary bytes as the newest segment, opened by the writer in a scratch directory.
use std::sync::OnceLock;

static DIR: OnceLock<tempfile::TempDir> = OnceLock::new();

libfuzzer_sys::fuzz_target!(|data: &[u8]| {
    let dir = DIR.get_or_init(|| tempfile::tempdir().expect("a scratch directory"));
    linewarden::fuzz_checks::archive_recovery(data, &dir.path().join("archive"));
});
