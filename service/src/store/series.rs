//! Reading a series' data: its watermark (has anything changed since a fit?) and its
//! current values joined per visit, ready for the model step.

use serde::Serialize;
use sqlx::Row;

use tidemark_feed::Censor;

use super::{Store, StoreError};

/// A stored value of a column a series reads as numbers.
#[derive(Debug, Clone, PartialEq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum StoredValue {
    Number(f64),
    /// Known only to lie on one side of the limit.
    Censored {
        #[serde(serialize_with = "censor_word")]
        side: Censor,
        limit: f64,
    },
    /// Text kept verbatim: the column was read by no series when it arrived.
    Text(String),
}

fn censor_word<S: serde::Serializer>(side: &Censor, s: S) -> Result<S::Ok, S::Error> {
    s.serialize_str(side.as_str())
}

impl StoredValue {
    /// The number of a measured value.
    pub fn number(&self) -> Option<f64> {
        match self {
            StoredValue::Number(x) => Some(*x),
            _ => None,
        }
    }
}

/// The current values of one visit (site, year, visit) for the columns a series reads.
/// A `None` is a value never sent for that visit.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct SeriesRow {
    pub site: String,
    pub year: i64,
    pub visit: String,
    pub response: Option<StoredValue>,
    /// In the order of the `covariates` argument.
    pub covariates: Vec<Option<StoredValue>>,
    /// In the order of the `groups` argument.
    pub groups: Vec<Option<String>>,
    /// The censoring qualifier (`series.censoring.column`), when one is read.
    pub qualifier: Option<String>,
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

    /// Current values of `response`, `covariates`, `groups` and the censoring `qualifier`
    /// column, one row per visit that has at least one of them, ordered by site code, year
    /// and visit.
    ///
    /// Group columns are read as labels; a numeric cell stored under a group column (the
    /// column was configured differently when it arrived) is read as its decimal text.
    ///
    /// The values come back as one JSON array per site, built by SQLite while it walks the
    /// `observations_current` index in order: a few thousand rows instead of one per
    /// value, which keeps reading a large network to about the cost of the scan itself.
    /// Numbers travel as text with 17 significant digits (`%!.17g`), which round-trips
    /// every double exactly; SQLite's own JSON rendering of a REAL keeps only 15.
    pub async fn load_series_rows(
        &self,
        response: &str,
        covariates: &[String],
        groups: &[String],
        qualifier: Option<&str>,
    ) -> Result<Vec<SeriesRow>, StoreError> {
        let columns: Vec<&str> = std::iter::once(response)
            .chain(covariates.iter().map(String::as_str))
            .chain(groups.iter().map(String::as_str))
            .chain(qualifier)
            .collect();
        let sql = format!(
            "SELECT s.code AS site,
                    json_group_array(json_array(o.year, o.visit, o.column_name,
                        CASE WHEN o.num_value IS NOT NULL THEN printf('%!.17g', o.num_value) END, o.text_value,
                        o.censoring)) AS cells
             FROM observations o INDEXED BY observations_current
             JOIN sites s ON s.site_id = o.site_id
             WHERE o.superseded_by IS NULL AND o.column_name IN ({})
             GROUP BY o.site_id",
            placeholders(1, columns.len())
        );
        let mut q = sqlx::query(&sql);
        for c in &columns {
            q = q.bind(*c);
        }
        let rows = q.fetch_all(&self.pool).await.map_err(|e| self.sql(e))?;
        type Cell = (
            i64,
            String,
            String,
            Option<String>,
            Option<String>,
            Option<String>,
        );
        let groups_end = 1 + covariates.len() + groups.len();
        let role = |name: &str| columns.iter().position(|c| *c == name);
        let mut out = Vec::new();
        for r in rows {
            let site: String = r.try_get("site").map_err(|e| self.sql(e))?;
            let text: String = r.try_get("cells").map_err(|e| self.sql(e))?;
            let mut cells: Vec<Cell> = serde_json::from_str(&text).map_err(|e| {
                self.sql(sqlx::Error::Decode(
                    format!("values of site {site:?}: {e}").into(),
                ))
            })?;
            cells.sort_by(|a, b| (a.0, &a.1).cmp(&(b.0, &b.1)));
            let mut i = 0;
            while i < cells.len() {
                let (year, visit) = (cells[i].0, cells[i].1.clone());
                let mut row = SeriesRow {
                    site: site.clone(),
                    year,
                    visit,
                    response: None,
                    covariates: vec![None; covariates.len()],
                    groups: vec![None; groups.len()],
                    qualifier: None,
                };
                while i < cells.len() && cells[i].0 == row.year && cells[i].1 == row.visit {
                    let (_, _, column, num_text, label, censoring) = &cells[i];
                    let num = match num_text {
                        Some(t) => Some(t.parse::<f64>().map_err(|e| {
                            self.sql(sqlx::Error::Decode(
                                format!("value {t:?} of site {site:?}: {e}").into(),
                            ))
                        })?),
                        None => None,
                    };
                    let value = || match (num, censoring.as_deref().and_then(Censor::parse)) {
                        (Some(limit), Some(side)) => Some(StoredValue::Censored { side, limit }),
                        (Some(x), None) => Some(StoredValue::Number(x)),
                        (None, _) => label.clone().map(StoredValue::Text),
                    };
                    // A numeric cell under a label column (configured differently when
                    // it arrived) is read as its decimal text.
                    let text = || label.clone().or_else(|| num.map(|v| v.to_string()));
                    match role(column) {
                        Some(0) => row.response = value(),
                        Some(k) if k <= covariates.len() => row.covariates[k - 1] = value(),
                        Some(k) if k < groups_end => row.groups[k - 1 - covariates.len()] = text(),
                        Some(_) => row.qualifier = text(),
                        None => {}
                    }
                    i += 1;
                }
                out.push(row);
            }
        }
        out.sort_by(|a, b| (&a.site, a.year, &a.visit).cmp(&(&b.site, b.year, &b.visit)));
        Ok(out)
    }
}
