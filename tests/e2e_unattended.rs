//! End-to-end: unattended operation through the real binary — `serve` on a schedule, the
//! single-instance lease, shutdown on SIGTERM, the catch-up run, and SIGKILL at random
//! moments of `run-once` (a loop of trials; `TIDEMARK_KILL_TRIALS` sets how many).

mod common;

use std::collections::BTreeSet;
use std::time::{Duration, Instant};

use common::{
    csv, dead_pid, host_name, network_rows, signal, spawn_logged, wait_exit, wait_until,
    ConfigBuilder, Network, Sampler, CHLOROPHYLL,
};
use rand::{Rng, SeedableRng};

/// One series; a small sampler and an easy gate, so every completed run publishes.
fn config(cron: &str, extra_schedule: &str, draws: u32) -> String {
    ConfigBuilder::new()
        .schedule(cron, "Europe/Helsinki", extra_schedule)
        .series(CHLOROPHYLL)
        .sampler(Sampler {
            draws,
            max_rhat: 1.2,
            min_ess: 50,
            ..Default::default()
        })
        .build()
}

fn count(net: &Network, sql: &str) -> i64 {
    net.scalar(sql).int()
}

fn lease_pid(net: &Network) -> Option<i64> {
    net.sql("SELECT pid FROM instance_lease")
        .first()
        .map(|r| r[0].int())
}

fn log(net: &Network, name: &str) -> String {
    std::fs::read_to_string(net.path(name)).unwrap_or_default()
}

/// Every published version is whole, no key has two current values, versions count
/// 1, 2, 3… without gaps, and each file's content was ingested at most once.
fn assert_consistent(net: &Network, context: &str) {
    let incomplete = net.sql(
        "SELECT f.fit_id FROM fits f WHERE f.status = 'published' AND (
             NOT EXISTS (SELECT 1 FROM posterior_summary p WHERE p.fit_id = f.fit_id AND p.kind = 'sd')
          OR NOT EXISTS (SELECT 1 FROM posterior_summary p WHERE p.fit_id = f.fit_id AND p.kind = 'effect')
          OR NOT EXISTS (SELECT 1 FROM fit_draws d WHERE d.fit_id = f.fit_id)
          OR NOT EXISTS (SELECT 1 FROM forecasts c WHERE c.fit_id = f.fit_id))",
    );
    assert!(
        incomplete.is_empty(),
        "{context}: published fits without summaries, draws or forecasts: {incomplete:?}"
    );
    assert_eq!(
        count(
            net,
            "SELECT COUNT(*) FROM (SELECT 1 FROM observations WHERE superseded_by IS NULL
             GROUP BY site_id, year, visit, column_name HAVING COUNT(*) > 1)"
        ),
        0,
        "{context}: a key with two current values"
    );
    assert_eq!(
        count(
            net,
            "SELECT COUNT(*) - COALESCE(MAX(version), 0) FROM fits WHERE status = 'published'"
        ),
        0,
        "{context}: published versions have a gap or a repeat"
    );
    assert_eq!(
        count(
            net,
            "SELECT COUNT(*) FROM (SELECT sha256 FROM ingest_batches WHERE status = 'ingested'
             GROUP BY sha256 HAVING COUNT(*) > 1)"
        ),
        0,
        "{context}: a file ingested twice"
    );
}

