//! The archive writer: recovery on open, group commit, rotation, sealing, and the task that
//! owns it.
//!
//! [`Writer`] is the synchronous core, used by one thread. [`spawn`] runs it on a dedicated
//! thread behind an [`ArchiveHandle`]: appends go through a bounded channel (a full channel
//! makes senders wait: nothing is dropped), and the handle's status says up to which sequence
//! number records are durable, so sources acknowledge their input only then.

use std::collections::VecDeque;
use std::fs::{self, File, OpenOptions};
use std::os::unix::fs::FileExt;
use std::path::{Path, PathBuf};
use std::time::Duration;

use sha2::{Digest, Sha256};
use tokio::sync::{mpsc, oneshot, watch};

use super::ArchiveError;
use super::record::{RECORD_VERSION, Record, Tail};
use super::segment::{self, Header, Seal, TRAILER_MAGIC, TYPE_HEADER, TYPE_RECORD, TYPE_SEAL};
use crate::fsutil::sync_dir;

/// An envelope to serialize without owning its record.
#[derive(serde::Serialize)]
struct EnvelopeRef<'a> {
    v: u32,
    seq: u64,
    time_ms: i64,
    #[serde(flatten)]
    record: &'a Record,
}

/// A checkpoint of the tail, serialized as the `Envelope` of a `Record::Checkpoint` would be,
/// without copying the tail first (with 10,000 characteristics the copy is tens of MiB).
struct CheckpointRef<'a> {
    seq: u64,
    time_ms: i64,
    characteristics: &'a std::collections::BTreeMap<String, super::record::CharacteristicTail>,
}

impl serde::Serialize for CheckpointRef<'_> {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        use serde::ser::SerializeStruct;
        let mut m = s.serialize_struct("Envelope", 5)?;
        m.serialize_field("v", &RECORD_VERSION)?;
        m.serialize_field("seq", &self.seq)?;
        m.serialize_field("time_ms", &self.time_ms)?;
        m.serialize_field("kind", "checkpoint")?;
        m.serialize_field("characteristics", self.characteristics)?;
        m.end()
    }
}

/// How the writer behaves.
#[derive(Debug, Clone, PartialEq)]
pub struct WriterConfig {
    pub dir: PathBuf,
    /// Group commit: records are made durable together at most this long after the first of
    /// them arrived. 0 = fdatasync after every record.
    pub flush_interval_ms: u64,
    /// A segment is sealed and a new one started when it would grow past this size.
    pub max_segment_bytes: u64,
    /// Also start a new segment when the UTC calendar day changes.
    pub rotate_daily: bool,
    /// Recent subgroups kept per characteristic in checkpoints.
    pub tail_keep: usize,
    /// While the disk is full, how often to try again.
    pub retry_ms: u64,
}

impl WriterConfig {
    /// Defaults: 10 ms group commit, 64 MiB segments, daily rotation, 30 subgroups of tail.
    pub fn new(dir: impl Into<PathBuf>) -> Self {
        WriterConfig {
            dir: dir.into(),
            flush_interval_ms: 10,
            max_segment_bytes: 64 * 1024 * 1024,
            rotate_daily: true,
            tail_keep: 30,
            retry_ms: 1000,
        }
    }
}

/// Bytes cut from a damaged tail on open, and where they were kept.
#[derive(Debug, Clone, PartialEq)]
pub struct Quarantined {
    pub segment: PathBuf,
    pub quarantine: PathBuf,
    pub offset: u64,
    pub bytes: u64,
    pub reason: String,
}

/// What opening found.
#[derive(Debug, Clone, PartialEq)]
pub struct OpenReport {
    pub next_seq: u64,
    pub segments: usize,
    pub quarantined: Vec<Quarantined>,
}

struct Open {
    file: File,
    path: PathBuf,
    index: u64,
    first_seq: u64,
    prev_chain: String,
    /// Bytes on disk (all durable).
    len: u64,
    hasher: Sha256,
    day: i64,
    records: u64,
    checkpoint_offset: Option<u64>,
}

/// Written records waiting for fdatasync; [`PendingSync::sync`] may run on another thread, so
/// the writer goes on encoding while the disk works.
pub struct PendingSync {
    file: File,
    path: PathBuf,
    seq: u64,
}

impl PendingSync {
    /// fdatasyncs; returns the sequence number now durable. An error is fatal for the writer.
    pub fn sync(self) -> Result<u64, ArchiveError> {
        self.file.sync_data().map_err(|source| ArchiveError::Sync {
            path: self.path,
            source,
        })?;
        Ok(self.seq)
    }
}

/// The single writer of an archive directory.
pub struct Writer {
    cfg: WriterConfig,
    open: Option<Open>,
    /// Chain hash of the newest sealed segment ("" before the first seal).
    sealed_chain: String,
    next_index: u64,
    next_seq: u64,
    /// Records up to here are written to the file (maybe not yet durable).
    written_seq: u64,
    durable_seq: u64,
    buf: Vec<u8>,
    buf_records: u64,
    buf_checkpoint: Option<u64>,
    tail: Tail,
    failed: Option<String>,
}

fn day_of(ms: i64) -> i64 {
    ms.div_euclid(86_400_000)
}

