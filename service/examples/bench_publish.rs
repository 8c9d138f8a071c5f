//! Pipeline benchmark at B3 size: 20,000 sites x 25 years x 2 visits, 60% of site-years
//! observed (about 600k observations, 2 covariates), ingested into a fresh database,
//! then a cold refit; then one more year ingested and a warm refit. Reports the fit time,
//! the time spent publishing beyond the fit (forecasts, draws file, the transaction), and
//! how much the database grew per version.
//!
//! Run: `cargo run --release -p tidemark-service --example bench_publish [-- SITES]`
//! Prints figures; nothing here is asserted.

use std::fmt::Write as _;
use std::sync::atomic::AtomicBool;
use std::sync::Arc;
use std::time::Instant;

use tidemark_model::simulate::{simulate_rows, NetworkSpec};
use tidemark_service::config::Config;
use tidemark_service::ingest;
use tidemark_service::pipeline::{refit, RefitOptions, SeriesReport};
use tidemark_service::store::Store;

const CONFIG: &str = r#"
[store]
database = "tidemark.db"
[feed]
inbox = "inbox"
archive = "archive"
quarantine = "quarantine"
[[series]]
name = "index"
response = "y"
site = "site"
year = "year"
visit = "visit"
covariates = ["x1", "x2"]
"#;

fn db_bytes(dir: &std::path::Path) -> u64 {
    ["tidemark.db", "tidemark.db-wal"]
        .iter()
        .filter_map(|f| std::fs::metadata(dir.join(f)).ok())
        .map(|m| m.len())
        .sum()
}

fn show(label: &str, r: &SeriesReport, grew: u64) {
    let d = r.diagnostics.as_ref();
    println!(
        "{label}: {:?} v{:?}; load {:.2} s, fit {:.2} s, publish beyond the fit {:.2} s; max R-hat {:.4}, min ESS {:.0}, warm-up {}; database +{:.1} MB",
        r.outcome,
        r.version,
        r.load_seconds,
        r.fit_seconds,
        r.publish_seconds,
        d.map_or(f64::NAN, |d| d.max_rhat),
        d.map_or(f64::NAN, |d| d.min_ess_bulk.min(d.min_ess_tail)),
        d.map_or(0, |d| d.warmup),
        grew as f64 / 1e6
    );
}

#[tokio::main(flavor = "multi_thread", worker_threads = 2)]
async fn main() -> anyhow::Result<()> {
    let sites: usize = std::env::args()
        .nth(1)
        .and_then(|s| s.parse().ok())
        .unwrap_or(20_000);
    let dir = tempfile::tempdir()?;
    // TIDEMARK_BENCH_KEEP=1 keeps the database for inspection.
    let dir_path = if std::env::var("TIDEMARK_BENCH_KEEP").is_ok() {
        dir.keep()
    } else {
        dir.path().to_path_buf()
    };
    println!("working in {}", dir_path.display());
    let dir = dir_path;
    std::fs::write(dir.join("tidemark.toml"), CONFIG)?;
    let config = Config::load(&dir.join("tidemark.toml"))?;
    let store = Store::init(&config.database).await?;
    for d in [
        &config.feed.inbox,
        &config.feed.archive,
        &config.feed.quarantine,
    ] {
        std::fs::create_dir_all(d)?;
    }
    let spec = NetworkSpec {
        sites,
        years: 26,
        missing: 0.4,
        ..NetworkSpec::default()
    };
    let (rows, _) = simulate_rows(&spec);
    let last_year = spec.first_year + 25;
    let write = |name: &str, keep: &dyn Fn(i32) -> bool| -> anyhow::Result<std::path::PathBuf> {
        let mut out = String::from("site,year,visit,x1,x2,y\n");
        let mut visit = std::collections::HashMap::new();
        for r in rows.iter().filter(|r| keep(r.year)) {
            let v = visit.entry((r.site, r.year)).or_insert(0);
            *v += 1;
            let _ = writeln!(
                out,
                "S{:05},{},{},{:.4},{:.4},{:.5}",
                r.site, r.year, v, r.covariates[0], r.covariates[1], r.y
            );
        }
        let path = config.feed.inbox.join(name);
        std::fs::write(&path, out)?;
        Ok(path)
    };

    let t0 = Instant::now();
    let first = write("history.csv", &|y| y < last_year)?;
    let report = ingest::ingest_file(&store, &config, &first).await?;
    println!(
        "ingest of 25 years: {:.2} s ({report})",
        t0.elapsed().as_secs_f64()
    );
    let opts = RefitOptions {
        cancel: Arc::new(AtomicBool::new(false)),
        ..RefitOptions::default()
    };
    let before = db_bytes(&dir);
    let cold = refit(&store, &config, &opts).await?;
    show("cold fit, 25 years", &cold[0], db_bytes(&dir) - before);

    let next = write("next.csv", &|y| y == last_year)?;
    ingest::ingest_file(&store, &config, &next).await?;
    let before = db_bytes(&dir);
    let warm = refit(&store, &config, &opts).await?;
    show(
        "warm refit after one more year",
        &warm[0],
        db_bytes(&dir) - before,
    );
    let before = db_bytes(&dir);
    let cold_again = refit(
        &store,
        &config,
        &RefitOptions {
            cold: true,
            force: true,
            ..opts.clone()
        },
    )
    .await?;
    show(
        "cold fit of the same 26 years",
        &cold_again[0],
        db_bytes(&dir) - before,
    );
    let (w, c) = (&warm[0], &cold_again[0]);
    println!(
        "warm / cold (whole refit): {:.0}%",
        100.0 * w.wall_seconds / c.wall_seconds
    );
    store.close().await;
    Ok(())
}
