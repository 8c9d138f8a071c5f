//! `tidemark export WHAT [--format csv|parquet|arrow] [--out FILE] [--series NAME] …`:
//! the rows an analyst would otherwise query by hand, as one file.
//!
//! Every export is first built as one column-typed [`Table`]; the three writers only
//! encode it, so the columns, their order and their types are the same in every format.
//! CSV writes a missing value as an empty field and every real number with Rust's
//! shortest round-trip formatting, so parsing the text gives back the stored `f64`
//! exactly. The file is written atomically (temporary file + rename) or, without `--out`
//! or with `--out -`, to stdout, where a reader that stops early is not an error.

use std::io::IsTerminal as _;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use anyhow::Context as _;
use arrow_array::{
    ArrayRef, BooleanArray, Float64Array, Int64Array, RecordBatch, StringArray, UInt32Array,
};
use arrow_schema::{DataType, Field, Schema};

use super::Context;
use crate::pipeline::draws;
use crate::report::TARGETS;

/// What `tidemark export` writes.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum ExportWhat {
    /// Rows of the `latest_forecasts` view
    Forecasts,
    /// Posterior summaries of each series' latest published version
    Posterior,
    /// Rows of the `variance_drift` view
    Drift,
    /// Every stored draw of one published version (needs --series and --version)
    Draws,
}

/// The file format of an export.
#[derive(Debug, Clone, Copy, PartialEq, Eq, clap::ValueEnum)]
pub enum ExportFormat {
    /// Comma-separated text with a header row
    Csv,
    /// Apache Parquet
    Parquet,
    /// Arrow IPC file
    Arrow,
}

impl ExportFormat {
    fn is_binary(self) -> bool {
        !matches!(self, ExportFormat::Csv)
    }
}

/// The command line's choices for one export.
#[derive(Debug, Clone)]
pub struct ExportArgs {
    pub what: ExportWhat,
    pub format: ExportFormat,
    pub out: Option<PathBuf>,
    pub series: Option<String>,
    pub target: Option<String>,
    pub version: Option<i64>,
}

/// One column's values, typed as they are exported.
#[derive(Debug, Clone, PartialEq)]
enum Values {
    Text(Vec<String>),
    OptText(Vec<Option<String>>),
    Int(Vec<i64>),
    OptInt(Vec<Option<i64>>),
    UInt(Vec<u32>),
    Real(Vec<f64>),
    OptReal(Vec<Option<f64>>),
    Bool(Vec<bool>),
}

impl Values {
    fn len(&self) -> usize {
        match self {
            Values::Text(v) => v.len(),
            Values::OptText(v) => v.len(),
            Values::Int(v) => v.len(),
            Values::OptInt(v) => v.len(),
            Values::UInt(v) => v.len(),
            Values::Real(v) => v.len(),
            Values::OptReal(v) => v.len(),
            Values::Bool(v) => v.len(),
        }
    }

    fn field(&self, name: &str) -> Field {
        let (data_type, nullable) = match self {
            Values::Text(_) => (DataType::Utf8, false),
            Values::OptText(_) => (DataType::Utf8, true),
            Values::Int(_) => (DataType::Int64, false),
            Values::OptInt(_) => (DataType::Int64, true),
            Values::UInt(_) => (DataType::UInt32, false),
            Values::Real(_) => (DataType::Float64, false),
            Values::OptReal(_) => (DataType::Float64, true),
            Values::Bool(_) => (DataType::Boolean, false),
        };
        Field::new(name, data_type, nullable)
    }

    fn array(&self) -> ArrayRef {
        match self {
            Values::Text(v) => Arc::new(StringArray::from_iter_values(v)),
            Values::OptText(v) => Arc::new(StringArray::from(v.clone())),
            Values::Int(v) => Arc::new(Int64Array::from(v.clone())),
            Values::OptInt(v) => Arc::new(Int64Array::from(v.clone())),
            Values::UInt(v) => Arc::new(UInt32Array::from(v.clone())),
            Values::Real(v) => Arc::new(Float64Array::from(v.clone())),
            Values::OptReal(v) => Arc::new(Float64Array::from(v.clone())),
            Values::Bool(v) => Arc::new(BooleanArray::from(v.clone())),
        }
    }

