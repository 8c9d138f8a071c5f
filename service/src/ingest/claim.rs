//! Claiming inbox files, so that processes ingesting the same inbox at once (`serve`,
//! `run-once`, manual `ingest`) never read the same file.
//!
//! Each process makes its own folder `<inbox>/.ingesting/<id>/` (the inbox listing skips
//! names starting with `.`) and claims a file by renaming it there before reading it. A
//! rename is atomic, so of two processes exactly one moves the file; the other finds it
//! gone and skips it without a word. The folder's owner holds an exclusive `flock` on
//! `<id>.lock` beside it from before the folder exists until after it is removed; the
//! kernel drops that lock when the process dies, however it dies. The next pass of any
//! process that can take the lock of a folder not its own adopts the files left in it:
//! each is ingested from there (a file whose batch had committed is a duplicate, so nothing
//! is lost or counted twice). A file that cannot be finished is given back to the inbox.
//!
//! Checked by `tests/e2e_ingest.rs::two_processes_ingesting_one_inbox_take_each_file_once`
//! and `::a_file_claimed_by_a_killed_process_is_ingested_once_by_the_next_run`.

use std::fs::{File, OpenOptions};
use std::io;
use std::os::fd::AsRawFd;
use std::path::{Path, PathBuf};

/// The folder inside the inbox that holds the claim folders.
pub const CLAIMS: &str = ".ingesting";

/// This process's claim folder, and the folders it adopted from processes that are gone.
#[derive(Debug)]
pub struct Claim {
    inbox: PathBuf,
    own: Folder,
    adopted: Vec<Folder>,
}

/// A claim folder whose lock we hold.
#[derive(Debug)]
struct Folder {
    dir: PathBuf,
    lock_path: PathBuf,
    /// Held open for the lock; closing it releases the lock.
    _lock: File,
}

/// A file taken from the inbox: where it is now and the name it had there.
#[derive(Debug, Clone)]
pub struct Claimed {
    pub path: PathBuf,
    pub name: std::ffi::OsString,
}

impl Claimed {
    /// Where the file was in the inbox (the name its lines and batch use).
    pub fn inbox_path(&self, inbox: &Path) -> PathBuf {
        inbox.join(&self.name)
    }
}

impl Claim {
    /// Make this process's claim folder (locked before it becomes visible).
    pub fn open(inbox: &Path) -> io::Result<Claim> {
        let root = inbox.join(CLAIMS);
        let id = format!(
            "{}-{:x}-{:08x}",
            std::process::id(),
            chrono::Utc::now().timestamp_nanos_opt().unwrap_or_default(),
            rand::random::<u32>()
        );
        let lock_path = root.join(format!("{id}.lock"));
        // Another process's `close` removes the folder of claims when it is empty, so
        // it may vanish between making it and opening the lock in it: try again.
        let mut attempts = 0;
        let lock = loop {
            std::fs::create_dir_all(&root)?;
            match open_lock(&lock_path) {
                Err(e) if e.kind() == io::ErrorKind::NotFound && attempts < 10 => attempts += 1,
                other => break other?,
            }
        };
        if !try_lock(&lock)? {
            return Err(io::Error::other(format!(
                "{} is locked by another process although its name is new",
                lock_path.display()
            )));
        }
        let dir = root.join(&id);
        std::fs::create_dir(&dir)?;
        Ok(Claim {
            inbox: inbox.to_path_buf(),
            own: Folder {
                dir,
                lock_path,
                _lock: lock,
            },
            adopted: Vec::new(),
        })
    }

    /// Take over the claim folders of processes that are gone and return their files,
    /// sorted by name. A folder whose owner still runs is left alone.
    pub fn adopt_abandoned(&mut self) -> io::Result<Vec<Claimed>> {
        let root = self.inbox.join(CLAIMS);
        let mut files = Vec::new();
        for entry in std::fs::read_dir(&root)? {
            let entry = entry?;
            let dir = entry.path();
            let Some(id) = entry.file_name().to_str().map(str::to_string) else {
                continue;
            };
            if dir == self.own.dir || !entry.file_type()?.is_dir() {
                continue;
            }
            let lock_path = root.join(format!("{id}.lock"));
            let lock = open_lock(&lock_path)?;
            if !try_lock(&lock)? {
                continue;
            }
            let folder = Folder {
                dir: dir.clone(),
                lock_path,
                _lock: lock,
            };
            // The owner may have finished and removed its folder since we listed it.
            match std::fs::read_dir(&dir) {
                Ok(rd) => {
                    for f in rd {
                        let f = f?;
                        if f.file_type()?.is_file() {
                            files.push(Claimed {
                                path: f.path(),
                                name: f.file_name(),
                            });
                        }
                    }
                }
                Err(e) if e.kind() == io::ErrorKind::NotFound => {}
                Err(e) => return Err(e),
            }
            self.adopted.push(folder);
        }
        files.sort_by(|a, b| a.name.cmp(&b.name));
        Ok(files)
    }

