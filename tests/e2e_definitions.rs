//! The model definition is part of a version: each fit stores its canonical text and
//! digest; a changed definition is refitted without new data and says why; a warm start
//! is used only across compatible definitions; `status` names a served version made
//! under another definition. Invented data (a generated network).

mod common;

use common::{csv, network_rows, ConfigBuilder, Network, Sampler, CHLOROPHYLL};
use sha2::{Digest, Sha256};

fn config(series: &str, extra: &str) -> String {
    let mut toml = ConfigBuilder::new()
        .series(series)
        .sampler(Sampler::default())
        .build();
    toml.push_str(extra);
    toml
}

fn last_fit(net: &Network) -> (i64, String, String, Option<i64>) {
    let row = &net.sql(
        "SELECT version, COALESCE(message, ''), status, warm_start_from FROM fits ORDER BY fit_id DESC LIMIT 1",
    )[0];
    (
        row[0].int(),
        row[1].text().to_string(),
        row[2].text().to_string(),
        (!row[3].is_null()).then(|| row[3].int()),
    )
}

#[test]
fn a_changed_definition_is_refitted_without_new_data_and_says_why() {
    let net = Network::with_config(&config(CHLOROPHYLL, ""));
    net.ok(&["init"]);
    net.drop_file("seasons.csv", csv(&network_rows(20, 6)));
    net.ok(&["ingest"]);
    let out = net.ok(&["refit"]);
    assert!(out.contains("published version 1"), "{out}");

    // The stored text is the canonical definition, and the digest is its SHA-256.
    let row = &net.sql("SELECT definition_text, definition_sha256 FROM fits")[0];
    let text = row[0].text().to_string();
    assert_eq!(hex::encode(Sha256::digest(text.as_bytes())), row[1].text());
    let stored: serde_json::Value = serde_json::from_str(&text).unwrap();
    assert_eq!(stored["response"], "chl_ug_l");
    assert_eq!(stored["transform"], "log");
    assert_eq!(stored["covariates"], serde_json::json!(["surface_temp_c"]));
    assert_eq!(stored["gate"]["max_rhat"], 1.05);
    let out = net.ok(&["refit"]);
    assert!(out.contains("no new data"), "{out}");

    // A prior changes: no data arrived, yet the series is refitted and says why; the
    // previous version still warm-starts it (priors do not block a warm start).
    let priors = "\n[series.priors]\nresidual_sd = { half_normal = 1.0 }\n";
    std::fs::write(net.config_path(), config(CHLOROPHYLL, priors)).unwrap();
    let status = net.ok(&["status"]);
    assert!(
        status.contains(
            "chlorophyll: the served version 1 was made under another model definition: the model definition changed (priors) since"
        ),
        "{status}"
    );
    let out = net.ok(&["run-once"]);
    assert!(out.contains("published version 2"), "{out}");
    let (version, message, status, warm) = last_fit(&net);
    assert_eq!((version, status.as_str()), (2, "published"));
    assert!(
        message.contains("refitted because the model definition changed (priors)"),
        "{message}"
    );
    assert!(
        warm.is_some(),
        "a prior change keeps the warm start: {message}"
    );
    assert!(!net.ok(&["status"]).contains("another model definition"));

    // A covariate is dropped: refitted again, cold, and both reasons are said.
    let no_covariate = CHLOROPHYLL.replace("covariates = [\"surface_temp_c\"]\n", "");
    std::fs::write(net.config_path(), config(&no_covariate, priors)).unwrap();
    let out = net.ok(&["refit"]);
    assert!(out.contains("published version 3"), "{out}");
    let (version, message, _, warm) = last_fit(&net);
    assert_eq!(version, 3);
    assert!(
        message.contains("refitted because the model definition changed (covariates)"),
        "{message}"
    );
    assert!(
        message.contains(
            "warm start not used: the previous version was made under another model definition (covariates changed)"
        ),
        "{message}"
    );
    assert_eq!(warm, None);
    let out = net.ok(&["refit"]);
    assert!(out.contains("no new data"), "{out}");

    // The gate is part of the definition too.
    let stricter = config(&no_covariate, priors).replace("max_rhat = 1.05", "max_rhat = 1.04");
    std::fs::write(net.config_path(), stricter).unwrap();
    net.ok(&["refit"]);
    let (_, message, _, warm) = last_fit(&net);
    assert!(
        message.contains("refitted because the model definition changed (gate)"),
        "{message}"
    );
    assert!(warm.is_some(), "{message}");
}

/// Fits made before definitions were stored carry only the legacy digest: the same
/// definition must not refit every series after an upgrade, a different one must.
#[test]
fn a_fit_from_before_stored_definitions_is_compared_by_its_legacy_digest() {
    use tidemark_service::config::Config;
    use tidemark_service::pipeline::refit::definition_change;
    let dir = tempfile::tempdir().unwrap();
    let parse = |series: &str| {
        Config::parse(&config(series, ""), "tidemark.toml", dir.path())
            .unwrap()
            .series
            .remove(0)
    };
    let series = parse(CHLOROPHYLL);
    let legacy = series.legacy_definition_sha256();
    assert_eq!(definition_change(&series, Some(&legacy), None), None);
    assert_eq!(definition_change(&series, None, None), None);
    // A trend or a unit is a change no earlier fit could have had.
    for added in ["trend = true\n", "unit = \"µg/L\"\n"] {
        let later = parse(&format!("{CHLOROPHYLL}{added}"));
        assert_eq!(later.legacy_definition_sha256(), legacy);
        assert!(
            definition_change(&later, Some(&legacy), None).is_some(),
            "{added}"
        );
    }
    let other = parse(&CHLOROPHYLL.replace("transform = \"log\"", "transform = \"none\""));
    assert!(definition_change(&other, Some(&legacy), None)
        .unwrap()
        .contains("before definitions were stored"));
    // With a stored text the changed fields are named; the current digest is no change.
    let text = series.definition().text();
    assert_eq!(
        definition_change(&other, Some("old"), Some(&text)).as_deref(),
        Some("the model definition changed (transform)")
    );
    assert_eq!(
        definition_change(&series, Some(&series.definition_sha256()), Some(&text)),
        None
    );
}
