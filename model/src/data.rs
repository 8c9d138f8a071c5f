//! Observations of one series, indexed by site, year and further grouping factors.
//!
//! `DataBuilder` takes rows with their labels as the store holds them; `build` checks the
//! guards of README.md ("What Tidemark fits", Guards): empty data, non-finite values, a
//! constant response, constant or collinear covariates, factors with too few or
//! unreplicated levels; and it turns labels into dense level indices. Labels are sorted
//! (sites as text, years as numbers) so that a fit does not depend on the order in which
//! rows arrive.

use crate::error::ModelError;
use std::collections::BTreeMap;

/// Builder of a [`Data`] set: one `push` per observation.
#[derive(Debug, Clone)]
pub struct DataBuilder {
    covariate_names: Vec<String>,
    group_names: Vec<String>,
    sites: Vec<String>,
    years: Vec<i32>,
    groups: Vec<Vec<String>>,
    covariates: Vec<Vec<f64>>,
    response: Vec<f64>,
    censored: Vec<(u32, Censoring)>,
    /// `Some(origin)`: a fixed linear term in `year - origin`, the last covariate, named
    /// [`TREND`].
    trend_origin: Option<i32>,
}

/// Name of the network trend's coefficient (per year of the year column).
pub const TREND: &str = "trend";

/// Which side of its limit a censored value lies on.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Censoring {
    /// Left-censored: the value is below its limit (a detection limit, `<x`).
    Below,
    /// Right-censored: the value is above its limit (a measuring range, `>x`).
    Above,
}

/// A validated set of observations on the model scale.
#[derive(Debug, Clone)]
pub struct Data {
    pub(crate) response: Vec<f64>,
    pub(crate) site: Vec<u32>,
    pub(crate) year: Vec<u32>,
    /// One index vector per further grouping factor.
    pub(crate) groups: Vec<Vec<u32>>,
    /// Column-major covariates, original units.
    pub(crate) covariates: Vec<Vec<f64>>,
    pub(crate) site_labels: Vec<String>,
    pub(crate) year_labels: Vec<i32>,
    pub(crate) group_labels: Vec<Vec<String>>,
    pub(crate) covariate_names: Vec<String>,
    pub(crate) group_names: Vec<String>,
    pub(crate) warnings: Vec<String>,
    /// Censored observations, by row: their `response` holds the limit, a provisional
    /// value for start points and data-scaled priors only (`censored.rs`).
    pub(crate) censored: Vec<(u32, Censoring)>,
    /// See [`DataBuilder::with_trend`].
    pub(crate) trend_origin: Option<i32>,
}

/// Largest magnitude of a response or covariate value on the model scale. Sums of squares
/// and cross-products over up to 1e9 observations stay finite below it (1e100 squared is
/// 1e200), so the data-scaled default priors and the statistics never overflow.
pub const MAX_MAGNITUDE: f64 = 1e100;

/// Below this many levels a variance is weakly identified (common practice: 5).
pub(crate) const FEW_LEVELS: usize = 5;

impl DataBuilder {
    /// Start a data set with the given covariate and further grouping-factor names.
    pub fn new(covariate_names: Vec<String>, group_names: Vec<String>) -> Self {
        DataBuilder {
            groups: vec![Vec::new(); group_names.len()],
            covariates: vec![Vec::new(); covariate_names.len()],
            covariate_names,
            group_names,
            sites: Vec::new(),
            years: Vec::new(),
            response: Vec::new(),
            censored: Vec::new(),
            trend_origin: None,
        }
    }

    /// Add a network trend: a fixed linear term in `year - origin`, appended as the last
    /// covariate and named [`TREND`] (its coefficient is the change per year on the model
    /// scale; the random year effects are deviations around it). `push` then takes the
    /// other covariates only.
    pub fn with_trend(mut self, origin: i32) -> Self {
        if self.trend_origin.is_none() {
            self.covariate_names.push(TREND.to_string());
            self.covariates.push(Vec::new());
        }
        self.trend_origin = Some(origin);
        self
    }

