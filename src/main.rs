//! The `tidemark` command: parses the command line, loads the config, sets up logging,
//! dispatches to `app::commands`, and turns the outcome into an exit code (0 ok, 1 error,
//! 2 bad usage or config, 3 from `ingest`: committed, but the analysis failed). Errors print one clear line first, details after.

use std::path::{Path, PathBuf};
use std::process::ExitCode;

use anyhow::Result;
use clap::{Args, Parser, Subcommand};

use tidemark::analysis::delay::FamilyChoice;
use tidemark::app::access;
use tidemark::app::commands::{self, CurveArgs, QueryError, UsageError};
use tidemark::app::demo::{self, DemoOptions};
use tidemark::config::{Config, ConfigError};
use tidemark::demo::DEFAULT_DAYS;
use tidemark::model::{MethodChoice, SnapshotId, TokenScope};
use tidemark::table::OutputFormat;

/// mimalloc instead of the system allocator: an ingest allocates on the parsing thread and
/// frees on the writer's, where glibc's arenas contend (measured in the ingest
/// benchmark section).
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;

#[derive(Debug, Parser)]
#[command(name = "tidemark", version, about = "Versioned case line lists, backfill-aware counts and alerts")]
struct Cli {
    /// Config file (default: $TIDEMARK_CONFIG, then ./tidemark.toml).
    #[arg(long, global = true, value_name = "FILE")]
    config: Option<PathBuf>,
    #[command(subcommand)]
    command: Command,
}

#[derive(Debug, Args)]
struct Listing {
    /// Output format.
    #[arg(long, value_enum, default_value = "table")]
    format: OutputFormat,
    /// CSV cells exactly as stored: no apostrophe before text that starts like a
    /// spreadsheet formula (=, +, -, @, tab, carriage return).
    #[arg(long)]
    raw: bool,
}

impl Listing {
    /// The format to render: `--format`, with `--raw` applied.
    fn output(&self) -> OutputFormat {
        self.format.with_raw(self.raw)
    }
}

