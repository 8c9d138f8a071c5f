//! End-to-end: fenced publishing. A `run-once` stopped (SIGSTOP) after its gate passed,
//! whose lease another `run-once` took over, publishes nothing when it resumes, leaves
//! its abandoned run as the takeover left it, and exits 1. Through the store's own API:
//! a fit is written only under the current lease generation, generations only grow, and
//! a snapshot older than a version published under the same model definition is refused
//! unless the definition changed or the refit was forced.

mod common;

use std::time::Duration;

use common::{
    csv, network_rows, release_hold, signal, spawn_held, wait_exit, wait_for_hold, ConfigBuilder,
    Network, Sampler,
};
use common::{Value, CHLOROPHYLL};

/// One series and a lease that counts as stale after 2 s without a heartbeat.
fn config() -> String {
    ConfigBuilder::new()
        .series(CHLOROPHYLL)
        .sampler(Sampler {
            draws: 300,
            max_rhat: 1.2,
            min_ess: 50,
            ..Default::default()
        })
        .build()
        .replace(
            "database = \"tidemark.db\"\n",
            "database = \"tidemark.db\"\nlease_stale_after_seconds = 2\n",
        )
}

fn log(net: &Network, name: &str) -> String {
    std::fs::read_to_string(net.path(name)).unwrap_or_default()
}

#[test]
fn a_run_that_lost_its_lease_while_stopped_publishes_nothing_and_exits_1() {
    let net = Network::with_config(&config());
    net.ok(&["init"]);
    let rows = network_rows(12, 8);
    let (older, newest): (Vec<_>, Vec<_>) = rows.into_iter().partition(|r| r.1 < 2008);
    net.drop_file("2001-2007.csv", csv(&older));

    // The first run ingests its file without stopping, then holds just before its
    // publishing transaction.
    let hold = net.path("hold");
    std::fs::create_dir(&hold).expect("hold folder");
    release_hold(&hold, "2001-2007.csv", "read");
    release_hold(&hold, "2001-2007.csv", "committed");
    let mut first = spawn_held(&net, &["run-once"], &hold, "first");
    wait_for_hold(&hold, "chlorophyll", "publishing");
    // Stopped, it can neither heartbeat nor publish; released from the hold, it will try
    // to publish the moment it runs again.
    signal(&first, libc::SIGSTOP);
    release_hold(&hold, "chlorophyll", "publishing");
    std::thread::sleep(Duration::from_secs(4));

    // A second run with a newer file takes the stale lease over and publishes version 1.
    net.drop_file("2008.csv", csv(&newest));
    let second = net.tidemark(&["run-once"]);
    let second_err = String::from_utf8_lossy(&second.stderr);
    assert!(second.status.success(), "{second_err}");
    assert!(
        second_err.contains("took over a stale lease"),
        "{second_err}"
    );
    assert!(
        second_err.contains("stale after 2 s"),
        "the configured stale limit was not used: {second_err}"
    );

    signal(&first, libc::SIGCONT);
    let (status, _) = wait_exit(&mut first, Duration::from_secs(60));
    let first_err = log(&net, "first.err");
    assert_eq!(
        status.and_then(|s| s.code()),
        Some(1),
        "the first run must exit 1:\n{first_err}"
    );
    assert!(
        first_err.contains("this process lost the lease of database")
            && first_err.contains("it wrote nothing, and its run stays abandoned"),
        "{first_err}"
    );

    // Only the second run's version exists, made from all the data, under generation 2.
    assert_eq!(
        net.sql("SELECT version, status, data_through_year, lease_generation FROM fits"),
        vec![vec![
            Value::Int(1),
            Value::Text("published".into()),
            Value::Int(2008),
            Value::Int(2),
        ]]
    );
    let runs =
        net.sql("SELECT run_id, status, message, lease_generation FROM runs ORDER BY run_id");
    assert_eq!(runs.len(), 2, "{runs:?}");
    assert_eq!(runs[0][1], Value::Text("abandoned".into()), "{runs:?}");
    assert!(
        runs[0][2]
            .text()
            .contains("abandoned: its process stopped before the run finished"),
        "{runs:?}"
    );
    assert_eq!(runs[0][3], Value::Int(1));
    assert_eq!(runs[1][1], Value::Text("succeeded".into()), "{runs:?}");
    assert_eq!(runs[1][3], Value::Int(2));
    assert!(net
        .sql("SELECT * FROM run_series WHERE run_id = 1 AND outcome = 'published'")
        .is_empty());
    assert_eq!(
        net.sqlite3("SELECT event, generation FROM lease_events ORDER BY event_id"),
        "acquired|1\ntaken_over|2\nreleased|\n"
    );
    assert!(net.sql("SELECT * FROM instance_lease").is_empty());
}