    /// Claim `path` (a file in the inbox) by moving it into this process's folder.
    /// `None` when another process took it first.
    pub fn take(&self, path: &Path) -> io::Result<Option<Claimed>> {
        let Some(name) = path.file_name() else {
            return Ok(None);
        };
        let to = self.own.dir.join(name);
        match std::fs::rename(path, &to) {
            Ok(()) => Ok(Some(Claimed {
                path: to,
                name: name.to_os_string(),
            })),
            Err(e) if e.kind() == io::ErrorKind::NotFound => Ok(None),
            Err(e) => Err(e),
        }
    }

    /// Put a claimed file back in the inbox for the next run, under its name or, when a
    /// new file of that name arrived meanwhile, with `-2`, `-3`… added. Returns where it is.
    pub fn give_back(&self, file: &Claimed) -> io::Result<PathBuf> {
        let name = file.name.to_string_lossy().into_owned();
        let mut n = 1;
        loop {
            let dest = if n == 1 {
                self.inbox.join(&file.name)
            } else {
                self.inbox.join(super::numbered(&name, n))
            };
            // A hard link never replaces an existing file, unlike a rename.
            match std::fs::hard_link(&file.path, &dest) {
                Ok(()) => {
                    std::fs::remove_file(&file.path)?;
                    return Ok(dest);
                }
                Err(e) if e.kind() == io::ErrorKind::AlreadyExists => n += 1,
                Err(_) if !dest.exists() => {
                    // A file system without hard links.
                    std::fs::rename(&file.path, &dest)?;
                    return Ok(dest);
                }
                Err(e) => return Err(e),
            }
        }
    }

    /// Remove the emptied claim folders and their locks. A folder that still holds a file
    /// (one that could be neither finished nor given back) stays for the next run to adopt.
    /// The folder of claims goes too when nothing is left in it, so the inbox looks as
    /// it did.
    pub fn close(self) {
        for folder in std::iter::once(self.own).chain(self.adopted) {
            if std::fs::remove_dir(&folder.dir).is_ok() || !folder.dir.exists() {
                let _ = std::fs::remove_file(&folder.lock_path);
            }
        }
        let _ = std::fs::remove_dir(self.inbox.join(CLAIMS));
    }
}

/// Files in claim folders now: being ingested by a running process, or left by one that
/// stopped (the next pass adopts those). For `status`.
pub fn claimed_files(inbox: &Path) -> usize {
    let Ok(rd) = std::fs::read_dir(inbox.join(CLAIMS)) else {
        return 0;
    };
    rd.filter_map(Result::ok)
        .filter(|e| e.file_type().is_ok_and(|t| t.is_dir()))
        .filter_map(|e| std::fs::read_dir(e.path()).ok())
        .map(|files| {
            files
                .filter_map(Result::ok)
                .filter(|f| f.file_type().is_ok_and(|t| t.is_file()))
                .count()
        })
        .sum()
}

fn open_lock(path: &Path) -> io::Result<File> {
    OpenOptions::new()
        .create(true)
        .truncate(false)
        .write(true)
        .open(path)
}

/// An exclusive, non-blocking `flock`: false when another open file holds it.
fn try_lock(file: &File) -> io::Result<bool> {
    // SAFETY: flock on a descriptor owned by `file`, which outlives the call.
    let rc = unsafe { libc::flock(file.as_raw_fd(), libc::LOCK_EX | libc::LOCK_NB) };
    if rc == 0 {
        return Ok(true);
    }
    let e = io::Error::last_os_error();
    if e.raw_os_error() == Some(libc::EWOULDBLOCK) {
        Ok(false)
    } else {
        Err(e)
    }
}
