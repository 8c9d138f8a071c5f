//! Writing fits: a version (fit row, summaries, draws, forecasts with their exceedance
//! probabilities) in one transaction; rewriting the forecasts of the latest version.
//!
//! Invariant: everything a version consists of becomes visible in one transaction, or not
//! at all (`tests/e2e_pipeline.rs`). That transaction is fenced: it writes only while the
//! writer still holds the lease, and publishes no snapshot older than a version already
//! published under the same model definition (`tests/e2e_fencing.rs`).

use sqlx::{QueryBuilder, Sqlite, Transaction};
use tidemark_model::{ForecastRow, Summary};

use super::lease::{begin_fenced, Fence, LeaseHolder};
use super::{now_utc, Store, StoreError};
use crate::vocabulary::FitStatus;

/// Everything about a fit attempt except its summaries, draws and forecasts.
#[derive(Debug, Clone, Default)]
pub struct NewFit {
    pub series: String,
    pub status: FitStatus,
    pub data_through_year: Option<i64>,
    pub watermark: i64,
    pub n_obs: Option<i64>,
    /// Observations of `n_obs` known only to lie below or above a limit.
    pub n_censored: Option<i64>,
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
    pub seed: Option<i64>,
    pub message: Option<String>,
    pub run_id: Option<i64>,
    pub response: Option<String>,
    pub transform: Option<String>,
    pub priors_json: Option<String>,
    pub diagnostics_json: Option<String>,
    pub acceptance_rate: Option<f64>,
    /// Digest of the series' model definition the fit was made under.
    pub definition_sha256: Option<String>,
    /// Canonical text of that definition.
    pub definition_text: Option<String>,
    /// The response's unit (`series.unit`).
    pub unit: Option<String>,
}

/// What writing a fit is checked against, inside its transaction.
#[derive(Debug, Clone, Copy, Default)]
pub struct PublishGuard<'a> {
    /// The writer's lease fence; `None` for a writer that takes no lease (the demo on its
    /// own database, benchmarks).
    pub fence: Option<&'a Fence>,
    /// Publish even when a version made under the same definition saw newer data
    /// (`refit --force`).
    pub allow_older: bool,
}

/// Why a fenced write was refused.
enum Refused {
    Lost(Option<LeaseHolder>),
    Stale { version: i64, newer: i64 },
}

/// A visit a fit left out, and why (stored in `fit_exclusions`).
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct NewExclusion {
    pub site: String,
    pub year: i64,
    pub visit: String,
    pub reason: String,
}

/// Where a recorded fit landed.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct RecordedFit {
    pub fit_id: i64,
    pub version: i64,
}

/// The latest published version of a series, as the pipeline needs it.
#[derive(Debug, Clone, PartialEq, sqlx::FromRow)]
pub struct PublishedFit {
    pub fit_id: i64,
    pub version: i64,
    pub watermark: i64,
    pub transform: Option<String>,
    pub definition_sha256: Option<String>,
    pub definition_text: Option<String>,
    pub unit: Option<String>,
}

/// The latest fit attempt of a series (any status): what the next refit compares with.
#[derive(Debug, Clone, PartialEq, sqlx::FromRow)]
pub struct LatestAttempt {
    pub watermark: i64,
    pub definition_sha256: Option<String>,
    pub definition_text: Option<String>,
}

/// Rows per multi-row INSERT: well under SQLite's limit of 32766 bound parameters.
const CHUNK: usize = 1000;

async fn insert_summaries(
    tx: &mut Transaction<'_, Sqlite>,
    fit_id: i64,
    rows: &[Summary],
) -> Result<(), sqlx::Error> {
    for chunk in rows.chunks(CHUNK) {
        let mut q: QueryBuilder<Sqlite> = QueryBuilder::new(
            "INSERT INTO posterior_summary (fit_id, kind, term, level, mean, sd, q05, q25, q50, q75, q95, rhat, ess_bulk, ess_tail) ",
        );
        q.push_values(chunk, |mut b, s| {
            b.push_bind(fit_id)
                .push_bind(s.kind.as_str())
                .push_bind(&s.term)
                .push_bind(&s.level)
                .push_bind(finite(s.mean))
                .push_bind(finite(s.sd))
                .push_bind(finite(s.q05))
                .push_bind(finite(s.q25))
                .push_bind(finite(s.q50))
                .push_bind(finite(s.q75))
                .push_bind(finite(s.q95))
                .push_bind(finite(s.rhat))
                .push_bind(finite(s.ess_bulk))
                .push_bind(finite(s.ess_tail));
        });
        q.build().execute(&mut **tx).await?;
    }
    Ok(())
}

