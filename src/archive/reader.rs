//! Reading the archive: iteration with filters, state rebuild from the newest checkpoint,
//! verification and statistics.
//!
//! A reader never changes the files. A torn record at the very end of the newest, unsealed
//! segment (a write in progress, or a crash the writer has not yet recovered from) ends
//! iteration quietly; any other damage is an error naming the segment and the byte offset.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use super::ArchiveError;
use super::record::{Envelope, Record, Tail};
use super::segment::{self, Header, Seal, TYPE_HEADER, TYPE_RECORD, TYPE_SEAL};

/// One segment file.
#[derive(Debug, Clone, PartialEq)]
pub struct SegmentInfo {
    pub index: u64,
    pub first_seq: u64,
    pub path: PathBuf,
    pub bytes: u64,
    pub seal: Option<Seal>,
}

/// Which records to return.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct Filter {
    pub from_seq: Option<u64>,
    /// Records appended at or after this time (ms since the epoch).
    pub since_ms: Option<i64>,
    /// Records appended before this time.
    pub until_ms: Option<i64>,
    pub characteristic: Option<String>,
    /// Record kinds (`reading-accepted`, ...); empty for all.
    pub kinds: Vec<String>,
}

impl Filter {
    /// Whether `e` passes.
    pub fn accepts(&self, e: &Envelope) -> bool {
        self.from_seq.is_none_or(|s| e.seq >= s)
            && self.since_ms.is_none_or(|t| e.time_ms >= t)
            && self.until_ms.is_none_or(|t| e.time_ms < t)
            && self
                .characteristic
                .as_deref()
                .is_none_or(|c| e.record.characteristic() == Some(c))
            && (self.kinds.is_empty() || self.kinds.iter().any(|k| k == e.record.kind()))
    }
}

/// A read-only view of an archive directory.
#[derive(Debug, Clone)]
pub struct Reader {
    dir: PathBuf,
    segments: Vec<SegmentInfo>,
}

impl Reader {
    /// Lists the segments and reads their seals (not their contents).
    pub fn open(dir: &Path) -> Result<Reader, ArchiveError> {
        let mut segments = Vec::new();
        for (index, first_seq, path) in segment::list(dir).map_err(|e| ArchiveError::io(dir, e))? {
            let bytes = std::fs::metadata(&path)
                .map_err(|e| ArchiveError::io(&path, e))?
                .len();
            let seal = segment::read_seal(&path)
                .map_err(|e| ArchiveError::io(&path, e))?
                .map(|(s, _)| s);
            segments.push(SegmentInfo {
                index,
                first_seq,
                path,
                bytes,
                seal,
            });
        }
        Ok(Reader {
            dir: dir.to_path_buf(),
            segments,
        })
    }

    pub fn dir(&self) -> &Path {
        &self.dir
    }

    pub fn segments(&self) -> &[SegmentInfo] {
        &self.segments
    }

    /// The records of segment `i` (position in [`Reader::segments`]) from byte `from` on.
    pub fn read_segment(&self, i: usize, from: Option<u64>) -> Result<Vec<Envelope>, ArchiveError> {
        let info = &self.segments[i];
        let buf = std::fs::read(&info.path).map_err(|e| ArchiveError::io(&info.path, e))?;
        let newest = i + 1 == self.segments.len();
        let corrupt = |offset: usize, problem: String| ArchiveError::Corrupt {
            path: info.path.clone(),
            offset: offset as u64,
            problem,
        };
        let header = segment::decode(&buf, 0)
            .map_err(|b| corrupt(0, format!("segment header: {}", b.words())))?;
        if header.kind != TYPE_HEADER {
            return Err(corrupt(0, "the first frame is not a segment header".into()));
        }
        let mut offset = from.map_or(header.end, |f| f as usize);
        let mut out = Vec::new();
        while offset < buf.len() {
            match segment::decode(&buf, offset) {
                Ok(f) if f.kind == TYPE_RECORD => {
                    let env = segment::envelope(f.payload)
                        .map_err(|e| corrupt(offset, format!("a record does not parse: {e}")))?;
                    out.push(env);
                    offset = f.end;
                }
                Ok(f) if f.kind == TYPE_SEAL => break,
                Ok(_) => return Err(corrupt(offset, "an unexpected frame type".into())),
                Err(_) if newest && info.seal.is_none() && torn_tail(&buf, offset) => break,
                Err(b) => return Err(corrupt(offset, b.words().to_string())),
            }
        }
        Ok(out)
    }