#[derive(Debug, Subcommand)]
enum Command {
    /// Write an example config and create the store.
    Init {
        #[arg(default_value = ".")]
        dir: PathBuf,
    },
    /// Validate the config and print it resolved, secrets redacted.
    CheckConfig,
    /// Ingest one extract file, the same way the daemon does.
    Ingest {
        file: PathBuf,
        #[arg(long)]
        source: String,
        /// As-of time of the extract (RFC 3339 or YYYY-MM-DD = end of that day, UTC).
        #[arg(long, value_name = "TIME")]
        as_of: Option<String>,
        /// Commit only: leave the post-snapshot analysis (nowcasts, delay fits, quality
        /// measures, alert rules) owed, for the next ingest or the daemon.
        #[arg(long)]
        no_analysis: bool,
    },
    /// List snapshots, or release or reject a held one.
    #[command(args_conflicts_with_subcommands = true)]
    Snapshots {
        #[command(subcommand)]
        action: Option<SnapshotAction>,
        #[arg(long)]
        source: Option<String>,
        #[command(flatten)]
        listing: Listing,
    },
    /// Every version of one record.
    History {
        case_key: String,
        #[arg(long)]
        source: String,
        #[command(flatten)]
        listing: Listing,
    },
    /// Counts per day of a date field, as of a snapshot.
    Curve {
        #[arg(long)]
        source: String,
        /// Date field (onset_date, report_date, ... or onset, report, ...).
        #[arg(long, value_name = "FIELD")]
        by: String,
        #[arg(long, value_name = "TIME")]
        as_of: Option<String>,
        /// jurisdiction, age, sex, outcome or hospitalised.
        #[arg(long, value_name = "FIELD")]
        stratify: Option<String>,
        #[command(flatten)]
        listing: Listing,
    },
    /// Backfill-corrected counts per reference date with prediction intervals.
    Nowcast {
        #[arg(long)]
        source: String,
        #[arg(long, value_name = "FIELD")]
        by: String,
        #[arg(long, value_name = "TIME")]
        as_of: Option<String>,
        /// auto (the best matured rolling score; see `tidemark scores`), hazard, smooth or ensemble.
        #[arg(long, value_enum, default_value_t = MethodChoice::Auto)]
        method: MethodChoice,
        /// jurisdiction, age or sex (one nowcast per stratum).
        #[arg(long, value_name = "FIELD")]
        stratify: Option<String>,
        #[command(flatten)]
        listing: Listing,
    },
    /// Rolling scores of the stored nowcasts whose truth has matured (they drive `auto`).
    Scores {
        #[arg(long)]
        source: String,
        #[arg(long, value_name = "FIELD")]
        by: String,
        /// Scores matured by the snapshot current at this time (default: the latest).
        #[arg(long, value_name = "TIME")]
        as_of: Option<String>,
        #[command(flatten)]
        listing: Listing,
    },
    /// Score past nowcasts against what arrived later (ad hoc; never changes what `auto` chooses).
    Backtest {
        #[arg(long)]
        source: String,
        #[arg(long, value_name = "FIELD")]
        by: String,
        /// First snapshot day to nowcast (default: 28 days before --to).
        #[arg(long, value_name = "DATE")]
        from: Option<String>,
        /// Last snapshot day to nowcast (default: the latest day whose truth is known).
        #[arg(long, value_name = "DATE")]
        to: Option<String>,
        /// Days after which a count is taken as the truth (default analysis.backtest_lag).
        #[arg(long)]
        lag: Option<usize>,
        #[command(flatten)]
        listing: Listing,
    },
    /// Reporting and other delays: summary and fits with censoring and truncation.
    Delays {
        #[arg(long)]
        source: String,
        /// Start: a date field.
        #[arg(long, value_name = "FIELD")]
        from: String,
        /// End: a date field, or first_seen (the day the record first appeared in the store).
        #[arg(long, value_name = "FIELD")]
        to: String,
        /// auto (lowest AIC), gamma, lognormal or weibull.
        #[arg(long, value_enum, default_value_t = FamilyChoice::Auto)]
        family: FamilyChoice,
        #[arg(long, value_name = "TIME")]
        as_of: Option<String>,
        /// One fit per stratum: jurisdiction, age or sex.
        #[arg(long, value_name = "FIELD")]
        stratify: Option<String>,
        /// One row per week of the start date, to show a trend.
        #[arg(long)]
        by_week: bool,
        /// Mann-Whitney U tests between the groups of this field.
        #[arg(long, value_name = "FIELD")]
        compare_by: Option<String>,
        #[command(flatten)]
        listing: Listing,
    },
    /// Data-quality measures of a snapshot: volume, reporting lag, missing and invalid shares.
    Quality {
        #[arg(long)]
        source: String,
        /// Snapshot id (default: the latest measured one).
        #[arg(long)]
        snapshot: Option<SnapshotId>,
        #[command(flatten)]
        listing: Listing,
    },
    /// Alerts with their state and delivery; `ack ID --note TEXT`; `test` sends a test message.
    #[command(args_conflicts_with_subcommands = true)]
    Alerts {
        #[command(subcommand)]
        action: Option<AlertAction>,
        /// Include resolved alerts.
        #[arg(long)]
        all: bool,
        /// The alerts live at this data time (a snapshot's as-of time or date), not now.
        #[arg(long, value_name = "TIME")]
        as_of: Option<String>,
        #[command(flatten)]
        listing: Listing,
    },
    /// Run one read-only SQL statement against the store.
    Query {
        sql: String,
        /// Most rows returned (default serve.query_max_rows, 10,000).
        #[arg(long, value_name = "N")]
        max_rows: Option<usize>,
        /// Time limit, e.g. 30s (default serve.query_timeout, 10s).
        #[arg(long, value_name = "DURATION")]
        timeout: Option<String>,
        #[command(flatten)]
        listing: Listing,
    },
    /// Create, list or revoke API tokens.
    Token {
        #[command(subcommand)]
        action: TokenAction,
    },
    /// Serve the API and ops endpoints on serve.bind, without polling.
    Serve,
    /// The daemon: poll every source on its schedule and ingest what is new.
    Run {
        /// Do not serve /healthz and /metrics.
        #[arg(long)]
        no_ops: bool,
    },
    /// One line per source: last poll, last success, failures, last error; and the daemon.
    Status {
        #[command(flatten)]
        listing: Listing,
    },
    /// Write a consistent copy of the store to DEST (safe while the daemon runs).
    Backup { dest: PathBuf },
    /// Replace the store with a backup (refused while the daemon runs).
    Restore { backup: PathBuf },
    /// Write the line list, nowcasts or delay fits as of a snapshot to a CSV or Parquet file
    /// (mode 0600; a line list holds patient-level data).
    Export {
        #[arg(long)]
        source: String,
        #[arg(long, value_name = "TIME")]
        as_of: Option<String>,
        /// line-list, nowcast or delays.
        #[arg(long, default_value = "line-list")]
        table: String,
        #[arg(long, value_enum)]
        format: tidemark::export::ExportFormat,
        #[arg(long, value_name = "FILE")]
        out: PathBuf,
        /// CSV cells exactly as stored: no apostrophe before text that starts like a
        /// spreadsheet formula (=, +, -, @, tab, carriage return).
        #[arg(long)]
        raw: bool,
    },
    /// Generate the invented scenario and run the whole pipeline on it.
    Demo {
        /// Folder for the scenario's files, config and store.
        #[arg(default_value = "tidemark-demo")]
        dir: PathBuf,
        #[arg(long, default_value_t = 7)]
        seed: u64,
        /// Days of extracts to generate.
        #[arg(long, default_value_t = DEFAULT_DAYS)]
        days: u32,
        /// Keep serving the API and dashboard of the demo store afterwards (until Ctrl-C).
        #[arg(long)]
        serve: bool,
    },
}

