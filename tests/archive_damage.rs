//! Damage that is not a torn tail: bytes destroyed inside a segment with intact records after
//! them, and segments missing, copied or swapped. None of it may be taken for a crash's torn
//! write (which would cut confirmed records and hand their sequence numbers out again), and
//! none of it may be exported as if the archive were whole.

use std::fs;
use std::path::{Path, PathBuf};

use linewarden::archive::reader::{self, Filter, Reader};
use linewarden::archive::record::Record;
use linewarden::archive::writer::{Writer, WriterConfig};
use linewarden::archive::{ArchiveError, segment};

mod common;

const T0: i64 = 1_780_000_000_000; // 2026-05-28, a fixed time for tests

fn reading(i: u64) -> Record {
    Record::ReadingAccepted {
        source: "test".into(),
        characteristic: "bore".into(),
        value: 12.0 + i as f64 * 1e-4,
        unit: Some("mm".into()),
        source_time_ms: None,
        source_time_ignored: false,
        arrival_ms: T0 + i as i64,
        part: Some(format!("VB{i:05}")),
        source_key: None,
        word: None,
        inspected: None,
    }
}

fn cfg(dir: &Path, segment_bytes: u64) -> WriterConfig {
    let mut c = WriterConfig::new(dir);
    c.flush_interval_ms = 0;
    c.max_segment_bytes = segment_bytes;
    c.rotate_daily = false;
    c
}

/// An archive of `n` readings, each flushed (so each is confirmed durable).
fn fill(dir: &Path, n: u64, segment_bytes: u64) {
    let (mut w, _) = Writer::open(cfg(dir, segment_bytes)).unwrap();
    for i in 1..=n {
        w.append(&reading(i), T0 + i as i64).unwrap();
        w.flush().unwrap();
    }
}

/// Start offsets of every frame in a segment file.
fn frames(buf: &[u8]) -> Vec<usize> {
    let mut v = Vec::new();
    let mut at = 0;
    while at < buf.len() {
        let f = segment::decode(buf, at).unwrap();
        v.push(at);
        at = f.end;
    }
    v
}

fn quarantined(dir: &Path) -> Vec<PathBuf> {
    fs::read_dir(dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.to_string_lossy().contains(".quarantine-"))
        .collect()
}

/// The regression: a zeroed range in the middle of the open segment made recovery cut
/// everything after it (confirmed records) and reuse their sequence numbers. Swept over every
/// record of the segment, three kinds of damage (zeros, garbage, one flipped bit) and three
/// sizes: each must be refused by the writer and reported by `verify`, naming the segment and
/// the offset, with nothing cut and no byte changed.
#[test]
fn damage_inside_the_open_segment_is_refused_not_taken_for_a_torn_tail() {
    let base = tempfile::tempdir().unwrap();
    let src = base.path().join("src");
    fill(&src, 30, 64 << 20);
    let segs = segment::list(&src).unwrap();
    assert_eq!(segs.len(), 1, "one open segment");
    let name = segs[0].2.file_name().unwrap().to_owned();
    let good = fs::read(&segs[0].2).unwrap();
    let starts = frames(&good);
    let mut cases = 0;
    // Every record but the last (damage to the last one, with nothing after it, is a torn tail).
    for (k, &at) in starts.iter().enumerate().skip(1) {
        if k + 1 == starts.len() {
            break;
        }
        let frame_len = starts[k + 1] - at;
        for (kind, size) in [
            ("zeros", 8usize),
            ("zeros", frame_len),
            ("garbage", 16),
            ("bit", 1),
        ] {
            let mut bad = good.clone();
            let end = (at + size).min(bad.len());
            match kind {
                "zeros" => bad[at..end].fill(0),
                "garbage" => {
                    for (i, b) in bad[at..end].iter_mut().enumerate() {
                        *b = (i as u8).wrapping_mul(37).wrapping_add(11);
                    }
                }
                _ => bad[at + 9] ^= 0x20,
            }
            let dir = base.path().join(format!("case{cases}"));
            fs::create_dir(&dir).unwrap();
            fs::write(dir.join(&name), &bad).unwrap();
            let what = format!("{kind} ({size} bytes) at byte {at}, record {k}");
            match Writer::open(cfg(&dir, 64 << 20)) {
                Err(ArchiveError::Corrupt {
                    path,
                    offset,
                    problem,
                }) => {
                    assert_eq!(path, dir.join(&name), "{what}");
                    assert_eq!(offset as usize, at, "{what}");
                    assert!(
                        problem.contains("intact records follow"),
                        "{what}: {problem}"
                    );
                }
                Err(e) => panic!("{what}: wrong error {e}"),
                Ok((w, r)) => panic!(
                    "{what}: opened, next sequence {}, cut {:?}",
                    w.next_seq(),
                    r.quarantined
                ),
            }
            assert_eq!(
                fs::read(dir.join(&name)).unwrap(),
                bad,
                "{what}: nothing changed"
            );
            assert!(quarantined(&dir).is_empty(), "{what}: nothing cut");
            let v = reader::verify(&dir).unwrap();
            assert!(
                v.problems
                    .iter()
                    .any(|p| p.contains(&*name.to_string_lossy())
                        && p.contains(&format!("at byte {at}"))),
                "{what}: {:?} / notes {:?}",
                v.problems,
                v.notes
            );
            // A reader does not quietly stop there either.
            let r = Reader::open(&dir).unwrap();
            assert!(
                r.iter(&Filter::default()).any(|e| e.is_err()),
                "{what}: read as if whole"
            );
            fs::remove_dir_all(&dir).unwrap();
            cases += 1;
        }
    }
    assert!(cases >= 100, "{cases} cases");
}

