//! `tidemark prune [--dry-run]`: remove the draws of published versions beyond
//! `store.keep_draws` per series, under the lease (every run also does this at its end).

use std::sync::atomic::AtomicBool;
use std::sync::Arc;

use super::Context;
use crate::lease::Lease;

pub async fn run(ctx: &Context, dry_run: bool) -> anyhow::Result<()> {
    let store = ctx.open_store().await?;
    let lease = Lease::acquire(
        &store,
        ctx.config.lease_stale_after,
        Arc::new(AtomicBool::new(false)),
        "prune",
    )
    .await?;
    let outcome = store
        .prune_draws(ctx.config.keep_draws, dry_run, Some(lease.fence()))
        .await;
    lease.release().await?;
    let pruned = outcome?;
    let verb = if dry_run { "would prune" } else { "pruned" };
    for p in &pruned {
        crate::say!(
            "{} version {} (fit {}): {verb} {:.1} MB of draws",
            p.series,
            p.version,
            p.fit_id,
            p.bytes as f64 / 1e6
        );
    }
    let bytes: i64 = pruned.iter().map(|p| p.bytes).sum();
    crate::say!(
        "{verb} the draws of {} version(s), {:.1} MB (store.keep_draws = {})",
        pruned.len(),
        bytes as f64 / 1e6,
        ctx.config.keep_draws
    );
    store.close().await;
    Ok(())
}
