use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Parser, Subcommand};

mod cli;

use cli::archive::{ArchiveCommand, archive_cmd};
use cli::arl::{ArlArgs, arl_cmd};
use cli::backtest::{BacktestArgs, backtest_cmd};
use cli::chart::{ChartArgs, chart_cmd};
use cli::daemon::{DaemonArgs, ack_cmd, approve_cmd, check_cmd, run_cmd, status_cmd};
use cli::report::{ReportArgs, report_cmd};
use cli::study::{CapabilityArgs, LimitsArgs, capability_cmd, limits};

#[derive(Parser)]
#[command(
    name = "linewarden",
    version,
    about = "Statistical process control beside the machine: control limits, capability and run rules"
)]
struct Cli {
    #[command(subcommand)]
    command: Command,
}

#[derive(Subcommand)]
enum Command {
    /// Compute control limits from a baseline of subgroups, optionally with capability, and
    /// store them for a characteristic.
    Limits(LimitsArgs),
    /// Report process capability (Cp, Cpk, Pp, Ppk, Cpm) of a data file against its specs.
    Capability(CapabilityArgs),
    /// Draw the control charts of a study from a file, or of a window of the archive, as SVG
    /// or PNG.
    Chart(ChartArgs),
    /// Write one self-contained HTML report on a characteristic over a window of the archive:
    /// limits and their provenance, charts, capability, alerts, rejections, the archive's check.
    Report(ReportArgs),
    /// Try a candidate configuration's rules on the archive's readings, beside the signals the
    /// record holds.
    Backtest(BacktestArgs),
    /// How often a rule set raises a false alarm, and how fast it catches a mean shift
    /// (average run lengths).
    Arl(ArlArgs),
    /// Make a line of the live page's users file (`[web] users`): the name and an argon2 hash
    /// of a password read from standard input (asked for twice, unechoed, at a terminal).
    WebUser {
        /// The user's name, as the archive will record who acknowledged.
        name: String,
    },
    /// Run the daemon: read the sources, check every subgroup, archive everything, alert.
    Run {
        /// The config file.
        #[arg(long, value_name = "FILE")]
        config: PathBuf,
    },
    /// Validate a daemon config file and report every problem at once.
    Check {
        /// The config file.
        #[arg(long, value_name = "FILE")]
        config: PathBuf,
    },
    /// Inspect the archive: verify it, export it, count what it holds.
    #[command(subcommand)]
    Archive(ArchiveCommand),
    /// Ask the running daemon how things stand: sources, characteristics, open alerts.
    Status {
        #[command(flatten)]
        to: DaemonArgs,
        /// Print the daemon's JSON answer.
        #[arg(long)]
        json: bool,
        /// Only the light, the archive, the sources and the alerts, not every characteristic.
        #[arg(long)]
        brief: bool,
    },
    /// Acknowledge an alert (or every unacknowledged alert of a characteristic).
    Ack {
        /// The alert id (as the log, the HMI and the email show it), or a characteristic id.
        alert: String,
        /// Who acknowledges: a name or badge number, recorded in the archive.
        #[arg(long, value_name = "NAME")]
        by: String,
        /// What was found or done.
        #[arg(long, value_name = "TEXT")]
        note: Option<String>,
        #[command(flatten)]
        to: DaemonArgs,
        /// Print the daemon's JSON answer.
        #[arg(long)]
        json: bool,
    },
    /// Approve the provisional limits a characteristic learned: recorded with who and when in
    /// the archive and the limits file; from then on its alerts take their rules' severities.
    Approve {
        /// The characteristic id.
        characteristic: String,
        /// Who approves: a name, recorded in the archive and the limits file.
        #[arg(long, value_name = "NAME")]
        by: String,
        /// What was reviewed (a setup sheet, a study).
        #[arg(long, value_name = "TEXT")]
        note: Option<String>,
        #[command(flatten)]
        to: DaemonArgs,
    },
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    if !matches!(cli.command, Command::Run { .. }) {
        // A command whose output goes into a pipe that closes (`| head`) ends quietly, as
        // other Unix tools do. Not the daemon: it writes to sockets, and a peer that goes
        // away is an error it handles, never a reason to die.
        // SAFETY: restoring the default action of a signal; no handler runs.
        unsafe {
            libc::signal(libc::SIGPIPE, libc::SIG_DFL);
        }
        // The library's warnings (an unreadable record skipped while reading an archive, ...)
        // reach the person at the desk on standard error, plainly.
        tracing_subscriber::fmt()
            .with_writer(std::io::stderr)
            .with_env_filter(
                tracing_subscriber::EnvFilter::try_from_default_env()
                    .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new("warn")),
            )
            .with_target(false)
            .without_time()
            .with_level(true)
            .with_ansi(false)
            .init();
    }
    let result = match cli.command {
        Command::Limits(a) => limits(a),
        Command::Capability(a) => capability_cmd(a),
        Command::Chart(a) => chart_cmd(a),
        Command::Report(a) => report_cmd(a),
        Command::Arl(a) => arl_cmd(a),
        Command::Backtest(a) => backtest_cmd(a),
        Command::Archive(a) => archive_cmd(a),
        Command::Check { config } => check_cmd(&config),
        Command::WebUser { name } => cli::daemon::web_user_cmd(&name),
        Command::Run { config } => run_cmd(&config),
        Command::Status { to, json, brief } => status_cmd(&to, json, brief),
        Command::Ack {
            alert,
            by,
            note,
            to,
            json,
        } => ack_cmd(&to, alert, by, note, json),
        Command::Approve {
            characteristic,
            by,
            note,
            to,
        } => approve_cmd(&to, characteristic, by, note),
    };
    match result {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            eprintln!("error: {}", error_words(&e));
            ExitCode::FAILURE
        }
    }
}

/// The whole chain of causes, each said once: an error whose own text already carries its
/// cause (`cannot read … : Permission denied (os error 13)`) does not get it repeated.
fn error_words(e: &anyhow::Error) -> String {
    let mut out = String::new();
    for cause in e.chain() {
        let text = cause.to_string();
        if out.contains(&text) {
            continue;
        }
        if !out.is_empty() {
            out.push_str(": ");
        }
        out.push_str(&text);
    }
    out
}
