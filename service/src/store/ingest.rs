//! Writing one feed file's batch: the batch row, its values with supersede-and-keep-history,
//! and its rejections, in one transaction.
//!
//! New value ids are assigned up front (max + 1, …) inside the IMMEDIATE transaction.
//! Pass 1 inserts every value straight into `observations` with multi-row INSERTs (cached
//! prepared statements); the unique partial index on current values makes SQLite skip a
//! value whose key already has a current one. Only those skipped values (re-sends and
//! corrections, usually few) go through a temporary staging table, where three set-based
//! statements drop values equal to the current ones, point the current ones at their
//! successors, and insert the successors. A superseded row names its successor before the
//! successor exists, so that foreign key is deferred to commit.
//!
//! Invariant: a batch is visible whole or not at all (checked by `tests/e2e_ingest.rs::failed_batch_leaves_nothing`).

use serde::Serialize;
use sqlx::sqlite::SqliteConnection;
use sqlx::Row;
use tidemark_feed::{BatchContent, BatchValues, Cell, NewRejection, NewValue};
use tracing::debug;

use super::{now_utc, Store, StoreError};

/// Rows per multi-row INSERT of values (10 parameters each, under SQLite's
/// 32766-parameter limit).
const INSERT_CHUNK: usize = 1000;
const REJECT_CHUNK: usize = 500;
const SITE_CHUNK: usize = 500;

/// The file a batch came from.
#[derive(Debug, Clone)]
pub struct BatchFile {
    pub source: String,
    pub sha256: String,
    pub size_bytes: u64,
    /// `csv`, `arrow-file`, `arrow-stream`, or `None` when it could not be told.
    pub format: Option<&'static str>,
}

/// What [`Store::ingest_batch`] did.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
#[serde(tag = "status", rename_all = "snake_case")]
pub enum BatchOutcome {
    Ingested {
        batch_id: i64,
        rows_read: u64,
        values_accepted: u64,
        values_rejected: u64,
        values_superseding: u64,
        values_unchanged: u64,
    },
    Duplicate {
        batch_id: i64,
        duplicate_of: i64,
    },
    Quarantined {
        batch_id: i64,
        reason: String,
    },
}

/// A stored batch row.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct BatchRecord {
    pub batch_id: i64,
    pub source: String,
    pub sha256: String,
    pub received_at: String,
    pub status: String,
}

impl Store {
    /// The ingested batch with this content hash, if any.
    pub async fn batch_with_sha256(&self, sha256: &str) -> Result<Option<BatchRecord>, StoreError> {
        let mut conn = self.pool.acquire().await.map_err(|e| self.sql(e))?;
        ingested_with_sha(&mut conn, sha256)
            .await
            .map_err(|e| self.sql(e))
    }

    /// Record one file: a duplicate (same content as an ingested batch), a quarantined
    /// file, or its accepted values and rejections. Everything happens in one IMMEDIATE
    /// transaction, so two processes cannot both ingest the same content.
    pub async fn ingest_batch(
        &self,
        file: &BatchFile,
        content: &BatchContent,
    ) -> Result<BatchOutcome, StoreError> {
        let outcome = self.ingest_batch_checked(file, content, || true).await?;
        outcome.ok_or_else(|| StoreError::Inconsistent {
            path: self.path().to_path_buf(),
            message: "a batch without a check was rolled back by its check".into(),
        })
    }

    /// [`Store::ingest_batch`], asking `still_valid` right before the commit whether the
    /// batch may be committed (the ingest checks that its file did not change since it
    /// was read). When it says no, the transaction rolls back and `None` is returned:
    /// nothing of the batch is visible.
    pub async fn ingest_batch_checked(
        &self,
        file: &BatchFile,
        content: &BatchContent,
        still_valid: impl FnOnce() -> bool + Send,
    ) -> Result<Option<BatchOutcome>, StoreError> {
        let mut tx = self
            .pool
            .begin_with("BEGIN IMMEDIATE")
            .await
            .map_err(|e| self.sql(e))?;
        let outcome = write_batch(&mut tx, file, content)
            .await
            .map_err(|e| match e {
                WriteError::Sql(e) => self.sql(e),
                other => StoreError::Inconsistent {
                    path: self.path().to_path_buf(),
                    message: other.to_string(),
                },
            })?;
        if !still_valid() {
            tx.rollback().await.map_err(|e| self.sql(e))?;
            return Ok(None);
        }
        tx.commit().await.map_err(|e| self.sql(e))?;
        Ok(Some(outcome))
    }
}

