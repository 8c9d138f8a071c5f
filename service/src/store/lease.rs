//! The single-instance lease (`instance_lease`, at most one row) and its history
//! (`lease_events`).
//!
//! Claiming happens in one `BEGIN IMMEDIATE` transaction: it takes SQLite's write lock
//! before reading the row, so two processes starting at the same moment cannot both see
//! the lease free. Whether a holder is stale is the caller's judgement (process liveness
//! is not the store's business); the store records the takeover with the stale holder's
//! identity. In the same transaction, the runs the stale holder left `running` are marked
//! `abandoned` (runs record their holder; a manual `ingest`, which takes no lease, is
//! left alone).
//!
//! Every claim takes the next *generation* (one more than any in `lease_events`), and the
//! holder id with its generation is the process's [`Fence`]: a transaction that writes a
//! fit or forecasts first checks, under the write lock, that the lease row still carries
//! that fence ([`check_fence`]). A takeover replaces the row, so a process that lost the
//! lease while it was stopped or hung writes nothing afterwards.

use serde::Serialize;
use sqlx::{Sqlite, Transaction};

use super::{now_utc, Store, StoreError};

/// Who holds the lease, as stored.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, sqlx::FromRow)]
pub struct LeaseHolder {
    pub holder: String,
    pub pid: i64,
    pub host: String,
    pub acquired_at: String,
    pub heartbeat_at: String,
    /// The command holding it (`serve`, `run-once`, `refit`, `forecast`); null when the
    /// holder was a release that did not record it.
    pub command: Option<String>,
    /// The claim's generation; null for a claim made before schema version 5.
    pub generation: Option<i64>,
}

/// The token a lease holder writes fits under: its holder id and the generation of its
/// claim. Only the process whose fence is on the lease row may write a fit.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Fence {
    pub holder: String,
    pub generation: i64,
}

/// The identity a process claims the lease with.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct LeaseClaim {
    /// A random id per process.
    pub holder: String,
    pub pid: i64,
    pub host: String,
    /// The command of this process.
    pub command: &'static str,
}

/// What a claim came to.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum LeaseAttempt {
    /// The lease is ours. `taken_over` names the stale holder it was taken from and why;
    /// `abandoned_runs` are runs left `running` by a process that died.
    Acquired {
        fence: Fence,
        taken_over: Option<(LeaseHolder, String)>,
        abandoned_runs: Vec<i64>,
    },
    /// Someone else holds it and is not stale.
    Held(LeaseHolder),
}

const HOLDER: &str = "SELECT holder, pid, host, acquired_at, heartbeat_at, command, generation
                      FROM instance_lease WHERE lease_id = 1";

async fn current(tx: &mut Transaction<'_, Sqlite>) -> Result<Option<LeaseHolder>, sqlx::Error> {
    sqlx::query_as(HOLDER).fetch_optional(&mut **tx).await
}

async fn event(
    tx: &mut Transaction<'_, Sqlite>,
    kind: &str,
    claim: &LeaseClaim,
    previous: Option<&LeaseHolder>,
    reason: Option<&str>,
    generation: Option<i64>,
) -> Result<(), sqlx::Error> {
    sqlx::query(
        "INSERT INTO lease_events (at, event, holder, pid, host, previous_holder, previous_pid,
                                   previous_host, previous_heartbeat_at, reason, generation)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11)",
    )
    .bind(now_utc())
    .bind(kind)
    .bind(&claim.holder)
    .bind(claim.pid)
    .bind(&claim.host)
    .bind(previous.map(|p| p.holder.as_str()))
    .bind(previous.map(|p| p.pid))
    .bind(previous.map(|p| p.host.as_str()))
    .bind(previous.map(|p| p.heartbeat_at.as_str()))
    .bind(reason)
    .bind(generation)
    .execute(&mut **tx)
    .await?;
    Ok(())
}

/// Renew the heartbeat of the lease if the row still carries `fence`; false when it does
/// not (the lease was taken over or released). The one compare of a fence: the heartbeat
/// and every fenced write use it.
async fn renew(conn: &mut sqlx::SqliteConnection, fence: &Fence) -> Result<bool, sqlx::Error> {
    let done = sqlx::query(
        "UPDATE instance_lease SET heartbeat_at = ?3
         WHERE lease_id = 1 AND holder = ?1 AND generation = ?2",
    )
    .bind(&fence.holder)
    .bind(fence.generation)
    .bind(now_utc())
    .execute(conn)
    .await?;
    Ok(done.rows_affected() == 1)
}

/// Inside a write transaction (begun `IMMEDIATE`, so no takeover can slip in before it
/// commits): confirm the lease row still carries `fence`, renewing its heartbeat. Returns
/// the current holder when the lease was lost (`None` inside: nobody holds it now).
pub(super) async fn check_fence(
    conn: &mut sqlx::SqliteConnection,
    fence: &Fence,
) -> Result<Result<(), Option<LeaseHolder>>, sqlx::Error> {
    if renew(&mut *conn, fence).await? {
        return Ok(Ok(()));
    }
    let now: Option<LeaseHolder> = sqlx::query_as(HOLDER).fetch_optional(&mut *conn).await?;
    Ok(Err(now))
}

