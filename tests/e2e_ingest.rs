//! Feed ingest end to end: the real binary, real feed files, a real SQLite file.

mod common;

use std::sync::Arc;

use arrow_array::{ArrayRef, Float64Array, Int32Array, RecordBatch, StringArray};
use arrow_schema::{DataType, Field, Schema};
use common::{line_for, Network, Value};

const HEADER: &str = "lake,season,visit,chl_ug_l,tp_ug_l,surface_temp_c,crew";

#[test]
fn good_values_are_kept_and_every_bad_one_has_its_reason() {
    let net = Network::initialised();
    // A byte-order mark and CRLF line ends, as spreadsheet exports write them.
    let rows = [
        HEADER,
        "L1,2020,1,3.2,12,18.5,A",  // line 2 (chl conflicts with line 8)
        "L2,2020,1,abc,15,,B",      // line 3: chl not a number
        ",2020,1,2.0,,,",           // line 4: no site
        "L3,20x0,1,1.0,2.0,,C",     // line 5: bad year
        "L4,2021,1,NaN,1e400,-3,D", // line 6: NaN, overflow; -3 kept
        "L5,2021,1,1,2",            // line 7: too few fields
        "L1,2020,1,3.3,12,18.5,A",  // line 8: conflict on chl, identical tp/temp/crew
        "L6,1700,1,0,,,",           // line 9: year out of range
        "L7,2021,1,0,-1,,",         // line 10: zero and negative are accepted here
    ];
    let text = format!("\u{feff}{}\r\n", rows.join("\r\n"));
    net.drop_file("2021-spring.csv", text);
    let out = net.ok(&["ingest"]);
    let line = line_for(&out, "2021-spring.csv");
    assert!(line.contains("9 values accepted"), "{line}");
    // The three most frequent kinds with their counts; the five single ones are summed.
    assert!(
        line.ends_with(
            ", 15 rejected (5 wrong number of fields, 3 year not an integer, \
             2 conflicting values in the file, 5 other)"
        ),
        "{line}"
    );

    let batch = &net.sql(
        "SELECT status, rows_read, values_accepted, values_rejected, source FROM ingest_batches",
    )[0];
    assert_eq!(batch[0], Value::Text("ingested".into()));
    assert_eq!(batch[1].int(), 9);
    assert_eq!(batch[2].int(), 9);
    assert_eq!(batch[3].int(), 15);
    assert_eq!(batch[4].text(), "2021-spring.csv");

    let kept = net.sqlite3(
        "SELECT site, year, column_name, COALESCE(num_value, text_value) FROM current_observations
         ORDER BY site, column_name",
    );
    assert_eq!(
        kept,
        "L1|2020|crew|A\nL1|2020|surface_temp_c|18.5\nL1|2020|tp_ug_l|12.0\n\
         L2|2020|crew|B\nL2|2020|tp_ug_l|15.0\n\
         L4|2021|crew|D\nL4|2021|surface_temp_c|-3.0\n\
         L7|2021|chl_ug_l|0.0\nL7|2021|tp_ug_l|-1.0\n"
    );

    let rejected = net.sql(
        "SELECT line, column_name, raw_value, reason FROM rejections ORDER BY line, column_name",
    );
    assert_eq!(rejected.len(), 15);
    let find = |line: i64, col: Option<&str>| -> (Value, String) {
        let r = rejected
            .iter()
            .find(|r| {
                r[0].int() == line
                    && match col {
                        Some(c) => r[1] == Value::Text(c.into()),
                        None => r[1].is_null(),
                    }
            })
            .unwrap_or_else(|| panic!("no rejection at line {line} column {col:?}: {rejected:?}"));
        (r[2].clone(), r[3].text().to_string())
    };
    let (raw, reason) = find(3, Some("chl_ug_l"));
    assert_eq!(raw, Value::Text("abc".into()));
    assert!(reason.contains("not a number"), "{reason}");
    assert!(find(4, Some("chl_ug_l")).1.contains("no site"));
    for col in ["chl_ug_l", "tp_ug_l", "crew"] {
        assert!(find(5, Some(col)).1.contains("20x0"));
    }
    assert!(find(6, Some("chl_ug_l")).1.contains("NaN"));
    assert!(find(6, Some("tp_ug_l")).1.contains("overflows"));
    for col in ["lake", "season", "visit", "chl_ug_l", "tp_ug_l"] {
        assert!(find(7, Some(col))
            .1
            .contains("5 fields but the header has 7"));
    }
    let (raw2, conflict2) = find(2, Some("chl_ug_l"));
    let (raw8, conflict8) = find(8, Some("chl_ug_l"));
    assert_eq!(raw2, Value::Text("3.2".into()));
    assert_eq!(raw8, Value::Text("3.3".into()));
    assert!(conflict2.contains("conflicting") && conflict2.contains("lines 2, 8"));
    assert_eq!(conflict2, conflict8);
    assert!(find(9, Some("chl_ug_l")).1.contains("outside 1800..=2200"));

    // The file left the inbox for the archive, after its batch committed.
    assert!(net.files_in("inbox").is_empty());
    assert_eq!(net.files_in("archive"), ["2021-spring.csv"]);
}

