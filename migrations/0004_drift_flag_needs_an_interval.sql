-- Tidemark schema, version 4: a quantity whose 90% interval is unknown (a NULL q05 or
-- q95) is never flagged in `variance_drift`, as in `tidemark drift` (version 2's view
-- flagged it when only one bound excluded the previous median).

DROP VIEW variance_drift;

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
       CASE WHEN previous_version = version - 1 AND q05 IS NOT NULL AND q95 IS NOT NULL
                 AND (lag_q50 < q05 OR lag_q50 > q95)
            THEN 1 ELSE 0 END AS flagged
FROM rows
ORDER BY series, version, kind, term;
