//! Test helper that speaks the domain's language: a monitoring network in a temporary
//! directory, with a config, an inbox, the real `tidemark` binary, and two ways to read the
//! database (sqlx, and the `sqlite3` command-line client an analyst would use).

#![allow(dead_code)]

use std::fmt;
use std::path::{Path, PathBuf};
use std::process::{Command, Output};

use sqlx::sqlite::{SqliteConnectOptions, SqliteRow};
use sqlx::{ConnectOptions, Row, TypeInfo, ValueRef};

/// A config with two series over the feed columns lake / season / visit.
pub const CONFIG: &str = r#"
[store]
database = "tidemark.db"

[feed]
inbox = "inbox"
archive = "archive"
quarantine = "quarantine"

[schedule]
cron = "30 2 * * *"
timezone = "UTC"

[[series]]
name = "chlorophyll"
response = "chl_ug_l"
transform = "log"
site = "lake"
year = "season"
visit = "visit"
covariates = ["surface_temp_c"]
groups = ["crew"]

[[series]]
name = "phosphorus"
response = "tp_ug_l"
site = "lake"
year = "season"
visit = "visit"
"#;

/// The chlorophyll series of [`CONFIG`] without its crew factor: log scale, one covariate.
pub const CHLOROPHYLL: &str = r#"name = "chlorophyll"
response = "chl_ug_l"
transform = "log"
site = "lake"
year = "season"
visit = "visit"
covariates = ["surface_temp_c"]
"#;

/// The phosphorus series of [`CONFIG`]: as measured, no covariates.
pub const PHOSPHORUS: &str = r#"name = "phosphorus"
response = "tp_ug_l"
site = "lake"
year = "season"
visit = "visit"
"#;

/// A series' `[series.sampler]` table; the defaults are a small sampler for speed.
#[derive(Debug, Clone, Copy)]
pub struct Sampler {
    pub chains: u32,
    pub draws: u32,
    pub warmup: u32,
    pub seed: u64,
    pub max_rhat: f64,
    pub min_ess: u32,
}

impl Default for Sampler {
    fn default() -> Self {
        Sampler {
            chains: 4,
            draws: 500,
            warmup: 300,
            seed: 5,
            max_rhat: 1.05,
            min_ess: 200,
        }
    }
}

/// The config of an end-to-end test: the usual store and feed folders, then what varies
/// (a schedule, the series and their samplers).
///
/// ```ignore
/// let toml = ConfigBuilder::new()
///     .series(CHLOROPHYLL)
///     .sampler(Sampler { seed: 3, ..Default::default() })
///     .build();
/// ```
#[derive(Debug, Clone, Default)]
pub struct ConfigBuilder {
    schedule: Option<String>,
    series: Vec<String>,
}

impl ConfigBuilder {
    pub fn new() -> ConfigBuilder {
        ConfigBuilder::default()
    }

    /// A `[schedule]` table; `extra` holds further lines of it (or is empty).
    pub fn schedule(mut self, cron: &str, timezone: &str, extra: &str) -> ConfigBuilder {
        self.schedule = Some(format!(
            "[schedule]\ncron = \"{cron}\"\ntimezone = \"{timezone}\"\n{extra}\n"
        ));
        self
    }

    /// One more `[[series]]` table with the given keys.
    pub fn series(mut self, keys: &str) -> ConfigBuilder {
        self.series.push(format!("[[series]]\n{keys}"));
        self
    }

    /// The sampler of the series added last.
    pub fn sampler(mut self, s: Sampler) -> ConfigBuilder {
        let last = self
            .series
            .last_mut()
            .expect("a sampler belongs to a series: call `series` first");
        last.push_str(&format!(
            "\n[series.sampler]\nchains = {}\ndraws = {}\nwarmup = {}\nseed = {}\nmax_rhat = {}\nmin_ess = {}\n",
            s.chains, s.draws, s.warmup, s.seed, s.max_rhat, s.min_ess
        ));
        self
    }

    pub fn build(self) -> String {
        let mut out = String::from(
            "[store]\ndatabase = \"tidemark.db\"\n\n\
             [feed]\ninbox = \"inbox\"\narchive = \"archive\"\nquarantine = \"quarantine\"\n\n",
        );
        if let Some(schedule) = &self.schedule {
            out.push_str(schedule);
            out.push('\n');
        }
        out.push_str(&self.series.join("\n"));
        out
    }
}