/// The file's line names its most frequent kinds of rejection, each with its count, in
/// `ingest` and in a scheduled run alike; a file without rejections says only "0 rejected".
#[test]
fn the_file_line_counts_rejections_by_kind() {
    let net = Network::initialised();
    let rows = [
        HEADER,
        "L1,2020,1,x,y,z,A",      // 3 not a number
        "L2,1700,1,1,2,,B",       // 3 year outside the range (chl, tp, crew)
        "L3,2020,1,NaN,,,C",      // 1 NaN
        "L4,2021,1,1.5,2.5,10,D", // all kept
        "L5,2021,1,,nope,,E",     // 1 more not a number
    ];
    net.drop_file("kinds.csv", format!("{}\n", rows.join("\n")));
    net.drop_file("clean.csv", format!("{HEADER}\nL9,2022,1,1.0,2.0,3.0,F\n"));
    let out = net.ok(&["ingest"]);
    let kinds = line_for(&out, "kinds.csv");
    assert!(
        kinds.ends_with(", 8 rejected (4 not a number, 3 year outside 1800–2200, 1 NaN)"),
        "{kinds}"
    );
    assert!(
        line_for(&out, "clean.csv").ends_with(", 0 rejected"),
        "{out}"
    );
    // What is counted on the line is what is stored.
    assert_eq!(
        net.sqlite3("SELECT COUNT(*) FROM rejections WHERE reason LIKE '%is not a number'"),
        "4\n"
    );

    // A run prints (and logs) its files through the same line. The fit itself may fail
    // on so few values; only the file's line matters here.
    net.drop_file(
        "run.csv",
        format!("{HEADER}\nL1,2023,1,abc,,,A\nL2,3000,1,1.0,,,B\n"),
    );
    let run = net.tidemark(&["run-once"]);
    let run_out = String::from_utf8_lossy(&run.stdout);
    assert!(
        line_for(&run_out, "run.csv")
            .ends_with(", 3 rejected (2 year outside 1800–2200, 1 not a number)"),
        "{run_out}"
    );
}

#[test]
fn the_same_file_twice_changes_nothing() {
    let net = Network::initialised();
    let text = format!("{HEADER}\nL1,2020,1,3.2,12,18.5,A\nL2,2020,2,4.1,9,17,B\n");
    net.drop_file("a.csv", &text);
    net.ok(&["ingest"]);
    let before = net.sqlite3("SELECT * FROM observations ORDER BY value_id");
    net.drop_file("a-again.csv", &text);
    let out = net.ok(&["ingest"]);
    assert!(
        line_for(&out, "a-again.csv").contains("duplicate of batch 1"),
        "{out}"
    );
    assert_eq!(
        net.sqlite3("SELECT * FROM observations ORDER BY value_id"),
        before
    );
    assert_eq!(
        net.sqlite3(
            "SELECT batch_id, status, values_accepted, values_rejected, duplicate_of FROM ingest_batches ORDER BY batch_id"
        ),
        "1|ingested|8|0|\n2|duplicate|0|0|1\n"
    );
    // The same name again goes to the archive under a new name.
    net.drop_file("a.csv", &text);
    net.ok(&["ingest"]);
    assert_eq!(net.files_in("archive"), ["a-2.csv", "a-again.csv", "a.csv"]);
    assert_eq!(net.scalar("SELECT COUNT(*) FROM observations").int(), 8);
}

