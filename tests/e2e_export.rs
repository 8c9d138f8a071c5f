//! End-to-end: `tidemark export` of each kind in each format, through the real binary on a
//! small generated network with two series and two published versions each; every file
//! is read back (Parquet and Arrow with the Arrow project's crates, CSV with the csv
//! crate) and compared value by value with the rows read by SQL.

mod common;

use std::io::Read as _;
use std::process::{Command, Stdio};
use std::sync::Arc;

use arrow_array::{
    Array, BooleanArray, Float64Array, Int64Array, ListArray, RecordBatch, StringArray, UInt32Array,
};
use arrow_schema::DataType;
use common::{Network, Value};
use tidemark_model::simulate::{simulate_rows, NetworkSpec};

const CONFIG: &str = r#"
[store]
database = "tidemark.db"

[feed]
inbox = "inbox"
archive = "archive"
quarantine = "quarantine"

[[series]]
name = "nitrogen"
response = "tn_mg_l"
transform = "log"
site = "lake"
year = "season"
visit = "visit"

[series.sampler]
chains = 2
draws = 300
warmup = 200
seed = 8
max_rhat = 1.1
min_ess = 50

[[series]]
name = "phosphorus"
response = "tp_ug_l"
site = "lake"
year = "season"
visit = "visit"

[series.sampler]
chains = 2
draws = 300
warmup = 200
seed = 9
max_rhat = 1.1
min_ess = 50
"#;

/// Invented test data: one generated network; phosphorus is the simulated value, nitrogen
/// its exponential over ten (positive, for the log series). One site code has a comma and
/// a quote, to exercise CSV quoting.
fn feed(years: std::ops::Range<i32>) -> String {
    let spec = NetworkSpec {
        sites: 12,
        years: 7,
        visits: 2,
        missing: 0.1,
        covariates: 0,
        sd_residual: 0.3,
        sd_site: 0.5,
        sd_year: 0.3,
        intercept: 3.0,
        coef: 0.0,
        first_year: 2015,
        seed: 41,
    };
    let (rows, _) = simulate_rows(&spec);
    let mut out = String::from("lake,season,visit,tp_ug_l,tn_mg_l\n");
    let mut visit = std::collections::HashMap::new();
    for r in rows.iter().filter(|r| years.contains(&r.year)) {
        let v = visit.entry((r.site, r.year)).or_insert(0);
        *v += 1;
        let lake = if r.site == 4 {
            "\"Lake \"\"4\"\", north, basin\"".to_string()
        } else {
            format!("Lake {:02}", r.site)
        };
        out.push_str(&format!(
            "{lake},{},{v},{:.4},{:.5}\n",
            r.year,
            r.y,
            r.y.exp() / 10.0
        ));
    }
    out
}

fn network() -> Network {
    let net = Network::with_config(CONFIG);
    net.ok(&["init"]);
    net.drop_file("a.csv", feed(2015..2021));
    net.ok(&["run-once"]);
    net.drop_file("b.csv", feed(2021..2022));
    net.ok(&["run-once"]);
    assert_eq!(
        net.scalar("SELECT COUNT(*) FROM fits WHERE status = 'published'")
            .int(),
        4,
        "two published versions of each series"
    );
    net
}

/// The export's columns and the SQL that gives the same rows in the same order.
fn expected_sql(what: &str, series: Option<&str>) -> (Vec<&'static str>, String) {
    let filter = |col: &str| {
        series
            .map(|s| format!("WHERE {col} = '{s}'"))
            .unwrap_or_default()
    };
    match what {
        "forecasts" => {
            let cols = vec![
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
            ];
            let sql = format!(
                "SELECT {} FROM latest_forecasts {} ORDER BY series, target, site, year, scenario",
                cols.join(", "),
                filter("series")
            );
            (cols, sql)
        }
        "posterior" => {
            let cols = vec![
                "series",
                "version",
                "fit_id",
                "data_through_year",
                "kind",
                "term",
                "level",
                "mean",
                "sd",
                "q05",
                "q25",
                "q50",
                "q75",
                "q95",
                "rhat",
                "ess_bulk",
                "ess_tail",
            ];
            let sql = format!(
                "SELECT lf.series, lf.version, lf.fit_id, lf.data_through_year, p.kind, p.term, \
                 p.level, p.mean, p.sd, p.q05, p.q25, p.q50, p.q75, p.q95, p.rhat, p.ess_bulk, \
                 p.ess_tail FROM latest_fits lf JOIN posterior_summary p ON p.fit_id = lf.fit_id \
                 {} ORDER BY lf.series, p.kind, p.term, p.level",
                filter("lf.series")
            );
            (cols, sql)
        }
        "drift" => {
            let cols = vec![
                "series",
                "version",
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
            ];
            let sql = format!(
                "SELECT {} FROM variance_drift {} ORDER BY series, version, kind, term",
                cols.join(", "),
                filter("series")
            );
            (cols, sql)
        }
        other => panic!("no SQL for {other}"),
    }
}