    /// Every record that passes `filter`, in sequence order, segment by segment.
    pub fn iter<'a>(
        &'a self,
        filter: &'a Filter,
    ) -> impl Iterator<Item = Result<Envelope, ArchiveError>> + 'a {
        let start = self.first_segment_for(filter);
        (start..self.segments.len())
            .flat_map(move |i| match self.read_segment(i, None) {
                Ok(v) => v.into_iter().map(Ok).collect::<Vec<_>>(),
                Err(e) => vec![Err(e)],
            })
            .filter(move |r| r.as_ref().map_or(true, |e| filter.accepts(e)))
    }

    /// The first segment that can hold records the filter wants.
    fn first_segment_for(&self, filter: &Filter) -> usize {
        let mut start = 0;
        for (i, s) in self.segments.iter().enumerate().skip(1) {
            let before_seq = filter.from_seq.is_some_and(|f| s.first_seq <= f);
            let before_time = filter.since_ms.is_some_and(|t| {
                segment::read_header(&s.path)
                    .ok()
                    .flatten()
                    .is_some_and(|h: Header| h.created_ms <= t)
            });
            if before_seq || before_time {
                start = i;
            }
        }
        start
    }

    /// The recent state of every characteristic: the newest checkpoint and every record after
    /// it. Reads only the segments from the newest checkpoint on, so the time does not grow
    /// with the size of the archive.
    pub fn tail(&self, keep: usize) -> Result<Tail, ArchiveError> {
        let mut tail = Tail::new(keep);
        let mut start = (0, None);
        let mut newest_records: Option<Vec<Envelope>> = None;
        for i in (0..self.segments.len()).rev() {
            let s = &self.segments[i];
            let offset = match &s.seal {
                Some(seal) => seal.checkpoint_offset,
                None => {
                    let records = self.read_segment(i, None)?;
                    let found = records
                        .iter()
                        .any(|e| matches!(e.record, Record::Checkpoint { .. }));
                    newest_records = Some(records);
                    if found {
                        start = (i, Some(0));
                        break;
                    }
                    None
                }
            };
            if let Some(o) = offset {
                start = (i, Some(o));
                break;
            }
        }
        for i in start.0..self.segments.len() {
            let records = match (&newest_records, i + 1 == self.segments.len()) {
                (Some(r), true) if self.segments[i].seal.is_none() => r.clone(),
                _ => self.read_segment(
                    i,
                    if i == start.0 {
                        start.1.filter(|o| *o > 0)
                    } else {
                        None
                    },
                )?,
            };
            for e in &records {
                tail.apply(e);
            }
        }
        Ok(tail)
    }
}

/// Whether the bytes from `offset` are a torn tail: a frame cut short, or a damaged frame with
/// nothing valid after it.
fn torn_tail(buf: &[u8], offset: usize) -> bool {
    match segment::decode(buf, offset) {
        Err(segment::Bad::Incomplete) | Err(segment::Bad::BadLength) => true,
        Err(segment::Bad::BadCrc) => !segment::good_frame_follows(buf, offset),
        Ok(_) => false,
    }
}

/// What `verify` found.
#[derive(Debug, Clone, PartialEq, Default)]
pub struct VerifyReport {
    pub segments: usize,
    pub sealed: usize,
    pub records: u64,
    pub last_seq: u64,
    /// Each problem, naming the segment and byte offset.
    pub problems: Vec<String>,
    /// Remarks that are not problems (a torn tail the writer will cut, quarantine files).
    pub notes: Vec<String>,
}