#[test]
fn a_correction_supersedes_and_keeps_history() {
    let net = Network::initialised();
    net.drop_file("01.csv", format!("{HEADER}\nL1,2020,1,3.2,12,18.5,A\n"));
    net.ok(&["ingest"]);
    let old_id = net
        .scalar("SELECT value_id FROM current_observations WHERE column_name = 'chl_ug_l'")
        .int();
    // Visit column left out: the default visit label "1" names the same visit.
    net.drop_file(
        "02.csv",
        "lake,season,chl_ug_l,tp_ug_l\nL1,2020,3.5,12\nL2,2020,1.0,\n",
    );
    let out = net.ok(&["ingest"]);
    assert!(
        line_for(&out, "02.csv").contains("3 values accepted (1 superseding, 1 unchanged)"),
        "{out}"
    );
    let history = net.sql(
        "SELECT value_id, num_value, superseded_by, batch_id FROM observations o
         WHERE column_name = 'chl_ug_l' AND site_id = (SELECT site_id FROM sites WHERE code = 'L1')
         ORDER BY value_id",
    );
    assert_eq!(history.len(), 2, "{history:?}");
    assert_eq!(history[0][0].int(), old_id);
    assert_eq!(history[0][1].real(), 3.2);
    assert_eq!(history[0][2].int(), history[1][0].int());
    assert_eq!(history[1][1].real(), 3.5);
    assert!(history[1][2].is_null());
    assert_eq!(history[1][3].int(), 2);
    assert_eq!(
        net.sqlite3("SELECT site, num_value FROM current_observations WHERE column_name = 'chl_ug_l' ORDER BY site"),
        "L1|3.5\nL2|1.0\n"
    );
    // The identical tp value made no new row.
    assert_eq!(
        net.scalar("SELECT COUNT(*) FROM observations WHERE column_name = 'tp_ug_l'")
            .int(),
        1
    );
}

#[test]
fn unreadable_files_are_quarantined_with_their_reason() {
    let net = Network::initialised();
    net.drop_file(
        "junk.csv",
        [0x89u8, b'P', b'N', b'G', 0, 0, 0, 13, 0xFF, 0x00],
    );
    net.drop_file(
        "latin1.csv",
        b"lake,season,chl_ug_l\nJ\xe4rvi,2020,1.0\n".as_slice(),
    );
    net.drop_file("noyear.csv", "lake,chl_ug_l\nL1,1.0\n");
    net.drop_file("empty.csv", "");
    net.drop_file("fake.arrow", b"ARROW1\0\0garbage".as_slice());
    net.drop_file("good.csv", format!("{HEADER}\nL1,2020,1,3.2,12,18.5,A\n"));
    let out = net.ok(&["ingest"]);
    for name in [
        "junk.csv",
        "latin1.csv",
        "noyear.csv",
        "empty.csv",
        "fake.arrow",
    ] {
        assert!(line_for(&out, name).contains("quarantined"), "{out}");
    }
    let reasons = net.sql(
        "SELECT source, message FROM ingest_batches WHERE status = 'quarantined' ORDER BY source",
    );
    let reason = |src: &str| -> String {
        reasons
            .iter()
            .find(|r| r[0].text() == src)
            .map(|r| r[1].text().to_string())
            .unwrap_or_else(|| panic!("{src} not quarantined: {reasons:?}"))
    };
    assert!(
        reason("junk.csv").contains("UTF-8"),
        "{}",
        reason("junk.csv")
    );
    assert!(reason("latin1.csv").contains("not UTF-8 text (first invalid byte on line 2)"));
    assert!(reason("noyear.csv").contains("no year column `season`"));
    assert!(reason("empty.csv").contains("empty"));
    assert!(reason("fake.arrow").contains("Arrow"));
    assert_eq!(
        net.files_in("quarantine"),
        [
            "empty.csv",
            "fake.arrow",
            "junk.csv",
            "latin1.csv",
            "noyear.csv"
        ]
    );
    assert_eq!(net.files_in("archive"), ["good.csv"]);
    assert_eq!(net.scalar("SELECT COUNT(*) FROM observations").int(), 4);
}

#[test]
fn site_codes_and_labels_round_trip_verbatim() {
    let net = Network::initialised();
    let nasty = "S6';DROP TABLE fits;--";
    let quoted = "Lake \"North\", east";
    let unicode = "Järvi Ä 湖 🦆";
    let label = "O'Brien, \"Bo\"";
    let csv = format!(
        "{HEADER}\n\"{}\",2020,1,1.0,,,x\n\"{}\",2020,1,2.0,,,\"{}\"\n{unicode},2020,\"v;1\",3.0,,,\n",
        nasty.replace('"', "\"\""),
        quoted.replace('"', "\"\""),
        label.replace('"', "\"\"")
    );
    net.drop_file("odd.csv", csv);
    net.ok(&["ingest"]);
    let codes: Vec<String> = net
        .sql("SELECT code FROM sites ORDER BY site_id")
        .into_iter()
        .map(|r| r[0].text().to_string())
        .collect();
    assert_eq!(codes, [nasty, quoted, unicode]);
    // The analyst's client sees the same bytes.
    assert_eq!(
        net.sqlite3("SELECT code FROM sites ORDER BY site_id"),
        format!("{nasty}\n{quoted}\n{unicode}\n")
    );
    assert_eq!(
        net.scalar("SELECT text_value FROM observations WHERE column_name = 'crew' AND text_value LIKE 'O%'"),
        Value::Text(label.into())
    );
    assert_eq!(
        net.scalar("SELECT visit FROM current_observations WHERE site = 'Järvi Ä 湖 🦆'"),
        Value::Text("v;1".into())
    );
    assert_eq!(
        net.scalar("SELECT COUNT(*) FROM sqlite_master WHERE name = 'fits'")
            .int(),
        1
    );
}

