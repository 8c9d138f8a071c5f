//! One module per command. Each takes the loaded [`Context`] and prints its own output to
//! stdout; errors go back to `cli` as `anyhow::Error` with context naming what failed.

pub mod demo;
pub mod drift;
pub mod export;
pub mod forecast;
pub mod ingest;
pub mod init;
pub mod prune;
pub mod refit;
pub mod reml;
pub mod report;
pub mod run_once;
pub mod serve;
pub mod status;

use std::path::Path;

use anyhow::Context as _;

use crate::config::{self, Config};
use crate::store::Store;

/// What every command starts from: the validated configuration.
#[derive(Debug, Clone)]
pub struct Context {
    pub config: Config,
}

impl Context {
    /// Locate (`--config`, `TIDEMARK_CONFIG`, `./tidemark.toml`) and validate the configuration.
    pub fn load(cli_config: Option<&Path>) -> anyhow::Result<Context> {
        let path = config::locate(cli_config);
        let config = Config::load(&path)?;
        Ok(Context { config })
    }

    /// Open the store, refusing a database that is missing, pending migrations or newer.
    pub async fn open_store(&self) -> anyhow::Result<Store> {
        Store::open(&self.config.database)
            .await
            .with_context(|| format!("config {}", self.config.path.display()))
    }
}

/// Refuse a `--series NAME` that the configuration does not define.
pub fn require_series(ctx: &Context, name: &str) -> anyhow::Result<()> {
    select_series(ctx, Some(name)).map(|_| ())
}

/// The series a command works on: the one named by `--series`, or every configured
/// series ([`crate::config::Config::select_series`]).
pub fn select_series<'a>(
    ctx: &'a Context,
    name: Option<&str>,
) -> anyhow::Result<Vec<&'a crate::config::SeriesConfig>> {
    Ok(ctx.config.select_series(name)?)
}

/// `println!` for the commands that write to the store: a reader that went away
/// (`tidemark run-once | head -1`) must not stop the work half way, so a line that cannot
/// be written is dropped instead of panicking or killing the process.
#[macro_export]
macro_rules! say {
    ($($arg:tt)*) => {
        $crate::commands::say_line(&format!($($arg)*))
    };
}

/// `eprintln!` for the same commands, on the same terms.
#[macro_export]
macro_rules! say_err {
    ($($arg:tt)*) => {
        $crate::commands::say_err_line(&format!($($arg)*))
    };
}

// Both print through `visible_lines`: a file name or code that reached a line without
// its own escaping still cannot drive the terminal.
#[doc(hidden)]
pub fn say_line(line: &str) {
    // A closed pipe is already no error for `print_bytes`; nor is anything else here.
    let line = crate::visible::visible_lines(line);
    let _ = print_bytes(format!("{line}\n").as_bytes());
}

#[doc(hidden)]
pub fn say_err_line(line: &str) {
    use std::io::Write as _;
    let line = crate::visible::visible_lines(line);
    let _ = writeln!(std::io::stderr().lock(), "{line}");
}

/// Print `text` to stdout; a reader that stopped early (`tidemark drift | head`) is not an
/// error.
pub fn print_out(text: &str) -> anyhow::Result<()> {
    print_bytes(text.as_bytes())
}

/// Write `bytes` to stdout; a reader that stopped early (`tidemark export drift | head`)
/// is not an error.
pub fn print_bytes(bytes: &[u8]) -> anyhow::Result<()> {
    use std::io::Write as _;
    let mut stdout = std::io::stdout().lock();
    match stdout.write_all(bytes).and_then(|()| stdout.flush()) {
        Err(e) if e.kind() != std::io::ErrorKind::BrokenPipe => {
            Err(anyhow::Error::new(e).context("cannot write to stdout"))
        }
        _ => Ok(()),
    }
}