/// The other side of the line: a tail with no intact frame after the damage is still cut on
/// open (a crash mid-write), keeping every confirmed record and the next sequence number.
#[test]
fn a_torn_tail_of_zeros_or_garbage_is_still_cut() {
    let base = tempfile::tempdir().unwrap();
    let src = base.path().join("src");
    fill(&src, 5, 64 << 20);
    let segs = segment::list(&src).unwrap();
    let name = segs[0].2.file_name().unwrap().to_owned();
    let good = fs::read(&segs[0].2).unwrap();
    for (i, tail) in [
        vec![0u8; 4096],
        vec![0xA5; 100],
        vec![1, 0, 0, 0, 9, 9, 9, 9],
    ]
    .into_iter()
    .enumerate()
    {
        let dir = base.path().join(format!("t{i}"));
        fs::create_dir(&dir).unwrap();
        let mut bytes = good.clone();
        bytes.extend_from_slice(&tail);
        fs::write(dir.join(&name), &bytes).unwrap();
        let (w, report) = Writer::open(cfg(&dir, 64 << 20)).unwrap();
        assert_eq!(report.quarantined.len(), 1);
        assert_eq!(report.quarantined[0].offset as usize, good.len());
        assert_eq!(w.next_seq(), 6);
    }
}

/// A segment whose header is destroyed while records follow it is corruption too, not a
/// segment that was being created at a crash.
#[test]
fn a_damaged_header_with_records_after_it_is_refused() {
    let dir = tempfile::tempdir().unwrap();
    fill(dir.path(), 4, 64 << 20);
    let path = segment::list(dir.path()).unwrap()[0].2.clone();
    let mut bytes = fs::read(&path).unwrap();
    bytes[0..8].fill(0);
    fs::write(&path, &bytes).unwrap();
    assert!(matches!(
        Writer::open(cfg(dir.path(), 64 << 20)),
        Err(ArchiveError::Corrupt { offset: 0, .. })
    ));
    assert!(path.exists(), "the segment is not removed");
    assert!(!reader::verify(dir.path()).unwrap().problems.is_empty());
}

/// Several sealed segments and an open one.
fn segmented(dir: &Path) -> Vec<(u64, u64, PathBuf)> {
    fill(dir, 60, 2048);
    let segs = segment::list(dir).unwrap();
    assert!(segs.len() >= 4, "{} segments", segs.len());
    segs
}

fn export(dir: &Path, extra: &[&str]) -> (bool, String, String) {
    let d = dir.to_str().unwrap();
    let mut args = vec!["archive", "export", d];
    args.extend_from_slice(extra);
    common::peers::cli(&args)
}

