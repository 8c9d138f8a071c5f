//! `tidemark drift [--series NAME] [--flagged] [--last N] [--json]`: the variance components of every published
//! version, the change from the previous version, and the screening flag
//! (rule in [`crate::drift`]).

use super::Context;
use crate::drift;

pub async fn run(
    ctx: &Context,
    series: Option<String>,
    filter: drift::Filter,
    json: bool,
) -> anyhow::Result<()> {
    if let Some(name) = &series {
        super::require_series(ctx, name)?;
    }
    let store = ctx.open_store().await?;
    let rows = store.variance_components(series.as_deref()).await?;
    store.close().await;
    let any_published = !rows.is_empty();
    let report = drift::build(&rows).filtered(filter);
    let text = if json {
        serde_json::to_string_pretty(&report)? + "\n"
    } else if !any_published {
        "no published version yet; run `tidemark run-once` (or `tidemark refit`) first\n"
            .to_string()
    } else if report.series.is_empty() {
        "no version matches (--flagged: no quantity of the versions shown is flagged)\n".to_string()
    } else {
        drift::render_text(&report)
    };
    super::print_out(&text)
}
