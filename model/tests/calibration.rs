//! Forecast calibration by target (see `tidemark_model::calibration`): generated networks with
//! a site-dominated, a year-dominated and a balanced partition of the same total variance;
//! the empirical coverage of each target's 50/80/95% intervals next to the coverage the
//! true generating model reaches on the same held-out values. Also the partition
//! demonstration: the width ordering of next-year-at-a-known-site versus
//! a-new-site-this-year flips with the partition.
//!
//! Both bound coverage and widths on both sides (too narrow and too wide fail; see
//! `check`). Fast subset in the default suite; the full study on request:
//! `cargo test -p tidemark-model --release --test calibration -- --ignored --nocapture`
//! (`TIDEMARK_CALIBRATION_REPLICATES`, default 40 per partition; writes
//! `target/calibration/coverage.md` or `$TIDEMARK_REPORT_DIR/coverage.md`).

use rayon::prelude::*;
use tidemark_model::calibration::{
    calibration_replicate, CalibrationSpec, Coverage, LEVELS, TARGETS,
};

/// Same total variance (0.3^2 + 0.8^2 + 0.2^2 = 0.77), opposite partitions, and balanced.
fn partitions() -> Vec<(&'static str, f64, f64)> {
    let balanced = ((0.8f64.powi(2) + 0.2f64.powi(2)) / 2.0).sqrt();
    vec![
        ("site-dominated", 0.8, 0.2),
        ("year-dominated", 0.2, 0.8),
        ("balanced", balanced, balanced),
    ]
}

fn study(
    name: &str,
    sd_site: f64,
    sd_year: f64,
    sites: usize,
    years: usize,
    replicates: u64,
    seed: u64,
) -> [Coverage; 4] {
    let spec = CalibrationSpec {
        sites,
        years,
        sd_site,
        sd_year,
        ..CalibrationSpec::default()
    };
    let runs: Vec<[Coverage; 4]> = (0..replicates)
        .into_par_iter()
        .map(|r| calibration_replicate(&spec, seed + r).unwrap_or_else(|e| panic!("{name}: {e}")))
        .collect();
    let mut total: [Coverage; 4] = Default::default();
    for run in &runs {
        for (t, c) in run.iter().enumerate() {
            total[t].add(c);
        }
    }
    total
}

fn table(name: &str, total: &[Coverage; 4]) -> String {
    let mut out = format!("{name}\n| target | n | 50% fit / truth | 80% fit / truth | 95% fit / truth | mean 80% width | width / truth's |\n|---|---|---|---|---|---|---|\n");
    for (t, c) in total.iter().enumerate() {
        let cells: Vec<String> = (0..3)
            .map(|l| {
                let (f, tr) = c.rate(l);
                format!("{:.3} / {:.3}", f, tr)
            })
            .collect();
        out.push_str(&format!(
            "| {} | {} | {} | {} | {} | {:.3} | {:.3} |\n",
            TARGETS[t].as_str(),
            c.n,
            cells[0],
            cells[1],
            cells[2],
            c.width80 / c.n.max(1) as f64,
            c.width_ratio()
        ));
    }
    out
}

fn width(c: &Coverage) -> f64 {
    c.width80 / c.n.max(1) as f64
}

/// Two-sided bounds of a study: intervals may be neither clearly too narrow nor clearly
/// too wide.
struct Bounds {
    /// Every target and level: fitted coverage at least the true model's minus this.
    below_truth: f64,
    /// Known-year targets, every level: |fitted - true model's coverage| at most this.
    known_year_vs_truth: f64,
    /// New-year targets, every level: fitted coverage at most the true model's plus this.
    new_year_above_truth: f64,
    /// Mean 80% width over the true model's, known-year targets.
    known_year_width: (f64, f64),
    /// The same, new-year targets.
    new_year_width: (f64, f64),
}

/// Coverage is compared with the true model's on the same held-out values (paired, so
/// the realised year effects of a replicate cancel); widths as the ratio of the fitted
/// 80% width to the true model's. Why the ratio exceeds 1: the fit does not know the
/// parameters. A known-year target adds only the posterior variance of the known site
/// and year effects (about `sd_residual^2 / visits` each: ratio 1.03-1.05). A new-year
/// target also integrates over the posterior of `sd_year` from `k` fitted years, which
/// inflates the predictive variance of a new year effect by about `(k - 1) / (k - 3)`
/// (the scaled inverse-chi-square posterior mean): a width ratio up to
/// `sqrt(6 / 4) = 1.22` for 7 years and `sqrt(8 / 6) = 1.15` for 9 when the year
/// dominates.
fn check(name: &str, total: &[Coverage; 4], b: &Bounds, report: &str) {
    for (t, c) in total.iter().enumerate() {
        let target = TARGETS[t].as_str();
        assert!(c.n >= 40, "{name}: too few held-out values for {target}");
        let known_year = t == 0 || t == 2;
        for (l, level) in LEVELS.iter().enumerate() {
            let (fit, truth) = c.rate(l);
            let at = format!("{name} {target} at {level}: fit {fit:.3} vs truth {truth:.3}");
            assert!(fit > truth - b.below_truth, "{at}: too narrow\n{report}");
            if known_year {
                assert!(
                    (fit - truth).abs() <= b.known_year_vs_truth,
                    "{at}\n{report}"
                );
            } else {
                assert!(
                    fit <= truth + b.new_year_above_truth,
                    "{at}: too wide\n{report}"
                );
            }
        }
        let (lo, hi) = if known_year {
            b.known_year_width
        } else {
            b.new_year_width
        };
        let ratio = c.width_ratio();
        assert!(
            (lo..=hi).contains(&ratio),
            "{name} {target}: 80% width {ratio:.3} x the true model's, outside {lo}..={hi}\n{report}"
        );
    }
}