    /// Add one censored observation: its value lies on the `side` of `limit` (model
    /// scale). The likelihood of the row is the normal distribution function (or
    /// survival function) at the limit; nothing substitutes a value for it.
    pub fn push_censored(
        &mut self,
        site: &str,
        year: i32,
        groups: &[&str],
        covariates: &[f64],
        side: Censoring,
        limit: f64,
    ) -> Result<(), ModelError> {
        let row = self.response.len();
        self.push(site, year, groups, covariates, limit)?;
        self.censored.push((row as u32, side));
        Ok(())
    }

    /// Add one observation. `groups` and `covariates` follow the names given to `new`.
    pub fn push(
        &mut self,
        site: &str,
        year: i32,
        groups: &[&str],
        covariates: &[f64],
        response: f64,
    ) -> Result<(), ModelError> {
        let row = self.response.len();
        if groups.len() != self.group_names.len() {
            return Err(ModelError::RowShape {
                row,
                what: "group labels",
                expected: self.group_names.len(),
                found: groups.len(),
            });
        }
        let given = self.covariate_names.len() - usize::from(self.trend_origin.is_some());
        if covariates.len() != given {
            return Err(ModelError::RowShape {
                row,
                what: "covariate values",
                expected: given,
                found: covariates.len(),
            });
        }
        if !response.is_finite() {
            return Err(ModelError::NonFinite {
                row,
                what: "the response".into(),
                value: response,
            });
        }
        if response.abs() > MAX_MAGNITUDE {
            return Err(ModelError::OutOfRange {
                row,
                what: "the response".into(),
                value: response,
            });
        }
        for (name, &x) in self.covariate_names.iter().zip(covariates) {
            if !x.is_finite() {
                return Err(ModelError::NonFinite {
                    row,
                    what: format!("covariate `{name}`"),
                    value: x,
                });
            }
            if x.abs() > MAX_MAGNITUDE {
                return Err(ModelError::OutOfRange {
                    row,
                    what: format!("covariate `{name}`"),
                    value: x,
                });
            }
        }
        self.sites.push(site.to_string());
        self.years.push(year);
        for (column, label) in self.groups.iter_mut().zip(groups) {
            column.push((*label).to_string());
        }
        for (column, &x) in self.covariates.iter_mut().zip(covariates) {
            column.push(x);
        }
        if let (Some(origin), Some(column)) = (self.trend_origin, self.covariates.last_mut()) {
            column.push(f64::from(year) - f64::from(origin));
        }
        self.response.push(response);
        Ok(())
    }

    /// Number of observations pushed so far.
    pub fn len(&self) -> usize {
        self.response.len()
    }

    /// True when nothing was pushed.
    pub fn is_empty(&self) -> bool {
        self.response.is_empty()
    }

    /// Validate and index the observations.
    pub fn build(self) -> Result<Data, ModelError> {
        let n = self.response.len();
        if n == 0 {
            return Err(ModelError::Empty);
        }
        let mut names = std::collections::HashSet::new();
        for name in self.covariate_names.iter().chain(&self.group_names) {
            if !names.insert(name.as_str())
                || name == "site"
                || name == "year"
                || name == "residual"
            {
                return Err(ModelError::DuplicateName(name.clone()));
            }
        }
        let first = self.response[0];
        if self.response.iter().all(|&y| y == first) {
            return Err(ModelError::ConstantResponse { value: first });
        }
        if self.trend_origin.is_some() && self.years.iter().all(|&y| y == self.years[0]) {
            return Err(ModelError::TrendNeedsYears);
        }
        check_covariates(&self.covariate_names, &self.covariates)?;

        let (site, site_labels) = index_labels(&self.sites);
        let (year, year_labels) = index_labels(&self.years);
        let mut groups = Vec::new();
        let mut group_labels = Vec::new();
        for column in &self.groups {
            let (idx, labels) = index_labels(column);
            groups.push(idx);
            group_labels.push(labels);
        }

        let mut warnings = Vec::new();
        let factors: Vec<(&str, &[u32], usize)> = [
            ("site", site.as_slice(), site_labels.len()),
            ("year", year.as_slice(), year_labels.len()),
        ]
        .into_iter()
        .chain(
            self.group_names
                .iter()
                .zip(&groups)
                .zip(&group_labels)
                .map(|((name, idx), labels)| (name.as_str(), idx.as_slice(), labels.len())),
        )
        .collect();
        for (name, idx, levels) in factors {
            check_factor(name, idx, levels, &mut warnings)?;
        }

        Ok(Data {
            response: self.response,
            site,
            year,
            groups,
            covariates: self.covariates,
            site_labels,
            year_labels,
            group_labels,
            covariate_names: self.covariate_names,
            group_names: self.group_names,
            warnings,
            censored: self.censored,
            trend_origin: self.trend_origin,
        })
    }
}