/// Checks every frame's CRC, the sequence numbers, every seal's hash and the chain between
/// segments.
pub fn verify(dir: &Path) -> Result<VerifyReport, ArchiveError> {
    let segs = segment::list(dir).map_err(|e| ArchiveError::io(dir, e))?;
    let mut r = VerifyReport {
        segments: segs.len(),
        ..VerifyReport::default()
    };
    let mut expected_index = 0u64;
    let mut expected_seq = 1u64;
    let mut prev_chain: Option<String> = Some(String::new());
    let count = segs.len();
    for (pos, (index, first_seq, path)) in segs.iter().enumerate() {
        let name = path
            .file_name()
            .map(|n| n.to_string_lossy().into_owned())
            .unwrap_or_default();
        if *index != expected_index {
            r.problems.push(format!(
                "segment {} is missing (found {name} next)",
                if index - expected_index == 1 {
                    expected_index.to_string()
                } else {
                    format!("{expected_index} to {}", index - 1)
                }
            ));
        }
        expected_index = index + 1;
        let buf = std::fs::read(path).map_err(|e| ArchiveError::io(path, e))?;
        let newest = pos + 1 == count;
        let header = match segment::decode(&buf, 0) {
            Ok(f) if f.kind == TYPE_HEADER => match serde_json::from_slice::<Header>(f.payload) {
                Ok(h) => Some((h, f.end)),
                Err(e) => {
                    r.problems
                        .push(format!("{name} at byte 0: the header does not parse: {e}"));
                    None
                }
            },
            Ok(_) => {
                r.problems
                    .push(format!("{name} at byte 0: the first frame is not a header"));
                None
            }
            Err(b) => {
                r.problems.push(format!(
                    "{name} at byte 0: the header is damaged: {}",
                    b.words()
                ));
                None
            }
        };
        let Some((header, mut offset)) = header else {
            prev_chain = None;
            continue;
        };
        if header.segment != *index || header.first_seq != *first_seq {
            r.problems.push(format!(
                "{name}: the header says segment {} from sequence {}, unlike its name",
                header.segment, header.first_seq
            ));
        }
        if let Some(pc) = &prev_chain
            && &header.prev_chain != pc
        {
            r.problems.push(format!(
                "{name}: its header does not chain to the segment before it: a segment was altered, replaced or deleted"
            ));
        }
        if *first_seq != expected_seq {
            r.problems.push(format!(
                "{name}: starts at sequence {first_seq} where {expected_seq} was expected ({} records missing or duplicated)",
                (*first_seq as i64 - expected_seq as i64).abs()
            ));
        }
        let mut seq = first_seq - 1;
        let mut seal: Option<(Seal, usize)> = None;
        let mut ok = true;
        while offset < buf.len() {
            match segment::decode(&buf, offset) {
                Ok(f) if f.kind == TYPE_RECORD => {
                    match segment::envelope(f.payload) {
                        Ok(e) => {
                            if e.seq != seq + 1 {
                                r.problems.push(format!(
                                    "{name} at byte {offset}: sequence {} follows {seq}",
                                    e.seq
                                ));
                            }
                            seq = e.seq;
                            r.records += 1;
                        }
                        Err(e) => {
                            r.problems.push(format!(
                                "{name} at byte {offset}: a record does not parse: {e}"
                            ));
                            ok = false;
                        }
                    }
                    offset = f.end;
                }
                Ok(f) if f.kind == TYPE_SEAL => {
                    match serde_json::from_slice::<Seal>(f.payload) {
                        Ok(s) => seal = Some((s, offset)),
                        Err(e) => r.problems.push(format!(
                            "{name} at byte {offset}: the seal does not parse: {e}"
                        )),
                    }
                    break;
                }
                Ok(_) => {
                    r.problems
                        .push(format!("{name} at byte {offset}: an unexpected frame type"));
                    ok = false;
                    break;
                }
                Err(b) if newest && torn_tail(&buf, offset) && segment::seal_of(&buf).is_none() => {
                    r.notes.push(format!(
                        "{name} at byte {offset}: the open segment ends with {} damaged bytes ({}); the writer cuts them on its next start",
                        buf.len() - offset,
                        b.words()
                    ));
                    break;
                }
                Err(b) => {
                    r.problems
                        .push(format!("{name} at byte {offset}: {}", b.words()));
                    ok = false;
                    break;
                }
            }
        }
        if seal.is_none() && !ok {
            // Scanning stopped at damage; the seal, found through the trailer, still tells
            // where the segment should end and lets the chain be checked.
            if let Some((s, at)) = segment::seal_of(&buf) {
                seq = s.last_seq;
                seal = Some((s, at));
                ok = true;
            }
        }
        expected_seq = seq + 1;
        r.last_seq = seq;
        match seal {
            Some((s, at)) => {
                r.sealed += 1;
                let sha = segment::sha256_hex(&buf[..at]);
                if sha != s.sha256 {
                    r.problems.push(format!(
                        "{name}: the content does not match its seal's SHA-256: the sealed segment was edited"
                    ));
                }
                if s.prev_chain != header.prev_chain
                    || segment::chain(&s.prev_chain, &s.sha256) != s.chain
                {
                    r.problems
                        .push(format!("{name}: the seal's chain hash is wrong"));
                }
                if ok && s.last_seq != seq {
                    r.problems.push(format!(
                        "{name}: the seal says the last sequence is {} but the segment ends at {seq}",
                        s.last_seq
                    ));
                }
                if segment::seal_of(&buf).is_none() {
                    r.problems.push(format!(
                        "{name}: the trailer after the seal is missing or damaged"
                    ));
                }
                prev_chain = Some(s.chain);
            }
            None => {
                if !newest {
                    r.problems
                        .push(format!("{name}: not sealed, but newer segments follow it"));
                }
                prev_chain = None;
            }
        }
    }
    for entry in std::fs::read_dir(dir)
        .map_err(|e| ArchiveError::io(dir, e))?
        .flatten()
    {
        let n = entry.file_name().to_string_lossy().into_owned();
        if n.contains(".quarantine-") {
            r.notes.push(format!(
                "quarantine file {n}: bytes cut from a damaged tail during recovery"
            ));
        }
    }
    r.notes.sort();
    Ok(r)
}