    /// Row `i` as CSV text: empty for a missing value; `f64` in its shortest form that
    /// parses back to the same number (Rust's `Display`).
    fn cell(&self, i: usize) -> String {
        fn real(x: f64) -> String {
            x.to_string()
        }
        match self {
            Values::Text(v) => v[i].clone(),
            Values::OptText(v) => v[i].clone().unwrap_or_default(),
            Values::Int(v) => v[i].to_string(),
            Values::OptInt(v) => v[i].map(|x| x.to_string()).unwrap_or_default(),
            Values::UInt(v) => v[i].to_string(),
            Values::Real(v) => real(v[i]),
            Values::OptReal(v) => v[i].map(real).unwrap_or_default(),
            Values::Bool(v) => v[i].to_string(),
        }
    }
}

/// An export before encoding: named, typed columns of equal length.
#[derive(Debug, Clone, PartialEq)]
struct Table {
    columns: Vec<(&'static str, Values)>,
}

impl Table {
    fn rows(&self) -> usize {
        self.columns.first().map_or(0, |(_, v)| v.len())
    }

    fn batch(&self) -> anyhow::Result<RecordBatch> {
        let schema = Schema::new(
            self.columns
                .iter()
                .map(|(name, v)| v.field(name))
                .collect::<Vec<_>>(),
        );
        let arrays = self.columns.iter().map(|(_, v)| v.array()).collect();
        RecordBatch::try_new(Arc::new(schema), arrays).context("building the export table")
    }