fn seqs(jsonl: &str) -> Vec<u64> {
    jsonl
        .lines()
        .map(|l| {
            serde_json::from_str::<serde_json::Value>(l).unwrap()["seq"]
                .as_u64()
                .unwrap()
        })
        .collect()
}

/// The regression: with the first segment missing, a segment copied, or two swapped, export
/// printed records silently missing, doubled or out of order and exited 0. Each of the three,
/// in JSON lines and CSV, must now fail with a message that names the problem; with
/// --allow-gaps it prints only records in order, once each, and says what it left out.
#[test]
fn export_refuses_a_missing_copied_or_swapped_segment() {
    let base = tempfile::tempdir().unwrap();
    let whole = base.path().join("whole");
    let segs = segmented(&whole);
    let (ok, out, err) = export(&whole, &[]);
    assert!(ok, "{err}");
    let all = seqs(&out);
    assert_eq!(all, (1..=all.len() as u64).collect::<Vec<_>>());

    let copy = |name: &str| {
        let d = base.path().join(name);
        fs::create_dir(&d).unwrap();
        for (_, _, p) in &segs {
            fs::copy(p, d.join(p.file_name().unwrap())).unwrap();
        }
        d
    };
    let file = |i: usize| segs[i].2.file_name().unwrap().to_owned();

    // 1. The first segment missing.
    let missing = copy("missing");
    fs::remove_file(missing.join(file(0))).unwrap();
    // 2. A sealed segment copied in again under the next index's name (and the rest shifted up).
    let doubled = copy("doubled");
    for i in (1..segs.len()).rev() {
        let (idx, first, _) = &segs[i];
        fs::rename(
            doubled.join(file(i)),
            doubled.join(segment::file_name(idx + 1, *first)),
        )
        .unwrap();
    }
    fs::copy(
        doubled.join(file(0)),
        doubled.join(segment::file_name(1, segs[0].1)),
    )
    .unwrap();
    // 3. Two sealed segments swapped by name.
    let swapped = copy("swapped");
    fs::rename(swapped.join(file(1)), swapped.join("tmp")).unwrap();
    fs::rename(swapped.join(file(2)), swapped.join(file(1))).unwrap();
    fs::rename(swapped.join("tmp"), swapped.join(file(2))).unwrap();

    for (dir, says, then) in [
        (&missing, "segment 0 is missing", "records 1 to"),
        (&doubled, "unlike its file name", "comes after"),
        (&swapped, "unlike its file name", "comes after"),
    ] {
        for format in ["jsonl", "csv"] {
            let (ok, _, err) = export(dir, &["--format", format]);
            assert!(
                !ok,
                "{} {format}: exported a damaged archive",
                dir.display()
            );
            assert!(err.contains(says), "{} {format}: {err}", dir.display());
        }
        let (ok, out, err) = export(dir, &["--allow-gaps"]);
        assert!(err.contains(then), "{}: {err}", dir.display());
        assert!(ok, "{}: {err}", dir.display());
        let got = seqs(&out);
        assert!(
            got.windows(2).all(|w| w[0] < w[1]),
            "{}: out of order or repeated: {got:?}",
            dir.display()
        );
        assert!(got.iter().all(|s| all.contains(s)));
        assert!(err.contains("not exported"), "{}: {err}", dir.display());
        assert!(err.contains("problem(s)"), "{}: {err}", dir.display());
    }
    // The stats count nothing of a damaged archive silently either.
    let (ok, _, err) = common::peers::cli(&["archive", "stats", missing.to_str().unwrap()]);
    assert!(!ok && err.contains("missing"), "{err}");
}

