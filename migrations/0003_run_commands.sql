-- Tidemark schema, version 3: which command a run and the lease belong to.
--
-- * `runs.command`: the command that made the run (`serve`, `run-once`, `ingest`,
--   `refit`, `forecast`, `demo`); NULL for runs recorded before this migration.
--   Manual `ingest`, `refit` and `forecast` now leave runs too (trigger `manual`).
-- * `runs.holder`: the lease holder id of the process that made the run (NULL for a
--   command that does not take the lease, such as `ingest`, and for older runs), so a
--   run can be traced to its process.
-- * `instance_lease.command`: the command holding the lease, so `status` can say whether
--   a `serve` process is running.

ALTER TABLE runs ADD COLUMN command TEXT;
ALTER TABLE runs ADD COLUMN holder TEXT;
ALTER TABLE instance_lease ADD COLUMN command TEXT;
