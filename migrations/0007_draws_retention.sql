-- Tidemark schema, version 7: bounded storage. The draws of older published versions may
-- be pruned under `[store] keep_draws`; everything else of a version stays forever.
--
-- * `draws_pruned`: one row per version whose draws were removed: when, how many bytes,
--   and the `keep_draws` setting that removed them. Rows are immutable.
-- * The draws of a published fit may be deleted only once its `draws_pruned` row exists
--   (the pruning transaction writes that row first); they still cannot be updated.

CREATE TABLE draws_pruned (
    fit_id     INTEGER PRIMARY KEY REFERENCES fits(fit_id),
    pruned_at  TEXT    NOT NULL,
    bytes      INTEGER NOT NULL,
    keep_draws INTEGER NOT NULL
);

CREATE TRIGGER draws_pruned_no_update
BEFORE UPDATE ON draws_pruned
BEGIN
    SELECT RAISE(ABORT, 'pruning records are immutable');
END;
CREATE TRIGGER draws_pruned_no_delete
BEFORE DELETE ON draws_pruned
BEGIN
    SELECT RAISE(ABORT, 'pruning records are immutable');
END;

DROP TRIGGER fit_draws_published_no_delete;
CREATE TRIGGER fit_draws_published_no_delete
BEFORE DELETE ON fit_draws
WHEN (SELECT status FROM fits WHERE fit_id = OLD.fit_id) = 'published'
 AND NOT EXISTS (SELECT 1 FROM draws_pruned WHERE fit_id = OLD.fit_id)
BEGIN
    SELECT RAISE(ABORT, 'the draws of a published fit are immutable unless pruned under store.keep_draws');
END;
