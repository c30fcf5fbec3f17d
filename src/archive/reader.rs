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
    /// The sequence numbers of unreadable records met so far (see [`segment::Unreadable`]):
    /// skipped, and counted as present by the continuity checks.
    unreadable: std::cell::RefCell<std::collections::BTreeSet<u64>>,
}

impl Reader {
    /// Lists the segments and reads their seals (not their contents).
    pub fn open(dir: &Path) -> Result<Reader, ArchiveError> {
        let mut segments = Vec::new();
        let (listed, _) = live_segments(dir)?;
        for (index, first_seq, path) in listed {
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
            unreadable: Default::default(),
        })
    }

    pub fn dir(&self) -> &Path {
        &self.dir
    }

    /// The sequence numbers of the unreadable records read past so far, which every reader
    /// skips (each is logged as a warning when met).
    pub fn unreadable(&self) -> Vec<u64> {
        self.unreadable.borrow().iter().copied().collect()
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
                    match segment::parse_record(f.payload)
                        .map_err(|e| corrupt(offset, format!("a record does not parse: {e}")))?
                    {
                        segment::Parsed::Record(env) => out.push(env),
                        segment::Parsed::Unreadable(u) => {
                            tracing::warn!(
                                component = "archive",
                                "{} at byte {offset}: {u}",
                                file_name(&info.path)
                            );
                            self.unreadable.borrow_mut().insert(u.seq);
                        }
                    }
                    offset = f.end;
                }
                Ok(f) if f.kind == TYPE_SEAL => break,
                Ok(_) => return Err(corrupt(offset, "an unexpected frame type".into())),
                Err(_) if newest && info.seal.is_none() && segment::is_torn_tail(&buf, offset) => {
                    break;
                }
                Err(b) => {
                    return Err(corrupt(offset, damage_words(&buf, offset, b)));
                }
            }
        }
        Ok(out)
    }

    /// Every record that passes `filter`, in sequence order, segment by segment, checking as
    /// it goes that the sequence numbers run on without a gap, a repeat or a reversal (a
    /// segment missing, copied or renamed) and that each segment's header matches its file
    /// name.
    ///
    /// A problem is yielded as an `Err` item; iteration then goes on past it (the rest of the
    /// segment, or the next segment after a damaged one), skipping records that would repeat or
    /// go back. A caller that must not give partial data stops at the first `Err`; one that was
    /// told to read what it can (`export --allow-gaps`) reports each and carries on.
    pub fn iter<'a>(&'a self, filter: &'a Filter) -> Records<'a> {
        let start = self.first_segment_for(filter);
        let expected = match self.segments.get(start) {
            Some(_) if start == 0 => 1,
            Some(s) => s.first_seq,
            None => 1,
        };
        Records {
            reader: self,
            filter,
            next_segment: start,
            expected_index: self
                .segments
                .get(start)
                .map_or(0, |s| if start == 0 { 0 } else { s.index }),
            expected_seq: expected,
            current: Vec::new().into_iter(),
            current_path: PathBuf::new(),
            pending: std::collections::VecDeque::new(),
            held: None,
        }
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

/// The segments of an archive (`(index, first_seq, path)`), and the newest one left out with
/// why.
pub type LiveSegments = (Vec<(u64, u64, PathBuf)>, Option<(PathBuf, String)>);

/// The segments of `dir` that can hold records, and the newest one left out when it cannot:
/// a newest segment with no intact header and nothing intact after it (empty, or cut short
/// while being created at a crash) holds no record. `verify` notes it, the writer sets it
/// aside on its next start, and every reader passes over it alike.
pub fn live_segments(dir: &Path) -> Result<LiveSegments, ArchiveError> {
    let mut listed = segment::list(dir).map_err(|e| ArchiveError::io(dir, e))?;
    if let Some((_, _, path)) = listed.last()
        && segment::read_header(path).ok().flatten().is_none()
    {
        let buf = std::fs::read(path).map_err(|e| ArchiveError::io(path, e))?;
        if let Err(b) = segment::decode(&buf, 0)
            && segment::intact_frame_after(&buf, 0).is_none()
        {
            let words = if buf.is_empty() {
                "it is empty".to_string()
            } else {
                b.words().to_string()
            };
            let (_, _, path) = listed.pop().expect("looked at above");
            return Ok((listed, Some((path, words))));
        }
    }
    Ok((listed, None))
}

/// The records of an archive in order, with continuity checks: see [`Reader::iter`].
pub struct Records<'a> {
    reader: &'a Reader,
    filter: &'a Filter,
    next_segment: usize,
    expected_index: u64,
    expected_seq: u64,
    current: std::vec::IntoIter<Envelope>,
    current_path: PathBuf,
    pending: std::collections::VecDeque<ArchiveError>,
    held: Option<Envelope>,
}

