//! Configuration mistakes are reported by the binary with the file, the key and the fix.

mod common;

use std::process::Command;

use common::{Network, CONFIG};

fn stderr_of(net: &Network, args: &[&str]) -> String {
    let out = net.tidemark(args);
    assert!(
        !out.status.success(),
        "tidemark {args:?} accepted a bad config"
    );
    assert_eq!(out.status.code(), Some(1));
    String::from_utf8_lossy(&out.stderr).into_owned()
}

#[test]
fn a_bad_value_names_the_file_and_the_key() {
    let net = Network::with_config(&CONFIG.replace("transform = \"log\"", "transform = \"ln\""));
    let err = stderr_of(&net, &["init"]);
    let file = net.config_path().display().to_string();
    assert_eq!(
        err.trim(),
        format!(
            "tidemark: error: {file}: series[0].transform: must be \"none\" or \"log\", found \"ln\""
        )
    );
    assert!(
        !net.db_path().exists(),
        "nothing is created from a bad config"
    );
}

#[test]
fn an_unknown_key_is_refused_with_its_line() {
    let net = Network::with_config(&CONFIG.replace(
        "timezone = \"UTC\"",
        "timezone = \"UTC\"\ntimezon = \"UTC\"",
    ));
    let err = stderr_of(&net, &["status"]);
    assert!(err.contains("tidemark.toml: schedule"), "{err}");
    assert!(err.contains("unknown field `timezon`"), "{err}");
    assert!(err.contains("(line 13, column 1)"), "{err}");
    assert_eq!(err.trim().lines().count(), 1, "{err}");
}

#[test]
fn second_series_errors_carry_their_index() {
    // The last [[series]] of CONFIG is series[1]; give it a bad prior.
    let bad = format!("{CONFIG}[series.priors]\nsite_sd = {{ half_normal = 0 }}\n");
    let net = Network::with_config(&bad);
    let err = stderr_of(&net, &["init"]);
    assert!(
        err.contains("series[1].priors.site_sd: half_normal scale must be a positive"),
        "{err}"
    );
}

#[test]
fn a_missing_config_names_the_path_once_and_says_how_to_point_at_one() {
    let net = Network::new();
    let out = Command::new(env!("CARGO_BIN_EXE_tidemark"))
        .args(["--config", "nowhere/tidemark.toml", "status"])
        .current_dir(net.dir.path())
        .output()
        .expect("run");
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("no config file at nowhere/tidemark.toml"),
        "{err}"
    );
    assert!(err.contains("--config PATH"), "{err}");
    assert_eq!(err.matches("os error").count(), 0, "{err}");
    assert_eq!(err.lines().count(), 1, "{err}");

    // A config that exists but cannot be read says its cause exactly once.
    let dir = net.path("a-folder.toml");
    std::fs::create_dir_all(&dir).expect("folder");
    let out = Command::new(env!("CARGO_BIN_EXE_tidemark"))
        .arg("--config")
        .arg(&dir)
        .arg("status")
        .output()
        .expect("run");
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("cannot read config file"), "{err}");
    assert_eq!(err.matches("os error").count(), 1, "{err}");
}

#[test]
fn config_comes_from_the_environment_and_paths_from_its_folder() {
    let net = Network::new();
    let elsewhere = tempfile::tempdir().expect("tmp");
    let out = Command::new(env!("CARGO_BIN_EXE_tidemark"))
        .arg("init")
        .env("TIDEMARK_CONFIG", net.config_path())
        .current_dir(elsewhere.path())
        .output()
        .expect("run");
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    // The database and folders are beside the config, not in the working directory.
    common::assert_exists(&net.db_path());
    common::assert_exists(&net.path("inbox"));
    assert!(std::fs::read_dir(elsewhere.path())
        .expect("dir")
        .next()
        .is_none());
}

#[test]
fn usage_errors_exit_2_and_help_works() {
    let net = Network::new();
    let out = net.tidemark(&["no-such-command"]);
    assert_eq!(out.status.code(), Some(2));
    for args in [
        &["--help"][..],
        &["ingest", "--help"],
        &["status", "--help"],
    ] {
        let out = net.tidemark(args);
        assert!(out.status.success());
        assert!(String::from_utf8_lossy(&out.stdout).contains("Usage"));
    }
}

