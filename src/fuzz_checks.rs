//! The bodies of the fuzz targets (`fuzz/fuzz_targets/`), shared with the property tests
//! (`tests/fuzz_mirror.rs`) so that `cargo test` runs every one of them on random input.
//!
//! Each takes arbitrary bytes from outside (a gauge's frames, an MQTT payload, a CSV report, a
//! config or limits file, a control request, archive bytes), must not panic, and checks what
//! must hold whatever the input: a verdict is a reading or a reason, never both or neither; a
//! damaged archive tail is cut only when nothing intact follows it.

use std::path::Path;

use crate::archive::segment;

/// A serial gauge's byte stream, split into frames at the terminator as the source does, each
/// frame through the gauge's pattern: a reading with a finite value, or a rejection with a
/// reason.
pub fn serial_frames(data: &[u8]) {
    use crate::daemon::sources::SourceEvent;
    let Some(gauge) = serial_gauge() else {
        return;
    };
    let Ok(re) = regex::Regex::new(&gauge.pattern) else {
        return;
    };
    for frame in data.split(|b| *b == b'\n') {
        match crate::daemon::sources::serial::frame_event(&gauge, &re, "serial:fuzz", frame) {
            Some(SourceEvent::Reading(r)) => assert!(r.value.is_finite()),
            Some(SourceEvent::Unreadable { reason, .. }) => assert!(!reason.is_empty()),
            Some(_) => panic!("a frame became something other than a reading or a rejection"),
            None => {}
        }
    }
}

fn serial_gauge() -> Option<crate::config::SerialGauge> {
    let text = r#"[daemon]
archive_dir = "a"
[[characteristic]]
id = "bore"
unit = "mm"
subgroup = { size = 1 }
[[characteristic]]
id = "face"
unit = "mm"
subgroup = { size = 1 }
[[source]]
id = "g"
kind = "serial"
port = "/dev/null"
pattern = '^(?:(?P<channel>[A-Z])\s*)?(?P<value>[-+]?\d+(?:\.\d+)?)\s*(?P<unit>mm|in)?$'
channels = { A = "bore", B = "face" }
"#;
    let cfg = crate::config::parse(text, Path::new("/fuzz/cell.toml")).ok()?;
    cfg.sources.into_iter().find_map(|s| match s {
        crate::config::Source::Serial(g) => Some(*g),
        _ => None,
    })
}

/// An MQTT message on a topic, for a plain and a JSON source: a reading or a reason, and for
/// the JSON source a time string read by the RFC 3339 parser.
pub fn mqtt_payload(data: &[u8]) {
    use crate::config::{MqttSource, Payload};
    let split = data.iter().position(|b| *b == 0).unwrap_or(0);
    let (topic_bytes, payload) = data.split_at(split);
    let topic = String::from_utf8_lossy(topic_bytes);
    let source = |payload: Payload| {
        MqttSource::on_localhost(payload, "cell/{characteristic}/m", Some("bore"))
    };
    let plain = source(Payload::Plain);
    let json = source(Payload::Json {
        value: "/v".into(),
        time: Some("/t".into()),
        characteristic: Some("/c".into()),
        part: Some("/p".into()),
        inspected: None,
    });
    let batch = source(Payload::Json {
        value: "/v".into(),
        time: None,
        characteristic: None,
        part: None,
        inspected: Some("/n".into()),
    });
    // A pass/fail characteristic's word lists, as the engine applies them.
    let words = crate::config::AttributeSettings {
        chart: crate::stats::attributes::AttributeChart::P,
        conforming: vec!["OK".into()],
        nonconforming: vec!["NOK".into()],
        below_severity: None,
    };
    for src in [&plain, &json, &batch] {
        for t in [topic.as_ref(), "cell/face/m"] {
            match crate::daemon::sources::mqtt::parse(src, t, payload) {
                Ok(r) => {
                    assert!(!r.characteristic.is_empty());
                    // A word is short and printable and stands in for the number; mapped, it
                    // is 0 or 1, or the reason names it.
                    if let Some(w) = &r.word {
                        assert!(r.value.is_nan());
                        assert!(!w.is_empty() && w.chars().count() <= 40);
                        assert!(!w.chars().any(char::is_control));
                        match words.count_of(w) {
                            Ok(v) => {
                                assert!(v == 0.0 || v == 1.0 || w.trim().parse::<f64>().is_ok())
                            }
                            Err(why) => assert!(why.contains("is neither")),
                        }
                    }
                    assert_eq!(r.inspected.is_some(), std::ptr::eq(src, &batch));
                }
                Err(u) => assert!(!u.reason.is_empty()),
            }
        }
    }
    if let Ok(text) = std::str::from_utf8(data) {
        let _ = crate::format::parse_rfc3339(text);
    }
}

