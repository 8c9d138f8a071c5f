//! The database as outside readers see it: migrations, contract views, immutability of
//! published versions, and `status`.

mod common;

use common::{Network, Value};

/// The version numbers of the files in `migrations/`.
fn migrations() -> Vec<i64> {
    let dir = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("../migrations");
    std::fs::read_dir(dir)
        .expect("migrations folder")
        .filter_map(|e| e.ok())
        .filter_map(|e| {
            let name = e.file_name().to_string_lossy().into_owned();
            name.split('_').next()?.parse::<i64>().ok()
        })
        .collect()
}

/// The newest schema version: the number of the last file in `migrations/`.
fn newest_migration() -> i64 {
    migrations()
        .into_iter()
        .max()
        .expect("at least one migration")
}

#[test]
fn init_is_idempotent_and_sets_up_wal() {
    let net = Network::new();
    let first = net.ok(&["init"]);
    assert!(
        first.contains(&format!("schema version {}", newest_migration())),
        "{first}"
    );
    net.ok(&["init"]);
    for dir in ["inbox", "archive", "quarantine"] {
        common::assert_exists(&net.path(dir));
    }
    assert_eq!(net.sqlite3("PRAGMA journal_mode").trim(), "wal");
    assert_eq!(
        net.scalar("SELECT COUNT(*) FROM _sqlx_migrations WHERE success")
            .int(),
        migrations().len() as i64
    );
}

#[test]
fn contract_tables_and_columns_exist() {
    let net = Network::initialised();
    let contract: &[(&str, &[&str])] = &[
        (
            "ingest_batches",
            &[
                "batch_id",
                "source",
                "sha256",
                "received_at",
                "rows_read",
                "values_accepted",
                "values_rejected",
                "status",
            ],
        ),
        (
            "rejections",
            &["batch_id", "line", "column_name", "raw_value", "reason"],
        ),
        (
            "fits",
            &[
                "fit_id",
                "series",
                "version",
                "status",
                "created_at",
                "data_through_year",
                "watermark",
                "n_obs",
                "n_sites",
                "n_years",
                "warm_start_from",
                "chains",
                "draws",
                "warmup",
                "wall_seconds",
                "max_rhat",
                "min_ess_bulk",
                "min_ess_tail",
                "seed",
                "message",
                "unit",
            ],
        ),
        (
            "posterior_summary",
            &[
                "fit_id", "kind", "term", "level", "mean", "sd", "q05", "q25", "q50", "q75", "q95",
                "rhat", "ess_bulk", "ess_tail",
            ],
        ),
        (
            "forecasts",
            &[
                "fit_id",
                "target",
                "site",
                "year",
                "scenario",
                "last_observed_year",
                "mean",
                "sd",
                "q025",
                "q10",
                "q25",
                "q50",
                "q75",
                "q90",
                "q975",
                "share_site",
                "share_year",
                "share_groups",
                "share_residual",
                "share_estimation",
                "prior_only",
                "forecast_id",
                "scale",
            ],
        ),
        (
            "forecast_exceedance",
            &["forecast_id", "threshold", "probability"],
        ),
        (
            "latest_exceedance",
            &[
                "series",
                "fit_id",
                "forecast_id",
                "target",
                "site",
                "year",
                "scenario",
                "unit",
                "threshold",
                "probability",
            ],
        ),
        (
            "runs",
            &[
                "run_id",
                "trigger",
                "started_at",
                "finished_at",
                "status",
                "message",
            ],
        ),
        ("latest_fits", &["fit_id", "series", "version", "status"]),
        (
            "latest_forecasts",
            &[
                "series",
                "fit_id",
                "target",
                "site",
                "year",
                "scenario",
                "scenario_covariates",
                "last_observed_year",
                "mean",
                "sd",
                "q025",
                "q10",
                "q25",
                "q50",
                "q75",
                "q90",
                "q975",
                "share_site",
                "share_year",
                "share_groups",
                "share_residual",
                "share_estimation",
                "prior_only",
                "forecast_id",
                "unit",
                "scale",
            ],
        ),
        (
            "variance_drift",
            &[
                "series",
                "version",
                "fit_id",
                "data_through_year",
                "kind",
                "term",
                "q05",
                "q50",
                "q95",
                "previous_q50",
                "change",
                "flagged",
                "unit",
                "scale",
            ],
        ),
        (
            "forecast_scenarios",
            &["fit_id", "scenario", "covariate", "value"],
        ),
    ];
    for (table, columns) in contract {
        let have: Vec<String> = net
            .sql(&format!("SELECT name FROM pragma_table_info('{table}')"))
            .into_iter()
            .map(|r| r[0].text().to_string())
            .collect();
        for c in *columns {
            assert!(
                have.iter().any(|h| h == c),
                "{table} lacks column {c}: {have:?}"
            );
        }
    }
}

