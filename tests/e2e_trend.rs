//! A series with a network trend and a forecast horizon, end to end: the trend is
//! published per year, per decade and as percent per year (log scale), new-year targets
//! cover each year of the horizon, and `tidemark forecast` rebuilds the same rows from
//! the stored draws. Invented data (a generated network with a trend added).

mod common;

use common::{line_for, network_rows, ConfigBuilder, Network, Sampler, CHLOROPHYLL};

fn config(extra: &str) -> String {
    ConfigBuilder::new()
        .series(&format!("{CHLOROPHYLL}{extra}"))
        .sampler(Sampler::default())
        .build()
}

/// The test network's chlorophyll with 2% more per year from 2001 on, and the ordinary
/// least-squares slope of its yearly mean log values (an estimate made outside the
/// model: the posterior trend sits near it, since year effects absorb the rest).
fn feed() -> (String, f64) {
    let mut rows = network_rows(25, 8);
    for r in &mut rows {
        r.4 *= (0.02 * f64::from(r.1 - 2001)).exp();
    }
    let mut by_year = std::collections::BTreeMap::<i32, (f64, f64)>::new();
    for r in &rows {
        let e = by_year.entry(r.1).or_default();
        e.0 += r.4.ln();
        e.1 += 1.0;
    }
    let points: Vec<(f64, f64)> = by_year
        .iter()
        .map(|(&y, &(sum, n))| (f64::from(y), sum / n))
        .collect();
    let k = points.len() as f64;
    let (tx, ty) = points
        .iter()
        .fold((0.0, 0.0), |a, p| (a.0 + p.0, a.1 + p.1));
    let (mx, my) = (tx / k, ty / k);
    let sxy: f64 = points.iter().map(|p| (p.0 - mx) * (p.1 - my)).sum();
    let sxx: f64 = points.iter().map(|p| (p.0 - mx).powi(2)).sum();
    (common::csv(&rows), sxy / sxx)
}

#[test]
fn a_trend_is_published_per_year_per_decade_and_in_percent_with_a_horizon() {
    let net = Network::with_config(&config("trend = true\ntrend_origin = 2001\nhorizon = 3\n"));
    net.ok(&["init"]);
    let (feed, ols_slope) = feed();
    net.drop_file("seasons.csv", feed);
    let out = net.ok(&["ingest"]);
    assert!(
        line_for(&out, "seasons.csv").ends_with(", 0 rejected"),
        "{out}"
    );
    let out = net.ok(&["refit"]);
    assert!(out.contains("published version 1"), "{out}");

    let trend = net.sql(
        "SELECT term, q05, q50, q95 FROM posterior_summary WHERE kind = 'trend' ORDER BY term",
    );
    let terms: Vec<&str> = trend.iter().map(|r| r[0].text()).collect();
    assert_eq!(terms, ["per_decade", "per_year", "percent_per_year"]);
    let (decade, year, percent) = (&trend[0], &trend[1], &trend[2]);
    // The slope of the yearly means lies in the 90% interval. (The generated 0.02 need
    // not: with 8 years the realised year effects carry a slope of their own, which the
    // interval accounts for through the year sd.)
    assert!(
        year[1].real() < ols_slope && ols_slope < year[3].real(),
        "{year:?} vs {ols_slope}"
    );
    for k in 1..4 {
        // Quantiles of monotone transforms of the same draws (up to the interpolation
        // between neighbouring draws, linear in the draws' own scale).
        assert!((decade[k].real() - 10.0 * year[k].real()).abs() < 1e-9);
        assert!((percent[k].real() - 100.0 * year[k].real().exp_m1()).abs() < 1e-4);
    }
    let coef =
        net.scalar("SELECT q50 FROM posterior_summary WHERE kind = 'coef' AND term = 'trend'");
    assert_eq!(coef.real(), year[2].real());

    // New-year targets for 2009, 2010 and 2011; a new site's interval widens each year.
    assert_eq!(
        net.sqlite3(
            "SELECT target, year, COUNT(*) FROM latest_forecasts
             WHERE target IN ('known_site_new_year', 'new_site_new_year')
             GROUP BY target, year ORDER BY target, year"
        ),
        "known_site_new_year|2009|25\nknown_site_new_year|2010|25\nknown_site_new_year|2011|25\n\
         new_site_new_year|2009|1\nnew_site_new_year|2010|1\nnew_site_new_year|2011|1\n"
    );
    let widths: Vec<f64> = net
        .sql("SELECT q975 / q025 FROM latest_forecasts WHERE target = 'new_site_new_year' ORDER BY year")
        .iter()
        .map(|r| r[0].real())
        .collect();
    assert!(widths.windows(2).all(|w| w[1] > w[0]), "{widths:?}");
    // The baseline scenario lists the covariate, not the trend (each row has its year).
    assert_eq!(
        net.sqlite3("SELECT covariate FROM forecast_scenarios"),
        "surface_temp_c\n"
    );

    // `forecast` rebuilds the rows from the stored draws, trend origin included.
    let rows = "SELECT target, COALESCE(site, ''), year, q025, q50, q975 FROM latest_forecasts
                ORDER BY target, site, year";
    let before = net.sql(rows);
    net.ok(&["forecast"]);
    assert_eq!(net.sql(rows), before);
}

