//! The `tidemark.toml` configuration: its TOML shape (README.md, "Configuration
//! reference"), its defaults, and the checks run at start-up so that a mistake is reported
//! once, naming the file and the key, instead of surfacing in the middle of a nightly run.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};

use serde::{Deserialize, Serialize};

use crate::schedule::Schedule;

/// Environment variable naming the config file when `--config` is not given.
pub const CONFIG_ENV: &str = "TIDEMARK_CONFIG";
/// Config file used when neither `--config` nor `TIDEMARK_CONFIG` is given.
pub const DEFAULT_CONFIG: &str = "tidemark.toml";

/// A problem with the configuration, written for the person editing the file.
#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    #[error(
        "no config file at {path}; point at one with --config PATH or the {CONFIG_ENV} environment \
         variable (`tidemark demo` writes an example)"
    )]
    Missing { path: PathBuf },
    /// The cause is the error's source, so it is printed once, after this message.
    #[error("cannot read config file {path}")]
    Read {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },
    #[error("no series named {name:?} in {file} (it defines: {known})")]
    UnknownSeries {
        name: String,
        file: String,
        known: String,
    },
    #[error("{file}: {key}{location}: {message}")]
    Invalid {
        file: String,
        key: String,
        location: String,
        message: String,
    },
}

/// The whole validated configuration. Paths are absolute (resolved against the directory of
/// the config file).
#[derive(Debug, Clone)]
pub struct Config {
    pub path: PathBuf,
    pub database: PathBuf,
    /// A lease holder whose heartbeat is older than this counts as gone.
    pub lease_stale_after: std::time::Duration,
    /// Published versions per series that keep their draws; older ones are pruned.
    pub keep_draws: u32,
    pub feed: FeedDirs,
    pub schedule: Schedule,
    /// The key columns of every series, each set once, in config order (series may name
    /// their own; site codes are one namespace across all of them).
    pub key_sets: Vec<KeyColumns>,
    pub series: Vec<SeriesConfig>,
}

#[derive(Debug, Clone)]
pub struct FeedDirs {
    pub inbox: PathBuf,
    pub archive: PathBuf,
    pub quarantine: PathBuf,
    /// Cells that mean "no value" (`feed.missing`): neither stored nor rejected.
    pub missing: Vec<String>,
}

/// `feed.missing` when the config does not set it: the empty cell, `NA` and `-999`, the
/// codes agency deliveries use most.
pub const DEFAULT_MISSING: [&str; 3] = ["", "NA", "-999"];

/// A named standing covariate setting: each covariate it names is `set` to a value or
/// `shift`ed by an amount from the value a row would otherwise use.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct ScenarioConfig {
    pub name: String,
    #[serde(default)]
    pub set: BTreeMap<String, f64>,
    #[serde(default)]
    pub shift: BTreeMap<String, f64>,
}

/// At most this many scenarios per series (each repeats the whole forecast set).
pub const MAX_SCENARIOS: usize = 8;

/// A qualifier column that marks the series' response values as censored
/// (`series.censoring`); the value column then holds the limit.
#[derive(Debug, Clone, PartialEq, Eq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct CensoringColumn {
    pub column: String,
    /// Qualifiers meaning "below the limit" (e.g. `<`, `ND`).
    #[serde(default)]
    pub below: Vec<String>,
    /// Qualifiers meaning "above the limit" (e.g. `>`).
    #[serde(default)]
    pub above: Vec<String>,
}

impl CensoringColumn {
    /// The side a qualifier names (compared after trimming spaces); `None` for any other
    /// qualifier, which leaves the value observed.
    pub fn side(&self, qualifier: &str) -> Option<tidemark_feed::Censor> {
        let q = qualifier.trim();
        if self.below.iter().any(|b| b.trim() == q) {
            Some(tidemark_feed::Censor::Below)
        } else if self.above.iter().any(|a| a.trim() == q) {
            Some(tidemark_feed::Censor::Above)
        } else {
            None
        }
    }
}

pub use tidemark_feed::KeyColumns;

/// One modelled indicator.
#[derive(Debug, Clone, Serialize)]
pub struct SeriesConfig {
    pub name: String,
    /// The columns naming this series' site, year and visit in feed files.
    #[serde(skip)]
    pub keys: KeyColumns,
    pub response: String,
    pub transform: Transform,
    pub covariates: Vec<String>,
    pub groups: Vec<String>,
    /// A qualifier column marking censored response values (cells written `<x` / `>x`
    /// need none).
    pub censoring: Option<CensoringColumn>,
    /// A fixed linear network trend in year (`trend = true`).
    pub trend: bool,
    /// The trend's reference year (`trend_origin`); `None`: the series' first year of data.
    pub trend_origin: Option<i32>,
    /// New-year forecast targets for this many years after the data (`horizon`, 1–50).
    pub horizon: u32,
    /// Standing covariate scenarios (`[[series.scenarios]]`), forecast beside `baseline`.
    pub scenarios: Vec<ScenarioConfig>,
    pub priors: Priors,
    pub sampler: SamplerConfig,
    /// Known-site forecasts are written only for sites observed within this many years
    /// of the data-through year (`None`: every site).
    pub known_site_max_gap: Option<u32>,
    /// Sites the report draws one small chart each for (observed values and next year's
    /// forecast band); empty: the report picks the most extreme sites by site effect.
    pub report_sites: Vec<String>,
    /// The response's unit (`series.unit`), as written: labels, never converts.
    pub unit: Option<String>,
    /// Response-scale thresholds (`series.thresholds`, in `unit`), ascending: every
    /// forecast row gets the probability of exceeding each.
    pub thresholds: Vec<f64>,
}

/// What defines a series' model: the fields a version is made under. Its canonical
/// text (pretty JSON in this field order) is stored with every fit, and its SHA-256 is the
/// fit's `definition_sha256`. Sampler sizes, the seed and report options are not part of
/// it: they change how a posterior is computed or shown, not which posterior.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
pub struct ModelDefinition {
    pub response: String,
    pub transform: String,
    pub covariates: Vec<String>,
    pub groups: Vec<String>,
    pub censoring: Option<CensoringColumn>,
    /// `None` without a trend; the origin (`None` inside: the first year of data).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub trend: Option<TrendDefinition>,
    /// The response's unit label: published with every number, so a new label makes a
    /// new version (it converts nothing).
    #[serde(default, skip_serializing_if = "Option::is_none")]
    pub unit: Option<String>,
    pub priors: Priors,
    pub gate: Gate,
}

/// The trend part of a model definition.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct TrendDefinition {
    pub origin: Option<i32>,
}

/// The convergence gate a version had to pass.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
pub struct Gate {
    pub max_rhat: f64,
    pub min_ess: f64,
}