/// Two published versions and a rejected one, written the way the pipeline will.
const FITS: &str = "
INSERT INTO fits (fit_id, series, version, status, created_at, data_through_year, watermark)
VALUES (1, 'chlorophyll', 1, 'published', '2026-01-01T02:30:00Z', 2020, 10),
       (2, 'chlorophyll', 2, 'published', '2026-01-02T02:30:00Z', 2021, 20),
       (3, 'chlorophyll', 3, 'rejected',  '2026-01-03T02:30:00Z', 2022, 30);
INSERT INTO posterior_summary (fit_id, kind, term, level, q05, q50, q95) VALUES
  (1, 'sd', 'site', NULL, 0.5, 1.0, 1.5), (1, 'sd', 'residual', NULL, 0.2, 0.3, 0.4),
  (2, 'sd', 'site', NULL, 0.6, 1.1, 1.4), (2, 'sd', 'residual', NULL, 0.25, 0.3, 0.35),
  (2, 'effect', 'site', 'L1', -1, 0, 1), (3, 'sd', 'site', NULL, 9, 9, 9);
INSERT INTO forecasts (fit_id, target, site, year, mean) VALUES
  (1, 'known_site_new_year', 'L1', 2021, 1.0),
  (2, 'known_site_new_year', 'L1', 2022, 2.0),
  (2, 'new_site_new_year', NULL, 2022, 3.0);
INSERT INTO forecast_exceedance (forecast_id, threshold, probability)
SELECT forecast_id, 10.0, 0.25 FROM forecasts;
";

#[test]
fn views_serve_the_latest_published_version_and_the_drift() {
    let net = Network::initialised();
    net.sqlite3(FITS);
    assert_eq!(
        net.sqlite3("SELECT series, version, fit_id FROM latest_fits"),
        "chlorophyll|2|2\n"
    );
    assert_eq!(
        net.sqlite3("SELECT series, fit_id, target, site, year, mean FROM latest_forecasts ORDER BY target"),
        "chlorophyll|2|known_site_new_year|L1|2022|2.0\nchlorophyll|2|new_site_new_year||2022|3.0\n"
    );
    assert_eq!(
        net.sqlite3("SELECT series, fit_id, target, year, threshold, probability FROM latest_exceedance ORDER BY target"),
        "chlorophyll|2|known_site_new_year|2022|10.0|0.25\nchlorophyll|2|new_site_new_year|2022|10.0|0.25\n"
    );
    assert_eq!(
        net.sqlite3("SELECT series, version, fit_id, data_through_year, term, q05, q50, q95 FROM variance_drift"),
        "chlorophyll|1|1|2020|residual|0.2|0.3|0.4\n\
         chlorophyll|1|1|2020|site|0.5|1.0|1.5\n\
         chlorophyll|2|2|2021|residual|0.25|0.3|0.35\n\
         chlorophyll|2|2|2021|site|0.6|1.1|1.4\n"
    );
    // The previous version's median, the change and the screening flag (a median on a
    // bound counts as inside).
    assert_eq!(
        net.sqlite3("SELECT version, term, previous_q50, round(change, 6), flagged FROM variance_drift WHERE kind = 'sd'"),
        "1|residual|||0\n1|site|||0\n2|residual|0.3|0.0|0\n2|site|1.0|0.1|0\n"
    );
}

