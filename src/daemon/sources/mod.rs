//! Where readings come from. Each source is one module with one task that sends
//! [`SourceEvent`]s into the engine's queue and watches the shutdown signal:
//!
//! * [`replay`] — plays a recorded feed file.
//! * [`folder`] — CSV reports dropped into a watched folder.
//! * [`serial`] — gauges on serial ports, reopened when unplugged.
//! * [`mqtt`] — sensors and gauges publishing to a broker.
//!
//! Sources depend on the configuration, the engine's input type and the clock, never on the
//! daemon loop that consumes their events.

pub mod folder;
pub mod mqtt;
pub mod replay;
pub mod serial;

use tokio::sync::{mpsc, watch};
use tracing::Instrument;

use super::clock::now_ms;
use super::hub::SourceHealth;
use crate::config::Source;
use crate::engine::Incoming;

/// Events from sources, in the order they happened.
#[derive(Debug)]
pub enum SourceEvent {
    Reading(Incoming),
    /// Something arrived that is not a reading.
    Unreadable {
        source: String,
        characteristic: Option<String>,
        raw: String,
        reason: String,
        /// The message's key at its source (see `Record::ReadingRejected`), if it has one.
        source_key: Option<String>,
    },
    /// The source has nothing more to send (a replay that finished).
    Ended {
        source: String,
    },
    /// Answered once everything sent before it is durable in the archive (a folder source
    /// moves a report to done/ only then).
    Barrier(tokio::sync::oneshot::Sender<()>),
    /// A source connected (up) or lost its device or broker (down), with a word on why.
    Health {
        source: String,
        up: bool,
        detail: String,
    },
}

/// The queue from all sources to the engine.
pub const SOURCE_QUEUE: usize = 1024;

/// The span every log line of a source task carries: its kind and id.
fn source_span(component: &'static str, id: &str) -> tracing::Span {
    tracing::info_span!("source", component, id = %id)
}

/// Starts one task per configured source, each sending into `tx`, and gives the health each
/// starts with, by source name (`kind:id`). Replay and folder sources are up from the start;
/// serial and MQTT say when they are.
pub async fn start(
    sources: &[Source],
    archive_dir: &std::path::Path,
    tx: mpsc::Sender<SourceEvent>,
    shutdown: &watch::Receiver<bool>,
) -> std::collections::BTreeMap<String, SourceHealth> {
    let mut health = std::collections::BTreeMap::new();
    for s in sources {
        let name = match s {
            Source::Replay { id, file, speed } => {
                tokio::spawn(
                    replay::run(
                        id.clone(),
                        file.clone(),
                        *speed,
                        tx.clone(),
                        shutdown.clone(),
                    )
                    .instrument(source_span("replay", id)),
                );
                format!("replay:{id}")
            }
            Source::Folder {
                id,
                path,
                rows,
                part_column,
                settle_ms,
            } => {
                let already =
                    folder::already_archived(archive_dir, &folder::processing_dir(path)).await;
                let src = folder::FolderSource {
                    id: id.clone(),
                    path: path.clone(),
                    rows: rows.clone(),
                    part_column: part_column.clone(),
                    settle_ms: *settle_ms,
                    already,
                };
                tokio::spawn(
                    folder::run(src, tx.clone(), shutdown.clone())
                        .instrument(source_span("folder", id)),
                );
                format!("folder:{id}")
            }
            Source::Serial(g) => {
                tokio::spawn(
                    serial::run((**g).clone(), tx.clone(), shutdown.clone())
                        .instrument(source_span("serial", &g.id)),
                );
                format!("serial:{}", g.id)
            }
            Source::Mqtt(m) => {
                let (dir, name) = (archive_dir.to_path_buf(), format!("mqtt:{}", m.id));
                let known = tokio::task::spawn_blocking(move || mqtt::recent_keys(&dir, &name))
                    .await
                    .unwrap_or_default();
                tokio::spawn(
                    mqtt::run((**m).clone(), known, tx.clone(), shutdown.clone())
                        .instrument(source_span("mqtt", &m.id)),
                );
                format!("mqtt:{}", m.id)
            }
        };
        // Replay and folder sources are up from the start; serial and MQTT say when they are.
        let up = matches!(s, Source::Replay { .. } | Source::Folder { .. });
        health.insert(
            name.clone(),
            SourceHealth {
                source: name,
                state: if up { "up" } else { "connecting" }.into(),
                since_ms: now_ms(),
                last_reading_ms: None,
                readings: 0,
                rejected: 0,
                clock_skewed: 0,
                detail: String::new(),
            },
        );
    }
    health
}
