//! `tidemark reml --series NAME [--json]`: REML estimates on the data now in the store.

use serde_json::json;
use tidemark_model::{fit_point, Method};

use super::Context;
use crate::pipeline::input;

pub async fn run(ctx: &Context, series: &str, as_json: bool) -> anyhow::Result<()> {
    let s = ctx
        .config
        .series
        .iter()
        .find(|s| s.name == series)
        .ok_or_else(|| {
            anyhow::anyhow!(
                "no series named {series:?} in {}",
                ctx.config.path.display()
            )
        })?;
    let store = ctx.open_store().await?;
    let rows = store
        .load_series_rows(&s.response, &s.covariates, &s.groups)
        .await?;
    store.close().await;
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
        println!("{}", serde_json::to_string_pretty(&doc)?);
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
    Ok(())
}
