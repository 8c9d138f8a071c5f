//! Reading a CSV feed file (UTF-8, header row, comma; a UTF-8 byte-order mark and CRLF
//! line ends are tolerated) into a [`Collector`].

use crate::batch::RejectionKind;
use crate::collect::{Collector, RawCell};
use crate::layout::{FileLayout, Plan, Unreadable};

const BOM: &[u8] = b"\xEF\xBB\xBF";

pub fn read(bytes: &[u8], layout: &FileLayout) -> Result<Collector, Unreadable> {
    let bytes = bytes.strip_prefix(BOM).unwrap_or(bytes);
    if let Err(e) = std::str::from_utf8(bytes) {
        let line = bytes[..e.valid_up_to()]
            .iter()
            .filter(|&&b| b == b'\n')
            .count()
            + 1;
        return Err(Unreadable(format!(
            "not UTF-8 text (first invalid byte on line {line}); save the file as UTF-8 CSV or send an Arrow IPC file"
        )));
    }
    if bytes.contains(&0) {
        return Err(Unreadable(
            "contains NUL bytes: this is a binary file, not CSV text".into(),
        ));
    }
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(true)
        .flexible(true)
        .from_reader(bytes);
    let header: Vec<String> = match reader.headers() {
        Ok(h) => h.iter().map(|s| s.trim().to_string()).collect(),
        Err(e) => return Err(Unreadable(format!("cannot read the header row: {e}"))),
    };
    if header.iter().all(|h| h.is_empty()) {
        return Err(Unreadable("the file is empty or has no header row".into()));
    }
    let plan = layout.plan(&header)?;
    let mut collector = Collector::new(layout, &plan.keys, plan.measures.clone());

    // Each record is handled one step late, so that the last one can be checked for a
    // file cut inside a quoted field before any of its values is taken.
    let mut record = csv::StringRecord::new();
    let mut pending = csv::StringRecord::new();
    let mut pending_at: Option<(u64, usize)> = None;
    // Line numbers are counted from byte offsets: the csv crate's own line count falls
    // one short on CRLF files.
    let mut counted_to = 0usize;
    let mut line = 1u64;
    loop {
        match reader.read_record(&mut record) {
            Ok(true) => {}
            Ok(false) => break,
            Err(e) => {
                let line = e.position().map_or(0, |p| p.line());
                return Err(Unreadable(format!(
                    "CSV syntax error near line {line}: {e}"
                )));
            }
        }
        let mut at = record.position().map_or(counted_to, |p| {
            usize::try_from(p.byte())
                .unwrap_or(bytes.len())
                .min(bytes.len())
        });
        // On CRLF files a record's position is the `\n` ending the previous line.
        while at < bytes.len() && (bytes[at] == b'\n' || bytes[at] == b'\r') {
            at += 1;
        }
        if at >= counted_to {
            line += line_ends(&bytes[counted_to..at]);
            counted_to = at;
        }
        if let Some((pending_line, _)) = pending_at {
            take_row(&mut collector, &plan, &header, &pending, pending_line);
        }
        std::mem::swap(&mut record, &mut pending);
        pending_at = Some((line, at));
    }
    if let Some((last_line, start)) = pending_at {
        if ends_inside_quotes(&bytes[start..]) {
            let named = pending
                .iter()
                .enumerate()
                .map(|(i, f)| (header.get(i).map(String::as_str), RawCell::Text(f)));
            collector.reject_row(
                last_line,
                named,
                RejectionKind::CutShort,
                "the file ends inside a quoted field: it looks cut short; the row's values are not used (send the complete file again)",
            );
        } else {
            take_row(&mut collector, &plan, &header, &pending, last_line);
        }
    }
    Ok(collector)
}

/// Physical line ends in `bytes`: `\n`, `\r\n`, or a bare `\r` (old spreadsheet exports;
/// the csv crate ends records on each of them).
fn line_ends(bytes: &[u8]) -> u64 {
    let mut n = 0;
    for (i, &b) in bytes.iter().enumerate() {
        if b == b'\n' || (b == b'\r' && bytes.get(i + 1) != Some(&b'\n')) {
            n += 1;
        }
    }
    n
}

/// Whether the last record (its bytes to the end of the file) leaves a quoted field open.
/// The csv crate ends such a field silently at the end of the input; a sentinel record
/// appended after it is swallowed into the open field, and stays separate otherwise.
fn ends_inside_quotes(last_record: &[u8]) -> bool {
    const SENTINEL: &[u8] = b"\n\x01\n";
    if !last_record.contains(&b'"') {
        return false;
    }
    let mut probe = Vec::with_capacity(last_record.len() + SENTINEL.len());
    probe.extend_from_slice(last_record);
    probe.extend_from_slice(SENTINEL);
    let mut reader = csv::ReaderBuilder::new()
        .has_headers(false)
        .flexible(true)
        .from_reader(probe.as_slice());
    let mut records = 0;
    let mut last_is_sentinel = false;
    for r in reader.records() {
        let Ok(r) = r else { return false };
        records += 1;
        last_is_sentinel = r.len() == 1 && r.get(0) == Some("\x01");
    }
    !(records >= 2 && last_is_sentinel)
}

/// One data row: a field-count check, then its cells to the collector.
fn take_row(
    collector: &mut Collector,
    plan: &Plan,
    header: &[String],
    record: &csv::StringRecord,
    line: u64,
) {
    if record.len() != header.len() {
        let reason = format!(
            "row has {} fields but the header has {}; the row's values are not used",
            record.len(),
            header.len()
        );
        let named = record
            .iter()
            .enumerate()
            .map(|(i, f)| (header.get(i).map(String::as_str), RawCell::Text(f)));
        collector.reject_row(line, named, RejectionKind::FieldCount, &reason);
        return;
    }
    let text = |i: usize| RawCell::Text(record.get(i).unwrap_or(""));
    let cells: Vec<RawCell<'_>> = plan.measure_at.iter().map(|&i| text(i)).collect();
    collector.row(
        line,
        text(plan.site_at),
        text(plan.year_at),
        plan.visit_at.map(text),
        &cells,
    );
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn line_ends_count_lf_crlf_and_bare_cr() {
        assert_eq!(line_ends(b"a\nb\r\nc\rd"), 3);
        assert_eq!(line_ends(b"\r\n\r\n"), 2);
        assert_eq!(line_ends(b"abc"), 0);
    }

    #[test]
    fn an_open_quote_at_the_end_is_seen() {
        assert!(ends_inside_quotes(b"L2,2020,1,\"15"));
        assert!(ends_inside_quotes(b"L2,2020,1,\"15\n"));
        assert!(ends_inside_quotes(b"\"a \"\"b\"\" c,2020"));
        assert!(!ends_inside_quotes(b"L2,2020,1,\"15\""));
        assert!(!ends_inside_quotes(b"\"a, b\",2020,1,15\n"));
        assert!(!ends_inside_quotes(b"5\" pipe,2020,1,15"));
        assert!(!ends_inside_quotes(b"L2,2020,1,15"));
    }
}
