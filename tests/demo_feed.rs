//! The committed demo feed (`demo-feed/`, an invented lake network) is exactly what its
//! generator renders, its defect manifest points at the cells it describes, and the
//! generated data give back the true parameters.

use std::collections::BTreeSet;
use std::path::PathBuf;

use tidemark_model::simulate::{simulate_survey, survey_data};
use tidemark_model::{fit_point, Method};
use tidemark_service::demo_feed::{self, generate, splice_readme, SEED};

fn feed_dir() -> PathBuf {
    PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../demo-feed")
}

fn listing(sub: &str) -> BTreeSet<String> {
    std::fs::read_dir(feed_dir().join(sub))
        .unwrap()
        .map(|e| format!("{sub}/{}", e.unwrap().file_name().to_string_lossy()))
        .collect()
}

#[test]
fn the_committed_feed_is_byte_for_byte_what_the_generator_renders() {
    let feed = generate(SEED);
    for (path, text) in &feed.files {
        let committed = std::fs::read(feed_dir().join(path))
            .unwrap_or_else(|e| panic!("demo-feed/{path}: {e}"));
        assert!(
            committed == text.as_bytes(),
            "demo-feed/{path} differs from the generator's output; run \
             `cargo run -p tidemark-service --example make_demo_feed -- demo-feed`"
        );
    }
    // No stale file the generator no longer writes.
    let written: BTreeSet<String> = feed.files.iter().map(|(p, _)| p.clone()).collect();
    let mut present = listing("seasons");
    present.extend(listing("truth"));
    assert_eq!(present, written);
    assert!(!feed_dir().join("generate.py").exists());
    let readme = std::fs::read_to_string(feed_dir().join("README.md")).unwrap();
    assert!(
        splice_readme(&readme, &feed.readme).unwrap() == readme,
        "a generated section of demo-feed/README.md differs from the generator's output"
    );
    // The demo command embeds one file per season.
    assert_eq!(listing("seasons").len(), 16);
}

#[test]
fn a_seed_gives_the_same_feed_and_another_seed_plants_the_same_defects() {
    let a = generate(SEED);
    assert_eq!(a, generate(SEED));
    let b = generate(SEED + 1);
    assert_ne!(a.files[0], b.files[0], "the seed drives the values");
    let kinds = |f: &demo_feed::DemoFeed| -> Vec<(String, String, String)> {
        let (_, text) = f
            .files
            .iter()
            .find(|(p, _)| p == "truth/defects.csv")
            .unwrap();
        let mut r = csv::Reader::from_reader(text.as_bytes());
        r.records()
            .map(|rec| {
                let rec = rec.unwrap();
                (rec[0].to_string(), rec[5].to_string(), rec[7].to_string())
            })
            .collect()
    };
    assert_eq!(kinds(&a), kinds(&b));
    assert_eq!(kinds(&a).len(), 21);
}

#[test]
fn every_defect_in_the_manifest_is_on_the_line_and_column_it_names() {
    let feed = generate(SEED);
    let file = |p: &str| {
        feed.files
            .iter()
            .find(|(q, _)| q == p)
            .map(|(_, t)| t.clone())
            .unwrap()
    };
    let manifest = file("truth/defects.csv");
    let mut r = csv::Reader::from_reader(manifest.as_bytes());
    let mut n = 0;
    for rec in r.records() {
        let d = rec.unwrap();
        let text = file(&d[0]);
        let line: usize = d[1].parse().unwrap();
        // No cell holds a line break, so line k is data record k - 2.
        let mut rows = csv::Reader::from_reader(text.as_bytes());
        let header = rows.headers().unwrap().clone();
        let row = rows.records().nth(line - 2).unwrap().unwrap();
        let col = header.iter().position(|h| h == &d[5]).unwrap();
        assert_eq!(&row[col], &d[6], "{} line {line} column {}", &d[0], &d[5]);
        assert_eq!(&row[0], &d[2]);
        assert_eq!((&row[1], &row[2]), (&d[3], &d[4]));
        if ["superseded", "correction", "censored"].contains(&&d[7]) || d[7].starts_with("rej") {
            assert!(!d[8].is_empty(), "a true value for {:?}", d);
        }
        n += 1;
    }
    assert_eq!(n, 21);
    // The values the defects replaced never reach the files as bad values elsewhere.
    let bad: usize = feed
        .files
        .iter()
        .filter(|(p, _)| p.starts_with("seasons/"))
        .map(|(_, t)| t.matches("1e999").count() + t.matches("n/a").count())
        .sum();
    assert_eq!(bad, 2);
}