#[test]
fn serve_publishes_on_schedule_refuses_a_second_instance_and_stops_on_sigterm() {
    let net = Network::with_config(&config("*/2 * * * * *", "", 300));
    net.ok(&["init"]);
    let mut serve = spawn_logged(&net, &["serve"], "serve.log");
    let pid = i64::from(serve.id());
    assert!(
        wait_until(Duration::from_secs(10), || lease_pid(&net) == Some(pid)),
        "serve did not take the lease: {}",
        log(&net, "serve.log")
    );

    // A second instance refuses, naming the holder.
    for args in [&["run-once"][..], &["refit"][..], &["serve"][..]] {
        let out = net.tidemark(args);
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(!out.status.success(), "{args:?} ran beside serve");
        assert!(
            err.contains(&format!(
                "in use by another tidemark: pid {pid} on host {}",
                host_name()
            )),
            "{args:?}: {err}"
        );
        assert_eq!(err.lines().count(), 1, "one line: {err}");
    }
    let status: serde_json::Value =
        serde_json::from_str(&net.ok(&["status", "--json"])).expect("status json");
    assert_eq!(status["lease"]["pid"], pid);
    assert_eq!(status["lease"]["command"], "serve");
    assert!(status["lease"]["stale"].is_null());
    let text = net.ok(&["status"]);
    assert!(
        text.contains(&format!("lease      held by `serve`, pid {pid}")),
        "{text}"
    );
    assert!(status["schedule"]["next_run_local"]
        .as_str()
        .is_some_and(|t| t.ends_with("+02:00") || t.ends_with("+03:00")));

    // A file dropped into the inbox is published by a scheduled run.
    net.drop_file("2001-2008.csv", csv(&network_rows(20, 8)));
    assert!(
        wait_until(Duration::from_secs(40), || count(
            &net,
            "SELECT COUNT(*) FROM fits WHERE status = 'published'"
        ) == 1),
        "no version published: {}",
        log(&net, "serve.log")
    );
    assert_eq!(net.files_in("inbox"), Vec::<String>::new());
    assert_eq!(
        count(
            &net,
            "SELECT COUNT(*) FROM runs r JOIN fits f ON f.run_id = r.run_id
             WHERE r.trigger = 'schedule' AND f.status = 'published'"
        ),
        1
    );
    // Later ticks find nothing new.
    let runs = count(&net, "SELECT COUNT(*) FROM runs WHERE status = 'succeeded'");
    assert!(wait_until(Duration::from_secs(10), || count(
        &net,
        "SELECT COUNT(*) FROM runs WHERE status = 'succeeded'"
    ) > runs));
    assert_eq!(
        count(&net, "SELECT COUNT(*) FROM fits"),
        1,
        "an unchanged series was refitted: {} {} {}",
        net.sqlite3("SELECT fit_id, run_id, series, version, status, message, watermark, created_at FROM fits"),
        net.sqlite3("SELECT * FROM runs"),
        net.sqlite3("SELECT * FROM ingest_batches")
    );

    signal(&serve, libc::SIGTERM);
    let (exit, took) = wait_exit(&mut serve, Duration::from_secs(10));
    eprintln!("serve stopped {:.2} s after SIGTERM", took.as_secs_f64());
    let exit = exit.unwrap_or_else(|| {
        let _ = serve.kill();
        panic!("serve still running 10 s after SIGTERM")
    });
    assert!(
        exit.success(),
        "serve exited {exit}: {}",
        log(&net, "serve.log")
    );
    assert_eq!(lease_pid(&net), None, "the lease was not released");
    assert_eq!(
        count(&net, "SELECT COUNT(*) FROM runs WHERE status = 'running'"),
        0
    );
    let released = net.sqlite3(&format!(
        "SELECT event FROM lease_events WHERE pid = {pid} ORDER BY event_id"
    ));
    assert_eq!(released, "acquired\nreleased\n");
    // Quiet: no progress bars, only log records, one JSON object per line.
    let text = log(&net, "serve.log");
    assert!(text.lines().all(|l| l.starts_with('{')), "{text}");
    assert!(text.contains("SIGTERM: taking no new work"), "{text}");
}

