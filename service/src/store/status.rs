//! Reads behind `tidemark status`: recent runs, recent batches, latest fits per series.

use serde::Serialize;

use super::{Store, StoreError};
use crate::vocabulary::{FitStatus, RunStatus, RunTrigger};

#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct RunSummary {
    pub run_id: i64,
    pub trigger: RunTrigger,
    /// The command that made the run; null for runs recorded before schema version 3.
    pub command: Option<String>,
    pub started_at: String,
    pub finished_at: Option<String>,
    pub status: RunStatus,
    pub message: Option<String>,
}

#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct BatchSummary {
    pub batch_id: i64,
    pub source: String,
    pub sha256: String,
    pub received_at: String,
    pub rows_read: i64,
    pub values_accepted: i64,
    pub values_rejected: i64,
    pub values_superseding: i64,
    pub values_unchanged: i64,
    pub status: String,
    pub message: Option<String>,
}

#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct FitSummary {
    pub fit_id: i64,
    pub series: String,
    pub version: i64,
    pub status: FitStatus,
    pub created_at: String,
    pub data_through_year: Option<i64>,
    pub watermark: i64,
    pub n_obs: Option<i64>,
    pub n_sites: Option<i64>,
    pub n_years: Option<i64>,
    pub warm_start_from: Option<i64>,
    pub chains: Option<i64>,
    pub draws: Option<i64>,
    pub warmup: Option<i64>,
    pub wall_seconds: Option<f64>,
    pub max_rhat: Option<f64>,
    pub min_ess_bulk: Option<f64>,
    pub min_ess_tail: Option<f64>,
    pub message: Option<String>,
    pub n_censored: Option<i64>,
    pub definition_sha256: Option<String>,
    /// The canonical text itself stays in the database (`fits.definition_text`).
    #[serde(skip)]
    pub definition_text: Option<String>,
    /// The response's unit the fit was made with (`fits.unit`).
    pub unit: Option<String>,
}

const FIT_COLUMNS: &str =
    "fit_id, series, version, status, created_at, data_through_year, watermark,
    n_obs, n_sites, n_years, warm_start_from, chains, draws, warmup, wall_seconds, max_rhat,
    min_ess_bulk, min_ess_tail, message, n_censored, definition_sha256, definition_text, unit";

impl Store {
    /// The `limit` most recent runs, newest first.
    pub async fn recent_runs(&self, limit: u32) -> Result<Vec<RunSummary>, StoreError> {
        sqlx::query_as(
            "SELECT run_id, trigger, command, started_at, finished_at, status, message
             FROM runs ORDER BY run_id DESC LIMIT ?1",
        )
        .bind(limit)
        .fetch_all(&self.pool)
        .await
        .map_err(|e| self.sql(e))
    }

    /// The `limit` most recent ingest batches, newest first.
    pub async fn recent_batches(&self, limit: u32) -> Result<Vec<BatchSummary>, StoreError> {
        sqlx::query_as(
            "SELECT batch_id, source, sha256, received_at, rows_read, values_accepted,
                    values_rejected, values_superseding, values_unchanged, status, message
             FROM ingest_batches ORDER BY batch_id DESC LIMIT ?1",
        )
        .bind(limit)
        .fetch_all(&self.pool)
        .await
        .map_err(|e| self.sql(e))
    }

    /// The newest fit attempt of `series`, whatever its status.
    pub async fn newest_attempt_summary(
        &self,
        series: &str,
    ) -> Result<Option<FitSummary>, StoreError> {
        let sql = format!(
            "SELECT {FIT_COLUMNS} FROM fits WHERE series = ?1 ORDER BY fit_id DESC LIMIT 1"
        );
        self.one_fit(&sql, series).await
    }

    /// The latest published fit of `series` (the row of the `latest_fits` view).
    pub async fn serving_fit_summary(
        &self,
        series: &str,
    ) -> Result<Option<FitSummary>, StoreError> {
        let sql = format!("SELECT {FIT_COLUMNS} FROM latest_fits WHERE series = ?1");
        self.one_fit(&sql, series).await
    }

    async fn one_fit(&self, sql: &str, series: &str) -> Result<Option<FitSummary>, StoreError> {
        sqlx::query_as(sql)
            .bind(series)
            .fetch_optional(&self.pool)
            .await
            .map_err(|e| self.sql(e))
    }
}