#[derive(Debug, Subcommand)]
enum TokenAction {
    /// Create a token and print it (once; only its hash is stored).
    Create {
        name: String,
        /// read: the listings; sql: the listings and POST /api/v1/query.
        #[arg(long, value_enum, default_value_t = TokenScope::Read)]
        scope: TokenScope,
    },
    /// List tokens (names, scopes, hints; never the tokens).
    List {
        #[command(flatten)]
        listing: Listing,
    },
    /// Revoke a token; the API refuses it from its next request.
    Revoke { name: String },
}

#[derive(Debug, Subcommand)]
enum AlertAction {
    /// Acknowledge an alert: no more re-sends; it still resolves when clear.
    Ack {
        id: i64,
        #[arg(long)]
        note: String,
    },
    /// Send a test message through every configured channel now.
    Test,
}

#[derive(Debug, Subcommand)]
enum SnapshotAction {
    /// Apply a held snapshot.
    Release { id: SnapshotId },
    /// Discard a held snapshot (it stays listed as rejected).
    Reject {
        id: SnapshotId,
        #[arg(long)]
        note: Option<String>,
    },
}

fn main() -> ExitCode {
    let cli = Cli::parse();
    if !matches!(cli.command, Command::Run { .. } | Command::Serve) {
        init_tracing(false, false);
    }
    match run(cli) {
        Ok(code) => ExitCode::from(code),
        Err(err) => {
            let mut chain = err.chain();
            if let Some(first) = chain.next() {
                eprintln!("error: {first}");
            }
            for cause in chain {
                eprintln!("  caused by: {cause}");
            }
            ExitCode::from(exit_code(&err))
        }
    }
}

fn exit_code(err: &anyhow::Error) -> u8 {
    let bad_question = |cause: &(dyn std::error::Error + 'static)| {
        matches!(cause.downcast_ref::<QueryError>(), Some(QueryError::BadRequest(_)))
    };
    let usage =
        err.chain().any(|cause| cause.is::<UsageError>() || cause.is::<ConfigError>() || bad_question(cause));
    if usage { 2 } else { 1 }
}

