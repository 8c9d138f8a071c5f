//! `tidemark demo [--out DIR]`: replay the demo feed (an invented lake network, embedded in
//! the binary from `demo-feed/`) season by season through the whole pipeline, printing a
//! compact table per season, and leave the database in DIR for SQL clients.

use std::io::IsTerminal;
use std::path::{Path, PathBuf};
use std::sync::atomic::AtomicBool;
use std::sync::Arc;

use anyhow::Context as _;

use crate::config::Config;
use crate::pipeline::run::run_once;
use crate::pipeline::SeriesOutcome;
use crate::store::{RunOrigin, Store};
use crate::vocabulary::RunTrigger;

macro_rules! seasons {
    ($($year:literal),*) => {
        &[$(($year, include_str!(concat!("../../../demo-feed/seasons/", stringify!($year), ".csv")))),*]
    };
}

/// The demo feed, one file per season.
const SEASONS: &[(i32, &str)] = seasons!(
    2011, 2012, 2013, 2014, 2015, 2016, 2017, 2018, 2019, 2020, 2021, 2022, 2023, 2024, 2025, 2026
);
const CONFIG: &str = include_str!("../../../demo-feed/tidemark.toml");

/// Present in the demo folder from the start of a replay until its end: a replay cut
/// short (a closed pipe, Ctrl-C, a crash) leaves it, and the next `demo` starts over.
const IN_PROGRESS: &str = ".demo-in-progress";

/// Everything a replay writes into its folder; nothing else is ever removed.
const DEMO_ENTRIES: &[&str] = &[
    IN_PROGRESS,
    "tidemark.toml",
    "tidemark.db",
    "tidemark.db-wal",
    "tidemark.db-shm",
    "inbox",
    "archive",
    "quarantine",
];

fn prepare(out: &Path) -> anyhow::Result<()> {
    if out.exists() {
        let entries: Vec<String> = std::fs::read_dir(out)
            .with_context(|| format!("cannot read {}", out.display()))?
            .filter_map(|e| e.ok())
            .map(|e| e.file_name().to_string_lossy().into_owned())
            .collect();
        let interrupted = entries.iter().any(|e| e == IN_PROGRESS)
            && entries.iter().all(|e| DEMO_ENTRIES.contains(&e.as_str()));
        if interrupted {
            for e in &entries {
                let p = out.join(e);
                let removed = if p.is_dir() {
                    std::fs::remove_dir_all(&p)
                } else {
                    std::fs::remove_file(&p)
                };
                removed.with_context(|| format!("cannot remove {}", p.display()))?;
            }
            eprintln!(
                "{} held a replay that was cut short; starting it over",
                out.display()
            );
        } else if !entries.is_empty() {
            anyhow::bail!(
                "{} is not empty; choose a new or empty folder with --out, or delete it to replay the demo",
                out.display()
            );
        }
    }
    std::fs::create_dir_all(out).with_context(|| format!("cannot create {}", out.display()))?;
    std::fs::write(out.join(IN_PROGRESS), "")
        .with_context(|| format!("cannot write {}/{IN_PROGRESS}", out.display()))?;
    std::fs::write(out.join("tidemark.toml"), CONFIG)
        .with_context(|| format!("cannot write {}/tidemark.toml", out.display()))?;
    Ok(())
}

