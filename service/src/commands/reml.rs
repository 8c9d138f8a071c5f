//! `tidemark reml [--series NAME] [--json]`: REML estimates on the data now in the store,
//! for one series or every series.

use serde_json::json;
use tidemark_model::{fit_point, Method};

use super::Context;
use crate::pipeline::input;

pub async fn run(ctx: &Context, series: Option<String>, as_json: bool) -> anyhow::Result<()> {
    let chosen = super::select_series(ctx, series.as_deref())?;
    let store = ctx.open_store().await?;
    let mut docs = Vec::new();
    for (i, s) in chosen.iter().enumerate() {
        if !as_json && i > 0 {
            println!();
        }
        let doc = estimate(&store, s, as_json).await;
        match doc {
            Ok(Some(d)) => docs.push(d),
            Ok(None) => {}
            Err(e) => {
                store.close().await;
                return Err(e.context(format!("series {}", s.name)));
            }
        }
    }
    store.close().await;
    if as_json {
        // One object for a named series (the documented contract), an array for all.
        let out = if series.is_some() && docs.len() == 1 {
            docs.remove(0)
        } else {
            serde_json::Value::Array(docs)
        };
        println!("{}", serde_json::to_string_pretty(&out)?);
    }
    Ok(())
}

/// REML for one series: returns its JSON document, or prints the text form.
async fn estimate(
    store: &crate::store::Store,
    s: &crate::config::SeriesConfig,
    as_json: bool,
) -> anyhow::Result<Option<serde_json::Value>> {
    let rows = store
        .load_series_rows(
            &s.response,
            &s.covariates,
            &s.groups,
            s.censoring.as_ref().map(|c| c.column.as_str()),
        )
        .await?;
    let built = input::build(s, &rows)?;
    let data = built.data;
    let fit =
        tokio::task::spawn_blocking(move || fit_point(&data, Method::Reml).map(|f| (f, data)))
            .await??;
    let (fit, data) = fit;
    if as_json {
        let sd: serde_json::Map<String, serde_json::Value> =
            fit.sd.iter().map(|(n, v)| (n.clone(), json!(v))).collect();
        let coef: serde_json::Map<String, serde_json::Value> = fit
            .coef
            .iter()
            .map(|c| (c.name.clone(), json!({"estimate": c.estimate, "se": c.se})))
            .collect();
        let doc = json!({
            "series": s.name,
            "method": "reml",
            "n_obs": fit.n_obs,
            "n_sites": data.n_sites(),
            "n_years": data.n_years(),
            "excluded": built.excluded.len(),
            "transform": s.transform.to_string(),
            "sd": sd,
            "coef": coef,
            "neg2_reml_loglik": fit.criterion,
            "converged": fit.converged,
            "warnings": fit.warnings,
        });
        return Ok(Some(doc));
    } else {
        println!(
            "{}: REML on {} observations ({} sites, {} years; {} excluded), model scale ({})",
            s.name,
            fit.n_obs,
            data.n_sites(),
            data.n_years(),
            built.excluded.len(),
            s.transform
        );
        for (name, v) in &fit.sd {
            println!("  sd {name:<12} {v:.6}");
        }
        for c in &fit.coef {
            println!("  coef {:<10} {:.6} (se {:.6})", c.name, c.estimate, c.se);
        }
        println!("  −2 REML log-likelihood {:.4}", fit.criterion);
        for w in &fit.warnings {
            println!("  warning: {w}");
        }
    }
    Ok(None)
}