/// The draws of a version in long form, decoded here from the stored Arrow file itself.
fn expected_draws(net: &Network, series: &str, version: i64) -> Vec<Vec<Value>> {
    let row = net.sql(&format!(
        "SELECT f.fit_id, d.blob FROM fits f JOIN fit_draws d ON d.fit_id = f.fit_id \
         WHERE f.series = '{series}' AND f.version = {version} AND f.status = 'published'"
    ));
    let fit_id = row[0][0].int();
    let Value::Blob(blob) = &row[0][1] else {
        panic!("no blob")
    };
    let reader = arrow_ipc::reader::FileReader::try_new(std::io::Cursor::new(blob), None).unwrap();
    let mut out = Vec::new();
    for batch in reader {
        let b = batch.unwrap();
        let s = |i: usize| b.column(i).as_any().downcast_ref::<StringArray>().unwrap();
        let u = |i: usize| b.column(i).as_any().downcast_ref::<UInt32Array>().unwrap();
        let lists = b.column(5).as_any().downcast_ref::<ListArray>().unwrap();
        for r in 0..b.num_rows() {
            let per = u(4).value(r) as usize;
            let values = lists.value(r);
            let values = values.as_any().downcast_ref::<Float64Array>().unwrap();
            assert_eq!(values.len(), u(3).value(r) as usize * per);
            for i in 0..values.len() {
                out.push(vec![
                    Value::Text(series.into()),
                    Value::Int(version),
                    Value::Int(fit_id),
                    Value::Text(s(0).value(r).into()),
                    Value::Text(s(1).value(r).into()),
                    if s(2).is_null(r) {
                        Value::Null
                    } else {
                        Value::Text(s(2).value(r).into())
                    },
                    Value::Int((i / per) as i64),
                    Value::Int((i % per) as i64),
                    Value::Real(values.value(i)),
                ]);
            }
        }
    }
    out
}

const DRAWS_COLUMNS: [&str; 9] = [
    "series", "version", "fit_id", "kind", "term", "level", "chain", "draw", "value",
];

/// Rows of record batches as SQL-like values (booleans as 0/1, like SQLite's).
fn batch_rows(batches: &[RecordBatch]) -> (Vec<String>, Vec<Vec<Value>>) {
    let names = batches[0]
        .schema()
        .fields()
        .iter()
        .map(|f| f.name().clone())
        .collect();
    let mut rows = Vec::new();
    for b in batches {
        for r in 0..b.num_rows() {
            let row = b
                .columns()
                .iter()
                .map(|c| cell(c, r))
                .collect::<Vec<Value>>();
            rows.push(row);
        }
    }
    (names, rows)
}

fn cell(c: &Arc<dyn Array>, r: usize) -> Value {
    if c.is_null(r) {
        return Value::Null;
    }
    let any = c.as_any();
    match c.data_type() {
        DataType::Utf8 => Value::Text(
            any.downcast_ref::<StringArray>()
                .unwrap()
                .value(r)
                .to_string(),
        ),
        DataType::Int64 => Value::Int(any.downcast_ref::<Int64Array>().unwrap().value(r)),
        DataType::UInt32 => Value::Int(i64::from(
            any.downcast_ref::<UInt32Array>().unwrap().value(r),
        )),
        DataType::Float64 => Value::Real(any.downcast_ref::<Float64Array>().unwrap().value(r)),
        DataType::Boolean => Value::Int(i64::from(
            any.downcast_ref::<BooleanArray>().unwrap().value(r),
        )),
        other => panic!("unexpected column type {other}"),
    }
}

fn read_parquet(path: &std::path::Path) -> (Vec<String>, Vec<Vec<Value>>) {
    let file = std::fs::File::open(path).unwrap();
    let reader = parquet::arrow::arrow_reader::ParquetRecordBatchReaderBuilder::try_new(file)
        .unwrap()
        .build()
        .unwrap();
    let batches: Vec<RecordBatch> = reader.map(|b| b.unwrap()).collect();
    batch_rows(&batches)
}

fn read_arrow(path: &std::path::Path) -> (Vec<String>, Vec<Vec<Value>>) {
    let file = std::fs::File::open(path).unwrap();
    let reader = arrow_ipc::reader::FileReader::try_new(file, None).unwrap();
    let batches: Vec<RecordBatch> = reader.map(|b| b.unwrap()).collect();
    batch_rows(&batches)
}

