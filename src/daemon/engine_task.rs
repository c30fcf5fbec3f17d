//! The engine task: one loop that owns the [`Engine`], takes batches of source events, control
//! requests, delivery reports, reloads and the one-second tick, archives what they say, and
//! publishes what the outputs and the control socket need to see. Each kind of event has its
//! own handler; the loop itself only chooses between them.

use std::collections::BTreeMap;
use std::sync::Arc;
use std::sync::atomic::{AtomicI64, Ordering};
use std::time::Duration;

use tokio::sync::{mpsc, watch};

use super::clock::now_ms;
use super::hub::{self, SourceHealth};
use super::sources::SourceEvent;
use super::{BATCH, DaemonError, Effects, Summary, carry_out, reject, take_readings};
use crate::archive::Record;
use crate::archive::writer::{ArchiveHandle, Status, WriterState};
use crate::config::Config;
use crate::engine::{CharView, Engine, Incoming};

/// The senders every output and the control socket watch.
pub(super) struct Publishers {
    pub alerts: watch::Sender<Arc<hub::AlertsView>>,
    pub light: watch::Sender<hub::Light>,
    pub states: watch::Sender<hub::States>,
    /// Running totals for the metrics, once a second.
    pub counts: watch::Sender<Arc<hub::Counts>>,
    /// Every characteristic's view, for the live page.
    pub views: watch::Sender<hub::Views>,
}

/// What the engine loop reads besides the sources.
pub(super) struct Inbox {
    pub requests: mpsc::Receiver<hub::Request>,
    pub delivered: mpsc::Receiver<hub::Delivery>,
    pub reload: mpsc::Receiver<()>,
}

/// The engine and everything the loop keeps between turns.
pub(super) struct EngineTask {
    pub cfg: Config,
    pub engine: Engine,
    pub archive: ArchiveHandle,
    pub summary: Summary,
    pub fx: Effects,
    pub health: BTreeMap<String, SourceHealth>,
    pub publish: Publishers,
    started_ms: i64,
    sources: usize,
    ended: usize,
    rejected_logged: u64,
    ticks: u64,
    /// Whether this turn changed something the light depends on.
    health_changed: bool,
    archive_status: watch::Receiver<Status>,
    /// The retained state of every characteristic, as last published.
    states: BTreeMap<String, hub::StateView>,
    /// The characteristics that have alerts, as they stood when their alerts last changed
    /// (for the charts in emails); refreshed only for the ones that changed.
    alert_views: BTreeMap<String, Arc<CharView>>,
    /// Every characteristic's view, kept for the live page (only while it is served).
    views: BTreeMap<String, Arc<CharView>>,
}

impl EngineTask {
    /// Takes over the engine after the archive has been read back, and publishes where things
    /// stand before the first event.
    pub fn new(
        cfg: Config,
        engine: Engine,
        archive: ArchiveHandle,
        summary: Summary,
        health: BTreeMap<String, SourceHealth>,
        publish: Publishers,
        started_ms: i64,
    ) -> Self {
        let states = engine
            .view()
            .iter()
            .map(|v| (v.id.clone(), hub::StateView::of(v, engine.alerts())))
            .collect();
        let mut task = EngineTask {
            archive_status: archive.status(),
            sources: health.len(),
            cfg,
            engine,
            archive,
            summary,
            fx: Effects::default(),
            health,
            publish,
            started_ms,
            ended: 0,
            rejected_logged: 0,
            ticks: 0,
            health_changed: false,
            states,
            alert_views: BTreeMap::new(),
            views: BTreeMap::new(),
        };
        let alerts = task.alerts_view(true);
        task.publish.alerts.send_replace(alerts);
        let light = task.light();
        task.publish.light.send_replace(light);
        task.publish
            .states
            .send_replace(Arc::new(task.states.clone()));
        if task.publish.views.receiver_count() > 0 {
            task.views = task
                .engine
                .view()
                .into_iter()
                .map(|v| (v.id.clone(), Arc::new(v)))
                .collect();
            task.publish
                .views
                .send_replace(Arc::new(task.views.clone()));
        }
        task
    }

    fn archive_ok(&self) -> bool {
        matches!(self.archive_status.borrow().state, WriterState::Running)
    }