impl Writer {
    /// Opens (creating if needed) the archive in `cfg.dir`, recovering from a crash: a torn or
    /// corrupt tail of the newest segment is cut off and kept in a quarantine file beside it;
    /// corruption anywhere else is an error.
    pub fn open(cfg: WriterConfig) -> Result<(Writer, OpenReport), ArchiveError> {
        let dir = cfg.dir.clone();
        fs::create_dir_all(&dir).map_err(|e| ArchiveError::io(&dir, e))?;
        let mut segs = segment::list(&dir).map_err(|e| ArchiveError::io(&dir, e))?;
        let mut quarantined = Vec::new();
        let mut w = Writer {
            tail: Tail::new(cfg.tail_keep),
            cfg,
            open: None,
            sealed_chain: String::new(),
            next_index: 0,
            next_seq: 1,
            written_seq: 0,
            durable_seq: 0,
            buf: Vec::new(),
            buf_records: 0,
            buf_checkpoint: None,
            failed: None,
        };
        while let Some((index, first_seq, path)) = segs.last().cloned() {
            let bytes = fs::read(&path).map_err(|e| ArchiveError::io(&path, e))?;
            match w.recover(index, first_seq, &path, &bytes, &mut quarantined)? {
                true => break,
                // The file held no complete header: it was being created. It is quarantined and
                // gone; the segment before it is the newest.
                false => {
                    segs.pop();
                }
            }
        }
        // The older segments, as `verify` checks them (sealed segments verified whole at an
        // earlier start and unchanged since are not hashed again): an archive with a segment
        // missing, reordered or damaged is refused before anything is added to it.
        let mut verified = super::reader::Verified::load(&dir);
        let check = super::reader::verify_with(&dir, Some(&mut verified))?;
        if !check.problems.is_empty() {
            return Err(ArchiveError::Damaged {
                dir,
                problems: check.problems,
            });
        }
        if let Err(e) = verified.save(&dir) {
            tracing::warn!(
                component = "archive",
                "cannot note the verified segments in {}: {e}; the next start hashes them again",
                dir.display()
            );
        }
        w.durable_seq = w.next_seq - 1;
        w.written_seq = w.durable_seq;
        let report = OpenReport {
            next_seq: w.next_seq,
            segments: segs.len(),
            quarantined,
        };
        Ok((w, report))
    }