#[test]
fn sigterm_cancels_a_long_fit_abandons_its_run_and_ticks_meanwhile_are_skipped() {
    // Enough draws that the fit outlasts several ticks.
    let net = Network::with_config(&config("*/2 * * * * *", "", 400_000));
    net.ok(&["init"]);
    net.drop_file("2001-2008.csv", csv(&network_rows(20, 8)));
    let mut serve = spawn_logged(&net, &["serve"], "serve.log");
    assert!(
        wait_until(Duration::from_secs(20), || count(
            &net,
            "SELECT COUNT(*) FROM runs WHERE status = 'skipped'"
        ) >= 1),
        "no skipped tick: {}",
        log(&net, "serve.log")
    );
    let skipped = net.sqlite3("SELECT trigger, message FROM runs WHERE status = 'skipped' LIMIT 1");
    assert!(
        skipped.starts_with("schedule|tick of ") && skipped.contains("was still going"),
        "{skipped}"
    );
    // The fit is under way (the file was ingested, nothing is recorded yet).
    assert_eq!(net.files_in("inbox"), Vec::<String>::new());
    assert_eq!(count(&net, "SELECT COUNT(*) FROM fits"), 0);

    signal(&serve, libc::SIGTERM);
    let (exit, took) = wait_exit(&mut serve, Duration::from_secs(10));
    eprintln!(
        "serve stopped {:.2} s after SIGTERM during a fit",
        took.as_secs_f64()
    );
    let exit = exit.unwrap_or_else(|| {
        let _ = serve.kill();
        panic!("serve still running 10 s after SIGTERM")
    });
    assert!(
        exit.success(),
        "serve exited {exit}: {}",
        log(&net, "serve.log")
    );
    let run = net.sqlite3(
        "SELECT status, message FROM runs WHERE status NOT IN ('skipped') ORDER BY run_id",
    );
    assert!(
        run.starts_with("abandoned|abandoned: stopped at a safe point by a shutdown request"),
        "{run}"
    );
    assert_eq!(
        count(&net, "SELECT COUNT(*) FROM fits"),
        0,
        "half a fit was recorded"
    );
    assert_eq!(lease_pid(&net), None);
    // The data stay; the next run fits them (with a quick sampler).
    std::fs::write(net.config_path(), config("*/2 * * * * *", "", 300)).expect("config");
    net.ok(&["run-once"]);
    assert_consistent(&net, "after the abandoned run");
    let status = net.ok(&["status"]);
    assert!(!status.starts_with("ATTENTION"), "{status}");
}

#[test]
fn a_missed_tick_gets_one_catch_up_run_at_start() {
    let net = Network::with_config(&config("0 * * * *", "", 300));
    net.ok(&["init"]);
    net.drop_file("2001-2006.csv", csv(&network_rows(12, 6)));
    net.ok(&["run-once"]);
    // The last run was three hours ago: the hourly tick since then was missed.
    net.sqlite3("UPDATE runs SET started_at = strftime('%Y-%m-%dT%H:%M:%SZ', 'now', '-3 hours')");
    let mut serve = spawn_logged(&net, &["serve"], "serve.log");
    assert!(
        wait_until(Duration::from_secs(20), || count(
            &net,
            "SELECT COUNT(*) FROM runs WHERE trigger = 'catch-up' AND status = 'succeeded'"
        ) == 1),
        "no catch-up run: {}",
        log(&net, "serve.log")
    );
    signal(&serve, libc::SIGTERM);
    let (exit, _) = wait_exit(&mut serve, Duration::from_secs(10));
    assert!(exit.is_some_and(|e| e.success()));

    // Started again right away, nothing was missed: no second catch-up.
    let mut serve = spawn_logged(&net, &["serve"], "serve2.log");
    let pid = i64::from(serve.id());
    assert!(wait_until(Duration::from_secs(10), || lease_pid(&net) == Some(pid)));
    std::thread::sleep(Duration::from_millis(500));
    signal(&serve, libc::SIGTERM);
    let (exit, _) = wait_exit(&mut serve, Duration::from_secs(10));
    assert!(exit.is_some_and(|e| e.success()));
    assert_eq!(
        count(&net, "SELECT COUNT(*) FROM runs WHERE trigger = 'catch-up'"),
        1
    );

    // With catch_up = false a missed tick waits for the next one.
    std::fs::write(
        net.config_path(),
        config("0 * * * *", "catch_up = false", 300),
    )
    .expect("config");
    net.sqlite3("UPDATE runs SET started_at = strftime('%Y-%m-%dT%H:%M:%SZ', 'now', '-3 hours')");
    let mut serve = spawn_logged(&net, &["serve"], "serve3.log");
    let pid = i64::from(serve.id());
    assert!(wait_until(Duration::from_secs(10), || lease_pid(&net) == Some(pid)));
    std::thread::sleep(Duration::from_millis(500));
    signal(&serve, libc::SIGTERM);
    let (exit, _) = wait_exit(&mut serve, Duration::from_secs(10));
    assert!(exit.is_some_and(|e| e.success()));
    assert_eq!(
        count(&net, "SELECT COUNT(*) FROM runs WHERE trigger = 'catch-up'"),
        1
    );
    let status = net.ok(&["status"]);
    assert!(status.contains(", no catch-up after downtime"), "{status}");
}

