//! Generated refits for the warm-start checks: a network fitted once, then changed the way
//! a monitoring series changes between two versions (the warm-start matrix of
//! docs/benchmarks.md, and the model tests of warm starts). Invented data only.

use crate::data::Data;
use crate::simulate::{rows_data, simulate_grouped_rows, GroupSpec, NetworkSpec, Row};
use crate::ModelError;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;

/// How the data of the new version differ from those of the previous one.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Change {
    /// The same observations again (a forced refit).
    Identical,
    /// One more year, drawn from the model.
    TypicalYear,
    /// One more year whose effect is 4 year-sds above the mean.
    OutlyingYear,
    /// 10% more sites, observed over the same years.
    NewSites,
    /// 5% of the values corrected: each moved by an independent `N(0, sd_residual^2)`
    /// amount (the previous version held the value before its correction).
    Corrections,
    /// Every response value multiplied by 1000 (a unit change, e.g. mg to µg).
    UnitChange,
}

impl Change {
    /// The four changes of the warm-start matrix, in its column order.
    pub const MATRIX: [Change; 4] = [
        Change::TypicalYear,
        Change::OutlyingYear,
        Change::NewSites,
        Change::Corrections,
    ];

    pub fn label(&self) -> &'static str {
        match self {
            Change::Identical => "identical data",
            Change::TypicalYear => "(a) one typical new year",
            Change::OutlyingYear => "(b) a new year 4 sds out",
            Change::NewSites => "(c) 10% new sites",
            Change::Corrections => "(d) 5% of values corrected",
            Change::UnitChange => "x1000 unit change",
        }
    }
}

/// The further grouping factors of a network with `components` variance components
/// (residual, site and year, then 0 to 3 of: a crew with 10 levels and sd 0.25, an
/// instrument with 6 levels and sd 0.2, a lab with 15 levels and sd 0.15).
pub fn groups_for(components: usize) -> Vec<GroupSpec> {
    let all = [
        ("crew", 10, 0.25),
        ("instrument", 6, 0.2),
        ("lab", 15, 0.15),
    ];
    all.iter()
        .take(components.saturating_sub(3))
        .map(|&(name, levels, sd)| GroupSpec {
            name: name.to_string(),
            levels,
            sd,
        })
        .collect()
}

/// A refit: the previous version's data and the new version's.
#[derive(Debug, Clone)]
pub struct Refit {
    pub before: Data,
    pub after: Data,
}

/// The refit of `change` on the network `spec` with `components` variance components.
/// `spec.years` and `spec.sites` are those of the previous version; the new year and the
/// new sites are generated with the same network (one more year, 10% more sites), so the
/// previous version's rows are the same in every change.
pub fn refit(spec: &NetworkSpec, components: usize, change: Change) -> Result<Refit, ModelError> {
    let groups = groups_for(components);
    let extra_sites = spec.sites.div_ceil(10);
    let full = NetworkSpec {
        sites: spec.sites + extra_sites,
        years: spec.years + 1,
        ..spec.clone()
    };
    let (rows, truth) = simulate_grouped_rows(&full, &groups);
    let last = spec.first_year + spec.years as i32;
    let old_site = |r: &Row| r.site < spec.sites;
    let before: Vec<Row> = rows
        .iter()
        .filter(|r| old_site(r) && r.year < last)
        .cloned()
        .collect();
    let after: Vec<Row> = match change {
        Change::Identical => before.clone(),
        Change::TypicalYear => rows.iter().filter(|r| old_site(r)).cloned().collect(),
        Change::OutlyingYear => {
            let shift = 4.0 * spec.sd_year - truth.year[spec.years];
            rows.iter()
                .filter(|r| old_site(r))
                .map(|r| {
                    let mut r = r.clone();
                    if r.year == last {
                        r.y += shift;
                    }
                    r
                })
                .collect()
        }
        Change::NewSites => rows.iter().filter(|r| r.year < last).cloned().collect(),
        Change::Corrections => {
            let mut rng = ChaCha8Rng::seed_from_u64(spec.seed);
            rng.set_stream(2);
            before
                .iter()
                .map(|r| {
                    let mut r = r.clone();
                    if rng.gen::<f64>() < 0.05 {
                        r.y += spec.sd_residual * rng.sample::<f64, _>(StandardNormal);
                    }
                    r
                })
                .collect()
        }
        Change::UnitChange => before
            .iter()
            .map(|r| Row {
                y: r.y * 1000.0,
                ..r.clone()
            })
            .collect(),
    };
    Ok(Refit {
        before: rows_data(&before, spec.covariates, &groups)?,
        after: rows_data(&after, spec.covariates, &groups)?,
    })
}