    /// Recovers from the newest segment; false when it had no valid header and was removed.
    fn recover(
        &mut self,
        index: u64,
        first_seq: u64,
        path: &Path,
        buf: &[u8],
        quarantined: &mut Vec<Quarantined>,
    ) -> Result<bool, ArchiveError> {
        let corrupt = |offset: usize, problem: String| ArchiveError::Corrupt {
            path: path.to_path_buf(),
            offset: offset as u64,
            problem,
        };
        let header_frame = match segment::decode(buf, 0) {
            Ok(f) if f.kind == TYPE_HEADER => f,
            Ok(_) => return Err(corrupt(0, "the first frame is not a segment header".into())),
            Err(bad) => {
                if segment::intact_frame_after(buf, 0).is_some() {
                    return Err(corrupt(
                        0,
                        format!(
                            "the segment header is damaged ({}) and intact records follow it: this is corruption, not a segment cut short while being created; {REFUSE}",
                            bad.words()
                        ),
                    ));
                }
                if !buf.is_empty() {
                    quarantined.push(quarantine(path, buf, 0, bad.words())?);
                }
                fs::remove_file(path).map_err(|e| ArchiveError::io(path, e))?;
                sync_dir(&self.cfg.dir).map_err(|e| ArchiveError::io(&self.cfg.dir, e))?;
                return Ok(false);
            }
        };
        let header: Header = serde_json::from_slice(header_frame.payload)
            .map_err(|e| corrupt(0, format!("the segment header does not parse: {e}")))?;
        if header.segment != index || header.first_seq != first_seq {
            return Err(corrupt(
                0,
                format!(
                    "the header says segment {} from sequence {}, but the file name says segment {index} from {first_seq}",
                    header.segment, header.first_seq
                ),
            ));
        }
        let mut hasher = Sha256::new();
        hasher.update(&buf[..header_frame.end]);
        let mut offset = header_frame.end;
        let mut last_seq = first_seq - 1;
        let mut last_time = header.created_ms;
        let mut records = 0u64;
        let mut checkpoint_offset = None;
        let mut tail = Tail::new(self.cfg.tail_keep);
        let mut seal: Option<Seal> = None;
        while offset < buf.len() {
            match segment::decode(buf, offset) {
                Ok(f) if f.kind == TYPE_RECORD => {
                    let parsed = segment::parse_record(f.payload).map_err(|e| {
                        corrupt(
                            offset,
                            format!("a record with a good CRC does not parse: {e}"),
                        )
                    })?;
                    let env = match parsed {
                        segment::Parsed::Record(env) => env,
                        segment::Parsed::Unreadable(u) if u.seq == last_seq + 1 => {
                            // Its bytes are those written: keep them, and go on past them
                            // (see segment::Unreadable).
                            tracing::warn!(
                                component = "archive",
                                "{} at byte {offset}: {u}",
                                path.display()
                            );
                            last_seq = u.seq;
                            records += 1;
                            hasher.update(&buf[offset..f.end]);
                            offset = f.end;
                            continue;
                        }
                        segment::Parsed::Unreadable(u) => {
                            return Err(corrupt(
                                offset,
                                format!("the sequence jumps from {last_seq} to {}", u.seq),
                            ));
                        }
                    };
                    if env.seq != last_seq + 1 {
                        return Err(corrupt(
                            offset,
                            format!("the sequence jumps from {last_seq} to {}", env.seq),
                        ));
                    }
                    if matches!(env.record, Record::Checkpoint { .. }) {
                        checkpoint_offset = Some(offset as u64);
                    }
                    tail.apply(&env);
                    last_seq = env.seq;
                    last_time = env.time_ms;
                    records += 1;
                    hasher.update(&buf[offset..f.end]);
                    offset = f.end;
                }
                Ok(f) if f.kind == TYPE_SEAL => {
                    let s: Seal = serde_json::from_slice(f.payload)
                        .map_err(|e| corrupt(offset, format!("the seal does not parse: {e}")))?;
                    let rest = &buf[f.end..];
                    let trailer = trailer_bytes(f.end - offset);
                    if rest != trailer.as_slice() {
                        // A seal whose trailer was cut short: finish it.
                        if !rest.is_empty() {
                            quarantined.push(quarantine(
                                path,
                                buf,
                                f.end,
                                "the trailer is incomplete",
                            )?);
                        }
                        let file = OpenOptions::new()
                            .write(true)
                            .open(path)
                            .map_err(|e| ArchiveError::io(path, e))?;
                        file.set_len(f.end as u64)
                            .map_err(|e| ArchiveError::io(path, e))?;
                        file.write_all_at(&trailer, f.end as u64)
                            .map_err(|e| ArchiveError::io(path, e))?;
                        file.sync_data().map_err(|source| ArchiveError::Sync {
                            path: path.to_path_buf(),
                            source,
                        })?;
                    }
                    seal = Some(s);
                    break;
                }
                Ok(_) => {
                    return Err(corrupt(
                        offset,
                        "an unexpected frame type inside a segment".into(),
                    ));
                }
                Err(bad) => {
                    // Damage with any intact frame after it is corruption inside the segment,
                    // not a write cut short by a crash: cutting there would throw away records
                    // that were confirmed durable (and hand out their sequence numbers again).
                    // Refuse, whatever the kind of damage (a bad CRC, a zeroed length, garbage).
                    if let Some(next) = segment::intact_frame_after(buf, offset) {
                        return Err(corrupt(
                            offset,
                            format!(
                                "{}, and intact records follow at byte {next}: this is damage inside the segment, not a write cut short by a crash, so nothing was cut; {REFUSE}",
                                bad.words()
                            ),
                        ));
                    }
                    quarantined.push(quarantine(path, buf, offset, bad.words())?);
                    let file = OpenOptions::new()
                        .write(true)
                        .open(path)
                        .map_err(|e| ArchiveError::io(path, e))?;
                    file.set_len(offset as u64)
                        .map_err(|e| ArchiveError::io(path, e))?;
                    file.sync_data().map_err(|source| ArchiveError::Sync {
                        path: path.to_path_buf(),
                        source,
                    })?;
                    break;
                }
            }
        }
        self.tail = tail;
        self.next_index = index + 1;
        match seal {
            Some(s) => {
                self.sealed_chain = s.chain;
                self.next_seq = s.last_seq + 1;
            }
            None => {
                self.next_seq = last_seq + 1;
                let file = OpenOptions::new()
                    .read(true)
                    .write(true)
                    .open(path)
                    .map_err(|e| ArchiveError::io(path, e))?;
                self.open = Some(Open {
                    file,
                    path: path.to_path_buf(),
                    index,
                    first_seq,
                    prev_chain: header.prev_chain,
                    len: offset as u64,
                    hasher,
                    day: day_of(last_time),
                    records,
                    checkpoint_offset,
                });
            }
        }
        Ok(true)
    }

    /// The next sequence number to be given out.
    pub fn next_seq(&self) -> u64 {
        self.next_seq
    }

    /// Every record up to this sequence number is on disk and fdatasync'ed.
    pub fn durable_seq(&self) -> u64 {
        self.durable_seq
    }

    /// The recent state of every characteristic, as of the last appended record.
    pub fn tail(&self) -> &Tail {
        &self.tail
    }

    /// The index of the segment being written, if one is open.
    pub fn segment(&self) -> Option<u64> {
        self.open.as_ref().map(|o| o.index)
    }

    /// Bytes of encoded records waiting to be written.
    pub fn buffered_bytes(&self) -> usize {
        self.buf.len()
    }

    /// Whether records are waiting for [`Writer::flush`].
    pub fn has_unflushed(&self) -> bool {
        !self.buf.is_empty()
    }

    fn check(&self) -> Result<(), ArchiveError> {
        match &self.failed {
            Some(why) => Err(ArchiveError::Stopped(why.clone())),
            None => Ok(()),
        }
    }

    fn fail(&mut self, e: ArchiveError) -> ArchiveError {
        if matches!(e, ArchiveError::Sync { .. } | ArchiveError::Io { .. }) {
            self.failed = Some(e.to_string());
        }
        e
    }

    /// Adds a record (buffered until the next flush) and returns its sequence number. May
    /// rotate first, which flushes. On a full disk nothing is appended and the error says so.
    pub fn append(&mut self, record: &Record, now_ms: i64) -> Result<u64, ArchiveError> {
        self.check()?;
        let encode = |seq: u64| {
            serde_json::to_vec(&EnvelopeRef {
                v: RECORD_VERSION,
                seq,
                time_ms: now_ms,
                record,
            })
            .map_err(|e| ArchiveError::Stopped(format!("a record does not serialize: {e}")))
        };
        let seq = self.next_seq;
        let mut payload = encode(seq)?;
        readable(record, &payload)?;
        self.prepare(now_ms, payload.len() as u64)?;
        if seq != self.next_seq {
            // Rotation wrote a checkpoint record, which took the number.
            payload = encode(self.next_seq)?;
        }
        Ok(self.push_frame(&payload, record))
    }