    fn light(&self) -> hub::Light {
        let healthy = self
            .health
            .values()
            .all(|s| s.state == "up" || s.state == "ended");
        hub::light(self.engine.alerts(), healthy, self.archive_ok())
    }

    /// The alert book with the views of the characteristics whose alerts changed (all of
    /// them when `all`).
    fn alerts_view(&mut self, all: bool) -> Arc<hub::AlertsView> {
        let book = self.engine.alerts().clone();
        let ids: Vec<String> = if all {
            book.by_characteristic.keys().cloned().collect()
        } else {
            std::mem::take(&mut self.fx.alert_chars)
                .into_iter()
                .collect()
        };
        self.fx.alert_chars.clear();
        for c in ids {
            if let Some(v) = self.engine.view_of(&c) {
                self.alert_views.insert(c, Arc::new(v));
            }
        }
        Arc::new(hub::AlertsView {
            book,
            characteristics: self.alert_views.clone(),
        })
    }

    /// Publishes the retained states that changed.
    fn publish_states(&mut self) {
        if self.fx.dirty.is_empty() {
            return;
        }
        let page = self.publish.views.receiver_count() > 0;
        for id in std::mem::take(&mut self.fx.dirty) {
            if let Some(v) = self.engine.view_of(&id) {
                self.states
                    .insert(id.clone(), hub::StateView::of(&v, self.engine.alerts()));
                if page {
                    self.views.insert(id, Arc::new(v));
                }
            }
        }
        if page {
            self.publish
                .views
                .send_replace(Arc::new(self.views.clone()));
        }
        self.publish
            .states
            .send_replace(Arc::new(self.states.clone()));
    }

    /// Runs until every source has ended or stopped; returns why it stopped.
    pub async fn serve(
        &mut self,
        mut rx: mpsc::Receiver<SourceEvent>,
        inbox: &mut Inbox,
        progress: &AtomicI64,
    ) -> Result<String, DaemonError> {
        let mut archive_watch = self.archive.status();
        let mut was_full = false;
        let mut tick = tokio::time::interval(Duration::from_secs(1));
        tick.set_missed_tick_behavior(tokio::time::MissedTickBehavior::Delay);
        loop {
            progress.store(now_ms(), Ordering::Relaxed);
            self.health_changed = false;
            // While the archive's disk is full, readings are not taken from the sources: they
            // hold back (MQTT stops acknowledging, the folder stops moving reports, serial
            // gauges count what they must drop), while status, acknowledgements and the light
            // go on. The 1 s tick notices when there is room again.
            let archive_full = matches!(
                archive_watch.borrow_and_update().state,
                WriterState::Held { .. }
            );
            if archive_full != was_full {
                was_full = archive_full;
                self.health_changed = true;
            }
            tokio::select! {
                // The writer's status changed (a sync, or the disk filling or freeing): the
                // light and the gate above follow at once.
                Ok(()) = archive_watch.changed() => {}
                ev = rx.recv(), if !archive_full => {
                    let Some(first) = ev else { return Ok("every source has stopped".to_string()) };
                    // Take what else is waiting (up to BATCH events) and archive consecutive
                    // accepted readings with one append: one round trip to the writer per batch.
                    let mut batch = vec![first];
                    while batch.len() < BATCH {
                        match rx.try_recv() {
                            Ok(e) => batch.push(e),
                            Err(_) => break,
                        }
                    }
                    if let Some(reason) = self.on_events(batch).await? {
                        return Ok(reason);
                    }
                }
                Some(req) = inbox.requests.recv() => self.on_request(req).await?,
                Some(d) = inbox.delivered.recv() => self.on_delivery(d).await?,
                Some(()) = inbox.reload.recv() => self.on_reload().await?,
                _ = tick.tick() => self.on_tick().await?,
            }
            self.publish_alerts_and_light();
        }
    }

    /// Publishes the alerts if they changed, and the light if it may have.
    fn publish_alerts_and_light(&mut self) {
        if self.fx.alerts_changed {
            self.fx.alerts_changed = false;
            let alerts = self.alerts_view(true);
            self.publish.alerts.send_replace(alerts);
            self.health_changed = true;
        }
        if self.health_changed {
            let l = self.light();
            self.publish
                .light
                .send_if_modified(|old| std::mem::replace(old, l) != l);
        }
    }

