//! The bad-input corpus, end to end: every case of `tests/corpus/manifest.toml` goes
//! through the real `tidemark ingest` in a fresh network, and its batch must come out exactly
//! as the manifest says: status, counts, reasons, lines. Across all cases, nothing
//! accepted is lost (each accepted value is a row of `observations` unless it was an
//! unchanged re-send), every rejection is recorded with a short reason, and the process
//! never crashes.
//!
//! Also here, ignored by default: a stable-Rust stand-in for the cargo-fuzz target in
//! `fuzz/`, feeding seeded random mutations of the corpus to the feed readers.

mod common;

use std::path::{Path, PathBuf};
use std::sync::Arc;

use arrow_array::{ArrayRef, BooleanArray, Float64Array, Int32Array, RecordBatch, StringArray};
use arrow_schema::{DataType, Field, Schema};
use common::{line_for, Network};
use serde::Deserialize;

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct Manifest {
    case: Vec<Case>,
}

#[derive(Debug, Deserialize)]
#[serde(deny_unknown_fields)]
struct Case {
    file: Option<String>,
    generate: Option<String>,
    name: Option<String>,
    exercises: String,
    status: String,
    rows: Option<i64>,
    accepted: Option<i64>,
    rejected: Option<i64>,
    reason: Option<String>,
    rejected_lines: Option<Vec<i64>>,
    #[serde(default)]
    before: Vec<String>,
    superseding: Option<i64>,
    unchanged: Option<i64>,
    query: Option<String>,
    expect: Option<String>,
}

impl Case {
    fn inbox_name(&self) -> &str {
        self.name
            .as_deref()
            .or(self.file.as_deref())
            .expect("a case has `file`, or `generate` with `name`")
    }

    fn bytes(&self) -> Vec<u8> {
        match (&self.file, &self.generate) {
            (Some(f), None) => read_corpus_file(f),
            (None, Some(g)) => generated(g),
            _ => panic!("case {:?}: exactly one of `file` and `generate`", self.name),
        }
    }
}

fn corpus_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("../tests/corpus")
}

fn read_corpus_file(name: &str) -> Vec<u8> {
    let p = corpus_dir().join("files").join(name);
    std::fs::read(&p).unwrap_or_else(|e| panic!("{}: {e}", p.display()))
}

fn manifest() -> Manifest {
    let p = corpus_dir().join("manifest.toml");
    let text = std::fs::read_to_string(&p).expect("read the corpus manifest");
    toml::from_str(&text).unwrap_or_else(|e| panic!("{}: {e}", p.display()))
}

fn corpus_network() -> Network {
    let config =
        std::fs::read_to_string(corpus_dir().join("tidemark.toml")).expect("corpus config");
    let net = Network::with_config(&config);
    net.ok(&["init"]);
    net
}

const HEADER: &str = "lake,season,visit,chl_ug_l,tp_ug_l";
const MIB: usize = 1 << 20;

fn arrow_file(columns: Vec<(&str, ArrayRef)>) -> Vec<u8> {
    let fields: Vec<Field> = columns
        .iter()
        .map(|(n, a)| Field::new(*n, a.data_type().clone(), true))
        .collect();
    let schema = Arc::new(Schema::new(fields));
    let batch = RecordBatch::try_new(schema.clone(), columns.into_iter().map(|c| c.1).collect())
        .expect("batch");
    let mut bytes = Vec::new();
    let mut w = arrow_ipc::writer::FileWriter::try_new(&mut bytes, &schema).expect("writer");
    w.write(&batch).expect("write");
    w.finish().expect("finish");
    drop(w);
    bytes
}

fn lakes(codes: &[&str]) -> ArrayRef {
    Arc::new(StringArray::from(codes.to_vec()))
}

fn seasons(years: &[i32]) -> ArrayRef {
    Arc::new(Int32Array::from(years.to_vec()))
}