fn arrow_batch() -> RecordBatch {
    let schema = Arc::new(Schema::new(vec![
        Field::new("lake", DataType::Utf8, true),
        Field::new("season", DataType::Int32, true),
        Field::new("chl_ug_l", DataType::Float64, true),
        Field::new("crew", DataType::Utf8, true),
    ]));
    let columns: Vec<ArrayRef> = vec![
        Arc::new(StringArray::from(vec![
            Some("L1"),
            Some("L2"),
            None,
            Some("L4"),
        ])),
        Arc::new(Int32Array::from(vec![
            Some(2020),
            Some(2021),
            Some(2021),
            Some(2022),
        ])),
        Arc::new(Float64Array::from(vec![
            Some(3.25),
            None,
            Some(1.0),
            Some(f64::NAN),
        ])),
        Arc::new(StringArray::from(vec![Some("A"), Some("B"), None, None])),
    ];
    RecordBatch::try_new(schema, columns).expect("batch")
}

#[test]
fn arrow_ipc_files_and_streams_ingest() {
    let net = Network::initialised();
    let batch = arrow_batch();
    let mut file_bytes = Vec::new();
    {
        let mut w = arrow_ipc::writer::FileWriter::try_new(&mut file_bytes, &batch.schema())
            .expect("writer");
        w.write(&batch).expect("write");
        w.finish().expect("finish");
    }
    net.drop_file("season.arrow", &file_bytes);
    let out = net.ok(&["ingest"]);
    let line = line_for(&out, "season.arrow");
    assert!(line.contains("4 rows, 3 values accepted"), "{line}");
    // Equal counts are listed in a fixed order of kinds, whatever the order in the file.
    assert!(line.ends_with(", 2 rejected (1 NaN, 1 no site)"), "{line}");
    assert_eq!(
        net.sqlite3(
            "SELECT site, year, visit, column_name, COALESCE(num_value, text_value) FROM current_observations ORDER BY site, column_name"
        ),
        "L1|2020|1|chl_ug_l|3.25\nL1|2020|1|crew|A\nL2|2021|1|crew|B\n"
    );
    assert_eq!(
        net.sqlite3("SELECT line, column_name, reason FROM rejections ORDER BY line"),
        "3|chl_ug_l|row has no site (column `lake` is empty)\n\
         4|chl_ug_l|NaN is not a value; leave the cell empty for a missing value\n"
    );
    assert_eq!(
        net.scalar("SELECT format FROM ingest_batches").text(),
        "arrow-file"
    );

    // The stream format of a corrected batch: L1's value changes.
    let mut stream_bytes = Vec::new();
    {
        let schema = batch.schema();
        let fixed = RecordBatch::try_new(
            schema.clone(),
            vec![
                Arc::new(StringArray::from(vec!["L1"])) as ArrayRef,
                Arc::new(Int32Array::from(vec![2020])),
                Arc::new(Float64Array::from(vec![3.5])),
                Arc::new(StringArray::from(vec!["A"])),
            ],
        )
        .expect("batch");
        let mut w =
            arrow_ipc::writer::StreamWriter::try_new(&mut stream_bytes, &schema).expect("writer");
        w.write(&fixed).expect("write");
        w.finish().expect("finish");
    }
    net.drop_file("fix.arrows", &stream_bytes);
    let out = net.ok(&["ingest"]);
    assert!(
        line_for(&out, "fix.arrows").contains("(1 superseding, 1 unchanged)"),
        "{out}"
    );
    assert_eq!(
        net.scalar("SELECT num_value FROM current_observations WHERE site = 'L1' AND column_name = 'chl_ug_l'").real(),
        3.5
    );
}

