//! One module per command. Each takes the loaded [`Context`] and prints its own output to
//! stdout; errors go back to `cli` as `anyhow::Error` with context naming what failed.

pub mod demo;
pub mod forecast;
pub mod ingest;
pub mod init;
pub mod refit;
pub mod reml;
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
    /// Locate (`--config`, `VIGIL_CONFIG`, `./vigil.toml`) and validate the configuration.
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
