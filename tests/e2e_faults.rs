//! Faults of the machine around Tidemark, end to end: the database locked by another
//! writer, a read-only database, a missing inbox, a full disk, a corrupt database file.
//! Each must give a clear error on stderr, exit non-zero, leave the feed file waiting in
//! the inbox, and lose nothing that was accepted before. (Killing the process mid-run is
//! tested in `e2e_unattended.rs`.)
//!
//! The read-only and full-disk cases put the database on a small tmpfs; mounting one
//! needs root (or CAP_SYS_ADMIN). Where that is impossible they print why and pass.

mod common;

use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use common::{Network, CONFIG};

const HEADER: &str = "lake,season,visit,chl_ug_l,tp_ug_l,surface_temp_c,crew";

fn season(lakes: usize, year: i32) -> String {
    let mut text = format!("{HEADER}\n");
    for l in 0..lakes {
        text.push_str(&format!(
            "L{l},{year},1,{}.5,{},1{}.2,C{}\n",
            l % 7 + 1,
            l % 11 + 3,
            l % 9,
            l % 3
        ));
    }
    text
}

/// Every stored value, and how many rows `observations` has, as text to compare.
fn snapshot(db: &Path) -> String {
    sqlite3_at(
        db,
        "SELECT value_id, site, year, visit, column_name, num_value, text_value FROM current_observations
         ORDER BY value_id;
         SELECT COUNT(*), COUNT(DISTINCT batch_id) FROM observations;",
    )
}