    async fn take(&mut self, accepted: &mut Vec<Incoming>) -> Result<(), DaemonError> {
        take_readings(
            &self.archive,
            &self.cfg,
            &mut self.engine,
            accepted,
            &mut self.health,
            &mut self.summary,
            &mut self.fx,
        )
        .await
    }

    /// A batch of source events, in order: runs of accepted readings are archived with one
    /// append. Returns a reason to stop when the last source has ended.
    async fn on_events(&mut self, batch: Vec<SourceEvent>) -> Result<Option<String>, DaemonError> {
        let mut accepted: Vec<Incoming> = Vec::new();
        let mut stop = None;
        for ev in batch {
            // A word from a pass/fail station becomes its count here, under the
            // characteristic's word lists; the record keeps the word too.
            let (ev, refused) = match ev {
                SourceEvent::Reading(mut inc) => match self.engine.admit(&mut inc) {
                    Ok(()) => {
                        accepted.push(inc);
                        continue;
                    }
                    Err(reason) => (SourceEvent::Reading(inc), reason),
                },
                other => (other, String::new()),
            };
            self.take(&mut accepted).await?;
            match ev {
                SourceEvent::Reading(inc) => {
                    let reason = refused;
                    let raw = inc.as_sent();
                    self.summary.rejected += 1;
                    if let Some(h) = self.health.get_mut(&inc.source) {
                        h.rejected += 1;
                    }
                    reject(&mut self.rejected_logged, &inc.source, &raw, &reason);
                    self.archive
                        .append(vec![Record::ReadingRejected {
                            source: inc.source.clone(),
                            characteristic: Some(inc.characteristic.clone()),
                            raw,
                            reason,
                            arrival_ms: inc.arrival_ms,
                            source_key: inc.source_key.clone(),
                        }])
                        .await?;
                }
                SourceEvent::Unreadable {
                    source,
                    characteristic,
                    raw,
                    reason,
                    source_key,
                } => {
                    self.summary.rejected += 1;
                    if let Some(h) = self.health.get_mut(&source) {
                        h.rejected += 1;
                    }
                    reject(&mut self.rejected_logged, &source, &raw, &reason);
                    self.archive
                        .append(vec![Record::ReadingRejected {
                            source,
                            characteristic,
                            raw,
                            reason,
                            arrival_ms: now_ms(),
                            source_key,
                        }])
                        .await?;
                }
                SourceEvent::Barrier(done) => {
                    // Answered once everything before it is durable. A full disk delays the
                    // answer (the source waits, and holds back) without holding up this loop;
                    // a failed archive drops it, and the next append stops the daemon with
                    // the archive's error.
                    let archive = self.archive.clone();
                    tokio::spawn(async move {
                        if archive.flush().await.is_ok() {
                            let _ = done.send(());
                        }
                    });
                }
                SourceEvent::Health { source, up, detail } => {
                    if let Some(h) = self.health.get_mut(&source) {
                        let state = if up { "up" } else { "down" };
                        if h.state != state {
                            h.state = state.into();
                            h.since_ms = now_ms();
                            self.health_changed = true;
                        }
                        h.detail = detail;
                    }
                }
                SourceEvent::Ended { source } => {
                    self.ended += 1;
                    if let Some(h) = self.health.get_mut(&source) {
                        h.state = "ended".into();
                        h.since_ms = now_ms();
                        self.health_changed = true;
                    }
                    tracing::info!(component = "daemon", "source {source} has ended");
                    if self.ended == self.sources {
                        stop = Some("every source has ended".to_string());
                    }
                }
            }
        }
        self.take(&mut accepted).await?;
        Ok(stop)
    }

