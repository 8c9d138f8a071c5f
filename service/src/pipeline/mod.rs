//! The model step of a run: for each series whose data changed, build the model input,
//! fit (warm-started from the latest published version when there is one), apply the
//! convergence gate, and record the outcome — a published version with its summaries,
//! draws and forecasts in one transaction, or a rejected/failed attempt that never
//! becomes the latest.

pub mod draws;
pub mod forecasts;
pub mod input;
pub mod refit;
pub mod run;

pub use refit::{refit, RefitOptions, SeriesOutcome, SeriesReport};