/// The cases that are binary, large, or Arrow: made here rather than committed.
fn generated(name: &str) -> Vec<u8> {
    match name {
        "binary_junk" => {
            use rand::{RngCore, SeedableRng};
            let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(5);
            let mut bytes = vec![0u8; 4096];
            rng.fill_bytes(&mut bytes);
            bytes[0] = 0x80; // not the start of any UTF-8 character, nor Arrow magic
            bytes
        }
        "long_cell_value" => format!("{HEADER}\nL1,2020,1,{},12\n", "x".repeat(MIB)).into_bytes(),
        "long_site_code" => format!("{HEADER}\n{},2020,1,3.2,12\n", "s".repeat(MIB)).into_bytes(),
        "arrow_missing_site" => arrow_file(vec![
            ("season", seasons(&[2020])),
            ("chl_ug_l", Arc::new(Float64Array::from(vec![3.2]))),
        ]),
        "arrow_string_measure" => arrow_file(vec![
            ("lake", lakes(&["L1", "L2", "L3"])),
            ("season", seasons(&[2020, 2020, 2020])),
            (
                "chl_ug_l",
                Arc::new(StringArray::from(vec!["3.2", "abc", "1e999"])),
            ),
        ]),
        "arrow_boolean_measure" => arrow_file(vec![
            ("lake", lakes(&["L1", "L2"])),
            ("season", seasons(&[2020, 2020])),
            ("chl_ug_l", Arc::new(BooleanArray::from(vec![true, false]))),
            ("tp_ug_l", Arc::new(Float64Array::from(vec![12.0, 15.0]))),
        ]),
        "arrow_float_site" => arrow_file(vec![
            ("lake", Arc::new(Float64Array::from(vec![1.5, 2.0]))),
            ("season", seasons(&[2020, 2020])),
            ("chl_ug_l", Arc::new(Float64Array::from(vec![3.2, 4.1]))),
        ]),
        "arrow_nulls" => arrow_file(vec![
            (
                "lake",
                Arc::new(StringArray::from(vec![None, Some("L2"), Some("L3")])),
            ),
            (
                "season",
                Arc::new(Int32Array::from(vec![Some(2020), None, Some(2020)])),
            ),
            (
                "chl_ug_l",
                Arc::new(Float64Array::from(vec![1.0, 2.0, 3.0])),
            ),
            (
                "tp_ug_l",
                Arc::new(Float64Array::from(vec![None, None, None::<f64>])),
            ),
        ]),
        "arrow_truncated_file" => {
            let mut bytes = generated("arrow_string_measure");
            bytes.truncate(bytes.len() / 2);
            bytes
        }
        "arrow_truncated_stream" => {
            let batch = RecordBatch::try_new(
                Arc::new(Schema::new(vec![
                    Field::new("lake", DataType::Utf8, false),
                    Field::new("season", DataType::Int32, false),
                    Field::new("chl_ug_l", DataType::Float64, false),
                ])),
                vec![
                    lakes(&["L1", "L2"]),
                    seasons(&[2020, 2020]),
                    Arc::new(Float64Array::from(vec![3.2, 4.1])),
                ],
            )
            .expect("batch");
            let mut bytes = Vec::new();
            let mut w = arrow_ipc::writer::StreamWriter::try_new(&mut bytes, &batch.schema())
                .expect("writer");
            w.write(&batch).expect("write");
            w.write(&batch).expect("write");
            w.finish().expect("finish");
            drop(w);
            // Past the 8-byte end-of-stream marker, into the second batch's body.
            bytes.truncate(bytes.len() - 24);
            bytes
        }
        other => panic!("no generator for corpus case `{other}`"),
    }
}

