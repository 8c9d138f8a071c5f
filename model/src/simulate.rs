//! Generated monitoring networks with known parameters, for tests, benchmarks and
//! simulation-based calibration. Invented data: never a substitute for a reference.

use crate::data::{Data, DataBuilder};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::StandardNormal;

/// Shape and true parameters of a generated network.
#[derive(Debug, Clone)]
pub struct NetworkSpec {
    pub sites: usize,
    pub years: usize,
    pub visits: usize,
    /// Share of site-years without observations.
    pub missing: f64,
    pub covariates: usize,
    pub sd_residual: f64,
    pub sd_site: f64,
    pub sd_year: f64,
    pub intercept: f64,
    /// Coefficient of every covariate (each covariate ~ N(10, 2^2)).
    pub coef: f64,
    pub first_year: i32,
    pub seed: u64,
}

/// The benchmark network B1 (`model/benches/networks.rs`): 200 sites x 20 years from 2000,
/// two visits per observed site-year, 15% of site-years unobserved, two covariates with
/// coefficient 0.1, intercept 2, and sds 0.3 (residual), 0.6 (site), 0.4 (year) — sites
/// vary more than years, as in many monitoring networks. Tests override what they need,
/// usually the size and the seed.
impl Default for NetworkSpec {
    fn default() -> Self {
        NetworkSpec {
            sites: 200,
            years: 20,
            visits: 2,
            missing: 0.15,
            covariates: 2,
            sd_residual: 0.3,
            sd_site: 0.6,
            sd_year: 0.4,
            intercept: 2.0,
            coef: 0.1,
            first_year: 2000,
            seed: 7,
        }
    }
}

/// The true effects behind a generated network.
#[derive(Debug, Clone)]
pub struct Truth {
    pub site: Vec<f64>,
    pub year: Vec<f64>,
}

/// One row of a generated network.
#[derive(Debug, Clone)]
pub struct Row {
    pub site: usize,
    pub year: i32,
    pub covariates: Vec<f64>,
    pub y: f64,
}

/// Generate the rows of a network (site labels `S00042`, years from `first_year`).
pub fn simulate_rows(spec: &NetworkSpec) -> (Vec<Row>, Truth) {
    let mut rng = ChaCha8Rng::seed_from_u64(spec.seed);
    let normal = |rng: &mut ChaCha8Rng| rng.sample::<f64, _>(StandardNormal);
    let site: Vec<f64> = (0..spec.sites)
        .map(|_| spec.sd_site * normal(&mut rng))
        .collect();
    let year: Vec<f64> = (0..spec.years)
        .map(|_| spec.sd_year * normal(&mut rng))
        .collect();
    let mut rows = Vec::new();
    for (s, a) in site.iter().enumerate() {
        for (t, b) in year.iter().enumerate() {
            if rng.gen::<f64>() < spec.missing {
                continue;
            }
            for _ in 0..spec.visits {
                let x: Vec<f64> = (0..spec.covariates)
                    .map(|_| 10.0 + 2.0 * normal(&mut rng))
                    .collect();
                let y = spec.intercept
                    + spec.coef * x.iter().sum::<f64>()
                    + a
                    + b
                    + spec.sd_residual * normal(&mut rng);
                rows.push(Row {
                    site: s,
                    year: spec.first_year + t as i32,
                    covariates: x,
                    y,
                });
            }
        }
    }
    (rows, Truth { site, year })
}

/// Site label used by generated networks.
pub fn site_label(s: usize) -> String {
    format!("S{s:05}")
}

/// Generate a network as a validated [`Data`] set.
pub fn simulate(spec: &NetworkSpec) -> (Data, Truth) {
    let (rows, truth) = simulate_rows(spec);
    let names = (1..=spec.covariates).map(|j| format!("x{j}")).collect();
    let mut b = DataBuilder::new(names, vec![]);
    for r in &rows {
        b.push(&site_label(r.site), r.year, &[], &r.covariates, r.y)
            .expect("generated rows are finite");
    }
    (
        b.build().expect("generated networks pass the guards"),
        truth,
    )
}
