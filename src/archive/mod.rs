//! The append-only archive: every reading, verdict, alert and change, durable and verifiable.
//!
//! * [`record`] — what is recorded, and the [`record::Tail`] of recent state per characteristic.
//! * [`segment`] — the on-disk format: framed, checksummed records in segment files, sealed
//!   and hash-chained.
//! * [`writer`] — the single writer: recovery on open, group commit, rotation, full-disk
//!   handling; and the task that owns it behind a handle.
//! * [`reader`] — iteration with filters, state rebuild from the newest checkpoint,
//!   verification, statistics and export.
//!
//! Guarantees: a record reported durable survives a crash or power loss; a torn or corrupt
//! tail is cut off on open and kept in a quarantine file; corruption anywhere else is reported
//! with the segment and offset, never returned as data; a sealed segment is never written
//! again, and editing or deleting one is detected by `verify`.

pub mod reader;
pub mod record;
pub mod segment;
pub mod window;
pub mod writer;

use std::path::PathBuf;

pub use record::{Envelope, Record};

/// What can go wrong with the archive. Each variant names the file and, where it applies, the
/// byte offset.
#[derive(Debug, thiserror::Error)]
pub enum ArchiveError {
    #[error("archive {path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("archive {path}: the disk is full ({source}); writing stops until space is freed")]
    DiskFull {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error(
        "archive {path}: fsync failed ({source}); the writer has stopped, because the kernel may have dropped unwritten data and retrying could report lost records as durable"
    )]
    Sync {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("archive {path} at byte {offset}: {problem}")]
    Corrupt {
        path: PathBuf,
        offset: u64,
        problem: String,
    },
    /// Records missing, repeated or out of order between segments.
    #[error("archive {path}: {problem}")]
    Sequence { path: PathBuf, problem: String },
    #[error("archive: the writer has stopped after an earlier error: {0}")]
    Stopped(String),
}

impl ArchiveError {
    pub(crate) fn io(path: impl Into<PathBuf>, source: std::io::Error) -> Self {
        let path = path.into();
        if is_disk_full(&source) {
            ArchiveError::DiskFull { path, source }
        } else {
            ArchiveError::Io { path, source }
        }
    }
}

/// ENOSPC or EDQUOT.
pub fn is_disk_full(e: &std::io::Error) -> bool {
    e.kind() == std::io::ErrorKind::StorageFull
        || e.kind() == std::io::ErrorKind::QuotaExceeded
        || matches!(e.raw_os_error(), Some(28) | Some(122))
}