/// A covariate value a forecast scenario holds fixed (original units).
#[derive(Debug, Clone, PartialEq)]
pub struct ScenarioValue {
    pub scenario: String,
    pub covariate: String,
    pub value: f64,
}

/// The forecasts of one version: its rows, the covariate values of their scenarios, and
/// each row's probability of exceeding each threshold (`exceedance[i][k]` for `rows[i]`
/// and `thresholds[k]`; empty without thresholds).
#[derive(Debug, Clone, Copy, Default)]
pub struct ForecastSet<'a> {
    pub rows: &'a [ForecastRow],
    pub scenarios: &'a [ScenarioValue],
    pub thresholds: &'a [f64],
    pub exceedance: &'a [Vec<f64>],
}

async fn insert_forecasts(
    tx: &mut Transaction<'_, Sqlite>,
    fit_id: i64,
    set: ForecastSet<'_>,
) -> Result<(), sqlx::Error> {
    for v in set.scenarios {
        sqlx::query(
            "INSERT INTO forecast_scenarios (fit_id, scenario, covariate, value) VALUES (?1, ?2, ?3, ?4)",
        )
        .bind(fit_id)
        .bind(&v.scenario)
        .bind(&v.covariate)
        .bind(v.value)
        .execute(&mut **tx)
        .await?;
    }
    // The rows' keys are chosen here, inside the writing transaction, so each exceedance
    // row can name its forecast row (a multi-row RETURNING has no guaranteed order). Past
    // the largest id ever handed out: `forecasts` is AUTOINCREMENT, ids are never reused.
    let first_id: i64 = sqlx::query_scalar(
        "SELECT MAX(COALESCE((SELECT seq FROM sqlite_sequence WHERE name = 'forecasts'), 0),
                    COALESCE((SELECT MAX(forecast_id) FROM forecasts), 0)) + 1",
    )
    .fetch_one(&mut **tx)
    .await?;
    let ids: Vec<i64> = (first_id..).take(set.rows.len()).collect();
    for (chunk, chunk_ids) in set.rows.chunks(CHUNK).zip(ids.chunks(CHUNK)) {
        let mut q: QueryBuilder<Sqlite> = QueryBuilder::new(
            "INSERT INTO forecasts (forecast_id, fit_id, target, site, year, scenario, last_observed_year, mean, sd, \
             q025, q10, q25, q50, q75, q90, q975, \
             share_site, share_year, share_groups, share_residual, share_estimation, prior_only, scale) ",
        );
        q.push_values(chunk.iter().zip(chunk_ids), |mut b, (f, id)| {
            b.push_bind(id)
                .push_bind(fit_id)
                .push_bind(f.target.as_str())
                .push_bind(&f.site)
                .push_bind(f.year)
                .push_bind(&f.scenario)
                .push_bind(f.last_observed_year)
                .push_bind(finite(f.mean))
                .push_bind(f.sd.and_then(finite))
                .push_bind(finite(f.q025))
                .push_bind(finite(f.q10))
                .push_bind(finite(f.q25))
                .push_bind(finite(f.q50))
                .push_bind(finite(f.q75))
                .push_bind(finite(f.q90))
                .push_bind(finite(f.q975))
                .push_bind(finite(f.share_site))
                .push_bind(finite(f.share_year))
                .push_bind(finite(f.share_groups))
                .push_bind(finite(f.share_residual))
                .push_bind(finite(f.share_estimation))
                .push_bind((!f.prior_only.is_empty()).then(|| f.prior_only.join(",")))
                .push_bind(ForecastRow::SCALE.as_str());
        });
        q.build().execute(&mut **tx).await?;
    }
    let exceedance: Vec<(i64, f64, f64)> = ids
        .iter()
        .zip(set.exceedance)
        .flat_map(|(&id, probs)| {
            set.thresholds
                .iter()
                .zip(probs)
                .map(move |(&t, &p)| (id, t, p))
        })
        .collect();
    for chunk in exceedance.chunks(CHUNK) {
        let mut q: QueryBuilder<Sqlite> = QueryBuilder::new(
            "INSERT INTO forecast_exceedance (forecast_id, threshold, probability) ",
        );
        q.push_values(chunk, |mut b, &(id, t, p)| {
            b.push_bind(id).push_bind(t).push_bind(finite(p));
        });
        q.build().execute(&mut **tx).await?;
    }
    Ok(())
}

