//! Any bytes through the feed readers (CSV, Arrow IPC file and stream): they must never
//! panic, and every rejection and quarantine must carry a reason.
#![no_main]

use std::collections::BTreeSet;

use libfuzzer_sys::fuzz_target;
use tidemark_feed::{parse_bytes, BatchContent, FileLayout, KeyColumns, NumberColumns};

fuzz_target!(|bytes: &[u8]| {
    // The key columns of tests/corpus/tidemark.toml, with `crew` as a group label.
    // `chl` is read as numbers on the log scale, `remarks` is free text, and `NA` and
    // `-999` are missing codes.
    let layout = FileLayout {
        keys: vec![
            KeyColumns {
                site: "lake".into(),
                year: "season".into(),
                visit: Some("visit".into()),
            },
            KeyColumns {
                site: "station".into(),
                year: "year".into(),
                visit: None,
            },
        ],
        labels: BTreeSet::from(["crew".to_string()]),
        numbers: NumberColumns::Only(BTreeSet::from(["chl".to_string(), "depth".to_string()])),
        positive: BTreeSet::from(["chl".to_string()]),
        missing: vec!["NA".to_string(), "-999".to_string()],
    };
    match parse_bytes(bytes, &layout).1 {
        BatchContent::Unreadable { reason } => assert!(!reason.is_empty()),
        BatchContent::Parsed { rejections, .. } => {
            assert!(rejections.iter().all(|r| !r.reason.is_empty()));
        }
        BatchContent::KnownDuplicate => unreachable!("parse_bytes never says duplicate"),
    }
});
