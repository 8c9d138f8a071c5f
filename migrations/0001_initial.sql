-- Vigil schema, version 1.
--
-- Read this file, not the code, to learn the schema. Timestamps are RFC 3339 text in UTC
-- (e.g. 2026-03-01T02:30:00Z). Tables and columns named in DESIGN.md §4.4 are a contract
-- with outside readers: keep them; add new columns and tables in new migrations.

-- One row per file handed to `vigil ingest`, whatever became of it.
CREATE TABLE ingest_batches (
    batch_id           INTEGER PRIMARY KEY,
    source             TEXT    NOT NULL,              -- file name as it arrived
    sha256             TEXT    NOT NULL,              -- hex digest of the file's bytes
    received_at        TEXT    NOT NULL,
    rows_read          INTEGER NOT NULL DEFAULT 0,    -- data rows (not the header)
    values_accepted    INTEGER NOT NULL DEFAULT 0,    -- distinct values taken from the file
    values_rejected    INTEGER NOT NULL DEFAULT 0,    -- = rows in `rejections` for this batch
    status             TEXT    NOT NULL CHECK (status IN ('ingested', 'duplicate', 'quarantined')),
    message            TEXT,                          -- why quarantined, what it duplicates
    format             TEXT,                          -- 'csv', 'arrow-file', 'arrow-stream'
    size_bytes         INTEGER,
    values_superseding INTEGER NOT NULL DEFAULT 0,    -- accepted values that replaced a current one
    values_unchanged   INTEGER NOT NULL DEFAULT 0,    -- accepted values equal to the current one (no new row)
    duplicate_of       INTEGER REFERENCES ingest_batches (batch_id)
);
-- A file's content is ingested at most once.
CREATE UNIQUE INDEX ingest_batches_ingested_sha256
    ON ingest_batches (sha256) WHERE status = 'ingested';

-- Every value that was not accepted, with the reason.
CREATE TABLE rejections (
    rejection_id INTEGER PRIMARY KEY,
    batch_id     INTEGER NOT NULL REFERENCES ingest_batches (batch_id),
    line         INTEGER,      -- CSV: physical line (header = 1); Arrow: 1-based row number
    column_name  TEXT,         -- NULL for a field beyond the header or a row with no usable field
    raw_value    TEXT,         -- the cell as written (NULL when there was none)
    reason       TEXT NOT NULL
);
CREATE INDEX rejections_batch ON rejections (batch_id);

-- Site codes exactly as the feed wrote them.
CREATE TABLE sites (
    site_id        INTEGER PRIMARY KEY,
    code           TEXT NOT NULL UNIQUE,
    first_batch_id INTEGER REFERENCES ingest_batches (batch_id)
);

-- Every accepted value, with its history. The current value of a
-- (site, year, visit, column) is the one with superseded_by NULL; a re-sent different
-- value adds a row and points the old one at it. A re-sent identical value adds nothing.
CREATE TABLE observations (
    value_id      INTEGER PRIMARY KEY,
    batch_id      INTEGER NOT NULL REFERENCES ingest_batches (batch_id),
    site_id       INTEGER NOT NULL REFERENCES sites (site_id),
    year          INTEGER NOT NULL,
    visit         TEXT    NOT NULL,
    column_name   TEXT    NOT NULL,
    num_value     REAL,                 -- measurement columns
    text_value    TEXT,                 -- group columns (labels)
    line          INTEGER NOT NULL,     -- where in the batch's file it came from
    superseded_by INTEGER REFERENCES observations (value_id) DEFERRABLE INITIALLY DEFERRED,
    CHECK ((num_value IS NULL) <> (text_value IS NULL))
);
CREATE UNIQUE INDEX observations_current
    ON observations (site_id, year, visit, column_name) WHERE superseded_by IS NULL;
-- Serves the deferred foreign-key check of superseded_by when successors are inserted
-- (without it each inserted successor scans the whole table).
CREATE INDEX observations_successor ON observations (superseded_by) WHERE superseded_by IS NOT NULL;

-- Accepted values are history: they may gain a successor, nothing else.
CREATE TRIGGER observations_keep_history_update
BEFORE UPDATE OF value_id, batch_id, site_id, year, visit, column_name, num_value, text_value, line
ON observations
BEGIN
    SELECT RAISE(ABORT, 'observations are history and cannot be changed');
END;
CREATE TRIGGER observations_successor_is_final
BEFORE UPDATE OF superseded_by ON observations WHEN OLD.superseded_by IS NOT NULL
BEGIN
    SELECT RAISE(ABORT, 'a superseded observation keeps its successor');
END;
CREATE TRIGGER observations_keep_history_delete
BEFORE DELETE ON observations
BEGIN
    SELECT RAISE(ABORT, 'observations are history and cannot be deleted');
END;