/// A CSV report from a measuring machine, per part and per reading: every reading comes from a
/// row of exactly the header's field count; the rest are reasons with the file name.
pub fn csv_report(data: &[u8]) {
    use crate::config::ReportRows;
    let text = String::from_utf8_lossy(data);
    let per_part = ReportRows::PerPart {
        columns: vec![
            ("Bore".into(), "bore".into()),
            ("Face".into(), "face".into()),
        ],
    };
    let per_reading = ReportRows::PerReading {
        characteristic_column: "Feature".into(),
        value_column: "Value".into(),
    };
    for rows in [&per_part, &per_reading] {
        if let Ok((readings, bad)) =
            crate::daemon::sources::folder::parse(&text, "fuzz.csv", rows, Some("Serial"))
        {
            for r in &readings {
                assert!(r.2.is_finite());
            }
            for b in &bad {
                assert!(b.2.starts_with("fuzz.csv"), "{}", b.2);
            }
        }
    }
}

/// CSV input of a baseline study, in each layout.
pub fn study_input(data: &[u8]) {
    use crate::input::{InputOptions, Layout, parse};
    let text = String::from_utf8_lossy(data);
    for layout in [Layout::Wide, Layout::Long, Layout::Single] {
        let mut o = InputOptions::new(layout);
        if layout == Layout::Single {
            o.subgroup_size = Some(3);
        }
        if let Ok(p) = parse(&text, "fuzz.csv", &o) {
            assert!(p.subgroups.iter().flatten().all(|v| v.is_finite()));
        }
    }
    // An attribute chart's samples: whole counts of zero or more in more than zero units, no
    // more nonconforming than inspected.
    for proportion in [true, false] {
        let o = crate::input::CountOptions {
            count_column: "count".into(),
            size_column: Some("size".into()),
            proportion,
            delimiter: b',',
            decimal_comma: false,
        };
        if let Ok(p) = crate::input::parse_counts(&text, "fuzz.csv", &o) {
            for s in &p.samples {
                assert!(s.count >= 0.0 && s.count.fract() == 0.0 && s.count.is_finite());
                assert!(s.size > 0.0 && s.size.is_finite());
                assert!(!proportion || (s.count <= s.size && s.size.fract() == 0.0));
            }
            assert_eq!(p.samples.len(), p.lines.len());
        }
    }
}

/// A daemon config and a limits file: accepted, or rejected with located problems; never a
/// panic.
pub fn config_and_limits(data: &[u8]) {
    let text = String::from_utf8_lossy(data);
    if let Err(problems) = crate::config::parse(&text, Path::new("/fuzz/cell.toml")) {
        assert!(!problems.to_string().is_empty());
    }
    match crate::limits_file::StoredLimits::parse(&text, "fuzz.toml") {
        Err(problems) => assert!(!problems.to_string().is_empty()),
        // Accepted attribute limits give every subgroup size a finite, ordered set of limits
        // at or above zero.
        Ok(l) => {
            if let Some(a) = l.chart.attribute() {
                let b = crate::rules::point::ChartBasis::from_stored(&l);
                for size in [1.0, 2.5, l.subgroup_size as f64, 1000.0] {
                    let (sigma, lim) = b.attribute_at(a, size);
                    assert!(sigma.is_finite() && sigma >= 0.0, "{size}: {sigma}");
                    assert!(lim.lcl >= 0.0 && lim.lcl <= lim.center && lim.center <= lim.ucl);
                }
            }
        }
    }
}