/// SQLite has no NaN or infinity: a non-finite figure is stored as NULL.
fn finite(v: f64) -> Option<f64> {
    v.is_finite().then_some(v)
}

impl Store {
    /// Record a fit attempt and, for a published one, its summaries, draws and forecasts,
    /// all in one transaction. A published fit takes the next version number of its
    /// series; a rejected or failed attempt is recorded under the version it tried to
    /// become, so published versions count 1, 2, 3… without gaps.
    pub async fn record_fit(
        &self,
        fit: &NewFit,
        summaries: &[Summary],
        draws: Option<(&str, &[u8])>,
        forecasts: ForecastSet<'_>,
        exclusions: &[NewExclusion],
        guard: PublishGuard<'_>,
    ) -> Result<RecordedFit, StoreError> {
        let run = async {
            // IMMEDIATE: the fence and staleness checks below hold until the commit.
            let mut tx = match begin_fenced(&self.pool, guard.fence).await? {
                Ok(tx) => tx,
                Err(holder) => return Ok(Err(Refused::Lost(holder))),
            };
            if fit.status == FitStatus::Published && !guard.allow_older {
                if let Some(definition) = &fit.definition_sha256 {
                    let newest: Option<(i64, i64)> = sqlx::query_as(
                        "SELECT version, watermark FROM fits
                         WHERE series = ?1 AND status = 'published' AND definition_sha256 = ?2
                         ORDER BY version DESC LIMIT 1",
                    )
                    .bind(&fit.series)
                    .bind(definition)
                    .fetch_optional(&mut *tx)
                    .await?;
                    if let Some((version, newer)) = newest.filter(|&(_, w)| w > fit.watermark) {
                        tx.rollback().await?;
                        return Ok(Err(Refused::Stale { version, newer }));
                    }
                }
            }
            let version: i64 = sqlx::query_scalar(
                "SELECT COALESCE(MAX(version), 0) + 1 FROM fits WHERE series = ?1 AND status = 'published'",
            )
            .bind(&fit.series)
            .fetch_one(&mut *tx)
            .await?;
            let fit_id: i64 = sqlx::query_scalar(
                "INSERT INTO fits (series, version, status, created_at, data_through_year, watermark, n_obs, n_sites, n_years,
                                   warm_start_from, chains, draws, warmup, wall_seconds, max_rhat, min_ess_bulk, min_ess_tail,
                                   seed, message, run_id, response, transform, priors_json, diagnostics_json, acceptance_rate,
                                   lease_generation, definition_sha256, n_censored, definition_text, unit)
                 VALUES (?1, ?2, ?3, ?4, ?5, ?6, ?7, ?8, ?9, ?10, ?11, ?12, ?13, ?14, ?15, ?16, ?17, ?18, ?19, ?20, ?21, ?22, ?23, ?24, ?25,
                         ?26, ?27, ?28, ?29, ?30)
                 RETURNING fit_id",
            )
            .bind(&fit.series)
            .bind(version)
            .bind(fit.status)
            .bind(now_utc())
            .bind(fit.data_through_year)
            .bind(fit.watermark)
            .bind(fit.n_obs)
            .bind(fit.n_sites)
            .bind(fit.n_years)
            .bind(fit.warm_start_from)
            .bind(fit.chains)
            .bind(fit.draws)
            .bind(fit.warmup)
            .bind(fit.wall_seconds)
            .bind(fit.max_rhat.and_then(finite))
            .bind(fit.min_ess_bulk.and_then(finite))
            .bind(fit.min_ess_tail.and_then(finite))
            .bind(fit.seed)
            .bind(&fit.message)
            .bind(fit.run_id)
            .bind(&fit.response)
            .bind(&fit.transform)
            .bind(&fit.priors_json)
            .bind(&fit.diagnostics_json)
            .bind(fit.acceptance_rate.and_then(finite))
            .bind(guard.fence.map(|f| f.generation))
            .bind(&fit.definition_sha256)
            .bind(fit.n_censored)
            .bind(&fit.definition_text)
            .bind(&fit.unit)
            .fetch_one(&mut *tx)
            .await?;
            insert_summaries(&mut tx, fit_id, summaries).await?;
            for chunk in exclusions.chunks(CHUNK) {
                let mut q: QueryBuilder<Sqlite> = QueryBuilder::new(
                    "INSERT INTO fit_exclusions (fit_id, site, year, visit, reason) ",
                );
                q.push_values(chunk, |mut b, e| {
                    b.push_bind(fit_id)
                        .push_bind(&e.site)
                        .push_bind(e.year)
                        .push_bind(&e.visit)
                        .push_bind(&e.reason);
                });
                q.build().execute(&mut *tx).await?;
            }
            if let Some((format, blob)) = draws {
                sqlx::query("INSERT INTO fit_draws (fit_id, format, blob) VALUES (?1, ?2, ?3)")
                    .bind(fit_id)
                    .bind(format)
                    .bind(blob)
                    .execute(&mut *tx)
                    .await?;
            }
            if fit.status == FitStatus::Published {
                insert_forecasts(&mut tx, fit_id, forecasts).await?;
            }
            tx.commit().await?;
            Ok::<_, sqlx::Error>(Ok(RecordedFit { fit_id, version }))
        };
        match run.await.map_err(|e| self.sql(e))? {
            Ok(recorded) => Ok(recorded),
            Err(refused) => Err(self.refused(refused, guard, fit)),
        }
    }

    fn refused(&self, refused: Refused, guard: PublishGuard<'_>, fit: &NewFit) -> StoreError {
        match refused {
            Refused::Lost(now) => self.lease_lost(guard.fence, now),
            Refused::Stale { version, newer } => StoreError::StaleSnapshot {
                series: fit.series.clone(),
                watermark: fit.watermark,
                version,
                newer,
            },
        }
    }

    pub(super) fn lease_lost(&self, fence: Option<&Fence>, now: Option<LeaseHolder>) -> StoreError {
        StoreError::LeaseLost {
            path: self.path.clone(),
            generation: fence.map_or(0, |f| f.generation),
            now: match now {
                Some(h) => format!(
                    "it is now held by pid {} on {} (holder {}, generation {})",
                    h.pid,
                    h.host,
                    h.holder,
                    h.generation
                        .map_or_else(|| "unknown".into(), |g| g.to_string())
                ),
                None => "nobody holds it now".into(),
            },
        }
    }

    /// The latest published version of `series`, if any.
    pub async fn serving_fit(&self, series: &str) -> Result<Option<PublishedFit>, StoreError> {
        sqlx::query_as(
            "SELECT fit_id, version, watermark, transform, definition_sha256, definition_text, unit FROM fits
             WHERE series = ?1 AND status = 'published' ORDER BY version DESC LIMIT 1",
        )
        .bind(series)
        .fetch_optional(&self.pool)
        .await
        .map_err(|e| self.sql(e))
    }

    /// The latest fit attempt of `series` (published or not).
    pub async fn latest_attempt(&self, series: &str) -> Result<Option<LatestAttempt>, StoreError> {
        sqlx::query_as(
            "SELECT watermark, definition_sha256, definition_text FROM fits
             WHERE series = ?1 ORDER BY fit_id DESC LIMIT 1",
        )
        .bind(series)
        .fetch_optional(&self.pool)
        .await
        .map_err(|e| self.sql(e))
    }

    /// The stored draws of a fit: `(format, blob)`.
    pub async fn fit_draws(&self, fit_id: i64) -> Result<Option<(String, Vec<u8>)>, StoreError> {
        sqlx::query_as("SELECT format, blob FROM fit_draws WHERE fit_id = ?1")
            .bind(fit_id)
            .fetch_optional(&self.pool)
            .await
            .map_err(|e| self.sql(e))
    }

    /// Replace the forecasts of a published fit in one transaction (fenced like
    /// [`Store::record_fit`]).
    pub async fn replace_forecasts(
        &self,
        fit_id: i64,
        forecasts: ForecastSet<'_>,
        fence: Option<&Fence>,
    ) -> Result<(), StoreError> {
        let run = async {
            let mut tx = match begin_fenced(&self.pool, fence).await? {
                Ok(tx) => tx,
                Err(holder) => return Ok(Err(holder)),
            };
            // Exceedance rows first: they refer to the forecast rows.
            sqlx::query(
                "DELETE FROM forecast_exceedance
                 WHERE forecast_id IN (SELECT forecast_id FROM forecasts WHERE fit_id = ?1)",
            )
            .bind(fit_id)
            .execute(&mut *tx)
            .await?;
            for table in ["forecasts", "forecast_scenarios"] {
                sqlx::query(&format!("DELETE FROM {table} WHERE fit_id = ?1"))
                    .bind(fit_id)
                    .execute(&mut *tx)
                    .await?;
            }
            insert_forecasts(&mut tx, fit_id, forecasts).await?;
            tx.commit().await?;
            Ok(Ok(()))
        };
        run.await
            .map_err(|e| self.sql(e))?
            .map_err(|now| self.lease_lost(fence, now))
    }
}