/// One SQL value as read back.
#[derive(Debug, Clone, PartialEq)]
pub enum Value {
    Null,
    Int(i64),
    Real(f64),
    Text(String),
    Blob(Vec<u8>),
}

impl Value {
    pub fn int(&self) -> i64 {
        match self {
            Value::Int(i) => *i,
            other => panic!("expected an integer, found {other:?}"),
        }
    }
    pub fn real(&self) -> f64 {
        match self {
            Value::Real(x) => *x,
            Value::Int(i) => *i as f64,
            other => panic!("expected a number, found {other:?}"),
        }
    }
    pub fn text(&self) -> &str {
        match self {
            Value::Text(s) => s,
            other => panic!("expected text, found {other:?}"),
        }
    }
    pub fn is_null(&self) -> bool {
        matches!(self, Value::Null)
    }
}

impl fmt::Display for Value {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Value::Null => f.write_str("NULL"),
            Value::Int(i) => write!(f, "{i}"),
            Value::Real(x) => write!(f, "{x}"),
            Value::Text(s) => f.write_str(s),
            Value::Blob(b) => write!(f, "<{} bytes>", b.len()),
        }
    }
}

pub struct Network {
    pub dir: tempfile::TempDir,
}

impl Network {
    /// A fresh network with the default config, not yet initialised.
    pub fn new() -> Network {
        Network::with_config(CONFIG)
    }

    pub fn with_config(config: &str) -> Network {
        let dir = tempfile::tempdir().expect("temp dir");
        std::fs::write(dir.path().join("tidemark.toml"), config).expect("write config");
        Network { dir }
    }

    /// A fresh network after `tidemark init`.
    pub fn initialised() -> Network {
        let net = Network::new();
        net.ok(&["init"]);
        net
    }

    pub fn path(&self, rel: &str) -> PathBuf {
        self.dir.path().join(rel)
    }

    pub fn config_path(&self) -> PathBuf {
        self.path("tidemark.toml")
    }

    pub fn db_path(&self) -> PathBuf {
        self.path("tidemark.db")
    }

    /// Put a feed file into the inbox the way the README asks deliveries to arrive:
    /// written under a name the inbox ignores, then renamed, so a running `serve` never
    /// reads half a file.
    pub fn drop_file(&self, name: &str, contents: impl AsRef<[u8]>) -> PathBuf {
        let inbox = self.path("inbox");
        std::fs::create_dir_all(&inbox).expect("inbox");
        let p = inbox.join(name);
        let part = inbox.join(format!(".{name}.part"));
        std::fs::write(&part, contents).expect("write feed file");
        std::fs::rename(&part, &p).expect("rename feed file into the inbox");
        p
    }

    pub fn files_in(&self, dir: &str) -> Vec<String> {
        let mut names: Vec<String> = std::fs::read_dir(self.path(dir))
            .map(|rd| {
                rd.filter_map(|e| e.ok())
                    .map(|e| e.file_name().to_string_lossy().into_owned())
                    .collect()
            })
            .unwrap_or_default();
        names.sort();
        names
    }

    /// The real binary with `--config` pointing at this network, run in its folder, with
    /// no logging or config variables of the caller's environment.
    pub fn command(&self, args: &[&str]) -> Command {
        let mut c = Command::new(env!("CARGO_BIN_EXE_tidemark"));
        c.arg("--config")
            .arg(self.config_path())
            .args(args)
            .current_dir(self.dir.path())
            .env_remove("RUST_LOG")
            .env_remove("TIDEMARK_CONFIG");
        c
    }

    /// Run the real binary with `--config` pointing at this network.
    pub fn tidemark(&self, args: &[&str]) -> Output {
        self.command(args).output().expect("run tidemark")
    }

    /// Run and insist on success; returns stdout.
    pub fn ok(&self, args: &[&str]) -> String {
        let out = self.tidemark(args);
        assert!(
            out.status.success(),
            "tidemark {args:?} failed ({}):\nstdout: {}\nstderr: {}",
            out.status,
            String::from_utf8_lossy(&out.stdout),
            String::from_utf8_lossy(&out.stderr)
        );
        String::from_utf8_lossy(&out.stdout).into_owned()
    }

    /// Rows of a query, read through sqlx.
    pub fn sql(&self, query: &str) -> Vec<Vec<Value>> {
        let rt = tokio::runtime::Builder::new_current_thread()
            .enable_all()
            .build()
            .expect("runtime");
        rt.block_on(async {
            let mut conn = SqliteConnectOptions::new()
                .filename(self.db_path())
                .read_only(true)
                .connect()
                .await
                .expect("open db");
            let rows = sqlx::query(query)
                .fetch_all(&mut conn)
                .await
                .unwrap_or_else(|e| panic!("query {query:?} failed: {e}"));
            rows.iter().map(row_values).collect()
        })
    }