/// Fast subset: every partition, a few replicates (40 sites x 8 years, 7 fitted). Coverage
/// and widths are bounded on both sides against the true model's on the same values, and
/// the width ordering flips between the opposite partitions.
#[test]
fn forecasts_cover_like_the_true_model_and_the_partition_flips_the_widths() {
    let mut report = String::new();
    let mut widths = Vec::new();
    // Six replicates of one realised year each: the new-year coverage difference is
    // noisy (seen up to +0.16), so the widths carry the too-wide check for those targets.
    let bounds = Bounds {
        below_truth: 0.08,
        known_year_vs_truth: 0.08,
        new_year_above_truth: 0.25,
        known_year_width: (0.98, 1.12),
        new_year_width: (1.0, 1.35),
    };
    for (name, sd_site, sd_year) in partitions() {
        let total = study(name, sd_site, sd_year, 40, 8, 6, 100);
        report.push_str(&table(name, &total));
        check(name, &total, &bounds, &report);
        // Known-year targets have many nearly independent held-out values: their 80%
        // coverage must be near nominal.
        for t in [0, 2] {
            let (fit, _) = total[t].rate(1);
            assert!(
                (fit - 0.8).abs() < 0.08,
                "{name} {} 80% coverage {fit:.3}\n{report}",
                TARGETS[t].as_str()
            );
        }
        widths.push((width(&total[1]), width(&total[2])));
    }
    // known_site_new_year vs new_site_known_year
    let (site_dom, year_dom) = (widths[0], widths[1]);
    assert!(
        site_dom.0 < site_dom.1,
        "site-dominated: next year at a known site must be narrower\n{report}"
    );
    assert!(
        year_dom.0 > year_dom.1,
        "year-dominated: a new site this year must be narrower\n{report}"
    );
}

#[test]
#[ignore = "full calibration study: run on request"]
fn calibration_full_study() {
    let replicates = std::env::var("TIDEMARK_CALIBRATION_REPLICATES")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(40);
    let mut report = format!("# Forecast calibration ({replicates} replicates per partition, 60 sites x 10 years x 2 visits)\n\n");
    let mut totals = Vec::new();
    for (name, sd_site, sd_year) in partitions() {
        let total = study(name, sd_site, sd_year, 60, 10, replicates, 10_000);
        report.push_str(&table(
            &format!("## {name} (sd site {sd_site:.3}, sd year {sd_year:.3}, sd residual 0.3)\n"),
            &total,
        ));
        report.push('\n');
        totals.push((name, total));
    }
    let write_report = |report: &str| {
        let dir = std::env::var("TIDEMARK_REPORT_DIR")
            .unwrap_or_else(|_| format!("{}/../target/calibration", env!("CARGO_MANIFEST_DIR")));
        std::fs::create_dir_all(&dir).unwrap();
        std::fs::write(format!("{dir}/coverage.md"), report).unwrap();
        println!("{report}");
    };
    write_report(&report);
    // Thousands of held-out values per target (9 fitted years): tighter on both sides.
    // Seen with 40 replicates: known-year differences within 0.025, new-year ones
    // 0.01-0.05, width ratios 1.03-1.05 and 1.06-1.16.
    let scale = (40.0 / replicates.max(1) as f64).sqrt();
    let bounds = Bounds {
        below_truth: 0.03 * scale,
        known_year_vs_truth: 0.03 * scale,
        new_year_above_truth: 0.07 * scale,
        known_year_width: (1.0, 1.08),
        new_year_width: (1.02, 1.25),
    };
    for (name, total) in &totals {
        check(name, total, &bounds, &report);
    }
    let (site_dom, year_dom) = (&totals[0].1, &totals[1].1);
    assert!(width(&site_dom[1]) < width(&site_dom[2]), "{report}");
    assert!(width(&year_dom[1]) > width(&year_dom[2]), "{report}");
}
