//! The on-disk format: segment files of framed records.
//!
//! ```text
//! segment file  = header-frame record-frame* [seal-frame trailer]
//! frame         = len:u32le crc:u32le type:u8 payload        (len counts type + payload)
//! crc           = CRC-32C over len, type and payload
//! type          = 'H' header | 'R' record | 'S' seal          (payload: JSON)
//! trailer       = seal-frame-length:u32le "LWSEALED"
//! ```
//!
//! The header names the segment's index, first sequence number and the chain hash of the
//! previous segment. The seal holds the SHA-256 of every byte before it and the chain hash
//! `SHA-256(previous chain ‖ this segment's SHA-256)`, so editing or deleting a sealed segment
//! breaks the chain. The trailer lets a reader find the seal without reading the segment.

use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};
use sha2::{Digest, Sha256};

use super::record::Envelope;

pub const TYPE_HEADER: u8 = b'H';
pub const TYPE_RECORD: u8 = b'R';
pub const TYPE_SEAL: u8 = b'S';
pub const TRAILER_MAGIC: &[u8; 8] = b"LWSEALED";
pub const TRAILER_LEN: usize = 12;
/// Frame overhead before the type byte.
pub const FRAME_PREFIX: usize = 8;
/// The largest frame accepted; anything larger is corruption (a record is a few hundred bytes;
/// a checkpoint of many characteristics can reach megabytes).
pub const MAX_FRAME: usize = 256 * 1024 * 1024;
/// The segment file extension.
pub const EXTENSION: &str = "lwseg";

/// The first frame of every segment.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Header {
    pub format: u32,
    pub segment: u64,
    pub first_seq: u64,
    pub created_ms: i64,
    /// Chain hash of the previous segment (hex), empty for the first.
    pub prev_chain: String,
}

/// The last frame of a sealed segment.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct Seal {
    pub segment: u64,
    pub first_seq: u64,
    pub last_seq: u64,
    pub records: u64,
    /// SHA-256 (hex) of every byte of the file before the seal frame.
    pub sha256: String,
    pub prev_chain: String,
    /// SHA-256 (hex) of the previous chain hash's bytes followed by this segment's hash bytes.
    pub chain: String,
    /// Byte offset of the checkpoint record in this segment, if it has one.
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub checkpoint_offset: Option<u64>,
    pub sealed_ms: i64,
}

/// Encodes one frame.
pub fn encode(kind: u8, payload: &[u8], out: &mut Vec<u8>) {
    let len = (payload.len() + 1) as u32;
    let mut crc = crc32c::crc32c(&len.to_le_bytes());
    crc = crc32c::crc32c_append(crc, &[kind]);
    crc = crc32c::crc32c_append(crc, payload);
    out.extend_from_slice(&len.to_le_bytes());
    out.extend_from_slice(&crc.to_le_bytes());
    out.push(kind);
    out.extend_from_slice(payload);
}

/// Appends a frame whose payload `write` puts straight into `out` (no copy of a large payload);
/// on an error `out` is left as it was.
pub fn encode_with<E>(
    kind: u8,
    out: &mut Vec<u8>,
    write: impl FnOnce(&mut Vec<u8>) -> Result<(), E>,
) -> Result<(), E> {
    let start = out.len();
    out.extend_from_slice(&[0u8; 9]);
    if let Err(e) = write(out) {
        out.truncate(start);
        return Err(e);
    }
    let len = (out.len() - start - 9 + 1) as u32;
    out[start + 8] = kind;
    let mut crc = crc32c::crc32c(&len.to_le_bytes());
    crc = crc32c::crc32c_append(crc, &out[start + 8..]);
    out[start..start + 4].copy_from_slice(&len.to_le_bytes());
    out[start + 4..start + 8].copy_from_slice(&crc.to_le_bytes());
    Ok(())
}

/// A frame found in a buffer.
#[derive(Debug, Clone, PartialEq)]
pub struct Frame<'a> {
    pub offset: usize,
    pub kind: u8,
    pub payload: &'a [u8],
    /// Offset just past the frame.
    pub end: usize,
}

