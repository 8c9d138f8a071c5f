//! Reads behind `tidemark drift` and the report's variance chart: the standard deviations
//! and variance shares of every published version, in version order.

use serde::Serialize;

use super::{Store, StoreError};

/// One posterior quantile summary (kind `sd` or `share`) of one published version.
#[derive(Debug, Clone, PartialEq, Serialize, sqlx::FromRow)]
pub struct ComponentRow {
    pub series: String,
    pub version: i64,
    pub fit_id: i64,
    pub data_through_year: Option<i64>,
    /// `sd` or `share`.
    pub kind: String,
    pub term: String,
    pub q05: Option<f64>,
    pub q50: Option<f64>,
    pub q95: Option<f64>,
    /// The version's response unit (`fits.unit`).
    pub unit: Option<String>,
}

impl Store {
    /// Every `sd` and `share` summary of the published versions of `series` (all series
    /// when `None`), ordered by series, version, kind and term.
    pub async fn variance_components(
        &self,
        series: Option<&str>,
    ) -> Result<Vec<ComponentRow>, StoreError> {
        // Read from the tables, not the `variance_drift` view: `drift` computes changes and
        // flags itself, and a test checks the two computations agree.
        sqlx::query_as(
            "SELECT f.series, f.version, f.fit_id, f.data_through_year, p.kind, p.term,
                    p.q05, p.q50, p.q95, f.unit
             FROM fits f
             JOIN posterior_summary p ON p.fit_id = f.fit_id AND p.kind IN ('sd', 'share')
             WHERE f.status = 'published' AND (?1 IS NULL OR f.series = ?1)
             ORDER BY f.series, f.version, p.kind, p.term",
        )
        .bind(series)
        .fetch_all(&self.pool)
        .await
        .map_err(|e| self.sql(e))
    }

    /// Names of the series that have at least one published version.
    pub async fn published_series(&self) -> Result<Vec<String>, StoreError> {
        sqlx::query_scalar(
            "SELECT DISTINCT series FROM fits WHERE status = 'published' ORDER BY series",
        )
        .fetch_all(&self.pool)
        .await
        .map_err(|e| self.sql(e))
    }
}
