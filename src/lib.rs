//! linewarden: statistical process control beside the machine.
//!
//! # Layout
//!
//! * [`stats`] — the pure statistics core: chart constants ([`stats::constants`]), variables
//!   charts ([`stats::variables`]), attribute charts ([`stats::attributes`]), EWMA
//!   ([`stats::ewma`]) and CUSUM ([`stats::cusum`]), baseline studies ([`stats::study`]) and
//!   the policy the daemon learns limits with and its simulation ([`stats::learning`]),
//!   capability ([`stats::capability`]) with fitted models for readings that are not normal
//!   ([`stats::distributions`]) and normality ([`stats::normality`]). No I/O, no clock, no
//!   tokio.
//! * [`rules`] — run rules evaluated incrementally per subgroup and per reading, their TOML
//!   config and presets, average run lengths ([`rules::arl`]), and each rule's in-control rate
//!   on the chart it runs on ([`rules::theory`]). Pure, like [`stats`].
//! * [`engine`] — the pure engine of a cell: reading checks (and a pass/fail station's words
//!   mapped to counts), subgroup assembly, learning, rules and the outputs they call for, for
//!   measured and attribute (p, np, c, u) characteristics; its state rebuilt from the
//!   archive's tail.
//! * [`alerts`] — the alert lifecycle (pure) and its event type, which the archive records.
//! * [`config`] — the daemon's TOML configuration, parsed then validated with every problem
//!   located, one module per section: the file and `[daemon]` in `config`,
//!   [`config::characteristics`], [`config::sources`], [`config::outputs`].
//! * [`daemon`] — the tokio shell around the engine: [`daemon::sources`] (replay, folder,
//!   serial, MQTT, one module each, one event type), [`daemon::outputs`] (stack light, MQTT,
//!   email), [`daemon::control`] (the status and acknowledgement socket), [`daemon::hub`] (what
//!   the engine loop publishes to them), [`daemon::web`] (metrics, health and the live page over HTTP, with
//!   [`daemon::access`] for acknowledging from it),
//!   [`daemon::notify`] (systemd) and [`daemon::clock`].
//! * [`archive`] — the append-only record of everything: framed, checksummed, sealed and
//!   hash-chained segment files; the group-committing writer and its task; readers, `verify`,
//!   export and state rebuild from checkpoints; one characteristic's window of subgroups with
//!   their readings ([`archive::window`]) for the engineer's commands.
//! * [`input`] — turns CSV text (wide, long or one reading per row) into subgroups, with errors
//!   that name the file, line and column.
//! * [`limits_file`] — the stored limits of one characteristic (a variables or an attribute
//!   chart): a TOML format of our own, parsed, validated and written atomically.
//! * [`report`] — the readable text of a study and of a capability analysis.
//! * [`backtest`] — a candidate configuration's engine run on the archive's readings, its
//!   signals matched with the record's subgroup by subgroup.
//! * [`chart`] — control-chart pictures (both charts, limits, zones, marked signals named by
//!   rule, excluded subgroups, a local-time or subgroup-number axis, the readings' histogram),
//!   of a live characteristic, a study or a window of the archive, drawn to PNG or SVG; the one
//!   drawing every output uses (email, `chart`, `report`).
//! * [`fsutil`] — durable file writes (temp file, fsync, rename, fsync of the directory).
//! * [`diag`] — problems in a TOML file, located by TOML path and line:column.
//! * [`format`] — number and time formatting shared by reports and files, and the RFC 3339
//!   reader for times that come from outside.
//! * [`fuzz_checks`] — the bodies of the fuzz targets for every parser of outside input,
//!   shared with the property tests that run them in `cargo test`.
//!
//! The binary is a thin command-line shell over these modules: `src/main.rs` parses and
//! dispatches, and `src/cli/` holds one module per command family (`study`: limits and
//! capability, from a file or the archive; `attribute`: the same for p, np, c and u; `chart`; `report`; `backtest`; `arl`; `archive`; `daemon`: run,
//! check, status, ack and approve).
//!
//! Dependencies run one way: `stats` ← `rules` ← `alerts` ← `archive` ← `engine` ← `daemon`,
//! with `config` read by `engine` and `daemon`; no module imports one that imports it.

pub mod alerts;
pub mod archive;
pub mod backtest;
pub mod chart;
pub mod config;
pub mod daemon;
pub mod diag;
pub mod engine;
pub mod format;
pub mod fsutil;
pub mod fuzz_checks;
pub mod input;
pub mod limits_file;
pub mod report;
pub mod rules;
pub mod stats;