/// A control-socket request line, and the check of the name and note an acknowledgement
/// carries: whatever is accepted has no control character and bounded lengths.
pub fn control_request(data: &[u8]) {
    use crate::daemon::control::ClientRequest;
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    if let Ok(ClientRequest::Ack { by, note, .. }) = serde_json::from_str::<ClientRequest>(text)
        && crate::alerts::check_ack_text(&by, note.as_deref()).is_ok()
    {
        assert!(!by.chars().any(char::is_control));
        assert!(by.chars().count() <= crate::alerts::MAX_NAME_CHARS);
        assert!(note.is_none_or(|n| !n.chars().any(char::is_control)
            && n.chars().count() <= crate::alerts::MAX_NOTE_CHARS));
    }
}

/// Arbitrary bytes as a segment: decoding at every offset never panics, and a tail is judged
/// torn (and so cut) only when no intact frame follows it.
pub fn archive_frames(data: &[u8]) {
    let mut offset = 0;
    while offset < data.len() {
        match segment::decode(data, offset) {
            Ok(f) => {
                assert!(f.end > offset && f.end <= data.len());
                // A record's payload parses, or is an unreadable record with its number, or
                // is an error: never a panic.
                if f.kind == segment::TYPE_RECORD
                    && let Ok(segment::Parsed::Unreadable(u)) = segment::parse_record(f.payload)
                {
                    assert!(!u.error.is_empty());
                }
                offset = f.end;
            }
            Err(_) => {
                if segment::is_torn_tail(data, offset) {
                    for at in offset + 1..data.len() {
                        assert!(
                            segment::decode(data, at).is_err(),
                            "cut at {offset} with an intact frame at {at}"
                        );
                    }
                }
                break;
            }
        }
    }
}

/// Arbitrary bytes after a valid segment header, opened by the writer as the newest segment in
/// `dir`: it either refuses with a located error or opens; when it cut a tail, nothing intact
/// stood after the cut, and the records it kept read back in order.
pub fn archive_recovery(data: &[u8], dir: &Path) {
    use crate::archive::writer::{Writer, WriterConfig};
    let _ = std::fs::remove_dir_all(dir);
    if std::fs::create_dir_all(dir).is_err() {
        return;
    }
    let header = segment::Header {
        format: 1,
        segment: 0,
        first_seq: 1,
        created_ms: 0,
        prev_chain: String::new(),
    };
    let mut bytes = Vec::new();
    segment::encode(
        segment::TYPE_HEADER,
        &serde_json::to_vec(&header).unwrap_or_default(),
        &mut bytes,
    );
    bytes.extend_from_slice(data);
    let path = dir.join(segment::file_name(0, 1));
    if std::fs::write(&path, &bytes).is_err() {
        return;
    }
    let mut cfg = WriterConfig::new(dir);
    cfg.rotate_daily = false;
    match Writer::open(cfg) {
        Ok((w, report)) => {
            for q in &report.quarantined {
                assert!(segment::intact_frame_after(&bytes, q.offset as usize).is_none());
            }
            let next = w.next_seq();
            drop(w);
            // What the writer opened, verify and every reader read without a problem: they
            // agree on the same archive.
            let v = crate::archive::reader::verify(dir).expect("verify reads the directory");
            assert!(
                v.problems.is_empty(),
                "the writer opened it, verify says {v:?}"
            );
            let r = crate::archive::reader::Reader::open(dir).expect("the reader opens it");
            let mut expected = 1;
            for e in r.iter(&Default::default()) {
                let e = e.unwrap_or_else(|e| panic!("the writer opened it, a reader says {e}"));
                while r.unreadable().contains(&expected) {
                    expected += 1;
                }
                assert_eq!(e.seq, expected);
                expected += 1;
            }
            while r.unreadable().contains(&expected) {
                expected += 1;
            }
            if segment::seal_of(&bytes).is_none() {
                assert_eq!(expected, next);
            }
        }
        Err(e) => assert!(!e.to_string().is_empty()),
    }
}

