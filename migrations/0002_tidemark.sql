-- Tidemark schema, version 2: the project's own labels, and what a forecast row needs to
-- be read on its own.
--
-- Migration 1 keeps its original text (its checksum is recorded in every database made
-- by the first release); this one carries that release's data across:
-- * forecast intervals are named by the quantile they are (q025 … q975, as in
--   posterior_summary) instead of lower/upper bounds per interval width;
-- * each known-site forecast row says the last year the site was observed
--   (`last_observed_year`; NULL for new-site rows and for versions published before
--   this migration, which did not record it);
-- * `forecast_scenarios` holds the covariate values behind each scenario (none for
--   versions published before this migration);
-- * `variance_drift` carries what `tidemark drift` shows: sds and shares, the change of
--   the median from the previous published version, and the screening flag.
--
-- `forecasts` is rebuilt (nothing refers to it) so its columns read in quantile order.

DROP VIEW latest_forecasts;
DROP VIEW variance_drift;

CREATE TABLE forecasts_v2 (
    fit_id             INTEGER NOT NULL REFERENCES fits (fit_id),
    target             TEXT    NOT NULL CHECK (target IN ('known_site_known_year', 'known_site_new_year',
                                                          'new_site_known_year', 'new_site_new_year')),
    site               TEXT,                -- NULL for new-site targets
    year               INTEGER NOT NULL,
    scenario           TEXT,
    last_observed_year INTEGER,             -- the site's last observed year (known-site rows)
    mean               REAL,
    sd                 REAL,
    q025               REAL,
    q10                REAL,
    q25                REAL,
    q50                REAL,
    q75                REAL,
    q90                REAL,
    q975               REAL,
    share_site         REAL,
    share_year         REAL,
    share_groups       REAL,
    share_residual     REAL,
    share_estimation   REAL
);
INSERT INTO forecasts_v2 (fit_id, target, site, year, scenario, last_observed_year, mean, sd,
                          q025, q10, q25, q50, q75, q90, q975,
                          share_site, share_year, share_groups, share_residual, share_estimation)
SELECT fit_id, target, site, year, scenario, NULL, mean, sd,
       lo95, lo80, lo50, q50, hi50, hi80, hi95,
       share_site, share_year, share_groups, share_residual, share_estimation
FROM forecasts;
DROP TABLE forecasts;
ALTER TABLE forecasts_v2 RENAME TO forecasts;
CREATE INDEX forecasts_fit ON forecasts (fit_id, target, site, year);

-- The covariate values a scenario holds fixed, in the covariate's own units
-- (`baseline`: the network mean of each covariate over the fitted visits).
CREATE TABLE forecast_scenarios (
    fit_id    INTEGER NOT NULL REFERENCES fits (fit_id),
    scenario  TEXT    NOT NULL,
    covariate TEXT    NOT NULL,
    value     REAL    NOT NULL,
    PRIMARY KEY (fit_id, scenario, covariate)
);

CREATE VIEW latest_forecasts AS
SELECT lf.series, fc.fit_id, fc.target, fc.site, fc.year, fc.scenario,
       (SELECT json_group_object(s.covariate, s.value) FROM forecast_scenarios s
        WHERE s.fit_id = fc.fit_id AND s.scenario = fc.scenario) AS scenario_covariates,
       fc.last_observed_year, fc.mean, fc.sd,
       fc.q025, fc.q10, fc.q25, fc.q50, fc.q75, fc.q90, fc.q975,
       fc.share_site, fc.share_year, fc.share_groups, fc.share_residual, fc.share_estimation
FROM latest_fits lf
JOIN forecasts fc ON fc.fit_id = lf.fit_id;

-- Standard deviations and variance shares of every published version, in version order,
-- each with the change of its median from the previous published version and the
-- screening flag (its 90% interval [q05, q95] excludes that median; a median on a bound
-- counts as inside; a quantity the previous version did not have is not compared).
CREATE VIEW variance_drift AS
WITH rows AS (
    SELECT f.series, f.version, f.fit_id, f.data_through_year, p.kind, p.term,
           p.q05, p.q50, p.q95,
           LAG(f.version) OVER w AS previous_version,
           LAG(p.q50) OVER w AS lag_q50
    FROM fits f
    JOIN posterior_summary p ON p.fit_id = f.fit_id AND p.kind IN ('sd', 'share')
    WHERE f.status = 'published'
    WINDOW w AS (PARTITION BY f.series, p.kind, p.term ORDER BY f.version)
)
SELECT series, version, fit_id, data_through_year, kind, term, q05, q50, q95,
       CASE WHEN previous_version = version - 1 THEN lag_q50 END AS previous_q50,
       CASE WHEN previous_version = version - 1 THEN q50 - lag_q50 END AS change,
       CASE WHEN previous_version = version - 1 AND (lag_q50 < q05 OR lag_q50 > q95)
            THEN 1 ELSE 0 END AS flagged
FROM rows
ORDER BY series, version, kind, term;
