//! Bounded storage: pruning the draws of older published versions (`[store] keep_draws`),
//! the one deletion the immutability rules allow. The version's `fits` row, summaries,
//! forecasts, diagnostics and exclusions stay; a `draws_pruned` row records the removal,
//! and the database refuses to delete a published version's draws without it.

use super::lease::begin_fenced;
use super::{now_utc, Fence, Store, StoreError};

/// The draws of one version that pruning removes (or, in a dry run, would remove).
#[derive(Debug, Clone, sqlx::FromRow, serde::Serialize)]
pub struct PrunedDraws {
    pub fit_id: i64,
    pub series: String,
    pub version: i64,
    pub bytes: i64,
}

/// When and under which setting a version's draws were pruned.
#[derive(Debug, Clone, sqlx::FromRow)]
pub struct PruneRecord {
    pub pruned_at: String,
    pub keep_draws: i64,
}

impl PruneRecord {
    /// Why a pruned version's draws cannot be read, for an error line.
    pub fn explain(&self) -> String {
        format!(
            "its draws were pruned at {} under store.keep_draws = {}; its summaries, \
             forecasts, diagnostics and exclusions remain",
            self.pruned_at, self.keep_draws
        )
    }
}

/// Published versions with draws beyond the newest `keep` of their series.
const CANDIDATES: &str = "
    SELECT f.fit_id, f.series, f.version, LENGTH(d.blob) AS bytes
    FROM fits f JOIN fit_draws d ON d.fit_id = f.fit_id
    WHERE f.status = 'published'
      AND (SELECT COUNT(*) FROM fits g
           WHERE g.series = f.series AND g.status = 'published' AND g.version > f.version) >= ?1
    ORDER BY f.series, f.version";

impl Store {
    /// Remove the draws of every published version older than the newest `keep` of its
    /// series, in one transaction fenced by the caller's lease; with `dry_run`, only list
    /// them. `keep` is at least 1 (the config refuses 0), so the version that warm starts
    /// and `forecast` read always keeps its draws.
    pub async fn prune_draws(
        &self,
        keep: u32,
        dry_run: bool,
        fence: Option<&Fence>,
    ) -> Result<Vec<PrunedDraws>, StoreError> {
        let keep = i64::from(keep.max(1));
        let run = async {
            let mut tx = match begin_fenced(&self.pool, fence).await? {
                Ok(tx) => tx,
                Err(holder) => return Ok(Err(holder)),
            };
            let rows: Vec<PrunedDraws> = sqlx::query_as(CANDIDATES)
                .bind(keep)
                .fetch_all(&mut *tx)
                .await?;
            if dry_run {
                tx.rollback().await?;
                return Ok(Ok(rows));
            }
            let at = now_utc();
            for r in &rows {
                sqlx::query(
                    "INSERT INTO draws_pruned (fit_id, pruned_at, bytes, keep_draws)
                     VALUES (?1, ?2, ?3, ?4)",
                )
                .bind(r.fit_id)
                .bind(&at)
                .bind(r.bytes)
                .bind(keep)
                .execute(&mut *tx)
                .await?;
                sqlx::query("DELETE FROM fit_draws WHERE fit_id = ?1")
                    .bind(r.fit_id)
                    .execute(&mut *tx)
                    .await?;
            }
            tx.commit().await?;
            Ok(Ok(rows))
        };
        run.await
            .map_err(|e| self.sql(e))?
            .map_err(|now| self.lease_lost(fence, now))
    }

    /// The pruning record of published version `version` of `series`, if its draws were
    /// pruned.
    pub async fn version_draws_pruned(
        &self,
        series: &str,
        version: i64,
    ) -> Result<Option<PruneRecord>, StoreError> {
        sqlx::query_as(
            "SELECT p.pruned_at, p.keep_draws FROM draws_pruned p JOIN fits f USING (fit_id)
             WHERE f.series = ?1 AND f.version = ?2 AND f.status = 'published'",
        )
        .bind(series)
        .bind(version)
        .fetch_optional(&self.pool)
        .await
        .map_err(|e| self.sql(e))
    }

    /// The pruning record of a version, if its draws were pruned.
    pub async fn draws_pruned(&self, fit_id: i64) -> Result<Option<PruneRecord>, StoreError> {
        sqlx::query_as("SELECT pruned_at, keep_draws FROM draws_pruned WHERE fit_id = ?1")
            .bind(fit_id)
            .fetch_optional(&self.pool)
            .await
            .map_err(|e| self.sql(e))
    }
}