#[test]
fn published_versions_are_immutable() {
    let net = Network::initialised();
    net.sqlite3(FITS);
    for stmt in [
        "UPDATE fits SET message = 'edited' WHERE fit_id = 2",
        "DELETE FROM fits WHERE fit_id = 1",
        "UPDATE posterior_summary SET q50 = 0 WHERE fit_id = 2",
        "DELETE FROM posterior_summary WHERE fit_id = 1",
        // Forecasts: never edited; deleted only while their version is the latest (to
        // be replaced by `tidemark forecast`).
        "UPDATE forecasts SET mean = 0 WHERE fit_id = 2",
        "DELETE FROM forecasts WHERE fit_id = 1",
        "UPDATE forecast_exceedance SET probability = 0.5",
        "DELETE FROM forecast_exceedance WHERE forecast_id IN (SELECT forecast_id FROM forecasts WHERE fit_id = 1)",
    ] {
        let out = std::process::Command::new("sqlite3")
            .arg(net.db_path())
            .arg(stmt)
            .output()
            .expect("sqlite3");
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(
            !out.status.success() || err.contains("immutable"),
            "{stmt} was allowed"
        );
        assert!(err.contains("immutable"), "{stmt}: {err}");
    }
    // A rejected attempt is not a version: it may be annotated.
    net.sqlite3("UPDATE fits SET message = 'gate failed' WHERE fit_id = 3");
    assert_eq!(net.scalar("SELECT COUNT(*) FROM fits").int(), 3);
    // The latest version's forecast rows may be replaced: exceedance rows first.
    net.sqlite3(
        "DELETE FROM forecast_exceedance WHERE forecast_id IN (SELECT forecast_id FROM forecasts WHERE fit_id = 2);
         DELETE FROM forecasts WHERE fit_id = 2;",
    );
    assert_eq!(
        net.scalar("SELECT COUNT(*) FROM forecast_exceedance").int(),
        1
    );
}

#[test]
fn accepted_values_cannot_be_rewritten() {
    let net = Network::initialised();
    net.drop_file("a.csv", "lake,season,chl_ug_l\nL1,2020,1.0\n");
    net.ok(&["ingest"]);
    for stmt in [
        "UPDATE observations SET num_value = 2",
        "DELETE FROM observations",
    ] {
        let out = std::process::Command::new("sqlite3")
            .arg(net.db_path())
            .arg(stmt)
            .output()
            .expect("sqlite3");
        assert!(
            String::from_utf8_lossy(&out.stderr).contains("history"),
            "{stmt} was allowed"
        );
    }
    assert_eq!(net.scalar("SELECT num_value FROM observations").real(), 1.0);
}

#[test]
fn a_database_from_a_newer_tidemark_is_refused() {
    let net = Network::initialised();
    net.sqlite3(
        "INSERT INTO _sqlx_migrations (version, description, success, checksum, execution_time)
         VALUES (9999, 'from the future', 1, x'00', 0)",
    );
    for args in [&["status"][..], &["ingest"], &["init"]] {
        let out = net.tidemark(args);
        assert!(!out.status.success(), "{args:?} ran on a newer database");
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(
            err.contains("written by a newer tidemark"),
            "{args:?}: {err}"
        );
        assert!(err.contains("9999"), "{err}");
        assert_eq!(
            err.trim().lines().count(),
            1,
            "one-line reason expected: {err}"
        );
    }
}

#[test]
fn a_missing_or_unmigrated_database_asks_for_init() {
    let net = Network::new();
    let out = net.tidemark(&["status"]);
    assert!(!out.status.success());
    assert!(String::from_utf8_lossy(&out.stderr).contains("does not exist; run `tidemark init`"));

    net.sqlite3("CREATE TABLE unrelated (x)");
    let out = net.tidemark(&["ingest"]);
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("run `tidemark init`"), "{err}");
    net.ok(&["init"]);
    net.ok(&["status"]);
}