impl Data {
    /// Number of censored observations.
    pub fn n_censored(&self) -> usize {
        self.censored.len()
    }

    /// The network trend's origin year, when the data carry a trend.
    pub fn trend_origin(&self) -> Option<i32> {
        self.trend_origin
    }

    pub fn n_obs(&self) -> usize {
        self.response.len()
    }
    pub fn n_sites(&self) -> usize {
        self.site_labels.len()
    }
    pub fn n_years(&self) -> usize {
        self.year_labels.len()
    }
    pub fn site_labels(&self) -> &[String] {
        &self.site_labels
    }
    /// Observed years, ascending.
    pub fn year_labels(&self) -> &[i32] {
        &self.year_labels
    }
    pub fn covariate_names(&self) -> &[String] {
        &self.covariate_names
    }
    pub fn group_names(&self) -> &[String] {
        &self.group_names
    }
    pub fn group_labels(&self) -> &[Vec<String>] {
        &self.group_labels
    }
    /// Warnings raised by the guards (for example a factor with fewer than 5 levels).
    pub fn warnings(&self) -> &[String] {
        &self.warnings
    }
    /// Levels of each factor: site, year, then the further groups.
    pub fn factor_levels(&self) -> Vec<(String, usize)> {
        let mut out = vec![
            ("site".to_string(), self.n_sites()),
            ("year".to_string(), self.n_years()),
        ];
        for (name, labels) in self.group_names.iter().zip(&self.group_labels) {
            out.push((name.clone(), labels.len()));
        }
        out
    }
    /// Names of the variance components: `residual`, `site`, `year`, then the groups.
    pub fn sd_names(&self) -> Vec<String> {
        ["residual", "site", "year"]
            .iter()
            .map(|s| s.to_string())
            .chain(self.group_names.iter().cloned())
            .collect()
    }
    /// Latest observed year of each site (index-aligned with `site_labels`).
    pub fn site_last_year(&self) -> Vec<i32> {
        let mut last = vec![i32::MIN; self.n_sites()];
        for (&s, &t) in self.site.iter().zip(&self.year) {
            let y = self.year_labels[t as usize];
            if y > last[s as usize] {
                last[s as usize] = y;
            }
        }
        last
    }
    /// Per covariate, each site's own value (index-aligned with `site_labels`) when the
    /// covariate is an attribute of the site — the same value at every visit of every site
    /// (the build guarantees replicated sites, so "the same" means something) — else
    /// `None`. Known-site forecasts hold such a covariate at the site's value: the
    /// site's effect was estimated beside it, so the network mean would shift that site by
    /// the coefficient times its distance from the mean.
    /// The trend column, which varies with the year, is never one.
    pub fn site_level_covariates(&self) -> Vec<Option<Vec<f64>>> {
        let n_sites = self.n_sites();
        let trend_at = self
            .trend_origin
            .map(|_| self.covariates.len().saturating_sub(1));
        self.covariates
            .iter()
            .enumerate()
            .map(|(j, column)| {
                if Some(j) == trend_at {
                    return None;
                }
                let mut value: Vec<Option<f64>> = vec![None; n_sites];
                for (&s, &x) in self.site.iter().zip(column) {
                    match value[s as usize] {
                        None => value[s as usize] = Some(x),
                        Some(v) if v == x => {}
                        Some(_) => return None,
                    }
                }
                // Every site has at least one visit, so every entry is set.
                value.into_iter().collect()
            })
            .collect()
    }
    /// Network mean of each covariate (original units).
    pub fn covariate_means(&self) -> Vec<f64> {
        self.covariates
            .iter()
            .map(|c| c.iter().sum::<f64>() / c.len() as f64)
            .collect()
    }
}