    fn push_frame(&mut self, payload: &[u8], record: &Record) -> u64 {
        let open_len = self.open.as_ref().map_or(0, |o| o.len);
        if matches!(record, Record::Checkpoint { .. }) {
            self.buf_checkpoint = Some(open_len + self.buf.len() as u64);
        }
        segment::encode(TYPE_RECORD, payload, &mut self.buf);
        self.buf_records += 1;
        let seq = self.next_seq;
        self.tail.apply_record(seq, record);
        self.next_seq += 1;
        seq
    }

    /// Makes sure a segment is open with room for a record of `size` bytes on `now_ms`'s day.
    fn prepare(&mut self, now_ms: i64, size: u64) -> Result<(), ArchiveError> {
        if let Some(o) = &self.open {
            let full = o.len + self.buf.len() as u64 + size + 64 > self.cfg.max_segment_bytes;
            let new_day = self.cfg.rotate_daily && day_of(now_ms) != o.day;
            // A segment holding only its checkpoint is never rotated again, however large the
            // checkpoint, or every record would start a segment of its own.
            let own = u64::from(o.checkpoint_offset.is_some() || self.buf_checkpoint.is_some());
            let has_data = o.records + self.buf_records > own;
            if (full || new_day) && has_data {
                match self.flush().and_then(|_| self.seal(now_ms)) {
                    Ok(()) => {}
                    // No room to finish this segment: keep adding to it, and rotate once the
                    // disk has room again (the next record tries).
                    Err(e) if e.is_transient() && self.open.is_some() => {}
                    Err(e) => return Err(e),
                }
            }
        }
        if self.open.is_none() {
            self.create_segment(now_ms)?;
        }
        Ok(())
    }

    /// Writes the buffered records and fdatasyncs; returns the durable sequence number.
    pub fn flush(&mut self) -> Result<u64, ArchiveError> {
        if let Some(p) = self.write_out()? {
            let seq = p.sync().map_err(|e| self.fail(e))?;
            self.mark_durable(seq);
        }
        Ok(self.durable_seq)
    }

    /// Writes the buffered records to the file without waiting for the disk; the returned
    /// [`PendingSync`] makes them durable (on any thread). `None` when there was nothing new.
    pub fn write_out(&mut self) -> Result<Option<PendingSync>, ArchiveError> {
        self.check()?;
        if self.buf.is_empty() {
            if self.written_seq > self.durable_seq
                && let Some(o) = &self.open
            {
                return Ok(Some(self.pending_sync(o)?));
            }
            return Ok(None);
        }
        let Some(o) = self.open.as_mut() else {
            return Err(ArchiveError::Stopped(
                "records buffered with no open segment".into(),
            ));
        };
        if let Err(e) = o.file.write_all_at(&self.buf, o.len) {
            // Never leave half a record behind: cut back to the last good byte.
            let _ = o.file.set_len(o.len);
            let err = ArchiveError::io(&o.path, e);
            return Err(self.fail(err));
        }
        o.hasher.update(&self.buf);
        o.len += self.buf.len() as u64;
        o.records += self.buf_records;
        if let Some(c) = self.buf_checkpoint.take() {
            o.checkpoint_offset = Some(c);
        }
        self.buf.clear();
        // A checkpoint of many characteristics makes the buffer big once per segment; do not
        // keep that much memory for the small writes that follow.
        if self.buf.capacity() > 1 << 20 {
            self.buf.shrink_to(256 << 10);
        }
        self.buf_records = 0;
        self.written_seq = self.next_seq - 1;
        let o = self.open.as_ref().expect("checked above");
        Ok(Some(self.pending_sync(o)?))
    }

    fn pending_sync(&self, o: &Open) -> Result<PendingSync, ArchiveError> {
        Ok(PendingSync {
            file: o
                .file
                .try_clone()
                .map_err(|e| ArchiveError::io(&o.path, e))?,
            path: o.path.clone(),
            seq: self.written_seq,
        })
    }

    /// Records that a [`PendingSync`] completed.
    pub fn mark_durable(&mut self, seq: u64) {
        self.durable_seq = self.durable_seq.max(seq);
    }

    /// Seals the open segment (flush first). It is never written again.
    fn seal(&mut self, now_ms: i64) -> Result<(), ArchiveError> {
        let Some(o) = self.open.as_mut() else {
            return Ok(());
        };
        let sha = segment::hex(&o.hasher.clone().finalize());
        let chain = segment::chain(&o.prev_chain, &sha);
        let seal = Seal {
            segment: o.index,
            first_seq: o.first_seq,
            last_seq: self.durable_seq,
            records: o.records,
            sha256: sha,
            prev_chain: o.prev_chain.clone(),
            chain: chain.clone(),
            checkpoint_offset: o.checkpoint_offset,
            sealed_ms: now_ms,
        };
        let payload =
            serde_json::to_vec(&seal).map_err(|e| ArchiveError::Stopped(e.to_string()))?;
        let mut bytes = Vec::new();
        segment::encode(TYPE_SEAL, &payload, &mut bytes);
        let frame_len = bytes.len();
        bytes.extend_from_slice(&trailer_bytes(frame_len));
        if let Err(e) = o.file.write_all_at(&bytes, o.len) {
            let _ = o.file.set_len(o.len);
            let err = ArchiveError::io(&o.path, e);
            return Err(self.fail(err));
        }
        if let Err(source) = o.file.sync_data() {
            let err = ArchiveError::Sync {
                path: o.path.clone(),
                source,
            };
            return Err(self.fail(err));
        }
        self.sealed_chain = chain;
        self.open = None;
        Ok(())
    }