/// Begin a write transaction `IMMEDIATE` (so the check below holds until the commit)
/// and, for a fenced writer, confirm its fence (`check_fence`). `Ok(Err(holder))` when
/// the lease was lost; the transaction is then rolled back and nothing was written.
pub(super) async fn begin_fenced<'c>(
    pool: &'c sqlx::SqlitePool,
    fence: Option<&Fence>,
) -> Result<Result<sqlx::Transaction<'c, sqlx::Sqlite>, Option<LeaseHolder>>, sqlx::Error> {
    let mut tx = pool.begin_with("BEGIN IMMEDIATE").await?;
    if let Some(fence) = fence {
        if let Err(holder) = check_fence(&mut tx, fence).await? {
            tx.rollback().await?;
            return Ok(Err(holder));
        }
    }
    Ok(Ok(tx))
}

impl Store {
    /// Claim the lease. `stale` is asked about a current holder other than `claim`: it
    /// returns the reason the holder is stale (then the lease is taken over), or `None`
    /// (then the claim is refused with the holder's identity).
    pub async fn acquire_lease(
        &self,
        claim: &LeaseClaim,
        stale: impl FnOnce(&LeaseHolder) -> Option<String>,
    ) -> Result<LeaseAttempt, StoreError> {
        let run = async {
            let mut tx = self.pool.begin_with("BEGIN IMMEDIATE").await?;
            let taken_over = match current(&mut tx).await? {
                Some(h) if h.holder == claim.holder => None,
                Some(h) => match stale(&h) {
                    Some(reason) => Some((h, reason)),
                    None => {
                        tx.rollback().await?;
                        return Ok(LeaseAttempt::Held(h));
                    }
                },
                None => None,
            };
            let now = now_utc();
            // Generations only grow: the history keeps every one handed out.
            let generation: i64 =
                sqlx::query_scalar("SELECT COALESCE(MAX(generation), 0) + 1 FROM lease_events")
                    .fetch_one(&mut *tx)
                    .await?;
            sqlx::query(
                "INSERT OR REPLACE INTO instance_lease (lease_id, holder, pid, host, acquired_at, heartbeat_at, command, generation)
                 VALUES (1, ?1, ?2, ?3, ?4, ?4, ?5, ?6)",
            )
            .bind(&claim.holder)
            .bind(claim.pid)
            .bind(&claim.host)
            .bind(&now)
            .bind(claim.command)
            .bind(generation)
            .execute(&mut *tx)
            .await?;
            let g = Some(generation);
            match &taken_over {
                Some((h, reason)) => {
                    event(&mut tx, "taken_over", claim, Some(h), Some(reason), g).await?
                }
                None => event(&mut tx, "acquired", claim, None, None, g).await?,
            }
            let message = match &taken_over {
                Some((h, reason)) => format!(
                    "abandoned: its process stopped before the run finished (lease holder {} pid {} on {}: {reason})",
                    h.holder, h.pid, h.host
                ),
                None => "abandoned: its process stopped before the run finished".to_string(),
            };
            // Only the replaced holder's runs: others (a manual ingest) may still be going.
            let previous = taken_over.as_ref().map_or("", |(h, _)| h.holder.as_str());
            let abandoned_runs =
                super::runs::mark_running_abandoned(&mut tx, previous, &now, &message).await?;
            tx.commit().await?;
            Ok(LeaseAttempt::Acquired {
                fence: Fence {
                    holder: claim.holder.clone(),
                    generation,
                },
                taken_over,
                abandoned_runs,
            })
        };
        run.await.map_err(|e: sqlx::Error| self.sql(e))
    }

    /// Renew the heartbeat. False when the lease is no longer ours (it was taken over).
    pub async fn heartbeat_lease(&self, fence: &Fence) -> Result<bool, StoreError> {
        let mut conn = self.pool.acquire().await.map_err(|e| self.sql(e))?;
        renew(&mut conn, fence).await.map_err(|e| self.sql(e))
    }

    /// Give the lease up (only if it is still ours) and record it.
    pub async fn release_lease(&self, claim: &LeaseClaim) -> Result<bool, StoreError> {
        let run = async {
            let mut tx = self.pool.begin_with("BEGIN IMMEDIATE").await?;
            let done = sqlx::query("DELETE FROM instance_lease WHERE lease_id = 1 AND holder = ?1")
                .bind(&claim.holder)
                .execute(&mut *tx)
                .await?;
            let released = done.rows_affected() == 1;
            if released {
                event(&mut tx, "released", claim, None, None, None).await?;
            }
            tx.commit().await?;
            Ok(released)
        };
        run.await.map_err(|e: sqlx::Error| self.sql(e))
    }

    /// The current holder, if any.
    pub async fn lease_holder(&self) -> Result<Option<LeaseHolder>, StoreError> {
        sqlx::query_as(HOLDER)
            .fetch_optional(&self.pool)
            .await
            .map_err(|e| self.sql(e))
    }
}
