-- Tidemark schema, version 9: the model definition is part of a version.
--
-- * `fits.definition_text`: the canonical text (pretty JSON) of the series' model
--   definition the fit was made under — response, transform, covariates, groups,
--   censoring, priors and the convergence gate (README, "Model definitions");
--   `definition_sha256` is now the SHA-256 of this text. NULL on fits made before this
--   migration, whose digest covered response, transform, covariates, groups and priors.
ALTER TABLE fits ADD COLUMN definition_text TEXT;
