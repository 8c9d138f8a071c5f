//! `tidemark report --out FILE.html [--series NAME]`: write the self-contained HTML report
//! (see [`crate::report`]).

use std::path::Path;

use super::Context;
use crate::report::{self, Report, ReportSeries};

pub async fn run(ctx: &Context, out: &Path, series: Option<String>) -> anyhow::Result<()> {
    if let Some(name) = &series {
        super::require_series(ctx, name)?;
    }
    let chosen: Vec<ReportSeries> = ctx
        .config
        .series
        .iter()
        .filter(|s| series.as_ref().is_none_or(|n| *n == s.name))
        .map(|s| ReportSeries {
            name: s.name.clone(),
            response: s.response.clone(),
            transform: s.transform.to_string(),
            unit: s.unit.clone(),
            sites: s.report_sites.clone(),
        })
        .collect();
    let store = ctx.open_store().await?;
    let collected = Report::collect(&store, &chosen).await;
    store.close().await;
    let html = collected?.render()?;
    report::write_atomically(out, &html)?;
    println!("wrote {} ({} bytes)", out.display(), html.len());
    Ok(())
}