    /// The single value of a one-row, one-column query.
    pub fn scalar(&self, query: &str) -> Value {
        let rows = self.sql(query);
        assert_eq!(rows.len(), 1, "{query}: expected one row, got {rows:?}");
        rows[0][0].clone()
    }

    /// A query's output from the `sqlite3` command-line client (`-batch -noheader`, `|`
    /// separated), exactly as an analyst would see it.
    /// Run `query` with the sqlite3 client and return its output, success or not.
    #[allow(dead_code)]
    pub fn sqlite3_result(&self, query: &str) -> std::process::Output {
        Command::new("sqlite3")
            .arg("-batch")
            .arg(self.db_path())
            .arg(query)
            .output()
            .expect("the sqlite3 client must be installed (scripts/test installs it)")
    }

    pub fn sqlite3(&self, query: &str) -> String {
        let out = Command::new("sqlite3")
            .arg("-batch")
            .arg("-noheader")
            .arg(self.db_path())
            .arg(query)
            .output()
            .expect("the sqlite3 client must be installed (scripts/test installs it)");
        assert!(
            out.status.success(),
            "sqlite3 {query:?} failed: {}",
            String::from_utf8_lossy(&out.stderr)
        );
        String::from_utf8_lossy(&out.stdout).into_owned()
    }
}

fn row_values(row: &SqliteRow) -> Vec<Value> {
    (0..row.columns().len())
        .map(|i| {
            let raw = row.try_get_raw(i).expect("column");
            if raw.is_null() {
                return Value::Null;
            }
            match raw.type_info().name() {
                "INTEGER" | "BOOLEAN" => Value::Int(row.get(i)),
                "REAL" => Value::Real(row.get(i)),
                "BLOB" => Value::Blob(row.get(i)),
                _ => Value::Text(row.get(i)),
            }
        })
        .collect()
}

/// Outcome line of `tidemark ingest` for the file called `name`.
pub fn line_for<'a>(stdout: &'a str, name: &str) -> &'a str {
    stdout
        .lines()
        .find(|l| l.contains(name))
        .unwrap_or_else(|| panic!("no line for {name} in:\n{stdout}"))
}

pub fn assert_exists(p: &Path) {
    assert!(p.exists(), "{} should exist", p.display());
}

/// Start the real binary in the background (`--config` pointing at this network). Its
/// stdout is discarded and its stderr goes to `log` in the network's folder, so a chatty
/// service can never block on a full pipe.
pub fn spawn_logged(net: &Network, args: &[&str], log: &str) -> std::process::Child {
    let err = std::fs::File::create(net.path(log)).expect("log file");
    net.command(args)
        .stdin(std::process::Stdio::null())
        .stdout(std::process::Stdio::null())
        .stderr(err)
        .spawn()
        .expect("spawn tidemark")
}

/// Poll `cond` every 50 ms until it holds or `limit` passes; true when it held.
pub fn wait_until(limit: std::time::Duration, mut cond: impl FnMut() -> bool) -> bool {
    let start = std::time::Instant::now();
    while start.elapsed() < limit {
        if cond() {
            return true;
        }
        std::thread::sleep(std::time::Duration::from_millis(50));
    }
    cond()
}

/// The pid of a process that has exited and been reaped: no process has it now.
pub fn dead_pid() -> u32 {
    let mut child = Command::new("true").spawn().expect("spawn true");
    let pid = child.id();
    child.wait().expect("wait for true");
    pid
}

/// This machine's host name, as tidemark records it in the lease.
pub fn host_name() -> String {
    std::fs::read_to_string("/proc/sys/kernel/hostname")
        .expect("read the host name")
        .trim()
        .to_string()
}