impl ModelDefinition {
    /// The canonical text stored with a fit.
    pub fn text(&self) -> String {
        serde_json::to_string_pretty(self).unwrap_or_default()
    }

    /// SHA-256 (hex) of [`ModelDefinition::text`].
    pub fn sha256(&self) -> String {
        use sha2::{Digest, Sha256};
        hex::encode(Sha256::digest(self.text().as_bytes()))
    }

    /// The fields in which `self` differs from `earlier`, in field order.
    pub fn changes_from(&self, earlier: &ModelDefinition) -> Vec<&'static str> {
        let mut out = Vec::new();
        let mut check = |name, differs: bool| {
            if differs {
                out.push(name);
            }
        };
        check("response", self.response != earlier.response);
        check("transform", self.transform != earlier.transform);
        check("covariates", self.covariates != earlier.covariates);
        check("groups", self.groups != earlier.groups);
        check("censoring", self.censoring != earlier.censoring);
        check("trend", self.trend != earlier.trend);
        check("unit", self.unit != earlier.unit);
        check("priors", self.priors != earlier.priors);
        check("gate", self.gate != earlier.gate);
        out
    }

    /// Whether a version made under `earlier` may warm-start a fit under `self`: the same
    /// response on the same scale with the same parameters (covariates, factors,
    /// censoring). Priors and the gate may differ: a warm start only proposes and starts
    /// the chains, and the new fit targets its own posterior and passes its own gate.
    pub fn warm_compatible(&self, earlier: &ModelDefinition) -> Result<(), String> {
        let blocking: Vec<&str> = self
            .changes_from(earlier)
            .into_iter()
            .filter(|c| !matches!(*c, "priors" | "gate" | "unit"))
            .collect();
        if blocking.is_empty() {
            Ok(())
        } else {
            Err(format!(
                "the previous version was made under another model definition ({} changed)",
                blocking.join(", ")
            ))
        }
    }
}

impl SeriesConfig {
    /// The series' model definition under this config.
    pub fn definition(&self) -> ModelDefinition {
        ModelDefinition {
            response: self.response.clone(),
            transform: self.transform.as_str().to_string(),
            covariates: self.covariates.clone(),
            groups: self.groups.clone(),
            censoring: self.censoring.clone(),
            trend: self.trend.then_some(TrendDefinition {
                origin: self.trend_origin,
            }),
            unit: self.unit.clone(),
            priors: self.priors.clone(),
            gate: Gate {
                max_rhat: self.sampler.max_rhat,
                min_ess: self.sampler.min_ess,
            },
        }
    }

    /// SHA-256 (hex) of the canonical text of the series' model definition. Fits made
    /// under equal digests fit the same model to growing data, so an older snapshot of it
    /// is stale.
    pub fn definition_sha256(&self) -> String {
        self.definition().sha256()
    }

    /// The digest fits recorded before schema version 9, when no definition text was
    /// stored (response, transform, covariates, groups and priors as compact JSON): a fit
    /// that carries it and no text was made under this definition unless one of those
    /// changed.
    pub fn legacy_definition_sha256(&self) -> String {
        use sha2::{Digest, Sha256};
        let definition = serde_json::json!({
            "response": self.response,
            "transform": self.transform.as_str(),
            "covariates": self.covariates,
            "groups": self.groups,
            "priors": self.priors,
        });
        hex::encode(Sha256::digest(definition.to_string().as_bytes()))
    }
}

impl Config {
    /// The series a command works on: the one named (by `--series`), or every configured
    /// series. The one lookup every command and the pipeline use, so an unknown name always
    /// gets the same answer, listing the configured names.
    pub fn select_series(&self, name: Option<&str>) -> Result<Vec<&SeriesConfig>, ConfigError> {
        let Some(name) = name else {
            return Ok(self.series.iter().collect());
        };
        match self.series.iter().find(|s| s.name == name) {
            Some(s) => Ok(vec![s]),
            None => Err(ConfigError::UnknownSeries {
                name: name.to_string(),
                file: self.path.display().to_string(),
                known: self
                    .series
                    .iter()
                    .map(|s| s.name.as_str())
                    .collect::<Vec<_>>()
                    .join(", "),
            }),
        }
    }
}

/// At most this many sites may be named in `report_sites` (one small chart each).
pub const MAX_REPORT_SITES: usize = 48;

impl SeriesConfig {
    /// Every stored column this series reads: response, covariates, groups and the
    /// censoring qualifier column.
    pub fn columns(&self) -> Vec<String> {
        let mut cols = vec![self.response.clone()];
        cols.extend(self.covariates.iter().cloned());
        cols.extend(self.groups.iter().cloned());
        cols.extend(self.censoring.iter().map(|c| c.column.clone()));
        cols
    }
}

/// The model crate's own type: the config names it, nothing converts it.
pub use tidemark_model::Transform;

/// Prior for a standard deviation, on the model scale of the response.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case", deny_unknown_fields)]
pub enum SdPrior {
    HalfNormal(f64),
    HalfStudentT {
        df: f64,
        scale: f64,
    },
    /// Exponential with the given rate.
    Exponential(f64),
}

/// Prior for the intercept or a coefficient.
#[derive(Debug, Clone, Copy, PartialEq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case", deny_unknown_fields)]
pub enum LocationPrior {
    Normal { mean: f64, sd: f64 },
}

/// Priors written in the config; `None` means "use the data-scaled default" chosen by the
/// model step (recorded with each fit).
#[derive(Debug, Clone, Default, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields)]
pub struct Priors {
    pub residual_sd: Option<SdPrior>,
    pub site_sd: Option<SdPrior>,
    pub year_sd: Option<SdPrior>,
    /// Applies to the standard deviation of every column in `groups`.
    pub group_sd: Option<SdPrior>,
    pub intercept: Option<LocationPrior>,
    pub coefficients: Option<LocationPrior>,
}

/// Sampler settings with their documented defaults.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize)]
#[serde(deny_unknown_fields, default)]
pub struct SamplerConfig {
    pub chains: u32,
    /// Saved draws per chain.
    pub draws: u32,
    /// Warm-up iterations per chain of a cold start.
    pub warmup: u32,
    /// Warm-up iterations per chain when starting from the previous version.
    pub warm_warmup: u32,
    pub seed: u64,
    pub max_rhat: f64,
    pub min_ess: f64,
    /// A fit whose estimated memory exceeds this many MiB is refused before it starts.
    pub max_memory_mib: u64,
}