#[test]
fn a_stale_lease_is_taken_over_and_recorded() {
    let net = Network::with_config(&config("30 2 * * *", "", 300));
    net.ok(&["init"]);
    let host = host_name();
    let dead = dead_pid();
    // A holder that died mid-run on this host, leaving its run 'running'.
    net.sqlite3(&format!(
        "INSERT INTO instance_lease (lease_id, holder, pid, host, acquired_at, heartbeat_at) VALUES (1, 'deadbeef', {dead}, '{host}', '2026-01-01T00:00:00Z', strftime('%Y-%m-%dT%H:%M:%SZ', 'now'));
         INSERT INTO runs (trigger, started_at, status) VALUES ('schedule', '2026-01-01T00:00:00Z', 'running');"
    ));
    let status = net.ok(&["status"]);
    assert!(status.starts_with("ATTENTION\n"), "{status}");
    assert!(status.contains("lease: STALE"), "{status}");

    net.drop_file("2001-2006.csv", csv(&network_rows(12, 6)));
    let out = net.tidemark(&["run-once"]);
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("took over a stale lease"), "{err}");
    let event = net.sqlite3(
        "SELECT previous_holder, previous_pid, reason FROM lease_events WHERE event = 'taken_over'",
    );
    assert_eq!(
        event,
        format!("deadbeef|{dead}|process {dead} on {host} is not running\n")
    );
    let abandoned = net.sqlite3("SELECT status, message FROM runs WHERE run_id = 1");
    assert!(
        abandoned.starts_with("abandoned|abandoned: its process stopped before the run finished (lease holder deadbeef"),
        "{abandoned}"
    );
    assert_eq!(lease_pid(&net), None);

    // A holder on another host is judged by its heartbeat alone.
    net.sqlite3(
        "INSERT INTO instance_lease (lease_id, holder, pid, host, acquired_at, heartbeat_at) VALUES (1, 'faraway', 1, 'other-host', '2026-01-01T00:00:00Z', strftime('%Y-%m-%dT%H:%M:%SZ', 'now'))",
    );
    let out = net.tidemark(&["refit"]);
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(!out.status.success());
    assert!(
        err.contains("pid 1 on host other-host (holder faraway"),
        "{err}"
    );
    net.sqlite3(
        "UPDATE instance_lease SET heartbeat_at = strftime('%Y-%m-%dT%H:%M:%SZ', 'now', '-2 minutes')",
    );
    net.ok(&["refit"]);
    let reason = net.sqlite3("SELECT reason FROM lease_events WHERE previous_holder = 'faraway'");
    assert!(reason.contains("s ago (stale after 60 s)"), "{reason}");
}