/// Nothing the service needs may sit in the inbox: `ingest` moves every file it finds
/// there (a database inside it would be moved to quarantine with its -wal and -shm).
#[test]
fn a_config_that_puts_the_database_or_other_folders_in_the_inbox_is_refused() {
    let cases: &[(&str, &str, &str)] = &[
        (
            "database = \"tidemark.db\"",
            "database = \"inbox/tidemark.db\"",
            "store.database",
        ),
        ("inbox = \"inbox\"", "inbox = \".\"", "store.database"),
        (
            "archive = \"archive\"",
            "archive = \"inbox\"",
            "feed.archive",
        ),
        (
            "quarantine = \"quarantine\"",
            "quarantine = \"inbox/quarantine\"",
            "feed.quarantine",
        ),
        ("inbox = \"inbox\"", "inbox = \"/etc\"", "feed.inbox"),
        (
            "inbox = \"inbox\"",
            "inbox = \"sub/../inbox/..\"",
            "store.database",
        ),
    ];
    for (from, to, key) in cases {
        assert!(CONFIG.contains(from), "{from}");
        let net = Network::with_config(&CONFIG.replace(from, to));
        let err = stderr_of(&net, &["init"]);
        assert!(
            err.contains(&format!("tidemark.toml: {key}")),
            "{to}: {err}"
        );
        assert!(err.contains("inbox"), "{to}: {err}");
        assert!(
            !net.path("tidemark.db").exists(),
            "{to}: nothing was created"
        );
    }
    // The config file itself in the inbox, with the database elsewhere.
    let net = Network::with_config(
        &CONFIG
            .replace("inbox = \"inbox\"", "inbox = \".\"")
            .replace(
                "database = \"tidemark.db\"",
                "database = \"/nonexistent-dir/x/tidemark.db\"",
            )
            .replace("archive = \"archive\"", "archive = \"/nonexistent-dir/a\"")
            .replace(
                "quarantine = \"quarantine\"",
                "quarantine = \"/nonexistent-dir/q\"",
            ),
    );
    let err = stderr_of(&net, &["status"]);
    assert!(
        err.contains("feed.inbox") && err.contains("the config file"),
        "{err}"
    );
    // The usual layout (inbox, archive, quarantine and database side by side) is fine.
    Network::initialised();
}

/// The systemd units in `deploy/` are valid for systemd itself: `systemd-analyze verify`
/// reports no unknown or misplaced key (a misplaced `StartLimitIntervalSec` is silently
/// ignored by systemd, so the restart rate limit would never apply). Where the tool is
/// missing the test says so and checks nothing else.
#[test]
fn the_systemd_units_pass_systemd_analyze_verify() {
    let deploy = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("../deploy");
    let units = [
        "tidemark.service",
        "tidemark-run-once.service",
        "tidemark-run-once.timer",
    ];
    let out = match Command::new("systemd-analyze")
        .arg("verify")
        .args(units.iter().map(|u| deploy.join(u)))
        .output()
    {
        Ok(out) => out,
        Err(e) => {
            eprintln!("systemd-analyze is not installed here ({e}); unit files not verified");
            return;
        }
    };
    let report =
        String::from_utf8_lossy(&out.stderr).into_owned() + &String::from_utf8_lossy(&out.stdout);
    // The binary is not installed where the units expect it on a build machine.
    let problems: Vec<&str> = report
        .lines()
        .filter(|l| !l.trim().is_empty() && !l.contains("is not executable"))
        .collect();
    assert!(problems.is_empty(), "systemd-analyze verify: {problems:#?}");
}

/// Sampler sizes have upper bounds, checked when the config is read (before any fit).
#[test]
fn sampler_sizes_beyond_their_bounds_are_refused() {
    for (line, key) in [
        ("draws = 4294967295", "sampler.draws"),
        ("chains = 100000", "sampler.chains"),
        ("warmup = 10000000", "sampler.warmup"),
    ] {
        let net = Network::with_config(&format!("{CONFIG}\n[series.sampler]\n{line}\n"));
        let err = stderr_of(&net, &["init"]);
        assert!(
            err.contains(key) && err.contains("must be at most"),
            "{line}: {err}"
        );
    }
}

