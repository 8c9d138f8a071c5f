-- Tidemark schema, version 11: series may name their own site, year and visit columns.
--
-- Observations stay keyed by (site, year, visit, column): site codes are one namespace
-- across every key set, so no stored value is re-keyed by this migration. Each ingested
-- batch records the key columns its file was read with (README, "Feed files"); NULL on
-- batches ingested before this migration, when every series shared one key set.
ALTER TABLE ingest_batches ADD COLUMN site_column TEXT;
ALTER TABLE ingest_batches ADD COLUMN year_column TEXT;
ALTER TABLE ingest_batches ADD COLUMN visit_column TEXT;