    fn create_segment(&mut self, now_ms: i64) -> Result<(), ArchiveError> {
        let index = self.next_index;
        let first_seq = self.next_seq;
        let path = self.cfg.dir.join(segment::file_name(index, first_seq));
        let header = Header {
            format: 1,
            segment: index,
            first_seq,
            created_ms: now_ms,
            prev_chain: self.sealed_chain.clone(),
        };
        let mut bytes = Vec::new();
        let header_json =
            serde_json::to_vec(&header).map_err(|e| ArchiveError::Stopped(e.to_string()))?;
        segment::encode(TYPE_HEADER, &header_json, &mut bytes);
        let mut records = 0;
        let mut checkpoint_offset = None;
        if !self.tail.characteristics.is_empty() {
            // Serialized straight into the segment's first bytes: the tail is the checkpoint
            // (applying it to the tail would change nothing), so no copy of either is made.
            let cp = CheckpointRef {
                seq: first_seq,
                time_ms: now_ms,
                characteristics: &self.tail.characteristics,
            };
            checkpoint_offset = Some(bytes.len() as u64);
            segment::encode_with(TYPE_RECORD, &mut bytes, |out| {
                serde_json::to_writer(out, &cp)
            })
            .map_err(|e| ArchiveError::Stopped(e.to_string()))?;
            records = 1;
        }
        let result = (|| -> std::io::Result<File> {
            let file = OpenOptions::new()
                .read(true)
                .write(true)
                .create_new(true)
                .open(&path)?;
            file.write_all_at(&bytes, 0)?;
            Ok(file)
        })();
        let file = match result {
            Ok(f) => f,
            Err(e) => {
                let _ = fs::remove_file(&path);
                let _ = sync_dir(&self.cfg.dir);
                let err = ArchiveError::io(&path, e);
                return Err(self.fail(err));
            }
        };
        if let Err(source) = file.sync_data() {
            let err = ArchiveError::Sync { path, source };
            return Err(self.fail(err));
        }
        if let Err(e) = sync_dir(&self.cfg.dir) {
            let err = ArchiveError::Sync {
                path: self.cfg.dir.clone(),
                source: e,
            };
            return Err(self.fail(err));
        }
        let mut hasher = Sha256::new();
        hasher.update(&bytes);
        self.open = Some(Open {
            file,
            path,
            index,
            first_seq,
            prev_chain: self.sealed_chain.clone(),
            len: bytes.len() as u64,
            hasher,
            day: day_of(now_ms),
            records,
            checkpoint_offset,
        });
        self.next_index += 1;
        if checkpoint_offset.is_some() {
            self.next_seq += 1;
            self.written_seq = self.next_seq - 1;
            self.durable_seq = self.next_seq - 1;
        }
        Ok(())
    }
}

/// What to do when the writer refuses a damaged archive.
const REFUSE: &str = "linewarden will not write to this archive until it is dealt with: run `linewarden archive verify` on it and see \"A damaged archive\" in the README";

/// Refuses a record that would not read back. JSON has no infinity or NaN: a figure that is
/// not finite serializes as `null`, and a record holding one would pass its CRC and then fail
/// every reader. Readings (the bulk) are checked by their two numbers; every other kind is
/// read back whole, which also catches any other way of writing what cannot be read.
fn readable(record: &Record, payload: &[u8]) -> Result<(), ArchiveError> {
    let unwritable = |reason: String| ArchiveError::Unwritable {
        kind: record.kind(),
        reason,
    };
    match record {
        Record::ReadingAccepted {
            value, inspected, ..
        } => {
            for (what, v) in [("value", Some(*value)), ("units inspected", *inspected)] {
                if let Some(v) = v.filter(|v| !v.is_finite()) {
                    return Err(unwritable(format!("its {what} {v} is not a finite number")));
                }
            }
            Ok(())
        }
        Record::ReadingRejected { .. } => Ok(()),
        // Read back and compared: an optional figure that is not finite reads back as absent
        // rather than failing, which only the comparison sees.
        _ => match segment::envelope(payload) {
            Ok(e) if e.record == *record => Ok(()),
            Ok(_) => Err(unwritable(
                "it reads back as something else: a figure in it is not a finite number".into(),
            )),
            Err(e) => Err(unwritable(e.to_string())),
        },
    }
}

fn trailer_bytes(seal_frame_len: usize) -> Vec<u8> {
    let mut t = (seal_frame_len as u32).to_le_bytes().to_vec();
    t.extend_from_slice(TRAILER_MAGIC);
    t
}

