//! Feed ingest: from a file in the inbox to a committed batch, then to the archive (or the
//! quarantine).
//!
//! A file is read whole, hashed (SHA-256), parsed by the reader for its format (CSV or
//! Arrow IPC, told apart by the first bytes), and handed to the store as one batch. Only
//! after that transaction commits does the file leave the inbox, so a crash at any point
//! leaves it either waiting (and a re-run finds it is a duplicate, or ingests it) or
//! archived with its batch committed.
//!
//! Invariant: a file leaves the inbox only after its batch commits (checked by
//! `tests/e2e_ingest.rs::failed_batch_leaves_nothing`).

mod arrow_feed;
mod collect;
mod csv_feed;

use std::collections::BTreeSet;
use std::fmt;
use std::path::{Path, PathBuf};

use sha2::{Digest, Sha256};
use tracing::{info, info_span, warn};

use crate::config::{Config, KeyColumns};
use crate::store::{BatchContent, BatchFile, BatchOutcome, Store, StoreError};

pub use arrow_feed::quiet_caught_panics;
pub use collect::{parse_number, parse_year, DEFAULT_VISIT, YEARS};
use collect::{ColumnKind, Measure};

/// Why a file could not be read at all (it goes to quarantine with this reason).
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Unreadable(pub String);

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

/// How columns of a feed file are understood: the key columns, and which columns hold
/// labels rather than numbers.
#[derive(Debug, Clone)]
pub struct FileLayout {
    pub keys: KeyColumns,
    pub labels: BTreeSet<String>,
}

/// Where the key and measurement columns sit in one file.
#[derive(Debug, Clone)]
pub(crate) struct Plan {
    pub site_at: usize,
    pub year_at: usize,
    pub visit_at: Option<usize>,
    pub measure_at: Vec<usize>,
    pub measures: Vec<Measure>,
}

impl FileLayout {
    pub fn from_config(config: &Config) -> FileLayout {
        FileLayout {
            keys: config.keys.clone(),
            labels: config.label_columns(),
        }
    }

    pub(crate) fn plan(&self, header: &[String]) -> Result<Plan, Unreadable> {
        let mut seen = BTreeSet::new();
        for (i, h) in header.iter().enumerate() {
            if h.is_empty() {
                return Err(Unreadable(format!(
                    "column {} of the header has no name",
                    i + 1
                )));
            }
            if !seen.insert(h.as_str()) {
                return Err(Unreadable(format!(
                    "column `{h}` appears twice in the header"
                )));
            }
        }
        let find = |name: &str| header.iter().position(|h| h == name);
        let site_at = find(&self.keys.site).ok_or_else(|| {
            Unreadable(format!(
                "no site column `{}` in the header (columns: {})",
                self.keys.site,
                header.join(", ")
            ))
        })?;
        let year_at = find(&self.keys.year).ok_or_else(|| {
            Unreadable(format!(
                "no year column `{}` in the header (columns: {})",
                self.keys.year,
                header.join(", ")
            ))
        })?;
        let visit_at = self.keys.visit.as_deref().and_then(find);
        let mut measure_at = Vec::new();
        let mut measures = Vec::new();
        for (i, h) in header.iter().enumerate() {
            if i == site_at || i == year_at || Some(i) == visit_at {
                continue;
            }
            measure_at.push(i);
            measures.push(Measure {
                name: h.clone(),
                kind: if self.labels.contains(h) {
                    ColumnKind::Label
                } else {
                    ColumnKind::Numeric
                },
            });
        }
        Ok(Plan {
            site_at,
            year_at,
            visit_at,
            measure_at,
            measures,
        })
    }
}

/// Parse a file's bytes into a batch (or the reason it is unreadable) and its format name.
pub fn parse_bytes(bytes: &[u8], layout: &FileLayout) -> (Option<&'static str>, BatchContent) {
    let (format, parsed) = if bytes.starts_with(arrow_feed::FILE_MAGIC) {
        (Some("arrow-file"), arrow_feed::read(bytes, layout))
    } else if bytes.starts_with(arrow_feed::STREAM_MAGIC) {
        (Some("arrow-stream"), arrow_feed::read(bytes, layout))
    } else if bytes.is_empty() {
        (None, Err(Unreadable("the file is empty".into())))
    } else {
        (Some("csv"), csv_feed::read(bytes, layout))
    };
    let content = match parsed {
        Ok(collector) => {
            let (rows_read, values, rejections) = collector.finish();
            BatchContent::Parsed {
                rows_read,
                values,
                rejections,
            }
        }
        Err(Unreadable(reason)) => BatchContent::Unreadable { reason },
    };
    (format, content)
}

/// What happened to one file.
#[derive(Debug, Clone)]
pub struct FileReport {
    pub path: PathBuf,
    pub outcome: BatchOutcome,
    /// Where the file (or, for a file named outside the inbox, its copy) now is.
    pub stored_at: PathBuf,
}

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
            ),
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
        parse_bytes(&bytes, &FileLayout::from_config(config))
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