async fn ingested_with_sha(
    conn: &mut SqliteConnection,
    sha256: &str,
) -> Result<Option<BatchRecord>, sqlx::Error> {
    let row = sqlx::query(
        "SELECT batch_id, source, sha256, received_at, status FROM ingest_batches
         WHERE sha256 = ?1 AND status = 'ingested'",
    )
    .bind(sha256)
    .fetch_optional(&mut *conn)
    .await?;
    Ok(row.map(|r| BatchRecord {
        batch_id: r.get("batch_id"),
        source: r.get("source"),
        sha256: r.get("sha256"),
        received_at: r.get("received_at"),
        status: r.get("status"),
    }))
}

async fn insert_batch_row(
    conn: &mut SqliteConnection,
    file: &BatchFile,
    status: &str,
    message: Option<&str>,
    duplicate_of: Option<i64>,
) -> Result<i64, sqlx::Error> {
    sqlx::query_scalar(
        "INSERT INTO ingest_batches (source, sha256, received_at, status, message, format, size_bytes, duplicate_of)
         VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8) RETURNING batch_id",
    )
    .bind(&file.source)
    .bind(&file.sha256)
    .bind(now_utc())
    .bind(status)
    .bind(message)
    .bind(file.format)
    .bind(i64::try_from(file.size_bytes).unwrap_or(i64::MAX))
    .bind(duplicate_of)
    .fetch_one(&mut *conn)
    .await
}

fn count(n: u64) -> i64 {
    i64::try_from(n).unwrap_or(i64::MAX)
}

/// Why a batch could not be written: the database, or a broken expectation inside the
/// transaction (never the feed's fault; the transaction rolls back).
#[derive(Debug, thiserror::Error)]
enum WriteError {
    #[error(transparent)]
    Sql(#[from] sqlx::Error),
    #[error("site {0:?} is missing from `sites` right after it was inserted in this transaction")]
    SiteMissing(String),
}

/// Debug timings of the steps of one batch.
struct Phases {
    batch_id: i64,
    started: std::time::Instant,
}

impl Phases {
    fn done(&self, name: &str) {
        debug!(
            batch_id = self.batch_id,
            phase = name,
            ms = self.started.elapsed().as_millis() as u64,
            "ingest phase done"
        )
    }
}

/// A value re-sent for a key that already has a current value, with the id it gets if it
/// becomes new history.
type Resent<'a> = (i64, &'a NewValue);

async fn write_batch(
    conn: &mut SqliteConnection,
    file: &BatchFile,
    content: &BatchContent,
) -> Result<BatchOutcome, WriteError> {
    if let Some(outcome) = record_without_values(conn, file, content).await? {
        return Ok(outcome);
    }
    let BatchContent::Parsed {
        rows_read,
        values,
        rejections,
    } = content
    else {
        unreachable!("record_without_values handles every other kind of content");
    };
    let batch_id = insert_batch_row(conn, file, "ingested", None, None).await?;
    let phases = Phases {
        batch_id,
        started: std::time::Instant::now(),
    };
    let site_ids = site_ids(conn, batch_id, values).await?;
    phases.done("sites");
    let (mut max_id, resent) = insert_new_keys(conn, batch_id, values, &site_ids).await?;
    phases.done("direct");
    let (unchanged, superseding) = supersede_resent(
        conn,
        batch_id,
        values,
        &site_ids,
        &resent,
        &mut max_id,
        &phases,
    )
    .await?;
    advance_watermarks(conn, values, &max_id).await?;
    phases.done("insert");
    insert_rejections(conn, batch_id, rejections).await?;
    phases.done("rejections");
    let counts = BatchCounts {
        rows_read: *rows_read,
        accepted: values.values.len() as u64,
        rejected: rejections.len() as u64,
        superseding,
        unchanged,
    };
    close_batch_row(conn, batch_id, &counts, &values.keys).await?;
    Ok(BatchOutcome::Ingested {
        batch_id,
        rows_read: counts.rows_read,
        values_accepted: counts.accepted,
        values_rejected: counts.rejected,
        values_superseding: counts.superseding,
        values_unchanged: counts.unchanged,
    })
}

