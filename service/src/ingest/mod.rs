//! Feed ingest: from a file in the inbox to a committed batch, then to the archive (or the
//! quarantine).
//!
//! A file is first claimed (`claim.rs`: moved into this process's folder under the inbox,
//! so a second process never reads it too), then read whole, hashed (SHA-256), parsed by
//! `tidemark_feed::parse_bytes` (CSV or Arrow IPC, told apart by the first bytes), and
//! handed to the store as one batch. Its size and modification time are taken when
//! reading starts and compared again inside the batch transaction just before it commits,
//! and once more before the file is archived: a file still being written is never
//! archived with a tail unread; it goes back to the inbox for the next run. Only after
//! the transaction commits does the file leave for the archive, so a crash at any point
//! leaves it either waiting (in the inbox or a claim folder the next run adopts, where a
//! re-run finds it is a duplicate, or ingests it) or archived with its batch committed.
//!
//! Invariant: a file leaves the inbox only after its batch commits (checked by
//! `tests/e2e_ingest.rs::failed_batch_leaves_nothing`).

mod claim;
mod inbox;

use std::fmt;
use std::io::Read as _;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::time::SystemTime;

use sha2::{Digest, Sha256};
use tidemark_feed::{count_by_kind, parse_bytes, BatchContent, RejectionKind};
use tracing::{info, info_span, warn, Instrument};

pub use claim::{claimed_files, CLAIMS};
pub use inbox::{list as list_inbox, Listing, Skipped, SkippedLine};

use crate::config::Config;
use crate::store::{BatchFile, BatchOutcome, Store, StoreError};
use crate::visible::{visible, visible_path};
use claim::{Claim, Claimed};

/// An ingest failure that is not the file's fault.
#[derive(Debug, thiserror::Error)]
pub enum IngestError {
    #[error("cannot read {}: {source}", visible_path(path))]
    Read {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{}: batch {batch_id} is committed, but moving the file to {} failed: {source}; remove it from the inbox by hand (re-ingesting it is harmless: it is a duplicate)", visible_path(path), visible_path(to))]
    Move {
        path: PathBuf,
        batch_id: i64,
        to: PathBuf,
        source: std::io::Error,
    },
    #[error("cannot list the inbox {}: {source}", visible_path(path))]
    Inbox {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error(
        "cannot claim files in the inbox {} (folder {CLAIMS} in it): {source}",
        visible_path(path)
    )]
    Claim {
        path: PathBuf,
        source: std::io::Error,
    },
    /// The file was written to while it was read; nothing half-read is archived.
    #[error("{}: {}", visible_path(path), changed_text(before, after, *batch_id, *in_inbox))]
    Changed {
        path: PathBuf,
        before: Stamp,
        after: Stamp,
        /// The batch that had committed before the change was seen, if any.
        batch_id: Option<i64>,
        in_inbox: bool,
    },
    /// A file named on the command line that another process claimed first.
    #[error(
        "{}: another tidemark process is ingesting it (or has just done so); skipped",
        visible_path(path)
    )]
    TakenByOther { path: PathBuf },
    /// An error after which the claimed file could not be put back in the inbox.
    #[error("{error}; the file could not be put back in the inbox ({source}) and waits in {} for the next run", visible_path(claimed))]
    NotGivenBack {
        error: Box<IngestError>,
        claimed: PathBuf,
        source: std::io::Error,
    },
    #[error("{}: {source}", visible_path(path))]
    Batch { path: PathBuf, source: StoreError },
    #[error(transparent)]
    Store(#[from] StoreError),
}

impl IngestError {
    /// A file left for later by design (still being written, or taken by another
    /// process), not a failure: it is reported but does not fail the command.
    pub fn is_deferral(&self) -> bool {
        matches!(
            self,
            IngestError::Changed { .. } | IngestError::TakenByOther { .. }
        )
    }
}

/// A file's size and modification time, to tell whether it changed while it was read.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Stamp {
    pub size: u64,
    pub modified: Option<SystemTime>,
}

impl Stamp {
    fn of(file: &std::fs::File) -> Option<Stamp> {
        file.metadata().ok().map(|m| Stamp {
            size: m.len(),
            modified: m.modified().ok(),
        })
    }
}

