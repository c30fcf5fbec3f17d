//! The serial gauge source: calipers, indicators and micrometers on an RS-232 or USB serial
//! port (tokio-serial).
//!
//! Frames end with a terminator; a regular expression with a named group `value` (optionally
//! `unit` and `channel`, for multiplexers that prefix a channel) takes the reading out of each.
//! Readings in inches or millimetres are converted to the characteristic's unit. An optional
//! request string is sent on a timer for gauges that answer when asked. An unplugged adapter
//! makes reads fail or return no bytes: the port is closed and reopened with backoff, and the
//! gap is reported when it is back.

use std::time::Duration;

use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::sync::{mpsc, watch};
use tokio_serial::SerialPortBuilderExt;

use super::SourceEvent;
use crate::config::SerialGauge;
use crate::daemon::clock::now_ms;
use crate::engine::Incoming;

/// The longest frame kept while waiting for a terminator.
const MAX_FRAME: usize = 4096;

enum Ended {
    Shutdown,
    EngineGone,
    Lost(String),
}

/// Runs until shutdown, reopening the port whenever it is lost.
pub async fn run(
    g: SerialGauge,
    tx: mpsc::Sender<SourceEvent>,
    mut shutdown: watch::Receiver<bool>,
) {
    let name = format!("serial:{}", g.id);
    let re = match regex::Regex::new(&g.pattern) {
        Ok(re) => re,
        Err(e) => {
            tracing::error!("the pattern does not compile: {e}");
            let _ = tx.send(SourceEvent::Ended { source: name }).await;
            return;
        }
    };
    let mut backoff = Duration::from_millis(250);
    let mut down_since: Option<tokio::time::Instant> = None;
    let mut warned = false;
    loop {
        let builder = tokio_serial::new(&g.port, g.baud)
            .data_bits(match g.data_bits {
                5 => tokio_serial::DataBits::Five,
                6 => tokio_serial::DataBits::Six,
                7 => tokio_serial::DataBits::Seven,
                _ => tokio_serial::DataBits::Eight,
            })
            .parity(match g.parity.as_str() {
                "even" => tokio_serial::Parity::Even,
                "odd" => tokio_serial::Parity::Odd,
                _ => tokio_serial::Parity::None,
            })
            .stop_bits(if g.stop_bits == 2 {
                tokio_serial::StopBits::Two
            } else {
                tokio_serial::StopBits::One
            })
            .flow_control(match g.flow_control.as_str() {
                "software" => tokio_serial::FlowControl::Software,
                "hardware" => tokio_serial::FlowControl::Hardware,
                _ => tokio_serial::FlowControl::None,
            });
        match builder.open_native_async() {
            Ok(port) => {
                match down_since.take() {
                    Some(t) => tracing::warn!(
                        "serial port {} is back after {:.1} s without readings",
                        g.port,
                        t.elapsed().as_secs_f64()
                    ),
                    None => tracing::info!("opened serial port {} at {} baud", g.port, g.baud),
                }
                warned = false;
                backoff = Duration::from_millis(250);
                let _ = tx
                    .send(SourceEvent::Health {
                        source: name.clone(),
                        up: true,
                        detail: format!("{} open", g.port),
                    })
                    .await;
                match read_loop(&g, &re, &name, port, &tx, &mut shutdown).await {
                    Ended::Shutdown => break,
                    Ended::EngineGone => return,
                    Ended::Lost(why) => {
                        tracing::warn!("lost serial port {}: {why}; reopening", g.port);
                        let _ = tx
                            .send(SourceEvent::Health {
                                source: name.clone(),
                                up: false,
                                detail: format!("{}: {why}", g.port),
                            })
                            .await;
                        down_since = Some(tokio::time::Instant::now());
                    }
                }
            }
            Err(e) => {
                if !warned {
                    tracing::warn!(
                        "cannot open serial port {}: {e}; retrying with backoff",
                        g.port
                    );
                    let _ = tx
                        .send(SourceEvent::Health {
                            source: name.clone(),
                            up: false,
                            detail: format!("{}: {e}", g.port),
                        })
                        .await;
                    warned = true;
                }
                down_since.get_or_insert_with(tokio::time::Instant::now);
                tokio::select! {
                    _ = tokio::time::sleep(backoff) => {}
                    _ = shutdown.changed() => break,
                }
                backoff = (backoff * 2).min(Duration::from_secs(30));
            }
        }
    }
    let _ = tx.send(SourceEvent::Ended { source: name }).await;
}

/// A gauge cannot be paused: when the engine cannot take a reading at once (its queue is full,
/// for instance while the archive's disk is full) the reading is dropped and counted, and the
/// count is archived as a rejected entry as soon as the queue has room again, so the record
/// says what was lost and when.
#[derive(Default)]
struct Dropped {
    count: u64,
    since_ms: i64,
    logged: u64,
}