impl Records<'_> {
    fn gap(&self, path: &Path, problem: String) -> ArchiveError {
        ArchiveError::Sequence {
            path: path.to_path_buf(),
            problem,
        }
    }

    /// Opens the next segment; false when there is none.
    fn open_next(&mut self) -> bool {
        let Some(info) = self.reader.segments.get(self.next_segment) else {
            return false;
        };
        let i = self.next_segment;
        self.next_segment += 1;
        self.current_path = info.path.clone();
        let name = file_name(&info.path);
        if info.index != self.expected_index {
            let missing = if info.index > self.expected_index {
                if info.index - self.expected_index == 1 {
                    format!("segment {} is missing", self.expected_index)
                } else {
                    format!(
                        "segments {} to {} are missing",
                        self.expected_index,
                        info.index - 1
                    )
                }
            } else {
                format!(
                    "segment {} appears twice (a copy under another name?)",
                    info.index
                )
            };
            self.pending
                .push_back(self.gap(&info.path, format!("{missing} before {name}")));
        }
        self.expected_index = info.index + 1;
        match segment::read_header(&info.path) {
            Ok(Some(h)) if h.segment != info.index || h.first_seq != info.first_seq => {
                self.pending.push_back(self.gap(
                    &info.path,
                    format!(
                        "its header says segment {} from sequence {}, unlike its file name {name} (renamed or copied?)",
                        h.segment, h.first_seq
                    ),
                ));
            }
            _ => {}
        }
        match self.reader.read_segment(i, None) {
            Ok(v) => self.current = v.into_iter(),
            Err(e) => {
                self.current = Vec::new().into_iter();
                self.pending.push_back(e);
            }
        }
        true
    }
}

fn file_name(path: &Path) -> String {
    path.file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| path.display().to_string())
}

impl Iterator for Records<'_> {
    type Item = Result<Envelope, ArchiveError>;

    fn next(&mut self) -> Option<Self::Item> {
        loop {
            if let Some(e) = self.pending.pop_front() {
                return Some(Err(e));
            }
            let Some(e) = self.held.take().or_else(|| self.current.next()) else {
                if self.open_next() {
                    continue;
                }
                return None;
            };
            let seq = e.seq;
            if seq < self.expected_seq {
                // A repeat or a step back: never give the same number twice, nor go back.
                let last = self.expected_seq - 1;
                let err = self.gap(
                    &self.current_path.clone(),
                    format!(
                        "record {seq} in {} comes after record {last}: records repeated or out of order (a segment copied or renamed?)",
                        file_name(&self.current_path)
                    ),
                );
                // Say it once per run of such records, not once per record.
                let mut skipped = 1u64;
                while let Some(next) = self.current.as_slice().first() {
                    if next.seq >= self.expected_seq {
                        break;
                    }
                    self.current.next();
                    skipped += 1;
                }
                let err = match err {
                    ArchiveError::Sequence { path, problem } => ArchiveError::Sequence {
                        path,
                        problem: format!("{problem}; {skipped} such record(s) left out"),
                    },
                    other => other,
                };
                return Some(Err(err));
            }
            // An unreadable record was read past: its number is there, only its content is
            // skipped.
            while seq > self.expected_seq
                && self.reader.unreadable.borrow().contains(&self.expected_seq)
            {
                self.expected_seq += 1;
            }
            if seq > self.expected_seq {
                let err = self.gap(
                    &self.current_path.clone(),
                    if seq - self.expected_seq == 1 {
                        format!(
                            "record {} is missing before record {seq} in {}",
                            self.expected_seq,
                            file_name(&self.current_path)
                        )
                    } else {
                        format!(
                            "records {} to {} are missing before record {seq} in {}",
                            self.expected_seq,
                            seq - 1,
                            file_name(&self.current_path)
                        )
                    },
                );
                self.pending.push_back(err);
                // The record itself is good: it comes right after the error.
                self.expected_seq = seq;
                self.held = Some(e);
                continue;
            }
            self.expected_seq = seq + 1;
            if self.filter.accepts(&e) {
                return Some(Ok(e));
            }
        }
    }
}