/// The store's fenced writes, through its public API.
#[test]
fn fits_are_written_only_under_the_current_generation_and_never_from_an_older_snapshot() {
    use tidemark_service::store::{
        ForecastSet, LeaseAttempt, LeaseClaim, NewFit, PublishGuard, Store, StoreError,
    };
    use tidemark_service::vocabulary::FitStatus;

    let net = Network::with_config(&config());
    let rt = tokio::runtime::Runtime::new().expect("runtime");
    rt.block_on(async {
        let store = Store::init(&net.db_path()).await.expect("init");
        let claim = |holder: &str| LeaseClaim {
            holder: holder.into(),
            pid: 1,
            host: "test-host".into(),
            command: "refit",
        };
        let fence_of = |attempt: LeaseAttempt| match attempt {
            LeaseAttempt::Acquired { fence, .. } => fence,
            LeaseAttempt::Held(h) => panic!("held by {h:?}"),
        };
        let a = fence_of(store.acquire_lease(&claim("a"), |_| None).await.unwrap());
        // `b` finds `a` stale and takes over.
        let b = fence_of(
            store
                .acquire_lease(&claim("b"), |_| Some("test".into()))
                .await
                .unwrap(),
        );
        assert_eq!((a.generation, b.generation), (1, 2));

        let fit = |watermark: i64, definition: Option<&str>| NewFit {
            series: "chlorophyll".into(),
            status: FitStatus::Published,
            watermark,
            definition_sha256: definition.map(str::to_string),
            ..NewFit::default()
        };
        let write = |fit: NewFit, fence, allow_older| {
            let store = store.clone();
            async move {
                let guard = PublishGuard {
                    fence: Some(fence),
                    allow_older,
                };
                store
                    .record_fit(&fit, &[], None, ForecastSet::default(), &[], guard)
                    .await
            }
        };
        // The sqlite3 client, since sqlx's reader would start a runtime inside this one.
        let count = || net.sqlite3("SELECT COUNT(*) FROM fits").trim().to_string();

        // The replaced holder writes nothing, not even a rejected attempt.
        let lost = write(fit(10, Some("d1")), &a, false).await;
        assert!(
            matches!(lost, Err(StoreError::LeaseLost { generation: 1, ref now, .. }) if now.contains("holder b, generation 2")),
            "{lost:?}"
        );
        let rejected = NewFit {
            status: FitStatus::Rejected,
            ..fit(10, Some("d1"))
        };
        assert!(matches!(
            write(rejected, &a, false).await,
            Err(StoreError::LeaseLost { .. })
        ));
        let lost_forecasts = store
            .replace_forecasts(1, ForecastSet::default(), Some(&a))
            .await;
        assert!(matches!(lost_forecasts, Err(StoreError::LeaseLost { .. })));
        assert_eq!(count(), "0");

        // The holder publishes; an older snapshot under the same definition is refused…
        assert_eq!(write(fit(10, Some("d1")), &b, false).await.unwrap().version, 1);
        let stale = write(fit(7, Some("d1")), &b, false).await;
        assert!(
            matches!(
                stale,
                Err(StoreError::StaleSnapshot {
                    watermark: 7,
                    version: 1,
                    newer: 10,
                    ..
                })
            ),
            "{stale:?}"
        );
        assert_eq!(count(), "1");
        // …but not the same data again, a forced one, or one under another definition.
        assert_eq!(write(fit(10, Some("d1")), &b, false).await.unwrap().version, 2);
        assert_eq!(write(fit(7, Some("d1")), &b, true).await.unwrap().version, 3);
        assert_eq!(write(fit(3, Some("d2")), &b, false).await.unwrap().version, 4);
        // A rejected attempt publishes nothing, so it is never stale.
        let rejected = NewFit {
            status: FitStatus::Rejected,
            ..fit(1, Some("d1"))
        };
        assert!(write(rejected, &b, false).await.is_ok());
        assert_eq!(
            net.sqlite3("SELECT version, watermark, lease_generation FROM fits ORDER BY fit_id"),
            "1|10|2\n2|10|2\n3|7|2\n4|3|2\n5|1|2\n"
        );

        // Generations keep growing after a release.
        assert!(store.release_lease(&claim("b")).await.unwrap());
        let c = fence_of(store.acquire_lease(&claim("c"), |_| None).await.unwrap());
        assert_eq!(c.generation, 3);
        assert!(!store.heartbeat_lease(&b).await.unwrap());
        assert!(store.heartbeat_lease(&c).await.unwrap());
        store.close().await;
    });
}