impl fmt::Display for Stamp {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{} bytes", self.size)?;
        if let Some(t) = self.modified {
            let t: chrono::DateTime<chrono::Utc> = t.into();
            write!(
                f,
                ", modified {}",
                t.to_rfc3339_opts(chrono::SecondsFormat::Nanos, true)
            )?;
        }
        Ok(())
    }
}

fn changed_text(before: &Stamp, after: &Stamp, batch_id: Option<i64>, in_inbox: bool) -> String {
    let left = if in_inbox {
        "it is back in the inbox for the next run"
    } else {
        "it is left where it is; ingest it again once it is complete"
    };
    match batch_id {
        None => format!(
            "changed while it was read ({before} when reading started, {after} now); nothing of it was stored and {left}"
        ),
        Some(id) => format!(
            "changed after it was read and its batch {id} committed ({before} when reading started, {after} now); the file was not archived and {left}, which reads the rest (values already stored count as unchanged)"
        ),
    }
}

/// What happened to one file.
#[derive(Debug, Clone)]
pub struct FileReport {
    pub path: PathBuf,
    pub outcome: BatchOutcome,
    /// Where the file (or, for a file named outside the inbox, its copy) now is.
    pub stored_at: PathBuf,
    /// The file's rejections counted by kind, the most frequent first.
    pub rejected_by: Vec<(RejectionKind, u64)>,
    /// The file was taken over from the claim of a process that stopped.
    pub recovered: bool,
}

/// Kinds of rejection named on a file's line; the rest are summed as "other".
const KINDS_SHOWN: usize = 3;

impl fmt::Display for FileReport {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let name = visible_path(&self.path);
        match &self.outcome {
            BatchOutcome::Ingested {
                batch_id,
                rows_read,
                values_accepted,
                values_rejected,
                values_superseding,
                values_unchanged,
            } => write!(
                f,
                "{name}: ingested as batch {batch_id}: {rows_read} rows, {values_accepted} values accepted ({values_superseding} superseding, {values_unchanged} unchanged), {values_rejected} rejected"
            )
            .and_then(|()| write_kinds(f, &self.rejected_by)),
            BatchOutcome::Duplicate {
                batch_id,
                duplicate_of,
            } => write!(
                f,
                "{name}: duplicate of batch {duplicate_of}, nothing changed (recorded as batch {batch_id})"
            ),
            BatchOutcome::Quarantined { batch_id, reason } => write!(
                f,
                "{name}: quarantined as batch {batch_id}: {}",
                visible(reason)
            ),
        }?;
        if self.recovered {
            f.write_str(" (taken over from a process that stopped while ingesting it)")?;
        }
        Ok(())
    }
}

/// ` (8 not a number, 4 year outside 1800–2200, 1 other)`, or nothing without rejections.
fn write_kinds(f: &mut fmt::Formatter<'_>, counts: &[(RejectionKind, u64)]) -> fmt::Result {
    if counts.is_empty() {
        return Ok(());
    }
    f.write_str(" (")?;
    for (i, (kind, n)) in counts.iter().take(KINDS_SHOWN).enumerate() {
        if i > 0 {
            f.write_str(", ")?;
        }
        write!(f, "{n} {kind}")?;
    }
    let other: u64 = counts.iter().skip(KINDS_SHOWN).map(|(_, n)| n).sum();
    if other > 0 {
        write!(f, ", {other} other")?;
    }
    f.write_str(")")
}

/// What one pass over the inbox found besides the files it ingested.
#[derive(Debug, Clone, Default)]
pub struct InboxPass {
    /// Entries that are not regular files, never read.
    pub skipped: Vec<Skipped>,
}