#[test]
fn a_rejected_fit_is_shown_first_by_status() {
    let net = Network::with_config(&config("30 2 * * *", "", 300));
    net.ok(&["init"]);
    net.drop_file("2001-2006.csv", csv(&network_rows(12, 6)));
    net.ok(&["run-once"]);
    // An impossible gate: every attempt is rejected, run-once says so with its exit code.
    let strict = config("30 2 * * *", "", 300).replace("max_rhat = 1.2", "max_rhat = 1.0000001");
    std::fs::write(net.config_path(), strict).expect("config");
    let out = net.tidemark(&["refit", "--force"]);
    assert!(!out.status.success());
    // The gate's fallbacks, in order: warm start, cold start, one extended attempt with
    // twice the draws; the last is what is recorded.
    let rejected =
        net.sql("SELECT status, draws, warm_start_from, message FROM fits WHERE fit_id = 2");
    assert_eq!(rejected[0][0].text(), "rejected");
    assert_eq!(rejected[0][1].int(), 600);
    assert!(rejected[0][2].is_null());
    let message = rejected[0][3].text();
    let order: Vec<usize> = [
        "warm start failed",
        "; cold start failed",
        "extended cold start failed",
    ]
    .iter()
    .map(|m| {
        message
            .find(m)
            .unwrap_or_else(|| panic!("{m:?} not in {message}"))
    })
    .collect();
    assert!(order.windows(2).all(|w| w[0] < w[1]), "{message}");
    let text = net.ok(&["status"]);
    assert!(
        text.starts_with("ATTENTION\n  chlorophyll: latest fit attempt REJECTED (fit 2)"),
        "{text}"
    );
    assert!(text.contains("version 1 (fit 1) keeps serving"), "{text}");
    let s: serde_json::Value = serde_json::from_str(&net.ok(&["status", "--json"])).expect("json");
    assert_eq!(s["attention"][0]["kind"], "fit");
    assert_eq!(s["attention"][0]["status"], "rejected");
    assert_eq!(s["attention"][0]["fit_id"], 2);
    assert!(s["lease"].is_null());
}

