//! The forecast set a version publishes: the model's baseline rows, trimmed to the sites
//! the config still counts as monitored, and the covariate values behind the scenario.
//! Shared by a refit and by `tidemark forecast`, so both write the same thing.

use tidemark_model::{forecast_baseline, ForecastBasis, ForecastRow, Transform};

use crate::config::SeriesConfig;
use crate::store::ScenarioValue;

/// The baseline forecasts of a version and the covariate values of its scenario.
pub struct BaselineForecasts {
    pub rows: Vec<ForecastRow>,
    pub scenarios: Vec<ScenarioValue>,
}

impl BaselineForecasts {
    pub fn set(&self) -> crate::store::ForecastSet<'_> {
        crate::store::ForecastSet {
            rows: &self.rows,
            scenarios: &self.scenarios,
        }
    }
}

/// Forecast every target at the network means of the covariates. Known-site rows of a
/// site last observed more than `series.known_site_max_gap` years before the
/// data-through year are left out: such a site is no longer monitored in any useful sense.
pub fn baseline(
    basis: &ForecastBasis,
    transform: Transform,
    series: &SeriesConfig,
) -> BaselineForecasts {
    let through = basis.data_through_year();
    let mut rows = forecast_baseline(basis, transform);
    if let Some(gap) = series.known_site_max_gap {
        rows.retain(|r| match r.last_observed_year {
            Some(last) => i64::from(through) - i64::from(last) <= i64::from(gap),
            None => true,
        });
    }
    // coef_names[0] is the intercept; the covariates follow in the order of their means.
    let scenarios = basis
        .coef_names
        .iter()
        .skip(1)
        .zip(&basis.covariate_means)
        .map(|(name, mean)| ScenarioValue {
            scenario: "baseline".into(),
            covariate: name.clone(),
            value: *mean,
        })
        .collect();
    BaselineForecasts { rows, scenarios }
}
