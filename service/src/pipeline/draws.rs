//! The draws of a version as one Arrow IPC file: every saved draw of the standard
//! deviations and coefficients, and a thinned set of joint draws of the random effects
//! (the forecast basis), its buffers zstd-compressed. Any Arrow reader with zstd support can open it; Tidemark reads it back for warm starts
//! and for `tidemark forecast`.
//!
//! One row per quantity, with columns `kind` (`sd`, `coef`, `effect`, `basis`, `data`),
//! `term`, `level` (nullable), `chains`, `draws_per_chain` and `values` (a list of
//! `chains x draws_per_chain` numbers, chain after chain). `basis/draw_index` holds, per
//! kept joint draw, its index into the full `sd`/`coef` draws (chain-major); `data`
//! rows hold the covariate means (`covariate_mean`, level = covariate), each site's
//! latest observed year (`site_last_year`, level = site) and, for a covariate that is an
//! attribute of the site, every site's value in the order of the `effect/site` rows
//! (`site_covariate`, level = covariate); a series with a trend has a `data/trend_origin`
//! row (its one value the origin year; the last coefficient is the trend).

use std::sync::Arc;

use arrow_array::builder::{Float64Builder, ListBuilder, StringBuilder, UInt32Builder};
use arrow_array::{Array, Float64Array, ListArray, RecordBatch, StringArray, UInt32Array};
use arrow_ipc::reader::FileReader;
use arrow_ipc::writer::{FileWriter, IpcWriteOptions};
use arrow_ipc::CompressionType;
use arrow_schema::{ArrowError, DataType, Field, Schema};
use tidemark_model::{Data, ForecastBasis, Posterior, SamplerSettings, WarmStart};

/// Format tag stored in `fit_draws.format`.
pub const FORMAT: &str = "arrow-ipc-file";

fn schema() -> Schema {
    Schema::new(vec![
        Field::new("kind", DataType::Utf8, false),
        Field::new("term", DataType::Utf8, false),
        Field::new("level", DataType::Utf8, true),
        Field::new("chains", DataType::UInt32, false),
        Field::new("draws_per_chain", DataType::UInt32, false),
        Field::new(
            "values",
            DataType::List(Arc::new(Field::new("item", DataType::Float64, true))),
            false,
        ),
    ])
}

struct Rows {
    kind: StringBuilder,
    term: StringBuilder,
    level: StringBuilder,
    chains: UInt32Builder,
    draws: UInt32Builder,
    values: ListBuilder<Float64Builder>,
}

impl Rows {
    /// Builders sized for `rows` rows of `values` numbers in all, so that the values are
    /// written once into a buffer of their final size: a growing buffer would hold up to
    /// twice the draws while it doubles, and the draws are the largest thing a fit holds.
    fn with_capacity(rows: usize, values: usize) -> Self {
        Rows {
            kind: StringBuilder::new(),
            term: StringBuilder::new(),
            level: StringBuilder::new(),
            chains: UInt32Builder::with_capacity(rows),
            draws: UInt32Builder::with_capacity(rows),
            values: ListBuilder::with_capacity(Float64Builder::with_capacity(values), rows),
        }
    }

    fn push(
        &mut self,
        kind: &str,
        term: &str,
        level: Option<&str>,
        chains: usize,
        draws: usize,
        values: impl Iterator<Item = f64>,
    ) {
        self.kind.append_value(kind);
        self.term.append_value(term);
        self.level.append_option(level);
        self.chains.append_value(chains as u32);
        self.draws.append_value(draws as u32);
        let items = self.values.values();
        for v in values {
            items.append_value(v);
        }
        self.values.append(true);
    }
}

/// Upper-leaning size in bytes of the draws file a fit with these settings writes: every
/// saved draw of the standard deviations and coefficients, the forecast basis of
/// `basis_per_chain` joint draws per chain, and a row header per quantity.
pub fn size_estimate(data: &Data, settings: &SamplerSettings, basis_per_chain: usize) -> u64 {
    let m = data.sd_names().len() as u64;
    let p = 1 + data.covariate_names().len() as u64;
    let levels = (data.n_sites() + data.n_years()) as u64
        + data
            .group_labels()
            .iter()
            .map(|l| l.len() as u64)
            .sum::<u64>();
    let chains = settings.chains as u64;
    let saved = chains
        .saturating_mul(settings.draws as u64)
        .saturating_mul(m + p);
    let basis = chains
        .saturating_mul(basis_per_chain as u64)
        .saturating_mul(levels + 1);
    let rows = m + p + levels + 1 + data.n_sites() as u64 + p;
    saved
        .saturating_add(basis)
        .saturating_mul(8)
        .saturating_add(rows.saturating_mul(ROW_BYTES))
        .saturating_add(FILE_BYTES)
}

