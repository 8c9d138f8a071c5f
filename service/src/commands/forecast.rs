//! `tidemark forecast [--series NAME]`: rewrite the forecasts of each series' latest published
//! version from its stored draws, under the single-instance lease (so it never races a
//! refit that is about to publish a newer version).

use anyhow::Context as _;

use std::sync::atomic::AtomicBool;
use std::sync::Arc;

use super::Context;
use crate::lease::Lease;
use crate::pipeline::draws;
use crate::vocabulary::{RunStatus, RunTrigger};
use tidemark_model::Transform;

pub async fn run(ctx: &Context, series: Option<String>) -> anyhow::Result<()> {
    // An unknown series is a usage mistake, not a run.
    super::select_series(ctx, series.as_deref())?;
    let store = ctx.open_store().await?;
    let lease = Lease::acquire(
        &store,
        ctx.config.lease_stale_after,
        Arc::new(AtomicBool::new(false)),
        "forecast",
    )
    .await?;
    let run_id = store
        .start_run(&lease.run_origin(RunTrigger::Manual))
        .await?;
    let outcome = rewrite(ctx, &store, series, lease.fence()).await;
    let (status, message) = match &outcome {
        Ok(n) => (
            RunStatus::Succeeded,
            format!("forecasts rewritten for {n} version(s)"),
        ),
        Err(e) => (RunStatus::Failed, crate::reason::reason_of(e)),
    };
    store.finish_run(run_id, status, Some(&message)).await?;
    lease.release().await?;
    store.close().await;
    outcome.map(|_| ())
}

async fn rewrite(
    ctx: &Context,
    store: &crate::store::Store,
    series: Option<String>,
    fence: &crate::store::Fence,
) -> anyhow::Result<usize> {
    let names = super::select_series(ctx, series.as_deref())?;
    let mut rewritten = 0;
    for s in names {
        let Some(latest) = store.serving_fit(&s.name).await? else {
            crate::say!("{}: no published version yet", s.name);
            continue;
        };
        let Some((_, blob)) = store.fit_draws(latest.fit_id).await? else {
            let why = match store.draws_pruned(latest.fit_id).await? {
                Some(pruned) => pruned.explain(),
                None => "it has no stored draws".to_string(),
            };
            anyhow::bail!(
                "series {}: cannot rebuild the forecasts of fit {}: {why}",
                s.name,
                latest.fit_id
            );
        };
        let decoded = draws::decode(&blob)
            .with_context(|| format!("series {}: fit {}", s.name, latest.fit_id))?;
        // The transform the version was fitted with, not today's config.
        let transform = latest
            .transform
            .as_deref()
            .and_then(Transform::parse)
            .unwrap_or(s.transform);
        // Thresholds are in the config's unit: they can be asked of a version fitted to
        // values in that unit (or in one it did not record), not to values in another.
        if let (Some(fitted), Some(now)) = (&latest.unit, &s.unit) {
            if fitted != now && !s.thresholds.is_empty() {
                anyhow::bail!(
                    "series {}: version {} (fit {}) was fitted to values in {fitted:?}, but the \
                     config's thresholds are in {now:?}; refit the series after changing its unit",
                    s.name,
                    latest.version,
                    latest.fit_id
                );
            }
        }
        let forecasts = crate::pipeline::forecasts::baseline(&decoded.basis, transform, s)
            .with_context(|| format!("series {}: fit {}", s.name, latest.fit_id))?;
        store
            .replace_forecasts(latest.fit_id, forecasts.set(), Some(fence))
            .await?;
        let exceedance = match forecasts.thresholds.len() {
            0 => String::new(),
            n => format!(
                " with {} exceedance probabilities ({n} threshold(s))",
                forecasts.rows.len() * n
            ),
        };
        crate::say!(
            "{}: wrote {} forecasts{exceedance} for version {} (fit {})",
            s.name,
            forecasts.rows.len(),
            latest.version,
            latest.fit_id
        );
        rewritten += 1;
    }
    Ok(rewritten)
}