-- Largest value id stored per column, kept by ingest in the batch transaction, so a
-- series' watermark is read without scanning observations.
CREATE TABLE column_watermarks (
    column_name  TEXT PRIMARY KEY,
    max_value_id INTEGER NOT NULL
) WITHOUT ROWID;

CREATE VIEW current_observations AS
SELECT o.value_id, s.code AS site, o.year, o.visit, o.column_name, o.num_value,
       o.text_value, o.batch_id, o.line
FROM observations o
JOIN sites s ON s.site_id = o.site_id
WHERE o.superseded_by IS NULL;

-- Scheduled or manual runs of the pipeline.
-- trigger: 'schedule' (a tick of `serve`), 'catch-up' (`serve` at start, for a tick missed
-- while it was down), 'manual' (`run-once`), 'demo'.
-- status: 'running' until it ends; 'succeeded'; 'partial' (a file or series had a
-- problem); 'failed' (the run itself failed); 'abandoned' (stopped by a shutdown request,
-- or found still 'running' after its process died); 'skipped' (a tick of `serve` that
-- came while the previous run was still going: no work was done, the message says why).
CREATE TABLE runs (
    run_id      INTEGER PRIMARY KEY,
    trigger     TEXT NOT NULL,
    started_at  TEXT NOT NULL,
    finished_at TEXT,
    status      TEXT NOT NULL CHECK (status IN ('running', 'succeeded', 'partial', 'failed', 'abandoned', 'skipped')),
    message     TEXT
);

-- One fit attempt of one series. Published rows are immutable (see triggers below).
CREATE TABLE fits (
    fit_id            INTEGER PRIMARY KEY,
    series            TEXT    NOT NULL,
    version           INTEGER NOT NULL,
    status            TEXT    NOT NULL CHECK (status IN ('published', 'rejected', 'failed')),
    created_at        TEXT    NOT NULL,
    data_through_year INTEGER,
    watermark         INTEGER NOT NULL,     -- max value_id of the series' columns when fitted
    n_obs             INTEGER,
    n_sites           INTEGER,
    n_years           INTEGER,
    warm_start_from   INTEGER REFERENCES fits (fit_id),
    chains            INTEGER,
    draws             INTEGER,
    warmup            INTEGER,
    wall_seconds      REAL,
    max_rhat          REAL,
    min_ess_bulk      REAL,
    min_ess_tail      REAL,
    seed              INTEGER,
    message           TEXT,
    run_id            INTEGER REFERENCES runs (run_id),
    response          TEXT,
    transform         TEXT,
    priors_json       TEXT,                 -- the priors actually used (defaults filled in)
    diagnostics_json  TEXT,
    acceptance_rate   REAL
);
-- Published versions count 1, 2, 3… per series; a rejected or failed attempt carries the
-- version it tried to become, so it may share that number with the later published fit.
CREATE UNIQUE INDEX fits_published_version ON fits (series, version) WHERE status = 'published';
CREATE INDEX fits_series ON fits (series, fit_id);

-- Visits a fit left out (for example a non-positive value under a log transform), and why.
CREATE TABLE fit_exclusions (
    fit_id INTEGER NOT NULL REFERENCES fits (fit_id),
    site   TEXT    NOT NULL,
    year   INTEGER NOT NULL,
    visit  TEXT    NOT NULL,
    reason TEXT    NOT NULL
);
CREATE INDEX fit_exclusions_fit ON fit_exclusions (fit_id);

CREATE TABLE posterior_summary (
    fit_id   INTEGER NOT NULL REFERENCES fits (fit_id),
    kind     TEXT    NOT NULL,              -- 'sd', 'share', 'coef', 'effect'
    term     TEXT    NOT NULL,
    level    TEXT,
    mean     REAL,
    sd       REAL,
    q05      REAL,
    q25      REAL,
    q50      REAL,
    q75      REAL,
    q95      REAL,
    rhat     REAL,
    ess_bulk REAL,
    ess_tail REAL
);
CREATE UNIQUE INDEX posterior_summary_key
    ON posterior_summary (fit_id, kind, term, COALESCE(level, ''));

-- Saved draws of a fit, as one Arrow IPC file.
CREATE TABLE fit_draws (
    fit_id INTEGER PRIMARY KEY REFERENCES fits (fit_id),
    format TEXT NOT NULL,                   -- e.g. 'arrow-ipc-file'
    blob   BLOB NOT NULL
);

CREATE TRIGGER fits_published_no_update
BEFORE UPDATE ON fits WHEN OLD.status = 'published'
BEGIN
    SELECT RAISE(ABORT, 'a published fit is immutable');
END;
CREATE TRIGGER fits_published_no_delete
BEFORE DELETE ON fits WHEN OLD.status = 'published'
BEGIN
    SELECT RAISE(ABORT, 'a published fit is immutable');
