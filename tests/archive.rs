//! The archive on real files: round trips, rotation and sealing, recovery from torn and
//! corrupt tails, tamper evidence, and state rebuild from checkpoints.

use std::fs;
use std::path::{Path, PathBuf};

use linewarden::archive::reader::{self, Filter, Reader};
use linewarden::archive::record::{Record, SubgroupSummary, Tail};
use linewarden::archive::writer::{Writer, WriterConfig};
use linewarden::archive::{ArchiveError, segment};
use linewarden::stats::Limits;

const T0: i64 = 1_780_000_000_000; // 2026-05-28, a fixed time for tests

fn reading(c: &str, v: f64, i: i64) -> Record {
    Record::ReadingAccepted {
        source: "test".into(),
        characteristic: c.into(),
        value: v,
        unit: Some("mm".into()),
        source_time_ms: None,
        source_time_ignored: false,
        arrival_ms: T0 + i,
        part: None,
        source_key: None,
        word: None,
        inspected: None,
    }
}

fn subgroup(c: &str, number: u64, readings: Vec<u64>) -> Record {
    Record::SubgroupResult {
        characteristic: c.into(),
        subgroup: SubgroupSummary {
            number,
            time_ms: T0,
            n: readings.len(),
            mean: 12.0,
            dispersion: Some(0.01),
            found: None,
            inspected: None,
        },
        readings,
        partial: false,
        location: Some(Limits {
            center: 12.0,
            ucl: 12.01,
            lcl: 11.99,
        }),
        dispersion: None,
        violations: vec![],
    }
}

fn cfg(dir: &Path) -> WriterConfig {
    let mut c = WriterConfig::new(dir);
    c.flush_interval_ms = 0;
    c
}

fn all(dir: &Path) -> Vec<linewarden::archive::Envelope> {
    Reader::open(dir)
        .unwrap()
        .iter(&Filter::default())
        .collect::<Result<Vec<_>, _>>()
        .unwrap()
}

/// Writes `n` readings and a subgroup every 5, flushing each; returns the writer.
fn fill(dir: &Path, cfg: WriterConfig, n: u64) -> Writer {
    let (mut w, _) = Writer::open(cfg).unwrap();
    let mut pending = Vec::new();
    for i in 0..n {
        let seq = w
            .append(
                &reading("bore", 12.0 + i as f64 * 1e-4, i as i64),
                T0 + i as i64,
            )
            .unwrap();
        pending.push(seq);
        if pending.len() == 5 {
            w.append(
                &subgroup("bore", i / 5 + 1, std::mem::take(&mut pending)),
                T0 + i as i64,
            )
            .unwrap();
        }
        w.flush().unwrap();
    }
    let _ = dir;
    w
}

#[test]
fn records_round_trip_and_sequence_numbers_continue() {
    let dir = tempfile::tempdir().unwrap();
    let w = fill(dir.path(), cfg(dir.path()), 12);
    assert_eq!(w.durable_seq(), 14); // 12 readings + 2 subgroups
    drop(w);
    let (mut w, report) = Writer::open(cfg(dir.path())).unwrap();
    assert_eq!(report.next_seq, 15);
    assert!(report.quarantined.is_empty());
    assert_eq!(w.append(&reading("bore", 1.0, 99), T0 + 99).unwrap(), 15);
    w.flush().unwrap();
    let got = all(dir.path());
    assert_eq!(got.len(), 15);
    assert!(got.iter().enumerate().all(|(i, e)| e.seq == i as u64 + 1));
    let v = reader::verify(dir.path()).unwrap();
    assert!(v.problems.is_empty(), "{:?}", v.problems);
}