/// Bytes a row costs beyond its values (offsets, kind, term and level); a level is a site
/// label, so this leaves room for long ones.
const ROW_BYTES: u64 = 256;
/// The file's schema, footer and alignment.
const FILE_BYTES: u64 = 1 << 16;

/// Encode a posterior's draws, keeping `basis_per_chain` joint effect draws per chain.
pub fn encode(post: &Posterior, basis: &ForecastBasis) -> Result<Vec<u8>, ArrowError> {
    let (c, d) = (post.chains, post.draws);
    let m = post.sd_names.len();
    let p = post.coef_names.len();
    let effect_rows = basis.site_labels.len()
        + basis.year_labels.len()
        + basis.group_labels.iter().map(Vec::len).sum::<usize>()
        + 1;
    let site_level: Vec<(&String, &Vec<f64>)> = post.coef_names[1..]
        .iter()
        .zip(&basis.site_covariates)
        .filter_map(|(name, v)| v.as_ref().map(|v| (name, v)))
        .collect();
    let data_rows = basis.covariate_means.len() + basis.site_labels.len() + site_level.len();
    let n_rows = m + p + effect_rows + data_rows;
    let n_values = c * d * (m + p)
        + basis.n * effect_rows
        + data_rows
        + site_level.len() * basis.site_labels.len();
    let mut rows = Rows::with_capacity(n_rows, n_values);
    for (k, name) in post.sd_names.iter().enumerate() {
        rows.push(
            "sd",
            name,
            None,
            c,
            d,
            (0..c * d).map(|i| post.sd_draws[i * m + k]),
        );
    }
    for (j, name) in post.coef_names.iter().enumerate() {
        rows.push(
            "coef",
            name,
            None,
            c,
            d,
            (0..c * d).map(|i| post.coef_draws[i * p + j]),
        );
    }
    let n = basis.n;
    let per_chain = n / c.max(1);
    for (s, label) in basis.site_labels.iter().enumerate() {
        rows.push(
            "effect",
            "site",
            Some(label),
            c,
            per_chain,
            basis.site[s * n..(s + 1) * n].iter().copied(),
        );
    }
    for (t, year) in basis.year_labels.iter().enumerate() {
        rows.push(
            "effect",
            "year",
            Some(&year.to_string()),
            c,
            per_chain,
            basis.year[t * n..(t + 1) * n].iter().copied(),
        );
    }
    for ((name, labels), values) in basis
        .group_names
        .iter()
        .zip(&basis.group_labels)
        .zip(&basis.groups)
    {
        for (l, label) in labels.iter().enumerate() {
            rows.push(
                "effect",
                name,
                Some(label),
                c,
                per_chain,
                values[l * n..(l + 1) * n].iter().copied(),
            );
        }
    }
    rows.push(
        "basis",
        "draw_index",
        None,
        c,
        per_chain,
        basis.draw_index.iter().map(|&i| i as f64),
    );
    for (name, mean) in post.coef_names[1..].iter().zip(&basis.covariate_means) {
        rows.push(
            "data",
            "covariate_mean",
            Some(name),
            1,
            1,
            std::iter::once(*mean),
        );
    }
    if let Some(origin) = basis.trend_origin {
        rows.push(
            "data",
            "trend_origin",
            None,
            1,
            1,
            std::iter::once(f64::from(origin)),
        );
    }
    for (label, year) in basis.site_labels.iter().zip(&basis.site_last_year) {
        rows.push(
            "data",
            "site_last_year",
            Some(label),
            1,
            1,
            std::iter::once(*year as f64),
        );
    }
    for (name, values) in &site_level {
        rows.push(
            "data",
            "site_covariate",
            Some(name),
            1,
            values.len(),
            values.iter().copied(),
        );
    }

    let schema = Arc::new(schema());
    let batch = RecordBatch::try_new(
        schema.clone(),
        vec![
            Arc::new(rows.kind.finish()),
            Arc::new(rows.term.finish()),
            Arc::new(rows.level.finish()),
            Arc::new(rows.chains.finish()),
            Arc::new(rows.draws.finish()),
            Arc::new(rows.values.finish()),
        ],
    )?;
    // The file is the values plus offsets, labels and metadata: reserve that once.
    let mut buf =
        Vec::with_capacity(n_values * 8 + n_rows * ROW_BYTES as usize + FILE_BYTES as usize);
    {
        // Arrow IPC's own buffer compression (zstd): any reader with zstd support opens
        // it, and the draws, the largest part of a version, shrink losslessly.
        let options =
            IpcWriteOptions::default().try_with_compression(Some(CompressionType::ZSTD))?;
        let mut writer = FileWriter::try_new_with_options(&mut buf, &schema, options)?;
        writer.write(&batch)?;
        writer.finish()?;
    }
    Ok(buf)
}