/// Why no good frame stands at an offset.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Bad {
    /// The buffer ends before the frame does (a torn write).
    Incomplete,
    /// The length is impossible (zero or huge).
    BadLength,
    /// The checksum does not match.
    BadCrc,
}

impl Bad {
    pub fn words(self) -> &'static str {
        match self {
            Bad::Incomplete => "the frame is cut short",
            Bad::BadLength => "the frame length is impossible",
            Bad::BadCrc => "the CRC-32C does not match",
        }
    }
}

/// Decodes the frame at `offset` of `buf`.
pub fn decode(buf: &[u8], offset: usize) -> Result<Frame<'_>, Bad> {
    let rest = &buf[offset..];
    if rest.len() < FRAME_PREFIX + 1 {
        return Err(Bad::Incomplete);
    }
    let len = u32::from_le_bytes([rest[0], rest[1], rest[2], rest[3]]) as usize;
    if len == 0 || len > MAX_FRAME {
        return Err(Bad::BadLength);
    }
    if rest.len() < FRAME_PREFIX + len {
        return Err(Bad::Incomplete);
    }
    let stored = u32::from_le_bytes([rest[4], rest[5], rest[6], rest[7]]);
    let mut crc = crc32c::crc32c(&rest[..4]);
    crc = crc32c::crc32c_append(crc, &rest[FRAME_PREFIX..FRAME_PREFIX + len]);
    if crc != stored {
        return Err(Bad::BadCrc);
    }
    Ok(Frame {
        offset,
        kind: rest[FRAME_PREFIX],
        payload: &rest[FRAME_PREFIX + 1..FRAME_PREFIX + len],
        end: offset + FRAME_PREFIX + len,
    })
}

/// The offset of the first intact frame that starts after `offset`, searching every byte
/// position to the end of `buf`.
///
/// A damaged frame is a torn tail only when nothing intact follows it anywhere: a crash can
/// leave a frame cut short at the very end, but never good frames after bad bytes. Damage
/// followed by an intact frame (a zeroed or overwritten range in the middle) is corruption, and
/// cutting there would throw away records that were confirmed durable. Any frame whose CRC-32C
/// holds counts, whatever its type byte says. Each candidate position is checked cheaply first
/// (a non-zero length that fits in what is left) before its CRC-32C is computed, so the search
/// stays fast in practice on zeros, text and random bytes alike.
pub fn intact_frame_after(buf: &[u8], offset: usize) -> Option<usize> {
    let start = offset.checked_add(1)?;
    (start..buf.len()).find(|&at| {
        let rest = &buf[at..];
        if rest.len() < FRAME_PREFIX + 1 {
            return false;
        }
        let len = u32::from_le_bytes([rest[0], rest[1], rest[2], rest[3]]) as usize;
        len != 0 && len <= MAX_FRAME && FRAME_PREFIX + len <= rest.len() && decode(buf, at).is_ok()
    })
}

/// Whether the bytes from `offset` on are a torn tail that may be cut: no intact frame
/// stands at `offset`, and none follows it anywhere.
pub fn is_torn_tail(buf: &[u8], offset: usize) -> bool {
    offset >= buf.len()
        || (decode(buf, offset).is_err() && intact_frame_after(buf, offset).is_none())
}

/// Lowercase hex of bytes.
pub fn hex(bytes: &[u8]) -> String {
    let mut s = String::with_capacity(bytes.len() * 2);
    for b in bytes {
        s.push_str(&format!("{b:02x}"));
    }
    s
}

/// Bytes of a hex string (empty on malformed input, which then fails every comparison).
pub fn unhex(s: &str) -> Vec<u8> {
    if !s.len().is_multiple_of(2) {
        return Vec::new();
    }
    (0..s.len())
        .step_by(2)
        .map(|i| u8::from_str_radix(&s[i..i + 2], 16))
        .collect::<Result<Vec<_>, _>>()
        .unwrap_or_default()
}

/// SHA-256 of `data`, hex.
pub fn sha256_hex(data: &[u8]) -> String {
    hex(&Sha256::digest(data))
}

