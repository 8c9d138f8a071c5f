//! A real agency delivery end to end: values below a detection limit (`<x`), values
//! beyond a measuring range marked by a qualifier column, missing-value codes and a text
//! column — from the feed file through the store to a published version, and REML's
//! refusal. Invented data (a generated network).

mod common;

use common::{line_for, network_rows, ConfigBuilder, Network, Sampler, CHLOROPHYLL};

/// Chlorophyll with `<x` cells, and Secchi depth whose values beyond the lake bottom
/// carry `>` or `bottom` in `secchi_flag`.
fn config() -> String {
    let secchi = r#"name = "secchi"
response = "secchi_m"
transform = "log"
site = "lake"
year = "season"
visit = "visit"
censoring = { column = "secchi_flag", above = [">", "bottom"] }
"#;
    ConfigBuilder::new()
        .series(CHLOROPHYLL)
        .sampler(Sampler::default())
        .series(secchi)
        .sampler(Sampler::default())
        .build()
}

/// What the delivery holds, counted as it is written.
struct Delivery {
    text: String,
    rows: usize,
    /// Remarks written as text, and as a number.
    remarks: (usize, usize),
    below: usize,
    flagged: usize,
    na_chl: usize,
    missing_temp: usize,
}

/// 30 lakes x 8 seasons: chlorophyll under 2.6 µg/L reported as `<2.6`, Secchi depth
/// beyond 4 m (the bottom of shallow lakes) reported as 4 with a flag, every 17th
/// chlorophyll `NA`, one temperature `-999`, a free-text `remarks` column, and one
/// `<0` that a log series cannot use.
fn delivery() -> Delivery {
    let rows = network_rows(30, 8);
    let mut text =
        String::from("lake,season,visit,surface_temp_c,chl_ug_l,secchi_m,secchi_flag,remarks\n");
    let (mut below, mut flagged, mut na_chl, mut missing_temp) = (0, 0, 0, 0);
    let mut remarks_count = (0, 0);
    for (i, (lake, year, visit, temp, chl)) in rows.iter().enumerate() {
        let chl_cell = if i % 17 == 5 {
            na_chl += 1;
            "NA".to_string()
        } else if *chl < 2.6 {
            below += 1;
            "< 2.6".to_string()
        } else {
            format!("{chl:.5}")
        };
        // One measured chlorophyll loses its temperature (so the censored count stays).
        let measured = !chl_cell.starts_with('<') && chl_cell != "NA";
        let temp_cell = if missing_temp == 0 && i >= 40 && measured {
            missing_temp += 1;
            "-999".to_string()
        } else {
            format!("{temp:.3}")
        };
        let secchi = 6.0 / chl.sqrt() * (1.0 + 0.1 * ((i * 7 % 11) as f64 - 5.0) / 5.0);
        let (secchi_cell, flag) = if secchi > 4.0 {
            flagged += 1;
            ("4".to_string(), if i % 2 == 0 { ">" } else { "bottom" })
        } else {
            (format!("{secchi:.3}"), "")
        };
        let remarks = match i % 5 {
            0 => {
                remarks_count.0 += 1;
                "ice off late, \"windy\""
            }
            1 => "NA",
            2 => {
                remarks_count.1 += 1;
                "12"
            }
            _ => "",
        };
        text.push_str(&format!(
            "{lake},{year},{visit},{temp_cell},{chl_cell},{secchi_cell},{flag},\"{}\"\n",
            remarks.replace('"', "\"\"")
        ));
    }
    // A non-positive detection limit under a log series is refused with its reason.
    text.push_str("Lake 999,2004,1,15.0,<0,,,\n");
    Delivery {
        text,
        rows: rows.len(),
        remarks: remarks_count,
        below,
        flagged,
        na_chl,
        missing_temp,
    }
}