    fn encode(&self, format: ExportFormat) -> anyhow::Result<Vec<u8>> {
        let mut buf = Vec::new();
        match format {
            ExportFormat::Csv => {
                let mut w = csv::Writer::from_writer(&mut buf);
                w.write_record(self.columns.iter().map(|(name, _)| *name))?;
                for i in 0..self.rows() {
                    w.write_record(self.columns.iter().map(|(_, v)| v.cell(i)))?;
                }
                w.flush()?;
            }
            ExportFormat::Parquet => {
                let batch = self.batch()?;
                let mut w = parquet::arrow::ArrowWriter::try_new(&mut buf, batch.schema(), None)?;
                w.write(&batch)?;
                w.close()?;
            }
            ExportFormat::Arrow => {
                let batch = self.batch()?;
                let mut w = arrow_ipc::writer::FileWriter::try_new(&mut buf, &batch.schema())?;
                w.write(&batch)?;
                w.finish()?;
            }
        }
        Ok(buf)
    }
}

/// Collect one column from rows.
fn col<R, T>(rows: &[R], f: impl Fn(&R) -> T) -> Vec<T> {
    rows.iter().map(f).collect()
}

async fn build(ctx: &Context, args: &ExportArgs) -> anyhow::Result<Table> {
    let store = ctx.open_store().await?;
    let table = build_from(&store, args).await;
    store.close().await;
    table
}

async fn build_from(store: &crate::store::Store, args: &ExportArgs) -> anyhow::Result<Table> {
    use Values::*;
    let series = args.series.as_deref();
    let columns = match args.what {
        ExportWhat::Forecasts => {
            let r = store
                .export_forecasts(series, args.target.as_deref())
                .await?;
            vec![
                ("series", Text(col(&r, |x| x.series.clone()))),
                ("fit_id", Int(col(&r, |x| x.fit_id))),
                ("target", Text(col(&r, |x| x.target.clone()))),
                ("site", OptText(col(&r, |x| x.site.clone()))),
                ("year", Int(col(&r, |x| x.year))),
                ("scenario", OptText(col(&r, |x| x.scenario.clone()))),
                (
                    "scenario_covariates",
                    OptText(col(&r, |x| x.scenario_covariates.clone())),
                ),
                (
                    "last_observed_year",
                    OptInt(col(&r, |x| x.last_observed_year)),
                ),
                ("mean", OptReal(col(&r, |x| x.mean))),
                ("sd", OptReal(col(&r, |x| x.sd))),
                ("q025", OptReal(col(&r, |x| x.q025))),
                ("q10", OptReal(col(&r, |x| x.q10))),
                ("q25", OptReal(col(&r, |x| x.q25))),
                ("q50", OptReal(col(&r, |x| x.q50))),
                ("q75", OptReal(col(&r, |x| x.q75))),
                ("q90", OptReal(col(&r, |x| x.q90))),
                ("q975", OptReal(col(&r, |x| x.q975))),
                ("share_site", OptReal(col(&r, |x| x.share_site))),
                ("share_year", OptReal(col(&r, |x| x.share_year))),
                ("share_groups", OptReal(col(&r, |x| x.share_groups))),
                ("share_residual", OptReal(col(&r, |x| x.share_residual))),
                ("share_estimation", OptReal(col(&r, |x| x.share_estimation))),
                ("prior_only", OptText(col(&r, |x| x.prior_only.clone()))),
                ("forecast_id", Int(col(&r, |x| x.forecast_id))),
                ("unit", OptText(col(&r, |x| x.unit.clone()))),
                ("scale", Text(col(&r, |x| x.scale.clone()))),
            ]
        }
        ExportWhat::Posterior => {
            let r = store.export_posterior(series).await?;
            vec![
                ("series", Text(col(&r, |x| x.series.clone()))),
                ("version", Int(col(&r, |x| x.version))),
                ("fit_id", Int(col(&r, |x| x.fit_id))),
                (
                    "data_through_year",
                    OptInt(col(&r, |x| x.data_through_year)),
                ),
                ("kind", Text(col(&r, |x| x.kind.clone()))),
                ("term", Text(col(&r, |x| x.term.clone()))),
                ("level", OptText(col(&r, |x| x.level.clone()))),
                ("mean", OptReal(col(&r, |x| x.mean))),
                ("sd", OptReal(col(&r, |x| x.sd))),
                ("q05", OptReal(col(&r, |x| x.q05))),
                ("q25", OptReal(col(&r, |x| x.q25))),
                ("q50", OptReal(col(&r, |x| x.q50))),
                ("q75", OptReal(col(&r, |x| x.q75))),
                ("q95", OptReal(col(&r, |x| x.q95))),
                ("rhat", OptReal(col(&r, |x| x.rhat))),
                ("ess_bulk", OptReal(col(&r, |x| x.ess_bulk))),
                ("ess_tail", OptReal(col(&r, |x| x.ess_tail))),
            ]
        }
        ExportWhat::Drift => {
            let r = store.export_drift(series).await?;
            vec![
                ("series", Text(col(&r, |x| x.series.clone()))),
                ("version", Int(col(&r, |x| x.version))),
                ("kind", Text(col(&r, |x| x.kind.clone()))),
                ("term", Text(col(&r, |x| x.term.clone()))),
                ("q05", OptReal(col(&r, |x| x.q05))),
                ("q50", OptReal(col(&r, |x| x.q50))),
                ("q95", OptReal(col(&r, |x| x.q95))),
                ("previous_q50", OptReal(col(&r, |x| x.previous_q50))),
                ("change", OptReal(col(&r, |x| x.change))),
                ("flagged", Bool(col(&r, |x| x.flagged))),
                ("unit", OptText(col(&r, |x| x.unit.clone()))),
                ("scale", OptText(col(&r, |x| x.scale.clone()))),
            ]
        }
        ExportWhat::Draws => {
            let (Some(name), Some(version)) = (series, args.version) else {
                anyhow::bail!("`export draws` needs --series NAME and --version V");
            };
            let Some(stored) = store.published_version_draws(name, version).await? else {
                if let Some(pruned) = store.version_draws_pruned(name, version).await? {
                    anyhow::bail!("series {name:?} version {version}: {}", pruned.explain());
                }
                let versions = store.published_versions(name).await?;
                let known = if versions.is_empty() {
                    "none yet".to_string()
                } else {
                    versions
                        .iter()
                        .map(i64::to_string)
                        .collect::<Vec<_>>()
                        .join(", ")
                };
                anyhow::bail!(
                    "series {name:?} has no published version {version} with stored draws \
                     (published versions: {known})"
                );
            };
            if stored.format != draws::FORMAT {
                anyhow::bail!(
                    "fit {} stores its draws as {:?}, which this tidemark cannot read",
                    stored.fit_id,
                    stored.format
                );
            }
            let r = draws::long_form(&stored.blob)
                .with_context(|| format!("reading the stored draws of fit {}", stored.fit_id))?;
            let n = r.len();
            vec![
                ("series", Text(vec![name.to_string(); n])),
                ("version", Int(vec![version; n])),
                ("fit_id", Int(vec![stored.fit_id; n])),
                ("kind", Text(col(&r, |x| x.kind.clone()))),
                ("term", Text(col(&r, |x| x.term.clone()))),
                ("level", OptText(col(&r, |x| x.level.clone()))),
                ("chain", UInt(col(&r, |x| x.chain))),
                ("draw", UInt(col(&r, |x| x.draw))),
                ("value", Real(col(&r, |x| x.value))),
            ]
        }
    };
    Ok(Table { columns })
}

/// Refuse options that do not apply to `what`, before anything is read.
fn check_options(ctx: &Context, args: &ExportArgs) -> anyhow::Result<()> {
    if let Some(name) = &args.series {
        super::require_series(ctx, name)?;
    }
    if args.target.is_some() && args.what != ExportWhat::Forecasts {
        anyhow::bail!("--target applies to `export forecasts` only");
    }
    if let Some(t) = &args.target {
        if !TARGETS.contains(&t.as_str()) {
            anyhow::bail!("unknown --target {t:?} (targets: {})", TARGETS.join(", "));
        }
    }
    if args.version.is_some() && args.what != ExportWhat::Draws {
        anyhow::bail!("--version applies to `export draws` only");
    }
    Ok(())
}

fn to_stdout(out: Option<&Path>) -> bool {
    out.is_none_or(|p| p == Path::new("-"))
}

pub async fn run(ctx: &Context, args: ExportArgs) -> anyhow::Result<()> {
    check_options(ctx, &args)?;
    let stdout = to_stdout(args.out.as_deref());
    if stdout && args.format.is_binary() && std::io::stdout().is_terminal() {
        anyhow::bail!(
            "refusing to write a binary file to the terminal; use --out FILE or redirect stdout"
        );
    }
    let table = build(ctx, &args).await?;
    let bytes = table.encode(args.format)?;
    match args.out.as_deref().filter(|_| !stdout) {
        None => super::print_bytes(&bytes),
        Some(path) => {
            crate::report::write_bytes_atomically(path, &bytes).with_context(|| {
                format!(
                    "cannot write the export {}; check that the folder exists and is writable",
                    path.display()
                )
            })?;
            super::print_out(&format!(
                "wrote {} ({} rows, {} bytes)\n",
                path.display(),
                table.rows(),
                bytes.len()
            ))
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn csv_cells_parse_back_to_the_same_numbers() {
        let awkward = [
            0.1 + 0.2,
            1.0 / 3.0,
            -2.5e-300,
            f64::MAX,
            f64::MIN_POSITIVE,
            5e-324,
            123_456_789.123_456_78,
            -0.0,
        ];
        let v = Values::Real(awkward.to_vec());
        for (i, x) in awkward.iter().enumerate() {
            let back: f64 = v.cell(i).parse().unwrap();
            assert_eq!(back.to_bits(), x.to_bits(), "{x}");
        }
        assert_eq!(Values::OptReal(vec![None]).cell(0), "");
        assert_eq!(Values::OptText(vec![None]).cell(0), "");
    }

    #[test]
    fn stdout_is_the_default_and_a_dash() {
        assert!(to_stdout(None));
        assert!(to_stdout(Some(Path::new("-"))));
        assert!(!to_stdout(Some(Path::new("out.csv"))));
    }
}