impl Default for SamplerConfig {
    fn default() -> Self {
        SamplerConfig {
            chains: 4,
            draws: 1000,
            warmup: 1000,
            warm_warmup: 150,
            seed: 1,
            max_rhat: 1.01,
            min_ess: 400.0,
            max_memory_mib: DEFAULT_MAX_MEMORY_MIB,
        }
    }
}

// ---- TOML shape -------------------------------------------------------------------------

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawConfig {
    #[serde(default)]
    store: RawStore,
    #[serde(default)]
    feed: RawFeed,
    #[serde(default)]
    schedule: RawSchedule,
    #[serde(default)]
    series: Vec<RawSeries>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, default)]
struct RawStore {
    database: String,
    lease_stale_after_seconds: u64,
    keep_draws: u64,
}
impl Default for RawStore {
    fn default() -> Self {
        RawStore {
            database: "tidemark.db".into(),
            lease_stale_after_seconds: crate::lease::STALE_AFTER.as_secs(),
            keep_draws: DEFAULT_KEEP_DRAWS as u64,
        }
    }
}

/// Published versions per series that keep their draws (`store.keep_draws`): enough to
/// rebuild or compare the recent past; older versions keep everything else.
pub const DEFAULT_KEEP_DRAWS: u32 = 10;

/// Bounds of `store.lease_stale_after_seconds`: a limit shorter than a few heartbeats
/// would take over live holders; a day is longer than any stop worth waiting out.
const LEASE_STALE_AFTER_SECONDS: std::ops::RangeInclusive<u64> = 2..=86_400;

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, default)]
struct RawFeed {
    inbox: String,
    archive: String,
    quarantine: String,
    missing: Vec<String>,
}
impl Default for RawFeed {
    fn default() -> Self {
        RawFeed {
            inbox: "inbox".into(),
            archive: "archive".into(),
            quarantine: "quarantine".into(),
            missing: DEFAULT_MISSING.iter().map(|c| c.to_string()).collect(),
        }
    }
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields, default)]
struct RawSchedule {
    cron: String,
    timezone: String,
    catch_up: bool,
}
impl Default for RawSchedule {
    fn default() -> Self {
        RawSchedule {
            cron: "30 2 * * *".into(),
            timezone: "UTC".into(),
            catch_up: true,
        }
    }
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct RawSeries {
    name: String,
    response: String,
    #[serde(default = "default_transform")]
    transform: String,
    site: String,
    year: String,
    visit: Option<String>,
    #[serde(default)]
    covariates: Vec<String>,
    #[serde(default)]
    groups: Vec<String>,
    censoring: Option<CensoringColumn>,
    #[serde(default)]
    trend: bool,
    trend_origin: Option<i32>,
    #[serde(default = "default_horizon")]
    horizon: u32,
    #[serde(default)]
    scenarios: Vec<ScenarioConfig>,
    #[serde(default)]
    priors: Priors,
    #[serde(default)]
    sampler: SamplerConfig,
    known_site_max_gap: Option<u32>,
    #[serde(default)]
    report_sites: Vec<String>,
    unit: Option<String>,
    #[serde(default)]
    thresholds: Vec<f64>,
}

fn default_transform() -> String {
    "none".into()
}

fn default_horizon() -> u32 {
    1
}

/// Bounds of `series.horizon`: a forecast is at least one year ahead; beyond fifty years a
/// trend's extrapolation says more about the line than about the network.
const HORIZONS: std::ops::RangeInclusive<u32> = 1..=50;

// ---- loading ----------------------------------------------------------------------------

/// Which config file to use: `--config`, else `TIDEMARK_CONFIG`, else `./tidemark.toml`.
pub fn locate(cli: Option<&Path>) -> PathBuf {
    if let Some(p) = cli {
        return p.to_path_buf();
    }
    match std::env::var_os(CONFIG_ENV) {
        Some(v) if !v.is_empty() => PathBuf::from(v),
        _ => PathBuf::from(DEFAULT_CONFIG),
    }
}

impl Config {
    /// Read and validate the config file at `path`.
    pub fn load(path: &Path) -> Result<Config, ConfigError> {
        let text = std::fs::read_to_string(path).map_err(|source| {
            if source.kind() == std::io::ErrorKind::NotFound {
                ConfigError::Missing {
                    path: path.to_path_buf(),
                }
            } else {
                ConfigError::Read {
                    path: path.to_path_buf(),
                    source,
                }
            }
        })?;
        let dir = path
            .parent()
            .map(|p| {
                if p.as_os_str().is_empty() {
                    Path::new(".")
                } else {
                    p
                }
            })
            .unwrap_or(Path::new("."));
        let dir = std::path::absolute(dir).unwrap_or_else(|_| dir.to_path_buf());
        Config::parse(&text, &path.display().to_string(), &dir).map(|mut c| {
            c.path = path.to_path_buf();
            c
        })
    }

    /// Parse and validate config text. `file` names it in messages; relative paths are
    /// resolved against `dir`.
    pub fn parse(text: &str, file: &str, dir: &Path) -> Result<Config, ConfigError> {
        let invalid = |(key, message): Problem| ConfigError::Invalid {
            file: file.to_string(),
            key,
            location: String::new(),
            message,
        };
        let raw = deserialize_raw(text, file)?;
        let resolve = |key: &str, p: &str| resolve_path(dir, key, p).map_err(invalid);
        let database = resolve("store.database", &raw.store.database)?;
        let keep_draws = u32::try_from(raw.store.keep_draws)
            .ok()
            .filter(|k| *k >= 1)
            .ok_or_else(|| {
                invalid((
                    "store.keep_draws".into(),
                    format!(
                        "must be 1 to {} (the latest version's draws serve warm starts and `forecast`), found {}",
                        u32::MAX,
                        raw.store.keep_draws
                    ),
                ))
            })?;
        let stale = raw.store.lease_stale_after_seconds;
        if !LEASE_STALE_AFTER_SECONDS.contains(&stale) {
            return Err(invalid((
                "store.lease_stale_after_seconds".into(),
                format!(
                    "must be {} to {} seconds, found {stale}",
                    LEASE_STALE_AFTER_SECONDS.start(),
                    LEASE_STALE_AFTER_SECONDS.end()
                ),
            )));
        }
        let feed = FeedDirs {
            inbox: resolve("feed.inbox", &raw.feed.inbox)?,
            archive: resolve("feed.archive", &raw.feed.archive)?,
            quarantine: resolve("feed.quarantine", &raw.feed.quarantine)?,
            missing: raw.feed.missing,
        };
        let config_file = dir.join(Path::new(file).file_name().unwrap_or_default());
        check_folders(&config_file, &database, &feed).map_err(invalid)?;
        let mut schedule = Schedule::parse(&raw.schedule.cron, &raw.schedule.timezone)
            .map_err(|e| invalid((e.key.to_string(), e.message)))?;
        schedule.catch_up = raw.schedule.catch_up;

        let mut seen = SeenSoFar::default();
        let series = raw
            .series
            .into_iter()
            .enumerate()
            .map(|(i, rs)| check_series(i, rs, &mut seen))
            .collect::<Result<Vec<_>, _>>()
            .map_err(invalid)?;
        if seen.keys.is_empty() {
            return Err(invalid((
                "series".into(),
                "at least one [[series]] is required (it also names the site and year columns of the feed)"
                    .into(),
            )));
        }
        check_keys_are_not_measured(&series).map_err(invalid)?;
        let key_sets = seen.keys;
        Ok(Config {
            path: PathBuf::from(file),
            database,
            lease_stale_after: std::time::Duration::from_secs(stale),
            keep_draws,
            feed,
            schedule,
            key_sets,
            series,
        })
    }

