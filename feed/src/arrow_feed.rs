//! Reading an Arrow IPC feed file (file format, or stream format) into a [`Collector`].
//!
//! Text, integer and floating-point columns are understood; a cell of any other type is
//! rejected with its type named. `line` in rejections is the 1-based row number counted
//! across record batches.

use std::io::Cursor;

use arrow_array::cast::AsArray;
use arrow_array::types::{
    Float32Type, Float64Type, Int16Type, Int32Type, Int64Type, Int8Type, UInt16Type, UInt32Type,
    UInt64Type, UInt8Type,
};
use arrow_array::{Array, RecordBatch};
use arrow_schema::DataType;

use crate::collect::{Collector, RawCell};
use crate::layout::{FileLayout, Unreadable};

/// First bytes of an Arrow IPC file.
pub const FILE_MAGIC: &[u8] = b"ARROW1";
/// First bytes of an Arrow IPC stream (the continuation marker).
pub const STREAM_MAGIC: &[u8] = &[0xFF, 0xFF, 0xFF, 0xFF];

/// Read a whole Arrow IPC file or stream. The arrow-ipc reader (55.x) trusts the buffer
/// offsets and lengths written in the file and panics on some that point outside it; such
/// a file is broken data like any other, so a panic while decoding quarantines the file
/// instead of ending the process.
pub fn read(bytes: &[u8], layout: &FileLayout) -> Result<Collector, Unreadable> {
    DECODING.with(|d| d.set(true));
    let decoded = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| decode(bytes, layout)));
    DECODING.with(|d| d.set(false));
    decoded.unwrap_or_else(|payload| {
        let why = payload
            .downcast_ref::<String>()
            .map(String::as_str)
            .or_else(|| payload.downcast_ref::<&str>().copied())
            .unwrap_or("the reader gave up");
        let why: String = why.chars().take(160).collect();
        Err(Unreadable(format!(
            "unreadable Arrow IPC data: its layout is inconsistent ({why})"
        )))
    })
}

/// Keep the panics that [`crate::parse_bytes`] catches while decoding Arrow data off
/// stderr: install once at start-up. Other panics still reach the previous hook.
pub fn quiet_caught_panics() {
    let previous = std::panic::take_hook();
    std::panic::set_hook(Box::new(move |info| {
        if !DECODING.with(std::cell::Cell::get) {
            previous(info);
        }
    }));
}

thread_local! {
    /// Set while [`read`] decodes, so that the panic hook knows the panic will be caught.
    static DECODING: std::cell::Cell<bool> = const { std::cell::Cell::new(false) };
}

fn decode(bytes: &[u8], layout: &FileLayout) -> Result<Collector, Unreadable> {
    let unreadable = |e: arrow_schema::ArrowError| {
        // The reader's messages can carry a long flatbuffer trace; the start says enough.
        let text = e.to_string();
        let shown: String = text.chars().take(160).collect();
        let more = if shown.len() < text.len() { "…" } else { "" };
        Unreadable(format!("unreadable Arrow IPC data: {shown}{more}"))
    };
    let (schema, batches): (_, Box<dyn Iterator<Item = Result<RecordBatch, _>>>) =
        if bytes.starts_with(FILE_MAGIC) {
            blocks_fit(bytes)?;
            let r = arrow_ipc::reader::FileReader::try_new(Cursor::new(bytes), None)
                .map_err(unreadable)?;
            (r.schema(), Box::new(r))
        } else {
            messages_fit(bytes)?;
            let r = arrow_ipc::reader::StreamReader::try_new(Cursor::new(bytes), None)
                .map_err(unreadable)?;
            (r.schema(), Box::new(r))
        };
    let header: Vec<String> = schema
        .fields()
        .iter()
        .map(|f| f.name().trim().to_string())
        .collect();
    let plan = layout.plan(&header)?;
    let mut collector = Collector::new(layout, &plan.keys, plan.measures.clone());
    let mut row_number: u64 = 0;
    for batch in batches {
        let batch = batch.map_err(unreadable)?;
        let columns = batch.columns();
        for i in 0..batch.num_rows() {
            row_number += 1;
            let at = |c: usize| cell(columns[c].as_ref(), i);
            let cells: Vec<RawCell<'_>> = plan.measure_at.iter().map(|&c| at(c)).collect();
            collector.row(
                row_number,
                at(plan.site_at),
                at(plan.year_at),
                plan.visit_at.map(at),
                &cells,
            );
        }
    }
    Ok(collector)
}

/// The stream reader, like the file reader, allocates each message at the size the stream
/// states before reading it. Walk the messages first (continuation marker, metadata
/// length, the message's body length) and refuse any that would reach past the end.
fn messages_fit(bytes: &[u8]) -> Result<(), Unreadable> {
    let broken = |why: &str| Unreadable(format!("unreadable Arrow IPC data: {why}"));
    let n = bytes.len();
    let word =
        |at: usize| -> Option<[u8; 4]> { bytes.get(at..at + 4).map(|w| [w[0], w[1], w[2], w[3]]) };
    let mut pos = 0usize;
    while let Some(first) = word(pos) {
        // Current streams put 0xFFFFFFFF before each length; older ones only the length.
        let (meta_len, meta_at) = if first == [0xFF; 4] {
            match word(pos + 4) {
                Some(len) => (i32::from_le_bytes(len), pos + 8),
                None => return Err(broken("the stream ends inside a message header")),
            }
        } else {
            (i32::from_le_bytes(first), pos + 4)
        };
        if meta_len == 0 {
            return Ok(()); // end-of-stream marker
        }
        let meta_end = usize::try_from(meta_len)
            .ok()
            .and_then(|l| meta_at.checked_add(l))
            .filter(|&e| e <= n)
            .ok_or_else(|| broken("a message header in the stream reaches past its end"))?;
        let message = arrow_ipc::root_as_message(&bytes[meta_at..meta_end])
            .map_err(|_| broken("a message header in the stream cannot be read"))?;
        pos = usize::try_from(message.bodyLength())
            .ok()
            .and_then(|b| meta_end.checked_add(b))
            .filter(|&e| e <= n)
            .ok_or_else(|| broken("a message body in the stream reaches past its end"))?;
    }
    Ok(())
}