/// What a stored draws file gives back.
#[derive(Debug, Clone)]
pub struct Decoded {
    pub warm_start: WarmStart,
    pub basis: ForecastBasis,
}

fn bad(msg: &str) -> ArrowError {
    ArrowError::InvalidArgumentError(format!("stored draws: {msg}"))
}

/// One stored row of a draws file, as written by [`encode`].
struct StoredRow {
    kind: String,
    term: String,
    level: Option<String>,
    chains: usize,
    draws_per_chain: usize,
    values: Vec<f64>,
}

/// Every row of a file written by [`encode`], in stored order: the one place that knows
/// the file's column layout on the way back in.
fn stored_rows(blob: &[u8]) -> Result<Vec<StoredRow>, ArrowError> {
    let reader = FileReader::try_new(std::io::Cursor::new(blob), None)?;
    let mut out = Vec::new();
    for batch in reader {
        let batch = batch?;
        let text = |i: usize, name: &str| {
            batch
                .column(i)
                .as_any()
                .downcast_ref::<StringArray>()
                .cloned()
                .ok_or_else(|| bad(name))
        };
        let count = |i: usize, name: &str| {
            batch
                .column(i)
                .as_any()
                .downcast_ref::<UInt32Array>()
                .cloned()
                .ok_or_else(|| bad(name))
        };
        let (kind, term, level) = (text(0, "kind")?, text(1, "term")?, text(2, "level")?);
        let (chains, per_chain) = (count(3, "chains")?, count(4, "draws")?);
        let values = batch
            .column(5)
            .as_any()
            .downcast_ref::<ListArray>()
            .ok_or_else(|| bad("values"))?;
        for r in 0..batch.num_rows() {
            let list = values.value(r);
            let v = list
                .as_any()
                .downcast_ref::<Float64Array>()
                .ok_or_else(|| bad("values items"))?;
            out.push(StoredRow {
                kind: kind.value(r).to_string(),
                term: term.value(r).to_string(),
                level: (!level.is_null(r)).then(|| level.value(r).to_string()),
                chains: chains.value(r) as usize,
                draws_per_chain: per_chain.value(r) as usize,
                values: v.values().to_vec(),
            });
        }
    }
    Ok(out)
}

