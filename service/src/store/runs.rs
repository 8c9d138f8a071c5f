//! Run records that only `serve` needs: skipped ticks and the reference point for a
//! catch-up run. Opening and closing a run live with the fits (`fits.rs`).

use super::{now_utc, Store, StoreError};

impl Store {
    /// Record a tick that did no work (status `skipped`), with the reason.
    pub async fn record_skipped_run(
        &self,
        origin: &super::RunOrigin,
        message: &str,
    ) -> Result<i64, StoreError> {
        let now = now_utc();
        sqlx::query_scalar(
            "INSERT INTO runs (trigger, started_at, finished_at, status, message, command, holder)
             VALUES (?1, ?2, ?2, 'skipped', ?3, ?4, ?5) RETURNING run_id",
        )
        .bind(origin.trigger)
        .bind(&now)
        .bind(message)
        .bind(origin.command)
        .bind(&origin.holder)
        .fetch_one(&self.pool)
        .await
        .map_err(|e| self.sql(e))
    }

    /// When the newest run that ran to its end (succeeded, partial or failed) started.
    /// Skipped ticks did nothing and abandoned runs did not finish, so neither counts.
    pub async fn last_finished_run_start(&self) -> Result<Option<String>, StoreError> {
        sqlx::query_scalar(
            "SELECT started_at FROM runs WHERE status IN ('succeeded', 'partial', 'failed')
             ORDER BY run_id DESC LIMIT 1",
        )
        .fetch_optional(&self.pool)
        .await
        .map_err(|e| self.sql(e))
    }

    /// Mark every run still `running` as `abandoned`, with `message`; returns their ids.
    /// Only the lease holder calls this, when no run of its own can still be writing.
    pub async fn abandon_running_runs(&self, message: &str) -> Result<Vec<i64>, StoreError> {
        sqlx::query_scalar(
            "UPDATE runs SET status = 'abandoned', finished_at = ?1,
                    message = COALESCE(message || '; ', '') || ?2
             WHERE status = 'running' RETURNING run_id",
        )
        .bind(now_utc())
        .bind(message)
        .fetch_all(&self.pool)
        .await
        .map_err(|e| self.sql(e))
    }
}
