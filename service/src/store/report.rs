//! Reads behind `tidemark report`: the latest version's forecast interval widths, site
//! effects and exceedance probabilities, and the run history with each run's per-series
//! outcomes.

use serde::Serialize;

use super::status::RunSummary;
use super::{Store, StoreError};

/// The 80% interval of one forecast row of a fit.
#[derive(Debug, Clone, PartialEq, sqlx::FromRow)]
pub struct ForecastInterval {
    pub target: String,
    pub q10: Option<f64>,
    pub q90: Option<f64>,
    /// The row's variance components set by their prior alone (`forecasts.prior_only`).
    pub prior_only: Option<String>,
}

/// The posterior summary of one site effect of a fit.
#[derive(Debug, Clone, PartialEq, sqlx::FromRow)]
pub struct SiteEffect {
    #[sqlx(rename = "level")]
    pub site: String,
    pub q05: Option<f64>,
    pub q50: Option<f64>,
    pub q95: Option<f64>,
}

/// The q10, q50 and q90 of one site's forecast row of one target.
#[derive(Debug, Clone, PartialEq, sqlx::FromRow)]
pub struct ForecastBand {
    pub site: String,
    pub year: i64,
    pub q10: Option<f64>,
    pub q50: Option<f64>,
    pub q90: Option<f64>,
}

/// The probability that one site's forecast of one target exceeds one threshold.
#[derive(Debug, Clone, PartialEq, sqlx::FromRow)]
pub struct SiteExceedance {
    pub site: String,
    pub year: i64,
    pub threshold: f64,
    pub probability: Option<f64>,
}

/// What one run did for one series (a `run_series` row).
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct RunSeriesOutcome {
    pub series: String,
    pub outcome: String,
    pub fit_id: Option<i64>,
    pub message: Option<String>,
}

/// A `run_series` row as read: the outcome and the run it belongs to.
#[derive(sqlx::FromRow)]
struct RunSeriesRow {
    run_id: i64,
    #[sqlx(flatten)]
    outcome: RunSeriesOutcome,
}

/// A run with its per-series outcomes.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct RunHistoryEntry {
    pub run: RunSummary,
    pub series: Vec<RunSeriesOutcome>,
}

impl Store {
    /// The 80% intervals of every forecast row of `fit_id`.
    pub async fn forecast_intervals(
        &self,
        fit_id: i64,
    ) -> Result<Vec<ForecastInterval>, StoreError> {
        sqlx::query_as(
            "SELECT target, q10, q90, prior_only FROM forecasts WHERE fit_id = ?1
             ORDER BY target, site, year",
        )
        .bind(fit_id)
        .fetch_all(&self.pool)
        .await
        .map_err(|e| self.sql(e))
    }

    /// The per-site rows of `target` in the forecasts of `fit_id` (the baseline scenario
    /// when a fit has several), by site.
    pub async fn forecast_bands(
        &self,
        fit_id: i64,
        target: &str,
    ) -> Result<Vec<ForecastBand>, StoreError> {
        sqlx::query_as(
            "SELECT site, year, q10, q50, q90 FROM forecasts
             WHERE fit_id = ?1 AND target = ?2 AND site IS NOT NULL
               AND (scenario IS NULL OR scenario = 'baseline')
             ORDER BY site, year",
        )
        .bind(fit_id)
        .bind(target)
        .fetch_all(&self.pool)
        .await
        .map_err(|e| self.sql(e))
    }

    /// The exceedance probabilities of the per-site rows of `target` in the forecasts of
    /// `fit_id` (the baseline scenario), by site and threshold.
    pub async fn site_exceedance(
        &self,
        fit_id: i64,
        target: &str,
    ) -> Result<Vec<SiteExceedance>, StoreError> {
        sqlx::query_as(
            "SELECT f.site, f.year, e.threshold, e.probability
             FROM forecasts f JOIN forecast_exceedance e ON e.forecast_id = f.forecast_id
             WHERE f.fit_id = ?1 AND f.target = ?2 AND f.site IS NOT NULL
               AND (f.scenario IS NULL OR f.scenario = 'baseline')
             ORDER BY f.site, f.year, e.threshold",
        )
        .bind(fit_id)
        .bind(target)
        .fetch_all(&self.pool)
        .await
        .map_err(|e| self.sql(e))
    }

    /// The site effects of `fit_id`, ordered by their median (lowest first).
    pub async fn site_effects(&self, fit_id: i64) -> Result<Vec<SiteEffect>, StoreError> {
        sqlx::query_as(
            "SELECT level, q05, q50, q95 FROM posterior_summary
             WHERE fit_id = ?1 AND kind = 'effect' AND term = 'site' AND level IS NOT NULL
             ORDER BY q50, level",
        )
        .bind(fit_id)
        .fetch_all(&self.pool)
        .await
        .map_err(|e| self.sql(e))
    }

    /// The `limit` most recent runs, newest first, each with its per-series outcomes.
    pub async fn run_history(&self, limit: u32) -> Result<Vec<RunHistoryEntry>, StoreError> {
        let runs = self.recent_runs(limit).await?;
        let Some(oldest) = runs.last().map(|r| r.run_id) else {
            return Ok(Vec::new());
        };
        let outcomes: Vec<RunSeriesRow> = sqlx::query_as(
            "SELECT run_id, series, outcome, fit_id, message FROM run_series
             WHERE run_id >= ?1 ORDER BY run_id, series",
        )
        .bind(oldest)
        .fetch_all(&self.pool)
        .await
        .map_err(|e| self.sql(e))?;
        Ok(runs
            .into_iter()
            .map(|run| {
                let series = outcomes
                    .iter()
                    .filter(|o| o.run_id == run.run_id)
                    .map(|o| o.outcome.clone())
                    .collect();
                RunHistoryEntry { run, series }
            })
            .collect())
    }
}