/// Logs to stderr, as text or JSON (`log.format`). The daemon logs at info, one-shot
/// commands at warn plus progress lines; `TIDEMARK_LOG` (an env-filter) overrides both.
fn init_tracing(daemon: bool, json: bool) {
    let default = if daemon { "info" } else { "warn,tidemark::progress=info" };
    let filter = tracing_subscriber::EnvFilter::try_from_env("TIDEMARK_LOG")
        .unwrap_or_else(|_| tracing_subscriber::EnvFilter::new(default));
    let ansi = std::io::IsTerminal::is_terminal(&std::io::stderr());
    let builder =
        tracing_subscriber::fmt().with_env_filter(filter).with_writer(std::io::stderr).with_ansi(ansi);
    let _ = if json { builder.json().try_init() } else { builder.try_init() };
}

/// Where the demo's dashboard is (served now with `--serve`, or by `tidemark serve`).
fn demo_dashboard_line(config: &Config, config_path: &Path, serving: bool) -> String {
    let url = format!("http://{}/", config.bind);
    if serving {
        format!("Dashboard: {url} (serving the demo store; Ctrl-C to stop)")
    } else {
        format!(
            "Dashboard: {url} after `tidemark --config {} serve` (or run the demo with --serve)",
            config_path.display()
        )
    }
}

fn load(flag: Option<&Path>) -> Result<Config> {
    let path = commands::config_path(flag)?;
    let config = Config::load(&path)?;
    for warning in &config.warnings {
        eprintln!("warning: config {}: {warning}", path.display());
    }
    Ok(config)
}

/// The limits of `tidemark query`: the config's, or the flags'.
fn query_limits(
    config: &Config,
    max_rows: Option<usize>,
    timeout: Option<&str>,
) -> Result<tidemark::store::SqlLimits> {
    let mut limits = config.serve.query;
    if let Some(rows) = max_rows {
        limits.max_rows = rows.max(1);
    }
    if let Some(text) = timeout {
        limits.timeout = tidemark::config::parse_duration(text)
            .filter(|d| !d.is_zero())
            .ok_or_else(|| UsageError(format!("--timeout {text}: a duration such as 10s")))?;
    }
    Ok(limits)
}

