//! Reads behind `tidemark export`: the rows of the analyst-facing views (`latest_forecasts`,
//! `variance_drift`), the posterior summaries of the latest versions, and the stored draws
//! of one published version. Each read is one `query_as` into a row struct whose fields
//! are the exported columns, in order.

use super::{Store, StoreError};

/// One row of the `latest_forecasts` view.
#[derive(Debug, Clone, PartialEq, sqlx::FromRow)]
pub struct ForecastExportRow {
    pub series: String,
    pub fit_id: i64,
    pub target: String,
    pub site: Option<String>,
    pub year: i64,
    pub scenario: Option<String>,
    pub scenario_covariates: Option<String>,
    pub last_observed_year: Option<i64>,
    pub mean: Option<f64>,
    pub sd: Option<f64>,
    pub q025: Option<f64>,
    pub q10: Option<f64>,
    pub q25: Option<f64>,
    pub q50: Option<f64>,
    pub q75: Option<f64>,
    pub q90: Option<f64>,
    pub q975: Option<f64>,
    pub share_site: Option<f64>,
    pub share_year: Option<f64>,
    pub share_groups: Option<f64>,
    pub share_residual: Option<f64>,
    pub share_estimation: Option<f64>,
    pub prior_only: Option<String>,
    pub forecast_id: i64,
    pub unit: Option<String>,
    pub scale: String,
}

/// One `posterior_summary` row of a series' latest published version.
#[derive(Debug, Clone, PartialEq, sqlx::FromRow)]
pub struct PosteriorExportRow {
    pub series: String,
    pub version: i64,
    pub fit_id: i64,
    pub data_through_year: Option<i64>,
    pub kind: String,
    pub term: String,
    pub level: Option<String>,
    pub mean: Option<f64>,
    pub sd: Option<f64>,
    pub q05: Option<f64>,
    pub q25: Option<f64>,
    pub q50: Option<f64>,
    pub q75: Option<f64>,
    pub q95: Option<f64>,
    pub rhat: Option<f64>,
    pub ess_bulk: Option<f64>,
    pub ess_tail: Option<f64>,
}

/// One row of the `variance_drift` view.
#[derive(Debug, Clone, PartialEq, sqlx::FromRow)]
pub struct DriftExportRow {
    pub series: String,
    pub version: i64,
    pub kind: String,
    pub term: String,
    pub q05: Option<f64>,
    pub q50: Option<f64>,
    pub q95: Option<f64>,
    pub previous_q50: Option<f64>,
    pub change: Option<f64>,
    pub flagged: bool,
    pub unit: Option<String>,
    pub scale: Option<String>,
}

/// The stored draws file of one published version.
#[derive(Debug, Clone, PartialEq, sqlx::FromRow)]
pub struct VersionDraws {
    pub fit_id: i64,
    pub format: String,
    pub blob: Vec<u8>,
}

impl Store {
    /// Rows of `latest_forecasts`, optionally for one series and one target, in a stable
    /// order (series, target, site, year, scenario).
    pub async fn export_forecasts(
        &self,
        series: Option<&str>,
        target: Option<&str>,
    ) -> Result<Vec<ForecastExportRow>, StoreError> {
        sqlx::query_as(
            "SELECT series, fit_id, target, site, year, scenario, scenario_covariates,
                    last_observed_year, mean, sd, q025, q10, q25, q50, q75, q90, q975,
                    share_site, share_year, share_groups, share_residual, share_estimation,
                    prior_only, forecast_id, unit, scale
             FROM latest_forecasts
             WHERE (?1 IS NULL OR series = ?1) AND (?2 IS NULL OR target = ?2)
             ORDER BY series, target, site, year, scenario",
        )
        .bind(series)
        .bind(target)
        .fetch_all(&self.pool)
        .await
        .map_err(|e| self.sql(e))
    }

    /// Every posterior summary of each series' latest published version.
    pub async fn export_posterior(
        &self,
        series: Option<&str>,
    ) -> Result<Vec<PosteriorExportRow>, StoreError> {
        sqlx::query_as(
            "SELECT lf.series, lf.version, lf.fit_id, lf.data_through_year, p.kind, p.term,
                    p.level, p.mean, p.sd, p.q05, p.q25, p.q50, p.q75, p.q95, p.rhat,
                    p.ess_bulk, p.ess_tail
             FROM latest_fits lf
             JOIN posterior_summary p ON p.fit_id = lf.fit_id
             WHERE ?1 IS NULL OR lf.series = ?1
             ORDER BY lf.series, p.kind, p.term, p.level",
        )
        .bind(series)
        .fetch_all(&self.pool)
        .await
        .map_err(|e| self.sql(e))
    }

    /// Rows of `variance_drift` (already ordered by series, version, kind, term).
    pub async fn export_drift(
        &self,
        series: Option<&str>,
    ) -> Result<Vec<DriftExportRow>, StoreError> {
        sqlx::query_as(
            "SELECT series, version, kind, term, q05, q50, q95, previous_q50, change,
                    flagged, unit, scale
             FROM variance_drift
             WHERE ?1 IS NULL OR series = ?1
             ORDER BY series, version, kind, term",
        )
        .bind(series)
        .fetch_all(&self.pool)
        .await
        .map_err(|e| self.sql(e))
    }

    /// The draws file of published version `version` of `series`, if there is one.
    pub async fn published_version_draws(
        &self,
        series: &str,
        version: i64,
    ) -> Result<Option<VersionDraws>, StoreError> {
        sqlx::query_as(
            "SELECT d.fit_id, d.format, d.blob
             FROM fits f JOIN fit_draws d ON d.fit_id = f.fit_id
             WHERE f.series = ?1 AND f.version = ?2 AND f.status = 'published'",
        )
        .bind(series)
        .bind(version)
        .fetch_optional(&self.pool)
        .await
        .map_err(|e| self.sql(e))
    }

    /// The published version numbers of `series`, oldest first.
    pub async fn published_versions(&self, series: &str) -> Result<Vec<i64>, StoreError> {
        sqlx::query_scalar(
            "SELECT version FROM fits WHERE series = ?1 AND status = 'published'
             ORDER BY version",
        )
        .bind(series)
        .fetch_all(&self.pool)
        .await
        .map_err(|e| self.sql(e))
    }
}