    /// Columns whose cells are labels (text) rather than numbers: the union of every
    /// series' `groups` and censoring qualifier columns.
    pub fn label_columns(&self) -> BTreeSet<String> {
        self.series
            .iter()
            .flat_map(|s| {
                s.groups
                    .iter()
                    .cloned()
                    .chain(s.censoring.iter().map(|c| c.column.clone()))
            })
            .collect()
    }

    /// How feed files are read under this config: its key columns, label columns, the
    /// columns series read as numbers (responses, covariates), those read on the log
    /// scale, and the missing-value codes.
    pub fn file_layout(&self) -> tidemark_feed::FileLayout {
        let numbers = self
            .series
            .iter()
            .flat_map(|s| std::iter::once(s.response.clone()).chain(s.covariates.clone()))
            .collect();
        let positive = self
            .series
            .iter()
            .filter(|s| s.transform == Transform::Log)
            .map(|s| s.response.clone())
            .collect();
        tidemark_feed::FileLayout {
            keys: self.key_sets.clone(),
            labels: self.label_columns(),
            numbers: tidemark_feed::NumberColumns::Only(numbers),
            positive,
            missing: self.feed.missing.clone(),
        }
    }

    pub fn series(&self, name: &str) -> Option<&SeriesConfig> {
        self.series.iter().find(|s| s.name == name)
    }
}

fn line_col(text: &str, offset: usize) -> (usize, usize) {
    let before = &text[..offset.min(text.len())];
    let line = before.matches('\n').count() + 1;
    let col = before.rsplit('\n').next().map_or(0, |l| l.chars().count()) + 1;
    (line, col)
}

fn check_sd_prior(p: &SdPrior, key: &str) -> Result<(), (String, String)> {
    let bad = |what: &str, v: f64| {
        Err((
            key.to_string(),
            format!("{what} must be a positive finite number, found {v}"),
        ))
    };
    match *p {
        SdPrior::HalfNormal(s) if !(s.is_finite() && s > 0.0) => bad("half_normal scale", s),
        SdPrior::Exponential(r) if !(r.is_finite() && r > 0.0) => bad("exponential rate", r),
        SdPrior::HalfStudentT { df, .. } if !(df.is_finite() && df > 0.0) => {
            bad("half_student_t df", df)
        }
        SdPrior::HalfStudentT { scale, .. } if !(scale.is_finite() && scale > 0.0) => {
            bad("half_student_t scale", scale)
        }
        _ => Ok(()),
    }
}

fn check_location_prior(p: &LocationPrior, key: &str) -> Result<(), (String, String)> {
    let LocationPrior::Normal { mean, sd } = *p;
    if !mean.is_finite() {
        return Err((
            key.to_string(),
            format!("normal mean must be finite, found {mean}"),
        ));
    }
    if !(sd.is_finite() && sd > 0.0) {
        return Err((
            key.to_string(),
            format!("normal sd must be a positive finite number, found {sd}"),
        ));
    }
    Ok(())
}

fn check_priors(p: &Priors, at: &str) -> Result<(), (String, String)> {
    for (k, v) in [
        ("residual_sd", &p.residual_sd),
        ("site_sd", &p.site_sd),
        ("year_sd", &p.year_sd),
        ("group_sd", &p.group_sd),
    ] {
        if let Some(v) = v {
            check_sd_prior(v, &format!("{at}.{k}"))?;
        }
    }
    for (k, v) in [
        ("intercept", &p.intercept),
        ("coefficients", &p.coefficients),
    ] {
        if let Some(v) = v {
            check_location_prior(v, &format!("{at}.{k}"))?;
        }
    }
    Ok(())
}

/// Upper bounds of `[series.sampler]` (README "Configuration reference").
pub const MAX_CHAINS: u32 = 64;
pub const MAX_DRAWS: u32 = 1_000_000;
pub const MAX_WARMUP: u32 = 1_000_000;
/// Default of `sampler.max_memory_mib`: a sixth of this project's 24 GiB reference machine,
/// far above what the benchmarks' fits need (under 1 GiB) and low enough that a typo in
/// `chains` or `draws` is refused with a figure instead of exhausting a shared host.
pub const DEFAULT_MAX_MEMORY_MIB: u64 = 4096;
/// Bounds of `sampler.max_memory_mib`.
const MAX_MEMORY_MIB: std::ops::RangeInclusive<u64> = 16..=1_048_576;

fn check_sampler(s: &SamplerConfig, at: &str) -> Result<(), (String, String)> {
    let err = |k: &str, m: String| Err((format!("{at}.{k}"), m));
    if s.chains < 1 {
        return err("chains", format!("must be at least 1, found {}", s.chains));
    }
    if s.draws < 100 {
        return err(
            "draws",
            format!(
                "must be at least 100 saved draws per chain, found {}",
                s.draws
            ),
        );
    }
    // Upper bounds keep a typo (`draws = 4294967295`) from asking for hundreds of GB.
    for (key, value, most) in [
        ("chains", s.chains, MAX_CHAINS),
        ("draws", s.draws, MAX_DRAWS),
        ("warmup", s.warmup, MAX_WARMUP),
        ("warm_warmup", s.warm_warmup, MAX_WARMUP),
    ] {
        if value > most {
            return err(key, format!("must be at most {most}, found {value}"));
        }
    }
    if !(s.max_rhat.is_finite() && s.max_rhat > 1.0) {
        return err(
            "max_rhat",
            format!(
                "must be a number greater than 1 (e.g. 1.01), found {}",
                s.max_rhat
            ),
        );
    }
    if !(s.min_ess.is_finite() && s.min_ess > 0.0) {
        return err(
            "min_ess",
            format!("must be a positive number, found {}", s.min_ess),
        );
    }
    if !MAX_MEMORY_MIB.contains(&s.max_memory_mib) {
        return err(
            "max_memory_mib",
            format!(
                "must be between {} and {} MiB, found {}",
                MAX_MEMORY_MIB.start(),
                MAX_MEMORY_MIB.end(),
                s.max_memory_mib
            ),
        );
    }
    let saved = f64::from(s.chains) * f64::from(s.draws);
    if s.min_ess > saved {
        return err(
            "min_ess",
            format!(
                "{} can never be reached with chains x draws = {} saved draws",
                s.min_ess, saved
            ),
        );
    }
    Ok(())
}

/// A config mistake: the key path and what is wrong.
type Problem = (String, String);

/// The TOML text into its raw shape; a mistake names the key, line and column.
fn deserialize_raw(text: &str, file: &str) -> Result<RawConfig, ConfigError> {
    let de = toml::Deserializer::new(text);
    serde_path_to_error::deserialize(de).map_err(|e| {
        let key = e.path().to_string();
        let inner = e.into_inner();
        let location = inner
            .span()
            .map(|span| {
                let (line, col) = line_col(text, span.start);
                format!(" (line {line}, column {col})")
            })
            .unwrap_or_default();
        ConfigError::Invalid {
            file: file.to_string(),
            key: if key == "." {
                "(top level)".into()
            } else {
                key
            },
            location,
            message: inner.message().trim().to_string(),
        }
    })
}

/// A path from the config, relative to the config file's folder unless absolute.
fn resolve_path(dir: &Path, key: &str, p: &str) -> Result<PathBuf, Problem> {
    if p.trim().is_empty() {
        return Err((key.into(), "must name a path, found an empty string".into()));
    }
    let p = Path::new(p);
    Ok(if p.is_absolute() {
        p.to_path_buf()
    } else {
        dir.join(p)
    })
}

/// What the series checked so far fix for the ones that follow.
#[derive(Default)]
struct SeenSoFar {
    /// The distinct key sets, in the order series name them.
    keys: Vec<KeyColumns>,
    names: BTreeSet<String>,
    /// Column -> (kind, first key that used it), so a column is typed the same everywhere.
    column_kind: BTreeMap<String, (&'static str, String)>,
}

/// Check one `[[series]]` table and turn it into its validated form.
fn check_series(i: usize, rs: RawSeries, seen: &mut SeenSoFar) -> Result<SeriesConfig, Problem> {
    let at = |k: &str| format!("series[{i}].{k}");
    for (k, v) in [
        ("name", &rs.name),
        ("response", &rs.response),
        ("site", &rs.site),
        ("year", &rs.year),
    ] {
        if v.trim().is_empty() {
            return Err((at(k), "must not be empty".into()));
        }
    }
    if !seen.names.insert(rs.name.clone()) {
        return Err((
            at("name"),
            format!(
                "series name {:?} is used twice; names must be unique",
                rs.name
            ),
        ));
    }
    let transform = Transform::parse(&rs.transform).ok_or_else(|| {
        (
            at("transform"),
            format!("must be \"none\" or \"log\", found {:?}", rs.transform),
        )
    })?;
    check_key_columns(&rs, &at, seen)?;
    check_measured_columns(&rs, &at, seen)?;
    if let Some(c) = &rs.censoring {
        check_censoring(c, &at("censoring"))?;
    }
    check_scenarios(&rs.scenarios, &rs.covariates, &at("scenarios"))?;
    if !HORIZONS.contains(&rs.horizon) {
        return Err((
            at("horizon"),
            format!(
                "must be {} to {} years, found {}",
                HORIZONS.start(),
                HORIZONS.end(),
                rs.horizon
            ),
        ));
    }
    if rs.trend_origin.is_some() && !rs.trend {
        return Err((
            at("trend_origin"),
            "is the reference year of a trend: set `trend = true` too".into(),
        ));
    }
    if let Some(origin) = rs.trend_origin {
        if !(1800..=2200).contains(&origin) {
            return Err((
                at("trend_origin"),
                format!("must be a year from 1800 to 2200, found {origin}"),
            ));
        }
    }
    check_report_sites(&rs.report_sites, &at("report_sites"))?;
    if let Some(unit) = &rs.unit {
        check_unit(unit, &at("unit"))?;
    }
    let thresholds = check_thresholds(&rs.thresholds, transform, &at("thresholds"))?;
    check_priors(&rs.priors, &at("priors"))?;
    check_sampler(&rs.sampler, &at("sampler"))?;
    Ok(SeriesConfig {
        name: rs.name,
        keys: KeyColumns {
            site: rs.site,
            year: rs.year,
            visit: rs.visit,
        },
        response: rs.response,
        transform,
        covariates: rs.covariates,
        groups: rs.groups,
        censoring: rs.censoring,
        trend: rs.trend,
        trend_origin: rs.trend_origin,
        horizon: rs.horizon,
        scenarios: rs.scenarios,
        priors: rs.priors,
        sampler: rs.sampler,
        known_site_max_gap: rs.known_site_max_gap,
        report_sites: rs.report_sites,
        unit: rs.unit,
        thresholds,
    })
}

/// Site, year and visit: three different columns.
fn check_key_columns(
    rs: &RawSeries,
    at: &dyn Fn(&str) -> String,
    seen: &mut SeenSoFar,
) -> Result<(), Problem> {
    if let Some(v) = &rs.visit {
        if v.trim().is_empty() {
            return Err((
                at("visit"),
                "must not be empty (leave the key out when there is no visit column)".into(),
            ));
        }
    }
    let these = KeyColumns {
        site: rs.site.clone(),
        year: rs.year.clone(),
        visit: rs.visit.clone(),
    };
    if these.site == these.year
        || Some(&these.site) == these.visit.as_ref()
        || Some(&these.year) == these.visit.as_ref()
    {
        return Err((
            at("site"),
            "site, year and visit must be three different columns".into(),
        ));
    }
    if !seen.keys.contains(&these) {
        seen.keys.push(these);
    }
    Ok(())
}

/// A column that is a site, year or visit column of any series is a key everywhere: no
/// series may read it as a response, covariate, group or qualifier (feed files never
/// store key columns as values).
fn check_keys_are_not_measured(series: &[SeriesConfig]) -> Result<(), Problem> {
    for (i, s) in series.iter().enumerate() {
        let measured = s
            .columns()
            .into_iter()
            .chain(s.censoring.iter().map(|c| c.column.clone()));
        for col in measured {
            if let Some(other) = series.iter().find(|o| {
                o.keys.site == col || o.keys.year == col || o.keys.visit.as_deref() == Some(&col)
            }) {
                return Err((
                    format!("series[{i}]"),
                    format!(
                        "column {col:?} is a site/year/visit column of series {:?} and cannot also be read as a value",
                        other.name
                    ),
                ));
            }
        }
    }
    Ok(())
}

/// Response, covariates and groups: named, distinct, not key columns, and each column
/// numeric or a group label in every series.
fn check_measured_columns(
    rs: &RawSeries,
    at: &dyn Fn(&str) -> String,
    seen: &mut SeenSoFar,
) -> Result<(), Problem> {
    let key_cols: Vec<&str> = [
        Some(rs.site.as_str()),
        Some(rs.year.as_str()),
        rs.visit.as_deref(),
    ]
    .into_iter()
    .flatten()
    .collect();
    let mut in_series = BTreeSet::new();
    let roles = std::iter::once(("response", &rs.response, "numeric"))
        .chain(rs.covariates.iter().map(|c| ("covariates", c, "numeric")))
        .chain(rs.groups.iter().map(|g| ("groups", g, "label")))
        .chain(
            rs.censoring
                .iter()
                .map(|c| ("censoring.column", &c.column, "label")),
        );
    for (role, col, kind) in roles {
        let key = at(role);
        if col.trim().is_empty() {
            return Err((key, "column names must not be empty".into()));
        }
        if key_cols.contains(&col.as_str()) {
            return Err((
                key,
                format!("{col:?} is a site/year/visit column and cannot also be a {role} column"),
            ));
        }
        if !in_series.insert(col.clone()) {
            return Err((
                key,
                format!("column {col:?} appears more than once in this series (response, covariates and groups must be distinct)"),
            ));
        }
        match seen.column_kind.get(col) {
            Some((k, first)) if *k != kind => {
                return Err((
                    key,
                    format!("column {col:?} is a {kind} column here but a {k} column in {first}; a column is either numeric or a group label everywhere"),
                ))
            }
            Some(_) => {}
            None => {
                seen.column_kind.insert(col.clone(), (kind, key.clone()));
            }
        }
    }
    Ok(())
}

/// Scenarios: named (not `baseline`), each name once, at most [`MAX_SCENARIOS`], each
/// setting or shifting at least one of the series' covariates by a finite number, none
/// both.
fn check_scenarios(
    scenarios: &[ScenarioConfig],
    covariates: &[String],
    key: &str,
) -> Result<(), Problem> {
    if scenarios.len() > MAX_SCENARIOS {
        return Err((
            key.into(),
            format!(
                "at most {MAX_SCENARIOS} scenarios, found {}",
                scenarios.len()
            ),
        ));
    }
    let mut names = BTreeSet::new();
    for (i, sc) in scenarios.iter().enumerate() {
        let at = format!("{key}[{i}]");
        let name = sc.name.trim();
        if name.is_empty() || name == "baseline" || name.chars().any(char::is_control) {
            return Err((
                format!("{at}.name"),
                format!(
                    "must be a name other than \"baseline\", found {:?}",
                    sc.name
                ),
            ));
        }
        if !names.insert(name) {
            return Err((format!("{at}.name"), format!("{:?} is used twice", sc.name)));
        }
        if sc.set.is_empty() && sc.shift.is_empty() {
            return Err((
                at.clone(),
                "sets or shifts no covariate: it would repeat the baseline".into(),
            ));
        }
        for (table, values) in [("set", &sc.set), ("shift", &sc.shift)] {
            for (c, v) in values {
                if !covariates.contains(c) {
                    return Err((
                        format!("{at}.{table}"),
                        format!(
                            "{c:?} is not a covariate of this series (covariates: {covariates:?})"
                        ),
                    ));
                }
                if !v.is_finite() {
                    return Err((
                        format!("{at}.{table}.{c}"),
                        format!("must be a finite number, found {v}"),
                    ));
                }
            }
        }
        if let Some(c) = sc.set.keys().find(|c| sc.shift.contains_key(*c)) {
            return Err((at, format!("covariate {c:?} is both set and shifted")));
        }
    }
    Ok(())
}

/// A qualifier column: at least one qualifier, none empty, none naming both sides.
fn check_censoring(c: &CensoringColumn, key: &str) -> Result<(), Problem> {
    if c.below.is_empty() && c.above.is_empty() {
        return Err((
            key.into(),
            "name at least one qualifier in `below` or `above`".into(),
        ));
    }
    for q in c.below.iter().chain(&c.above) {
        if q.trim().is_empty() {
            return Err((key.into(), "qualifiers must not be empty".into()));
        }
    }
    if let Some(q) = c
        .below
        .iter()
        .find(|b| c.above.iter().any(|a| a.trim() == b.trim()))
    {
        return Err((
            key.into(),
            format!("qualifier {q:?} is in both `below` and `above`"),
        ));
    }
    Ok(())
}

/// Sites named for the report: non-empty, each once, at most [`MAX_REPORT_SITES`].
fn check_report_sites(sites: &[String], key: &str) -> Result<(), Problem> {
    let mut named = BTreeSet::new();
    for site in sites {
        if site.trim().is_empty() {
            return Err((key.into(), "site codes must not be empty".into()));
        }
        if !named.insert(site.as_str()) {
            return Err((key.into(), format!("site {site:?} is named twice")));
        }
    }
    if sites.len() > MAX_REPORT_SITES {
        return Err((
            key.into(),
            format!(
                "names {} sites; at most {MAX_REPORT_SITES} fit on the report page",
                sites.len()
            ),
        ));
    }
    Ok(())
}

/// At most this many thresholds per series (each adds a probability to every forecast row).
pub const MAX_THRESHOLDS: usize = 16;
/// At most this many characters in a unit (`µg/L`, `mg/m³`, `NTU`, `m`).
pub const MAX_UNIT_CHARS: usize = 32;

/// A unit: a short label shown as written, so no empty text and no control characters.
fn check_unit(unit: &str, key: &str) -> Result<(), Problem> {
    if unit.trim().is_empty() {
        return Err((
            key.into(),
            "must not be empty (leave the key out when the unit is not known)".into(),
        ));
    }
    if unit.chars().any(char::is_control) {
        return Err((key.into(), "must not hold control characters".into()));
    }
    if unit.chars().count() > MAX_UNIT_CHARS {
        return Err((
            key.into(),
            format!(
                "is {} characters long; at most {MAX_UNIT_CHARS} (it labels axes and columns)",
                unit.chars().count()
            ),
        ));
    }
    Ok(())
}

/// Thresholds: finite, positive under `log`, distinct, at most [`MAX_THRESHOLDS`];
/// returned ascending.
fn check_thresholds(
    thresholds: &[f64],
    transform: Transform,
    key: &str,
) -> Result<Vec<f64>, Problem> {
    if thresholds.len() > MAX_THRESHOLDS {
        return Err((
            key.into(),
            format!(
                "names {} thresholds; at most {MAX_THRESHOLDS}",
                thresholds.len()
            ),
        ));
    }
    if let Some(problem) = thresholds
        .iter()
        .find_map(|&t| tidemark_model::threshold_problem(transform, t))
    {
        return Err((key.into(), problem));
    }
    let mut sorted = thresholds.to_vec();
    sorted.sort_by(f64::total_cmp);
    if let Some(w) = sorted.windows(2).find(|w| w[0] == w[1]) {
        return Err((key.into(), format!("threshold {} is named twice", w[0])));
    }
    Ok(sorted)
}

/// Folders the inbox must never be: ingest moves every file it finds there.
const SYSTEM_FOLDERS: &[&str] = &[
    "/", "/bin", "/boot", "/dev", "/etc", "/home", "/lib", "/lib64", "/opt", "/proc", "/root",
    "/run", "/sbin", "/srv", "/sys", "/tmp", "/usr", "/var",
];

/// `p` with `.` and `..` resolved as text, then through the file system where it
/// exists (so a symlinked folder is compared by what it points at).
fn normalised(p: &Path) -> PathBuf {
    let mut out = PathBuf::new();
    for c in p.components() {
        match c {
            std::path::Component::ParentDir => {
                out.pop();
            }
            std::path::Component::CurDir => {}
            other => out.push(other.as_os_str()),
        }
    }
    // The longest existing prefix, canonicalised, with the rest appended.
    let mut existing = out.clone();
    let mut rest = Vec::new();
    while !existing.exists() {
        match (
            existing.file_name().map(|n| n.to_os_string()),
            existing.parent(),
        ) {
            (Some(name), Some(parent)) => {
                rest.push(name);
                existing = parent.to_path_buf();
            }
            _ => return out,
        }
    }
    let mut resolved = existing.canonicalize().unwrap_or(existing);
    for name in rest.into_iter().rev() {
        resolved.push(name);
    }
    resolved
}

/// `ingest` moves every file of the inbox: nothing the service needs may be in it. Refuse
/// a database, config file, archive or quarantine inside the inbox, an archive or
/// quarantine that is the inbox, and an inbox that is a system folder.
fn check_folders(config_file: &Path, database: &Path, feed: &FeedDirs) -> Result<(), Problem> {
    let inbox = normalised(&feed.inbox);
    if SYSTEM_FOLDERS.iter().any(|f| inbox == Path::new(f)) {
        return Err((
            "feed.inbox".into(),
            format!(
                "{} is a system folder; ingest moves every file of the inbox, so give it a folder of its own",
                inbox.display()
            ),
        ));
    }
    let inside = |key: &str, what: &str, p: &Path| -> Result<(), Problem> {
        let p = normalised(p);
        if p.starts_with(&inbox) {
            let how = if p == inbox { "is" } else { "lies inside" };
            return Err((
                key.into(),
                format!(
                    "{what} {} {how} the inbox {} (feed.inbox); ingest moves every file of the inbox, so keep them apart",
                    p.display(),
                    inbox.display()
                ),
            ));
        }
        Ok(())
    };
    inside("store.database", "the database", database)?;
    inside("feed.inbox", "the config file", config_file)?;
    inside("feed.archive", "the archive", &feed.archive)?;
    inside("feed.quarantine", "the quarantine", &feed.quarantine)?;
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    const GOOD: &str = r#"
[store]
database = "data/tidemark.db"
[feed]
inbox = "in"
[schedule]
cron = "30 2 * * *"
timezone = "Europe/Helsinki"

[[series]]
name = "chlorophyll"
response = "chl_ug_l"
transform = "log"
site = "lake"
year = "season"
visit = "visit"
covariates = ["surface_temp_c"]
groups = ["crew"]
[series.priors]
residual_sd = { half_normal = 1 }
site_sd = { half_student_t = { df = 3, scale = 2.5 } }
year_sd = { exponential = 2.0 }
intercept = { normal = { mean = 0.0, sd = 100.0 } }
[series.sampler]
chains = 2
draws = 500
"#;

    fn parse(text: &str) -> Result<Config, ConfigError> {
        Config::parse(text, "tidemark.toml", Path::new("/etc/tidemark"))
    }

    fn message(text: &str) -> String {
        parse(text).err().map(|e| e.to_string()).unwrap_or_default()
    }

    #[test]
    fn reads_every_documented_key() {
        let c = parse(GOOD).unwrap();
        assert_eq!(c.database, Path::new("/etc/tidemark/data/tidemark.db"));
        assert_eq!(c.feed.inbox, Path::new("/etc/tidemark/in"));
        assert_eq!(c.feed.archive, Path::new("/etc/tidemark/archive"));
        let s = &c.series[0];
        assert_eq!(s.transform, Transform::Log);
        assert_eq!(s.priors.residual_sd, Some(SdPrior::HalfNormal(1.0)));
        assert_eq!(
            s.priors.site_sd,
            Some(SdPrior::HalfStudentT {
                df: 3.0,
                scale: 2.5
            })
        );
        assert_eq!(s.priors.year_sd, Some(SdPrior::Exponential(2.0)));
        assert_eq!(s.sampler.chains, 2);
        assert_eq!(s.sampler.seed, 1);
        assert_eq!(c.key_sets[0].visit.as_deref(), Some("visit"));
        assert!(c.label_columns().contains("crew"));
    }

    #[test]
    fn bad_transform_names_the_key_and_the_value() {
        let text = GOOD.replace("transform = \"log\"", "transform = \"ln\"");
        assert_eq!(
            message(&text),
            "tidemark.toml: series[0].transform: must be \"none\" or \"log\", found \"ln\""
        );
    }

    #[test]
    fn unknown_key_is_refused_with_its_path() {
        let text = GOOD.replace("chains = 2", "chains = 2\nthin = 5");
        let m = message(&text);
        assert!(m.starts_with("tidemark.toml: series[0].sampler"), "{m}");
        assert!(m.contains("unknown field `thin`"), "{m}");
        assert!(m.contains("line "), "{m}");
    }

    #[test]
    fn prior_scales_must_be_positive() {
        let text = GOOD.replace("half_normal = 1", "half_normal = -1");
        let m = message(&text);
        assert!(m.contains("series[0].priors.residual_sd"), "{m}");
        assert!(m.contains("positive"), "{m}");
        let text = GOOD.replace("{ exponential = 2.0 }", "{ half_cauchy = 2.0 }");
        let m = message(&text);
        assert!(m.contains("series[0].priors.year_sd"), "{m}");
        assert!(m.contains("half_cauchy"), "{m}");
    }

    #[test]
    fn sampler_limits() {
        assert!(
            message(&GOOD.replace("chains = 2", "chains = 0")).contains("series[0].sampler.chains")
        );
        assert!(
            message(&GOOD.replace("draws = 500", "draws = 50")).contains("series[0].sampler.draws")
        );
        assert!(
            message(&GOOD.replace("draws = 500", "draws = 500\nmax_rhat = 1.0"))
                .contains("series[0].sampler.max_rhat")
        );
        assert!(
            message(&GOOD.replace("draws = 500", "draws = 500\nmin_ess = 5000"))
                .contains("can never be reached")
        );
    }

    #[test]
    fn schedule_is_checked() {
        let m = message(&GOOD.replace("30 2 * * *", "every night"));
        assert!(m.starts_with("tidemark.toml: schedule.cron:"), "{m}");
        let m = message(&GOOD.replace("Europe/Helsinki", "Mars/Olympus"));
        assert!(m.starts_with("tidemark.toml: schedule.timezone:"), "{m}");
        assert!(parse(GOOD).unwrap().schedule.catch_up);
        let off = GOOD.replace(
            "timezone = \"Europe/Helsinki\"",
            "timezone = \"UTC\"\ncatch_up = false",
        );
        assert!(!parse(&off).unwrap().schedule.catch_up);
        let m = message(&off.replace("catch_up = false", "catch_up = \"yes\""));
        assert!(m.starts_with("tidemark.toml: schedule.catch_up"), "{m}");
        let m = message(&off.replace("catch_up = false", "catchup = false"));
        assert!(m.contains("catchup"), "{m}");
    }

    #[test]
    fn columns_are_checked() {
        let m = message(&GOOD.replace("groups = [\"crew\"]", "groups = [\"lake\"]"));
        assert!(m.contains("series[0].groups"), "{m}");
        let two = format!("{GOOD}\n[[series]]\nname = \"chlorophyll\"\nresponse = \"tp\"\nsite = \"lake\"\nyear = \"season\"\nvisit = \"visit\"\n");
        assert!(message(&two).contains("series[1].name"));
        // Series may name their own key columns; a key of one is no value of another.
        let other_keys = format!("{GOOD}\n[[series]]\nname = \"tp\"\nresponse = \"tp\"\nsite = \"station\"\nyear = \"season\"\nvisit = \"visit\"\n");
        let c = Config::parse(&other_keys, "t.toml", Path::new("/tmp")).unwrap();
        assert_eq!(c.key_sets.len(), 2);
        assert_eq!(c.series[1].keys.site, "station");
        let key_as_value = format!("{GOOD}\n[[series]]\nname = \"tp\"\nresponse = \"lake\"\nsite = \"station\"\nyear = \"season\"\n");
        let m = message(&key_as_value);
        assert!(m.contains("site/year/visit column of series"), "{m}");
        let retyped = format!("{GOOD}\n[[series]]\nname = \"tp\"\nresponse = \"crew\"\nsite = \"lake\"\nyear = \"season\"\nvisit = \"visit\"\n");
        assert!(message(&retyped).contains("either numeric or a group label"));
    }

    #[test]
    fn at_least_one_series() {
        assert!(message("[store]\ndatabase = \"x.db\"\n").contains("series"));
    }

    #[test]
    fn units_and_thresholds_are_optional_and_checked() {
        let s = &parse(GOOD).unwrap().series[0];
        assert_eq!((s.unit.as_deref(), s.thresholds.len()), (None, 0));
        let with = |keys: &str| {
            GOOD.replace(
                "groups = [\"crew\"]",
                &format!("groups = [\"crew\"]\n{keys}"),
            )
        };
        let c = parse(&with("unit = \"µg/L\"\nthresholds = [25.0, 10, 2.5]")).unwrap();
        assert_eq!(c.series[0].unit.as_deref(), Some("µg/L"));
        assert_eq!(c.series[0].thresholds, [2.5, 10.0, 25.0]);
        for (keys, key, words) in [
            ("unit = \" \"", "series[0].unit", "must not be empty"),
            (
                "unit = \"mg\\u0007L\"",
                "series[0].unit",
                "control characters",
            ),
            (
                "thresholds = [10.0, 10]",
                "series[0].thresholds",
                "named twice",
            ),
            ("thresholds = [0.0]", "series[0].thresholds", "not positive"),
            (
                "thresholds = [-1.0]",
                "series[0].thresholds",
                "not positive",
            ),
            (
                "thresholds = [nan]",
                "series[0].thresholds",
                "not a finite number",
            ),
            (
                "thresholds = [inf]",
                "series[0].thresholds",
                "not a finite number",
            ),
            ("thresholds = \"10\"", "series[0].thresholds", "sequence"),
        ] {
            let m = message(&with(keys));
            assert!(m.contains(key) && m.contains(words), "{keys}: {m}");
        }
        let long = "x".repeat(MAX_UNIT_CHARS + 1);
        assert!(message(&with(&format!("unit = \"{long}\""))).contains("at most 32"));
        let many: Vec<String> = (1..=MAX_THRESHOLDS + 1).map(|i| i.to_string()).collect();
        let m = message(&with(&format!("thresholds = [{}]", many.join(", "))));
        assert!(m.contains("at most 16"), "{m}");
        // Under `none`, zero and negative thresholds are values like any other.
        let none = with("thresholds = [-1.0, 0.0]").replace("transform = \"log\"", "");
        assert_eq!(parse(&none).unwrap().series[0].thresholds, [-1.0, 0.0]);
    }

    #[test]
    fn report_sites_are_optional_unique_and_not_empty() {
        assert!(parse(GOOD).unwrap().series[0].report_sites.is_empty());
        let with = |sites: &str| {
            GOOD.replace(
                "groups = [\"crew\"]",
                &format!("groups = [\"crew\"]\nreport_sites = {sites}"),
            )
        };
        let c = parse(&with(r#"["Lake A", "Lake <B>"]"#)).unwrap();
        assert_eq!(c.series[0].report_sites, ["Lake A", "Lake <B>"]);
        let twice = message(&with(r#"["Lake A", "Lake A"]"#));
        assert!(
            twice.contains("series[0].report_sites") && twice.contains("named twice"),
            "{twice}"
        );
        let empty = message(&with(r#"[" "]"#));
        assert!(empty.contains("must not be empty"), "{empty}");
        let many: Vec<String> = (0..=MAX_REPORT_SITES)
            .map(|i| format!("\"L{i}\""))
            .collect();
        let over = message(&with(&format!("[{}]", many.join(", "))));
        assert!(over.contains("at most 48"), "{over}");
        let typo = message(&with("\"Lake A\""));
        assert!(typo.contains("report_sites"), "{typo}");
    }
}
