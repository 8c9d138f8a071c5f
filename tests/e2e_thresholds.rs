//! Units and thresholds end to end: a series' unit carried into `latest_forecasts`,
//! `variance_drift`, `drift` and `status`; the probability of exceeding each threshold
//! written for every forecast row, read through `latest_exceedance`, consistent with the
//! row's own quantiles, rewritten by `tidemark forecast` from the stored draws, and
//! immutable once a newer version is published. Invented data (a generated network) with
//! values below a detection limit.

mod common;

use common::{network_rows, ConfigBuilder, Network, Sampler, CHLOROPHYLL, PHOSPHORUS};

/// Chlorophyll below this is reported as `<3.5` (a detection limit).
const LIMIT: f64 = 3.5;
/// The first threshold lies below the detection limit: the model still answers it.
const THRESHOLDS: [f64; 3] = [3.0, 7.0, 15.0];

fn config(unit: &str, thresholds: &[f64]) -> String {
    let list: Vec<String> = thresholds.iter().map(|t| format!("{t:?}")).collect();
    ConfigBuilder::new()
        .series(&format!(
            "{CHLOROPHYLL}unit = \"{unit}\"\nthresholds = [{}]\n",
            list.join(", ")
        ))
        .sampler(Sampler::default())
        .series(PHOSPHORUS)
        .sampler(Sampler::default())
        .build()
}

/// 25 lakes x 6 seasons of chlorophyll (censored below [`LIMIT`]) and phosphorus.
fn feed() -> (String, usize) {
    let mut text = String::from("lake,season,visit,surface_temp_c,chl_ug_l,tp_ug_l\n");
    let mut censored = 0;
    for (i, (lake, year, visit, temp, chl)) in network_rows(25, 6).iter().enumerate() {
        let chl_cell = if *chl < LIMIT {
            censored += 1;
            format!("<{LIMIT}")
        } else {
            format!("{chl:.5}")
        };
        let tp = 12.0 + 2.0 * chl + common::hash_uniform(i as u64);
        text.push_str(&format!(
            "{lake},{year},{visit},{temp:.3},{chl_cell},{tp:.4}\n"
        ));
    }
    (text, censored)
}

/// `(target, site, year, threshold, probability)` of chlorophyll's latest version, as the
/// sqlite3 client prints them.
fn exceedance_rows(net: &Network) -> String {
    net.sqlite3(
        "SELECT target, site, year, threshold, probability FROM latest_exceedance
         WHERE series = 'chlorophyll' ORDER BY target, site, year, threshold",
    )
}

fn forecast_rows(net: &Network) -> i64 {
    net.scalar("SELECT COUNT(*) FROM latest_forecasts WHERE series = 'chlorophyll'")
        .int()
}

/// Each forecast row of chlorophyll's latest version has exactly `thresholds`.
fn assert_one_row_per_forecast_and_threshold(net: &Network, thresholds: &[f64]) {
    let n = forecast_rows(net);
    assert!(n > 50, "{n} forecast rows");
    let list: Vec<String> = thresholds.iter().map(|t| format!("{t:?}")).collect();
    assert_eq!(
        net.scalar(&format!(
            "SELECT COUNT(*) FROM latest_forecasts f WHERE series = 'chlorophyll'
               AND (SELECT group_concat(threshold, ',') FROM
                      (SELECT threshold FROM forecast_exceedance e
                       WHERE e.forecast_id = f.forecast_id ORDER BY threshold))
                   IS NOT '{}'",
            list.join(",")
        ))
        .int(),
        0,
        "every row has each threshold once"
    );
    let fit = net
        .scalar("SELECT fit_id FROM latest_fits WHERE series = 'chlorophyll'")
        .int();
    for count in [
        format!(
            "SELECT COUNT(*) FROM forecast_exceedance e JOIN forecasts f USING (forecast_id)
             WHERE f.fit_id = {fit}"
        ),
        "SELECT COUNT(*) FROM latest_exceedance WHERE series = 'chlorophyll'".to_string(),
    ] {
        assert_eq!(
            net.scalar(&count).int(),
            n * thresholds.len() as i64,
            "{count}"
        );
    }
    // No exceedance row is left without its forecast row.
    assert_eq!(
        net.scalar(
            "SELECT COUNT(*) FROM forecast_exceedance
             WHERE forecast_id NOT IN (SELECT forecast_id FROM forecasts)"
        )
        .int(),
        0
    );
}