#[test]
fn status_json_reports_series_batches_and_schedule() {
    let net = Network::initialised();
    let fresh: serde_json::Value =
        serde_json::from_str(&net.ok(&["status", "--json"])).expect("json");
    assert_eq!(
        fresh["series_without_fit"],
        serde_json::json!(["chlorophyll", "phosphorus"])
    );
    assert!(fresh["schedule"]["next_run"]
        .as_str()
        .is_some_and(|t| t.ends_with("T02:30:00Z")));

    net.drop_file("a.csv", "lake,season,chl_ug_l\nL1,2020,1.0\nL2,2020,x\n");
    net.ok(&["ingest"]);
    net.sqlite3(FITS);
    let s: serde_json::Value = serde_json::from_str(&net.ok(&["status", "--json"])).expect("json");
    assert_eq!(s["schema_version"], newest_migration());
    assert_eq!(s["inbox_waiting"], 0);
    assert_eq!(s["batches"][0]["values_accepted"], 1);
    assert_eq!(s["batches"][0]["values_rejected"], 1);
    assert_eq!(s["batches"][0]["status"], "ingested");
    let chl = &s["series"][0];
    assert_eq!(chl["name"], "chlorophyll");
    assert_eq!(chl["latest_fit"]["version"], 3);
    assert_eq!(chl["latest_fit"]["status"], "rejected");
    assert_eq!(chl["latest_published"]["version"], 2);
    // The value id of the ingested chl value (1) is below the fit's watermark (30).
    assert_eq!(chl["data_watermark"], 1);
    assert_eq!(chl["data_changed"], false);
    assert_eq!(s["series_without_fit"], serde_json::json!(["phosphorus"]));
    let text = net.ok(&["status"]);
    assert!(text.contains("phosphorus: no fit yet"), "{text}");
    assert!(text.contains("chlorophyll: serving version 2"), "{text}");
}

/// Every SQL statement runs from `service/src/store/`: no other module uses sqlx.
#[test]
fn only_the_store_writes_sql() {
    let src = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("src");
    let mut offenders = Vec::new();
    let mut stack = vec![src.clone()];
    while let Some(dir) = stack.pop() {
        for entry in std::fs::read_dir(&dir).expect("read src") {
            let path = entry.expect("entry").path();
            if path.is_dir() {
                if path != src.join("store") {
                    stack.push(path);
                }
                continue;
            }
            let text = std::fs::read_to_string(&path).expect("read");
            // Talking to the database takes sqlx; SQL text shown to a person (say, an
            // example query printed for the analyst) is fine anywhere.
            for needle in ["sqlx::", "use sqlx", "rusqlite"] {
                if text.contains(needle) {
                    offenders.push(format!("{} contains {needle:?}", path.display()));
                }
            }
        }
    }
    assert!(
        offenders.is_empty(),
        "SQL outside the store module: {offenders:#?}"
    );
}

/// The pipeline's read path: the watermark moves on every stored change and the series
/// rows join the current values of each visit.
#[test]
fn series_rows_and_watermarks_follow_the_current_values() {
    use tidemark_service::store::{SeriesRow, Store, StoredValue};
    let net = Network::initialised();
    let header = "lake,season,visit,chl_ug_l,tp_ug_l,surface_temp_c,crew";
    net.drop_file(
        "01.csv",
        format!("{header}\nL1,2020,1,3.2,12,18.5,A\nL1,2020,2,,13,17.0,B\nL2,2021,1,4.0,,,\n"),
    );
    net.ok(&["ingest"]);
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .expect("runtime");
    let cols = |v: &[&str]| v.iter().map(|s| s.to_string()).collect::<Vec<_>>();
    let (w1, rows) = rt.block_on(async {
        let store = Store::open(&net.db_path()).await.expect("open");
        let w = store
            .series_watermark(&cols(&["chl_ug_l", "surface_temp_c", "crew"]))
            .await
            .expect("watermark");
        let rows = store
            .load_series_rows(
                "chl_ug_l",
                &cols(&["surface_temp_c"]),
                &cols(&["crew"]),
                None,
            )
            .await
            .expect("rows");
        store.close().await;
        (w, rows)
    });
    assert_eq!(
        rows,
        vec![
            SeriesRow {
                site: "L1".into(),
                year: 2020,
                visit: "1".into(),
                response: Some(StoredValue::Number(3.2)),
                covariates: vec![Some(StoredValue::Number(18.5))],
                groups: vec![Some("A".into())],
                qualifier: None,
            },
            SeriesRow {
                site: "L1".into(),
                year: 2020,
                visit: "2".into(),
                response: None,
                covariates: vec![Some(StoredValue::Number(17.0))],
                groups: vec![Some("B".into())],
                qualifier: None,
            },
            SeriesRow {
                site: "L2".into(),
                year: 2021,
                visit: "1".into(),
                response: Some(StoredValue::Number(4.0)),
                covariates: vec![None],
                groups: vec![None],
                qualifier: None,
            },
        ]
    );
    let max_id = net
        .scalar("SELECT MAX(value_id) FROM observations WHERE column_name IN ('chl_ug_l', 'surface_temp_c', 'crew')")
        .int();
    assert_eq!(w1, max_id);

    // A tp-only correction leaves the chlorophyll watermark alone; a chl correction moves it.
    net.drop_file("02.csv", "lake,season,visit,tp_ug_l\nL1,2020,1,14\n");
    net.ok(&["ingest"]);
    net.drop_file("03.csv", "lake,season,visit,chl_ug_l\nL2,2021,1,4.5\n");
    net.ok(&["ingest"]);
    let (w2, w3, rows) = rt.block_on(async {
        let store = Store::open(&net.db_path()).await.expect("open");
        let chl = cols(&["chl_ug_l", "surface_temp_c", "crew"]);
        let w2 = store
            .series_watermark(&cols(&["tp_ug_l"]))
            .await
            .expect("w");
        let w3 = store.series_watermark(&chl).await.expect("w");
        let rows = store
            .load_series_rows("chl_ug_l", &[], &[], None)
            .await
            .expect("rows");
        (w2, w3, rows)
    });
    assert!(w2 > w1);
    assert!(w3 > w2);
    assert_eq!(rows.len(), 2);
    assert_eq!(rows[1].response, Some(StoredValue::Number(4.5)));
}