impl Dropped {
    /// Hands `ev` to the engine without waiting; false when the engine has gone.
    fn offer(
        &mut self,
        tx: &mpsc::Sender<SourceEvent>,
        name: &str,
        g: &SerialGauge,
        ev: SourceEvent,
    ) -> bool {
        use mpsc::error::TrySendError;
        if self.count > 0 {
            let note = SourceEvent::Unreadable {
                source: name.to_string(),
                characteristic: g.characteristic.clone(),
                raw: format!("{} reading(s)", self.count),
                reason: format!(
                    "{} reading(s) from {} dropped from {} on: the engine could not take them (is the archive's disk full?)",
                    self.count,
                    g.port,
                    crate::format::utc_ms(self.since_ms)
                ),
                source_key: None,
            };
            match tx.try_send(note) {
                Ok(()) => {
                    tracing::warn!(
                        "{} reading(s) were dropped while the engine could not take them; archived as rejected",
                        self.count
                    );
                    self.count = 0;
                }
                Err(TrySendError::Full(_)) => {}
                Err(TrySendError::Closed(_)) => return false,
            }
        }
        match tx.try_send(ev) {
            Ok(()) => true,
            Err(TrySendError::Full(_)) => {
                if self.count == 0 {
                    self.since_ms = now_ms();
                }
                self.count += 1;
                self.logged += 1;
                if self.logged <= 3 || self.logged.is_multiple_of(100) {
                    tracing::warn!(
                        "the engine cannot take readings from {} now; dropped {} so far",
                        g.port,
                        self.count
                    );
                }
                true
            }
            Err(TrySendError::Closed(_)) => false,
        }
    }
}

async fn read_loop(
    g: &SerialGauge,
    re: &regex::Regex,
    name: &str,
    mut port: tokio_serial::SerialStream,
    tx: &mpsc::Sender<SourceEvent>,
    shutdown: &mut watch::Receiver<bool>,
) -> Ended {
    let term = g.terminator.as_bytes();
    let mut buf: Vec<u8> = Vec::with_capacity(256);
    let mut chunk = [0u8; 512];
    let mut ask = tokio::time::interval(Duration::from_millis(g.request_interval_ms.max(10)));
    let mut dropped = Dropped::default();
    loop {
        tokio::select! {
            n = port.read(&mut chunk) => match n {
                Ok(0) => return Ended::Lost("the port returned no data (unplugged?)".into()),
                Ok(n) => {
                    buf.extend_from_slice(&chunk[..n]);
                    while let Some(pos) = buf.windows(term.len()).position(|w| w == term) {
                        let frame: Vec<u8> = buf.drain(..pos + term.len()).take(pos).collect();
                        if let Some(ev) = frame_event(g, re, name, &frame)
                            && !dropped.offer(tx, name, g, ev)
                        {
                            return Ended::EngineGone;
                        }
                    }
                    if buf.len() > MAX_FRAME {
                        let raw = String::from_utf8_lossy(&buf[..64]).into_owned();
                        buf.clear();
                        let ev = SourceEvent::Unreadable {
                            source: name.to_string(),
                            characteristic: g.characteristic.clone(),
                            raw,
                            reason: format!("no terminator in {MAX_FRAME} bytes: wrong baud rate or terminator?"),
                            source_key: None,
                        };
                        if tx.send(ev).await.is_err() {
                            return Ended::EngineGone;
                        }
                    }
                }
                Err(e) => return Ended::Lost(e.to_string()),
            },
            _ = ask.tick(), if g.request.is_some() => {
                let req = g.request.as_deref().unwrap_or_default();
                if let Err(e) = port.write_all(req.as_bytes()).await {
                    return Ended::Lost(format!("cannot send the request: {e}"));
                }
            }
            _ = shutdown.changed() => return Ended::Shutdown,
        }
    }
}

/// The event for one frame from a gauge: a reading, why it is not one, or nothing for an empty
/// frame.
pub fn frame_event(
    g: &SerialGauge,
    re: &regex::Regex,
    name: &str,
    frame: &[u8],
) -> Option<SourceEvent> {
    let text = String::from_utf8_lossy(frame).trim().to_string();
    if text.is_empty() {
        return None;
    }
    // The frame as it came, for the record should it be refused here or by the engine.
    let raw = crate::format::raw_text(frame.trim_ascii());
    let bad = |reason: String| SourceEvent::Unreadable {
        source: name.to_string(),
        characteristic: g.characteristic.clone(),
        raw: raw.clone(),
        reason,
        source_key: None,
    };
    let Some(caps) = re.captures(&text) else {
        return Some(bad("the frame does not match the gauge's pattern".into()));
    };
    let value = match caps
        .name("value")
        .map(|m| crate::format::finite_number(m.as_str()))
    {
        Some(Ok(v)) => v,
        Some(Err(why)) => return Some(bad(format!("the value {why}"))),
        None => return Some(bad("the value is not a number".into())),
    };
    let characteristic = match caps.name("channel") {
        Some(ch) => match g.channels.iter().find(|(c, _)| c == ch.as_str()) {
            Some((_, id)) => id.clone(),
            None => {
                return Some(bad(format!(
                    "channel {} is not mapped to a characteristic",
                    ch.as_str()
                )));
            }
        },
        None => match &g.characteristic {
            Some(c) => c.clone(),
            None => return Some(bad("the frame names no channel".into())),
        },
    };
    let unit = caps
        .name("unit")
        .map(|m| m.as_str().to_string())
        .or_else(|| g.gauge_unit.clone());
    let target = g
        .units
        .iter()
        .find(|(c, _)| *c == characteristic)
        .map(|(_, u)| u.clone());
    let (value, unit) = match (unit.as_deref(), target.as_deref()) {
        (Some("in"), Some("mm")) => (value * 25.4, target),
        (Some("mm"), Some("in")) => (value / 25.4, target),
        (u, _) => (value, u.map(str::to_string).or(target)),
    };
    Some(SourceEvent::Reading(Incoming {
        source: name.to_string(),
        characteristic,
        value,
        unit,
        source_time_ms: None,
        source_time_ignored: false,
        arrival_ms: now_ms(),
        part: None,
        source_key: None,
        word: None,
        inspected: None,
        sent: Some(raw),
    }))
}
