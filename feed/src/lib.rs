//! tidemark-feed: Tidemark's feed readers, from a file's bytes to accepted values and
//! rejections.
//!
//! A feed file is CSV (UTF-8, header row, comma) or Arrow IPC (file or stream format),
//! told apart by its first bytes. [`parse_bytes`] reads it whole against a [`FileLayout`]
//! (the key columns and the label columns) and returns a [`BatchContent`]: the accepted
//! values, interned and at most one per (site, year, visit, column), with every rejected
//! value and its reason; or, for a file that cannot be read at all, the reason. The same
//! rules apply to both formats (`collect.rs`): key checks, number and year parsing,
//! in-file duplicates and conflicts.
//!
//! The crate does no I/O beyond the bytes it is given and depends on no database, async
//! runtime or chart library (`tests/purity.rs`), so a fuzz target or a benchmark of the
//! readers builds only this. Storing a batch is `tidemark-service`'s business.
//!
//! ```
//! use std::collections::BTreeSet;
//! use tidemark_feed::{parse_bytes, BatchContent, FileLayout, KeyColumns, RejectionKind};
//!
//! let layout = FileLayout::numeric(
//!     KeyColumns { site: "lake".into(), year: "season".into(), visit: None },
//!     BTreeSet::from(["crew".to_string()]),
//! );
//! let csv = "lake,season,chl_ug_l,crew\nL1,2020,3.2,A\nL2,2020,abc,B\n";
//! let (format, content) = parse_bytes(csv.as_bytes(), &layout);
//! assert_eq!(format, Some("csv"));
//! let BatchContent::Parsed { rows_read, values, rejections } = content else {
//!     panic!("a readable file");
//! };
//! assert_eq!(rows_read, 2);
//! assert_eq!(values.values.len(), 3); // L1's chl and crew, L2's crew
//! assert_eq!(values.sites, ["L1", "L2"]);
//! assert_eq!(rejections.len(), 1);
//! assert_eq!(rejections[0].line, Some(3));
//! assert_eq!(rejections[0].kind, RejectionKind::NotANumber);
//! assert_eq!(rejections[0].reason, "`abc` is not a number");
//! ```

mod arrow_feed;
mod batch;
mod collect;
mod csv_feed;
mod layout;

pub use arrow_feed::quiet_caught_panics;
pub use batch::{
    count_by_kind, BatchContent, BatchValues, Cell, Censor, NewRejection, NewValue, RejectionKind,
};
pub use collect::{DEFAULT_VISIT, YEARS};
pub use layout::{FileLayout, KeyColumns, NumberColumns};

use layout::Unreadable;

/// Parse a file's bytes into a batch (or the reason it is unreadable) and its format name
/// (`csv`, `arrow-file`, `arrow-stream`; `None` for an empty file).
pub fn parse_bytes(bytes: &[u8], layout: &FileLayout) -> (Option<&'static str>, BatchContent) {
    let (format, parsed) = if bytes.starts_with(arrow_feed::FILE_MAGIC) {
        (Some("arrow-file"), arrow_feed::read(bytes, layout))
    } else if bytes.starts_with(arrow_feed::STREAM_MAGIC) {
        (Some("arrow-stream"), arrow_feed::read(bytes, layout))
    } else if bytes.is_empty() {
        (None, Err(Unreadable("the file is empty".into())))
    } else {
        (Some("csv"), csv_feed::read(bytes, layout))
    };
    let content = match parsed {
        Ok(collector) => {
            let (rows_read, values, rejections) = collector.finish();
            BatchContent::Parsed {
                rows_read,
                values,
                rejections,
            }
        }
        Err(Unreadable(reason)) => BatchContent::Unreadable { reason },
    };
    (format, content)
}
