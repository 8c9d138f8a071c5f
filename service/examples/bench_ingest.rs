//! Ingest benchmark: a generated network of 5,000 lakes x 40 seasons x 5 measurement
//! columns (1,000,000 values, 200,000 rows) as one CSV file, ingested into a fresh
//! database; then a second file re-sending every value with a new number (the supersede
//! path), and the first file's content again under a new name (duplicate detection).
//!
//! Run: `cargo run --release -p tidemark-service --example bench_ingest [-- SITES YEARS]`
//! Prints timings; nothing here is asserted.

use std::fmt::Write as _;
use std::time::Instant;

use tidemark_feed::BatchContent;
use tidemark_service::config::Config;
use tidemark_service::ingest;
use tidemark_service::store::Store;

const COLUMNS: [&str; 5] = [
    "chl_ug_l",
    "tp_ug_l",
    "secchi_m",
    "surface_temp_c",
    "do_mg_l",
];

fn feed(sites: usize, years: usize, shift: f64) -> String {
    let mut out = String::with_capacity(sites * years * 48);
    out.push_str("lake,season,");
    out.push_str(&COLUMNS.join(","));
    out.push('\n');
    // A cheap deterministic pseudo-random stream (xorshift) keeps the values varied.
    let mut state: u64 = 0x9E37_79B9_7F4A_7C15;
    for s in 0..sites {
        for y in 0..years {
            let _ = write!(out, "L{s:05},{}", 1985 + y);
            for _ in COLUMNS {
                state ^= state << 13;
                state ^= state >> 7;
                state ^= state << 17;
                let v = (state % 100_000) as f64 / 1000.0 + shift;
                let _ = write!(out, ",{v}");
            }
            out.push('\n');
        }
    }
    out
}

#[tokio::main(flavor = "multi_thread", worker_threads = 2)]
async fn main() -> anyhow::Result<()> {
    tidemark_service::telemetry::init(None);
    let args: Vec<usize> = std::env::args()
        .skip(1)
        .filter_map(|a| a.parse().ok())
        .collect();
    let sites = args.first().copied().unwrap_or(5_000);
    let years = args.get(1).copied().unwrap_or(40);
    let n_values = (sites * years * COLUMNS.len()) as f64;

    let dir = tempfile::tempdir()?;
    let config_text =
        "[[series]]\nname = \"chl\"\nresponse = \"chl_ug_l\"\nsite = \"lake\"\nyear = \"season\"\n";
    std::fs::write(dir.path().join("tidemark.toml"), config_text)?;
    let config = Config::load(&dir.path().join("tidemark.toml"))?;
    let store = Store::init(&config.database).await?;
    std::fs::create_dir_all(&config.feed.inbox)?;

    let first = feed(sites, years, 0.0);
    let second = feed(sites, years, 0.5);
    println!(
        "network: {sites} sites x {years} years x {} columns = {n_values} values ({:.1} MB CSV)",
        COLUMNS.len(),
        first.len() as f64 / 1e6
    );

    let layout = config.file_layout();
    let t = Instant::now();
    let (_, content) = tidemark_feed::parse_bytes(first.as_bytes(), &layout);
    let parse_s = t.elapsed().as_secs_f64();
    if let BatchContent::Parsed { values, .. } = &content {
        println!(
            "parse only:            {:>7.3} s  {:>10.0} values/s  ({} values)",
            parse_s,
            n_values / parse_s,
            values.values.len()
        );
    }

    for (name, text, what) in [
        ("01-new.csv", &first, "ingest, all new:"),
        ("02-corrected.csv", &second, "ingest, all superseding:"),
        ("03-resent.csv", &first, "ingest, duplicate file:"),
    ] {
        let path = config.feed.inbox.join(name);
        std::fs::write(&path, text)?;
        let t = Instant::now();
        let report = ingest::ingest_file(&store, &config, &path).await?;
        let s = t.elapsed().as_secs_f64();
        println!("{what:<24} {s:>7.3} s  {:>10.0} values/s", n_values / s);
        println!("    {report}");
    }
    let size = std::fs::metadata(&config.database)?.len();
    println!("database: {:.1} MB", size as f64 / 1e6);
    store.close().await;
    Ok(())
}
