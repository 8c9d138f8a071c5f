//! `tidemark report --out FILE.html [--series NAME]`: write the self-contained HTML report
//! (see [`crate::report`]).

use std::path::Path;

use super::Context;
use crate::report::{self, Report};

pub async fn run(ctx: &Context, out: &Path, series: Option<String>) -> anyhow::Result<()> {
    if let Some(name) = &series {
        super::require_series(ctx, name)?;
    }
    let chosen: Vec<(String, String, String)> = ctx
        .config
        .series
        .iter()
        .filter(|s| series.as_ref().is_none_or(|n| *n == s.name))
        .map(|s| (s.name.clone(), s.response.clone(), s.transform.to_string()))
        .collect();
    let store = ctx.open_store().await?;
    let collected = Report::collect(&store, &chosen).await;
    store.close().await;
    let html = collected?.render()?;
    report::write_atomically(out, &html)?;
    println!("wrote {} ({} bytes)", out.display(), html.len());
    Ok(())
}
