//! End-to-end: bounded storage. Runs prune the draws of published versions beyond
//! `store.keep_draws`; `prune --dry-run` only lists; the database refuses to delete a
//! published version's draws without a pruning record, and pruning records are
//! immutable; a pruned version keeps its summaries and forecasts, and `export draws` of it
//! says why it cannot.

mod common;

use common::{ConfigBuilder, Network, Sampler, Value, CHLOROPHYLL};

fn config(keep: u32) -> String {
    let base = ConfigBuilder::new()
        .series(CHLOROPHYLL)
        .sampler(Sampler {
            seed: 5,
            ..Default::default()
        })
        .build();
    base.replacen("[store]\n", &format!("[store]\nkeep_draws = {keep}\n"), 1)
}

fn count(net: &Network, sql: &str) -> i64 {
    net.scalar(sql).int()
}

#[test]
fn runs_keep_the_draws_of_the_newest_versions_and_prune_the_rest_with_a_record() {
    let net = Network::with_config(&config(2));
    net.ok(&["init"]);
    let rows = common::network_rows(12, 8);
    // Three seasons, three published versions.
    for (k, years) in [(0, 2001..=2006), (1, 2007..=2007), (2, 2008..=2008)] {
        let part: Vec<_> = rows
            .iter()
            .filter(|r| years.contains(&r.1))
            .cloned()
            .collect();
        net.drop_file(&format!("{k}.csv"), common::csv(&part));
        net.ok(&["run-once"]);
    }
    assert_eq!(
        count(&net, "SELECT COUNT(*) FROM fits WHERE status = 'published'"),
        3
    );
    // keep_draws = 2: version 1 lost its draws at the third run, with a record.
    assert_eq!(
        net.sqlite3(
            "SELECT f.version FROM fit_draws d JOIN fits f USING (fit_id) ORDER BY f.version"
        ),
        "2\n3\n"
    );
    let pruned = net.sql(
        "SELECT f.version, p.keep_draws, p.bytes > 0 FROM draws_pruned p JOIN fits f USING (fit_id)",
    );
    assert_eq!(pruned.len(), 1);
    assert_eq!(pruned[0][0], Value::Int(1));
    assert_eq!(pruned[0][1], Value::Int(2));
    assert_eq!(pruned[0][2], Value::Int(1));
    let last_run = net.scalar("SELECT message FROM runs ORDER BY run_id DESC LIMIT 1");
    assert!(
        last_run
            .text()
            .contains("draws of 1 older version(s) pruned"),
        "{last_run:?}"
    );
    // Everything else of version 1 stays.
    let v1 = "(SELECT fit_id FROM fits WHERE version = 1 AND status = 'published')";
    assert!(
        count(
            &net,
            &format!("SELECT COUNT(*) FROM forecasts WHERE fit_id = {v1}")
        ) > 0
    );
    assert!(
        count(
            &net,
            &format!("SELECT COUNT(*) FROM posterior_summary WHERE fit_id = {v1}")
        ) > 0
    );
    // `export draws` of the pruned version says why; of a kept one it works.
    let out = net.tidemark(&[
        "export",
        "draws",
        "--series",
        "chlorophyll",
        "--version",
        "1",
    ]);
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("pruned") && err.contains("keep_draws = 2"),
        "{err}"
    );
    net.ok(&[
        "export",
        "draws",
        "--series",
        "chlorophyll",
        "--version",
        "2",
    ]);

    // The database refuses what pruning may not do.
    for sql in [
        "DELETE FROM fit_draws WHERE fit_id = (SELECT fit_id FROM fits WHERE version = 3 AND status = 'published')",
        "UPDATE draws_pruned SET keep_draws = 9",
        "DELETE FROM draws_pruned",
    ] {
        let out = net.sqlite3_result(sql);
        assert!(!out.status.success(), "{sql} was allowed");
    }

    // A smaller setting: the dry run lists and changes nothing; the command prunes.
    std::fs::write(net.config_path(), config(1)).unwrap();
    let listed = net.ok(&["prune", "--dry-run"]);
    assert!(listed.contains("chlorophyll version 2"), "{listed}");
    assert!(
        listed.contains("would prune the draws of 1 version(s)"),
        "{listed}"
    );
    assert_eq!(count(&net, "SELECT COUNT(*) FROM fit_draws"), 2);
    let done = net.ok(&["prune"]);
    assert!(done.contains("pruned the draws of 1 version(s)"), "{done}");
    assert_eq!(
        net.sqlite3("SELECT f.version FROM fit_draws d JOIN fits f USING (fit_id)"),
        "3\n"
    );
    // The serving version keeps its draws: forecasts rebuild from them.
    net.ok(&["forecast"]);
    let again = net.ok(&["prune"]);
    assert!(
        again.contains("pruned the draws of 0 version(s)"),
        "{again}"
    );
}

#[test]
fn keep_draws_below_one_is_refused() {
    let net = Network::with_config(&config(0));
    let out = net.tidemark(&["init"]);
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(err.contains("store.keep_draws"), "{err}");
}