/// Values read back for a fit are the doubles that were ingested, to the last bit, also
/// when they carry 17 significant digits, and visit labels with JSON-special characters
/// survive the per-site aggregation.
#[test]
fn series_rows_round_trip_every_double_exactly() {
    use tidemark_service::store::{Store, StoredValue};
    let net = Network::initialised();
    let values: [f64; 6] = [
        0.1 + 0.2,
        1.0 / 3.0,
        123_456_789.123_456_79,
        1e-300,
        -2.5e300,
        7.0,
    ];
    let mut csv = String::from("lake,season,visit,chl_ug_l\n");
    for (i, v) in values.iter().enumerate() {
        // The visit label `v"0]\` needs JSON escaping twice over.
        csv.push_str(&format!("L1,{},\"v\"\"{i}]\\\",{v:?}\n", 2000 + i));
    }
    net.drop_file("exact.csv", csv);
    net.ok(&["ingest"]);
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .expect("runtime");
    let rows = rt.block_on(async {
        let store = Store::open(&net.db_path()).await.expect("open");
        let rows = store
            .load_series_rows("chl_ug_l", &[], &[], None)
            .await
            .expect("rows");
        store.close().await;
        rows
    });
    let got: Vec<f64> = rows
        .iter()
        .map(|r| r.response.as_ref().and_then(StoredValue::number).unwrap())
        .collect();
    assert_eq!(
        got.iter().map(|v| v.to_bits()).collect::<Vec<_>>(),
        values.iter().map(|v| v.to_bits()).collect::<Vec<_>>()
    );
    assert_eq!(rows[0].visit, "v\"0]\\");
}

