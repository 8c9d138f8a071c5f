//! Logging: one tracing subscriber for the whole process, writing to stderr.
//!
//! Human-readable text when stderr is a terminal, JSON lines otherwise (or when asked with
//! `--log-format json`), so a scheduler's journal gets machine-readable records. Quiet by
//! default (warnings and errors only; `serve` adds one info line per run and lease change);
//! `RUST_LOG` selects more, e.g. `RUST_LOG=tidemark_service=info`. Progress bars are not logs:
//! see `progress`.

use std::io::IsTerminal;

use tracing_subscriber::EnvFilter;

/// Log line format.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum LogFormat {
    Text,
    Json,
}

/// Install the subscriber (warnings and errors unless `RUST_LOG` is set). Safe to call
/// more than once (later calls do nothing), which keeps tests that run the CLI in-process
/// quiet and correct.
pub fn init(format: Option<LogFormat>) {
    init_with(format, "warn");
}

/// [`init`] with another filter for when `RUST_LOG` is not set.
pub fn init_with(format: Option<LogFormat>, default_filter: &str) {
    let filter =
        EnvFilter::try_from_default_env().unwrap_or_else(|_| EnvFilter::new(default_filter));
    let format = format.unwrap_or(if std::io::stderr().is_terminal() {
        LogFormat::Text
    } else {
        LogFormat::Json
    });
    let builder = tracing_subscriber::fmt()
        .with_env_filter(filter)
        .with_writer(std::io::stderr);
    let _ = match format {
        LogFormat::Text => builder.try_init(),
        LogFormat::Json => builder.json().with_current_span(true).try_init(),
    };
}
