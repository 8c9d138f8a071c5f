//! `tidemark ingest [FILE...]`: ingest named files or the whole inbox, one line per file.

use std::path::PathBuf;

use super::Context;
use crate::ingest;
use crate::store::RunOrigin;
use crate::vocabulary::{RunStatus, RunTrigger};

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
        crate::say!("inbox {} is empty", ctx.config.feed.inbox.display());
        store.close().await;
        return Ok(());
    }
    // Ingest does not take the lease (batches are single transactions; a second writer
    // waits on the database lock), so its run has no lease holder.
    let origin = RunOrigin {
        trigger: RunTrigger::Manual,
        command: "ingest",
        fence: None,
    };
    let run_id = store.start_run(&origin).await.map_err(|e| {
        let names: Vec<String> = files.iter().map(|f| f.display().to_string()).collect();
        anyhow::Error::new(e).context(format!(
            "nothing was ingested; {} waits where it is",
            names.join(", ")
        ))
    })?;
    let mut failed = 0usize;
    for file in &files {
        match ingest::ingest_file(&store, &ctx.config, file).await {
            Ok(report) => crate::say!("{report}"),
            Err(e) => {
                failed += 1;
                crate::say_err!("tidemark: {e}");
            }
        }
    }
    let status = if failed > 0 {
        RunStatus::Partial
    } else {
        RunStatus::Succeeded
    };
    let message = format!(
        "{} file(s) ingested, {failed} file error(s)",
        files.len() - failed
    );
    store.finish_run(run_id, status, Some(&message)).await?;
    store.close().await;
    if failed > 0 {
        anyhow::bail!(
            "{failed} of {} files could not be ingested (reasons above); the others are committed",
            files.len()
        );
    }
    Ok(())
}