#[test]
fn censored_values_missing_codes_and_text_flow_from_the_feed_to_a_published_version() {
    let net = Network::with_config(&config());
    net.ok(&["init"]);
    let d = delivery();
    assert!(
        d.below > 20 && d.flagged > 20,
        "{} below, {} flagged",
        d.below,
        d.flagged
    );
    net.drop_file("2001-2008.csv", &d.text);
    let out = net.ok(&["ingest"]);
    let line = line_for(&out, "2001-2008.csv");
    // The only rejection is the `<0`; missing codes are neither stored nor rejected.
    assert!(
        line.ends_with(", 1 rejected (1 censoring limit not usable)"),
        "{line}"
    );
    let reason = net
        .scalar("SELECT reason FROM rejections")
        .text()
        .to_string();
    assert!(reason.contains("log scale"), "{reason}");
    assert_eq!(
        net.sqlite3(
            "SELECT column_name, censoring, COUNT(*), MIN(num_value), MAX(num_value)
             FROM current_observations WHERE censoring IS NOT NULL GROUP BY 1, 2"
        ),
        format!("chl_ug_l|below|{}|2.6|2.6\n", d.below)
    );
    // No `NA` or `-999` is stored anywhere; the remarks are kept verbatim as text, a
    // number among them as a number.
    assert_eq!(
        net.scalar(
            "SELECT COUNT(*) FROM observations WHERE text_value IN ('NA', '-999') OR num_value = -999"
        )
        .int(),
        0
    );
    assert_eq!(
        net.sqlite3(
            "SELECT COALESCE(text_value, num_value), COUNT(*) FROM current_observations
             WHERE column_name = 'remarks' GROUP BY 1 ORDER BY 1"
        ),
        format!(
            "12.0|{}\nice off late, \"windy\"|{}\n",
            d.remarks.1, d.remarks.0
        )
    );
    let values =
        net.scalar("SELECT COUNT(*) FROM current_observations WHERE column_name = 'chl_ug_l'");
    assert_eq!(values.int() as usize, d.rows - d.na_chl);

    let out = net.ok(&["refit"]);
    assert!(out.contains("published version 1"), "{out}");
    let fits = net.sqlite3("SELECT series, status, n_obs, n_censored FROM fits ORDER BY series");
    let chl_obs = d.rows - d.na_chl - d.missing_temp;
    assert_eq!(
        fits,
        format!(
            "chlorophyll|published|{chl_obs}|{}\nsecchi|published|{}|{}\n",
            d.below, d.rows, d.flagged
        ),
        "{out}"
    );
    let exclusions =
        net.sqlite3("SELECT f.series, e.reason FROM fit_exclusions e JOIN fits f USING (fit_id)");
    assert_eq!(
        exclusions, "chlorophyll|covariate surface_temp_c is missing\n",
        "{exclusions}"
    );
    assert!(
        net.scalar("SELECT COUNT(*) FROM latest_forecasts WHERE series = 'secchi'")
            .int()
            > 0
    );

    // REML has no exact treatment of censored values: it says so, with the count.
    let reml = net.tidemark(&["reml", "--series", "chlorophyll"]);
    assert!(!reml.status.success());
    let err = String::from_utf8_lossy(&reml.stderr);
    assert!(
        err.contains(&format!("{} of the {chl_obs} values are censored", d.below)),
        "{err}"
    );
}

/// A column no series read when it arrived keeps its text; once a series reads it, the
/// text values become that fit's exclusions with their reason, with no re-ingest.
#[test]
fn text_kept_from_an_unread_column_becomes_exclusions_once_a_series_reads_it() {
    let net = Network::with_config(&config());
    net.ok(&["init"]);
    let rows = network_rows(12, 6);
    let mut text = String::from("lake,season,visit,surface_temp_c,chl_ug_l,depth_m\n");
    for (i, (lake, year, visit, temp, chl)) in rows.iter().enumerate() {
        let depth = if i % 9 == 0 {
            "see notes".to_string()
        } else {
            format!("{:.2}", 3.0 + (chl.ln() * 0.7) + (i % 4) as f64 * 0.3)
        };
        text.push_str(&format!(
            "{lake},{year},{visit},{temp:.3},{chl:.5},{depth}\n"
        ));
    }
    let texts = (0..rows.len()).filter(|i| i % 9 == 0).count();
    net.drop_file("depths.csv", &text);
    let out = net.ok(&["ingest"]);
    assert!(
        line_for(&out, "depths.csv").ends_with(", 0 rejected"),
        "{out}"
    );

    let depth = r#"name = "depth"
response = "depth_m"
site = "lake"
year = "season"
visit = "visit"
"#;
    let config = ConfigBuilder::new()
        .series(depth)
        .sampler(Sampler::default())
        .build();
    std::fs::write(net.config_path(), config).expect("rewrite the config");
    let out = net.ok(&["refit"]);
    assert!(out.contains("published version 1"), "{out}");
    let excluded = net.sqlite3(
        "SELECT COUNT(*), MIN(reason) FROM fit_exclusions e JOIN fits f USING (fit_id)
         WHERE f.series = 'depth'",
    );
    assert_eq!(
        excluded,
        format!(
            "{texts}|depth_m = \"see notes\" is not a number (kept as text from a delivery made before a series read the column)\n"
        )
    );
    assert_eq!(
        net.scalar("SELECT n_obs FROM fits WHERE series = 'depth'")
            .int() as usize,
        rows.len() - texts
    );
}