/// The chain hash that follows `prev_chain` (hex) for a segment hashing to `sha` (hex).
pub fn chain(prev_chain: &str, sha: &str) -> String {
    let mut h = Sha256::new();
    h.update(unhex(prev_chain));
    h.update(unhex(sha));
    hex(&h.finalize())
}

/// The file name of segment `index` starting at `first_seq`.
pub fn file_name(index: u64, first_seq: u64) -> String {
    format!("{index:08}-{first_seq:016}.{EXTENSION}")
}

/// Segment files in `dir`, sorted by index: `(index, first_seq, path)`.
pub fn list(dir: &Path) -> std::io::Result<Vec<(u64, u64, PathBuf)>> {
    let mut out = Vec::new();
    for entry in std::fs::read_dir(dir)? {
        let path = entry?.path();
        if path.extension().and_then(|e| e.to_str()) != Some(EXTENSION) {
            continue;
        }
        let Some(stem) = path.file_stem().and_then(|s| s.to_str()) else {
            continue;
        };
        let Some((a, b)) = stem.split_once('-') else {
            continue;
        };
        if let (Ok(index), Ok(first)) = (a.parse(), b.parse()) {
            out.push((index, first, path));
        }
    }
    out.sort();
    Ok(out)
}

/// The seal of a segment file's bytes, read through the trailer, if the segment is sealed.
pub fn seal_of(buf: &[u8]) -> Option<(Seal, usize)> {
    if buf.len() < TRAILER_LEN || &buf[buf.len() - 8..] != TRAILER_MAGIC {
        return None;
    }
    let t = buf.len() - TRAILER_LEN;
    let seal_len = u32::from_le_bytes([buf[t], buf[t + 1], buf[t + 2], buf[t + 3]]) as usize;
    let start = t.checked_sub(seal_len)?;
    let f = decode(buf, start).ok()?;
    if f.kind != TYPE_SEAL || f.end != t {
        return None;
    }
    serde_json::from_slice(f.payload).ok().map(|s| (s, start))
}

/// A record whose frame is intact (its CRC passed, so these are the bytes that were written)
/// but whose content this build cannot read: an older build wrote `null` for a figure that
/// overflowed, say. It is kept as written (a sealed segment is never changed, and the hash
/// chain covers it); every reader skips it the same way, naming it, and counts its sequence
/// number as present.
#[derive(Debug, Clone, PartialEq)]
pub struct Unreadable {
    pub seq: u64,
    /// The record's `kind`, when it has one.
    pub kind: Option<String>,
    /// Why it does not read.
    pub error: String,
}

impl std::fmt::Display for Unreadable {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "record {} ({}) cannot be read: {}; it is kept as written and skipped",
            self.seq,
            self.kind.as_deref().unwrap_or("no kind"),
            self.error
        )
    }
}

/// A record frame's payload, parsed.
#[derive(Debug, Clone, PartialEq)]
pub enum Parsed {
    Record(Envelope),
    Unreadable(Unreadable),
}

/// Parses a record frame's payload. A payload of this record version with its sequence number
/// that does not parse as a record is [`Parsed::Unreadable`]; anything else that does not parse
/// (not JSON, no sequence number, a version this build does not know) is an error, as damage
/// or a newer writer is.
pub fn parse_record(payload: &[u8]) -> Result<Parsed, serde_json::Error> {
    let error = match envelope(payload) {
        Ok(e) => return Ok(Parsed::Record(e)),
        Err(e) => e,
    };
    #[derive(serde::Deserialize)]
    struct Head {
        v: u32,
        seq: u64,
        #[serde(default)]
        kind: Option<String>,
    }
    match serde_json::from_slice::<Head>(payload) {
        Ok(h) if h.v == crate::archive::record::RECORD_VERSION => {
            Ok(Parsed::Unreadable(Unreadable {
                seq: h.seq,
                kind: h.kind,
                error: error.to_string(),
            }))
        }
        _ => Err(error),
    }
}