/// How many kill trials: `TIDEMARK_KILL_TRIALS` (default 10).
fn kill_trials() -> usize {
    std::env::var("TIDEMARK_KILL_TRIALS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(10)
}

#[test]
fn sigkill_at_random_moments_of_run_once_loses_nothing_and_half_writes_nothing() {
    // Enough draws that a fit takes a few hundred milliseconds: most kills land in it.
    let net = Network::with_config(&config("30 2 * * *", "", 6000));
    net.ok(&["init"]);
    let rows = network_rows(150, 12);
    let years: Vec<i32> = rows
        .iter()
        .map(|r| r.1)
        .collect::<BTreeSet<_>>()
        .into_iter()
        .collect();
    // The first seasons, fitted once to learn how long a run takes on this machine.
    let first: Vec<_> = rows.iter().filter(|r| r.1 < years[4]).cloned().collect();
    net.drop_file("000-first.csv", csv(&first));
    let start = Instant::now();
    net.ok(&["run-once"]);
    let run_time = start.elapsed();
    let trials = kill_trials();
    let seed: u64 = std::env::var("TIDEMARK_KILL_SEED")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(2026);
    eprintln!(
        "a run takes {:.2} s; {trials} kill trials, seed {seed}",
        run_time.as_secs_f64()
    );
    let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
    let mut keys: BTreeSet<(String, i32, u32)> =
        first.iter().map(|r| (r.0.clone(), r.1, r.2)).collect();
    let mut killed_holding_lease = 0;
    for trial in 0..trials {
        // New data each time so the run refits: the next season while there is one, then
        // corrections to a random tenth of the values.
        let file: Vec<_> = match years.get(4 + trial) {
            Some(&y) => rows.iter().filter(|r| r.1 == y).cloned().collect(),
            None => rows
                .iter()
                .filter(|r| r.1 < years[4])
                .filter_map(|r| {
                    let u: f64 = rng.gen();
                    (u < 0.1).then(|| (r.0.clone(), r.1, r.2, r.3, r.4 * (1.0 + u)))
                })
                .collect(),
        };
        keys.extend(file.iter().map(|r| (r.0.clone(), r.1, r.2)));
        net.drop_file(&format!("{:03}-trial.csv", trial + 1), csv(&file));
        let mut child = spawn_logged(&net, &["run-once"], "run-once.log");
        let pid = i64::from(child.id());
        let at = run_time.mul_f64(rng.gen::<f64>() * 2.0);
        std::thread::sleep(at);
        let _ = child.kill(); // SIGKILL
        let status = child.wait().expect("wait");
        if lease_pid(&net) == Some(pid) {
            killed_holding_lease += 1;
        }
        eprintln!(
            "trial {trial}: SIGKILL after {:.0} ms ({})",
            at.as_secs_f64() * 1000.0,
            if status.success() {
                "had finished"
            } else {
                "killed"
            }
        );
        assert_consistent(&net, &format!("trial {trial}"));
    }
    // The next run takes over the stale lease, ingests whatever is left, and completes.
    let before = count(
        &net,
        "SELECT COUNT(*) FROM lease_events WHERE event = 'taken_over'",
    );
    let holder = lease_pid(&net);
    net.ok(&["run-once"]);
    if holder.is_some() {
        assert_eq!(
            count(
                &net,
                "SELECT COUNT(*) FROM lease_events WHERE event = 'taken_over'"
            ),
            before + 1
        );
    }
    assert_eq!(lease_pid(&net), None);
    assert_eq!(net.files_in("inbox"), Vec::<String>::new());
    assert_consistent(&net, "after the final run");
    // Every key sent is stored once: as many current values per column as distinct keys.
    for column in ["chl_ug_l", "surface_temp_c"] {
        assert_eq!(
            count(
                &net,
                &format!(
                    "SELECT COUNT(*) FROM current_observations WHERE column_name = '{column}'"
                )
            ),
            keys.len() as i64,
            "{column}"
        );
    }
    assert_eq!(
        count(&net, "SELECT COUNT(*) FROM runs WHERE status = 'running'"),
        0
    );
    // The latest version covers every season that was sent.
    assert_eq!(
        count(&net, "SELECT data_through_year FROM latest_fits"),
        i64::from(years[(3 + trials).min(years.len() - 1)])
    );
    eprintln!(
        "{trials} trials: {killed_holding_lease} killed while holding the lease; {} takeovers recorded",
        count(&net, "SELECT COUNT(*) FROM lease_events WHERE event = 'taken_over'")
    );
}

/// SIGKILL of `serve` at random moments (idle, ingesting, fitting or publishing): the
/// same invariants hold, and a later `run-once` takes over the dead holder's lease and
/// completes. `TIDEMARK_SERVE_KILL_TRIALS` (default 3) sets the number of trials.
#[test]
fn sigkill_at_random_moments_of_serve_loses_nothing_and_half_writes_nothing() {
    let net = Network::with_config(&config("*/2 * * * * *", "catch_up = false", 6000));
    net.ok(&["init"]);
    let rows = network_rows(150, 12);
    let years: Vec<i32> = rows
        .iter()
        .map(|r| r.1)
        .collect::<BTreeSet<_>>()
        .into_iter()
        .collect();
    let trials: usize = std::env::var("TIDEMARK_SERVE_KILL_TRIALS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(3);
    let mut rng = rand::rngs::StdRng::seed_from_u64(77);
    for trial in 0..trials {
        let season: Vec<_> = rows
            .iter()
            .filter(|r| r.1 == years[trial % years.len()])
            .cloned()
            .collect();
        net.drop_file(&format!("{:03}-serve.csv", trial), csv(&season));
        let mut child = spawn_logged(&net, &["serve"], "serve.log");
        // Ticks come every 2 s; a kill within 0.5–4.5 s lands before, during or after a run.
        let at = Duration::from_millis(500 + rng.gen_range(0..4000));
        std::thread::sleep(at);
        let _ = child.kill();
        let _ = child.wait();
        eprintln!("serve trial {trial}: SIGKILL after {} ms", at.as_millis());
        assert_consistent(&net, &format!("serve trial {trial}"));
    }
    net.ok(&["run-once"]);
    assert_eq!(lease_pid(&net), None);
    assert_eq!(net.files_in("inbox"), Vec::<String>::new());
    assert_consistent(&net, "after serve trials and a final run");
    assert!(count(&net, "SELECT COUNT(*) FROM fits WHERE status = 'published'") >= 1);
}