/// What broke: `run` appended to an archive whose middle segment was deleted, or one of whose
/// sealed segments was damaged in any of 13 ways, while `verify` and export refused the same
/// archive. The writer now runs the same checks at start and refuses, naming the segment and
/// what `verify` says. Swept: a segment missing, copied, swapped; and one bit flipped, eight
/// bytes zeroed, or the file cut at every 7th byte of a sealed segment, and bytes added after
/// its seal. A start on the whole archive still succeeds, and notes the sealed segments it
/// verified so that the next start does not hash them again.
#[test]
fn the_writer_refuses_to_start_on_an_archive_whose_sealed_segments_are_not_whole() {
    let base = tempfile::tempdir().unwrap();
    let whole = base.path().join("whole");
    let segs = segmented(&whole);
    let file = |i: usize| segs[i].2.file_name().unwrap().to_owned();
    // A start on the whole archive succeeds and notes the sealed segments.
    drop(Writer::open(cfg(&whole, 2048)).unwrap());
    let noted = fs::read_to_string(whole.join(reader::VERIFIED)).unwrap();
    assert_eq!(noted.lines().count(), segs.len() - 1, "{noted}");
    drop(Writer::open(cfg(&whole, 2048)).unwrap());

    let mut case = 0;
    let mut copy = || {
        case += 1;
        let d = base.path().join(format!("case-{case}"));
        fs::create_dir(&d).unwrap();
        for e in fs::read_dir(&whole).unwrap() {
            let p = e.unwrap().path();
            fs::copy(&p, d.join(p.file_name().unwrap())).unwrap();
        }
        d
    };
    let refused = |d: &Path, what: &str| {
        let before: Vec<Vec<u8>> = segment::list(d)
            .unwrap()
            .iter()
            .map(|(_, _, p)| fs::read(p).unwrap())
            .collect();
        let v = reader::verify(d).unwrap();
        assert!(!v.problems.is_empty(), "{what}: verify found nothing");
        match Writer::open(cfg(d, 2048)) {
            Err(e @ ArchiveError::Damaged { .. }) => {
                let said = e.to_string();
                assert!(
                    said.contains(&v.problems[0]),
                    "{what}: {said}\nverify: {v:?}"
                );
                assert!(said.contains("archive verify"), "{said}");
            }
            Err(e @ ArchiveError::Corrupt { .. }) => {
                // The newest sealed segment is read back by recovery, which finds it first.
                assert!(what.contains("newest"), "{what}: {e}");
            }
            Err(e) => panic!("{what}: {e}"),
            Ok(_) => panic!("{what}: the writer started on it"),
        }
        let after: Vec<Vec<u8>> = segment::list(d)
            .unwrap()
            .iter()
            .map(|(_, _, p)| fs::read(p).unwrap())
            .collect();
        assert!(before == after, "{what}: a segment was changed");
    };

    let d = copy();
    fs::remove_file(d.join(file(1))).unwrap();
    refused(&d, "a middle segment deleted");

    let d = copy();
    fs::rename(d.join(file(1)), d.join("tmp")).unwrap();
    fs::rename(d.join(file(2)), d.join(file(1))).unwrap();
    fs::rename(d.join("tmp"), d.join(file(2))).unwrap();
    refused(&d, "two sealed segments swapped");

    let d = copy();
    let (idx, first, _) = &segs[0];
    fs::rename(
        d.join(file(0)),
        d.join(segment::file_name(*idx, *first + 1)),
    )
    .unwrap();
    refused(&d, "a sealed segment renamed");

    // Every 7th byte of the first sealed segment: one bit flipped, eight bytes zeroed, the
    // file cut there; and bytes after its seal. Each written in place (a new mtime), so the
    // note of verified segments does not hide it.
    let len = fs::metadata(&segs[0].2).unwrap().len() as usize;
    for at in (0..len).step_by(7) {
        let d = copy();
        let p = d.join(file(0));
        let mut b = fs::read(&p).unwrap();
        b[at] ^= 0x01;
        fs::write(&p, &b).unwrap();
        refused(&d, &format!("bit flipped at byte {at}"));

        let d = copy();
        let p = d.join(file(0));
        let mut b = fs::read(&p).unwrap();
        for x in &mut b[at..(at + 8).min(len)] {
            *x = 0;
        }
        fs::write(&p, &b).unwrap();
        refused(&d, &format!("eight bytes zeroed at byte {at}"));

        let d = copy();
        let p = d.join(file(0));
        let b = fs::read(&p).unwrap();
        fs::write(&p, &b[..at]).unwrap();
        refused(&d, &format!("cut at byte {at}"));
    }
    let d = copy();
    let p = d.join(file(0));
    let mut b = fs::read(&p).unwrap();
    b.extend_from_slice(b"appended later");
    fs::write(&p, &b).unwrap();
    refused(&d, "bytes added after the seal");
}