fn sqlite3_at(db: &Path, query: &str) -> String {
    let out = Command::new("sqlite3")
        .arg("-batch")
        .arg(db)
        .arg(query)
        .output()
        .expect("the sqlite3 client must be installed (.ci/run installs it)");
    assert!(
        out.status.success(),
        "sqlite3 {query:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).into_owned()
}

/// A failed command: exit 1, a `tidemark: error:` line, each stderr line naming `needle`
/// somewhere, no panic. Returns stderr.
fn assert_clear_failure(out: &Output, needles: &[&str]) -> String {
    let stderr = String::from_utf8_lossy(&out.stderr).into_owned();
    assert_eq!(out.status.code(), Some(1), "exit code; stderr: {stderr}");
    assert!(!stderr.contains("panicked"), "{stderr}");
    let last = stderr.lines().last().unwrap_or("");
    assert!(last.starts_with("tidemark: error: "), "{stderr}");
    let lower = stderr.to_lowercase();
    assert!(
        needles.iter().any(|n| lower.contains(&n.to_lowercase())),
        "stderr should name the problem ({needles:?}): {stderr}"
    );
    assert!(
        stderr.lines().count() <= 3,
        "a short, clear error, not a dump: {stderr}"
    );
    stderr
}

/// A network with data from one accepted season, and a second season waiting in the inbox.
fn network_with_history(config: &str) -> Network {
    let net = Network::with_config(config);
    net.ok(&["init"]);
    net.drop_file("2020.csv", season(30, 2020));
    net.ok(&["ingest"]);
    net.drop_file("2021.csv", season(30, 2021));
    net
}

#[test]
fn a_database_locked_by_another_writer_is_a_clear_busy_error() {
    let net = network_with_history(CONFIG);
    let before = snapshot(&net.db_path());
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .expect("runtime");
    // Another writer holds the write lock for longer than tidemark's busy timeout.
    let mut holder = rt.block_on(async {
        use sqlx::ConnectOptions;
        let mut conn = sqlx::sqlite::SqliteConnectOptions::new()
            .filename(net.db_path())
            .connect()
            .await
            .expect("open");
        sqlx::query("BEGIN IMMEDIATE")
            .execute(&mut conn)
            .await
            .expect("take the write lock");
        conn
    });
    let out = net.tidemark(&["ingest"]);
    let stderr = assert_clear_failure(&out, &["locked", "busy"]);
    assert!(stderr.contains("2021.csv"), "names the file: {stderr}");
    assert_eq!(net.files_in("inbox"), ["2021.csv"], "the file waits");
    rt.block_on(async {
        sqlx::query("ROLLBACK")
            .execute(&mut holder)
            .await
            .expect("release");
    });
    drop(holder);
    assert_eq!(
        snapshot(&net.db_path()),
        before,
        "nothing lost or half-written"
    );
    let out = net.ok(&["ingest"]);
    assert!(out.contains("2021.csv: ingested"), "{out}");
    assert!(net.files_in("inbox").is_empty());
}

#[test]
fn a_missing_inbox_is_a_clear_error_for_ingest_and_run_once() {
    let net = network_with_history(CONFIG);
    let before = snapshot(&net.db_path());
    std::fs::remove_dir_all(net.path("inbox")).expect("remove the inbox");
    for command in ["ingest", "run-once"] {
        let out = net.tidemark(&[command]);
        let stderr = String::from_utf8_lossy(&out.stderr).into_owned();
        assert_eq!(out.status.code(), Some(1), "{command}: {stderr}");
        assert!(!stderr.contains("panicked"), "{stderr}");
        assert!(
            stderr.contains("inbox") && stderr.contains("does not exist"),
            "{command}: {stderr}"
        );
    }
    assert_eq!(snapshot(&net.db_path()), before);
}

/// A tmpfs mounted at `dir`, unmounted on drop.
struct Tmpfs(PathBuf);

impl Tmpfs {
    fn mount(dir: &Path, size: &str) -> Result<Tmpfs, String> {
        std::fs::create_dir_all(dir).map_err(|e| e.to_string())?;
        let out = Command::new("mount")
            .args(["-t", "tmpfs", "-o", &format!("size={size}"), "tmpfs"])
            .arg(dir)
            .output()
            .map_err(|e| format!("cannot run mount: {e}"))?;
        if !out.status.success() {
            return Err(String::from_utf8_lossy(&out.stderr).trim().to_string());
        }
        Ok(Tmpfs(dir.to_path_buf()))
    }

    fn remount(&self, mode: &str) {
        let out = Command::new("mount")
            .args(["-o", &format!("remount,{mode}")])
            .arg(&self.0)
            .output()
            .expect("mount");
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
    }
}

impl Drop for Tmpfs {
    fn drop(&mut self) {
        let _ = Command::new("umount").arg("-l").arg(&self.0).output();
    }
}

/// A network whose database lives on its own small tmpfs (`db/`), with the inbox and
/// archive on the ordinary file system. None when no tmpfs can be mounted here.
fn network_with_database_on_tmpfs(size: &str) -> Option<(Network, Tmpfs, PathBuf)> {
    let config = CONFIG.replace(
        "database = \"tidemark.db\"",
        "database = \"db/tidemark.db\"",
    );
    let net = Network::with_config(&config);
    let mount = match Tmpfs::mount(&net.path("db"), size) {
        Ok(m) => m,
        Err(why) => {
            eprintln!("skipped: cannot mount a tmpfs here ({why}); needs root or CAP_SYS_ADMIN");
            return None;
        }
    };
    net.ok(&["init"]);
    net.drop_file("2020.csv", season(30, 2020));
    net.ok(&["ingest"]);
    let db = net.path("db/tidemark.db");
    Some((net, mount, db))
}

#[test]
fn a_read_only_database_is_a_clear_error_and_the_file_waits() {
    // As root, chmod does not stop writes; a file system mounted read-only does.
    let Some((net, mount, db)) = network_with_database_on_tmpfs("16m") else {
        return;
    };
    let before = snapshot(&db);
    net.drop_file("2021.csv", season(30, 2021));
    mount.remount("ro");
    let out = net.tidemark(&["ingest"]);
    assert_clear_failure(
        &out,
        &["read-only", "readonly", "read only", "unable to open"],
    );
    assert_eq!(net.files_in("inbox"), ["2021.csv"]);
    mount.remount("rw");
    assert_eq!(snapshot(&db), before);
    let out = net.ok(&["ingest"]);
    assert!(out.contains("2021.csv: ingested"), "{out}");
}

#[test]
fn a_full_disk_is_a_clear_error_and_loses_nothing() {
    let Some((net, _mount, db)) = network_with_database_on_tmpfs("1m") else {
        return;
    };
    let before = snapshot(&db);
    // Far more values than the file system has room for.
    net.drop_file("big.csv", season(40_000, 2021));
    let out = net.tidemark(&["ingest"]);
    assert_clear_failure(&out, &["full", "no space"]);
    assert_eq!(net.files_in("inbox"), ["big.csv"], "the file waits");
    assert!(net.files_in("archive").iter().all(|f| f != "big.csv"));
    assert_eq!(snapshot(&db), before, "nothing lost or half-written");
    // Once the big file is dealt with, a normal season still goes in.
    std::fs::remove_file(net.path("inbox/big.csv")).expect("remove");
    net.drop_file("2021.csv", season(30, 2021));
    let out = net.ok(&["ingest"]);
    assert!(out.contains("2021.csv: ingested"), "{out}");
}

#[test]
fn a_file_that_is_not_a_database_is_refused_and_left_alone() {
    let net = Network::new();
    let junk = "this is a spreadsheet export, not a database\n".repeat(100);
    std::fs::write(net.db_path(), &junk).expect("write");
    net.drop_file("2020.csv", season(5, 2020));
    for args in [&["ingest"][..], &["status"], &["init"], &["run-once"]] {
        let out = net.tidemark(args);
        let stderr = assert_clear_failure(&out, &["not a database"]);
        assert!(
            stderr.contains("tidemark.db"),
            "{args:?} names the file: {stderr}"
        );
    }
    assert_eq!(
        std::fs::read_to_string(net.db_path()).expect("read"),
        junk,
        "never overwritten"
    );
    assert_eq!(net.files_in("inbox"), ["2020.csv"]);
}

#[test]
fn a_damaged_database_is_a_clear_error_and_the_file_waits() {
    let net = network_with_history(CONFIG);
    // Everything into the main file, then overwrite every page after the first.
    sqlite3_at(&net.db_path(), "PRAGMA wal_checkpoint(TRUNCATE);");
    let mut bytes = std::fs::read(net.db_path()).expect("read");
    let page = 4096;
    assert!(bytes.len() > 2 * page, "{} bytes", bytes.len());
    for b in &mut bytes[page..] {
        *b = 0xA5;
    }
    std::fs::write(net.db_path(), &bytes).expect("write");
    for args in [&["ingest"][..], &["status"]] {
        let out = net.tidemark(args);
        let stderr = assert_clear_failure(&out, &["malformed", "corrupt", "damaged"]);
        assert!(
            stderr.contains("tidemark.db"),
            "{args:?} names the file: {stderr}"
        );
    }
    assert_eq!(net.files_in("inbox"), ["2021.csv"], "the file waits");
    assert_eq!(
        net.files_in("archive"),
        ["2020.csv"],
        "the archive keeps the data"
    );
}

/// Write zeros into `dir` until its file system is full; the filler file's path.
fn fill_up(dir: &Path) -> PathBuf {
    use std::io::Write;
    let path = dir.join("filler");
    let mut file = std::fs::File::create(&path).expect("create the filler");
    let chunk = vec![0u8; 1 << 16];
    while file.write_all(&chunk).is_ok() {}
    let _ = file.sync_all();
    path
}

fn rows(net: &Network, query: &str) -> i64 {
    sqlite3_at(&net.path("db/tidemark.db"), query)
        .trim()
        .parse()
        .expect("a count")
}

#[test]
fn serve_reports_a_full_disk_and_recovers_on_the_next_tick_once_space_is_free() {
    let config = CONFIG
        .replace(
            "database = \"tidemark.db\"",
            "database = \"db/tidemark.db\"",
        )
        .replace("cron = \"30 2 * * *\"", "cron = \"*/2 * * * * *\"");
    let net = Network::with_config(&config);
    let _mount = match Tmpfs::mount(&net.path("db"), "64m") {
        Ok(m) => m,
        Err(why) => {
            eprintln!("skipped: cannot mount a tmpfs here ({why}); needs root or CAP_SYS_ADMIN");
            return;
        }
    };
    net.ok(&["init"]);
    for year in [2019, 2020] {
        net.drop_file(&format!("{year}.csv"), season(30, year));
    }
    net.ok(&["ingest"]);
    let mut serve = common::spawn_logged(&net, &["serve"], "serve.log");
    let log = |net: &Network| std::fs::read_to_string(net.path("serve.log")).unwrap_or_default();
    // Two scheduled runs have finished (this invented season is too regular to pass the
    // gate; that does not matter here): serve is idle between ticks.
    assert!(
        common::wait_until(std::time::Duration::from_secs(60), || rows(
            &net,
            "SELECT COUNT(*) FROM runs WHERE trigger = 'schedule' AND status != 'running'"
        ) >= 2),
        "serve ran no scheduled run: {}",
        log(&net)
    );

    // Something else fills the disk; a large delivery arrives.
    let filler = fill_up(&net.path("db"));
    let before = snapshot(&net.path("db/tidemark.db"));
    let runs = rows(&net, "SELECT COUNT(*) FROM runs");
    net.drop_file("big.csv", season(20_000, 2021));
    // Not even a run record fits now: each tick says so in its log line and waits.
    assert!(
        common::wait_until(std::time::Duration::from_secs(30), || log(&net)
            .matches("run failed: database")
            .filter(|_| log(&net).contains("disk full, no space left"))
            .count()
            >= 2),
        "two ticks should have failed on the full disk: {}",
        log(&net)
    );
    // Each line says its cause once (the store error carries its SQLite cause both in its
    // text and as its source; the line must not repeat it).
    for line in log(&net).lines().filter(|l| l.contains("run failed")) {
        assert_eq!(
            line.matches("no space left").count(),
            1,
            "a cause said more than once: {line}"
        );
    }
    assert!(
        serve.try_wait().expect("try_wait").is_none(),
        "serve stopped"
    );
    assert_eq!(rows(&net, "SELECT COUNT(*) FROM runs"), runs);
    assert_eq!(net.files_in("inbox"), ["big.csv"], "the file waits");
    assert_eq!(
        snapshot(&net.path("db/tidemark.db")),
        before,
        "nothing half-written"
    );

    // Space comes back: the next tick ingests the waiting file.
    std::fs::remove_file(&filler).expect("free the space");
    assert!(
        common::wait_until(std::time::Duration::from_secs(60), || net
            .files_in("archive")
            .iter()
            .any(|f| f == "big.csv")),
        "serve did not recover once space was free: {}",
        log(&net)
    );
    assert!(
        !log(&net).contains("transaction depth"),
        "a connection was left inside a failed transaction: {}",
        log(&net)
    );

    common::signal(&serve, libc::SIGTERM);
    let (exit, _) = common::wait_exit(&mut serve, std::time::Duration::from_secs(20));
    let exit = exit.unwrap_or_else(|| {
        let _ = serve.kill();
        panic!("serve still running 20 s after SIGTERM: {}", log(&net))
    });
    assert!(exit.success(), "serve exited {exit}: {}", log(&net));
    assert_eq!(
        rows(&net, "SELECT COUNT(*) FROM instance_lease"),
        0,
        "the lease was not released"
    );
    // A fresh process carries on.
    net.drop_file("2022.csv", season(30, 2022));
    let out = net.ok(&["ingest"]);
    assert!(out.contains("2022.csv: ingested"), "{out}");
}