#[test]
fn trend_settings_are_checked() {
    let net = Network::with_config(&config("trend_origin = 2001\n"));
    let out = net.tidemark(&["init"]);
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("trend_origin") && err.contains("trend = true"),
        "{err}"
    );
    let net = Network::with_config(&config("horizon = 0\n"));
    let err = String::from_utf8_lossy(&net.tidemark(&["init"]).stderr).to_string();
    assert!(
        err.contains("horizon: must be 1 to 50 years, found 0"),
        "{err}"
    );
}

/// Standing scenarios are forecast beside the baseline, each with its covariate values
/// recorded and its own exceedance; a shift of zero would repeat the baseline, so a
/// scenario must set or shift something.
#[test]
fn standing_scenarios_are_forecast_beside_the_baseline() {
    let scenarios = "thresholds = [3.0]\n\n\
        [[series.scenarios]]\nname = \"warm\"\nshift = { surface_temp_c = 3.0 }\n\n\
        [[series.scenarios]]\nname = \"hot lake\"\nset = { surface_temp_c = 26.5 }\n";
    let toml = ConfigBuilder::new()
        .series(&format!("{CHLOROPHYLL}horizon = 2\n"))
        .sampler(Sampler::default())
        .build()
        .replace("horizon = 2\n", &format!("horizon = 2\n{scenarios}"));
    let net = Network::with_config(&toml);
    net.ok(&["init"]);
    net.drop_file("seasons.csv", feed().0);
    net.ok(&["ingest"]);
    let out = net.ok(&["refit"]);
    assert!(out.contains("published version 1"), "{out}");
    let counts = net.sqlite3(
        "SELECT scenario, COUNT(*) FROM latest_forecasts GROUP BY scenario ORDER BY scenario",
    );
    let lines: Vec<&str> = counts.lines().collect();
    assert_eq!(lines.len(), 3, "{counts}");
    let n: Vec<&str> = lines.iter().map(|l| l.split('|').nth(1).unwrap()).collect();
    assert!(n.iter().all(|c| *c == n[0]), "{counts}");
    let mean = net
        .scalar("SELECT value FROM forecast_scenarios WHERE scenario = 'baseline'")
        .real();
    let warm = net
        .scalar("SELECT value FROM forecast_scenarios WHERE scenario = 'warm'")
        .real();
    assert!((warm - mean - 3.0).abs() < 1e-9, "{warm} vs {mean}");
    assert_eq!(
        net.sqlite3(
            "SELECT DISTINCT scenario_covariates FROM latest_forecasts WHERE scenario = 'hot lake'"
        ),
        "{\"surface_temp_c\":26.5}\n"
    );
    // Every row of every scenario has its exceedance, consistent with its own quantiles.
    assert_eq!(
        net.scalar(
            "SELECT COUNT(*) FROM latest_forecasts f LEFT JOIN forecast_exceedance e USING (forecast_id)
             WHERE e.probability IS NULL"
        )
        .int(),
        0
    );
    // The probability of exceeding 3 is on the side of one half that the row's own median
    // says, and beyond 0.975 (0.025) when its 95% interval lies above (below) 3: each
    // scenario's exceedance is computed at that scenario's covariates.
    let inconsistent = net.scalar(
        "SELECT COUNT(*) FROM latest_forecasts f JOIN forecast_exceedance e USING (forecast_id)
         WHERE (f.q50 > 3.0 AND e.probability < 0.5) OR (f.q50 < 3.0 AND e.probability > 0.5)
            OR (f.q025 > 3.0 AND e.probability < 0.975) OR (f.q975 < 3.0 AND e.probability > 0.025)",
    );
    assert_eq!(inconsistent.int(), 0);
    // Scenarios are checked at start-up.
    for (bad, says) in [
        (
            "[[series.scenarios]]\nname = \"baseline\"\nshift = { surface_temp_c = 1.0 }\n",
            "other than \"baseline\"",
        ),
        (
            "[[series.scenarios]]\nname = \"x\"\n",
            "repeat the baseline",
        ),
        (
            "[[series.scenarios]]\nname = \"x\"\nset = { depth = 1.0 }\n",
            "not a covariate",
        ),
    ] {
        let toml = ConfigBuilder::new()
            .series(&format!("{CHLOROPHYLL}\n{bad}"))
            .build();
        let net = Network::with_config(&toml);
        let err = String::from_utf8_lossy(&net.tidemark(&["init"]).stderr).to_string();
        assert!(err.contains(says), "{err}");
    }
}
