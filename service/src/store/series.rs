//! Reading a series' data: its watermark (has anything changed since a fit?) and its
//! current values joined per visit, ready for the model step.

use serde::Serialize;
use sqlx::Row;

use super::{Store, StoreError};

/// The current values of one visit (site, year, visit) for the columns a series reads.
/// A `None` is a value never sent for that visit.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SeriesRow {
    pub site: String,
    pub year: i64,
    pub visit: String,
    pub response: Option<f64>,
    /// In the order of the `covariates` argument.
    pub covariates: Vec<Option<f64>>,
    /// In the order of the `groups` argument.
    pub groups: Vec<Option<String>>,
}

fn placeholders(from: usize, n: usize) -> String {
    (from..from + n)
        .map(|i| format!("?{i}"))
        .collect::<Vec<_>>()
        .join(", ")
}

impl Store {
    /// The largest value id stored for any of `columns`, current or superseded (0 when
    /// none). Value ids only grow, and a correction adds a row, so a series' data changed
    /// since a fit exactly when this exceeds the fit's `watermark`.
    pub async fn series_watermark(&self, columns: &[String]) -> Result<i64, StoreError> {
        if columns.is_empty() {
            return Ok(0);
        }
        let sql = format!(
            "SELECT COALESCE(MAX(max_value_id), 0) FROM column_watermarks WHERE column_name IN ({})",
            placeholders(1, columns.len())
        );
        let mut q = sqlx::query_scalar(&sql);
        for c in columns {
            q = q.bind(c);
        }
        q.fetch_one(&self.pool).await.map_err(|e| self.sql(e))
    }

    /// Current values of `response`, `covariates` and `groups`, one row per visit that has
    /// at least one of them, ordered by site code, year and visit.
    ///
    /// Group columns are read as labels; a numeric cell stored under a group column (the
    /// column was configured differently when it arrived) is read as its decimal text.
    pub async fn load_series_rows(
        &self,
        response: &str,
        covariates: &[String],
        groups: &[String],
    ) -> Result<Vec<SeriesRow>, StoreError> {
        let columns: Vec<&str> = std::iter::once(response)
            .chain(covariates.iter().map(String::as_str))
            .chain(groups.iter().map(String::as_str))
            .collect();
        let mut select = Vec::with_capacity(columns.len());
        for (i, _) in columns.iter().enumerate() {
            let p = i + 1;
            if i <= covariates.len() {
                select.push(format!(
                    "MAX(CASE WHEN o.column_name = ?{p} THEN o.num_value END) AS c{i}"
                ));
            } else {
                select.push(format!(
                    "MAX(CASE WHEN o.column_name = ?{p} THEN COALESCE(o.text_value, CAST(o.num_value AS TEXT)) END) AS c{i}"
                ));
            }
        }
        let sql = format!(
            "SELECT s.code AS site, o.year AS year, o.visit AS visit, {}
             FROM observations o JOIN sites s ON s.site_id = o.site_id
             WHERE o.superseded_by IS NULL AND o.column_name IN ({})
             GROUP BY o.site_id, o.year, o.visit
             ORDER BY s.code, o.year, o.visit",
            select.join(", "),
            placeholders(1, columns.len())
        );
        let mut q = sqlx::query(&sql);
        for c in &columns {
            q = q.bind(*c);
        }
        let rows = q.fetch_all(&self.pool).await.map_err(|e| self.sql(e))?;
        let mut out = Vec::with_capacity(rows.len());
        for r in rows {
            let response: Option<f64> = r.try_get("c0").map_err(|e| self.sql(e))?;
            let mut cov = Vec::with_capacity(covariates.len());
            for i in 1..=covariates.len() {
                let name = format!("c{i}");
                cov.push(
                    r.try_get::<Option<f64>, _>(name.as_str())
                        .map_err(|e| self.sql(e))?,
                );
            }
            let mut grp = Vec::with_capacity(groups.len());
            for j in 0..groups.len() {
                let name = format!("c{}", 1 + covariates.len() + j);
                grp.push(
                    r.try_get::<Option<String>, _>(name.as_str())
                        .map_err(|e| self.sql(e))?,
                );
            }
            out.push(SeriesRow {
                site: r.try_get("site").map_err(|e| self.sql(e))?,
                year: r.try_get("year").map_err(|e| self.sql(e))?,
                visit: r.try_get("visit").map_err(|e| self.sql(e))?,
                response,
                covariates: cov,
                groups: grp,
            });
        }
        Ok(out)
    }
}
