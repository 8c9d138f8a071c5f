//! Run records: opening and closing a run, each series' outcome, skipped ticks, the
//! reference point for a catch-up run, and marking runs `abandoned`.

use sqlx::{Sqlite, SqliteConnection};

use super::{now_utc, Store, StoreError};
use crate::vocabulary::{RunStatus, RunTrigger};

/// Who makes a run: its trigger (`schedule`, `catch-up`, `manual`, `demo`), the command
/// of the process, and that process's lease fence (holder id and generation) when it
/// holds the lease.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct RunOrigin {
    pub trigger: RunTrigger,
    pub command: &'static str,
    pub fence: Option<super::Fence>,
}

/// Mark the runs still `running` that belong to the lease holder `holder` as
/// `abandoned` at `now`, appending `message`; returns their ids. Runs recorded without a
/// holder (before schema version 3, or by a release that did not record it) count as the
/// holder's too, except manual `ingest` runs, which take no lease and may be running
/// beside any holder. The one copy of this update: shutdown and a lease takeover use it.
pub(super) async fn mark_running_abandoned(
    conn: &mut SqliteConnection,
    holder: &str,
    now: &str,
    message: &str,
) -> Result<Vec<i64>, sqlx::Error> {
    sqlx::query_scalar::<Sqlite, i64>(
        "UPDATE runs SET status = 'abandoned', finished_at = ?1, message = COALESCE(message || '; ', '') || ?2
         WHERE status = 'running'
           AND (holder = ?3 OR (holder IS NULL AND command IS NOT 'ingest'))
         RETURNING run_id",
    )
    .bind(now)
    .bind(message)
    .bind(holder)
    .fetch_all(conn)
    .await
}

// An autocommit `… RETURNING` statement is read with `fetch_all`, never `fetch_one` or
// `fetch_optional`: SQLite commits it when its last step runs, and a commit that fails
// (a full disk) is reported only there. Stopping after the first row would hand back the
// id of a row that was never stored.

impl Store {
    /// The single row of an autocommit `INSERT … RETURNING`.
    fn the_one<T>(&self, rows: Vec<T>, what: &str) -> Result<T, StoreError> {
        rows.into_iter()
            .next()
            .ok_or_else(|| StoreError::Inconsistent {
                path: self.path().to_path_buf(),
                message: format!("an insert returned no {what}"),
            })
    }

    /// Record a tick that did no work (status `skipped`), with the reason.
    pub async fn record_skipped_run(
        &self,
        origin: &super::RunOrigin,
        message: &str,
    ) -> Result<i64, StoreError> {
        let now = now_utc();
        sqlx::query_scalar(
            "INSERT INTO runs (trigger, started_at, finished_at, status, message, command, holder, lease_generation)
             VALUES (?1, ?2, ?2, 'skipped', ?3, ?4, ?5, ?6) RETURNING run_id",
        )
        .bind(origin.trigger)
        .bind(&now)
        .bind(message)
        .bind(origin.command)
        .bind(origin.fence.as_ref().map(|f| &f.holder))
        .bind(origin.fence.as_ref().map(|f| f.generation))
        .fetch_all(&self.pool)
        .await
        .map_err(|e| self.sql(e))
        .and_then(|ids| self.the_one(ids, "run id"))
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
    pub async fn abandon_running_runs(
        &self,
        holder: &str,
        message: &str,
    ) -> Result<Vec<i64>, StoreError> {
        let run = async {
            let mut conn = self.pool.acquire().await?;
            mark_running_abandoned(&mut conn, holder, &now_utc(), message).await
        };
        run.await.map_err(|e| self.sql(e))
    }

    /// Open a run record; returns its id.
    pub async fn start_run(&self, origin: &RunOrigin) -> Result<i64, StoreError> {
        sqlx::query_scalar(
            "INSERT INTO runs (trigger, started_at, status, command, holder, lease_generation)
             VALUES (?1, ?2, 'running', ?3, ?4, ?5) RETURNING run_id",
        )
        .bind(origin.trigger)
        .bind(now_utc())
        .bind(origin.command)
        .bind(origin.fence.as_ref().map(|f| &f.holder))
        .bind(origin.fence.as_ref().map(|f| f.generation))
        .fetch_all(&self.pool)
        .await
        .map_err(|e| self.sql(e))
        .and_then(|ids| self.the_one(ids, "run id"))
    }

    /// Close a run record; returns the status it has now. A run no longer `running` (a
    /// takeover marked it `abandoned` while its process was stopped) keeps its status.
    pub async fn finish_run(
        &self,
        run_id: i64,
        status: RunStatus,
        message: Option<&str>,
    ) -> Result<RunStatus, StoreError> {
        let closed: Option<RunStatus> = sqlx::query_scalar(
            "UPDATE runs SET finished_at = ?2, status = ?3, message = ?4
             WHERE run_id = ?1 AND status = 'running' RETURNING status",
        )
        .bind(run_id)
        .bind(now_utc())
        .bind(status)
        .bind(message)
        .fetch_all(&self.pool)
        .await
        .map_err(|e| self.sql(e))?
        .into_iter()
        .next();
        match closed {
            Some(s) => Ok(s),
            None => sqlx::query_scalar("SELECT status FROM runs WHERE run_id = ?1")
                .bind(run_id)
                .fetch_one(&self.pool)
                .await
                .map_err(|e| self.sql(e)),
        }
    }

    /// Record what a run did for one series.
    pub async fn record_run_series(
        &self,
        run_id: i64,
        series: &str,
        outcome: &str,
        fit_id: Option<i64>,
        message: Option<&str>,
    ) -> Result<(), StoreError> {
        sqlx::query(
            "INSERT OR REPLACE INTO run_series (run_id, series, outcome, fit_id, message) VALUES (?1, ?2, ?3, ?4, ?5)",
        )
        .bind(run_id)
        .bind(series)
        .bind(outcome)
        .bind(fit_id)
        .bind(message)
        .execute(&self.pool)
        .await
        .map_err(|e| self.sql(e))?;
        Ok(())
    }
}
