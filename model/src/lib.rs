//! # tidemark-model
//!
//! Pure computation for the crossed random-effects model of a monitoring network
//! (docs/architecture.md, "Model"): `y = x'beta + a_site + b_year + c_group + e`,
//! Gaussian on the model scale.
//! No I/O, no async, no global state; deterministic for a given seed.
//!
//! ```
//! use tidemark_model::{DataBuilder, fit_point, Method};
//! let mut b = DataBuilder::new(vec![], vec![]);
//! for s in 0..6 {
//!     for t in 0..5 {
//!         let y = 1.0 + 0.3 * s as f64 + 0.2 * ((t * 7 + s) % 5) as f64 + 0.1 * (t as f64).sin();
//!         b.push(&format!("lake-{s}"), 2010 + t, &[], &[], y).unwrap();
//!     }
//! }
//! let data = b.build().unwrap();
//! let fit = fit_point(&data, Method::Reml).unwrap();
//! assert_eq!(fit.sd.len(), 3); // residual, site, year
//! ```

mod censored;
mod data;
mod error;
mod marginal;
mod normal;
mod optimize;
mod priors;
mod reml;
mod sparse;
mod stats;
pub use stats::{NormalEquations, SPARSE_FROM_LEVELS};

pub use data::{Censoring, Data, DataBuilder, MAX_MAGNITUDE, TREND};
pub use error::ModelError;
pub use priors::{NormalPrior, Priors, ResolvedPriors, SdPrior};
pub use reml::{fit_point, fit_point_using, CoefEstimate, Method, PointFit};

mod budget;
mod diagnostics;
mod posterior;
mod sampler;

pub use budget::memory_estimate;
pub use diagnostics::{diagnose, Diagnostic};
pub use posterior::{
    location_conditional, sample, EffectDraws, FitDiagnostics, LocationConditional, Posterior,
    Summary, SummaryKind,
};
pub use sampler::{Controls, Progress, SamplerSettings, WarmStart};
mod warm;
pub use posterior::check_warm_start;
pub use warm::{conflict_threshold, WarmPlan, CONFLICT_TAIL, REFIT_ESS_PER_COMPONENT};
mod forecast;
pub mod simulate;
pub use forecast::{
    exceedance, forecast, forecast_baseline, forecast_to, predictive, threshold_problem,
    ForecastBasis, ForecastRow, ForecastTarget, Predictive, Scale, Scenario, Transform,
};
pub mod calibration;
pub mod refits;
pub mod sbc;