/// CSV cells typed like the expected row: empty = NULL, numbers parsed (exactly), booleans
/// as 0/1.
fn read_csv(bytes: &[u8], like: &[Vec<Value>]) -> (Vec<String>, Vec<Vec<Value>>) {
    let mut reader = csv::Reader::from_reader(bytes);
    let names = reader
        .headers()
        .unwrap()
        .iter()
        .map(str::to_string)
        .collect();
    let mut rows = Vec::new();
    for (i, rec) in reader.records().enumerate() {
        let rec = rec.unwrap();
        let typed = rec
            .iter()
            .enumerate()
            .map(|(j, text)| {
                let kind = like.get(i).map(|r| &r[j]);
                match (text, kind) {
                    ("", _) => Value::Null,
                    ("true", Some(Value::Int(_))) => Value::Int(1),
                    ("false", Some(Value::Int(_))) => Value::Int(0),
                    (t, Some(Value::Int(_))) => Value::Int(t.parse().unwrap()),
                    (t, Some(Value::Real(_))) => Value::Real(t.parse().unwrap()),
                    (t, _) => Value::Text(t.to_string()),
                }
            })
            .collect();
        rows.push(typed);
    }
    (names, rows)
}

/// Equal value by value; reals bit for bit.
fn assert_same(what: &str, got: &[Vec<Value>], want: &[Vec<Value>]) {
    assert_eq!(got.len(), want.len(), "{what}: row count");
    for (i, (g, w)) in got.iter().zip(want).enumerate() {
        assert_eq!(g.len(), w.len(), "{what}: row {i} width");
        for (j, (a, b)) in g.iter().zip(w).enumerate() {
            let same = match (a, b) {
                (Value::Real(x), Value::Real(y)) => x.to_bits() == y.to_bits(),
                (a, b) => a == b,
            };
            assert!(
                same,
                "{what}: row {i} column {j}: exported {a:?}, stored {b:?}"
            );
        }
    }
}

fn export_and_compare(
    net: &Network,
    what: &str,
    args: &[&str],
    columns: &[&str],
    want: &[Vec<Value>],
) {
    assert!(!want.is_empty(), "{what}: nothing to compare");
    for format in ["csv", "parquet", "arrow"] {
        let out = net.path(&format!("exports/{what}.{format}"));
        let mut full = vec!["export", what, "--format", format, "--out"];
        full.push(out.to_str().unwrap());
        full.extend_from_slice(args);
        let stdout = net.ok(&full);
        assert!(
            stdout.contains(&format!("({} rows,", want.len())),
            "{stdout}"
        );
        let (names, got) = match format {
            "csv" => read_csv(&std::fs::read(&out).unwrap(), want),
            "parquet" => read_parquet(&out),
            _ => read_arrow(&out),
        };
        assert_eq!(names, columns, "{what} {format}: columns");
        assert_same(&format!("{what} {format}"), &got, want);
    }
}

#[test]
fn every_export_in_every_format_reads_back_as_the_stored_rows() {
    let net = network();
    std::fs::create_dir_all(net.path("exports")).unwrap();
    for what in ["forecasts", "posterior", "drift"] {
        let (cols, sql) = expected_sql(what, None);
        let want = net.sql(&sql);
        export_and_compare(&net, what, &[], &cols, &want);
    }
    // Drift compares each version with the one before: version 2 has previous medians.
    let drift = net.sql(&expected_sql("drift", None).1);
    assert!(drift.iter().any(|r| !r[7].is_null()) && drift.iter().any(|r| r[7].is_null()));
    // The log series' forecasts are on the response scale and the site code with a comma
    // and quotes survives CSV quoting.
    let forecasts = net.sql(&expected_sql("forecasts", None).1);
    assert!(forecasts
        .iter()
        .any(|r| r[3] == Value::Text("Lake \"4\", north, basin".into())));

    let draws = expected_draws(&net, "phosphorus", 1);
    export_and_compare(
        &net,
        "draws",
        &["--series", "phosphorus", "--version", "1"],
        &DRAWS_COLUMNS,
        &draws,
    );
    // Two chains of 300 draws for each sd.
    let sd_site: Vec<_> = draws
        .iter()
        .filter(|r| r[3] == Value::Text("sd".into()) && r[4] == Value::Text("site".into()))
        .collect();
    assert_eq!(sd_site.len(), 600);
    assert_eq!(sd_site[599][6], Value::Int(1));
    assert_eq!(sd_site[599][7], Value::Int(299));

    // Nothing but the exports is left in the folder: each was written atomically.
    let mut left: Vec<String> = net.files_in("exports");
    left.sort();
    assert_eq!(left.len(), 12, "{left:?}");
    assert!(left.iter().all(|n| !n.starts_with('.')), "{left:?}");
}