/// What a browser (or anyone) sends the page and what the users file holds: a `Host`, an
/// `Origin`, a `Cookie` header and a users file's text, one per line of the input (the rest is
/// the file). Nothing panics; a host taken is a plain lowercase name; a POST judged from this
/// page names this page's own, allowed host over http; a cookie's value holds no separator; the
/// users taken have valid, distinct names and argon2 hashes.
pub fn web_request(data: &[u8]) {
    use crate::config::web::{HostName, Web, check_user_name, parse_host, parse_users};
    use crate::daemon::access::{cookie, same_origin};
    use axum::http::{HeaderMap, HeaderValue, header};
    let Ok(text) = std::str::from_utf8(data) else {
        return;
    };
    let mut parts = text.splitn(4, '\n');
    let host = parts.next().unwrap_or("");
    let origin = parts.next().unwrap_or("");
    let cookies = parts.next().unwrap_or("");
    let users = parts.next().unwrap_or("");
    if let Some(h) = parse_host(host) {
        assert!(!h.host.is_empty());
        assert!(h.host.chars().all(|c| c.is_ascii_lowercase()
            || c.is_ascii_digit()
            || matches!(c, '.' | '-' | '_' | ':')));
    }
    let web = Web {
        listen: ([127, 0, 0, 1], 9630).into(),
        hosts: ["127.0.0.1", "localhost", "::1"]
            .iter()
            .map(|h| HostName {
                host: h.to_string(),
                port: None,
            })
            .collect(),
        users: None,
        tls: None,
        session_ms: 1,
    };
    let mut headers = HeaderMap::new();
    for (name, value) in [
        (header::HOST, host),
        (header::ORIGIN, origin),
        (header::COOKIE, cookies),
    ] {
        if let Ok(v) = HeaderValue::from_str(value) {
            headers.insert(name, v);
        }
    }
    if same_origin(&web, &headers).is_ok() {
        let h = headers.get(header::HOST).unwrap().to_str().unwrap();
        let o = headers.get(header::ORIGIN).unwrap().to_str().unwrap();
        let authority = o.strip_prefix("http://").unwrap();
        assert!(
            authority
                .split(['/', '?', '#'])
                .next()
                .unwrap()
                .eq_ignore_ascii_case(h)
        );
        let parsed = parse_host(h).unwrap();
        assert!(web.hosts.iter().any(|a| a.host == parsed.host), "{h}");
    }
    if let Some(v) = cookie(&headers, "linewarden_session") {
        assert!(!v.contains(';'));
    }
    if let Ok(list) = parse_users(users, std::path::Path::new("users")) {
        for (i, u) in list.iter().enumerate() {
            assert!(check_user_name(&u.name).is_ok());
            assert!(!list[..i].iter().any(|x| x.name == u.name));
            assert!(argon2::PasswordHash::new(&u.hash).is_ok());
        }
    }
}

/// The cell the extreme-number target drives: a measured characteristic of each chart, with
/// EWMA and CUSUM among their rules, and a u chart, all learning their limits from a few
/// subgroups so that learned limits meet the numbers too.
const EXTREME_CELL: &str = r#"[daemon]
archive_dir = "a"
[[characteristic]]
id = "single"
subgroup = { size = 1 }
learning = { subgroups = 8 }
[characteristic.rules]
preset = "nelson"
[[characteristic.rules.rule]]
kind = "ewma"
lambda = 0.2
width = 2.962
[[characteristic.rules.rule]]
kind = "cusum"
k = 0.5
h = 4.77
[[characteristic]]
id = "group"
subgroup = { size = 3 }
learning = { subgroups = 8 }
[characteristic.rules]
preset = "western-electric"
[[characteristic]]
id = "defects"
chart = "u"
subgroup = { size = 2 }
learning = { subgroups = 8 }
[characteristic.rules]
[[characteristic.rules.rule]]
kind = "beyond-limits"
"#;