#[test]
fn failed_batch_leaves_nothing() {
    let net = Network::initialised();
    // Make the last step of the batch transaction (writing rejections) fail.
    net.sqlite3(
        "CREATE TRIGGER injected_failure BEFORE INSERT ON rejections
         BEGIN SELECT RAISE(ABORT, 'injected failure'); END;",
    );
    net.drop_file(
        "a.csv",
        format!("{HEADER}\nL1,2020,1,3.2,12,18.5,A\nL2,2020,1,abc,,,\n"),
    );
    let out = net.tidemark(&["ingest"]);
    assert!(!out.status.success());
    let stderr = String::from_utf8_lossy(&out.stderr);
    assert!(stderr.contains("injected failure"), "{stderr}");
    assert!(
        stderr
            .lines()
            .last()
            .unwrap_or("")
            .starts_with("tidemark: error:"),
        "{stderr}"
    );
    for table in ["ingest_batches", "observations", "sites", "rejections"] {
        assert_eq!(
            net.scalar(&format!("SELECT COUNT(*) FROM {table}")).int(),
            0,
            "{table} must show nothing of the failed batch"
        );
    }
    assert_eq!(net.files_in("inbox"), ["a.csv"]);
    assert!(net.files_in("archive").is_empty());

    net.sqlite3("DROP TRIGGER injected_failure");
    net.ok(&["ingest"]);
    assert_eq!(net.scalar("SELECT COUNT(*) FROM observations").int(), 4);
    assert_eq!(net.scalar("SELECT COUNT(*) FROM rejections").int(), 1);
    assert_eq!(net.files_in("archive"), ["a.csv"]);
}

#[test]
fn named_files_outside_the_inbox_are_copied_not_moved() {
    let net = Network::initialised();
    let outside = net.path("upload.csv");
    std::fs::write(&outside, format!("{HEADER}\nL1,2020,1,3.2,12,18.5,A\n")).expect("write");
    let out = net.ok(&["ingest", outside.to_str().expect("utf-8 path")]);
    assert!(out.contains("ingested as batch 1"), "{out}");
    common::assert_exists(&outside);
    assert_eq!(net.files_in("archive"), ["upload.csv"]);
    let missing = net.tidemark(&["ingest", "no-such-file.csv"]);
    assert!(!missing.status.success());
    assert!(String::from_utf8_lossy(&missing.stderr).contains("no-such-file.csv is not a file"));
}

/// Lines `1.0 / 1.0 / 2.0` of one (site, year, visit, column): every line is rejected,
/// each with its cell's text exactly as written, and each reason lists all three lines.
#[test]
fn every_line_of_a_conflict_is_rejected_with_its_text_as_written() {
    let net = Network::initialised();
    let rows = [
        HEADER,
        "L1,2020,1,1.0,12,,A",  // line 2
        "L1,2020,1,1.0,12,,A",  // line 3: identical repeat of line 2
        "L1,2020,1,2.0,12,,A",  // line 4: conflicts on chl
        "L2,2020,1,5.50,7,,B",  // line 5
        "L2,2020,1,5.5,7.0,,B", // line 6: the same numbers written otherwise, kept once
    ];
    net.drop_file("repeats.csv", format!("{}\n", rows.join("\n")));
    let out = net.ok(&["ingest"]);
    assert!(
        line_for(&out, "repeats.csv").ends_with(", 3 rejected (3 conflicting values in the file)"),
        "{out}"
    );
    let rejected = net.sql(
        "SELECT r.line, r.column_name, r.raw_value, r.reason FROM rejections r ORDER BY r.line",
    );
    let got: Vec<(i64, String, String)> = rejected
        .iter()
        .map(|r| (r[0].int(), r[1].text().to_string(), r[2].text().to_string()))
        .collect();
    assert_eq!(
        got,
        [
            (2, "chl_ug_l".to_string(), "1.0".to_string()),
            (3, "chl_ug_l".to_string(), "1.0".to_string()),
            (4, "chl_ug_l".to_string(), "2.0".to_string()),
        ]
    );
    for r in &rejected {
        assert!(r[3].text().contains("(lines 2, 3, 4)"), "{}", r[3]);
    }
    assert_eq!(
        net.sqlite3(
            "SELECT site, column_name, COALESCE(num_value, text_value) FROM current_observations
             ORDER BY site, column_name"
        ),
        "L1|crew|A\nL1|tp_ug_l|12.0\nL2|chl_ug_l|5.5\nL2|crew|B\nL2|tp_ug_l|7.0\n"
    );
}

/// A feed file of `rows` distinct rows whose sites are named after `tag`.
fn rows_file(tag: &str, rows: usize) -> String {
    let mut text = format!("{HEADER}\n");
    for j in 0..rows {
        text.push_str(&format!(
            "{tag}-{j},2020,1,{}.5,{},,A\n",
            j % 7 + 1,
            j % 5 + 2
        ));
    }
    text
}