fn index_labels<T: Ord + Clone>(values: &[T]) -> (Vec<u32>, Vec<T>) {
    let mut map: BTreeMap<&T, u32> = BTreeMap::new();
    for v in values {
        map.entry(v).or_insert(0);
    }
    let labels: Vec<T> = map.keys().map(|&k| k.clone()).collect();
    for (i, v) in map.values_mut().enumerate() {
        *v = i as u32;
    }
    let idx = values.iter().map(|v| map[v]).collect();
    (idx, labels)
}

fn check_factor(
    name: &str,
    idx: &[u32],
    levels: usize,
    warnings: &mut Vec<String>,
) -> Result<(), ModelError> {
    let mut counts = vec![0usize; levels];
    for &i in idx {
        counts[i as usize] += 1;
    }
    let replicated = counts.iter().filter(|&&c| c >= 2).count();
    // A level seen once adds no information separating its effect from residual noise;
    // with (almost) no replicated level the two variances trade off freely.
    let needed = levels.min(2).max((levels as f64 * 0.05).ceil() as usize);
    if replicated < needed {
        return Err(ModelError::NotReplicated {
            factor: name.into(),
            levels,
            replicated,
        });
    }
    if levels == 1 {
        warnings.push(format!(
            "grouping factor `{name}` has a single level: its variance is determined by its prior alone \
             (REML refuses it), and forecasts for a new level use that prior"
        ));
    } else if levels < FEW_LEVELS {
        warnings.push(format!(
            "grouping factor `{name}` has only {levels} levels (fewer than {FEW_LEVELS}): its variance is weakly identified and leans on the prior"
        ));
    }
    Ok(())
}