END;
CREATE TRIGGER posterior_summary_published_no_update
BEFORE UPDATE ON posterior_summary
WHEN (SELECT status FROM fits WHERE fit_id = OLD.fit_id) = 'published'
BEGIN
    SELECT RAISE(ABORT, 'the summaries of a published fit are immutable');
END;
CREATE TRIGGER posterior_summary_published_no_delete
BEFORE DELETE ON posterior_summary
WHEN (SELECT status FROM fits WHERE fit_id = OLD.fit_id) = 'published'
BEGIN
    SELECT RAISE(ABORT, 'the summaries of a published fit are immutable');
END;
CREATE TRIGGER fit_draws_published_no_update
BEFORE UPDATE ON fit_draws
WHEN (SELECT status FROM fits WHERE fit_id = OLD.fit_id) = 'published'
BEGIN
    SELECT RAISE(ABORT, 'the draws of a published fit are immutable');
END;
CREATE TRIGGER fit_draws_published_no_delete
BEFORE DELETE ON fit_draws
WHEN (SELECT status FROM fits WHERE fit_id = OLD.fit_id) = 'published'
BEGIN
    SELECT RAISE(ABORT, 'the draws of a published fit are immutable');
END;

-- Forecast tables of published fits. `forecast` may rewrite them for the latest version.
CREATE TABLE forecasts (
    fit_id           INTEGER NOT NULL REFERENCES fits (fit_id),
    target           TEXT    NOT NULL CHECK (target IN ('known_site_known_year', 'known_site_new_year',
                                                        'new_site_known_year', 'new_site_new_year')),
    site             TEXT,                  -- NULL for new-site targets
    year             INTEGER NOT NULL,
    scenario         TEXT,
    mean             REAL,
    sd               REAL,
    q50              REAL,
    lo50             REAL,
    hi50             REAL,
    lo80             REAL,
    hi80             REAL,
    lo95             REAL,
    hi95             REAL,
    share_site       REAL,
    share_year       REAL,
    share_groups     REAL,
    share_residual   REAL,
    share_estimation REAL
);
CREATE INDEX forecasts_fit ON forecasts (fit_id, target, site, year);

-- What each run did for each series.
CREATE TABLE run_series (
    run_id  INTEGER NOT NULL REFERENCES runs (run_id),
    series  TEXT    NOT NULL,
    outcome TEXT    NOT NULL,               -- 'published', 'rejected', 'failed', 'unchanged', 'skipped'
    fit_id  INTEGER REFERENCES fits (fit_id),
    message TEXT,
    PRIMARY KEY (run_id, series)
);

-- At most one row: the process that may write runs and fits (single-instance operation).
CREATE TABLE instance_lease (
    lease_id     INTEGER PRIMARY KEY CHECK (lease_id = 1),
    holder       TEXT    NOT NULL,
    pid          INTEGER NOT NULL,
    host         TEXT    NOT NULL,
    acquired_at  TEXT    NOT NULL,
    heartbeat_at TEXT    NOT NULL
);

-- How the lease changed hands: 'acquired' (it was free), 'taken_over' (the previous
-- holder was stale: its process is gone or its heartbeat stopped), 'released'. The
-- previous_* columns describe the stale holder of a takeover.
CREATE TABLE lease_events (
    event_id              INTEGER PRIMARY KEY,
    at                    TEXT    NOT NULL,
    event                 TEXT    NOT NULL CHECK (event IN ('acquired', 'taken_over', 'released')),
    holder                TEXT    NOT NULL,
    pid                   INTEGER NOT NULL,
    host                  TEXT    NOT NULL,
    previous_holder       TEXT,
    previous_pid          INTEGER,
    previous_host         TEXT,
    previous_heartbeat_at TEXT,
    reason                TEXT
);

CREATE VIEW latest_fits AS
SELECT f.*
FROM fits f
WHERE f.status = 'published'
  AND f.version = (SELECT MAX(g.version) FROM fits g
                   WHERE g.series = f.series AND g.status = 'published');

CREATE VIEW latest_forecasts AS
SELECT lf.series, fc.fit_id, fc.target, fc.site, fc.year, fc.scenario, fc.mean, fc.sd, fc.q50,
       fc.lo50, fc.hi50, fc.lo80, fc.hi80, fc.lo95, fc.hi95, fc.share_site, fc.share_year,
       fc.share_groups, fc.share_residual, fc.share_estimation
FROM latest_fits lf
JOIN forecasts fc ON fc.fit_id = lf.fit_id;

-- Variance components of every published version, in version order.
CREATE VIEW variance_drift AS
SELECT f.series, f.version, f.fit_id, f.data_through_year, p.term, p.q05, p.q50, p.q95
FROM fits f
JOIN posterior_summary p ON p.fit_id = f.fit_id AND p.kind = 'sd'
WHERE f.status = 'published'
ORDER BY f.series, f.version, p.term;
