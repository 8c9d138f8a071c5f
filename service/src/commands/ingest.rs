//! `tidemark ingest [FILE...]`: ingest named files or the whole inbox, one line per file.

use std::path::PathBuf;
use std::sync::atomic::AtomicBool;

use super::Context;
use crate::ingest::{self, FileReport, IngestError, SkippedLine};
use crate::store::RunOrigin;
use crate::visible::visible_path;
use crate::vocabulary::{RunStatus, RunTrigger};

/// What the files of one `ingest` came to.
#[derive(Default)]
struct Tally {
    ingested: usize,
    failed: usize,
    deferred: usize,
}

impl Tally {
    fn file(&mut self, outcome: Result<FileReport, IngestError>) {
        match outcome {
            Ok(report) => {
                self.ingested += 1;
                crate::say!("{report}");
            }
            Err(e) if e.is_deferral() => {
                self.deferred += 1;
                crate::say!("{e}");
            }
            Err(e) => {
                self.failed += 1;
                crate::say_err!("tidemark: {e}");
            }
        }
    }
}

pub async fn run(ctx: &Context, files: &[PathBuf]) -> anyhow::Result<()> {
    let store = ctx.open_store().await?;
    let inbox = &ctx.config.feed.inbox;
    let mut skipped = Vec::new();
    // The files that wait where they are if the run cannot even start.
    let mut waiting: Vec<PathBuf> = files.to_vec();
    if files.is_empty() {
        if !inbox.is_dir() {
            anyhow::bail!(
                "inbox {} does not exist; run `tidemark init` or fix feed.inbox in {}",
                visible_path(inbox),
                ctx.config.path.display()
            );
        }
        let listing = ingest::list_inbox(inbox)?;
        if !listing.skipped.is_empty() {
            crate::say!("{}", SkippedLine(&listing.skipped));
        }
        if listing.files.is_empty() && ingest::claimed_files(inbox) == 0 {
            if listing.skipped.is_empty() {
                crate::say!("inbox {} is empty", visible_path(inbox));
            } else {
                crate::say!("inbox {}: no regular file to ingest", visible_path(inbox));
            }
            store.close().await;
            return Ok(());
        }
        skipped = listing.skipped;
        waiting = listing.files;
    } else if let Some(missing) = files.iter().find(|f| !f.is_file()) {
        anyhow::bail!(
            "{} is not a file; nothing was ingested",
            visible_path(missing)
        );
    }
    // Ingest does not take the lease (batches are single transactions; a second writer
    // waits on the database lock, and files are claimed one by one), so its run has no
    // lease holder.
    let origin = RunOrigin {
        trigger: RunTrigger::Manual,
        command: "ingest",
        fence: None,
    };
    let run_id = store.start_run(&origin).await.map_err(|e| {
        let names: Vec<String> = waiting.iter().map(|f| visible_path(f)).collect();
        let names = if names.is_empty() {
            "the inbox".to_string()
        } else {
            names.join(", ")
        };
        anyhow::Error::new(e).context(format!("nothing was ingested; {names} waits where it is"))
    })?;
    let mut tally = Tally::default();
    let pass = if files.is_empty() {
        let never = AtomicBool::new(false);
        ingest::ingest_inbox(&store, &ctx.config, &never, |r| tally.file(r))
            .await
            .map(|_| ())
    } else {
        ingest::ingest_named(&store, &ctx.config, files, |r| tally.file(r)).await
    };
    let mut message = format!(
        "{} file(s) ingested, {} file error(s)",
        tally.ingested, tally.failed
    );
    if tally.deferred > 0 {
        message.push_str(&format!(", {} left for the next run", tally.deferred));
    }
    if !skipped.is_empty() {
        message.push_str(&format!("; {}", SkippedLine(&skipped)));
    }
    let status = if tally.failed > 0 || pass.is_err() {
        RunStatus::Partial
    } else {
        RunStatus::Succeeded
    };
    if let Err(e) = &pass {
        message.push_str(&format!("; stopped: {e}"));
    }
    store.finish_run(run_id, status, Some(&message)).await?;
    store.close().await;
    pass?;
    if tally.failed > 0 {
        anyhow::bail!(
            "{} of {} files could not be ingested (reasons above); the others are committed",
            tally.failed,
            tally.failed + tally.ingested + tally.deferred
        );
    }
    Ok(())
}