/// The data rows of a rendered season file, with the header.
fn table(text: &str) -> (csv::StringRecord, Vec<csv::StringRecord>) {
    let mut r = csv::Reader::from_reader(text.as_bytes());
    let header = r.headers().unwrap().clone();
    (header, r.records().map(Result::unwrap).collect())
}

/// A `<L` cell only where the generated value is below `L` (and every generated value
/// below it, unless a defect took the cell, is written `<L`); a depth flagged on the
/// bottom only where the generated Secchi depth exceeds the lake's depth.
#[test]
fn every_censored_cell_is_true_of_its_generated_value_and_no_other_cell_is_censored() {
    let feed = generate(SEED);
    let file = |p: &str| {
        feed.files
            .iter()
            .find(|(q, _)| q == p)
            .map(|(_, t)| t.clone())
            .unwrap()
    };
    let spec = demo_feed::spec(SEED);
    let (visits, _) = simulate_survey(&spec);
    let lakes: Vec<String> = table(&file("truth/effects.csv"))
        .1
        .iter()
        .filter(|r| &r[0] == "chlorophyll" && &r[1] == "site")
        .map(|r| r[2].to_string())
        .collect();
    let generated = |lake: &str, season: &str, visit: &str, k: usize| -> f64 {
        let site = lakes.iter().position(|l| l == lake).unwrap();
        let v = visits
            .iter()
            .find(|v| {
                v.site == site && v.year.to_string() == season && v.visit.to_string() == visit
            })
            .unwrap();
        v.values[k]
    };
    let depth = |lake: &str| {
        demo_feed::SHALLOW_LAKES
            .iter()
            .find(|(l, _)| *l == lake)
            .map(|l| l.1)
    };

    let (_, censored) = table(&file("truth/censored.csv"));
    let mut listed = BTreeSet::new();
    for c in &censored {
        let (season, lake, visit) = (&c[3], &c[2], &c[4]);
        let true_value: f64 = c[10].parse().unwrap();
        let limit: f64 = c[9].parse().unwrap();
        match &c[5] {
            "chl_ug_l" => {
                let l = demo_feed::chl_reporting_limit(season.parse().unwrap());
                assert_eq!((limit, &c[6], &c[8]), (l, &*format!("<{l:.1}"), "below"));
                assert!(true_value < limit, "{c:?}");
                assert_eq!(format!("{:.2}", generated(lake, season, visit, 0)), c[10]);
            }
            "secchi_m" => {
                assert_eq!(Some(limit), depth(lake), "{c:?}");
                assert_eq!((&c[6], &c[8]), (&*format!("{limit:.2}"), "above"));
                assert!(demo_feed::BOTTOM_FLAGS.contains(&&c[7]), "{c:?}");
                assert!(true_value > limit, "{c:?}");
                assert_eq!(format!("{:.2}", generated(lake, season, visit, 1)), c[10]);
            }
            other => panic!("censored column {other}"),
        }
        listed.insert((c[0].to_string(), c[1].to_string(), c[5].to_string()));
    }

    let defects: BTreeSet<(String, String, String)> = table(&file("truth/defects.csv"))
        .1
        .iter()
        .map(|d| (d[0].to_string(), d[1].to_string(), d[5].to_string()))
        .collect();
    let (mut chl_results, mut chl_below, mut early, mut early_below) = (0, 0, 0, 0);
    let (mut numeric_remarks, mut text_remarks) = (0, 0);
    for season in demo_feed::FIRST_SEASON..=demo_feed::LAST_SEASON {
        let path = format!("seasons/{season}.csv");
        let (header, rows) = table(&file(&path));
        let col = |name: &str| header.iter().position(|h| h == name).unwrap();
        for (k, row) in rows.iter().enumerate() {
            let line = (k + 2).to_string();
            let key = |c: &str| (path.clone(), line.clone(), c.to_string());
            let s: i32 = row[1].parse().unwrap();
            let chl = &row[col("chl_ug_l")];
            if !defects.contains(&key("chl_ug_l")) {
                chl_results += 1;
                if s <= 2015 {
                    early += 1;
                }
                if chl.starts_with('<') {
                    assert!(listed.contains(&key("chl_ug_l")), "{path}:{line}");
                    chl_below += 1;
                    if s <= 2015 {
                        early_below += 1;
                    }
                } else {
                    let v: f64 = chl.parse().unwrap();
                    assert!(v >= demo_feed::chl_reporting_limit(s), "{path}:{line} {v}");
                }
            }
            let flag = &row[col("secchi_flag")];
            if !flag.is_empty() {
                assert!(listed.contains(&key("secchi_m")), "{path}:{line}");
            } else if let (Some(d), false) = (depth(&row[0]), defects.contains(&key("secchi_m"))) {
                let v: f64 = row[col("secchi_m")].parse().unwrap();
                assert!(
                    v <= d,
                    "{path}:{line}: {v} m at a lake {d} m deep, not flagged"
                );
            }
            let remark = &row[col("remarks")];
            if remark.parse::<f64>().is_ok() {
                numeric_remarks += 1;
            } else if !remark.is_empty() {
                text_remarks += 1;
            }
        }
    }
    // Moderate overall, concentrated in the older method's seasons.
    let share = chl_below as f64 / chl_results as f64;
    assert!(
        (0.05..=0.15).contains(&share),
        "{chl_below} of {chl_results}"
    );
    assert!(early_below as f64 / early as f64 > 2.0 * share);
    let flagged = censored.iter().filter(|c| &c[5] == "secchi_m").count();
    assert!(flagged >= 10, "{flagged} Secchi depths on the bottom");
    assert!(numeric_remarks >= 10 && text_remarks >= 100);
}

