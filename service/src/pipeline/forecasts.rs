//! The forecast set a version publishes: the model's baseline rows, trimmed to the sites
//! the config still counts as monitored, the covariate values behind the scenario, and
//! each row's probability of exceeding each of the series' thresholds. Shared by a refit
//! and by `tidemark forecast`, so both write the same thing.

use tidemark_model::{
    exceedance, forecast_to, ForecastBasis, ForecastRow, ModelError, Scenario, Transform,
};

use crate::config::SeriesConfig;
use crate::store::ScenarioValue;

/// The baseline forecasts of a version and the covariate values of its scenario.
#[derive(Default)]
pub struct BaselineForecasts {
    pub rows: Vec<ForecastRow>,
    pub scenarios: Vec<ScenarioValue>,
    /// The series' thresholds (response scale), ascending.
    pub thresholds: Vec<f64>,
    /// `exceedance[i][k]`: the probability that the value of `rows[i]` exceeds
    /// `thresholds[k]` (empty without thresholds).
    pub exceedance: Vec<Vec<f64>>,
}

impl BaselineForecasts {
    pub fn set(&self) -> crate::store::ForecastSet<'_> {
        crate::store::ForecastSet {
            rows: &self.rows,
            scenarios: &self.scenarios,
            thresholds: &self.thresholds,
            exceedance: &self.exceedance,
        }
    }
}

/// Forecast every target at the network means of the covariates, new-year targets for
/// each of the `series.horizon` years after the data. Known-site rows of a
/// site last observed more than `series.known_site_max_gap` years before the
/// data-through year are left out: such a site is no longer monitored in any useful sense.
/// The thresholds are today's config (a question asked of the version, not part of it).
pub fn baseline(
    basis: &ForecastBasis,
    transform: Transform,
    series: &SeriesConfig,
) -> Result<BaselineForecasts, ModelError> {
    let through = basis.data_through_year();
    let mut rows = forecast_to(basis, transform, &Scenario::baseline(), series.horizon);
    if let Some(gap) = series.known_site_max_gap {
        rows.retain(|r| match r.last_observed_year {
            Some(last) => i64::from(through) - i64::from(last) <= i64::from(gap),
            None => true,
        });
    }
    // coef_names[0] is the intercept; the covariates follow in the order of their means.
    // The trend has no single value: each row is at its own year.
    let scenarios = basis
        .coef_names
        .iter()
        .skip(1)
        .zip(&basis.covariate_means)
        .filter(|(name, _)| basis.trend_origin.is_none() || name.as_str() != tidemark_model::TREND)
        .map(|(name, mean)| ScenarioValue {
            scenario: "baseline".into(),
            covariate: name.clone(),
            value: *mean,
        })
        .collect();
    let exceedance = if series.thresholds.is_empty() {
        Vec::new()
    } else {
        exceedance(
            basis,
            transform,
            &Scenario::baseline(),
            &rows,
            &series.thresholds,
        )?
    };
    Ok(BaselineForecasts {
        rows,
        scenarios,
        thresholds: series.thresholds.clone(),
        exceedance,
    })
}