/// Probabilities fall as the threshold rises, and agree with the row's quantiles: the
/// predictive is continuous, so `P(Y > q_p) = 1 - p` and a threshold at or below `q_p` is
/// exceeded with probability at least `1 - p` (at most, at or above it).
fn assert_consistent_with_the_quantiles(net: &Network) {
    assert_eq!(
        net.scalar(
            "SELECT COUNT(*) FROM latest_exceedance a JOIN latest_exceedance b
               ON b.forecast_id = a.forecast_id AND b.threshold > a.threshold
             WHERE NOT (a.probability > b.probability)"
        )
        .int(),
        0,
        "a higher threshold is exceeded less often"
    );
    let rows = net.sql(
        "SELECT e.threshold, e.probability, f.q025, f.q10, f.q25, f.q50, f.q75, f.q90, f.q975
         FROM latest_exceedance e JOIN latest_forecasts f ON f.forecast_id = e.forecast_id
         WHERE e.series = 'chlorophyll'",
    );
    let mut bracketed = 0;
    for r in &rows {
        let (t, p) = (r[0].real(), r[1].real());
        assert!((0.0..=1.0).contains(&p), "{p}");
        for (k, level) in [0.025, 0.1, 0.25, 0.5, 0.75, 0.9, 0.975].iter().enumerate() {
            let q = r[2 + k].real();
            // The quantiles are solved to 1e-8 of the widest component's sd.
            if t < q * (1.0 - 1e-6) {
                assert!(
                    p >= 1.0 - level - 1e-6,
                    "P(Y > {t}) = {p} but q{level} = {q}"
                );
                bracketed += 1;
            } else if t > q * (1.0 + 1e-6) {
                assert!(
                    p <= 1.0 - level + 1e-6,
                    "P(Y > {t}) = {p} but q{level} = {q}"
                );
                bracketed += 1;
            }
        }
    }
    assert!(bracketed > rows.len() * 6, "{bracketed} of {}", rows.len());
}

