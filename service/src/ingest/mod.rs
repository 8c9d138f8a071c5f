//! Feed ingest: from a file in the inbox to a committed batch, then to the archive (or the
//! quarantine).
//!
//! A file is read whole, hashed (SHA-256), parsed by `tidemark_feed::parse_bytes` (CSV or
//! Arrow IPC, told apart by the first bytes), and handed to the store as one batch. Only
//! after that transaction commits does the file leave the inbox, so a crash at any point
//! leaves it either waiting (and a re-run finds it is a duplicate, or ingests it) or
//! archived with its batch committed.
//!
//! Invariant: a file leaves the inbox only after its batch commits (checked by
//! `tests/e2e_ingest.rs::failed_batch_leaves_nothing`).

use std::fmt;
use std::path::{Path, PathBuf};

use sha2::{Digest, Sha256};
use tidemark_feed::{count_by_kind, parse_bytes, BatchContent, RejectionKind};
use tracing::{info, info_span, warn};

use crate::config::Config;
use crate::store::{BatchFile, BatchOutcome, Store, StoreError};

/// An ingest failure that is not the file's fault.
#[derive(Debug, thiserror::Error)]
pub enum IngestError {
    #[error("cannot read {path}: {source}")]
    Read {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{path}: batch {batch_id} is committed, but moving the file to {to} failed: {source}; remove it from the inbox by hand (re-ingesting it is harmless: it is a duplicate)")]
    Move {
        path: PathBuf,
        batch_id: i64,
        to: PathBuf,
        source: std::io::Error,
    },
    #[error("cannot list the inbox {path}: {source}")]
    Inbox {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{path}: {source}")]
    Batch { path: PathBuf, source: StoreError },
    #[error(transparent)]
    Store(#[from] StoreError),
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
}

/// Kinds of rejection named on a file's line; the rest are summed as "other".
const KINDS_SHOWN: usize = 3;

impl fmt::Display for FileReport {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let name = self.path.display();
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
                "{name}: quarantined as batch {batch_id}: {reason}"
            ),
        }
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

/// Files waiting in the inbox, sorted by name. Names starting with `.` or ending in
/// `.part` or `.tmp` are files still being written and are left alone.
pub fn inbox_files(inbox: &Path) -> Result<Vec<PathBuf>, IngestError> {
    let err = |source| IngestError::Inbox {
        path: inbox.to_path_buf(),
        source,
    };
    let mut files = Vec::new();
    for entry in std::fs::read_dir(inbox).map_err(err)? {
        let entry = entry.map_err(err)?;
        let name = entry.file_name().to_string_lossy().into_owned();
        if name.starts_with('.') || name.ends_with(".part") || name.ends_with(".tmp") {
            continue;
        }
        if entry.file_type().map_err(err)?.is_file() {
            files.push(entry.path());
        }
    }
    files.sort();
    Ok(files)
}

/// Ingest one file and move it out of the inbox (a file named from elsewhere is copied
/// into the archive or quarantine instead, and left where it is).
pub async fn ingest_file(
    store: &Store,
    config: &Config,
    path: &Path,
) -> Result<FileReport, IngestError> {
    let span = info_span!("ingest_file", file = %path.display());
    let _guard = span.enter();
    let bytes = std::fs::read(path).map_err(|source| IngestError::Read {
        path: path.to_path_buf(),
        source,
    })?;
    let sha256 = hex::encode(Sha256::digest(&bytes));
    let source = path.file_name().map_or_else(
        || path.display().to_string(),
        |n| n.to_string_lossy().into_owned(),
    );

    // A known file is not parsed again; the store re-checks inside its transaction.
    let in_batch = |source| IngestError::Batch {
        path: path.to_path_buf(),
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
        source,
        sha256,
        size_bytes: bytes.len() as u64,
        format,
    };
    drop(bytes);
    let outcome = store
        .ingest_batch(&file, &content)
        .await
        .map_err(in_batch)?;
    let (batch_id, dest_dir) = match &outcome {
        BatchOutcome::Ingested { batch_id, .. } | BatchOutcome::Duplicate { batch_id, .. } => {
            (*batch_id, &config.feed.archive)
        }
        BatchOutcome::Quarantined { batch_id, reason } => {
            warn!(batch_id, %reason, "file quarantined");
            (*batch_id, &config.feed.quarantine)
        }
    };
    info!(batch_id, ?outcome, "batch committed");
    let stored_at =
        move_out(path, dest_dir, &config.feed.inbox).map_err(|(to, source)| IngestError::Move {
            path: path.to_path_buf(),
            batch_id,
            to,
            source,
        })?;
    Ok(FileReport {
        path: path.to_path_buf(),
        rejected_by: match outcome {
            BatchOutcome::Ingested { .. } => rejected_by,
            _ => Vec::new(),
        },
        outcome,
        stored_at,
    })
}

/// Move `path` into `dir` (or copy it, when it is not in the inbox), keeping its name and
/// adding `-2`, `-3`… before the extension on a collision.
fn move_out(path: &Path, dir: &Path, inbox: &Path) -> Result<PathBuf, (PathBuf, std::io::Error)> {
    std::fs::create_dir_all(dir).map_err(|e| (dir.to_path_buf(), e))?;
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "feed".into());
    let mut dest = dir.join(&name);
    let (stem, ext) = match name.rsplit_once('.') {
        Some((s, e)) if !s.is_empty() => (s.to_string(), format!(".{e}")),
        _ => (name.clone(), String::new()),
    };
    let mut n = 1;
    while dest.exists() {
        n += 1;
        dest = dir.join(format!("{stem}-{n}{ext}"));
    }
    let in_inbox = match (
        path.parent().map(std::fs::canonicalize),
        std::fs::canonicalize(inbox),
    ) {
        (Some(Ok(a)), Ok(b)) => a == b,
        _ => false,
    };
    let result = if in_inbox {
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