/// Keeps the bytes from `offset` on in a quarantine file beside the segment (durably, before
/// the segment is cut), and logs what was cut.
fn quarantine(
    path: &Path,
    buf: &[u8],
    offset: usize,
    reason: &str,
) -> Result<Quarantined, ArchiveError> {
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let q = path.with_file_name(format!("{name}.quarantine-{offset}"));
    crate::fsutil::write_atomic(&q, &buf[offset..]).map_err(|e| ArchiveError::io(&q, e))?;
    let bytes = (buf.len() - offset) as u64;
    tracing::warn!(
        component = "archive",
        segment = %path.display(),
        offset,
        bytes,
        quarantine = %q.display(),
        "cut a damaged tail of {bytes} bytes at offset {offset} ({reason}); the bytes are kept in the quarantine file"
    );
    Ok(Quarantined {
        segment: path.to_path_buf(),
        quarantine: q,
        offset: offset as u64,
        bytes,
        reason: reason.to_string(),
    })
}

/// The writer's condition, for health reporting and alerts.
#[derive(Debug, Clone, PartialEq)]
pub enum WriterState {
    Running,
    /// Writing is paused: the disk is full, or no file descriptor is free. Appends wait;
    /// nothing is lost; writing resumes by itself.
    Held {
        cause: HeldCause,
        message: String,
    },
    /// The writer stopped for good (an fsync or I/O error).
    Failed {
        message: String,
    },
    /// The input closed and everything was flushed.
    Stopped,
}

/// Why writing is held.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum HeldCause {
    DiskFull,
    NoDescriptors,
}

impl HeldCause {
    /// The word `status` shows.
    pub fn word(self) -> &'static str {
        match self {
            HeldCause::DiskFull => "disk-full",
            HeldCause::NoDescriptors => "no-descriptors",
        }
    }
}

/// What the writer reports after every change.
#[derive(Debug, Clone, PartialEq)]
pub struct Status {
    /// Every record up to this sequence number is durable.
    pub durable_seq: u64,
    pub state: WriterState,
    pub segment: Option<u64>,
}

/// The answer to an append: the sequence number of the last record, or why not.
type Reply = oneshot::Sender<Result<u64, String>>;

/// Records received but not yet appended, each with the reply owed once it is (only the last
/// record of a command carries one).
type Waiting = VecDeque<(Record, Option<Reply>, bool)>;

enum Command {
    Append(Vec<Record>, Option<Reply>),
    Flush(Reply),
}

/// A cheap, cloneable handle to the writer task.
#[derive(Clone)]
pub struct ArchiveHandle {
    tx: mpsc::Sender<Command>,
    status: watch::Receiver<Status>,
}

impl ArchiveHandle {
    /// Queues records (waiting while the queue is full) and returns once they are queued.
    pub async fn append(&self, records: Vec<Record>) -> Result<(), ArchiveError> {
        self.tx
            .send(Command::Append(records, None))
            .await
            .map_err(|_| ArchiveError::Stopped("the archive writer has stopped".into()))
    }

    /// Queues records and waits for their sequence number (of the last one).
    pub async fn append_seq(&self, records: Vec<Record>) -> Result<u64, ArchiveError> {
        let (tx, rx) = oneshot::channel();
        self.tx
            .send(Command::Append(records, Some(tx)))
            .await
            .map_err(|_| ArchiveError::Stopped("the archive writer has stopped".into()))?;
        rx.await
            .map_err(|_| ArchiveError::Stopped("the archive writer has stopped".into()))?
            .map_err(ArchiveError::Stopped)
    }

    /// Queues records from a thread that is not in an async context, waiting only while the
    /// queue is full.
    pub fn send_blocking(&self, records: Vec<Record>) -> Result<(), ArchiveError> {
        self.tx
            .blocking_send(Command::Append(records, None))
            .map_err(|_| ArchiveError::Stopped("the archive writer has stopped".into()))
    }

    /// Queues records from a thread that is not in an async context and waits for the
    /// sequence number of the last.
    pub fn append_blocking(&self, records: Vec<Record>) -> Result<u64, ArchiveError> {
        let (tx, rx) = oneshot::channel();
        self.tx
            .blocking_send(Command::Append(records, Some(tx)))
            .map_err(|_| ArchiveError::Stopped("the archive writer has stopped".into()))?;
        rx.blocking_recv()
            .map_err(|_| ArchiveError::Stopped("the archive writer has stopped".into()))?
            .map_err(ArchiveError::Stopped)
    }

    /// Flushes now and returns the durable sequence number.
    pub async fn flush(&self) -> Result<u64, ArchiveError> {
        let (tx, rx) = oneshot::channel();
        self.tx
            .send(Command::Flush(tx))
            .await
            .map_err(|_| ArchiveError::Stopped("the archive writer has stopped".into()))?;
        rx.await
            .map_err(|_| ArchiveError::Stopped("the archive writer has stopped".into()))?
            .map_err(ArchiveError::Stopped)
    }

    /// Watches the writer's status (durable sequence number, state).
    pub fn status(&self) -> watch::Receiver<Status> {
        self.status.clone()
    }

    /// Waits until every record up to `seq` is durable; an error if the writer fails first.
    pub async fn wait_durable(&self, seq: u64) -> Result<(), ArchiveError> {
        let mut rx = self.status.clone();
        loop {
            {
                let s = rx.borrow_and_update();
                if s.durable_seq >= seq {
                    return Ok(());
                }
                if let WriterState::Failed { message } = &s.state {
                    return Err(ArchiveError::Stopped(message.clone()));
                }
            }
            rx.changed()
                .await
                .map_err(|_| ArchiveError::Stopped("the archive writer has stopped".into()))?;
        }
    }
}