/// A duplicate of an ingested batch, or a file that could not be read: one batch row, no
/// values. `None` for parsed content.
async fn record_without_values(
    conn: &mut SqliteConnection,
    file: &BatchFile,
    content: &BatchContent,
) -> Result<Option<BatchOutcome>, sqlx::Error> {
    if let Some(earlier) = ingested_with_sha(conn, &file.sha256).await? {
        let message = format!(
            "same content as batch {} ({}, received {})",
            earlier.batch_id, earlier.source, earlier.received_at
        );
        let batch_id = insert_batch_row(
            conn,
            file,
            "duplicate",
            Some(&message),
            Some(earlier.batch_id),
        )
        .await?;
        return Ok(Some(BatchOutcome::Duplicate {
            batch_id,
            duplicate_of: earlier.batch_id,
        }));
    }
    let reason = match content {
        // Only reachable if the earlier batch vanished between the caller's look-up and
        // this transaction: keep the file for a person to look at.
        BatchContent::KnownDuplicate => {
            "the earlier batch with the same content is gone; ingest the file again".to_string()
        }
        BatchContent::Unreadable { reason } => reason.clone(),
        BatchContent::Parsed { .. } => return Ok(None),
    };
    let batch_id = insert_batch_row(conn, file, "quarantined", Some(&reason), None).await?;
    Ok(Some(BatchOutcome::Quarantined { batch_id, reason }))
}

/// Site ids in the order of `values.sites`: insert the new codes, then read all ids.
async fn site_ids(
    conn: &mut SqliteConnection,
    batch_id: i64,
    values: &BatchValues,
) -> Result<Vec<i64>, WriteError> {
    for chunk in values.sites.chunks(SITE_CHUNK) {
        let sql = multi_row_insert(
            "INSERT INTO sites (code, first_batch_id) VALUES ",
            2,
            chunk.len(),
        ) + " ON CONFLICT (code) DO NOTHING";
        let mut q = sqlx::query(&sql);
        for code in chunk {
            q = q.bind(code.as_str()).bind(batch_id);
        }
        q.execute(&mut *conn).await?;
    }
    let mut id_of = std::collections::HashMap::with_capacity(values.sites.len());
    for chunk in values.sites.chunks(SITE_CHUNK) {
        let sql = format!(
            "SELECT code, site_id FROM sites WHERE code IN ({})",
            vec!["?"; chunk.len()].join(",")
        );
        let mut q = sqlx::query(&sql);
        for code in chunk {
            q = q.bind(code.as_str());
        }
        for row in q.fetch_all(&mut *conn).await? {
            id_of.insert(row.try_get::<String, _>(0)?, row.try_get::<i64, _>(1)?);
        }
    }
    let mut site_ids = Vec::with_capacity(values.sites.len());
    for code in &values.sites {
        let id = id_of
            .get(code)
            .copied()
            .ok_or_else(|| WriteError::SiteMissing(code.clone()))?;
        site_ids.push(id);
    }
    Ok(site_ids)
}

/// Pass 1: value `i` gets id `base + 1 + i` and goes straight into `observations`; a
/// value whose key already has a current value is skipped by the unique partial index and
/// returned for pass 2. Also returns the largest stored value id per column of
/// `values.columns` (0 = none stored).
async fn insert_new_keys<'a>(
    conn: &mut SqliteConnection,
    batch_id: i64,
    values: &'a BatchValues,
    site_ids: &[i64],
) -> Result<(Vec<i64>, Vec<Resent<'a>>), sqlx::Error> {
    let base: i64 = sqlx::query_scalar("SELECT COALESCE(MAX(value_id), 0) FROM observations")
        .fetch_one(&mut *conn)
        .await?;

    const DIRECT: &str = "INSERT INTO observations (value_id, batch_id, site_id, year, visit, column_name, num_value, text_value, line, censoring) VALUES ";
    let direct_sql = |rows: usize| multi_row_insert(DIRECT, 10, rows) + " ON CONFLICT DO NOTHING";
    let full_chunk = direct_sql(INSERT_CHUNK);
    let mut existing: Vec<(i64, &NewValue)> = Vec::new();
    let mut max_id = vec![0i64; values.columns.len()];
    let mut first_id = base + 1;
    for chunk in values.values.chunks(INSERT_CHUNK) {
        let short;
        let sql = if chunk.len() == INSERT_CHUNK {
            full_chunk.as_str()
        } else {
            short = direct_sql(chunk.len());
            short.as_str()
        };
        let mut q = sqlx::query(sql);
        for (i, v) in chunk.iter().enumerate() {
            let (num, text, censoring) = cell_columns(values, v);
            q = q
                .bind(first_id + i as i64)
                .bind(batch_id)
                .bind(site_ids[v.site as usize])
                .bind(v.year)
                .bind(values.visits[v.visit as usize].as_str())
                .bind(values.columns[v.column as usize].as_str())
                .bind(num)
                .bind(text)
                .bind(count(v.line))
                .bind(censoring);
        }
        let inserted = q.execute(&mut *conn).await?.rows_affected();
        if inserted < chunk.len() as u64 {
            let last_id = first_id + chunk.len() as i64 - 1;
            let stored: std::collections::HashSet<i64> = sqlx::query_scalar(
                "SELECT value_id FROM observations WHERE value_id BETWEEN ?1 AND ?2",
            )
            .bind(first_id)
            .bind(last_id)
            .fetch_all(&mut *conn)
            .await?
            .into_iter()
            .collect();
            for (i, v) in chunk.iter().enumerate() {
                let id = first_id + i as i64;
                if stored.contains(&id) {
                    max_id[v.column as usize] = id;
                } else {
                    existing.push((id, v));
                }
            }
        } else {
            for (i, v) in chunk.iter().enumerate() {
                max_id[v.column as usize] = first_id + i as i64;
            }
        }
        first_id += chunk.len() as i64;
    }
    Ok((max_id, existing))
}