pub async fn run(out: Option<PathBuf>) -> anyhow::Result<()> {
    let out = out.unwrap_or_else(|| PathBuf::from("tidemark-demo"));
    prepare(&out)?;
    let config = Config::load(&out.join("tidemark.toml"))?;
    let store = Store::init(&config.database).await?;
    for dir in [
        &config.feed.inbox,
        &config.feed.archive,
        &config.feed.quarantine,
    ] {
        std::fs::create_dir_all(dir).with_context(|| format!("cannot create {}", dir.display()))?;
    }
    let terminal = std::io::stdout().is_terminal();
    let bar = terminal.then(|| {
        let bar = indicatif::ProgressBar::new(SEASONS.len() as u64);
        bar.set_style(
            indicatif::ProgressStyle::with_template(
                "{spinner} season {pos}/{len} [{bar:30}] {msg}",
            )
            .unwrap_or_else(|_| indicatif::ProgressStyle::default_bar()),
        );
        bar
    });
    println!(
        "Replaying {} seasons of an invented lake network into {} (ingest -> refit -> forecast)\n",
        SEASONS.len(),
        out.display()
    );
    println!(
        "{:<6} {:<12} {:>4} {:>5} {:>5} | {:^35} | {:^39}",
        "",
        "",
        "",
        "",
        "",
        "sd, model scale (posterior median)",
        "80% interval width, response units"
    );
    let header = format!(
        "{:<6} {:<12} {:>4} {:>5} {:>5} | {:>8} {:>8} {:>8} {:>8} | {:>9} {:>9} {:>9} {:>9}",
        "season",
        "series",
        "ver",
        "obs",
        "cens",
        "site",
        "year",
        "group",
        "resid",
        "mon/seen",
        "mon/next",
        "new/seen",
        "new/next"
    );
    println!("{header}");
    let mut published = 0usize;
    for (year, text) in SEASONS {
        let name = format!("{year}.csv");
        std::fs::write(config.feed.inbox.join(&name), text)
            .with_context(|| format!("cannot write {name} to the inbox"))?;
        if let Some(b) = &bar {
            b.set_message(format!("fitting {year}"));
        }
        let origin = RunOrigin {
            trigger: RunTrigger::Demo,
            command: "demo",
            fence: None,
        };
        let report = run_once(&store, &config, &origin, Arc::new(AtomicBool::new(false))).await?;
        let mut lines = Vec::new();
        for s in &report.series {
            if s.outcome == SeriesOutcome::Published {
                published += 1;
            }
            let sd = |n: &str| s.sd_q50.iter().find(|(t, _)| t == n).map(|(_, v)| *v);
            let group_sd = s
                .sd_q50
                .iter()
                .filter(|(t, _)| !["residual", "site", "year"].contains(&t.as_str()))
                .map(|(_, v)| *v)
                .next();
            let fmt = |v: Option<f64>| v.map_or("-".to_string(), |v| format!("{v:.3}"));
            let w = |t: &str| s.width80.iter().find(|(n, _)| n == t).map(|(_, v)| *v);
            lines.push(format!(
                "{:<6} {:<12} {:>4} {:>5} {:>5} | {:>8} {:>8} {:>8} {:>8} | {:>9} {:>9} {:>9} {:>9}{}",
                year,
                s.series,
                s.version.map_or("-".into(), |v| v.to_string()),
                s.n_obs.map_or("-".into(), |n| n.to_string()),
                s.n_censored.map_or("-".into(), |n| n.to_string()),
                fmt(sd("site")),
                fmt(sd("year")),
                fmt(group_sd),
                fmt(sd("residual")),
                fmt(w("known_site_known_year")),
                fmt(w("known_site_new_year")),
                fmt(w("new_site_known_year")),
                fmt(w("new_site_new_year")),
                match &s.outcome {
                    SeriesOutcome::Published => String::new(),
                    other => format!("  ({}: {})", other.as_str(), s.message),
                }
            ));
        }
        match &bar {
            Some(b) => {
                for l in lines {
                    b.println(l);
                }
                b.inc(1);
            }
            None => {
                for l in lines {
                    println!("{l}");
                }
            }
        }
    }
    if let Some(b) = bar {
        b.finish_and_clear();
    }
    print_exceedance(&store, &config).await?;
    store.close().await;
    std::fs::remove_file(out.join(IN_PROGRESS))
        .with_context(|| format!("cannot remove {}/{IN_PROGRESS}", out.display()))?;
    let limits: Vec<String> = crate::demo_feed::CHL_METHODS
        .iter()
        .map(|(first, last, limit)| format!("<{limit:.1} in {first}-{last}"))
        .collect();
    let limits = limits.join(", ");
    let db = config.database.display();
    let cfg = config.path.display();
    println!(
        "\nobs: values in the season's fit; cens: how many of them are censored, entered in the fit as the\n\
         probability of lying beyond their limit (no number is substituted): chlorophyll below the\n\
         laboratory's reporting limit (written {limits}), and Secchi depth\n\
         at a shallow lake where the disk lay on the bottom (the lake's depth, flagged in secchi_flag).\n\
         sd: posterior median of each standard deviation on the model scale (chlorophyll: natural log\n\
         of µg/L; Secchi: metres). Width: mean width of the 80% forecast interval (q10 to q90) in\n\
         response units (µg/L for chlorophyll, m for Secchi) for a monitored lake (mon) or a new lake\n\
         (new), in a season already seen (seen) or next season (next).\n\n\
         Forecasts are statistical estimates. Decisions that touch people, such as recreational-water or\n\
         drinking-water advisories after algal blooms, follow the responsible agency's own sampling,\n\
         testing and notification rules and are made by qualified staff.\n\n\
         {published} versions published.\n\
         config    {cfg}\n\
         database  {db}\n\
         try next:\n  \
         tidemark --config {cfg} status\n  \
         tidemark --config {cfg} drift --series chlorophyll --last 3\n  \
         tidemark --config {cfg} report --out {out}/report.html\n  \
         sqlite3 {db} \"SELECT series, target, site, year, round(q10,2), round(q50,2), round(q90,2) FROM latest_forecasts WHERE target = 'new_site_new_year'\"",
        out = out.display()
    );
    Ok(())
}