/// A database written by the first release (`tests/fixtures/README.md`) upgrades with
/// `tidemark init`: every published version keeps its fit row, summaries and draws
/// byte for byte, its forecasts keep their numbers under the quantile names, the views
/// read, and the next refit warm-starts from the old draws.
#[test]
fn a_database_of_the_previous_release_upgrades_and_keeps_every_version() {
    let fixtures = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("../tests/fixtures");
    let config = std::fs::read_to_string(fixtures.join("release-0.1.0.toml")).expect("config");
    let net = Network::with_config(&config);
    std::fs::copy(fixtures.join("release-0.1.0.db"), net.db_path()).expect("copy database");
    for dir in ["inbox", "archive", "quarantine"] {
        std::fs::create_dir_all(net.path(dir)).expect("folder");
    }
    let fits_q = "SELECT * FROM fits WHERE status = 'published' ORDER BY fit_id";
    let summaries_q = "SELECT * FROM posterior_summary ORDER BY fit_id, kind, term, level";
    let draws_q = "SELECT fit_id, format, blob FROM fit_draws ORDER BY fit_id";
    let old_fits = net.sql(fits_q);
    let old_summaries = net.sql(summaries_q);
    let old_draws = net.sql(draws_q);
    let old_forecasts = net.sql(
        "SELECT fit_id, target, COALESCE(site, ''), year, mean, sd, lo95, lo80, lo50, q50, hi50, hi80, hi95,
                share_site, share_year, share_groups, share_residual, share_estimation
         FROM forecasts ORDER BY fit_id, target, site, year",
    );
    assert_eq!(
        old_fits.len(),
        4,
        "the fixture holds four published versions"
    );
    assert!(!old_forecasts.is_empty());
    let observations_q = "SELECT value_id, batch_id, site_id, year, visit, column_name, num_value,
                                 text_value, line, superseded_by FROM observations ORDER BY value_id";
    let old_observations = net.sql(observations_q);
    let batches_q = "SELECT * FROM ingest_batches ORDER BY batch_id";
    let old_batches = net.sql(batches_q);
    assert!(!old_observations.is_empty());

    // A binary of this release refuses the old database until it is upgraded.
    let refused = net.tidemark(&["status"]);
    assert!(!refused.status.success());
    assert!(
        String::from_utf8_lossy(&refused.stderr).contains("tidemark init"),
        "{}",
        String::from_utf8_lossy(&refused.stderr)
    );
    net.ok(&["init"]);

    // Columns added since (schema version 5: lease_generation, definition_sha256) come
    // last and are null on the old rows; every old column keeps its value.
    let old_columns = |query: &str| -> Vec<Vec<Value>> {
        net.sql(query)
            .into_iter()
            .map(|mut row| {
                let added = row.split_off(old_fits[0].len());
                assert!(added.iter().all(Value::is_null), "{added:?}");
                row
            })
            .collect()
    };
    assert_eq!(
        old_columns(fits_q),
        old_fits,
        "published fit rows are unchanged"
    );
    assert_eq!(
        net.sql(summaries_q),
        old_summaries,
        "summaries are unchanged"
    );
    assert_eq!(net.sql(draws_q), old_draws, "draws are unchanged");
    // No value is lost or re-keyed (schema version 11 lets series name their own key
    // columns; observations keep their ids, sites and keys) and none is censored; old
    // batches keep every column, the key columns they were read with unknown.
    assert_eq!(net.sql(observations_q), old_observations);
    assert_eq!(
        net.scalar("SELECT COUNT(*) FROM observations WHERE censoring IS NOT NULL")
            .int(),
        0
    );
    let batches: Vec<Vec<Value>> = net
        .sql(batches_q)
        .into_iter()
        .map(|mut row| {
            let added = row.split_off(old_batches[0].len());
            assert!(added.iter().all(Value::is_null), "{added:?}");
            row
        })
        .collect();
    assert_eq!(batches, old_batches);
    // The old versions carry no stored definition: with nothing to compare, an upgrade
    // refits nothing.
    let out = net.ok(&["refit", "--series", "chlorophyll"]);
    assert!(out.contains("no new data"), "{out}");
    let new_forecasts = net.sql(
        "SELECT fit_id, target, COALESCE(site, ''), year, mean, sd, q025, q10, q25, q50, q75, q90, q975,
                share_site, share_year, share_groups, share_residual, share_estimation
         FROM forecasts ORDER BY fit_id, target, site, year",
    );
    assert_eq!(new_forecasts, old_forecasts, "forecasts keep their numbers");
    // Schema version 10 gave every row a key and its scale (all on the response scale).
    assert_eq!(
        net.sqlite3(
            "SELECT COUNT(*), COUNT(DISTINCT forecast_id), SUM(scale = 'response') FROM forecasts"
        ),
        format!("{0}|{0}|{0}\n", old_forecasts.len())
    );
    assert_eq!(
        net.scalar("SELECT COUNT(*) FROM forecasts WHERE last_observed_year IS NOT NULL")
            .int(),
        0,
        "the first release did not record last observed years"
    );
    // The views read on the upgraded database.
    assert_eq!(
        net.scalar("SELECT COUNT(DISTINCT fit_id) FROM latest_forecasts")
            .int(),
        2
    );
    let flagged_or_not = net.sql("SELECT DISTINCT flagged FROM variance_drift");
    assert!(!flagged_or_not.is_empty());
    assert_eq!(
        net.scalar("SELECT MAX(version) FROM _sqlx_migrations")
            .int(),
        newest_migration(),
        "the upgrade is recorded"
    );

    // The old draws still decode: forecasts are rebuilt from them, and a refit
    // warm-starts from them.
    net.ok(&["forecast", "--series", "phosphorus"]);
    assert!(
        net.scalar(
            "SELECT COUNT(*) FROM latest_forecasts WHERE series = 'phosphorus' AND last_observed_year IS NOT NULL"
        )
        .int()
            > 0
    );
    let out = net.ok(&["refit", "--force", "--series", "phosphorus"]);
    assert!(out.contains("published version 3"), "{out}");
    let warm_from = net.scalar(
        "SELECT warm_start_from FROM fits WHERE series = 'phosphorus' AND version = 3 AND status = 'published'",
    );
    let old_v2 = net.scalar(
        "SELECT fit_id FROM fits WHERE series = 'phosphorus' AND version = 2 AND status = 'published'",
    );
    // A warm start that fails the gate falls back cold; either way the old version stays.
    assert!(warm_from == old_v2 || warm_from.is_null(), "{warm_from:?}");
    assert_eq!(
        old_columns(&format!("{fits_q} LIMIT 4")),
        old_fits,
        "publishing a new version leaves the old ones as they were"
    );
}