/// Ingest every file in the inbox, in name order, until `cancel` is raised: first the
/// files left in the claim of a process that stopped, then the inbox. `each` gets every
/// file's outcome as it is done; a file another process claimed first is skipped
/// without one.
pub async fn ingest_inbox(
    store: &Store,
    config: &Config,
    cancel: &AtomicBool,
    mut each: impl FnMut(Result<FileReport, IngestError>),
) -> Result<InboxPass, IngestError> {
    let inbox = &config.feed.inbox;
    let claim_err = |source| IngestError::Claim {
        path: inbox.clone(),
        source,
    };
    if !inbox.is_dir() {
        return Err(IngestError::Inbox {
            path: inbox.clone(),
            source: std::io::ErrorKind::NotFound.into(),
        });
    }
    let mut claim = Claim::open(inbox).map_err(claim_err)?;
    let adopted = claim.adopt_abandoned().map_err(claim_err)?;
    let listing = list_inbox(inbox)?;
    for file in adopted {
        if cancel.load(Ordering::Relaxed) {
            break;
        }
        each(ingest_claimed(store, config, &claim, file, true).await);
    }
    for path in &listing.files {
        if cancel.load(Ordering::Relaxed) {
            break;
        }
        match claim.take(path) {
            Ok(Some(file)) => each(ingest_claimed(store, config, &claim, file, false).await),
            Ok(None) => {}
            Err(source) => each(Err(IngestError::Read {
                path: path.clone(),
                source,
            })),
        }
    }
    claim.close();
    Ok(InboxPass {
        skipped: listing.skipped,
    })
}

/// Ingest files named on the command line: one in the inbox is claimed like any inbox
/// file (and moved out); one from elsewhere is copied into the archive or quarantine and
/// left where it is.
pub async fn ingest_named(
    store: &Store,
    config: &Config,
    paths: &[PathBuf],
    mut each: impl FnMut(Result<FileReport, IngestError>),
) -> Result<(), IngestError> {
    let inbox = &config.feed.inbox;
    let inbox_real = std::fs::canonicalize(inbox).ok();
    let mut claim = None;
    for path in paths {
        let in_inbox = inbox_real.is_some()
            && path
                .parent()
                .map(std::fs::canonicalize)
                .and_then(Result::ok)
                == inbox_real;
        if !in_inbox {
            each(ingest_path(store, config, path, path, false).await);
            continue;
        }
        if claim.is_none() {
            claim = Some(Claim::open(inbox).map_err(|source| IngestError::Claim {
                path: inbox.clone(),
                source,
            })?);
        }
        let Some(c) = claim.as_ref() else { continue };
        match c.take(path) {
            Ok(Some(file)) => each(ingest_claimed(store, config, c, file, false).await),
            Ok(None) => each(Err(IngestError::TakenByOther { path: path.clone() })),
            Err(source) => each(Err(IngestError::Read {
                path: path.clone(),
                source,
            })),
        }
    }
    if let Some(c) = claim {
        c.close();
    }
    Ok(())
}

/// Ingest one named file ([`ingest_named`] for a single path).
pub async fn ingest_file(
    store: &Store,
    config: &Config,
    path: &Path,
) -> Result<FileReport, IngestError> {
    let mut outcome = None;
    ingest_named(store, config, &[path.to_path_buf()], |r| outcome = Some(r)).await?;
    outcome.unwrap_or_else(|| {
        Err(IngestError::TakenByOther {
            path: path.to_path_buf(),
        })
    })
}

/// A claimed file: ingested and archived, or on any error given back to the inbox.
async fn ingest_claimed(
    store: &Store,
    config: &Config,
    claim: &Claim,
    file: Claimed,
    recovered: bool,
) -> Result<FileReport, IngestError> {
    let shown = file.inbox_path(&config.feed.inbox);
    match ingest_path(store, config, &file.path, &shown, true).await {
        Ok(report) => Ok(FileReport {
            recovered,
            ..report
        }),
        Err(error) => match claim.give_back(&file) {
            Ok(_) => Err(error),
            Err(source) => Err(IngestError::NotGivenBack {
                error: Box::new(error),
                claimed: file.path.clone(),
                source,
            }),
        },
    }
}