#[test]
fn rotation_seals_chains_and_checkpoints() {
    let dir = tempfile::tempdir().unwrap();
    let mut c = cfg(dir.path());
    c.max_segment_bytes = 4096;
    let w = fill(dir.path(), c.clone(), 300);
    let expected_tail = w.tail().clone();
    drop(w);
    let r = Reader::open(dir.path()).unwrap();
    assert!(r.segments().len() > 5, "{} segments", r.segments().len());
    assert!(
        r.segments()[..r.segments().len() - 1]
            .iter()
            .all(|s| s.seal.is_some())
    );
    for s in r.segments() {
        assert!(s.bytes <= 4096 + 1024, "segment of {} bytes", s.bytes);
    }
    // Every segment after the first starts with a checkpoint.
    for i in 1..r.segments().len() {
        let recs = r.read_segment(i, None).unwrap();
        assert!(
            matches!(recs[0].record, Record::Checkpoint { .. }),
            "segment {i}"
        );
    }
    let v = reader::verify(dir.path()).unwrap();
    assert!(v.problems.is_empty(), "{:?}", v.problems);
    assert_eq!(v.sealed, r.segments().len() - 1);
    // The tail rebuilt from the newest checkpoint equals the writer's own and a full replay.
    let rebuilt = r.tail(c.tail_keep).unwrap();
    assert_eq!(rebuilt, expected_tail);
    let mut replay = Tail::new(c.tail_keep);
    for e in all(dir.path()) {
        replay.apply(&e);
    }
    assert_eq!(rebuilt, replay);
    assert_eq!(rebuilt.characteristics["bore"].recent.len(), 30);
    assert_eq!(
        rebuilt.characteristics["bore"]
            .recent
            .last()
            .unwrap()
            .number,
        60
    );
    // Reopening the writer resumes the same tail.
    let (w, _) = Writer::open(c).unwrap();
    assert_eq!(w.tail(), &expected_tail);
}

#[test]
fn a_new_utc_day_starts_a_new_segment() {
    let dir = tempfile::tempdir().unwrap();
    let (mut w, _) = Writer::open(cfg(dir.path())).unwrap();
    let day = 86_400_000;
    let t = (T0 / day) * day + day - 1000; // one second before midnight
    w.append(&reading("bore", 1.0, 0), t).unwrap();
    w.append(&reading("bore", 2.0, 1), t + 500).unwrap();
    w.append(&reading("bore", 3.0, 2), t + 2000).unwrap();
    w.flush().unwrap();
    let r = Reader::open(dir.path()).unwrap();
    assert_eq!(r.segments().len(), 2);
    assert!(r.segments()[0].seal.is_some());
}

/// The bytes of the newest segment, and the offset where its last record starts.
fn last_record(dir: &Path) -> (PathBuf, Vec<u8>, usize) {
    let segs = segment::list(dir).unwrap();
    let path = segs.last().unwrap().2.clone();
    let buf = fs::read(&path).unwrap();
    let mut offset = 0;
    let mut last = 0;
    while offset < buf.len() {
        let f = segment::decode(&buf, offset).unwrap();
        last = offset;
        offset = f.end;
    }
    (path, buf, last)
}

fn quarantine_files(dir: &Path) -> Vec<PathBuf> {
    fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.to_string_lossy().contains(".quarantine-"))
        .collect()
}

#[test]
fn a_torn_last_record_is_cut_at_every_byte_offset() {
    let base = tempfile::tempdir().unwrap();
    let src = base.path().join("src");
    drop(fill(&src, cfg(&src), 7));
    let (path, buf, last) = last_record(&src);
    let name = path.file_name().unwrap().to_owned();
    for cut in last + 1..buf.len() {
        let dir = base.path().join(format!("cut{cut}"));
        fs::create_dir(&dir).unwrap();
        fs::write(dir.join(&name), &buf[..cut]).unwrap();
        let (w, report) = Writer::open(cfg(&dir)).unwrap();
        assert_eq!(report.quarantined.len(), 1, "cut at {cut}");
        let q = &report.quarantined[0];
        assert_eq!(q.offset as usize, last, "cut at {cut}");
        assert_eq!(fs::read(&q.quarantine).unwrap(), &buf[last..cut]);
        assert_eq!(fs::metadata(dir.join(&name)).unwrap().len() as usize, last);
        assert_eq!(w.next_seq(), 8, "the torn 8th record is gone, 7 remain");
        drop(w);
        assert_eq!(all(&dir).len(), 7);
        fs::remove_dir_all(&dir).unwrap();
    }
}