/// The queue between producers and the writer: 4096 commands. When it is full, producers wait
/// (the engine never drops a record; sources that cannot wait count what they drop).
pub const QUEUE: usize = 4096;

/// Runs `writer` on a dedicated thread. The thread ends (after a final flush) when every
/// handle is dropped. `clock` gives the current time in milliseconds since the epoch.
pub fn spawn(
    writer: Writer,
    clock: impl Fn() -> i64 + Send + 'static,
) -> (
    ArchiveHandle,
    std::thread::JoinHandle<Result<(), ArchiveError>>,
) {
    let (tx, rx) = mpsc::channel(QUEUE);
    let (status_tx, status_rx) = watch::channel(Status {
        durable_seq: writer.durable_seq(),
        state: WriterState::Running,
        segment: writer.segment(),
    });
    let join = std::thread::Builder::new()
        .name("archive-writer".into())
        .spawn(move || {
            let rt = tokio::runtime::Builder::new_current_thread()
                .enable_time()
                .build()
                .map_err(|e| {
                    ArchiveError::Stopped(format!("cannot start the writer's runtime: {e}"))
                })?;
            rt.block_on(run(writer, rx, status_tx, clock))
        })
        .expect("the OS can start a thread");
    (
        ArchiveHandle {
            tx,
            status: status_rx,
        },
        join,
    )
}

/// While the disk is full the writer goes on taking appends into memory (so producers get
/// their sequence numbers and are not blocked) until this many bytes wait to be written; then
/// it stops reading its queue, and producers wait.
pub const MAX_BUFFERED_WHILE_FULL: usize = 1 << 20;

async fn run(
    mut w: Writer,
    mut rx: mpsc::Receiver<Command>,
    status: watch::Sender<Status>,
    clock: impl Fn() -> i64,
) -> Result<(), ArchiveError> {
    let interval = Duration::from_millis(w.cfg.flush_interval_ms);
    let retry = Duration::from_millis(w.cfg.retry_ms.max(1));
    // fdatasync runs on its own thread, so encoding goes on while the disk works. One sync is
    // in flight at a time; what arrives meanwhile goes out with the next.
    let (sync_tx, sync_rx) = std::sync::mpsc::channel::<PendingSync>();
    let (done_tx, mut done_rx) = mpsc::unbounded_channel::<Result<u64, ArchiveError>>();
    let syncer = std::thread::Builder::new()
        .name("archive-sync".into())
        .spawn(move || {
            for p in sync_rx {
                if done_tx.send(p.sync()).is_err() {
                    break;
                }
            }
        })
        .map_err(|e| ArchiveError::Stopped(format!("cannot start the sync thread: {e}")))?;
    let mut in_flight = false;
    // Records received but not yet appended, with their reply.
    let mut stalled: Waiting = VecDeque::new();
    // Flush requests that wait for the disk to have room again (a full disk delays a flush; it
    // never fails it, so a source waiting on one simply holds back).
    let mut flushes: Vec<Reply> = Vec::new();
    let mut deadline: Option<tokio::time::Instant> = None;
    // While the disk is full: when to try appending (opening a segment failed) or writing again.
    let mut append_retry: Option<tokio::time::Instant> = None;
    let mut write_retry: Option<tokio::time::Instant> = None;
    let mut full = DiskFullLog::default();
    let mut closed = false;
    let publish = |w: &Writer, state: WriterState| {
        status.send_replace(Status {
            durable_seq: w.durable_seq(),
            state,
            segment: w.segment(),
        });
    };
    loop {
        let now = tokio::time::Instant::now();
        if append_retry.is_some_and(|t| t <= now) {
            append_retry = None;
        }
        if write_retry.is_some_and(|t| t <= now) {
            write_retry = None;
        }
        // 1. Append what is waiting, in order.
        while append_retry.is_none()
            && let Some((record, reply, last)) = stalled.pop_front()
        {
            match w.append(&record, clock()) {
                Ok(seq) => {
                    if deadline.is_none() {
                        deadline = Some(now + interval);
                    }
                    if last && let Some(r) = reply {
                        let _ = r.send(Ok(seq));
                    }
                }
                Err(e) if e.is_transient() => {
                    full.report(&w, &e, &publish);
                    stalled.push_front((record, reply, last));
                    append_retry = Some(now + retry);
                }
                Err(e @ ArchiveError::Unwritable { .. }) => {
                    // The rest of the batch is written; the log says why this record is
                    // not. The sender is answered with the last record that was, so a bug
                    // in one figure never stops the recording of readings.
                    tracing::error!(component = "archive", "{e}");
                    if last && let Some(r) = reply {
                        let _ = r.send(Ok(w.next_seq() - 1));
                    }
                }
                Err(e) => {
                    if let Some(r) = reply {
                        let _ = r.send(Err(e.to_string()));
                    }
                    return finish_error(&w, e, &publish);
                }
            }
        }
        // 2. Flush requests: once everything before them is appended, write and sync at once.
        if !flushes.is_empty() && stalled.is_empty() && write_retry.is_none() && !in_flight {
            match w.flush() {
                Ok(seq) => {
                    full.resolved(&w, &publish);
                    // The durable sequence moved: those who watch the status see it (the
                    // metrics, `status`), as after a sync of the group commit.
                    publish(&w, WriterState::Running);
                    for r in flushes.drain(..) {
                        let _ = r.send(Ok(seq));
                    }
                    deadline = None;
                }
                Err(e) if e.is_transient() => {
                    full.report(&w, &e, &publish);
                    write_retry = Some(now + retry);
                }
                Err(e) => {
                    for r in flushes.drain(..) {
                        let _ = r.send(Err(e.to_string()));
                    }
                    return finish_error(&w, e, &publish);
                }
            }
        }
        // 3. Write out and start a sync when due (or when the input has closed).
        let due = interval.is_zero()
            || deadline.is_some_and(|d| d <= now)
            || (closed && w.has_unflushed());
        if due && !in_flight && write_retry.is_none() {
            match w.write_out() {
                Ok(Some(p)) => {
                    if sync_tx.send(p).is_err() {
                        let e = ArchiveError::Stopped("the sync thread has stopped".into());
                        return finish_error(&w, e, &publish);
                    }
                    in_flight = true;
                    deadline = None;
                }
                Ok(None) => deadline = None,
                Err(e) if e.is_transient() => {
                    full.report(&w, &e, &publish);
                    write_retry = Some(now + retry);
                }
                Err(e) => return finish_error(&w, e, &publish),
            }
        }
        if closed && stalled.is_empty() && flushes.is_empty() && !in_flight && !w.has_unflushed() {
            drop(sync_tx);
            let _ = syncer.join();
            publish(&w, WriterState::Stopped);
            return Ok(());
        }
        // 4. Wait for input, a finished sync, the flush deadline or the next try on a full
        // disk. While the disk is full, appends are still taken into memory up to a bound, so
        // that producers get their sequence numbers; past it the queue fills and they wait.
        let room = w.buffered_bytes() < MAX_BUFFERED_WHILE_FULL
            && stalled.len() < MAX_BUFFERED_WHILE_FULL / 64;
        let wake = [deadline.filter(|_| !in_flight), append_retry, write_retry]
            .into_iter()
            .flatten()
            .min();
        tokio::select! {
            cmd = rx.recv(), if !closed && room => {
                let Some(cmd) = cmd else {
                    closed = true;
                    continue;
                };
                let mut cmds = vec![cmd];
                // Take what else is already queued, to commit it in the same group.
                while cmds.len() < 256 {
                    match rx.try_recv() {
                        Ok(c) => cmds.push(c),
                        Err(_) => break,
                    }
                }
                for c in cmds {
                    match c {
                        Command::Append(records, reply) => {
                            let n = records.len();
                            if n == 0 {
                                if let Some(r) = reply {
                                    if stalled.is_empty() {
                                        let _ = r.send(Ok(w.next_seq() - 1));
                                    } else {
                                        flushes.push(r);
                                    }
                                }
                                continue;
                            }
                            let mut reply = reply;
                            for (i, r) in records.into_iter().enumerate() {
                                let last = i + 1 == n;
                                stalled.push_back((r, if last { reply.take() } else { None }, last));
                            }
                        }
                        Command::Flush(reply) => flushes.push(reply),
                    }
                }
            }
            done = done_rx.recv(), if in_flight => {
                in_flight = false;
                match done {
                    Some(Ok(seq)) => {
                        w.mark_durable(seq);
                        full.resolved(&w, &publish);
                        publish(&w, WriterState::Running);
                    }
                    Some(Err(e)) => return finish_error(&w, e, &publish),
                    None => {
                        let e = ArchiveError::Stopped("the sync thread has stopped".into());
                        return finish_error(&w, e, &publish);
                    }
                }
            }
            _ = tokio::time::sleep_until(wake.unwrap_or(now)), if wake.is_some() => {}
            else => {}
        }
    }
}