#[test]
fn thresholds_give_every_forecast_row_its_exceedance_probabilities_and_forecast_rewrites_them() {
    let net = Network::with_config(&config("µg/L", &THRESHOLDS));
    net.ok(&["init"]);
    let (text, censored) = feed();
    let share = censored as f64 / text.lines().count() as f64;
    assert!(
        (0.1..0.4).contains(&share),
        "{censored} values below the limit"
    );
    net.drop_file("lakes.csv", text);
    net.ok(&["ingest"]);
    let out = net.ok(&["refit"]);
    assert_eq!(out.matches("published version 1").count(), 2, "{out}");
    assert_eq!(
        net.scalar("SELECT n_censored FROM latest_fits WHERE series = 'chlorophyll'")
            .int(),
        censored as i64
    );

    assert_one_row_per_forecast_and_threshold(&net, &THRESHOLDS);
    assert_consistent_with_the_quantiles(&net);
    // A series without thresholds has none; its unit is unknown.
    assert_eq!(
        net.scalar("SELECT COUNT(*) FROM latest_exceedance WHERE series = 'phosphorus'")
            .int(),
        0
    );
    // The threshold below the detection limit is answered by the model (the values under
    // the limit entered the fit as censored): at the lowest lakes the true value may well
    // lie under 3.0.
    let below = net
        .scalar("SELECT MIN(probability) FROM latest_exceedance WHERE threshold = 3.0")
        .real();
    assert!(below > 0.0 && below < 0.95, "{below}");

    // The unit and the scale travel with the version.
    assert_eq!(
        net.sqlite3("SELECT DISTINCT series, unit, scale FROM latest_forecasts ORDER BY 1"),
        "chlorophyll|µg/L|response\nphosphorus||response\n"
    );
    assert_eq!(
        net.sqlite3(
            "SELECT DISTINCT series, kind, unit, COALESCE(scale, '-') FROM variance_drift
             ORDER BY 1, 2"
        ),
        "chlorophyll|sd|µg/L|model\nchlorophyll|share|µg/L|-\n\
         phosphorus|sd||model\nphosphorus|share||-\n"
    );
    let status: serde_json::Value =
        serde_json::from_str(&net.ok(&["status", "--json"])).expect("status json");
    assert_eq!(status["series"][0]["latest_published"]["unit"], "µg/L");
    assert!(status["series"][1]["latest_published"]["unit"].is_null());
    assert!(net.ok(&["status"]).contains("unit µg/L"));
    let drift: serde_json::Value =
        serde_json::from_str(&net.ok(&["drift", "--json", "--series", "chlorophyll"]))
            .expect("drift json");
    let v1 = &drift["series"][0]["versions"][0];
    assert_eq!(v1["unit"], "µg/L");
    for c in v1["components"].as_array().unwrap() {
        let want = if c["kind"] == "sd" {
            serde_json::json!("model")
        } else {
            serde_json::Value::Null
        };
        assert_eq!(c["scale"], want, "{c}");
    }
    assert!(net
        .ok(&["drift", "--series", "chlorophyll"])
        .contains("standard deviation, model scale; response in µg/L"));

    // `forecast` rebuilds the rows from the stored draws: the same probabilities under
    // new row ids, nothing left behind.
    let before = exceedance_rows(&net);
    let last_id = net.scalar("SELECT MAX(forecast_id) FROM forecasts").int();
    let out = net.ok(&["forecast"]);
    assert!(
        out.contains(&format!(
            "with {} exceedance probabilities (3 threshold(s))",
            3 * forecast_rows(&net)
        )),
        "{out}"
    );
    assert_eq!(exceedance_rows(&net), before);
    assert!(
        net.scalar("SELECT MIN(forecast_id) FROM latest_forecasts")
            .int()
            > last_id,
        "rewritten rows get new ids"
    );
    assert_one_row_per_forecast_and_threshold(&net, &THRESHOLDS);

    // A threshold added to the config is answered by the next `forecast`, from the same
    // draws: the earlier thresholds keep their probabilities exactly.
    let four = [3.0, 7.0, 15.0, 30.0];
    std::fs::write(net.config_path(), config("µg/L", &four)).unwrap();
    net.ok(&["forecast", "--series", "chlorophyll"]);
    assert_one_row_per_forecast_and_threshold(&net, &four);
    assert_consistent_with_the_quantiles(&net);
    assert_eq!(
        net.sqlite3(
            "SELECT target, site, year, threshold, probability FROM latest_exceedance
             WHERE series = 'chlorophyll' AND threshold < 30 ORDER BY target, site, year, threshold",
        ),
        before
    );

    // Once version 2 is published, version 1's probabilities are history; version 2's
    // may only be replaced (by `forecast`), never edited.
    net.ok(&["refit", "--force", "--series", "chlorophyll"]);
    let (v1, v2) = (
        net.scalar("SELECT fit_id FROM fits WHERE series = 'chlorophyll' AND version = 1 AND status = 'published'").int(),
        net.scalar("SELECT fit_id FROM latest_fits WHERE series = 'chlorophyll'").int(),
    );
    let of = |fit: i64| format!("(SELECT forecast_id FROM forecasts WHERE fit_id = {fit})");
    for stmt in [
        format!(
            "UPDATE forecast_exceedance SET probability = 0.5 WHERE forecast_id IN {}",
            of(v1)
        ),
        format!(
            "DELETE FROM forecast_exceedance WHERE forecast_id IN {}",
            of(v1)
        ),
        format!("DELETE FROM forecasts WHERE fit_id = {v1}"),
        format!("UPDATE forecasts SET q50 = 0 WHERE fit_id = {v2}"),
        format!(
            "UPDATE forecast_exceedance SET probability = 0.5 WHERE forecast_id IN {}",
            of(v2)
        ),
    ] {
        let out = net.sqlite3_result(&stmt);
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(
            !out.status.success() && err.contains("immutable"),
            "{stmt}: {err}"
        );
    }
    assert_eq!(
        net.scalar(&format!(
            "SELECT COUNT(*) FROM forecast_exceedance WHERE forecast_id IN {}",
            of(v1)
        ))
        .int(),
        net.scalar(&format!(
            "SELECT COUNT(*) FROM forecasts WHERE fit_id = {v1}"
        ))
        .int()
            * 4
    );

    // Thresholds are in the config's unit: after a change of unit, `forecast` refuses
    // to answer them from a version fitted to values in the old one.
    std::fs::write(net.config_path(), config("mg/L", &four)).unwrap();
    let refused = net.tidemark(&["forecast", "--series", "chlorophyll"]);
    assert!(!refused.status.success());
    let err = String::from_utf8_lossy(&refused.stderr);
    assert!(
        err.contains("fitted to values in \"µg/L\"") && err.contains("\"mg/L\""),
        "{err}"
    );
}
