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
    /// Found at start by the same checks as `archive verify`: a sealed segment missing,
    /// reordered, edited or damaged. Nothing is written to such an archive.
    #[error(
        "archive {}: {}; linewarden will not write to this archive until it is dealt with: run `linewarden archive verify {}` for the whole report, and see \"A damaged archive\" in the README",
        dir.display(),
        problems.join("; "),
        dir.display()
    )]
    Damaged { dir: PathBuf, problems: Vec<String> },
    /// A record that would not read back (a figure that is not a finite number): it is not
    /// written, and the writer goes on with the next.
    #[error(
        "archive: a {kind} record was not written, because it would not read back ({reason}); the records around it are kept"
    )]
    Unwritable { kind: &'static str, reason: String },
    /// The process has no file descriptors left: writing waits and tries again, as on a full
    /// disk, until a descriptor is free.
    #[error(
        "archive {path}: no file descriptor is free ({source}); writing waits and tries again until one is"
    )]
    NoDescriptors {
        path: PathBuf,
        source: std::io::Error,
    },
}

impl ArchiveError {
    pub(crate) fn io(path: impl Into<PathBuf>, source: std::io::Error) -> Self {
        let path = path.into();
        if is_disk_full(&source) {
            ArchiveError::DiskFull { path, source }
        } else if is_out_of_descriptors(&source) {
            ArchiveError::NoDescriptors { path, source }
        } else {
            ArchiveError::Io { path, source }
        }
    }
}

impl ArchiveError {
    /// Whether writing should wait and try again (a full disk, no free descriptor) rather than
    /// stop: nothing was lost, and the condition passes by itself.
    pub fn is_transient(&self) -> bool {
        matches!(
            self,
            ArchiveError::DiskFull { .. } | ArchiveError::NoDescriptors { .. }
        )
    }
}

/// EMFILE or ENFILE: the process's (or the system's) table of open files is full, which a
/// crowd of network clients can cause; it passes when they go.
pub fn is_out_of_descriptors(e: &std::io::Error) -> bool {
    matches!(e.raw_os_error(), Some(libc::EMFILE) | Some(libc::ENFILE))
}

/// ENOSPC or EDQUOT.
pub fn is_disk_full(e: &std::io::Error) -> bool {
    e.kind() == std::io::ErrorKind::StorageFull
        || e.kind() == std::io::ErrorKind::QuotaExceeded
        || matches!(e.raw_os_error(), Some(28) | Some(122))
}
