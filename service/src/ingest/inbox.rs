//! What waits in the inbox: the regular files to ingest, and the entries that are not
//! regular files (symbolic links, FIFOs, folders, sockets, devices), which are never read
//! but are named on the `ingest` line and in `status` so that they do not go unnoticed.
//!
//! Names starting with `.` or ending in `.part` or `.tmp` are deliveries still being
//! written (and `.ingesting`, the claim folders) and are neither listed nor reported.

use std::fmt;
use std::path::{Path, PathBuf};

use serde::Serialize;

use super::IngestError;

/// The inbox as listed once.
#[derive(Debug, Clone, Default)]
pub struct Listing {
    /// Regular files, sorted by name.
    pub files: Vec<PathBuf>,
    /// Entries that are not regular files, sorted by name.
    pub skipped: Vec<Skipped>,
}

/// An inbox entry that is not a regular file.
#[derive(Debug, Clone, PartialEq, Eq, Serialize)]
pub struct Skipped {
    pub name: String,
    /// `symbolic link`, `FIFO`, `folder`, `socket` or `device`.
    pub kind: &'static str,
}

/// Whether a name in the inbox is left alone: a delivery still being written.
pub fn ignored(name: &str) -> bool {
    name.starts_with('.') || name.ends_with(".part") || name.ends_with(".tmp")
}

/// List the inbox.
pub fn list(inbox: &Path) -> Result<Listing, IngestError> {
    use std::os::unix::fs::FileTypeExt as _;
    let err = |source| IngestError::Inbox {
        path: inbox.to_path_buf(),
        source,
    };
    let mut listing = Listing::default();
    for entry in std::fs::read_dir(inbox).map_err(err)? {
        let entry = entry.map_err(err)?;
        let name = entry.file_name().to_string_lossy().into_owned();
        if ignored(&name) {
            continue;
        }
        let t = entry.file_type().map_err(err)?;
        let kind = if t.is_file() {
            listing.files.push(entry.path());
            continue;
        } else if t.is_symlink() {
            "symbolic link"
        } else if t.is_fifo() {
            "FIFO"
        } else if t.is_dir() {
            "folder"
        } else if t.is_socket() {
            "socket"
        } else {
            "device"
        };
        listing.skipped.push(Skipped { name, kind });
    }
    listing.files.sort();
    listing.skipped.sort_by(|a, b| a.name.cmp(&b.name));
    Ok(listing)
}

/// `2 inbox entries skipped, not regular files: link.csv (symbolic link), feed (FIFO);
/// move the files themselves into the inbox`, for the `ingest` line and the run message.
pub struct SkippedLine<'a>(pub &'a [Skipped]);

impl fmt::Display for SkippedLine<'_> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let names: Vec<String> = self
            .0
            .iter()
            .map(|s| format!("{} ({})", crate::visible::visible(&s.name), s.kind))
            .collect();
        write!(
            f,
            "{} inbox {} skipped, not regular files: {}; move the files themselves into the inbox",
            self.0.len(),
            if self.0.len() == 1 {
                "entry"
            } else {
                "entries"
            },
            names.join(", ")
        )
    }
}
