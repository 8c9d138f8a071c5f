//! `vigil run-once`: one scheduled run (ingest, refit, forecast). Exits non-zero when a
//! file could not be ingested or a series failed or was rejected, so that cron, systemd
//! or a cluster scheduler can alert.

use std::sync::atomic::AtomicBool;
use std::sync::Arc;

use super::Context;
use crate::commands::refit::describe;
use crate::pipeline::run::run_once;

pub async fn run(ctx: &Context) -> anyhow::Result<()> {
    let store = ctx.open_store().await?;
    let report = run_once(
        &store,
        &ctx.config,
        "manual",
        Arc::new(AtomicBool::new(false)),
    )
    .await?;
    for f in &report.files {
        println!("{f}");
    }
    for e in &report.file_errors {
        eprintln!("vigil: {e}");
    }
    for s in &report.series {
        println!("{}", describe(s));
    }
    println!("run {}: {}", report.run_id, report.status);
    store.close().await;
    if report.has_problems() {
        anyhow::bail!(
            "run {} finished {}: see the lines above and `vigil status`",
            report.run_id,
            report.status
        );
    }
    Ok(())
}
