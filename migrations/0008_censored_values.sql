-- Censored values (README, "Feed files"): a value known only to lie below (`<x`) or
-- above (`>x`) a limit keeps the limit in num_value and its side here. NULL for every
-- value that was measured, so rows stored before this migration keep their meaning.
ALTER TABLE observations ADD COLUMN censoring TEXT
    CHECK (censoring IS NULL OR (censoring IN ('below', 'above') AND num_value IS NOT NULL));

-- The side is part of the value's history like the number itself.
DROP TRIGGER observations_keep_history_update;
CREATE TRIGGER observations_keep_history_update
BEFORE UPDATE OF value_id, batch_id, site_id, year, visit, column_name, num_value, text_value, line, censoring
ON observations
BEGIN
    SELECT RAISE(ABORT, 'observations are history and cannot be changed');
END;

DROP VIEW current_observations;
CREATE VIEW current_observations AS
SELECT o.value_id, s.code AS site, o.year, o.visit, o.column_name, o.num_value,
       o.censoring, o.text_value, o.batch_id, o.line
FROM observations o
JOIN sites s ON s.site_id = o.site_id
WHERE o.superseded_by IS NULL;

-- How many of a fit's observations were censored (NULL for fits made before this
-- migration, which had none).
ALTER TABLE fits ADD COLUMN n_censored INTEGER;