/// One case in its own network; returns what went wrong, or nothing.
fn run_case(case: &Case) -> Vec<String> {
    let mut problems = Vec::new();
    let net = corpus_network();
    for earlier in &case.before {
        net.drop_file(earlier, read_corpus_file(earlier));
        net.ok(&["ingest"]);
    }
    let name = case.inbox_name();
    net.drop_file(name, case.bytes());
    let out = net.tidemark(&["ingest"]);
    let stdout = String::from_utf8_lossy(&out.stdout);
    let stderr = String::from_utf8_lossy(&out.stderr);
    if !out.status.success() || stderr.contains("panicked") {
        problems.push(format!("ingest failed ({}): {stderr}", out.status));
        return problems;
    }
    let line = line_for(&stdout, name).to_string();

    let batch = &net.sql(
        "SELECT batch_id, status, rows_read, values_accepted, values_rejected, \
         values_superseding, values_unchanged, COALESCE(message, '') \
         FROM ingest_batches ORDER BY batch_id DESC LIMIT 1",
    )[0];
    let batch_id = batch[0].int();
    let mut check = |what: &str, want: Option<i64>, got: i64| {
        if let Some(w) = want {
            if w != got {
                problems.push(format!("{what}: expected {w}, found {got}"));
            }
        }
    };
    check("rows_read", case.rows, batch[2].int());
    check("values_accepted", case.accepted, batch[3].int());
    check("values_rejected", case.rejected, batch[4].int());
    check("values_superseding", case.superseding, batch[5].int());
    check("values_unchanged", case.unchanged, batch[6].int());
    if batch[1].text() != case.status {
        problems.push(format!(
            "status: expected {}, found {} ({line})",
            case.status,
            batch[1].text()
        ));
    }

    let reasons: Vec<String> = net
        .sql(&format!(
            "SELECT reason FROM rejections WHERE batch_id = {batch_id}"
        ))
        .into_iter()
        .map(|r| r[0].text().to_string())
        .collect();
    if reasons.len() as i64 != batch[4].int() {
        problems.push(format!(
            "values_rejected is {} but {} rejections are recorded",
            batch[4].int(),
            reasons.len()
        ));
    }
    if let Some(r) = reasons.iter().find(|r| r.len() > 400) {
        problems.push(format!(
            "a rejection reason is {} characters long: {}…",
            r.len(),
            &r[..80]
        ));
    }
    if let Some(want) = &case.reason {
        let message = batch[7].text();
        let found = if case.status == "quarantined" {
            message.contains(want.as_str())
        } else {
            !reasons.is_empty() && reasons.iter().all(|r| r.contains(want.as_str()))
        };
        if !found {
            problems.push(format!(
                "reason `{want}` not found; message {message:?}, rejections {reasons:?}"
            ));
        }
    }
    if let Some(want) = &case.rejected_lines {
        let got: Vec<i64> = net
            .sql(&format!(
                "SELECT DISTINCT line FROM rejections WHERE batch_id = {batch_id} ORDER BY line"
            ))
            .into_iter()
            .map(|r| r[0].int())
            .collect();
        if &got != want {
            problems.push(format!("rejected lines: expected {want:?}, found {got:?}"));
        }
    }

    // Nothing accepted is lost: each accepted value is a new row unless it was unchanged.
    let stored = net
        .scalar(&format!(
            "SELECT COUNT(*) FROM observations WHERE batch_id = {batch_id}"
        ))
        .int();
    if stored != batch[3].int() - batch[6].int() {
        problems.push(format!(
            "{} values accepted ({} unchanged) but {stored} stored",
            batch[3].int(),
            batch[6].int()
        ));
    }
    let (dir, other) = if case.status == "quarantined" {
        ("quarantine", "archive")
    } else {
        ("archive", "quarantine")
    };
    if !net.files_in(dir).iter().any(|f| f == name) || net.files_in(other).contains(&name.into()) {
        problems.push(format!("{name} should be in {dir}/ only"));
    }
    if !net.files_in("inbox").is_empty() {
        problems.push("the inbox is not empty".into());
    }
    if let (Some(q), Some(want)) = (&case.query, &case.expect) {
        let got = net.sqlite3(q);
        if &got != want {
            problems.push(format!("{q}\n  expected {want:?}\n  found    {got:?}"));
        }
    }
    problems
}

#[test]
fn every_corpus_case_has_its_documented_outcome() {
    let manifest = manifest();
    let mut failures = Vec::new();
    for case in &manifest.case {
        let problems = run_case(case);
        if !problems.is_empty() {
            failures.push(format!(
                "{} ({}):\n  {}",
                case.inbox_name(),
                case.exercises,
                problems.join("\n  ")
            ));
        }
    }
    assert!(
        failures.is_empty(),
        "{} of {} corpus cases differ from the manifest:\n{}",
        failures.len(),
        manifest.case.len(),
        failures.join("\n")
    );
}

#[test]
fn the_corpus_covers_at_least_thirty_kinds_and_every_file_is_listed() {
    let manifest = manifest();
    assert!(manifest.case.len() >= 30, "{} cases", manifest.case.len());
    let mut listed: Vec<&str> = manifest
        .case
        .iter()
        .filter_map(|c| c.file.as_deref())
        .chain(
            manifest
                .case
                .iter()
                .flat_map(|c| c.before.iter().map(String::as_str)),
        )
        .collect();
    listed.sort_unstable();
    listed.dedup();
    let mut on_disk: Vec<String> = std::fs::read_dir(corpus_dir().join("files"))
        .expect("corpus files")
        .map(|e| e.expect("entry").file_name().to_string_lossy().into_owned())
        .collect();
    on_disk.sort_unstable();
    assert_eq!(listed, on_disk, "every corpus file has a manifest entry");
}

/// Zero and negative values of a log-scale response are accepted at ingest; the fit
/// leaves them out and says so in `fit_exclusions`.
#[test]
fn values_a_log_fit_cannot_use_are_kept_and_excluded_at_fit() {
    let net = corpus_network();
    net.drop_file(
        "negative_under_log.csv",
        read_corpus_file("negative_under_log.csv"),
    );
    net.ok(&["ingest"]);
    assert_eq!(
        net.sqlite3(
            "SELECT site, year, num_value FROM current_observations WHERE num_value <= 0 ORDER BY site"
        ),
        "L1|2020|-0.4\nL2|2021|0.0\n"
    );
    // The fit may or may not pass the gate on so few visits; the exclusions are recorded
    // with the attempt either way.
    let _ = net.tidemark(&["refit", "--series", "chlorophyll"]);
    let excluded = net.sqlite3(
        "SELECT e.site, e.year, e.visit FROM fit_exclusions e JOIN fits f USING (fit_id)
         WHERE f.series = 'chlorophyll' ORDER BY e.site",
    );
    assert_eq!(excluded, "L1|2020|1\nL2|2021|1\n");
    let reasons = net.sqlite3("SELECT DISTINCT reason FROM fit_exclusions");
    assert!(reasons.contains("log"), "{reasons}");
    assert_eq!(
        net.scalar("SELECT n_obs FROM fits WHERE series = 'chlorophyll'")
            .int(),
        22
    );
    // Still there after the fit: excluding is not deleting.
    assert_eq!(net.scalar("SELECT COUNT(*) FROM observations").int(), 24);
}