/// Decode a file written by [`encode`].
pub fn decode(blob: &[u8]) -> Result<Decoded, ArrowError> {
    let mut sd: Vec<(String, Vec<f64>)> = Vec::new();
    let mut coef: Vec<(String, Vec<f64>)> = Vec::new();
    let mut effects: Vec<(String, String, Vec<f64>)> = Vec::new();
    let mut draw_index: Vec<f64> = Vec::new();
    let mut covariate_means = Vec::new();
    let mut site_last_year: Vec<(String, i32)> = Vec::new();
    let mut trend_origin: Option<i32> = None;
    let mut site_covariates: std::collections::HashMap<String, Vec<f64>> = Default::default();
    let (mut chains, mut draws) = (0usize, 0usize);
    for row in stored_rows(blob)? {
        let StoredRow {
            kind,
            term,
            level,
            values: v,
            ..
        } = row;
        match kind.as_str() {
            "sd" => {
                chains = row.chains;
                draws = row.draws_per_chain;
                sd.push((term, v));
            }
            "coef" => coef.push((term, v)),
            "effect" => effects.push((term, level.unwrap_or_default(), v)),
            "basis" => draw_index = v,
            "data" if term == "covariate_mean" => covariate_means.push(v[0]),
            "data" if term == "site_last_year" => {
                site_last_year.push((level.unwrap_or_default(), v[0] as i32))
            }
            "data" if term == "trend_origin" => trend_origin = v.first().map(|&y| y as i32),
            "data" if term == "site_covariate" => {
                site_covariates.insert(level.unwrap_or_default(), v);
            }
            _ => {}
        }
    }
    if sd.is_empty() || coef.is_empty() {
        return Err(bad("no sd or coef draws"));
    }
    let m = sd.len();
    let total = chains * draws;
    let sd_names: Vec<String> = sd.iter().map(|(n, _)| n.clone()).collect();
    let mut sd_draws = vec![0.0; total * m];
    for (k, (_, v)) in sd.iter().enumerate() {
        for i in 0..total.min(v.len()) {
            sd_draws[i * m + k] = v[i];
        }
    }
    let warm_start = WarmStart::from_draws(&sd_names, &sd_draws);
    let n = draw_index.len();
    let idx: Vec<usize> = draw_index
        .iter()
        .map(|&i| {
            if i.is_finite() && (i as usize) < total {
                i as usize
            } else {
                0
            }
        })
        .collect();
    let mut group_names: Vec<String> = Vec::new();
    let mut group_labels: Vec<Vec<String>> = Vec::new();
    let mut groups: Vec<Vec<f64>> = Vec::new();
    let (mut site_labels, mut site, mut year_labels, mut year) =
        (Vec::new(), Vec::new(), Vec::new(), Vec::new());
    for (term, level, v) in effects {
        match term.as_str() {
            "site" => {
                site_labels.push(level);
                site.extend(v);
            }
            "year" => {
                year_labels.push(level.parse::<i32>().map_err(|_| bad("year label"))?);
                year.extend(v);
            }
            _ => {
                let k = match group_names.iter().position(|g| *g == term) {
                    Some(k) => k,
                    None => {
                        group_names.push(term.clone());
                        group_labels.push(Vec::new());
                        groups.push(Vec::new());
                        group_names.len() - 1
                    }
                };
                group_labels[k].push(level);
                groups[k].extend(v);
            }
        }
    }
    let last: std::collections::HashMap<String, i32> = site_last_year.into_iter().collect();
    // Files written before site-level covariates were kept have none: the network mean.
    let site_covariates = coef[1..]
        .iter()
        .map(|(name, _)| {
            site_covariates
                .remove(name)
                .filter(|v| v.len() == site_labels.len())
        })
        .collect();
    let basis = ForecastBasis {
        site_covariates,
        coef_names: coef.iter().map(|(n, _)| n.clone()).collect(),
        site_last_year: site_labels
            .iter()
            .map(|s| last.get(s).copied().unwrap_or(0))
            .collect(),
        site_labels,
        year_labels,
        group_names,
        group_labels,
        covariate_means,
        trend_origin,
        n,
        draw_index: idx.clone(),
        site,
        year,
        groups,
        sd: idx
            .iter()
            .flat_map(|&i| sd_draws[i * m..(i + 1) * m].to_vec())
            .collect(),
        coef: idx
            .iter()
            .flat_map(|&i| coef.iter().map(move |(_, v)| v[i]))
            .collect(),
        sd_names,
    };
    Ok(Decoded { warm_start, basis })
}

/// One stored draw in long form: the quantity (`kind`, `term`, `level`), the chain and
/// the draw's index within that chain (both from 0), and its value.
#[derive(Debug, Clone, PartialEq)]
pub struct LongDraw {
    pub kind: String,
    pub term: String,
    pub level: Option<String>,
    pub chain: u32,
    pub draw: u32,
    pub value: f64,
}

/// Every value of a file written by [`encode`], one row per value, in stored order.
pub fn long_form(blob: &[u8]) -> Result<Vec<LongDraw>, ArrowError> {
    let mut out = Vec::new();
    for row in stored_rows(blob)? {
        if row.values.len() != row.chains * row.draws_per_chain {
            return Err(bad("a row's value count is not chains x draws_per_chain"));
        }
        let per = row.draws_per_chain.max(1);
        for (i, &value) in row.values.iter().enumerate() {
            out.push(LongDraw {
                kind: row.kind.clone(),
                term: row.term.clone(),
                level: row.level.clone(),
                chain: (i / per) as u32,
                draw: (i % per) as u32,
                value,
            });
        }
    }
    Ok(out)
}
