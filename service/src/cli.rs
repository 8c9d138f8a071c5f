//! The command line: argument parsing (clap derive) and dispatch to `commands`.
//!
//! To add a command: add a variant to [`Command`] with its doc comment (that is its
//! `--help`), write `commands/<name>.rs` with an `async fn run(&Context, …) -> anyhow::Result<()>`,
//! and add one arm to [`dispatch`].

use std::path::PathBuf;
use std::process::ExitCode;

use clap::{Parser, Subcommand};

use crate::commands::{self, Context};
use crate::telemetry::{self, LogFormat};

/// Tidemark keeps the site/year variance model of a monitoring network up to date.
#[derive(Debug, Parser)]
#[command(name = "tidemark", version, about, propagate_version = true)]
pub struct Cli {
    /// Configuration file [default: $TIDEMARK_CONFIG, else ./tidemark.toml]; give it before
    /// the command. `demo` writes its own.
    #[arg(long, value_name = "PATH")]
    pub config: Option<PathBuf>,

    /// Log line format on stderr [default: text on a terminal, json otherwise]
    #[arg(long, global = true, value_enum, value_name = "FORMAT")]
    pub log_format: Option<LogFormat>,

    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Create the database and the feed folders, and apply migrations (idempotent)
    Init,
    /// Ingest the named feed files, or every file waiting in the inbox
    Ingest {
        /// Files to ingest (CSV or Arrow IPC); none means the whole inbox, in name order
        #[arg(value_name = "FILE")]
        files: Vec<PathBuf>,
    },
    /// Refit series whose data changed since their last version; publish those that pass the gate
    Refit {
        /// Only this series
        #[arg(long, value_name = "NAME")]
        series: Option<String>,
        /// Start cold instead of from the latest published version
        #[arg(long)]
        cold: bool,
        /// Refit even when the data did not change
        #[arg(long)]
        force: bool,
    },
    /// Rewrite the forecasts of the latest published version from its stored draws
    Forecast {
        /// Only this series
        #[arg(long, value_name = "NAME")]
        series: Option<String>,
    },
    /// Remove the draws of published versions beyond `store.keep_draws` per series (their summaries and forecasts stay); every run does this at its end
    Prune {
        /// List what would be pruned, and change nothing
        #[arg(long)]
        dry_run: bool,
    },
    /// One scheduled run: ingest the inbox, refit what changed, write forecasts
    RunOnce,
    /// Run on the configured schedule until SIGTERM/SIGINT (one instance per database)
    Serve,
    /// Show recent runs and batches, and the latest version of each series
    Status {
        /// Print one JSON document instead of text
        #[arg(long)]
        json: bool,
    },
    /// REML estimates of the variance components on the data now in the store
    Reml {
        /// Only this series [default: every series]
        #[arg(long, value_name = "NAME")]
        series: Option<String>,
        /// Print one JSON document instead of text
        #[arg(long)]
        json: bool,
    },
    /// Variance components of every published version and how they moved
    ///
    /// Per series and published version: the data-through year, q05/q50/q95 of each
    /// standard deviation (model scale) and each variance share, and the change of the
    /// median from the previous version. A quantity is flagged (*) when the new version's
    /// 90% interval [q05, q95] excludes the previous version's median. This is a
    /// screening rule, not a statistical test: successive versions share most of their
    /// data, and with many quantities some flags arise by chance; a flag asks a person to
    /// look.
    Drift {
        /// Only this series
        #[arg(long, value_name = "NAME")]
        series: Option<String>,
        /// Only versions with at least one flagged quantity
        #[arg(long)]
        flagged: bool,
        /// Only the newest N published versions of each series
        #[arg(long, value_name = "N", value_parser = clap::value_parser!(u32).range(1..))]
        last: Option<u32>,
        /// Print one JSON document instead of text
        #[arg(long)]
        json: bool,
    },
    /// Write one self-contained HTML page with charts of the published versions
    ///
    /// Per series: variance components across versions with their 90% intervals, the
    /// widths of the latest version's 80% forecast intervals by target, and its site
    /// effects ranked with 90% intervals; then the run history and the cautions. The page
    /// has no external resources and needs no JavaScript. The file is replaced atomically.
    Report {
        /// The HTML file to write
        #[arg(long, value_name = "FILE.html")]
        out: PathBuf,
        /// Only this series
        #[arg(long, value_name = "NAME")]
        series: Option<String>,
    },
    /// Write forecasts, posterior summaries, drift rows or draws as CSV, Parquet or Arrow
    ///
    /// WHAT is one of: `forecasts` (rows of the `latest_forecasts` view), `posterior` (the
    /// posterior summaries of each series' latest published version), `drift` (rows of the
    /// `variance_drift` view) or `draws` (every stored draw of one published version, one
    /// row per value: needs --series and --version). The columns are listed in README.md
    /// § Exports. CSV leaves a missing value empty and writes every number so that it
    /// parses back exactly. With --out the file is replaced atomically; without it (or
    /// with `--out -`) the export goes to stdout.
    #[command(disable_version_flag = true)]
    Export {
        /// What to export
        #[arg(value_enum, value_name = "WHAT")]
        what: commands::export::ExportWhat,
        /// File format
        #[arg(long, value_enum, default_value = "csv", value_name = "FORMAT")]
        format: commands::export::ExportFormat,
        /// The file to write; `-` or none means stdout
        #[arg(long, value_name = "FILE")]
        out: Option<PathBuf>,
        /// Only this series
        #[arg(long, value_name = "NAME")]
        series: Option<String>,
        /// Only this forecast target (`forecasts` only)
        #[arg(long, value_name = "TARGET")]
        target: Option<String>,
        /// The published version whose draws to export (`draws` only)
        #[arg(long, value_name = "V")]
        version: Option<i64>,
    },
    /// Replay the demo feed (an invented lake network) season by season through the pipeline
    Demo {
        /// Folder for the demo's config, feed folders and database [default: ./tidemark-demo]
        #[arg(long, value_name = "DIR")]
        out: Option<PathBuf>,
    },
}