/// Parses a record frame's payload: the same as `serde_json::from_slice::<Envelope>`, faster.
/// Serde's flatten and tagged enums buffer the whole record as a generic tree before reading
/// its fields; readings (most records) are read straight into their fields, the rest in two
/// passes (the envelope's numbers, then the record). No record has a field named `v`, `seq`
/// or `time_ms`: the flattened form could not hold it.
pub fn envelope(payload: &[u8]) -> Result<Envelope, serde_json::Error> {
    if let Some(e) = reading_envelope(payload) {
        return Ok(e);
    }
    envelope_generic(payload)
}

/// The common case, a `reading-accepted` record (most of any archive), read in one pass
/// straight into its fields; None for any other record, or one this path cannot read (the
/// general path then decides, and gives the error). The record's kind is checked from the
/// parsed text, not only the peek.
fn reading_envelope(payload: &[u8]) -> Option<Envelope> {
    const TAG: &[u8] = br#""kind":""#;
    const KIND: &[u8] = br#"reading-accepted""#;
    // The writer puts the kind after three numbers: a quick look at the start says whether
    // this is worth trying.
    let head = &payload[..payload.len().min(120)];
    let at = head.windows(TAG.len()).position(|w| w == TAG)? + TAG.len();
    if !payload[at..].starts_with(KIND) {
        return None;
    }
    #[derive(serde::Deserialize)]
    struct Wire {
        v: u32,
        seq: u64,
        time_ms: i64,
        kind: String,
        source: String,
        characteristic: String,
        value: f64,
        #[serde(default)]
        unit: Option<String>,
        #[serde(default)]
        source_time_ms: Option<i64>,
        #[serde(default)]
        source_time_ignored: bool,
        arrival_ms: i64,
        #[serde(default)]
        part: Option<String>,
        #[serde(default)]
        source_key: Option<String>,
        #[serde(default)]
        word: Option<String>,
        #[serde(default)]
        inspected: Option<f64>,
    }
    let w: Wire = serde_json::from_slice(payload).ok()?;
    if w.kind != "reading-accepted" {
        return None;
    }
    Some(Envelope {
        v: w.v,
        seq: w.seq,
        time_ms: w.time_ms,
        record: crate::archive::record::Record::ReadingAccepted {
            source: w.source,
            characteristic: w.characteristic,
            value: w.value,
            unit: w.unit,
            source_time_ms: w.source_time_ms,
            source_time_ignored: w.source_time_ignored,
            arrival_ms: w.arrival_ms,
            part: w.part,
            source_key: w.source_key,
            word: w.word,
            inspected: w.inspected,
        },
    })
}

/// Any record: the envelope's fields and the record in two passes.
fn envelope_generic(payload: &[u8]) -> Result<Envelope, serde_json::Error> {
    #[derive(serde::Deserialize)]
    struct Head {
        v: u32,
        seq: u64,
        time_ms: i64,
    }
    let head: Head = serde_json::from_slice(payload)?;
    let record: crate::archive::record::Record = serde_json::from_slice(payload)?;
    Ok(Envelope {
        v: head.v,
        seq: head.seq,
        time_ms: head.time_ms,
        record,
    })
}

/// Reads only the seal of a segment file (through its trailer), without reading the rest.
pub fn read_seal(path: &Path) -> std::io::Result<Option<(Seal, u64)>> {
    use std::io::{Read, Seek, SeekFrom};
    let mut f = std::fs::File::open(path)?;
    let len = f.metadata()?.len();
    if len < TRAILER_LEN as u64 {
        return Ok(None);
    }
    let mut trailer = [0u8; TRAILER_LEN];
    f.seek(SeekFrom::Start(len - TRAILER_LEN as u64))?;
    f.read_exact(&mut trailer)?;
    if &trailer[4..] != TRAILER_MAGIC {
        return Ok(None);
    }
    let seal_len = u64::from(u32::from_le_bytes([
        trailer[0], trailer[1], trailer[2], trailer[3],
    ]));
    let Some(start) = (len - TRAILER_LEN as u64).checked_sub(seal_len) else {
        return Ok(None);
    };
    let mut buf = vec![0u8; seal_len as usize];
    f.seek(SeekFrom::Start(start))?;
    f.read_exact(&mut buf)?;
    Ok(decode(&buf, 0)
        .ok()
        .filter(|fr| fr.kind == TYPE_SEAL && fr.end == buf.len())
        .and_then(|fr| serde_json::from_slice(fr.payload).ok())
        .map(|s| (s, start)))
}