    /// An acknowledgement, an approval or a status question from the control socket or an
    /// output.
    async fn on_request(&mut self, req: hub::Request) -> Result<(), DaemonError> {
        match req {
            hub::Request::Ack {
                target,
                by,
                note,
                via,
                reply,
            } => {
                let answer = match self
                    .engine
                    .acknowledge(&target, &by, note.as_deref(), now_ms())
                {
                    Ok((ids, out)) => {
                        tracing::info!(
                            component = "alerts",
                            "acknowledgement by {by} via {via}: {}",
                            ids.join(", ")
                        );
                        carry_out(
                            &self.archive,
                            &self.cfg,
                            out,
                            &mut self.summary,
                            &mut self.fx,
                        )
                        .await?;
                        // Whoever acknowledged looks at the state next (the page shows it
                        // at once): it is published before the answer, not at the next tick.
                        self.publish_alerts_and_light();
                        self.publish_states();
                        hub::AckReply {
                            ok: true,
                            acknowledged: ids,
                            error: None,
                        }
                    }
                    Err(e) => {
                        tracing::warn!(
                            component = "alerts",
                            "acknowledgement of {target:?} by {by:?} via {via} refused: {e}"
                        );
                        hub::AckReply {
                            ok: false,
                            acknowledged: Vec::new(),
                            error: Some(e.to_string()),
                        }
                    }
                };
                let _ = reply.send(answer);
            }
            hub::Request::Approve {
                characteristic,
                by,
                note,
                via,
                reply,
            } => {
                let answer = match self.engine.approve(
                    &characteristic,
                    &by,
                    note.as_deref(),
                    now_ms(),
                ) {
                    Ok(out) => {
                        tracing::info!(component = "engine", characteristic = %characteristic, "limits approved by {by} via {via}");
                        carry_out(
                            &self.archive,
                            &self.cfg,
                            out,
                            &mut self.summary,
                            &mut self.fx,
                        )
                        .await?;
                        // The retained state says where the limits come from: refresh it now.
                        self.fx.dirty.insert(characteristic.clone());
                        hub::ApproveReply {
                            ok: true,
                            error: None,
                        }
                    }
                    Err(e) => {
                        tracing::warn!(
                            component = "engine",
                            "approval of {characteristic:?} by {by:?} via {via} refused: {e}"
                        );
                        hub::ApproveReply {
                            ok: false,
                            error: Some(e.to_string()),
                        }
                    }
                };
                let _ = reply.send(answer);
            }
            hub::Request::Status { brief, reply } => {
                let _ = reply.send(self.status(brief));
            }
        }
        Ok(())
    }

    fn status(&self, brief: bool) -> hub::StatusReport {
        let st = self.archive_status.borrow().clone();
        hub::StatusReport {
            version: env!("CARGO_PKG_VERSION").to_string(),
            config: self.cfg.path.display().to_string(),
            started_ms: self.started_ms,
            now_ms: now_ms(),
            light: *self.publish.light.borrow(),
            archive: hub::ArchiveStatus {
                dir: self.cfg.archive_dir.display().to_string(),
                durable_seq: st.durable_seq,
                state: match &st.state {
                    WriterState::Running => "running".into(),
                    WriterState::Held { cause, message } => format!("{}: {message}", cause.word()),
                    WriterState::Failed { message } => format!("failed: {message}"),
                    WriterState::Stopped => "stopped".into(),
                },
            },
            sources: self.health.values().cloned().collect(),
            characteristics: if brief {
                Vec::new()
            } else {
                self.engine.view().iter().map(hub::CharStatus::of).collect()
            },
            alerts: self.engine.alerts().all().cloned().collect(),
        }
    }

    /// An output delivered an alert: archived, without waking the outputs again.
    async fn on_delivery(&mut self, d: hub::Delivery) -> Result<(), DaemonError> {
        if let Some(out) = self.engine.delivered(&d.output, &d.alert_id, d.version) {
            let mut quiet = Effects::default();
            carry_out(
                &self.archive,
                &self.cfg,
                vec![out],
                &mut self.summary,
                &mut quiet,
            )
            .await?;
        }
        Ok(())
    }

