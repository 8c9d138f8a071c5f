-- Tidemark schema, version 5: fenced publishing.
--
-- * `lease_events.generation`, `instance_lease.generation`: every claim of the lease
--   (a fresh one or a takeover) takes the next generation, one more than any recorded
--   in `lease_events`, so generations only grow. A process writes a fit only while the
--   lease row still carries its holder id and generation, checked inside the writing
--   transaction: a process that lost the lease to a takeover cannot publish. NULL for
--   claims made before this version.
-- * `runs.lease_generation`, `fits.lease_generation`: the generation of the process that
--   made the run or the fit (NULL without a lease, as for `ingest`, the demo, or rows
--   from before this version).
-- * `fits.definition_sha256`: a digest of the series' model definition (response,
--   transform, covariates, groups, priors) the fit was made under, so a snapshot older
--   than the newest version published under the same definition can be refused. NULL
--   for fits from before this version (treated as a different definition).

ALTER TABLE lease_events ADD COLUMN generation INTEGER;
ALTER TABLE instance_lease ADD COLUMN generation INTEGER;
ALTER TABLE runs ADD COLUMN lease_generation INTEGER;
ALTER TABLE fits ADD COLUMN lease_generation INTEGER;
ALTER TABLE fits ADD COLUMN definition_sha256 TEXT;