/// Two `ingest` processes started together on one inbox of many files: each file is
/// claimed by exactly one of them, so both succeed, nothing is read twice or reported as
/// missing, and every file is archived once.
#[test]
fn two_processes_ingesting_one_inbox_take_each_file_once() {
    let net = Network::initialised();
    const FILES: usize = 60;
    const ROWS: usize = 300;
    for i in 0..FILES {
        net.drop_file(&format!("f{i:03}.csv"), rows_file(&format!("S{i}"), ROWS));
    }
    let (a, b) = std::thread::scope(|s| {
        let a = s.spawn(|| net.tidemark(&["ingest"]));
        let b = s.spawn(|| net.tidemark(&["ingest"]));
        (
            a.join().expect("first ingest"),
            b.join().expect("second ingest"),
        )
    });
    let mut lines = Vec::new();
    for out in [&a, &b] {
        let stdout = String::from_utf8_lossy(&out.stdout).into_owned();
        let stderr = String::from_utf8_lossy(&out.stderr).into_owned();
        assert!(
            out.status.success(),
            "both succeed: {}\nstdout: {stdout}\nstderr: {stderr}",
            out.status
        );
        assert!(
            stderr.trim().is_empty(),
            "nothing to complain about: {stderr}"
        );
        lines.extend(stdout.lines().map(str::to_string));
    }
    for i in 0..FILES {
        let name = format!("f{i:03}.csv");
        let about: Vec<&String> = lines.iter().filter(|l| l.contains(&name)).collect();
        assert_eq!(about.len(), 1, "{name} is reported once: {about:?}");
        assert!(about[0].contains("ingested as batch"), "{}", about[0]);
    }
    assert_eq!(
        net.sqlite3(
            "SELECT status, COUNT(*), COUNT(DISTINCT source) FROM ingest_batches GROUP BY status"
        ),
        format!("ingested|{FILES}|{FILES}\n")
    );
    assert_eq!(
        net.scalar("SELECT COUNT(*) FROM observations").int(),
        (FILES * ROWS * 3) as i64
    );
    assert_eq!(net.files_in("archive").len(), FILES);
    assert_eq!(common::inbox_and_claimed(&net), (vec![], vec![]));
    assert_eq!(
        net.sqlite3("SELECT DISTINCT status FROM runs WHERE command = 'ingest'"),
        "succeeded\n"
    );
}

/// A process killed while it holds claimed files (once before its batch committed, once
/// after) leaves them in its claim folder; the next run takes them over: each file is
/// ingested exactly once and ends in the archive.
#[test]
fn a_file_claimed_by_a_killed_process_is_ingested_once_by_the_next_run() {
    let net = Network::initialised();
    let hold = net.path("hold");
    std::fs::create_dir_all(&hold).expect("hold folder");
    net.drop_file("a.csv", rows_file("A", 5));
    net.drop_file("b.csv", rows_file("B", 4));

    // Killed with a.csv read and nothing written.
    let mut first = common::spawn_held(&net, &["ingest"], &hold, "first");
    common::wait_for_hold(&hold, "a.csv", "read");
    first.kill().expect("kill the first ingest");
    first.wait().expect("reap it");
    assert_eq!(net.scalar("SELECT COUNT(*) FROM ingest_batches").int(), 0);
    assert_eq!(
        common::inbox_and_claimed(&net),
        (vec!["b.csv".to_string()], vec!["a.csv".to_string()])
    );
    let status = net.ok(&["status"]);
    assert!(
        status.contains("1 file(s) waiting, 1 being ingested"),
        "{status}"
    );

    // The second takes a.csv over and ingests it; killed with b.csv committed but not
    // yet archived.
    common::release_hold(&hold, "a.csv", "read");
    common::release_hold(&hold, "a.csv", "committed");
    common::release_hold(&hold, "b.csv", "read");
    let mut second = common::spawn_held(&net, &["ingest"], &hold, "second");
    common::wait_for_hold(&hold, "b.csv", "committed");
    second.kill().expect("kill the second ingest");
    second.wait().expect("reap it");
    let said = std::fs::read_to_string(net.path("second.out")).expect("stdout");
    assert!(
        line_for(&said, "a.csv").contains(
            "ingested as batch 1: 5 rows, 15 values accepted (0 superseding, 0 unchanged), 0 rejected (taken over from a process that stopped while ingesting it)"
        ),
        "{said}"
    );
    assert_eq!(
        common::inbox_and_claimed(&net),
        (vec![], vec!["b.csv".to_string()])
    );

    // The third finds b.csv's batch committed: a duplicate, archived, nothing counted twice.
    let out = net.ok(&["ingest"]);
    assert!(
        line_for(&out, "b.csv")
            .contains("duplicate of batch 2, nothing changed (recorded as batch 3) (taken over"),
        "{out}"
    );
    assert_eq!(
        net.sqlite3("SELECT batch_id, source, status FROM ingest_batches ORDER BY batch_id"),
        "1|a.csv|ingested\n2|b.csv|ingested\n3|b.csv|duplicate\n"
    );
    assert_eq!(net.scalar("SELECT COUNT(*) FROM observations").int(), 27);
    assert_eq!(net.files_in("archive"), ["a.csv", "b.csv"]);
    assert_eq!(common::inbox_and_claimed(&net), (vec![], vec![]));
    assert!(
        !net.path("inbox/.ingesting").exists(),
        "no claim folder or lock is left"
    );
}

