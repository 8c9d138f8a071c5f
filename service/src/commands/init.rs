//! `tidemark init`: create the database and feed folders, apply migrations.

use anyhow::Context as _;

use super::Context;
use crate::store::Store;

pub async fn run(ctx: &Context) -> anyhow::Result<()> {
    let feed = &ctx.config.feed;
    for (what, dir) in [
        ("inbox", &feed.inbox),
        ("archive", &feed.archive),
        ("quarantine", &feed.quarantine),
    ] {
        std::fs::create_dir_all(dir)
            .with_context(|| format!("cannot create the {what} folder {}", dir.display()))?;
    }
    let store = Store::init(&ctx.config.database).await?;
    let version = store.schema_version().await?;
    crate::say!(
        "database {} is ready (schema version {version}); inbox {}",
        store.path().display(),
        feed.inbox.display()
    );
    store.close().await;
    Ok(())
}
