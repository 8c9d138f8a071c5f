//! From stored rows to the model's input: the transform, and the rows a series cannot use,
//! each with its reason (they are recorded with the fit, never silently dropped).

use tidemark_model::{Data, DataBuilder, ModelError, MAX_MAGNITUDE};

use crate::config::{SeriesConfig, Transform};
use crate::store::SeriesRow;

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

/// Build the model input. A visit without the response is simply not an observation of
/// this series; a visit with the response but without a covariate or group label, or with
/// a non-positive value under `log`, or with a value beyond [`MAX_MAGNITUDE`], is excluded
/// with a reason.
pub fn build(series: &SeriesConfig, rows: &[SeriesRow]) -> Result<ModelInput, InputError> {
    let mut builder = DataBuilder::new(series.covariates.clone(), series.groups.clone());
    let mut excluded = Vec::new();
    let model_err = |source| InputError::Model {
        series: series.name.clone(),
        source,
    };
    let mut covariates = Vec::with_capacity(series.covariates.len());
    let mut labels: Vec<&str> = Vec::with_capacity(series.groups.len());
    for row in rows {
        let Some(value) = row.response else { continue };
        let exclude = |reason: String| Exclusion {
            site: row.site.clone(),
            year: row.year,
            visit: row.visit.clone(),
            reason,
        };
        let y = match series.transform {
            Transform::None => value,
            Transform::Log if value > 0.0 => value.ln(),
            Transform::Log => {
                excluded.push(exclude(format!(
                    "{} = {value} is not positive, so its log is undefined",
                    series.response
                )));
                continue;
            }
        };
        if y.abs() > MAX_MAGNITUDE {
            excluded.push(exclude(out_of_range(&series.response, value)));
            continue;
        }
        covariates.clear();
        let mut missing = None;
        for (name, v) in series.covariates.iter().zip(&row.covariates) {
            match v {
                Some(v) if v.abs() > MAX_MAGNITUDE => {
                    missing = Some(out_of_range(name, *v));
                    break;
                }
                Some(v) => covariates.push(*v),
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
        builder
            .push(&row.site, year, &labels, &covariates, y)
            .map_err(model_err)?;
    }
    let data = builder.build().map_err(model_err)?;
    Ok(ModelInput { data, excluded })
}
