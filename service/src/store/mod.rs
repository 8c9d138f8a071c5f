//! The SQLite store: the only module that writes SQL.
//!
//! It owns the connection settings (WAL, foreign keys, busy timeout), the embedded
//! migrations from `migrations/` and the check that the database and the binary agree on
//! them, and every read and write the rest of the service needs, as typed async functions.
//! Values are always bound as parameters, never spliced into SQL text.
//!
//! Invariant: only this module writes SQL (checked by `tests/e2e_store.rs::only_the_store_writes_sql`).

mod drift;
mod export;
mod fits;
mod ingest;
mod lease;
mod report;
mod retention;
mod runs;
mod series;
mod status;
pub mod vocabulary;

use std::path::{Path, PathBuf};
use std::str::FromStr;
use std::time::Duration;

use sqlx::migrate::Migrator;
use sqlx::sqlite::{
    SqliteConnectOptions, SqliteJournalMode, SqlitePool, SqlitePoolOptions, SqliteSynchronous,
};
use sqlx::{Connection, Row};

pub use drift::ComponentRow;
pub use export::{DriftExportRow, ForecastExportRow, PosteriorExportRow, VersionDraws};
pub use fits::{
    ForecastSet, NewExclusion, NewFit, PublishGuard, PublishedFit, RecordedFit, ScenarioValue,
};
pub use ingest::{BatchFile, BatchOutcome, BatchRecord};
pub use lease::{Fence, LeaseAttempt, LeaseClaim, LeaseHolder};
pub use report::{
    ForecastBand, ForecastInterval, RunHistoryEntry, RunSeriesOutcome, SiteEffect, SiteExceedance,
};
pub use retention::{PruneRecord, PrunedDraws};
pub use runs::RunOrigin;
pub use series::{SeriesRow, StoredValue};
pub use status::{BatchSummary, FitSummary, RunSummary};

/// Migrations compiled into the binary, read from the repository's `migrations/` folder.
pub static MIGRATOR: Migrator = sqlx::migrate!("../migrations");

/// How long a writer waits for another writer before giving up.
const BUSY_TIMEOUT: Duration = Duration::from_secs(5);

/// What went wrong in the store, phrased for the operator.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    #[error("database {0} does not exist; run `tidemark init` first")]
    Missing(PathBuf),
    #[error("database {path} was written by a newer tidemark (it has migration {version} \"{description}\", which this binary does not know); upgrade tidemark")]
    Newer {
        path: PathBuf,
        version: i64,
        description: String,
    },
    #[error(
        "database {path} needs migration {version} \"{description}\"; run `tidemark init` to apply it"
    )]
    Pending {
        path: PathBuf,
        version: i64,
        description: String,
    },
    #[error("database {path}: {message}; nothing was written")]
    Inconsistent { path: PathBuf, message: String },
    #[error("database {path}: migration {version} was changed after it was applied (checksum differs); restore the original migration file")]
    Altered { path: PathBuf, version: i64 },
    #[error(
        "database {path}: migration {version} did not finish; restore the database from a backup"
    )]
    Dirty { path: PathBuf, version: i64 },
    #[error("database {path}: cannot create its directory: {source}")]
    CreateDir {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("database {path} is locked by another writer (waited {} s); nothing was changed, try again when it is done", BUSY_TIMEOUT.as_secs())]
    Busy { path: PathBuf, source: sqlx::Error },
    #[error("database {path}: disk full, no space left to write to it; the change was rolled back and nothing half-written is visible; free some space and it is retried (by `serve` on its next tick)")]
    DiskFull { path: PathBuf, source: sqlx::Error },
    #[error("database {path}: {source}")]
    Sql { path: PathBuf, source: sqlx::Error },
    #[error("this process lost the lease of database {path} (it held generation {generation}; {now}) while it worked; it wrote nothing, and its run stays abandoned")]
    LeaseLost {
        path: PathBuf,
        generation: i64,
        /// Who holds the lease now, in words.
        now: String,
    },
    #[error("series {series}: this fit was made from older data (watermark {watermark}) than version {version} (watermark {newer}), published under the same model definition; it was not published (refit with --force to publish it anyway)")]
    StaleSnapshot {
        series: String,
        watermark: i64,
        version: i64,
        newer: i64,
    },
    #[error("database {path}: applying migrations failed: {source}")]
    Migrate {
        path: PathBuf,
        source: sqlx::migrate::MigrateError,
    },
}

/// A handle on the Tidemark database. Cheap to clone (a connection pool).
#[derive(Debug, Clone)]
pub struct Store {
    pool: SqlitePool,
    path: PathBuf,
}

/// Current time as RFC 3339 UTC text, the format of every timestamp column.
pub fn now_utc() -> String {
    chrono::Utc::now().to_rfc3339_opts(chrono::SecondsFormat::Secs, true)
}