#[test]
fn a_bit_flip_in_the_last_record_cuts_exactly_that_record() {
    let base = tempfile::tempdir().unwrap();
    let src = base.path().join("src");
    drop(fill(&src, cfg(&src), 3));
    let (path, buf, last) = last_record(&src);
    let name = path.file_name().unwrap().to_owned();
    let dir = base.path().join("flip");
    for byte in last..buf.len() {
        for bit in [0u8, 3, 7] {
            fs::create_dir_all(&dir).unwrap();
            let mut bad = buf.clone();
            bad[byte] ^= 1 << bit;
            fs::write(dir.join(&name), &bad).unwrap();
            let (w, report) = Writer::open(cfg(&dir)).unwrap();
            assert_eq!(report.quarantined.len(), 1, "byte {byte} bit {bit}");
            assert_eq!(report.quarantined[0].offset as usize, last);
            assert_eq!(
                fs::read(&report.quarantined[0].quarantine).unwrap(),
                &bad[last..]
            );
            assert_eq!(w.next_seq(), 3);
            drop(w);
            fs::remove_dir_all(&dir).unwrap();
        }
    }
}

#[test]
fn corruption_before_good_records_is_an_error_not_a_cut() {
    let dir = tempfile::tempdir().unwrap();
    drop(fill(dir.path(), cfg(dir.path()), 6));
    let segs = segment::list(dir.path()).unwrap();
    let path = segs[0].2.clone();
    let mut buf = fs::read(&path).unwrap();
    let header_end = segment::decode(&buf, 0).unwrap().end;
    let second = segment::decode(&buf, header_end).unwrap().end;
    buf[second + 20] ^= 0x40;
    fs::write(&path, &buf).unwrap();
    match Writer::open(cfg(dir.path())) {
        Err(ArchiveError::Corrupt {
            path: p,
            offset,
            problem,
        }) => {
            assert_eq!(p, path);
            assert_eq!(offset as usize, second);
            assert!(problem.contains("CRC-32C does not match"), "{problem}");
        }
        Err(e) => panic!("wrong error: {e}"),
        Ok(_) => panic!("opened a corrupt archive"),
    }
    assert!(quarantine_files(dir.path()).is_empty(), "nothing is cut");
    let v = reader::verify(dir.path()).unwrap();
    assert!(
        v.problems
            .iter()
            .any(|p| p.contains(&format!("at byte {second}"))),
        "{:?}",
        v.problems
    );
}

#[test]
fn verify_detects_an_edited_byte_and_a_deleted_segment() {
    let dir = tempfile::tempdir().unwrap();
    let mut c = cfg(dir.path());
    c.max_segment_bytes = 4096;
    drop(fill(dir.path(), c, 200));
    let segs = segment::list(dir.path()).unwrap();
    assert!(segs.len() >= 4);
    // Edit one byte inside a record's JSON of a sealed segment, keeping the frame's CRC valid,
    // as someone covering their tracks would: the seal's SHA-256 still catches it.
    let path = &segs[1].2;
    let mut buf = fs::read(path).unwrap();
    let h_end = segment::decode(&buf, 0).unwrap().end;
    let f_end = segment::decode(&buf, h_end).unwrap().end;
    let (f2_offset, f2_end, digit) = {
        let f2 = segment::decode(&buf, f_end).unwrap();
        (
            f2.offset,
            f2.end,
            f2.payload.iter().position(|b| b.is_ascii_digit()).unwrap(),
        )
    };
    let at = f2_offset + 9 + digit;
    buf[at] = if buf[at] == b'1' { b'2' } else { b'1' };
    let payload = buf[f2_offset + 9..f2_end].to_vec();
    let mut reframed = Vec::new();
    segment::encode(b'R', &payload, &mut reframed);
    buf[f2_offset..f2_end].copy_from_slice(&reframed);
    fs::write(path, &buf).unwrap();
    let v = reader::verify(dir.path()).unwrap();
    assert!(
        v.problems
            .iter()
            .any(|p| p.contains("does not match its seal's SHA-256")),
        "{:?}",
        v.problems
    );

    // A plain edit breaks the CRC too.
    let path2 = &segs[2].2;
    let mut buf = fs::read(path2).unwrap();
    let h_end = segment::decode(&buf, 0).unwrap().end;
    buf[h_end + 30] ^= 1;
    fs::write(path2, &buf).unwrap();
    let v = reader::verify(dir.path()).unwrap();
    assert!(
        v.problems
            .iter()
            .any(|p| p.contains("CRC-32C does not match")),
        "{:?}",
        v.problems
    );

    // Deleting a segment: the gap in indexes, the sequence numbers and the chain all show it.
    fs::remove_file(&segs[3].2).unwrap();
    let v = reader::verify(dir.path()).unwrap();
    let text = v.problems.join("\n");
    assert!(text.contains("segment 3 is missing"), "{text}");
    assert!(text.contains("records missing"), "{text}");
    assert!(
        text.contains("does not chain to the segment before it"),
        "{text}"
    );
}