/// Pass 2, set-based, for values re-sent for a key that has a current value: an
/// identical value is counted as unchanged; a different one supersedes the current value.
/// Returns `(unchanged, superseding)` and raises `max_id` for the new rows.
async fn supersede_resent(
    conn: &mut SqliteConnection,
    batch_id: i64,
    values: &BatchValues,
    site_ids: &[i64],
    existing: &[Resent<'_>],
    max_id: &mut [i64],
    phases: &Phases,
) -> Result<(u64, u64), sqlx::Error> {
    if existing.is_empty() {
        return Ok((0, 0));
    }
    sqlx::query(
        "CREATE TEMP TABLE IF NOT EXISTS ingest_stage (
             new_id INTEGER PRIMARY KEY, site_id INTEGER NOT NULL, year INTEGER NOT NULL,
             visit TEXT NOT NULL, column_name TEXT NOT NULL, num_value REAL, text_value TEXT,
             line INTEGER NOT NULL, censoring TEXT)",
    )
    .execute(&mut *conn)
    .await?;
    sqlx::query("DELETE FROM temp.ingest_stage")
        .execute(&mut *conn)
        .await?;
    const STAGE: &str = "INSERT INTO temp.ingest_stage (new_id, site_id, year, visit, column_name, num_value, text_value, line, censoring) VALUES ";
    for chunk in existing.chunks(INSERT_CHUNK) {
        let sql = multi_row_insert(STAGE, 9, chunk.len());
        let mut q = sqlx::query(&sql);
        for (id, v) in chunk {
            let (num, text, censoring) = cell_columns(values, v);
            q = q
                .bind(*id)
                .bind(site_ids[v.site as usize])
                .bind(v.year)
                .bind(values.visits[v.visit as usize].as_str())
                .bind(values.columns[v.column as usize].as_str())
                .bind(num)
                .bind(text)
                .bind(count(v.line))
                .bind(censoring);
        }
        q.execute(&mut *conn).await?;
    }
    phases.done("stage");

    // A re-sent identical value is not new history.
    let unchanged = sqlx::query(
        "DELETE FROM temp.ingest_stage WHERE EXISTS (
             SELECT 1 FROM observations o
             WHERE o.superseded_by IS NULL AND o.site_id = ingest_stage.site_id
               AND o.year = ingest_stage.year AND o.visit = ingest_stage.visit
               AND o.column_name = ingest_stage.column_name
               AND o.num_value IS ingest_stage.num_value AND o.text_value IS ingest_stage.text_value
               AND o.censoring IS ingest_stage.censoring)",
    )
    .execute(&mut *conn)
    .await?
    .rows_affected();
    phases.done("unchanged");

    let superseding = sqlx::query(
        "UPDATE observations SET superseded_by = s.new_id
         FROM temp.ingest_stage s
         WHERE observations.superseded_by IS NULL AND observations.site_id = s.site_id
           AND observations.year = s.year AND observations.visit = s.visit
           AND observations.column_name = s.column_name",
    )
    .execute(&mut *conn)
    .await?
    .rows_affected();
    phases.done("supersede");

    sqlx::query(
        "INSERT INTO observations (value_id, batch_id, site_id, year, visit, column_name, num_value, text_value, line, censoring)
         SELECT new_id, ?1, site_id, year, visit, column_name, num_value, text_value, line, censoring
         FROM temp.ingest_stage ORDER BY new_id",
    )
    .bind(batch_id)
    .execute(&mut *conn)
    .await?;
    let staged_max: Vec<(String, i64)> = sqlx::query_as(
        "SELECT column_name, MAX(new_id) FROM temp.ingest_stage GROUP BY column_name",
    )
    .fetch_all(&mut *conn)
    .await?;
    for (column, id) in staged_max {
        if let Some(c) = values.columns.iter().position(|n| *n == column) {
            max_id[c] = max_id[c].max(id);
        }
    }
    sqlx::query("DELETE FROM temp.ingest_stage")
        .execute(&mut *conn)
        .await?;
    Ok((unchanged, superseding))
}