impl Store {
    /// Create the database if needed and apply every pending migration (idempotent).
    /// Refuses a database written by a newer tidemark.
    pub async fn init(path: &Path) -> Result<Store, StoreError> {
        if let Some(dir) = path.parent().filter(|d| !d.as_os_str().is_empty()) {
            std::fs::create_dir_all(dir).map_err(|source| StoreError::CreateDir {
                path: path.to_path_buf(),
                source,
            })?;
        }
        let store = Store::connect(path, true).await?;
        match store.check().await {
            Ok(()) | Err(StoreError::Pending { .. }) => {}
            Err(e) => return Err(e),
        }
        MIGRATOR
            .run(&store.pool)
            .await
            .map_err(|source| StoreError::Migrate {
                path: path.to_path_buf(),
                source,
            })?;
        Ok(store)
    }

    /// Open an existing database whose migrations match this binary exactly.
    pub async fn open(path: &Path) -> Result<Store, StoreError> {
        if !path.exists() {
            return Err(StoreError::Missing(path.to_path_buf()));
        }
        let store = Store::connect(path, false).await?;
        store.check().await?;
        Ok(store)
    }

    async fn connect(path: &Path, create: bool) -> Result<Store, StoreError> {
        let options = SqliteConnectOptions::from_str("sqlite:")
            .map_err(|source| StoreError::Sql {
                path: path.to_path_buf(),
                source,
            })?
            .filename(path)
            .create_if_missing(create)
            .journal_mode(SqliteJournalMode::Wal)
            .synchronous(SqliteSynchronous::Normal)
            .foreign_keys(true)
            .busy_timeout(BUSY_TIMEOUT)
            // A 64 MiB page cache keeps index pages of a large batch in memory, and the
            // staging table of ingest never touches disk.
            .pragma("cache_size", "-65536")
            .pragma("temp_store", "memory");
        let pool = SqlitePoolOptions::new()
            .max_connections(4)
            // SQLite may roll a transaction back by itself (a full disk, an I/O error);
            // sqlx then still counts it open and that connection would refuse every later
            // BEGIN. Such a connection is closed instead of reused; the pool opens a
            // fresh one. The ping first runs the rollback queued when the transaction
            // was dropped, so a cleanly rolled-back connection is kept.
            .after_release(|conn, _| {
                Box::pin(async move {
                    conn.ping().await?;
                    Ok(!conn.is_in_transaction())
                })
            })
            .connect_with(options)
            .await
            .map_err(|source| StoreError::Sql {
                path: path.to_path_buf(),
                source,
            })?;
        Ok(Store {
            pool,
            path: path.to_path_buf(),
        })
    }

    /// Compare the migrations recorded in the database with those compiled in.
    pub async fn check(&self) -> Result<(), StoreError> {
        let has_table: Option<i64> = sqlx::query_scalar(
            "SELECT 1 FROM sqlite_master WHERE type = 'table' AND name = '_sqlx_migrations'",
        )
        .fetch_optional(&self.pool)
        .await
        .map_err(|e| self.sql(e))?;
        let applied = if has_table.is_some() {
            sqlx::query(
                "SELECT version, description, success, checksum FROM _sqlx_migrations ORDER BY version",
            )
            .fetch_all(&self.pool)
            .await
            .map_err(|e| self.sql(e))?
        } else {
            Vec::new()
        };
        for row in &applied {
            let version: i64 = row.get("version");
            let success: bool = row.get("success");
            let checksum: Vec<u8> = row.get("checksum");
            let Some(known) = MIGRATOR.iter().find(|m| m.version == version) else {
                return Err(StoreError::Newer {
                    path: self.path.clone(),
                    version,
                    description: row.get("description"),
                });
            };
            if !success {
                return Err(StoreError::Dirty {
                    path: self.path.clone(),
                    version,
                });
            }
            if *known.checksum != *checksum {
                return Err(StoreError::Altered {
                    path: self.path.clone(),
                    version,
                });
            }
        }
        for m in MIGRATOR.iter() {
            let done = applied
                .iter()
                .any(|r| r.get::<i64, _>("version") == m.version);
            if !done {
                return Err(StoreError::Pending {
                    path: self.path.clone(),
                    version: m.version,
                    description: m.description.to_string(),
                });
            }
        }
        Ok(())
    }

    /// The newest migration version applied to this database.
    pub async fn schema_version(&self) -> Result<i64, StoreError> {
        sqlx::query_scalar("SELECT COALESCE(MAX(version), 0) FROM _sqlx_migrations")
            .fetch_one(&self.pool)
            .await
            .map_err(|e| self.sql(e))
    }

    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Close every connection (checkpoints the WAL when this is the last one).
    pub async fn close(self) {
        self.pool.close().await;
    }

    fn sql(&self, source: sqlx::Error) -> StoreError {
        // The primary result code is the low byte of an extended one (5, 261, 517…).
        let code = source
            .as_database_error()
            .and_then(|d| d.code())
            .and_then(|c| c.parse::<i64>().ok())
            .map(|c| c & 0xff);
        let path = self.path.clone();
        match code {
            // SQLITE_BUSY: the busy timeout ran out.
            Some(5) => StoreError::Busy { path, source },
            // SQLITE_FULL.
            Some(13) => StoreError::DiskFull { path, source },
            _ => StoreError::Sql { path, source },
        }
    }
}