    /// Rereads the config file: a valid one is swapped in (characteristics whose configuration
    /// did not change keep their state; sources, outputs, control and the archive wait for a
    /// restart), an invalid one is rejected whole and the running one kept.
    async fn on_reload(&mut self) -> Result<(), DaemonError> {
        let path = self.cfg.path.clone();
        let loaded = tokio::task::spawn_blocking(move || crate::config::load(&path)).await;
        let new = match loaded {
            Ok(Ok(new)) => new,
            Ok(Err(e)) => {
                tracing::error!(
                    component = "daemon",
                    "reload rejected, the running configuration stays:\n{e}"
                );
                return Ok(());
            }
            Err(e) => {
                tracing::error!(component = "daemon", "reload failed: {e}");
                return Ok(());
            }
        };
        let cfg = &self.cfg;
        if new.sources != cfg.sources {
            tracing::warn!(
                component = "daemon",
                "the sources changed; that takes effect at the next restart"
            );
        }
        if new.outputs != cfg.outputs || new.control != cfg.control {
            tracing::warn!(
                component = "daemon",
                "the outputs or the control socket changed; that takes effect at the next restart"
            );
        }
        if new.web != cfg.web {
            tracing::warn!(
                component = "daemon",
                "[web] changed; that takes effect at the next restart"
            );
        }
        if new.archive_dir != cfg.archive_dir {
            tracing::warn!(
                component = "daemon",
                "archive_dir changed; that takes effect at the next restart"
            );
        }
        let tail = crate::archive::reader::Reader::open(&cfg.archive_dir)
            .and_then(|r| r.tail(30))
            .unwrap_or_default();
        for note in self.engine.reconfigure(&new, &tail, now_ms()) {
            tracing::info!(component = "daemon", "reload: {note}");
        }
        let changed = self.engine.limits_records(&tail);
        carry_out(
            &self.archive,
            &new,
            changed,
            &mut self.summary,
            &mut self.fx,
        )
        .await?;
        let text = std::fs::read(&new.path).unwrap_or_default();
        self.archive
            .append(vec![Record::ConfigLoaded {
                path: new.path.display().to_string(),
                sha256: crate::archive::segment::sha256_hex(&text),
            }])
            .await?;
        let old = std::mem::replace(&mut self.cfg, new);
        self.cfg.archive_dir = old.archive_dir;
        self.cfg.sources = old.sources;
        self.cfg.outputs = old.outputs;
        self.cfg.control = old.control;
        self.cfg.web = old.web;
        // Characteristics may have come or gone: the retained states and the page's views
        // drop the ones gone, and every one is published afresh at the next tick.
        let ids: std::collections::BTreeSet<String> = self
            .cfg
            .characteristics
            .iter()
            .map(|c| c.id.clone())
            .collect();
        self.states.retain(|k, _| ids.contains(k));
        self.views.retain(|k, _| ids.contains(k));
        self.fx.dirty.extend(ids);
        self.fx.alerts_changed = true;
        crate::fsutil::release_memory();
        tracing::info!(component = "daemon", "reloaded {}", self.cfg.path.display());
        Ok(())
    }

    /// The one-second tick: time-based closes and escalations, retained states, the light.
    async fn on_tick(&mut self) -> Result<(), DaemonError> {
        self.ticks += 1;
        if self.ticks.is_multiple_of(10) {
            // Readings churn through short-lived buffers on several threads; hand the freed
            // pages back so the resident size stays what the cell needs.
            crate::fsutil::release_memory();
        }
        let out = self.engine.tick(now_ms());
        carry_out(
            &self.archive,
            &self.cfg,
            out,
            &mut self.summary,
            &mut self.fx,
        )
        .await?;
        // Retained states at most once a second, only the ones that changed.
        self.publish_states();
        if self.publish.counts.receiver_count() > 0 {
            self.publish.counts.send_replace(Arc::new(hub::Counts {
                sources: self.health.values().cloned().collect(),
                subgroups: self.fx.subgroups.clone(),
                violations: self.fx.violations.clone(),
            }));
        }
        self.health_changed = true;
        Ok(())
    }

    /// The journal's last word on what is still open, the light off and the last retained
    /// states, for the outputs to send as they wind down.
    pub fn closing(&mut self) {
        for a in self.engine.alerts().active() {
            tracing::warn!(
                component = "alerts",
                characteristic = %a.characteristic,
                "at shutdown, alert {} is {} (fired {}{}): {}",
                a.id,
                a.status.name(),
                if a.count == 1 { "once".to_string() } else { format!("{} times", a.count) },
                if a.gone { ", condition gone" } else { "" },
                a.last_message
            );
        }
        self.publish.light.send_replace(hub::Light::Off);
        self.publish_states();
    }

    /// The engine's state and the `daemon-stopped` record with its reason: the archive's last
    /// records, once the outputs have wound down and their deliveries are archived.
    pub async fn record_stop(&mut self, reason: String) -> Result<(), DaemonError> {
        let mut last = self.engine.snapshot();
        last.push(Record::DaemonStopped { reason });
        self.summary.last_seq = self.archive.append_seq(last).await?;
        Ok(())
    }
}
