//! Reading a CSV feed file (UTF-8, header row, comma; a UTF-8 byte-order mark and CRLF
//! line ends are tolerated) into a [`Collector`].

use super::collect::{Collector, RawCell};
use super::{FileLayout, Unreadable};

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
    let mut collector = Collector::new(&layout.keys.site, &layout.keys.year, plan.measures.clone());

    let mut record = csv::StringRecord::new();
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
        if let Some(p) = record.position() {
            let mut at = usize::try_from(p.byte())
                .unwrap_or(bytes.len())
                .min(bytes.len());
            // On CRLF files a record's position is the `\n` ending the previous line.
            while at < bytes.len() && (bytes[at] == b'\n' || bytes[at] == b'\r') {
                at += 1;
            }
            if at >= counted_to {
                line += bytes[counted_to..at]
                    .iter()
                    .filter(|&&b| b == b'\n')
                    .count() as u64;
                counted_to = at;
            }
        }
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
            collector.reject_row(line, named, &reason);
            continue;
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
    Ok(collector)
}
