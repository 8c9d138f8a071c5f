//! From stored rows to the model's input: the transform, and the rows a series cannot use,
//! each with its reason (they are recorded with the fit, never silently dropped).

use tidemark_feed::Censor;
use tidemark_model::{Censoring, Data, DataBuilder, ModelError, MAX_MAGNITUDE};

use crate::config::{SeriesConfig, Transform};
use crate::store::{SeriesRow, StoredValue};

/// A visit left out of a fit, and why: the row the store keeps in `fit_exclusions`.
pub use crate::store::NewExclusion as Exclusion;

/// The model input of one series.
#[derive(Debug, Clone)]
pub struct ModelInput {
    pub data: Data,
    pub excluded: Vec<Exclusion>,
}

/// Why a series cannot be fitted at all.
#[derive(Debug, thiserror::Error)]
pub enum InputError {
    #[error("series {series}: {source}")]
    Model { series: String, source: ModelError },
    #[error("series {series}: year {year} of site {site:?} is outside the supported range")]
    Year {
        series: String,
        site: String,
        year: i64,
    },
}

/// Why a value too large for the model's arithmetic is left out: almost always a unit or
/// a decimal-separator mistake in the delivery, so the visit is excluded with its value
/// instead of failing the whole series.
fn out_of_range(column: &str, value: f64) -> String {
    format!(
        "{column} = {value:e} is out of the range the model computes with (magnitudes up to \
         {MAX_MAGNITUDE:e} on the model scale); check the value and its unit"
    )
}

/// The response of one visit on the model scale: measured, censored at a limit, or the
/// reason it is left out.
enum Response {
    Measured(f64),
    Censored(Censoring, f64),
}

/// The response cell (and the qualifier that may mark it censored) on the model scale.
fn response(series: &SeriesConfig, row: &SeriesRow) -> Option<Result<Response, String>> {
    let name = &series.response;
    let value = row.response.as_ref()?;
    let marked = series
        .censoring
        .as_ref()
        .zip(row.qualifier.as_deref())
        .and_then(|(c, q)| c.side(q).map(|side| (side, q)));
    let (side, limit) = match (value, marked) {
        (StoredValue::Text(t), _) => {
            return Some(Err(format!(
                "{name} = {:?} is not a number (kept as text from a delivery made before a series read the column)",
                crate::visible::visible(t)
            )))
        }
        (StoredValue::Number(x), None) => {
            return Some(measured(series, *x));
        }
        (StoredValue::Number(x), Some((side, _))) => (side, *x),
        (StoredValue::Censored { side, limit }, None) => (*side, *limit),
        (StoredValue::Censored { side, limit }, Some((marked, q))) => {
            if *side != marked {
                return Some(Err(format!(
                    "{name} is written {}{limit} but its qualifier {:?} says {}",
                    if *side == Censor::Below { "<" } else { ">" },
                    crate::visible::visible(q),
                    marked.as_str()
                )));
            }
            (*side, *limit)
        }
    };
    let side = match side {
        Censor::Below => Censoring::Below,
        Censor::Above => Censoring::Above,
    };
    let limit = match series.transform {
        Transform::None => limit,
        Transform::Log if limit > 0.0 => limit.ln(),
        Transform::Log => {
            let reason = match side {
                Censoring::Below => format!(
                    "{name} is below {limit}, a limit that is not positive, so no value on the log scale lies below it"
                ),
                Censoring::Above => format!(
                    "{name} is above {limit}, which every positive value is: it says nothing on the log scale"
                ),
            };
            return Some(Err(reason));
        }
    };
    if limit.abs() > MAX_MAGNITUDE {
        return Some(Err(out_of_range(name, limit)));
    }
    Some(Ok(Response::Censored(side, limit)))
}

/// A measured response on the model scale.
fn measured(series: &SeriesConfig, value: f64) -> Result<Response, String> {
    let y = match series.transform {
        Transform::None => value,
        Transform::Log if value > 0.0 => value.ln(),
        Transform::Log => {
            return Err(format!(
                "{} = {value} is not positive, so its log is undefined",
                series.response
            ))
        }
    };
    if y.abs() > MAX_MAGNITUDE {
        return Err(out_of_range(&series.response, value));
    }
    Ok(Response::Measured(y))
}

/// Build the model input. A visit without the response is simply not an observation of
/// this series; a visit with the response but without a covariate or group label, with a
/// non-positive value under `log`, with a value beyond [`MAX_MAGNITUDE`], with text where
/// a number belongs, or with a censored covariate, is excluded with a reason. A censored
/// response (`<x`, `>x`, or marked by the series' qualifier column) enters the model as
/// censored at its limit; no value is substituted for it.
pub fn build(series: &SeriesConfig, rows: &[SeriesRow]) -> Result<ModelInput, InputError> {
    let mut builder = DataBuilder::new(series.covariates.clone(), series.groups.clone());
    if series.trend {
        // The documented default origin: the series' first year of data.
        let first = rows
            .iter()
            .filter(|r| r.response.is_some())
            .filter_map(|r| i32::try_from(r.year).ok())
            .min();
        if let Some(origin) = series.trend_origin.or(first) {
            builder = builder.with_trend(origin);
        }
    }
    let mut excluded = Vec::new();
    let model_err = |source| InputError::Model {
        series: series.name.clone(),
        source,
    };
    let mut covariates = Vec::with_capacity(series.covariates.len());
    let mut labels: Vec<&str> = Vec::with_capacity(series.groups.len());
    for row in rows {
        let Some(y) = response(series, row) else {
            continue;
        };
        let exclude = |reason: String| Exclusion {
            site: row.site.clone(),
            year: row.year,
            visit: row.visit.clone(),
            reason,
        };
        let y = match y {
            Ok(y) => y,
            Err(reason) => {
                excluded.push(exclude(reason));
                continue;
            }
        };
        covariates.clear();
        let mut missing = None;
        for (name, v) in series.covariates.iter().zip(&row.covariates) {
            match v {
                Some(StoredValue::Number(v)) if v.abs() > MAX_MAGNITUDE => {
                    missing = Some(out_of_range(name, *v));
                    break;
                }
                Some(StoredValue::Number(v)) => covariates.push(*v),
                Some(StoredValue::Censored { side, limit }) => {
                    missing = Some(format!(
                        "covariate {name} is censored ({} {limit}); a covariate must be measured",
                        side.as_str()
                    ));
                    break;
                }
                Some(StoredValue::Text(t)) => {
                    missing = Some(format!(
                        "covariate {name} = {:?} is not a number",
                        crate::visible::visible(t)
                    ));
                    break;
                }
                None => {
                    missing = Some(format!("covariate {name} is missing"));
                    break;
                }
            }
        }
        labels.clear();
        if missing.is_none() {
            for (name, g) in series.groups.iter().zip(&row.groups) {
                match g {
                    Some(g) => labels.push(g.as_str()),
                    None => {
                        missing = Some(format!("group label {name} is missing"));
                        break;
                    }
                }
            }
        }
        if let Some(reason) = missing {
            excluded.push(exclude(reason));
            continue;
        }
        let year = i32::try_from(row.year).map_err(|_| InputError::Year {
            series: series.name.clone(),
            site: row.site.clone(),
            year: row.year,
        })?;
        match y {
            Response::Measured(y) => builder.push(&row.site, year, &labels, &covariates, y),
            Response::Censored(side, limit) => {
                builder.push_censored(&row.site, year, &labels, &covariates, side, limit)
            }
        }
        .map_err(model_err)?;
    }
    let data = builder.build().map_err(model_err)?;
    Ok(ModelInput { data, excluded })
}