#[test]
fn filters_select_rows_and_bad_choices_are_refused() {
    let net = network();
    // --series and --target select, in every format.
    let (cols, sql) = expected_sql("posterior", Some("nitrogen"));
    let want = net.sql(&sql);
    assert!(want.iter().all(|r| r[0] == Value::Text("nitrogen".into())));
    std::fs::create_dir_all(net.path("exports")).unwrap();
    export_and_compare(&net, "posterior", &["--series", "nitrogen"], &cols, &want);
    let (cols, _) = expected_sql("forecasts", None);
    let want = net.sql(
        "SELECT * FROM latest_forecasts WHERE series = 'phosphorus' \
         AND target = 'known_site_new_year' ORDER BY series, target, site, year, scenario",
    );
    assert!(!want.is_empty());
    let csv = net.ok(&[
        "export",
        "forecasts",
        "--series",
        "phosphorus",
        "--target",
        "known_site_new_year",
    ]);
    let (names, got) = read_csv(csv.as_bytes(), &want);
    assert_eq!(names, cols);
    assert_same("forecasts filtered", &got, &want);
    // stdout and --out - write the same bytes as a file.
    let dash = net.ok(&["export", "drift", "--out", "-"]);
    let file = net.path("exports/d.csv");
    net.ok(&["export", "drift", "--out", file.to_str().unwrap()]);
    assert_eq!(dash, std::fs::read_to_string(&file).unwrap());

    let refused = |args: &[&str], needle: &str| {
        let out = net.tidemark(args);
        assert_eq!(out.status.code(), Some(1), "{args:?}");
        let stderr = String::from_utf8_lossy(&out.stderr);
        assert!(stderr.contains(needle), "{args:?}: {stderr}");
        assert!(!stderr.contains("panicked"), "{stderr}");
    };
    let unknown = net.tidemark(&["export", "drift", "--series", "chlorophyll"]);
    let stderr = String::from_utf8_lossy(&unknown.stderr);
    assert!(
        stderr.contains("no series named \"chlorophyll\"")
            && stderr.contains("nitrogen, phosphorus"),
        "{stderr}"
    );
    refused(
        &["export", "forecasts", "--target", "next_decade"],
        "known_site_new_year",
    );
    refused(
        &["export", "drift", "--target", "known_site_new_year"],
        "--target applies to `export forecasts` only",
    );
    refused(&["export", "draws", "--series", "phosphorus"], "--version");
    refused(
        &[
            "export",
            "draws",
            "--series",
            "phosphorus",
            "--version",
            "7",
        ],
        "published versions: 1, 2",
    );
    refused(
        &["export", "drift", "--out", "no/such/folder/d.csv"],
        "cannot write the export",
    );
    let usage = net.tidemark(&["export", "everything"]);
    assert_eq!(usage.status.code(), Some(2));
    let help = net.ok(&["export", "--help"]);
    assert!(help.contains("latest_forecasts") && help.contains("variance_drift"));
}

#[test]
fn a_reader_that_stops_early_is_not_an_error() {
    let net = network();
    for format in ["csv", "arrow", "parquet"] {
        let mut child = Command::new(env!("CARGO_BIN_EXE_tidemark"))
            .arg("--config")
            .arg(net.config_path())
            .args(["export", "draws", "--series", "nitrogen", "--version", "2"])
            .args(["--format", format])
            .stdin(Stdio::null())
            .stdout(Stdio::piped())
            .stderr(Stdio::piped())
            .spawn()
            .unwrap();
        let mut head = [0u8; 16];
        child.stdout.take().unwrap().read_exact(&mut head).unwrap();
        // The pipe's reading end is closed here, long before the export is written.
        let out = child.wait_with_output().unwrap();
        let stderr = String::from_utf8_lossy(&out.stderr);
        assert!(!stderr.contains("panicked"), "{format}: {stderr}");
        use std::os::unix::process::ExitStatusExt as _;
        assert!(
            out.status.code() == Some(0) || out.status.signal() == Some(libc_sigpipe()),
            "{format}: {:?} {stderr}",
            out.status
        );
        if format == "arrow" {
            assert_eq!(&head[..6], b"ARROW1");
        }
    }
}

/// SIGPIPE's number on Linux (exit status 141 in a shell = 128 + 13).
fn libc_sigpipe() -> i32 {
    13
}
