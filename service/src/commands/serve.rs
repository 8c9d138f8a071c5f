//! `tidemark serve`: run on the configured schedule until SIGTERM/SIGINT (see `crate::serve`).

use super::Context;

pub async fn run(ctx: &Context) -> anyhow::Result<()> {
    let store = ctx.open_store().await?;
    let result = crate::serve::serve(store.clone(), ctx.config.clone()).await;
    store.close().await;
    result
}