#[test]
fn reml_on_the_generated_data_recovers_the_true_parameters() {
    let spec = demo_feed::spec(SEED);
    let (visits, _) = simulate_survey(&spec);
    for (k, r) in spec.responses.iter().enumerate() {
        let data = survey_data(&spec, &visits, k).unwrap();
        let fit = fit_point(&data, Method::Reml).unwrap();
        // Wide bands for 41 lakes, 16 seasons and 6 crews; the residual has ~700 visits.
        let mut checks = vec![
            ("residual", r.sd_residual, 0.85, 1.15),
            ("site", r.sd_site, 0.6, 1.5),
            ("year", r.sd_year, 0.6, 1.5),
        ];
        if r.sd_group > 0.0 {
            checks.push(("group", r.sd_group, 0.25, 3.0));
        }
        for (term, truth, lo, hi) in checks {
            let got = fit.sd_of(term).unwrap();
            assert!(
                got > lo * truth && got < hi * truth,
                "response {k} {term}: REML {got:.3}, true {truth}"
            );
        }
        for (c, truth) in fit.coef.iter().zip([r.intercept, r.coef]) {
            assert!(
                (c.estimate - truth).abs() < 3.0 * c.se,
                "response {k} {}: {} ± {}, true {truth}",
                c.name,
                c.estimate,
                c.se
            );
        }
    }
}

#[test]
fn splicing_refuses_a_readme_without_or_with_doubled_markers() {
    let sections = vec![("rows".to_string(), "new\n".to_string())];
    let ok = "a\n<!-- generated: rows -->\nold\n<!-- end generated: rows -->\nb\n";
    assert_eq!(
        splice_readme(ok, &sections).unwrap(),
        "a\n<!-- generated: rows -->\nnew\n<!-- end generated: rows -->\nb\n"
    );
    assert!(splice_readme("a\nb\n", &sections).is_err());
    let twice = format!("{ok}{ok}");
    assert!(splice_readme(&twice, &sections).is_err());
}