/// Sizes within the bounds can still ask for more memory than a host has (64 chains of a
/// million draws): the fit is estimated before anything is allocated and refused with the
/// figure, recorded as a failed attempt, and the run ends instead of growing without bound.
/// The limit is `sampler.max_memory_mib`; a fit that needs less than it runs as usual.
#[test]
fn a_fit_too_big_for_its_memory_limit_is_refused_with_the_figure() {
    let huge = common::Sampler {
        chains: 64,
        draws: 1_000_000,
        warmup: 1_000_000,
        min_ess: 400,
        ..Default::default()
    };
    let config = common::ConfigBuilder::new()
        .series(common::CHLOROPHYLL)
        .sampler(huge)
        .build();
    let net = Network::with_config(&config);
    net.ok(&["init"]);
    net.drop_file("a.csv", common::csv(&common::network_rows(12, 6)));
    let mut child = net
        .command(&["run-once"])
        .stdout(std::process::Stdio::piped())
        .stderr(std::process::Stdio::piped())
        .spawn()
        .expect("start run-once");
    let finished = common::wait_until(std::time::Duration::from_secs(60), || {
        child.try_wait().ok().flatten().is_some()
    });
    if !finished {
        let _ = child.kill();
        panic!("run-once was still running after 60 s: the fit was not refused up front");
    }
    let out = child.wait_with_output().expect("run-once output");
    assert_eq!(out.status.code(), Some(1), "a refused fit fails the run");
    let rows = net.sql("SELECT status, message FROM fits");
    assert_eq!(rows.len(), 1, "{rows:?}");
    assert_eq!(rows[0][0], common::Value::Text("failed".into()));
    let message = rows[0][1].text();
    for part in [
        "no fit attempt run: even the cold start would need an estimated",
        "MiB (64 chains x 1000000 draws, 1000000 warm-up, ",
        "above sampler.max_memory_mib = 4096; lower chains, draws or warmup, or raise the limit",
    ] {
        assert!(message.contains(part), "{part:?} missing from {message}");
    }
    let need: u64 = message
        .split("estimated ")
        .nth(1)
        .and_then(|m| m.split(' ').next())
        .and_then(|n| n.parse().ok())
        .expect("a figure in MiB");
    // 64 chains x 1e6 draws x (3 standard deviations + 2 coefficients) x 8 bytes, saved
    // once by the chains and once in the posterior, is already 4883 MiB.
    assert!(need >= 4883, "{need} MiB is below the draws alone");
    assert_eq!(
        net.scalar("SELECT status FROM runs ORDER BY run_id DESC LIMIT 1"),
        common::Value::Text("partial".into())
    );

    // Raising the limit is the way through for a host that has the memory; a small
    // sampler is far under the default and runs.
    let small = config.replace(
        "chains = 64\ndraws = 1000000\nwarmup = 1000000",
        "chains = 2\ndraws = 300\nwarmup = 200",
    );
    std::fs::write(net.config_path(), small).expect("write config");
    let out = net.tidemark(&["refit", "--series", "chlorophyll", "--force"]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    assert_eq!(
        net.scalar("SELECT COUNT(*) FROM fits WHERE status = 'published'"),
        common::Value::Int(1)
    );
}

#[test]
fn the_memory_limit_has_bounds() {
    for (line, found) in [
        ("max_memory_mib = 0", "found 0"),
        ("max_memory_mib = 99999999", "found 99999999"),
    ] {
        let net = Network::with_config(&format!("{CONFIG}\n[series.sampler]\n{line}\n"));
        let err = stderr_of(&net, &["init"]);
        assert!(
            err.contains("series[1].sampler.max_memory_mib: must be between 16 and 1048576 MiB")
                && err.contains(found),
            "{line}: {err}"
        );
    }
}

/// A cron field out of its range is refused in the field's own terms (the cron crate's own
/// message for this case said "Minutes must be less than 59").
#[test]
fn a_cron_field_out_of_range_names_the_field_and_its_range() {
    for (cron, says) in [
        ("61 * * * *", "minute 61 is out of range 0-59"),
        ("0 2 * 13 *", "month 13 is out of range 1-12"),
    ] {
        let net = Network::with_config(&CONFIG.replace("30 2 * * *", cron));
        let err = stderr_of(&net, &["init"]);
        assert!(
            err.contains("schedule.cron") && err.contains(says),
            "{cron}: {err}"
        );
        assert!(!err.contains("less than 59"), "{err}");
    }
}

#[test]
fn a_cron_that_can_never_fire_is_refused_before_serve_starts() {
    let net = Network::with_config(&CONFIG.replace("30 2 * * *", "0 0 30 2 *"));
    for command in ["serve", "init", "run-once"] {
        let out = net.tidemark(&[command]);
        assert_eq!(out.status.code(), Some(1), "{command}");
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(
            err.contains("schedule.cron") && err.contains("never fires"),
            "{command}: {err}"
        );
    }
    // Nothing started: no database, so no lease was taken and no run recorded.
    assert!(!net.db_path().exists());
}

/// The next tick by the rules of POSIX `crontab`, found by walking the hours from `now`:
/// when both day fields are restricted a day matches either; a field beginning with `*`
/// is unrestricted. Independent of the service's parser.
fn next_posix_tick(
    now: chrono::DateTime<chrono::Utc>,
    day_matches: impl Fn(chrono::DateTime<chrono::Utc>) -> bool,
) -> chrono::DateTime<chrono::Utc> {
    use chrono::{DurationRound, Timelike};
    let mut t = now.duration_trunc(chrono::TimeDelta::hours(1)).unwrap();
    loop {
        t += chrono::TimeDelta::hours(1);
        if t.hour() == 2 && day_matches(t) {
            return t;
        }
    }
}

#[test]
fn status_shows_the_next_tick_by_standard_cron_day_rules() {
    use chrono::{Datelike, Weekday};
    type DayRule = fn(chrono::DateTime<chrono::Utc>) -> bool;
    let cases: [(&str, DayRule); 3] = [
        // Both restricted: the 1st OR a Monday.
        ("0 2 1 * 1", |t| t.day() == 1 || t.weekday() == Weekday::Mon),
        // Day-of-week begins with `*`: the 15th, whatever the weekday.
        ("0 2 15 * */2", |t| t.day() == 15),
        // Day-of-month unrestricted: Mondays only.
        ("0 2 * * 1", |t| t.weekday() == Weekday::Mon),
    ];
    for (cron, rule) in cases {
        let net = Network::with_config(&CONFIG.replace("30 2 * * *", cron));
        net.ok(&["init"]);
        let before = chrono::Utc::now();
        let out = net.ok(&["status"]);
        let after = chrono::Utc::now();
        let shown = out
            .split("next tick ")
            .nth(1)
            .and_then(|rest| rest.split_whitespace().next())
            .and_then(|t| chrono::DateTime::parse_from_rfc3339(t).ok())
            .unwrap_or_else(|| panic!("{cron}: no next tick in {out}"))
            .with_timezone(&chrono::Utc);
        // `status` read the clock between `before` and `after`.
        let expected = [next_posix_tick(before, rule), next_posix_tick(after, rule)];
        assert!(
            expected.contains(&shown),
            "{cron}: status says {shown}, POSIX cron says {expected:?}"
        );
    }
}

/// Runs `tidemark args…` and returns its exit code and its peak resident set size in
/// bytes, as the kernel accounts it for that one child (`wait4`).
#[allow(
    clippy::zombie_processes,
    reason = "the child is reaped by wait4, which std does not know about"
)]
fn peak_rss_of(net: &Network, args: &[&str]) -> (Option<i32>, u64) {
    let child = net
        .command(args)
        .stdout(std::process::Stdio::null())
        .stderr(std::process::Stdio::null())
        .spawn()
        .expect("start tidemark");
    let mut status = 0;
    // SAFETY: `rusage` is plain data the kernel fills in; the pid is our own child, reaped
    // here exactly once.
    let mut usage: libc::rusage = unsafe { std::mem::zeroed() };
    let pid = unsafe { libc::wait4(child.id() as libc::pid_t, &mut status, 0, &mut usage) };
    assert_eq!(pid, child.id() as libc::pid_t, "wait4 failed");
    let code = libc::WIFEXITED(status).then(|| libc::WEXITSTATUS(status));
    // Linux reports `ru_maxrss` in KiB.
    (code, usage.ru_maxrss as u64 * 1024)
}