#[test]
fn a_crash_while_creating_a_segment_leaves_a_recoverable_archive() {
    let dir = tempfile::tempdir().unwrap();
    let mut c = cfg(dir.path());
    c.max_segment_bytes = 4096;
    drop(fill(dir.path(), c.clone(), 100));
    let segs = segment::list(dir.path()).unwrap();
    let (index, _, last) = segs.last().unwrap().clone();
    let durable = all(dir.path()).len() as u64;
    // The writer died after creating the next file but before its header was complete.
    let next = dir.path().join(segment::file_name(index + 1, durable + 1));
    fs::write(&next, [7u8, 0, 0]).unwrap();
    let (mut w, report) = Writer::open(c).unwrap();
    assert_eq!(report.quarantined.len(), 1);
    assert!(!next.exists());
    assert_eq!(w.next_seq(), durable + 1);
    w.append(&reading("bore", 1.0, 0), T0).unwrap();
    w.flush().unwrap();
    drop(w);
    let v = reader::verify(dir.path()).unwrap();
    assert!(v.problems.is_empty(), "{:?}", v.problems);
    let _ = last;
}

#[test]
fn filters_select_by_characteristic_kind_sequence_and_time() {
    let dir = tempfile::tempdir().unwrap();
    let (mut w, _) = Writer::open(cfg(dir.path())).unwrap();
    for i in 0..10 {
        w.append(
            &reading(if i % 2 == 0 { "a" } else { "b" }, i as f64, i),
            T0 + i * 1000,
        )
        .unwrap();
    }
    w.flush().unwrap();
    let r = Reader::open(dir.path()).unwrap();
    let count = |f: Filter| r.iter(&f).count();
    assert_eq!(
        count(Filter {
            characteristic: Some("a".into()),
            ..Filter::default()
        }),
        5
    );
    assert_eq!(
        count(Filter {
            from_seq: Some(8),
            ..Filter::default()
        }),
        3
    );
    assert_eq!(
        count(Filter {
            since_ms: Some(T0 + 3000),
            until_ms: Some(T0 + 6000),
            ..Filter::default()
        }),
        3
    );
    assert_eq!(
        count(Filter {
            kinds: vec!["reading-rejected".into()],
            ..Filter::default()
        }),
        0
    );
}

/// A frame written in place (how a checkpoint of 10,000 characteristics is framed without a
/// second copy of it) is byte for byte the frame of the same payload written from a copy, and a
/// payload that fails to serialize leaves the buffer as it was.
#[test]
fn a_frame_written_in_place_equals_one_written_from_a_copy() {
    let payload = br#"{"v":1,"seq":7,"kind":"checkpoint","characteristics":{}}"#;
    let mut a = b"earlier bytes".to_vec();
    let mut b = a.clone();
    segment::encode(segment::TYPE_RECORD, payload, &mut a);
    segment::encode_with(segment::TYPE_RECORD, &mut b, |out| {
        out.extend_from_slice(payload);
        Ok::<(), ()>(())
    })
    .unwrap();
    assert_eq!(a, b);
    let before = b.clone();
    let failed = segment::encode_with(segment::TYPE_RECORD, &mut b, |out| {
        out.extend_from_slice(b"half a rec");
        Err("does not serialize")
    });
    assert_eq!(failed, Err("does not serialize"));
    assert_eq!(b, before);
}