/// Lakes shown in the exceedance table at the end of a replay.
const EXCEEDANCE_LAKES: usize = 5;

/// Next season's chance of exceeding each chlorophyll threshold at the lakes most likely
/// to exceed the first one, from the latest version.
async fn print_exceedance(store: &Store, config: &Config) -> anyhow::Result<()> {
    let Some(series) = config.series.iter().find(|s| !s.thresholds.is_empty()) else {
        return Ok(());
    };
    let Some(fit) = store.serving_fit(&series.name).await? else {
        return Ok(());
    };
    let rows = store
        .site_exceedance(fit.fit_id, "known_site_new_year")
        .await?;
    let mut by_site: Vec<(String, i64, Vec<Option<f64>>)> = Vec::new();
    for r in rows {
        match by_site.last_mut() {
            Some((site, year, p)) if *site == r.site && *year == r.year => p.push(r.probability),
            _ => by_site.push((r.site, r.year, vec![r.probability])),
        }
    }
    let first = |p: &[Option<f64>]| p.first().copied().flatten().unwrap_or(0.0);
    by_site.sort_by(|a, b| first(&b.2).total_cmp(&first(&a.2)).then(a.0.cmp(&b.0)));
    let unit = series.unit.as_deref().unwrap_or("");
    let year = by_site.first().map_or(0, |r| r.1);
    println!(
        "\nchance that {year}'s {} exceeds each threshold, at the {EXCEEDANCE_LAKES} lakes most likely to (version {}):",
        series.name, fit.version
    );
    let heads: Vec<String> = series
        .thresholds
        .iter()
        .map(|t| format!("P(> {t} {unit})"))
        .collect();
    println!(
        "  {:<28} {}",
        "lake",
        heads.iter().map(|h| format!("{h:>16}")).collect::<String>()
    );
    for (site, _, p) in by_site.iter().take(EXCEEDANCE_LAKES) {
        let cells: String = p
            .iter()
            .map(|v| v.map_or(format!("{:>16}", "-"), |v| format!("{v:>16.3}")))
            .collect();
        println!("  {:<28} {cells}", crate::visible::visible(site));
    }
    Ok(())
}
