-- Tidemark schema, version 6: forecast rows say which of their uncertainty is assumed.
--
-- * `forecasts.prior_only`: the variance components of the parts a row does not know
--   whose factor was observed at a single level (`year` on new-year rows of a network
--   with one year of data; `site` on new-site rows with one site; a grouping factor with
--   one level on every row), comma-separated; NULL when every such component was
--   estimated. Those components' posterior is their prior, so the row's interval width
--   from them is assumed, not learned. NULL as well on versions published before this
--   migration, which did not record it (their fit's message names single-level factors).
-- * `latest_forecasts` carries the column, after the shares.

ALTER TABLE forecasts ADD COLUMN prior_only TEXT;

DROP VIEW latest_forecasts;
CREATE VIEW latest_forecasts AS
SELECT lf.series, fc.fit_id, fc.target, fc.site, fc.year, fc.scenario,
       (SELECT json_group_object(s.covariate, s.value) FROM forecast_scenarios s
        WHERE s.fit_id = fc.fit_id AND s.scenario = fc.scenario) AS scenario_covariates,
       fc.last_observed_year, fc.mean, fc.sd,
       fc.q025, fc.q10, fc.q25, fc.q50, fc.q75, fc.q90, fc.q975,
       fc.share_site, fc.share_year, fc.share_groups, fc.share_residual, fc.share_estimation,
       fc.prior_only
FROM latest_fits lf
JOIN forecasts fc ON fc.fit_id = lf.fit_id;