/// Stable-Rust stand-in for `fuzz/fuzz_targets/feed_reader.rs`: seeded random mutations
/// of every corpus case go through the feed readers, which must never panic. Run with
/// `cargo test -p tidemark-service --test e2e_corpus -- --ignored` (`TIDEMARK_FUZZ_INPUTS`
/// sets the number of inputs, default 20000; `TIDEMARK_FUZZ_DUMP=FILE` keeps the input being
/// parsed, to replay a crash).
#[test]
#[ignore = "long: run on request"]
fn random_mutations_of_the_corpus_never_panic() {
    use rand::{Rng, SeedableRng};
    use tidemark_feed::{parse_bytes, BatchContent};
    use tidemark_service::config::Config;

    let config_text =
        std::fs::read_to_string(corpus_dir().join("tidemark.toml")).expect("corpus config");
    let config = Config::parse(&config_text, "tidemark.toml", &corpus_dir()).expect("config");
    let layout = config.file_layout();
    let seeds: Vec<Vec<u8>> = manifest()
        .case
        .iter()
        // The 1 MiB cases would make each mutation slow without reaching new code.
        .filter(|c| !c.generate.as_deref().is_some_and(|g| g.starts_with("long")))
        .map(Case::bytes)
        .collect();
    let inputs: usize = std::env::var("TIDEMARK_FUZZ_INPUTS")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(20_000);
    // The Arrow reader's caught panics (see feed/src/arrow_feed.rs) would flood the output.
    tidemark_feed::quiet_caught_panics();
    // Each input is written here before it is parsed: after a panic, the file holds it.
    let dump = std::env::var_os("TIDEMARK_FUZZ_DUMP");
    let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(2024);
    let interesting: &[&[u8]] = &[
        b",",
        b"\"",
        b"\n",
        b"\r",
        b"\r\n",
        b"\0",
        b"NaN",
        b"-inf",
        b"1e999",
        b"\xef\xbb\xbf",
        b"\xff",
        b"\xe9",
        b"ARROW1",
        b"\xff\xff\xff\xff",
        b"lake",
        b"season",
        b"2020",
    ];
    let mut parsed = 0usize;
    let mut unreadable = 0usize;
    for _ in 0..inputs {
        let mut bytes = seeds[rng.gen_range(0..seeds.len())].clone();
        for _ in 0..rng.gen_range(1..=8) {
            let at = rng.gen_range(0..=bytes.len());
            match rng.gen_range(0..5) {
                0 if at < bytes.len() => bytes[at] = rng.gen(),
                1 => bytes.insert(at, rng.gen()),
                2 => bytes.truncate(at),
                3 => {
                    let piece = interesting[rng.gen_range(0..interesting.len())];
                    bytes.splice(at..at, piece.iter().copied());
                }
                _ if at < bytes.len() => {
                    let end = rng.gen_range(at..=bytes.len().min(at + 16));
                    bytes.drain(at..end);
                }
                _ => {}
            }
        }
        if let Some(path) = &dump {
            std::fs::write(path, &bytes).expect("write TIDEMARK_FUZZ_DUMP");
        }
        match parse_bytes(&bytes, &layout).1 {
            BatchContent::Unreadable { reason } => {
                assert!(!reason.is_empty() && reason.len() <= 400, "{reason:?}");
                unreadable += 1;
            }
            BatchContent::Parsed { rejections, .. } => {
                for r in &rejections {
                    assert!(
                        !r.reason.is_empty() && r.reason.len() <= 400 && r.line.unwrap_or(1) >= 1,
                        "{r:?}"
                    );
                }
                parsed += 1;
            }
            BatchContent::KnownDuplicate => unreachable!("parse_bytes never says duplicate"),
        }
    }
    println!("{inputs} mutated inputs: {parsed} parsed, {unreadable} unreadable, no panic");
    // The mutations must reach both outcomes, or they explore too little.
    assert!(
        parsed > inputs / 20 && unreadable > inputs / 20,
        "{parsed} / {unreadable}"
    );
}
