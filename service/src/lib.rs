//! tidemark-service: the `tidemark` binary and its library.
//!
//! Tidemark keeps the crossed site/year variance model of a long-term monitoring network up to
//! date: it ingests feed files into a SQLite store with full history, and (in the pipeline
//! built on this store) refits each series and publishes forecasts. This crate holds the
//! plumbing: configuration, feed ingest, the store, the schedule, logging and the command
//! line. The statistics live in `tidemark-model`, the feed file readers in `tidemark-feed`.
//!
//! ```no_run
//! # async fn demo() -> anyhow::Result<()> {
//! use tidemark_service::{config::Config, ingest, store::Store};
//! let config = Config::load("tidemark.toml".as_ref())?;
//! let store = Store::init(&config.database).await?;
//! let never = std::sync::atomic::AtomicBool::new(false);
//! ingest::ingest_inbox(&store, &config, &never, |outcome| match outcome {
//!     Ok(report) => println!("{report}"),
//!     Err(e) => eprintln!("{e}"),
//! })
//! .await?;
//! # Ok(()) }
//! ```

pub mod cli;
pub mod commands;
pub mod config;
pub mod demo_feed;
pub mod drift;
pub mod ingest;
pub mod lease;
pub mod pipeline;
pub mod progress;
pub mod reason;
pub mod report;
pub mod schedule;
pub mod serve;
pub mod signals;
pub mod store;
pub mod telemetry;
mod test_hold;
pub mod visible;
/// The shared words (fit and run status, run trigger); they live with the store because the
/// store derives their database form.
pub use store::vocabulary;