/// Counts for `archive stats`.
#[derive(Debug, Clone, PartialEq, Default, serde::Serialize)]
pub struct Stats {
    pub segments: usize,
    pub sealed: usize,
    pub bytes: u64,
    pub records: u64,
    pub first_seq: Option<u64>,
    pub last_seq: Option<u64>,
    pub first_time_ms: Option<i64>,
    pub last_time_ms: Option<i64>,
    pub by_kind: BTreeMap<String, u64>,
    pub by_characteristic: BTreeMap<String, u64>,
}

/// Reads every record and counts.
pub fn stats(dir: &Path) -> Result<Stats, ArchiveError> {
    let reader = Reader::open(dir)?;
    let mut s = Stats {
        segments: reader.segments.len(),
        sealed: reader.segments.iter().filter(|x| x.seal.is_some()).count(),
        bytes: reader.segments.iter().map(|x| x.bytes).sum(),
        ..Stats::default()
    };
    let all = Filter::default();
    for e in reader.iter(&all) {
        let e = e?;
        s.records += 1;
        s.first_seq.get_or_insert(e.seq);
        s.last_seq = Some(e.seq);
        s.first_time_ms.get_or_insert(e.time_ms);
        s.last_time_ms = Some(e.time_ms);
        *s.by_kind.entry(e.record.kind().to_string()).or_default() += 1;
        if let Some(c) = e.record.characteristic() {
            *s.by_characteristic.entry(c.to_string()).or_default() += 1;
        }
    }
    Ok(s)
}