/// Words for damage at `offset`: what is wrong, and whether intact records follow (which makes
/// it corruption inside the segment rather than a write cut short).
pub fn damage_words(buf: &[u8], offset: usize, bad: segment::Bad) -> String {
    match segment::intact_frame_after(buf, offset) {
        Some(next) => format!(
            "{}, and intact records follow at byte {next}: damage inside the segment, not a write cut short by a crash",
            bad.words()
        ),
        None => bad.words().to_string(),
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
    /// Intact records this build cannot read (see [`segment::Unreadable`]): not damage, since
    /// their bytes are those written and the chain holds, but every reader skips them.
    pub unreadable: Vec<String>,
}

/// The checks of a segment's header against its neighbours: its file name, the chain from the
/// segment before, and where its sequence numbers start. Problems go to `problems`.
fn header_links(
    problems: &mut Vec<String>,
    name: &str,
    h: &Header,
    (index, first_seq): (u64, u64),
    expected_seq: u64,
    prev_chain: Option<&String>,
) {
    if h.segment != index || h.first_seq != first_seq {
        problems.push(format!(
            "{name}: the header says segment {} from sequence {}, unlike its name",
            h.segment, h.first_seq
        ));
    }
    if let Some(pc) = prev_chain
        && &h.prev_chain != pc
    {
        problems.push(format!(
            "{name}: its header does not chain to the segment before it: a segment was altered, replaced or deleted"
        ));
    }
    if first_seq != expected_seq {
        problems.push(format!(
            "{name}: starts at sequence {first_seq} where {expected_seq} was expected ({} records missing or duplicated)",
            (first_seq as i64 - expected_seq as i64).abs()
        ));
    }
}

/// Checks every frame's CRC, the sequence numbers, every seal's hash and the chain between
/// segments.
pub fn verify(dir: &Path) -> Result<VerifyReport, ArchiveError> {
    verify_with(dir, None)
}

/// The file beside the segments that lists the sealed segments already verified whole, with
/// their size and modification time: `name bytes mtime_ns sha256`, a line each.
pub const VERIFIED: &str = ".verified";

/// Sealed segments verified whole before (see [`VERIFIED`]). A sealed segment is never written
/// again, so one whose size and modification time are unchanged need not be hashed again at
/// every start; `verify` itself always reads everything.
#[derive(Debug, Default)]
pub struct Verified {
    known: BTreeMap<String, (u64, i128, String)>,
    changed: bool,
}

fn stamp(path: &Path) -> Option<(u64, i128)> {
    use std::os::unix::fs::MetadataExt;
    let m = std::fs::metadata(path).ok()?;
    Some((
        m.len(),
        i128::from(m.mtime()) * 1_000_000_000 + i128::from(m.mtime_nsec()),
    ))
}

impl Verified {
    /// Reads the list in `dir` (empty when there is none or it does not read).
    pub fn load(dir: &Path) -> Verified {
        let text = std::fs::read_to_string(dir.join(VERIFIED)).unwrap_or_default();
        let known = text
            .lines()
            .filter_map(|l| {
                let mut it = l.split(' ');
                let (name, len, mtime, sha) = (it.next()?, it.next()?, it.next()?, it.next()?);
                Some((
                    name.to_string(),
                    (len.parse().ok()?, mtime.parse().ok()?, sha.to_string()),
                ))
            })
            .collect();
        Verified {
            known,
            changed: false,
        }
    }

    /// The SHA-256 a sealed segment had when verified, if it is unchanged since.
    fn fresh(&self, name: &str, path: &Path) -> Option<&str> {
        let (len, mtime, sha) = self.known.get(name)?;
        (stamp(path)? == (*len, *mtime)).then_some(sha.as_str())
    }

    fn remember(&mut self, name: &str, path: &Path, sha: &str) {
        if let Some((len, mtime)) = stamp(path) {
            self.known
                .insert(name.to_string(), (len, mtime, sha.to_string()));
            self.changed = true;
        }
    }

    /// Writes the list back (atomically) when it changed; forgets segments no longer there.
    pub fn save(&mut self, dir: &Path) -> std::io::Result<()> {
        self.known.retain(|name, _| dir.join(name).exists());
        if !self.changed {
            return Ok(());
        }
        let mut text = String::new();
        for (name, (len, mtime, sha)) in &self.known {
            text.push_str(&format!("{name} {len} {mtime} {sha}\n"));
        }
        crate::fsutil::write_atomic(&dir.join(VERIFIED), text.as_bytes())?;
        self.changed = false;
        Ok(())
    }
}

/// [`verify`], reading only the header and seal of sealed segments that `verified` lists as
/// verified whole and unchanged since (their chain, sequence numbers and seal are still
/// checked); the segments it hashes whole and finds right are added to it.
pub fn verify_with(
    dir: &Path,
    mut verified: Option<&mut Verified>,
) -> Result<VerifyReport, ArchiveError> {
    let (segs, unborn) = live_segments(dir)?;
    let mut r = VerifyReport {
        segments: segs.len(),
        ..VerifyReport::default()
    };
    if let Some((path, words)) = unborn {
        r.notes.push(format!(
            "{}: the newest segment has no intact header ({words}): it was being created at a crash and holds no record; readers pass over it, and the writer sets it aside on its next start",
            file_name(&path)
        ));
    }
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
        let newest = pos + 1 == count;
        if let Some(v) = verified.as_deref()
            && let Some(sha) = v.fresh(&name, path)
            && let (Ok(Some(h)), Ok(Some((seal, _)))) =
                (segment::read_header(path), segment::read_seal(path))
        {
            // Verified whole before and unchanged: the links only.
            header_links(
                &mut r.problems,
                &name,
                &h,
                (*index, *first_seq),
                expected_seq,
                prev_chain.as_ref(),
            );
            if seal.sha256 != sha
                || seal.prev_chain != h.prev_chain
                || segment::chain(&seal.prev_chain, &seal.sha256) != seal.chain
            {
                r.problems
                    .push(format!("{name}: the seal's chain hash is wrong"));
            }
            r.sealed += 1;
            r.records += seal.records;
            r.last_seq = seal.last_seq;
            expected_seq = seal.last_seq + 1;
            prev_chain = Some(seal.chain);
            continue;
        }
        if verified.is_some()
            && newest
            && let (Ok(Some(h)), Ok(None)) = (segment::read_header(path), segment::read_seal(path))
        {
            // At a start, the open segment was just read back by the writer's recovery: only
            // its links to the sealed ones are checked here.
            header_links(
                &mut r.problems,
                &name,
                &h,
                (*index, *first_seq),
                expected_seq,
                prev_chain.as_ref(),
            );
            continue;
        }
        let buf = std::fs::read(path).map_err(|e| ArchiveError::io(path, e))?;
        let problems_before = r.problems.len();
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
            Err(b) if newest && segment::intact_frame_after(&buf, 0).is_none() => {
                r.notes.push(format!(
                    "{name}: the newest segment has no intact header ({}): it was being created at a crash; the writer sets it aside on its next start",
                    b.words()
                ));
                None
            }
            Err(b) => {
                r.problems.push(format!(
                    "{name} at byte 0: the header is damaged: {}",
                    damage_words(&buf, 0, b)
                ));
                None
            }
        };
        let Some((header, mut offset)) = header else {
            prev_chain = None;
            continue;
        };
        header_links(
            &mut r.problems,
            &name,
            &header,
            (*index, *first_seq),
            expected_seq,
            prev_chain.as_ref(),
        );
        let mut seq = first_seq - 1;
        let mut seal: Option<(Seal, usize)> = None;
        let mut ok = true;
        while offset < buf.len() {
            match segment::decode(&buf, offset) {
                Ok(f) if f.kind == TYPE_RECORD => {
                    let parsed = segment::parse_record(f.payload).map(|p| match p {
                        segment::Parsed::Record(e) => e.seq,
                        segment::Parsed::Unreadable(u) => {
                            r.unreadable.push(format!("{name} at byte {offset}: {u}"));
                            u.seq
                        }
                    });
                    match parsed {
                        Ok(s) => {
                            if s != seq + 1 {
                                r.problems.push(format!(
                                    "{name} at byte {offset}: sequence {s} follows {seq}"
                                ));
                            }
                            seq = s;
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
                Err(b)
                    if newest
                        && segment::is_torn_tail(&buf, offset)
                        && segment::seal_of(&buf).is_none() =>
                {
                    r.notes.push(format!(
                        "{name} at byte {offset}: the open segment ends with {} damaged bytes ({}); the writer cuts them on its next start",
                        buf.len() - offset,
                        b.words()
                    ));
                    break;
                }
                Err(b) => {
                    r.problems.push(format!(
                        "{name} at byte {offset}: {}",
                        damage_words(&buf, offset, b)
                    ));
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
                if r.problems.len() == problems_before
                    && let Some(v) = verified.as_deref_mut()
                {
                    v.remember(&name, path, &s.sha256);
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
    if r.records == 0 && r.problems.is_empty() {
        r.notes.push("the archive holds no records yet".to_string());
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