fn run(cli: Cli) -> Result<u8> {
    let flag = cli.config.as_deref();
    let text = match cli.command {
        Command::Init { dir } => commands::init(&dir)?,
        Command::CheckConfig => commands::check_config(&load(flag)?),
        Command::Ingest { file, source, as_of, no_analysis } => {
            let config = load(flag)?;
            // The file name is outside text: escaped, so it cannot forge a log line or drive
            // the terminal.
            let name = tidemark::text::escape_path(&file);
            tracing::info!(target: "tidemark::progress", source = %source, file = %name, "ingesting");
            let report = commands::ingest(&config, &file, &source, as_of.as_deref(), !no_analysis)?;
            println!("{}", report.outcome.summary(&source));
            for line in commands::problem_lines(&config, report.outcome.snapshot_id, 20)? {
                println!("  {line}");
            }
            if let Some(failure) = &report.analysis_failure {
                eprintln!(
                    "error: the snapshot is committed, but its analysis failed and stays owed: {failure}"
                );
            }
            return Ok(commands::ingest_exit_code(&report) as u8);
        }
        Command::Snapshots { action, source, listing } => {
            let config = load(flag)?;
            match action {
                None => commands::snapshots(&config, source.as_deref(), listing.output())?,
                Some(SnapshotAction::Release { id }) => {
                    let report = commands::release(&config, id)?;
                    print!("{}", report.text);
                    let Some(failure) = &report.analysis_failure else { return Ok(0) };
                    eprintln!(
                        "error: the snapshot is released, but its analysis failed and stays owed: {failure}"
                    );
                    return Ok(commands::EXIT_ANALYSIS_FAILED as u8);
                }
                Some(SnapshotAction::Reject { id, note }) => commands::reject(&config, id, note.as_deref())?,
            }
        }
        Command::History { case_key, source, listing } => {
            commands::history(&load(flag)?, &case_key, &source, listing.output())?
        }
        Command::Curve { source, by, as_of, stratify, listing } => {
            let args = CurveArgs {
                source: &source,
                by: &by,
                as_of: as_of.as_deref(),
                stratify: stratify.as_deref(),
                format: listing.output(),
            };
            commands::curve(&load(flag)?, &args)?
        }
        Command::Nowcast { source, by, as_of, method, stratify, listing } => {
            let args = commands::NowcastArgs {
                source: &source,
                by: &by,
                as_of: as_of.as_deref(),
                method,
                stratify: stratify.as_deref(),
                format: listing.output(),
            };
            commands::nowcast(&load(flag)?, &args)?
        }
        Command::Scores { source, by, as_of, listing } => {
            let args = commands::ScoresArgs { source: &source, by: &by, as_of: as_of.as_deref() };
            commands::scores(&load(flag)?, &args, listing.output())?
        }
        Command::Backtest { source, by, from, to, lag, listing } => {
            let args = commands::BacktestArgs {
                source: &source,
                by: &by,
                from: from.as_deref(),
                to: to.as_deref(),
                lag,
                format: listing.output(),
            };
            commands::backtest(&load(flag)?, &args)?
        }
        Command::Delays { source, from, to, family, as_of, stratify, by_week, compare_by, listing } => {
            let args = commands::DelaysArgs {
                source: &source,
                from: &from,
                to: &to,
                family,
                as_of: as_of.as_deref(),
                stratify: stratify.as_deref(),
                by_week,
                compare_by: compare_by.as_deref(),
                format: listing.output(),
            };
            commands::delays(&load(flag)?, &args)?
        }
        Command::Query { sql, max_rows, timeout, listing } => {
            let config = load(flag)?;
            let limits = query_limits(&config, max_rows, timeout.as_deref())?;
            commands::query(&config, &sql, limits, listing.output())?
        }
        Command::Token { action } => {
            let config = load(flag)?;
            match action {
                TokenAction::Create { name, scope } => access::token_create(&config, &name, scope)?,
                TokenAction::List { listing } => access::token_list(&config, listing.output())?,
                TokenAction::Revoke { name } => access::token_revoke(&config, &name)?,
            }
        }
        Command::Serve => {
            let config = load(flag)?;
            init_tracing(true, config.log_json);
            access::serve(config)?;
            return Ok(0);
        }
        Command::Quality { source, snapshot, listing } => {
            tidemark::app::quality::quality(&load(flag)?, &source, snapshot, listing.output())?
        }
        Command::Alerts { action, all, as_of, listing } => {
            let config = load(flag)?;
            match action {
                None => tidemark::app::alerting::list(&config, all, as_of.as_deref(), listing.output())?,
                Some(AlertAction::Ack { id, note }) => tidemark::app::alerting::ack(&config, id, &note)?,
                Some(AlertAction::Test) => tidemark::app::alerting::test(&config)?,
            }
        }
        Command::Run { no_ops } => {
            let config = load(flag)?;
            init_tracing(true, config.log_json);
            tidemark::app::daemon::run_until_signal(config, !no_ops)?;
            return Ok(0);
        }
        Command::Status { listing } => commands::status(&load(flag)?, listing.output())?,
        Command::Backup { dest } => commands::backup(&load(flag)?, &dest)?,
        Command::Restore { backup } => commands::restore(&load(flag)?, &backup)?,
        Command::Export { source, as_of, table, format, out, raw } => {
            let args = tidemark::app::export::ExportArgs {
                source: &source,
                as_of: as_of.as_deref(),
                table: &table,
                format: format.with_raw(raw),
                out: &out,
            };
            tidemark::app::export::export(&load(flag)?, &args)?.summary()
        }
        Command::Demo { dir, seed, days, serve } => {
            let config_path = dir.join("tidemark.toml");
            let options = DemoOptions { dir, seed, days };
            print!("{}", demo::run(&options, &mut |line| println!("{line}"))?.report());
            let config = Config::load(&config_path)?;
            println!("{}", demo_dashboard_line(&config, &config_path, serve));
            if serve {
                access::serve(config)?;
            }
            return Ok(0);
        }
    };
    print!("{text}");
    Ok(0)
}