fn check_covariates(names: &[String], columns: &[Vec<f64>]) -> Result<(), ModelError> {
    let n = columns.first().map_or(0, |c| c.len()) as f64;
    let mut standardised = Vec::with_capacity(columns.len());
    for (name, column) in names.iter().zip(columns) {
        let mean = column.iter().sum::<f64>() / n;
        let var = column.iter().map(|x| (x - mean).powi(2)).sum::<f64>() / n;
        if var <= 1e-24 * mean.abs().max(1.0).powi(2) {
            return Err(ModelError::ConstantCovariate {
                name: name.clone(),
                value: mean,
            });
        }
        let sd = var.sqrt();
        standardised.push(column.iter().map(|x| (x - mean) / sd).collect::<Vec<f64>>());
    }
    let p = standardised.len();
    if p < 2 {
        return Ok(());
    }
    let corr = nalgebra::DMatrix::from_fn(p, p, |i, j| {
        standardised[i]
            .iter()
            .zip(&standardised[j])
            .map(|(a, b)| a * b)
            .sum::<f64>()
            / n
    });
    let eig = corr.symmetric_eigen();
    let min_eigen = eig
        .eigenvalues
        .iter()
        .cloned()
        .fold(f64::INFINITY, f64::min);
    if min_eigen < 1e-8 {
        return Err(ModelError::Collinear {
            names: names.to_vec(),
            min_eigen,
        });
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn builder(cov: &[&str], groups: &[&str]) -> DataBuilder {
        DataBuilder::new(
            cov.iter().map(|s| s.to_string()).collect(),
            groups.iter().map(|s| s.to_string()).collect(),
        )
    }

    #[test]
    fn a_covariate_constant_within_every_site_is_an_attribute_of_the_site() {
        // depth: one value per site; temp: varies within site b.
        let mut b = builder(&["depth", "temp"], &[]);
        for (site, year, depth, temp, y) in [
            ("a", 2000, 3.0, 10.0, 1.0),
            ("a", 2001, 3.0, 10.0, 1.4),
            ("b", 2000, 8.0, 11.0, 2.0),
            ("b", 2001, 8.0, 12.5, 2.1),
            ("c", 2001, 5.0, 9.0, 1.7),
            ("c", 2002, 5.0, 9.0, 1.1),
        ] {
            b.push(site, year, &[], &[depth, temp], y).unwrap();
        }
        let d = b.build().unwrap();
        assert_eq!(
            d.site_level_covariates(),
            vec![Some(vec![3.0, 8.0, 5.0]), None]
        );
    }

    #[test]
    fn guards_refuse_bad_designs() {
        assert_eq!(builder(&[], &[]).build().unwrap_err(), ModelError::Empty);

        let mut b = builder(&[], &[]);
        assert!(matches!(
            b.push("a", 2000, &[], &[], f64::NAN),
            Err(ModelError::NonFinite { .. })
        ));
        // Finite but beyond what sums of squares can hold: refused under its own name.
        assert!(matches!(
            b.push("a", 2000, &[], &[], -1e200),
            Err(ModelError::OutOfRange { .. })
        ));
        b.push("a", 2000, &[], &[], MAX_MAGNITUDE).unwrap();
        let mut c = builder(&["temp"], &[]);
        assert!(matches!(
            c.push("a", 2000, &[], &[1e101], 1.0),
            Err(ModelError::OutOfRange { .. })
        ));

        let mut b = builder(&[], &[]);
        for s in 0..5 {
            for t in 0..3 {
                b.push(&format!("s{s}"), 2000 + t, &[], &[], 1.5).unwrap();
            }
        }
        assert!(matches!(
            b.build(),
            Err(ModelError::ConstantResponse { .. })
        ));

        // Each site observed once: the site factor is not replicated.
        let mut b = builder(&[], &[]);
        for s in 0..40 {
            b.push(&format!("s{s}"), 2000 + (s % 4), &[], &[], s as f64)
                .unwrap();
        }
        let err = b.build().unwrap_err();
        assert!(matches!(err, ModelError::NotReplicated { ref factor, .. } if factor == "site"));
        assert!(err.to_string().contains("residual noise"));

        // Two collinear covariates.
        let mut b = builder(&["x", "x2"], &[]);
        for s in 0..6 {
            for t in 0..6 {
                let x = (s * 7 + t) as f64;
                b.push(
                    &format!("s{s}"),
                    2000 + t,
                    &[],
                    &[x, 3.0 * x - 1.0],
                    x.sin(),
                )
                .unwrap();
            }
        }
        assert!(matches!(b.build(), Err(ModelError::Collinear { .. })));
    }

    #[test]
    fn few_levels_warn_and_labels_are_sorted() {
        let mut b = builder(&[], &["crew"]);
        for s in ["b", "a", "c", "d", "e", "f"] {
            for t in [2003, 2001, 2002] {
                let crew = if t == 2001 { "x" } else { "y" };
                b.push(
                    s,
                    t,
                    &[crew],
                    &[],
                    (t as f64).ln() + s.len() as f64 * 0.1 + (t % 7) as f64,
                )
                .unwrap();
            }
        }
        let d = b.build().unwrap();
        assert_eq!(d.site_labels(), &["a", "b", "c", "d", "e", "f"]);
        assert_eq!(d.year_labels(), &[2001, 2002, 2003]);
        assert_eq!(d.warnings().len(), 2, "{:?}", d.warnings()); // year (3) and crew (2)
        assert!(d.warnings()[0].contains("`year`"));
    }
}
