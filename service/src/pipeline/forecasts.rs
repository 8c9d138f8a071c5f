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

/// Forecast every target at the network means of the covariates (`baseline`) and under
/// each of the series' standing scenarios, new-year targets for each of the
/// `series.horizon` years after the data. Known-site rows of a
/// site last observed more than `series.known_site_max_gap` years before the
/// data-through year are left out: such a site is no longer monitored in any useful sense.
/// The thresholds are today's config (a question asked of the version, not part of it).
pub fn baseline(
    basis: &ForecastBasis,
    transform: Transform,
    series: &SeriesConfig,
) -> Result<BaselineForecasts, ModelError> {
    let through = basis.data_through_year();
    let monitored = |r: &ForecastRow| match (series.known_site_max_gap, r.last_observed_year) {
        (Some(gap), Some(last)) => i64::from(through) - i64::from(last) <= i64::from(gap),
        _ => true,
    };
    let mut scenarios_run = vec![Scenario::baseline()];
    scenarios_run.extend(series.scenarios.iter().map(|c| model_scenario(c, basis)));
    let mut rows = Vec::new();
    let mut exceedance_rows = Vec::new();
    let mut scenarios = Vec::new();
    for scenario in &scenarios_run {
        let mut these = forecast_to(basis, transform, scenario, series.horizon);
        these.retain(monitored);
        if !series.thresholds.is_empty() {
            exceedance_rows.extend(exceedance(
                basis,
                transform,
                scenario,
                &these,
                &series.thresholds,
            )?);
        }
        // coef_names[0] is the intercept; the covariates follow in the order of their
        // means. The trend has no single value: each row is at its own year. A shifted
        // covariate is recorded at the network mean plus its shift.
        for (j, (name, mean)) in basis
            .coef_names
            .iter()
            .skip(1)
            .zip(&basis.covariate_means)
            .enumerate()
        {
            if basis.trend_origin.is_some() && name.as_str() == tidemark_model::TREND {
                continue;
            }
            let value = scenario
                .covariates
                .get(j)
                .copied()
                .flatten()
                .unwrap_or(*mean)
                + scenario.shifts.get(j).copied().unwrap_or(0.0);
            scenarios.push(ScenarioValue {
                scenario: scenario.name.clone(),
                covariate: name.clone(),
                value,
            });
        }
        rows.extend(these);
    }
    let exceedance = exceedance_rows;
    Ok(BaselineForecasts {
        rows,
        scenarios,
        thresholds: series.thresholds.clone(),
        exceedance,
    })
}

/// A configured scenario as the model takes it: per covariate of the version (in the
/// order of its coefficients, which a `forecast` after a config change may not share with
/// the config) the value it sets and the amount it shifts.
fn model_scenario(c: &crate::config::ScenarioConfig, basis: &ForecastBasis) -> Scenario {
    let covariates = &basis.coef_names[1..];
    Scenario {
        name: c.name.clone(),
        covariates: covariates
            .iter()
            .map(|name| c.set.get(name).copied())
            .collect(),
        shifts: covariates
            .iter()
            .map(|name| c.shift.get(name).copied().unwrap_or(0.0))
            .collect(),
    }
}