/// Read, check, store and move out the file at `path`, named `shown` in its line and
/// batch. `claimed`: the file is ours to move (else it is copied and left in place).
async fn ingest_path(
    store: &Store,
    config: &Config,
    path: &Path,
    shown: &Path,
    claimed: bool,
) -> Result<FileReport, IngestError> {
    let span = info_span!("ingest_file", file = %visible_path(shown));
    async move {
        let read_err = |source| IngestError::Read {
            path: shown.to_path_buf(),
            source,
        };
        let mut handle = std::fs::File::open(path).map_err(read_err)?;
        let before =
            Stamp::of(&handle).ok_or_else(|| read_err(std::io::ErrorKind::Other.into()))?;
        let mut bytes = Vec::new();
        handle.read_to_end(&mut bytes).map_err(read_err)?;
        let source = shown.file_name().map_or_else(
            || shown.display().to_string(),
            |n| n.to_string_lossy().into_owned(),
        );
        crate::test_hold::at("read", &source).await;
        let read_len = bytes.len() as u64;
        // Unchanged: the same size and time as when reading started, and every byte read.
        let now = || {
            Stamp::of(&handle).unwrap_or(Stamp {
                size: u64::MAX,
                modified: None,
            })
        };
        let unchanged = || read_len == before.size && now() == before;
        let changed = |batch_id| IngestError::Changed {
            path: shown.to_path_buf(),
            before,
            after: now(),
            batch_id,
            in_inbox: claimed,
        };
        let sha256 = hex::encode(Sha256::digest(&bytes));

        // A known file is not parsed again; the store re-checks inside its transaction.
        let in_batch = |source| IngestError::Batch {
            path: shown.to_path_buf(),
            source,
        };
        let (format, content) = if store
            .batch_with_sha256(&sha256)
            .await
            .map_err(in_batch)?
            .is_some()
        {
            (None, BatchContent::KnownDuplicate)
        } else {
            parse_bytes(&bytes, &config.file_layout())
        };
        let rejected_by = match &content {
            BatchContent::Parsed { rejections, .. } => count_by_kind(rejections),
            _ => Vec::new(),
        };
        let file = BatchFile {
            source: source.clone(),
            sha256,
            size_bytes: read_len,
            format,
        };
        drop(bytes);
        let Some(outcome) = store
            .ingest_batch_checked(&file, &content, &unchanged)
            .await
            .map_err(in_batch)?
        else {
            warn!("file changed while it was read; left for the next run");
            return Err(changed(None));
        };
        let (batch_id, dest_dir) = match &outcome {
            BatchOutcome::Ingested { batch_id, .. } | BatchOutcome::Duplicate { batch_id, .. } => {
                (*batch_id, &config.feed.archive)
            }
            BatchOutcome::Quarantined { batch_id, reason } => {
                warn!(batch_id, reason = %visible(reason), "file quarantined");
                (*batch_id, &config.feed.quarantine)
            }
        };
        info!(batch_id, ?outcome, "batch committed");
        crate::test_hold::at("committed", &source).await;
        if !unchanged() {
            warn!(
                batch_id,
                "file changed after its batch committed; not archived"
            );
            return Err(changed(Some(batch_id)));
        }
        let stored_at = move_out(path, dest_dir, &source, claimed).map_err(|(to, source)| {
            IngestError::Move {
                path: shown.to_path_buf(),
                batch_id,
                to,
                source,
            }
        })?;
        Ok(FileReport {
            path: shown.to_path_buf(),
            rejected_by: match outcome {
                BatchOutcome::Ingested { .. } => rejected_by,
                _ => Vec::new(),
            },
            outcome,
            stored_at,
            recovered: false,
        })
    }
    .instrument(span)
    .await
}

/// `name` with `-n` added before its extension: `a.csv` → `a-2.csv`.
fn numbered(name: &str, n: u32) -> String {
    match name.rsplit_once('.') {
        Some((stem, ext)) if !stem.is_empty() => format!("{stem}-{n}.{ext}"),
        _ => format!("{name}-{n}"),
    }
}

/// Move `path` into `dir` as `name` (or copy it, when it is not ours to move), adding
/// `-2`, `-3`… before the extension on a collision.
fn move_out(
    path: &Path,
    dir: &Path,
    name: &str,
    ours: bool,
) -> Result<PathBuf, (PathBuf, std::io::Error)> {
    std::fs::create_dir_all(dir).map_err(|e| (dir.to_path_buf(), e))?;
    let mut dest = dir.join(name);
    let mut n = 1;
    while dest.exists() {
        n += 1;
        dest = dir.join(numbered(name, n));
    }
    let result = if ours {
        std::fs::rename(path, &dest).or_else(|_| {
            // Different file systems: copy, make it durable, then remove the original.
            std::fs::copy(path, &dest)?;
            std::fs::File::open(&dest)?.sync_all()?;
            std::fs::remove_file(path)
        })
    } else {
        std::fs::copy(path, &dest).map(|_| ())
    };
    result.map_err(|e| (dest.clone(), e))?;
    Ok(dest)
}