/// A full disk is reported once when it starts (logged, and published so the daemon holds its
/// sources back and shows it), again every minute while it lasts, and once when it is over.
#[derive(Default)]
struct DiskFullLog {
    since: Option<std::time::Instant>,
    last_logged: Option<std::time::Instant>,
}

impl DiskFullLog {
    fn report(&mut self, w: &Writer, e: &ArchiveError, publish: &impl Fn(&Writer, WriterState)) {
        let now = std::time::Instant::now();
        let since = *self.since.get_or_insert(now);
        if self
            .last_logged
            .is_none_or(|t| now.duration_since(t) >= Duration::from_secs(60))
        {
            self.last_logged = Some(now);
            if since == now {
                tracing::error!(component = "archive", "{e}");
            } else {
                tracing::error!(
                    component = "archive",
                    "{e} (held for {:.0} s now)",
                    now.duration_since(since).as_secs_f64()
                );
            }
        }
        publish(
            w,
            WriterState::Held {
                cause: if matches!(e, ArchiveError::NoDescriptors { .. }) {
                    HeldCause::NoDescriptors
                } else {
                    HeldCause::DiskFull
                },
                message: e.to_string(),
            },
        );
    }

    fn resolved(&mut self, w: &Writer, publish: &impl Fn(&Writer, WriterState)) {
        if let Some(since) = self.since.take() {
            self.last_logged = None;
            tracing::warn!(
                component = "archive",
                "the archive can be written again after {:.0} s; writing resumes",
                since.elapsed().as_secs_f64()
            );
            publish(w, WriterState::Running);
        }
    }
}

fn finish_error(
    w: &Writer,
    e: ArchiveError,
    publish: &impl Fn(&Writer, WriterState),
) -> Result<(), ArchiveError> {
    tracing::error!(component = "archive", "{e}");
    publish(
        w,
        WriterState::Failed {
            message: e.to_string(),
        },
    );
    Err(e)
}