/// A lake network with ten covariates: enough coefficients that publishing the draws file,
/// not summarising the draws, makes the peak. Deterministic, so the figures repeat.
fn wide_network_csv() -> String {
    let mut out = String::from("lake,season,visit,chl");
    for k in 0..10 {
        out.push_str(&format!(",x{k}"));
    }
    out.push('\n');
    for s in 0..12u32 {
        for t in 0..6u32 {
            // A fixed integer hash per cell: values that look random and are not collinear.
            let xs: Vec<f64> = (0..10u64)
                .map(|k| {
                    common::hash_uniform((u64::from(s) << 40) ^ (u64::from(t) << 20) ^ k) - 0.5
                })
                .collect();
            let y = 1.0
                + 0.1 * f64::from(s % 4)
                + 0.2 * f64::from(t % 3)
                + 0.05 * xs.iter().sum::<f64>()
                + 0.2 * (f64::from(s * 13 + t)).cos();
            out.push_str(&format!("Lake {s},{},1,{y:.5}", 2001 + t));
            for x in xs {
                out.push_str(&format!(",{x:.5}"));
            }
            out.push('\n');
        }
    }
    out
}

/// The estimate a refused fit states, then the measured peak of the same fit with room to
/// run: the estimate covers it and is not far above it. One case where summarising the
/// draws makes the peak, one where publishing them does.
#[test]
fn the_memory_estimate_covers_the_measured_peak_of_a_refit() {
    let wide = format!(
        "name = \"wide\"\nresponse = \"chl\"\nsite = \"lake\"\nyear = \"season\"\nvisit = \"visit\"\n\
         covariates = [{}]\n",
        (0..10).map(|k| format!("\"x{k}\"")).collect::<Vec<_>>().join(", ")
    );
    // Many sites forecast 50 years ahead under 8 scenarios with 16 thresholds: the
    // forecast rows, not the draws, make the peak.
    let scenarios: String = (1..=8)
        .map(|k| {
            format!(
                "\n[[series.scenarios]]\nname = \"s{k}\"\nshift = {{ surface_temp_c = {k}.0 }}\n"
            )
        })
        .collect();
    let thresholds: Vec<String> = (1..=16).map(|k| format!("{k}.0")).collect();
    let far = format!(
        "{}horizon = 50\nthresholds = [{}]\n{scenarios}",
        common::CHLOROPHYLL,
        thresholds.join(", ")
    );
    let cases = [
        (
            common::CHLOROPHYLL.to_string(),
            common::csv(&common::network_rows(12, 6)),
            150_000,
        ),
        (wide, wide_network_csv(), 100_000),
        (far, common::csv(&common::network_rows(1500, 3)), 400),
    ];
    for (series, feed, draws) in cases {
        // Enough draws that they, not the process itself, make most of the peak.
        let sampler = common::Sampler {
            chains: 2,
            draws,
            warmup: 300,
            min_ess: 100,
            ..Default::default()
        };
        let config = common::ConfigBuilder::new()
            .series(&series)
            .sampler(sampler)
            .build();
        let net = Network::with_config(
            &config.replace("min_ess = 100\n", "min_ess = 100\nmax_memory_mib = 16\n"),
        );
        net.ok(&["init"]);
        net.drop_file("a.csv", feed);
        // The lowest limit refuses the fit and says the estimate.
        let (code, _) = peak_rss_of(&net, &["run-once"]);
        assert_eq!(code, Some(1));
        let message = net.scalar("SELECT message FROM fits").text().to_string();
        let estimate_mib: u64 = message
            .split("estimated ")
            .nth(1)
            .and_then(|m| m.split(' ').next())
            .and_then(|n| n.parse().ok())
            .unwrap_or_else(|| panic!("a figure in MiB in {message}"));
        // With room to run, the same fit's measured peak stays under that estimate.
        std::fs::write(net.config_path(), &config).expect("write config");
        let (code, peak) = peak_rss_of(&net, &["refit", "--force", "--cold"]);
        assert_eq!(code, Some(0), "the refit with the default limit runs");
        assert_eq!(
            net.scalar("SELECT COUNT(*) FROM fits WHERE status = 'published'"),
            common::Value::Int(1)
        );
        let peak_mib = peak.div_ceil(1 << 20);
        assert!(
            estimate_mib >= peak_mib,
            "{message}: estimate {estimate_mib} MiB below the measured peak {peak_mib} MiB"
        );
        assert!(
            estimate_mib <= 2 * peak_mib,
            "{message}: estimate {estimate_mib} MiB more than twice the measured peak {peak_mib} MiB"
        );
    }
}