/// A file appended to while it is read is never archived with its tail unread: seen
/// before its batch commits, nothing of it is stored; seen after, its batch stands (it is
/// what was read) and the file stays. Either way it goes back to the inbox, and the next
/// run stores the whole of it.
#[test]
fn a_file_written_to_while_it_is_read_is_left_for_the_next_run() {
    use std::io::Write as _;
    let net = Network::initialised();
    let hold = net.path("hold");
    std::fs::create_dir_all(&hold).expect("hold folder");
    for (name, step) in [("early.csv", "read"), ("late.csv", "committed")] {
        let whole = rows_file(name, 40);
        let cut = whole
            .match_indices('\n')
            .nth(20)
            .map(|(i, _)| i + 1)
            .expect("21 lines");
        let (head, tail) = whole.split_at(cut);
        net.drop_file(name, head);
        // The sender still has the file open and goes on writing.
        let mut sender = std::fs::OpenOptions::new()
            .append(true)
            .open(net.path(&format!("inbox/{name}")))
            .expect("open for appending");
        if step == "committed" {
            common::release_hold(&hold, name, "read");
        }
        let mut ingest = common::spawn_held(&net, &["ingest"], &hold, name);
        common::wait_for_hold(&hold, name, step);
        sender.write_all(tail.as_bytes()).expect("append");
        drop(sender);
        common::release_hold(&hold, name, step);
        let status = ingest.wait().expect("ingest ends");
        let said = std::fs::read_to_string(net.path(&format!("{name}.out"))).expect("stdout");
        assert!(
            status.success(),
            "a file left for later is no failure: {said}"
        );
        let line = line_for(&said, name);
        assert_eq!(
            std::fs::read_to_string(net.path(&format!("inbox/{name}"))).expect("back in the inbox"),
            whole
        );
        assert!(!net.files_in("archive").contains(&name.to_string()));
        if step == "read" {
            assert!(
                line.contains("changed while it was read (")
                    && line.contains(
                        "nothing of it was stored and it is back in the inbox for the next run"
                    ),
                "{line}"
            );
            assert_eq!(net.scalar("SELECT COUNT(*) FROM ingest_batches").int(), 0);
            assert_eq!(net.scalar("SELECT COUNT(*) FROM observations").int(), 0);
        } else {
            assert!(
                line.contains("changed after it was read and its batch 2 committed")
                    && line.contains("the file was not archived and it is back in the inbox"),
                "{line}"
            );
            assert_eq!(
                net.scalar("SELECT rows_read FROM ingest_batches WHERE batch_id = 2")
                    .int(),
                20
            );
        }
        let status = net.ok(&["status"]);
        assert!(status.contains("inbox      1 file(s) waiting"), "{status}");

        let again = net.ok(&["ingest"]);
        assert!(
            line_for(&again, name).contains(": 40 rows, 120 values accepted"),
            "{again}"
        );
        assert_eq!(common::inbox_and_claimed(&net), (vec![], vec![]));
    }
    // early.csv: batch 1; late.csv: batch 2 (the first 20 rows), then batch 3 (all 40).
    assert_eq!(
        net.sqlite3("SELECT batch_id, source, rows_read, values_unchanged FROM ingest_batches ORDER BY batch_id"),
        "1|early.csv|40|0\n2|late.csv|20|0\n3|late.csv|40|60\n"
    );
    assert_eq!(
        net.scalar("SELECT COUNT(*) FROM current_observations")
            .int(),
        240
    );
}

