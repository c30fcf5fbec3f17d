//! Every fuzz target (`fuzz/fuzz_targets/`) as a property test, so `cargo test` runs each on
//! random input and on the committed corpus (`fuzz/corpus/<target>/`, including any input that
//! once failed), without the fuzzer.

use proptest::prelude::*;

use linewarden::fuzz_checks as checks;

/// Runs `check` on every file of the target's committed corpus.
fn corpus(target: &str, check: impl Fn(&[u8])) {
    let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("fuzz/corpus")
        .join(target);
    let mut n = 0;
    for e in std::fs::read_dir(&dir).unwrap_or_else(|e| panic!("{}: {e}", dir.display())) {
        let p = e.unwrap().path();
        check(&std::fs::read(&p).unwrap());
        n += 1;
    }
    assert!(n > 0, "{} has no corpus", dir.display());
}

/// Bytes that look like text of the kind a parser expects, more often than uniform noise does.
fn texty() -> impl Strategy<Value = Vec<u8>> {
    prop_oneof![
        proptest::collection::vec(any::<u8>(), 0..400),
        "[ -~\n\r\t,;.0-9A-Za-z\"{}\\[\\]:=#-]{0,400}".prop_map(String::into_bytes),
    ]
}

macro_rules! mirror {
    ($name:ident, $target:literal, $check:path) => {
        #[test]
        fn $name() {
            corpus($target, $check);
            proptest!(ProptestConfig::with_cases(512), |(data in texty())| { $check(&data); });
        }
    };
}

mirror!(serial_frames, "serial_frames", checks::serial_frames);
mirror!(mqtt_payload, "mqtt_payload", checks::mqtt_payload);
mirror!(csv_report, "csv_report", checks::csv_report);
mirror!(study_input, "study_input", checks::study_input);
mirror!(
    config_and_limits,
    "config_and_limits",
    checks::config_and_limits
);
mirror!(control_request, "control_request", checks::control_request);
mirror!(archive_frames, "archive_frames", checks::archive_frames);
mirror!(web_request, "web_request", checks::web_request);

/// Numbers at the edges of a double, 17 bytes a reading (a selector, the value, the units), so
/// that random input meets them often: what broke was 1e308 readings whose sum overflowed.
fn extreme() -> impl Strategy<Value = Vec<u8>> {
    let edge = prop_oneof![
        Just(f64::MAX),
        Just(-f64::MAX),
        Just(1e308),
        Just(1e300),
        Just(1e-300),
        Just(5e-324),
        Just(f64::INFINITY),
        Just(f64::NAN),
        Just(0.0),
        Just(1.0),
        Just(9_007_199_254_740_993.0),
        any::<f64>(),
        -1e6..1e6f64,
    ];
    proptest::collection::vec((any::<u8>(), edge.clone(), edge), 0..120).prop_map(|v| {
        v.into_iter()
            .flat_map(|(s, a, b)| {
                let mut c = vec![s];
                c.extend_from_slice(&a.to_le_bytes());
                c.extend_from_slice(&b.to_le_bytes());
                c
            })
            .collect()
    })
}

#[test]
fn extreme_numbers() {
    corpus("extreme_numbers", checks::extreme_numbers);
    proptest!(ProptestConfig::with_cases(256), |(data in extreme())| {
        checks::extreme_numbers(&data);
    });
}

#[test]
fn archive_recovery() {
    let dir = tempfile::tempdir().unwrap();
    let at = dir.path().join("archive");
    corpus("archive_recovery", |d| checks::archive_recovery(d, &at));
    proptest!(ProptestConfig::with_cases(128), |(data in texty())| {
        checks::archive_recovery(&data, &at);
    });
}

#[test]
fn folder_entries() {
    let dir = tempfile::tempdir().unwrap();
    let at = dir.path().join("folder");
    corpus("folder_entries", |d| checks::folder_entries(d, &at));
    proptest!(ProptestConfig::with_cases(64), |(data in proptest::collection::vec(any::<u8>(), 0..24))| {
        checks::folder_entries(&data, &at);
    });
}