/// The edge cases of the flag rule, in the `variance_drift` view and in `drift --json`
/// alike: a previous median exactly on a bound is inside; a quantity the previous version
/// did not have is not compared (even when an older version had it); an interval with an
/// unknown bound flags nothing.
#[test]
fn the_drift_view_and_the_drift_command_agree_on_the_edge_cases() {
    let net = Network::initialised();
    net.sqlite3(
        "INSERT INTO fits (fit_id, series, version, status, created_at, data_through_year, watermark)
         VALUES (11, 'phosphorus', 1, 'published', '2026-01-01T00:00:00Z', 2020, 1),
                (12, 'phosphorus', 2, 'published', '2026-01-02T00:00:00Z', 2021, 2),
                (13, 'phosphorus', 3, 'published', '2026-01-03T00:00:00Z', 2022, 3);
         INSERT INTO posterior_summary (fit_id, kind, term, level, q05, q50, q95) VALUES
           (11, 'sd', 'site', NULL, 0.5, 1.0, 1.5), (11, 'sd', 'year', NULL, 0.1, 0.2, 0.3),
           (11, 'sd', 'residual', NULL, 0.2, 0.3, 0.4),
           (12, 'sd', 'site', NULL, 1.0, 1.2, 1.4), (12, 'sd', 'residual', NULL, 0.31, 0.35, 0.5),
           (13, 'sd', 'site', NULL, 0.1, 0.2, 1.1), (13, 'sd', 'year', NULL, 0.5, 0.6, 0.7),
           (13, 'sd', 'residual', NULL, NULL, 0.33, 0.34);",
    );
    let view = net.sqlite3(
        "SELECT version, term, IFNULL(previous_q50, '-'), flagged FROM variance_drift
         WHERE version > 1 ORDER BY version, term",
    );
    assert_eq!(
        view,
        "2|residual|0.3|1\n2|site|1.0|0\n3|residual|0.35|0\n3|site|1.2|1\n3|year|-|0\n"
    );
    let doc: serde_json::Value =
        serde_json::from_str(&net.ok(&["drift", "--json"])).expect("drift json");
    let mut from_json = String::new();
    for v in doc["series"][0]["versions"].as_array().expect("versions") {
        if v["version"] == 1 {
            continue;
        }
        let mut comps: Vec<&serde_json::Value> =
            v["components"].as_array().unwrap().iter().collect();
        comps.sort_by_key(|c| c["term"].as_str().unwrap().to_string());
        for c in comps {
            from_json.push_str(&format!(
                "{}|{}|{}|{}\n",
                v["version"],
                c["term"].as_str().unwrap(),
                c["previous_q50"]
                    .as_f64()
                    .map_or("-".to_string(), |x| format!("{x:?}")),
                u8::from(c["flag"].as_bool().unwrap())
            ));
        }
    }
    assert_eq!(from_json, view, "the view and drift --json disagree");
}