/// Symbolic links, FIFOs and folders in the inbox are never read, but they are named on
/// the `ingest` line, in the run's message and in `status`.
#[test]
fn entries_that_are_not_regular_files_are_named_on_the_ingest_line_and_in_status() {
    let net = Network::initialised();
    let real = net.path("elsewhere.csv");
    std::fs::write(&real, rows_file("X", 2)).expect("write");
    std::os::unix::fs::symlink(&real, net.path("inbox/link.csv")).expect("symlink");
    let fifo = std::process::Command::new("mkfifo")
        .arg(net.path("inbox/pipe.csv"))
        .status()
        .expect("mkfifo");
    assert!(fifo.success());
    std::fs::create_dir(net.path("inbox/sub")).expect("folder");
    let skipped = "3 inbox entries skipped, not regular files: link.csv (symbolic link), \
                   pipe.csv (FIFO), sub (folder); move the files themselves into the inbox";

    let out = net.ok(&["ingest"]);
    assert!(out.contains(skipped), "{out}");
    assert!(out.contains("no regular file to ingest"), "{out}");

    net.drop_file("good.csv", rows_file("G", 2));
    let out = net.ok(&["ingest"]);
    assert!(out.contains(skipped), "{out}");
    assert!(
        line_for(&out, "good.csv").contains("ingested as batch 1"),
        "{out}"
    );
    let message = net.scalar("SELECT message FROM runs ORDER BY run_id DESC LIMIT 1");
    assert!(message.text().contains(skipped), "{message}");

    let status = net.ok(&["status"]);
    assert!(status.contains("inbox      0 file(s) waiting"), "{status}");
    assert!(status.contains(skipped), "{status}");
    let json: serde_json::Value =
        serde_json::from_str(&net.ok(&["status", "--json"])).expect("json");
    assert_eq!(
        json["inbox_skipped"],
        serde_json::json!([
            {"name": "link.csv", "kind": "symbolic link"},
            {"name": "pipe.csv", "kind": "FIFO"},
            {"name": "sub", "kind": "folder"}
        ])
    );
    assert_eq!(json["inbox_waiting"], 0);
    // Nothing was followed or moved.
    assert!(net.path("inbox/link.csv").is_symlink());
    assert!(real.is_file());
    assert_eq!(net.files_in("archive"), ["good.csv"]);
}

/// Series may name their own site, year and visit columns: each file is read with the
/// key set its header has, the batch records it, and each series fits its own rows.
#[test]
fn series_with_their_own_key_columns_read_their_own_files() {
    let lakes = common::CHLOROPHYLL;
    let streams = r#"name = "streamflow"
response = "flow_m3s"
transform = "log"
site = "station"
year = "water_year"
"#;
    let config = common::ConfigBuilder::new()
        .series(lakes)
        .sampler(common::Sampler::default())
        .series(streams)
        .sampler(common::Sampler::default())
        .build();
    let net = Network::with_config(&config);
    net.ok(&["init"]);
    net.drop_file("lakes.csv", common::csv(&common::network_rows(15, 6)));
    let mut flows = String::from("station,water_year,flow_m3s,notes\n");
    for s in 0..12 {
        for y in 0..6 {
            let flow =
                (1.0 + 0.2 * s as f64 + 0.3 * ((s * 7 + y * 3) % 5) as f64 - 0.1 * y as f64).exp();
            flows.push_str(&format!("ST-{s:02},{},{flow:.4},gauge ok\n", 2001 + y));
        }
    }
    net.drop_file("streams.csv", flows);
    let out = net.ok(&["ingest"]);
    assert!(
        line_for(&out, "streams.csv").ends_with(", 0 rejected"),
        "{out}"
    );
    assert_eq!(
        net.sqlite3(
            "SELECT source, site_column, year_column, COALESCE(visit_column, '-') FROM ingest_batches ORDER BY source"
        ),
        "lakes.csv|lake|season|visit\nstreams.csv|station|water_year|-\n"
    );
    // Stream rows are visit 1, and the station codes sit beside the lakes in `sites`.
    assert_eq!(
        net.sqlite3(
            "SELECT COUNT(*), MIN(visit), MAX(visit) FROM current_observations WHERE column_name = 'flow_m3s'"
        ),
        "72|1|1\n"
    );
    let out = net.ok(&["refit"]);
    assert!(
        out.contains("streamflow") && out.matches("published version 1").count() == 2,
        "{out}"
    );
    assert_eq!(
        net.sqlite3("SELECT series, n_sites, n_years FROM fits ORDER BY series"),
        "chlorophyll|15|6\nstreamflow|12|6\n"
    );
    // A file with neither key set is unreadable and says what it misses.
    net.drop_file("odd.csv", "gauge,season,flow_m3s\nX,2001,1.0\n");
    let out = net.ok(&["ingest"]);
    assert!(line_for(&out, "odd.csv").contains("quarantined"), "{out}");
    let why = net
        .scalar("SELECT message FROM ingest_batches WHERE source = 'odd.csv'")
        .text()
        .to_string();
    assert!(why.contains("no site column `lake`"), "{why}");
}
