//! `tidemark ingest [FILE...]`: ingest named files or the whole inbox, one line per file.

use std::path::PathBuf;

use super::Context;
use crate::ingest;

pub async fn run(ctx: &Context, files: &[PathBuf]) -> anyhow::Result<()> {
    let store = ctx.open_store().await?;
    let files = if files.is_empty() {
        let inbox = &ctx.config.feed.inbox;
        if !inbox.is_dir() {
            anyhow::bail!(
                "inbox {} does not exist; run `tidemark init` or fix feed.inbox in {}",
                inbox.display(),
                ctx.config.path.display()
            );
        }
        ingest::inbox_files(inbox)?
    } else {
        if let Some(missing) = files.iter().find(|f| !f.is_file()) {
            anyhow::bail!("{} is not a file; nothing was ingested", missing.display());
        }
        files.to_vec()
    };
    if files.is_empty() {
        println!("inbox {} is empty", ctx.config.feed.inbox.display());
    }
    let mut failed = 0usize;
    for file in &files {
        match ingest::ingest_file(&store, &ctx.config, file).await {
            Ok(report) => println!("{report}"),
            Err(e) => {
                failed += 1;
                eprintln!("tidemark: {e}");
            }
        }
    }
    store.close().await;
    if failed > 0 {
        anyhow::bail!(
            "{failed} of {} files could not be ingested (reasons above); the others are committed",
            files.len()
        );
    }
    Ok(())
}