/// Raise each column's watermark to the largest value id this batch stored in it.
async fn advance_watermarks(
    conn: &mut SqliteConnection,
    values: &BatchValues,
    max_id: &[i64],
) -> Result<(), sqlx::Error> {
    for (column, id) in values.columns.iter().zip(max_id) {
        if *id > 0 {
            sqlx::query(
                "INSERT INTO column_watermarks (column_name, max_value_id) VALUES (?1, ?2)
                 ON CONFLICT (column_name) DO UPDATE SET max_value_id = MAX(max_value_id, excluded.max_value_id)",
            )
            .bind(column.as_str())
            .bind(*id)
            .execute(&mut *conn)
            .await?;
        }
    }
    Ok(())
}

/// Every rejected value of the batch, with its reason.
async fn insert_rejections(
    conn: &mut SqliteConnection,
    batch_id: i64,
    rejections: &[NewRejection],
) -> Result<(), sqlx::Error> {
    for chunk in rejections.chunks(REJECT_CHUNK) {
        let sql = multi_row_insert(
            "INSERT INTO rejections (batch_id, line, column_name, raw_value, reason) VALUES ",
            5,
            chunk.len(),
        );
        let mut q = sqlx::query(&sql);
        for r in chunk {
            q = q
                .bind(batch_id)
                .bind(r.line.map(count))
                .bind(r.column.as_deref())
                .bind(r.raw.as_deref())
                .bind(r.reason.as_str());
        }
        q.execute(&mut *conn).await?;
    }
    Ok(())
}

/// What a batch did, as recorded on its `ingest_batches` row.
struct BatchCounts {
    rows_read: u64,
    accepted: u64,
    rejected: u64,
    superseding: u64,
    unchanged: u64,
}

async fn close_batch_row(
    conn: &mut SqliteConnection,
    batch_id: i64,
    c: &BatchCounts,
    keys: &tidemark_feed::KeyColumns,
) -> Result<(), sqlx::Error> {
    sqlx::query(
        "UPDATE ingest_batches SET rows_read = ?2, values_accepted = ?3, values_rejected = ?4,
             values_superseding = ?5, values_unchanged = ?6,
             site_column = ?7, year_column = ?8, visit_column = ?9
         WHERE batch_id = ?1",
    )
    .bind(batch_id)
    .bind(count(c.rows_read))
    .bind(count(c.accepted))
    .bind(count(c.rejected))
    .bind(count(c.superseding))
    .bind(count(c.unchanged))
    .bind(keys.site.as_str())
    .bind(keys.year.as_str())
    .bind(keys.visit.as_deref())
    .execute(&mut *conn)
    .await?;
    Ok(())
}

/// `num_value`, `text_value` and `censoring` of a value.
fn cell_columns<'a>(
    values: &'a BatchValues,
    v: &NewValue,
) -> (Option<f64>, Option<&'a str>, Option<&'static str>) {
    match v.cell {
        Cell::Num(x) => (Some(x), None, None),
        Cell::Censored(side, limit) => (Some(limit), None, Some(side.as_str())),
        Cell::Label(i) => (None, Some(values.labels[i as usize].as_str()), None),
    }
}

/// `prefix (?,?,…),(?,?,…),…` with `rows` groups of `width` placeholders.
fn multi_row_insert(prefix: &str, width: usize, rows: usize) -> String {
    let group = format!("({})", vec!["?"; width].join(","));
    let mut sql = String::with_capacity(prefix.len() + rows * (group.len() + 1));
    sql.push_str(prefix);
    for i in 0..rows {
        if i > 0 {
            sql.push(',');
        }
        sql.push_str(&group);
    }
    sql
}