/// What broke: with a zero-length newest segment (or an empty archive directory) `verify` said
/// "no problems" while stats, export and the desk refused the archive. A newest segment with no
/// intact header and nothing after it holds no record: every reader passes over it alike, and
/// the writer sets it aside on its start. An empty directory is empty to all of them.
#[test]
fn an_empty_or_unborn_newest_segment_is_nothing_to_every_reader() {
    let base = tempfile::tempdir().unwrap();
    for (case, unborn) in [
        ("empty", Vec::new()),
        ("cut-header", vec![0x30, 0x00, 0x00]),
        ("zeros", vec![0u8; 64]),
    ] {
        let d = base.path().join(case);
        fill(&d, 40, 2048);
        let segs = segment::list(&d).unwrap();
        let (idx, _, _) = segs.last().unwrap();
        let whole = reader::verify(&d).unwrap();
        let path = d.join(segment::file_name(idx + 1, whole.last_seq + 1));
        fs::write(&path, &unborn).unwrap();

        let v = reader::verify(&d).unwrap();
        assert!(v.problems.is_empty(), "{case}: {:?}", v.problems);
        assert_eq!(v.records, whole.records, "{case}");
        assert!(
            v.notes.iter().any(|n| n.contains("holds no record")),
            "{case}: {:?}",
            v.notes
        );
        let r = Reader::open(&d).unwrap();
        assert_eq!(
            r.iter(&Filter::default())
                .inspect(|e| assert!(e.is_ok(), "{case}: {e:?}"))
                .count() as u64,
            whole.records
        );
        r.tail(30).unwrap();
        for args in [
            vec!["archive", "verify"],
            vec!["archive", "stats"],
            vec!["archive", "export"],
            vec!["limits", "--archive"],
        ] {
            let mut args = args;
            args.push(d.to_str().unwrap());
            if args[0] == "limits" {
                args.extend(["--characteristic", "bore"]);
            }
            let (ok, out, err) = common::peers::cli(&args);
            // `limits` of readings with no subgroups says so; it never calls the archive damaged.
            if args[0] == "limits" {
                assert!(
                    ok || err.contains("holds no subgroups"),
                    "{case} {args:?}: {err}"
                );
            } else {
                assert!(ok, "{case} {args:?}: {out}{err}");
            }
            assert!(
                !err.contains("damage") && !err.contains("segment header"),
                "{err}"
            );
        }
        // The writer sets it aside and goes on from the records before it.
        let (mut w, _) = Writer::open(cfg(&d, 2048)).unwrap();
        assert_eq!(w.next_seq(), whole.last_seq + 1, "{case}");
        assert!(!path.exists(), "{case}: not set aside");
        w.append(&reading(999), T0).unwrap();
        w.flush().unwrap();
        drop(w);
        assert!(reader::verify(&d).unwrap().problems.is_empty());
    }

    // An empty directory: empty to everyone, damaged to no one.
    let d = base.path().join("nothing");
    fs::create_dir(&d).unwrap();
    let v = reader::verify(&d).unwrap();
    assert!(v.problems.is_empty());
    assert!(
        v.notes.iter().any(|n| n.contains("no records yet")),
        "{v:?}"
    );
    let (ok, _, err) = common::peers::cli(&["archive", "stats", d.to_str().unwrap()]);
    assert!(ok, "{err}");
    let (_, _, err) = common::peers::cli(&["archive", "export", d.to_str().unwrap()]);
    assert!(err.contains("no records"), "{err}");
    let (ok, _, err) = common::peers::cli(&[
        "limits",
        "--archive",
        d.to_str().unwrap(),
        "--characteristic",
        "bore",
    ]);
    assert!(!ok && err.contains("holds no subgroups"), "{err}");
}