/// The reader allocates each block of an IPC file at the size its footer states before
/// reading it, so a footer claiming gigabytes aborts the process (an allocation failure
/// cannot be caught). Every block must lie inside the file.
fn blocks_fit(bytes: &[u8]) -> Result<(), Unreadable> {
    let broken = |why: &str| Unreadable(format!("unreadable Arrow IPC data: {why}"));
    let n = bytes.len();
    if n < FILE_MAGIC.len() * 2 + 4 {
        return Err(broken("the file is too short for an Arrow IPC file"));
    }
    let len_at = n - FILE_MAGIC.len() - 4;
    let mut len_bytes = [0u8; 4];
    len_bytes.copy_from_slice(&bytes[len_at..len_at + 4]);
    let footer_len = usize::try_from(i32::from_le_bytes(len_bytes))
        .ok()
        .filter(|&l| l <= len_at)
        .ok_or_else(|| broken("the footer length points outside the file"))?;
    let footer = arrow_ipc::root_as_footer(&bytes[len_at - footer_len..len_at])
        .map_err(|_| broken("the footer cannot be read"))?;
    let blocks = footer
        .recordBatches()
        .into_iter()
        .flatten()
        .chain(footer.dictionaries().into_iter().flatten());
    for b in blocks {
        let end = b
            .offset()
            .checked_add(i64::from(b.metaDataLength()))
            .and_then(|e| e.checked_add(b.bodyLength()));
        let inside = b.offset() >= 0
            && b.metaDataLength() >= 0
            && b.bodyLength() >= 0
            && end.is_some_and(|e| usize::try_from(e).is_ok_and(|e| e <= n));
        if !inside {
            return Err(broken("a record batch in the footer lies outside the file"));
        }
    }
    Ok(())
}

fn cell(array: &dyn Array, i: usize) -> RawCell<'_> {
    if array.is_null(i) {
        return RawCell::Empty;
    }
    macro_rules! int {
        ($t:ty) => {
            array
                .as_primitive_opt::<$t>()
                .map_or(RawCell::Unsupported("?"), |a| {
                    RawCell::Int(i64::from(a.value(i)))
                })
        };
    }
    match array.data_type() {
        DataType::Utf8 => array
            .as_string_opt::<i32>()
            .map_or(RawCell::Unsupported("?"), |a| RawCell::Text(a.value(i))),
        DataType::LargeUtf8 => array
            .as_string_opt::<i64>()
            .map_or(RawCell::Unsupported("?"), |a| RawCell::Text(a.value(i))),
        DataType::Utf8View => array
            .as_string_view_opt()
            .map_or(RawCell::Unsupported("?"), |a| RawCell::Text(a.value(i))),
        DataType::Int8 => int!(Int8Type),
        DataType::Int16 => int!(Int16Type),
        DataType::Int32 => int!(Int32Type),
        DataType::Int64 => int!(Int64Type),
        DataType::UInt8 => int!(UInt8Type),
        DataType::UInt16 => int!(UInt16Type),
        DataType::UInt32 => int!(UInt32Type),
        DataType::UInt64 => {
            array
                .as_primitive_opt::<UInt64Type>()
                .map_or(RawCell::Unsupported("?"), |a| {
                    match i64::try_from(a.value(i)) {
                        Ok(v) => RawCell::Int(v),
                        Err(_) => RawCell::Float(a.value(i) as f64),
                    }
                })
        }
        DataType::Float32 => array
            .as_primitive_opt::<Float32Type>()
            .map_or(RawCell::Unsupported("?"), |a| {
                RawCell::Float(f64::from(a.value(i)))
            }),
        DataType::Float64 => array
            .as_primitive_opt::<Float64Type>()
            .map_or(RawCell::Unsupported("?"), |a| RawCell::Float(a.value(i))),
        DataType::Boolean => RawCell::Unsupported("boolean"),
        DataType::Date32 | DataType::Date64 => RawCell::Unsupported("date"),
        DataType::Timestamp(..) => RawCell::Unsupported("timestamp"),
        DataType::Dictionary(..) => {
            RawCell::Unsupported("dictionary-encoded value (send plain text)")
        }
        DataType::Decimal128(..) | DataType::Decimal256(..) => {
            RawCell::Unsupported("decimal (send float64)")
        }
        _ => RawCell::Unsupported("value of an unsupported Arrow type"),
    }
}

#[cfg(test)]
mod stream_guard_tests {
    use super::messages_fit;

    /// A stream whose first message claims a header of 2 GiB is refused before the reader
    /// would try to allocate it; an empty stream (only the end marker) passes.
    #[test]
    fn stream_lengths_past_the_end_are_refused() {
        let huge = [0xFF, 0xFF, 0xFF, 0xFF, 0xFF, 0xFF, 0xFF, 0x7F, 0, 0, 0, 0];
        let err = messages_fit(&huge).unwrap_err();
        assert!(err.0.contains("reaches past its end"), "{}", err.0);
        assert!(messages_fit(&[0xFF, 0xFF, 0xFF, 0xFF, 0, 0, 0, 0]).is_ok());
    }
}