/// Reads only the header of a segment file.
pub fn read_header(path: &Path) -> std::io::Result<Option<Header>> {
    use std::io::Read;
    let mut f = std::fs::File::open(path)?;
    let mut prefix = [0u8; FRAME_PREFIX];
    if f.read_exact(&mut prefix).is_err() {
        return Ok(None);
    }
    let len = u32::from_le_bytes([prefix[0], prefix[1], prefix[2], prefix[3]]) as usize;
    if len == 0 || len > 1 << 20 {
        return Ok(None);
    }
    let mut buf = prefix.to_vec();
    buf.resize(FRAME_PREFIX + len, 0);
    if f.read_exact(&mut buf[FRAME_PREFIX..]).is_err() {
        return Ok(None);
    }
    Ok(decode(&buf, 0)
        .ok()
        .filter(|fr| fr.kind == TYPE_HEADER)
        .and_then(|fr| serde_json::from_slice(fr.payload).ok()))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::archive::record::Record;

    fn reading(unit: Option<&str>, part: Option<&str>, ignored: bool) -> Record {
        Record::ReadingAccepted {
            source: "mqtt:cell4/\"gauges\"".into(),
            characteristic: "vb210-bore".into(),
            value: 12.003_400_000_000_001,
            unit: unit.map(str::to_string),
            source_time_ms: part.map(|_| 1_796_000_000_123),
            source_time_ignored: ignored,
            arrival_ms: 1_796_000_000_456,
            part: part.map(str::to_string),
            source_key: Some("cell4/gauges#9f2c".into()),
            // A pass/fail station's word and a batch's units ride the quick path too.
            word: part.map(|_| "NOK \u{e9}".into()),
            inspected: part.map(|_| 50.0),
        }
    }

    #[test]
    fn readings_decode_by_the_quick_path_exactly_as_by_the_general_one() {
        let records = [
            reading(Some("mm"), Some("SN-0042 \u{e9}"), false),
            reading(None, None, true),
            Record::ReadingRejected {
                source: "s".into(),
                characteristic: Some("reading-accepted".into()),
                raw: "\"kind\":\"reading-accepted\"".into(),
                reason: "r".into(),
                arrival_ms: 5,
                source_key: None,
            },
        ];
        for (i, r) in records.into_iter().enumerate() {
            let e = Envelope {
                v: 1,
                seq: 77 + i as u64,
                time_ms: 1_796_000_000_999,
                record: r,
            };
            let text = serde_json::to_vec(&e).unwrap();
            let by_serde: Envelope = serde_json::from_slice(&text).unwrap();
            assert_eq!(envelope(&text).unwrap(), by_serde);
            assert_eq!(envelope_generic(&text).unwrap(), by_serde);
            assert_eq!(
                reading_envelope(&text).is_some(),
                matches!(e.record, Record::ReadingAccepted { .. }),
                "{}",
                String::from_utf8_lossy(&text)
            );
        }
        // A reading record missing a field: the general path gives the error.
        let bad = br#"{"v":1,"seq":3,"time_ms":4,"kind":"reading-accepted","source":"s","value":1.0,"arrival_ms":5}"#;
        assert!(reading_envelope(bad).is_none());
        let err = envelope(bad).unwrap_err().to_string();
        assert!(err.contains("characteristic"), "{err}");
        // A kind in a nested place or a later key is not taken for the record's.
        let alert = Envelope {
            v: 1,
            seq: 3,
            time_ms: 4,
            record: Record::Alert {
                alert_id: "\"kind\":\"reading-accepted\"".into(),
                characteristic: "c".into(),
                event: crate::alerts::AlertEvent::Cleared { at_ms: 9 },
            },
        };
        let text = serde_json::to_vec(&alert).unwrap();
        assert!(reading_envelope(&text).is_none());
        assert_eq!(envelope(&text).unwrap(), alert);
    }
}
