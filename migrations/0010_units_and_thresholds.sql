-- Tidemark schema, version 10: units and thresholds (README, "Thresholds").
--
-- * `fits.unit`: the unit of the response the version was fitted with (`series.unit`,
--   e.g. 'µg/L'); NULL when the config names none, and on versions published before this
--   migration.
-- * `forecasts` is rebuilt with a key, `forecast_id` (the rows keep their order and get
--   ids in it; AUTOINCREMENT: an id is never reused, also not after `tidemark forecast`
--   replaced a version's rows), and `scale`: the scale of the row's `mean`, `sd` and
--   quantiles, 'response' (the response's own, in `fits.unit`; a log series' quantiles
--   are back-transformed) or 'model' (after the transform). Every row Tidemark has
--   written is on the response scale, so the old rows are 'response'. The `share_*`
--   columns are fractions of the model-scale variance, without a unit.
-- * `forecast_exceedance`: per forecast row and threshold of the series
--   (`series.thresholds`, response scale, in the series' unit) the posterior predictive
--   probability that the value exceeds the threshold.
-- * The forecast tables of a published fit (`forecasts`, `forecast_scenarios`,
--   `forecast_exceedance`) cannot be updated, and can be deleted only while the fit is
--   the latest published version of its series: `tidemark forecast` replaces those rows
--   (delete, then insert); an older version's forecasts stay as they were published.
-- * `latest_forecasts` carries `forecast_id`, `unit` and `scale` (after `prior_only`);
--   `latest_exceedance` joins the probabilities to it.
-- * `variance_drift` carries `unit` (the version's) and `scale` ('model' on `sd` rows:
--   standard deviations are on the model scale, for a log series in natural-log units of
--   the response; NULL on `share` rows, which are fractions).

ALTER TABLE fits ADD COLUMN unit TEXT;

DROP VIEW latest_forecasts;

CREATE TABLE forecasts_v10 (
    forecast_id        INTEGER PRIMARY KEY AUTOINCREMENT,
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
    share_estimation   REAL,
    prior_only         TEXT,
    scale              TEXT    NOT NULL DEFAULT 'response' CHECK (scale IN ('response', 'model'))
);
INSERT INTO forecasts_v10 (forecast_id, fit_id, target, site, year, scenario, last_observed_year,
                           mean, sd, q025, q10, q25, q50, q75, q90, q975,
                           share_site, share_year, share_groups, share_residual, share_estimation,
                           prior_only, scale)
SELECT rowid, fit_id, target, site, year, scenario, last_observed_year,
       mean, sd, q025, q10, q25, q50, q75, q90, q975,
       share_site, share_year, share_groups, share_residual, share_estimation,
       prior_only, 'response'
FROM forecasts ORDER BY rowid;
DROP TABLE forecasts;
ALTER TABLE forecasts_v10 RENAME TO forecasts;
CREATE INDEX forecasts_fit ON forecasts (fit_id, target, site, year);

CREATE TABLE forecast_exceedance (
    forecast_id INTEGER NOT NULL REFERENCES forecasts (forecast_id),
    threshold   REAL    NOT NULL,           -- response scale, in the series' unit
    probability REAL CHECK (probability IS NULL OR (probability >= 0 AND probability <= 1)),
    PRIMARY KEY (forecast_id, threshold)
) WITHOUT ROWID;

-- Whether fit `id` is published and not the latest published version of its series is
-- spelt out in each trigger (SQLite has no stored functions).
CREATE TRIGGER forecasts_published_no_update
BEFORE UPDATE ON forecasts
WHEN (SELECT status FROM fits WHERE fit_id = OLD.fit_id) = 'published'
BEGIN
    SELECT RAISE(ABORT, 'the forecasts of a published fit are immutable');
END;
CREATE TRIGGER forecasts_published_no_delete
BEFORE DELETE ON forecasts
WHEN (SELECT status FROM fits WHERE fit_id = OLD.fit_id) = 'published'
 AND OLD.fit_id IS NOT (SELECT g.fit_id FROM fits f
                        JOIN fits g ON g.series = f.series AND g.status = 'published'
                        WHERE f.fit_id = OLD.fit_id ORDER BY g.version DESC LIMIT 1)
BEGIN
    SELECT RAISE(ABORT, 'the forecasts of a published fit are immutable once a newer version is published');
END;
CREATE TRIGGER forecast_scenarios_published_no_update
BEFORE UPDATE ON forecast_scenarios
WHEN (SELECT status FROM fits WHERE fit_id = OLD.fit_id) = 'published'
BEGIN
    SELECT RAISE(ABORT, 'the forecasts of a published fit are immutable');
END;
CREATE TRIGGER forecast_scenarios_published_no_delete
BEFORE DELETE ON forecast_scenarios
WHEN (SELECT status FROM fits WHERE fit_id = OLD.fit_id) = 'published'
 AND OLD.fit_id IS NOT (SELECT g.fit_id FROM fits f
                        JOIN fits g ON g.series = f.series AND g.status = 'published'
                        WHERE f.fit_id = OLD.fit_id ORDER BY g.version DESC LIMIT 1)
BEGIN
    SELECT RAISE(ABORT, 'the forecasts of a published fit are immutable once a newer version is published');
END;
CREATE TRIGGER forecast_exceedance_published_no_update
BEFORE UPDATE ON forecast_exceedance
WHEN (SELECT f.status FROM forecasts fc JOIN fits f ON f.fit_id = fc.fit_id
      WHERE fc.forecast_id = OLD.forecast_id) = 'published'
BEGIN
    SELECT RAISE(ABORT, 'the exceedance probabilities of a published fit are immutable');
END;
CREATE TRIGGER forecast_exceedance_published_no_delete
BEFORE DELETE ON forecast_exceedance
WHEN (SELECT f.status FROM forecasts fc JOIN fits f ON f.fit_id = fc.fit_id
      WHERE fc.forecast_id = OLD.forecast_id) = 'published'
 AND (SELECT fc.fit_id FROM forecasts fc WHERE fc.forecast_id = OLD.forecast_id)
     IS NOT (SELECT g.fit_id FROM forecasts fc
             JOIN fits f ON f.fit_id = fc.fit_id
             JOIN fits g ON g.series = f.series AND g.status = 'published'
             WHERE fc.forecast_id = OLD.forecast_id ORDER BY g.version DESC LIMIT 1)
BEGIN
    SELECT RAISE(ABORT, 'the exceedance probabilities of a published fit are immutable once a newer version is published');
END;

CREATE VIEW latest_forecasts AS
SELECT lf.series, fc.fit_id, fc.target, fc.site, fc.year, fc.scenario,
       (SELECT json_group_object(s.covariate, s.value) FROM forecast_scenarios s
        WHERE s.fit_id = fc.fit_id AND s.scenario = fc.scenario) AS scenario_covariates,
       fc.last_observed_year, fc.mean, fc.sd,
       fc.q025, fc.q10, fc.q25, fc.q50, fc.q75, fc.q90, fc.q975,
       fc.share_site, fc.share_year, fc.share_groups, fc.share_residual, fc.share_estimation,
       fc.prior_only, fc.forecast_id, lf.unit, fc.scale
FROM latest_fits lf
JOIN forecasts fc ON fc.fit_id = lf.fit_id;

CREATE VIEW latest_exceedance AS
SELECT lf.series, lf.fit_id, lf.forecast_id, lf.target, lf.site, lf.year, lf.scenario,
       lf.unit, e.threshold, e.probability
FROM latest_forecasts lf
JOIN forecast_exceedance e ON e.forecast_id = lf.forecast_id;

DROP VIEW variance_drift;
CREATE VIEW variance_drift AS
WITH rows AS (
    SELECT f.series, f.version, f.fit_id, f.data_through_year, f.unit, p.kind, p.term,
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
       CASE WHEN previous_version = version - 1 AND q05 IS NOT NULL AND q95 IS NOT NULL
                 AND (lag_q50 < q05 OR lag_q50 > q95)
            THEN 1 ELSE 0 END AS flagged,
       unit,
       CASE WHEN kind = 'sd' THEN 'model' END AS scale
FROM rows
ORDER BY series, version, kind, term;