/// Parse the process arguments, run the command, and turn the result into an exit code:
/// 0 on success; 1 with a one-line reason on stderr on failure; 2 for a usage error.
pub fn run() -> ExitCode {
    tidemark_feed::quiet_caught_panics();
    let cli = match Cli::try_parse() {
        Ok(cli) => cli,
        Err(e) => {
            let _ = e.print();
            return if e.use_stderr() {
                ExitCode::from(2)
            } else {
                ExitCode::SUCCESS
            };
        }
    };
    // The service's journal gets one line per run and lease change; commands a person
    // runs stay quiet unless something needs attention.
    let level = if matches!(cli.command, Command::Serve) {
        "warn,tidemark_service=info"
    } else {
        "warn"
    };
    telemetry::init_with(cli.log_format, level);
    // Commands that write to the store finish their work whatever happens to their
    // output (they print through `say!`); the others may simply stop.
    if !matches!(
        cli.command,
        Command::Serve
            | Command::RunOnce
            | Command::Refit { .. }
            | Command::Prune { .. }
            | Command::Forecast { .. }
            | Command::Ingest { .. }
            | Command::Init
    ) {
        stop_quietly_on_a_closed_pipe();
    }
    let runtime = match tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
    {
        Ok(rt) => rt,
        Err(e) => {
            eprintln!("tidemark: error: cannot start the async runtime: {e}");
            return ExitCode::FAILURE;
        }
    };
    let outcome = runtime.block_on(dispatch(cli));
    // A fit thread still winding down after a shutdown request must not hold the exit.
    runtime.shutdown_timeout(std::time::Duration::from_secs(1));
    match outcome {
        Ok(()) => ExitCode::SUCCESS,
        Err(e) => {
            let reason = crate::reason::reason_of(&e).replace('\n', " ");
            // The reason may quote a file name or a cell: never raw control characters.
            let reason = crate::visible::visible(&reason);
            // Only the one line: the log stream also goes to stderr and would repeat it.
            eprintln!("tidemark: error: {reason}");
            ExitCode::FAILURE
        }
    }
}

/// A command whose reader went away (`tidemark drift | head`) ends at once, as other
/// command-line tools do (exit status 141 in the shell), instead of panicking in the next
/// `println!`. Only for commands that read (and `demo`, which starts a cut-short replay
/// over): `serve`, `run-once`, `refit`, `forecast`, `ingest` and `init` keep the Rust
/// default (SIGPIPE ignored) and drop lines nobody reads, so a closed pipe never leaves a
/// run half done.
fn stop_quietly_on_a_closed_pipe() {
    // SAFETY: setting a signal disposition to its default at start-up, before any thread
    // of ours writes to a pipe.
    unsafe {
        libc::signal(libc::SIGPIPE, libc::SIG_DFL);
    }
}

/// Run one parsed command.
pub async fn dispatch(cli: Cli) -> anyhow::Result<()> {
    // The demo brings its own configuration.
    if let Command::Demo { out } = cli.command {
        if cli.config.is_some() {
            anyhow::bail!(
                "demo writes its own config into its --out folder; --config is not used with demo"
            );
        }
        return commands::demo::run(out).await;
    }
    let ctx = Context::load(cli.config.as_deref())?;
    match cli.command {
        Command::Demo { .. } => unreachable!("handled above"),
        Command::Refit {
            series,
            cold,
            force,
        } => commands::refit::run(&ctx, series, cold, force).await,
        Command::Forecast { series } => commands::forecast::run(&ctx, series).await,
        Command::RunOnce => commands::run_once::run(&ctx).await,
        Command::Prune { dry_run } => commands::prune::run(&ctx, dry_run).await,
        Command::Serve => commands::serve::run(&ctx).await,
        Command::Reml { series, json } => commands::reml::run(&ctx, series, json).await,
        Command::Init => commands::init::run(&ctx).await,
        Command::Ingest { files } => commands::ingest::run(&ctx, &files).await,
        Command::Status { json } => commands::status::run(&ctx, json).await,
        Command::Drift {
            series,
            flagged,
            last,
            json,
        } => {
            let filter = crate::drift::Filter {
                flagged_only: flagged,
                last: last.map(|n| n as usize),
            };
            commands::drift::run(&ctx, series, filter, json).await
        }
        Command::Report { out, series } => commands::report::run(&ctx, &out, series).await,
        Command::Export {
            what,
            format,
            out,
            series,
            target,
            version,
        } => {
            let args = commands::export::ExportArgs {
                what,
                format,
                out,
                series,
                target,
                version,
            };
            commands::export::run(&ctx, args).await
        }
    }
}