/// Arbitrary numbers (any bit pattern: huge, tiny, subnormal, infinite, NaN) as readings of
/// measured and attribute characteristics through the pure engine, as the daemon drives it:
/// whatever is accepted, every record the engine asks to archive reads back (no figure that
/// JSON cannot hold), and every limits file it asks to write would load.
pub fn extreme_numbers(data: &[u8]) {
    use crate::engine::{Engine, Incoming, Output};
    let Ok(cfg) = crate::config::parse(EXTREME_CELL, Path::new("/fuzz/cell.toml")) else {
        panic!("the extreme-number cell does not validate");
    };
    let mut engine = Engine::new(&cfg, 0);
    let ids = ["single", "group", "defects"];
    let mut seq = 0u64;
    let mut t = 1_000i64;
    let check = |outputs: Vec<Output>| {
        for o in outputs {
            match o {
                Output::Record(record) => {
                    let env = crate::archive::Envelope {
                        v: crate::archive::record::RECORD_VERSION,
                        seq: 1,
                        time_ms: 0,
                        record,
                    };
                    let text = serde_json::to_vec(&env).expect("a record serializes");
                    if let Err(e) = segment::envelope(&text) {
                        panic!(
                            "a {} record does not read back ({e}): {}",
                            env.record.kind(),
                            String::from_utf8_lossy(&text)
                        );
                    }
                }
                Output::WriteLimits { limits, .. } => {
                    if let Err(e) = limits.check("learned") {
                        panic!("learned limits would not load: {e}");
                    }
                }
                _ => {}
            }
        }
    };
    for chunk in data.chunks_exact(17) {
        let c = ids[usize::from(chunk[0]) % ids.len()];
        let value = f64::from_le_bytes(chunk[1..9].try_into().expect("8 bytes"));
        let units = f64::from_le_bytes(chunk[9..17].try_into().expect("8 bytes"));
        // Small whole counts as well as any bit pattern, so the u chart forms subgroups.
        let (value, inspected) = if c == "defects" {
            if chunk[0] & 0x80 == 0 {
                (f64::from(chunk[1] % 8), Some(units))
            } else {
                (value, Some(units))
            }
        } else {
            (value, None)
        };
        t += 1000;
        let mut inc = Incoming {
            source: "fuzz".into(),
            characteristic: c.to_string(),
            value,
            unit: None,
            source_time_ms: None,
            source_time_ignored: false,
            arrival_ms: t,
            part: None,
            source_key: None,
            word: None,
            inspected,
            sent: None,
        };
        if engine.admit(&mut inc).is_ok() {
            seq += 1;
            check(engine.accept(seq, &inc));
        }
        if chunk[0] & 0x40 != 0 {
            check(engine.tick(t));
        }
    }
    let snapshot = engine.snapshot().into_iter().map(Output::Record).collect();
    check(snapshot);
}

/// Entries of every kind dropped into a watched folder, one per input byte: a regular file, a
/// symbolic link to a file outside the folder (to a directory, or to nowhere), a named pipe, a
/// directory, a hard link to the outside file, each named `*.csv`. Whatever the mix, only
/// regular files of their own are read, and nothing of the outside file (which holds a marker)
/// is ever returned.
pub fn folder_entries(data: &[u8], dir: &Path) {
    use crate::daemon::sources::folder::{list_csv, read_report};
    let _ = std::fs::remove_dir_all(dir);
    let inbox = dir.join("inbox");
    if std::fs::create_dir_all(&inbox).is_err() {
        return;
    }
    let outside = dir.join("outside.txt");
    let _ = std::fs::write(&outside, "MARKER-OUTSIDE\n");
    for (i, b) in data.iter().take(24).enumerate() {
        let p = inbox.join(format!("e{i}.csv"));
        let _ = match b % 7 {
            0 => std::fs::write(&p, format!("Serial,Bore\nVB{i},12.0\n")),
            1 => std::os::unix::fs::symlink(&outside, &p),
            2 => std::os::unix::fs::symlink(dir, &p),
            3 => std::os::unix::fs::symlink(dir.join("nowhere"), &p),
            4 => std::ffi::CString::new(p.to_string_lossy().into_owned())
                .map_err(std::io::Error::other)
                .and_then(|c| {
                    // SAFETY: mkfifo with a valid NUL-terminated path.
                    match unsafe { libc::mkfifo(c.as_ptr(), 0o600) } {
                        0 => Ok(()),
                        _ => Err(std::io::Error::last_os_error()),
                    }
                }),
            5 => std::fs::create_dir(&p),
            _ => std::fs::hard_link(&outside, &p),
        };
    }
    for (path, kind) in list_csv(&inbox) {
        let meta = std::fs::symlink_metadata(&path).expect("listed");
        assert_eq!(
            kind.is_none(),
            meta.file_type().is_file(),
            "{}",
            path.display()
        );
        match read_report(&path) {
            Ok(bytes) => {
                assert!(meta.file_type().is_file());
                assert!(!String::from_utf8_lossy(&bytes).contains("MARKER"));
            }
            Err(Ok(reason)) => assert!(!reason.contains("MARKER")),
            Err(Err(e)) => panic!("{}: {e}", path.display()),
        }
    }
}