/// Invented test data: a generated network as feed rows (lake, season, visit, temp, chl),
/// the feed of [`CHLOROPHYLL`], from 2001 on.
pub fn network_rows(sites: usize, years: usize) -> Vec<(String, i32, u32, f64, f64)> {
    let spec = tidemark_model::simulate::NetworkSpec {
        sites,
        years,
        missing: 0.1,
        covariates: 1,
        sd_site: 0.5,
        sd_year: 0.3,
        intercept: 1.0,
        coef: 0.05,
        first_year: 2001,
        seed: 17,
        ..Default::default()
    };
    let (rows, _) = tidemark_model::simulate::simulate_rows(&spec);
    let mut visit = std::collections::HashMap::new();
    rows.iter()
        .map(|r| {
            let v = visit.entry((r.site, r.year)).or_insert(0u32);
            *v += 1;
            (
                format!("Lake {:03}", r.site),
                r.year,
                *v,
                r.covariates[0],
                r.y.exp(),
            )
        })
        .collect()
}

pub fn csv(rows: &[(String, i32, u32, f64, f64)]) -> String {
    let mut out = String::from("lake,season,visit,surface_temp_c,chl_ug_l\n");
    for (lake, year, visit, temp, chl) in rows {
        out.push_str(&format!("{lake},{year},{visit},{temp:.3},{chl:.5}\n"));
    }
    out
}

/// Send `sig` to a child process.
pub fn signal(child: &std::process::Child, sig: i32) {
    let pid = libc::pid_t::try_from(child.id()).expect("pid");
    // SAFETY: sending a signal to our own child process.
    assert_eq!(unsafe { libc::kill(pid, sig) }, 0, "kill({pid}, {sig})");
}

/// Wait for `child` to exit, at most `limit`; its exit status and how long it took.
pub fn wait_exit(
    child: &mut std::process::Child,
    limit: std::time::Duration,
) -> (Option<std::process::ExitStatus>, std::time::Duration) {
    let start = std::time::Instant::now();
    while start.elapsed() < limit {
        if let Some(status) = child.try_wait().expect("try_wait") {
            return (Some(status), start.elapsed());
        }
        std::thread::sleep(std::time::Duration::from_millis(20));
    }
    (None, start.elapsed())
}

/// Start the real binary in the background with the test-only pause of the ingest path:
/// `TIDEMARK_TEST_HOLD=hold` (see `service/src/test_hold.rs`). Its stdout goes to
/// `{log}.out` and its stderr to `{log}.err` in the network's folder.
pub fn spawn_held(net: &Network, args: &[&str], hold: &Path, log: &str) -> std::process::Child {
    let out = std::fs::File::create(net.path(&format!("{log}.out"))).expect("log file");
    let err = std::fs::File::create(net.path(&format!("{log}.err"))).expect("log file");
    net.command(args)
        .env("TIDEMARK_TEST_HOLD", hold)
        .stdin(std::process::Stdio::null())
        .stdout(out)
        .stderr(err)
        .spawn()
        .expect("spawn tidemark")
}

/// Wait (at most 60 s) until the held process has reached `step` of `name`.
pub fn wait_for_hold(hold: &Path, name: &str, step: &str) {
    let marker = hold.join(format!("{name}.{step}"));
    assert!(
        wait_until(std::time::Duration::from_secs(60), || marker.exists()),
        "the held process never reached {step} of {name}"
    );
}

/// Let held processes go on past `step` of `name`.
pub fn release_hold(hold: &Path, name: &str, step: &str) {
    std::fs::write(hold.join(format!("{name}.{step}.go")), b"").expect("release the hold");
}

/// Regular files left in the inbox, and files in its claim folders.
pub fn inbox_and_claimed(net: &Network) -> (Vec<String>, Vec<String>) {
    let inbox = net.path("inbox");
    let waiting = net
        .files_in("inbox")
        .into_iter()
        .filter(|n| inbox.join(n).is_file() && !n.starts_with('.'))
        .collect();
    let mut claimed = Vec::new();
    if let Ok(dirs) = std::fs::read_dir(inbox.join(".ingesting")) {
        for d in dirs.flatten().filter(|d| d.path().is_dir()) {
            for f in std::fs::read_dir(d.path()).expect("claim folder").flatten() {
                claimed.push(f.file_name().to_string_lossy().into_owned());
            }
        }
    }
    claimed.sort();
    (waiting, claimed)
}

/// A fixed integer hash of `seed` mapped to a uniform value in [0, 1): reproducible,
/// random-looking values for generated feeds (a splitmix64-style finaliser).
pub fn hash_uniform(seed: u64) -> f64 {
    let mut h = seed.wrapping_mul(0x9E37_79B9_7F4A_7C15);
    h ^= h >> 29;
    h = h.wrapping_mul(0xBF58_476D_1CE4_E5B9);
    h ^= h >> 32;
    (h >> 11) as f64 / (1u64 << 53) as f64
}
