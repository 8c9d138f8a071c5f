//! Turning rows of cells into accepted values and rejections, the same way for every file
//! format: key checks, number parsing, in-file duplicates and conflicts.

use std::collections::HashMap;

use crate::batch::{BatchValues, Cell, Censor, NewRejection, NewValue, RejectionKind};
use crate::layout::FileLayout;

/// Visit label stored when a file has no visit column, or an empty visit cell.
pub const DEFAULT_VISIT: &str = "1";

/// Years outside this range are taken as typing errors.
pub const YEARS: std::ops::RangeInclusive<i64> = 1800..=2200;

/// Why one cell cannot be used: its kind, and the reason stored with its rejection.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct CellError {
    pub kind: RejectionKind,
    pub reason: String,
}

impl CellError {
    fn new(kind: RejectionKind, reason: impl Into<String>) -> CellError {
        CellError {
            kind,
            reason: reason.into(),
        }
    }
}

/// One cell as a reader found it.
#[derive(Debug, Clone, Copy)]
pub enum RawCell<'a> {
    Empty,
    Text(&'a str),
    Int(i64),
    Float(f64),
    /// A typed cell of a type we cannot use (e.g. an Arrow boolean); names the type.
    Unsupported(&'a str),
}

impl RawCell<'_> {
    fn is_empty(&self) -> bool {
        match self {
            RawCell::Empty => true,
            RawCell::Text(t) => t.trim().is_empty(),
            _ => false,
        }
    }

    /// [`RawCell::raw`] appended to `buf` (no allocation per cell); the range it took.
    fn append_raw(&self, buf: &mut String) -> Option<std::ops::Range<usize>> {
        use std::fmt::Write as _;
        let start = buf.len();
        match self {
            RawCell::Empty | RawCell::Unsupported(_) => return None,
            RawCell::Text(t) => buf.push_str(t),
            RawCell::Int(i) => {
                let _ = write!(buf, "{i}");
            }
            RawCell::Float(x) => {
                let _ = write!(buf, "{x}");
            }
        }
        Some(start..buf.len())
    }

    fn raw(&self) -> Option<String> {
        match self {
            RawCell::Empty => None,
            RawCell::Text(t) => Some((*t).to_string()),
            RawCell::Int(i) => Some(i.to_string()),
            RawCell::Float(x) => Some(x.to_string()),
            RawCell::Unsupported(_) => None,
        }
    }
}

/// What a measurement column holds.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ColumnKind {
    /// Numbers (or censored numbers): a series reads them.
    Numeric,
    Label,
    /// No series reads it: numbers where the cell is one, its text verbatim otherwise.
    Free,
}

/// A measurement column of the file being read.
#[derive(Debug, Clone)]
pub struct Measure {
    pub name: String,
    pub kind: ColumnKind,
    /// Read on the log scale by some series: a `<x` needs `x > 0`.
    pub positive: bool,
}

type Key = (u32, i32, u32, u32);

/// One line's cell for a key: its line and its text as written.
type Occurrence = (u64, Option<String>);

/// An accepted key: its value's index in `values.values` and its text in `first_raw`.
#[derive(Debug, Clone)]
struct Seen {
    at: usize,
    raw: Option<std::ops::Range<usize>>,
}

/// Accumulates one file's values.
pub struct Collector {
    measures: Vec<Measure>,
    missing: MissingCodes,
    site_col: String,
    year_col: String,
    values: BatchValues,
    site_ix: HashMap<String, u32>,
    visit_ix: HashMap<String, u32>,
    label_ix: HashMap<String, u32>,
    /// Where each key's accepted value sits in `values.values`, and where its cell's text
    /// as written sits in `first_raw` (a conflict found later quotes it verbatim: `1.0`,
    /// not the parsed `1`).
    seen: HashMap<Key, Seen>,
    /// The text of every accepted cell, end to end; `Seen::raw` slices it.
    first_raw: String,
    /// Identical repeats of an accepted key, (line, raw), so that a conflict found later
    /// lists them too.
    repeats: HashMap<Key, Vec<Occurrence>>,
    /// Keys sent with different values in this file: every occurrence (line, raw).
    conflicts: HashMap<Key, Vec<Occurrence>>,
    rejections: Vec<NewRejection>,
    rows_read: u64,
}

fn intern(map: &mut HashMap<String, u32>, table: &mut Vec<String>, s: &str) -> u32 {
    if let Some(&i) = map.get(s) {
        return i;
    }
    let i = table.len() as u32;
    table.push(s.to_string());
    map.insert(s.to_string(), i);
    i
}

/// The cells that mean "no value" besides the empty one.
#[derive(Debug, Clone, Default)]
struct MissingCodes {
    text: Vec<String>,
    /// The codes that are numbers: they match typed cells (and other spellings) of that
    /// number, so `-999`, `-999.0` and an Arrow integer -999 are all missing.
    numbers: Vec<f64>,
}

impl MissingCodes {
    fn new(codes: &[String]) -> MissingCodes {
        MissingCodes {
            text: codes.iter().map(|c| c.trim().to_string()).collect(),
            numbers: codes
                .iter()
                .filter_map(|c| c.trim().parse::<f64>().ok())
                .filter(|x| x.is_finite())
                .collect(),
        }
    }

    fn matches(&self, cell: RawCell<'_>) -> bool {
        let number = |x: f64| self.numbers.contains(&x);
        match cell {
            RawCell::Text(t) => {
                let t = t.trim();
                self.text.iter().any(|c| c == t)
                    || (!self.numbers.is_empty() && t.parse::<f64>().is_ok_and(number))
            }
            RawCell::Int(i) => number(i as f64),
            RawCell::Float(x) => number(x),
            RawCell::Empty | RawCell::Unsupported(_) => false,
        }
    }
}

impl Collector {
    /// A collector for a file read with `keys` (one of `layout.keys`).
    pub fn new(layout: &FileLayout, keys: &crate::KeyColumns, measures: Vec<Measure>) -> Collector {
        let values = BatchValues {
            columns: measures.iter().map(|m| m.name.clone()).collect(),
            keys: keys.clone(),
            ..BatchValues::default()
        };
        Collector {
            measures,
            missing: MissingCodes::new(&layout.missing),
            site_col: keys.site.clone(),
            year_col: keys.year.clone(),
            values,
            site_ix: HashMap::new(),
            visit_ix: HashMap::new(),
            label_ix: HashMap::new(),
            seen: HashMap::new(),
            first_raw: String::new(),
            repeats: HashMap::new(),
            conflicts: HashMap::new(),
            rejections: Vec::new(),
            rows_read: 0,
        }
    }

    /// Reject every non-empty cell of a row for one reason (at least one rejection, so a
    /// bad row never vanishes without a trace). `cells` pairs a column name (None beyond
    /// the header) with the cell.
    pub fn reject_row<'a>(
        &mut self,
        line: u64,
        cells: impl IntoIterator<Item = (Option<&'a str>, RawCell<'a>)>,
        kind: RejectionKind,
        reason: &str,
    ) {
        self.rows_read += 1;
        let before = self.rejections.len();
        for (col, cell) in cells {
            if !cell.is_empty() {
                self.rejections.push(NewRejection {
                    line: Some(line),
                    column: col.map(str::to_string),
                    raw: cell.raw(),
                    kind,
                    reason: reason.to_string(),
                });
            }
        }
        if self.rejections.len() == before {
            self.rejections.push(NewRejection {
                line: Some(line),
                column: None,
                raw: None,
                kind,
                reason: reason.to_string(),
            });
        }
    }

    /// One row: its key cells and its measurement cells, in the order of `measures`.
    pub fn row(
        &mut self,
        line: u64,
        site: RawCell<'_>,
        year: RawCell<'_>,
        visit: Option<RawCell<'_>>,
        cells: &[RawCell<'_>],
    ) {
        let measures = std::mem::take(&mut self.measures);
        let named = || {
            measures
                .iter()
                .map(|m| Some(m.name.as_str()))
                .zip(cells.iter().copied())
        };
        let site_code = match site {
            RawCell::Text(t) if !t.trim().is_empty() => Some(t.to_string()),
            RawCell::Int(i) => Some(i.to_string()),
            _ => None,
        };
        let Some(site_code) = site_code else {
            let (kind, reason) = match site {
                RawCell::Unsupported(ty) => (
                    RejectionKind::SiteNotTextOrInteger,
                    format!(
                        "site column `{}` holds a {ty}; expected text or an integer",
                        self.site_col
                    ),
                ),
                RawCell::Float(_) => (
                    RejectionKind::SiteNotTextOrInteger,
                    format!(
                        "site column `{}` holds a floating-point number; expected text or an integer",
                        self.site_col
                    ),
                ),
                _ => (
                    RejectionKind::NoSite,
                    format!("row has no site (column `{}` is empty)", self.site_col),
                ),
            };
            self.reject_row(line, named(), kind, &reason);
            self.measures = measures;
            return;
        };
        let year = match parse_year(year) {
            Ok(y) => y,
            Err(why) => {
                let reason = format!(
                    "{} (column `{}`); the row's values are not used",
                    why.reason, self.year_col
                );
                self.reject_row(line, named(), why.kind, &reason);
                self.measures = measures;
                return;
            }
        };
        self.rows_read += 1;
        let visit_label = match visit {
            Some(RawCell::Text(t)) if !t.trim().is_empty() => t.to_string(),
            Some(RawCell::Int(i)) => i.to_string(),
            _ => DEFAULT_VISIT.to_string(),
        };
        let site_i = intern(&mut self.site_ix, &mut self.values.sites, &site_code);
        let visit_i = intern(&mut self.visit_ix, &mut self.values.visits, &visit_label);

        for (col_i, (m, cell)) in measures.iter().zip(cells.iter()).enumerate() {
            if cell.is_empty() || self.missing.matches(*cell) {
                continue;
            }
            let parsed = match m.kind {
                ColumnKind::Numeric => parse_value(*cell, m.positive),
                ColumnKind::Free => match (parse_value(*cell, false), cell) {
                    (Ok(v), _) => Ok(v),
                    (Err(_), RawCell::Text(t)) => Ok(Cell::Label(intern(
                        &mut self.label_ix,
                        &mut self.values.labels,
                        t,
                    ))),
                    (Err(e), _) => Err(e),
                },
                ColumnKind::Label => match cell {
                    RawCell::Text(t) => Ok(Cell::Label(intern(
                        &mut self.label_ix,
                        &mut self.values.labels,
                        t,
                    ))),
                    RawCell::Int(i) => Ok(Cell::Label(intern(
                        &mut self.label_ix,
                        &mut self.values.labels,
                        &i.to_string(),
                    ))),
                    RawCell::Float(x) => Ok(Cell::Label(intern(
                        &mut self.label_ix,
                        &mut self.values.labels,
                        &x.to_string(),
                    ))),
                    RawCell::Unsupported(ty) => Err(CellError::new(
                        RejectionKind::NotALabel,
                        format!("a {ty} cannot be a group label"),
                    )),
                    RawCell::Empty => continue,
                },
            };
            let cell_value = match parsed {
                Ok(c) => c,
                Err(why) => {
                    self.rejections.push(NewRejection {
                        line: Some(line),
                        column: Some(m.name.clone()),
                        raw: cell.raw(),
                        kind: why.kind,
                        reason: why.reason,
                    });
                    continue;
                }
            };
            let key = (site_i, year, visit_i, col_i as u32);
            if let Some(list) = self.conflicts.get_mut(&key) {
                list.push((line, cell.raw()));
                continue;
            }
            match self.seen.get(&key) {
                None => {
                    let raw = cell.append_raw(&mut self.first_raw);
                    self.seen.insert(
                        key,
                        Seen {
                            at: self.values.values.len(),
                            raw,
                        },
                    );
                    self.values.values.push(NewValue {
                        site: site_i,
                        year,
                        visit: visit_i,
                        column: col_i as u32,
                        cell: cell_value,
                        line,
                    });
                }
                // An identical repeat inside the file is kept once; its line is kept in
                // case a later line of the key conflicts.
                Some(seen) if same_cell(self.values.values[seen.at].cell, cell_value) => {
                    self.repeats
                        .entry(key)
                        .or_default()
                        .push((line, cell.raw()));
                }
                Some(seen) => {
                    let first_line = self.values.values[seen.at].line;
                    let first_raw = seen.raw.clone().map(|r| self.first_raw[r].to_string());
                    let mut occurrences = vec![(first_line, first_raw)];
                    occurrences.extend(self.repeats.remove(&key).unwrap_or_default());
                    occurrences.push((line, cell.raw()));
                    self.conflicts.insert(key, occurrences);
                }
            }
        }
        self.measures = measures;
    }

    /// The accepted values, the rejections and the number of data rows read.
    pub fn finish(mut self) -> (u64, BatchValues, Vec<NewRejection>) {
        if !self.conflicts.is_empty() {
            self.values.values.retain(|v| {
                !self
                    .conflicts
                    .contains_key(&(v.site, v.year, v.visit, v.column))
            });
            let mut conflicts: Vec<_> = self.conflicts.into_iter().collect();
            conflicts.sort_by_key(|(_, occ)| occ[0].0);
            for (key, occurrences) in conflicts {
                // Each occurrence carries the reason, so the list of lines is capped:
                // a key repeated n times must not cost n² of text.
                const LISTED: usize = 10;
                let mut lines: Vec<String> = occurrences
                    .iter()
                    .take(LISTED)
                    .map(|(l, _)| l.to_string())
                    .collect();
                if occurrences.len() > LISTED {
                    lines.push(format!("and {} more", occurrences.len() - LISTED));
                }
                let reason = format!(
                    "conflicting values for the same site, year, visit and column in this file (lines {}); none of them is used",
                    lines.join(", ")
                );
                let column = self.values.columns[key.3 as usize].clone();
                for (line, raw) in occurrences {
                    self.rejections.push(NewRejection {
                        line: Some(line),
                        column: Some(column.clone()),
                        raw,
                        kind: RejectionKind::Conflict,
                        reason: reason.clone(),
                    });
                }
            }
        }
        self.rejections
            .sort_by(|a, b| a.line.cmp(&b.line).then_with(|| a.column.cmp(&b.column)));
        (self.rows_read, self.values, self.rejections)
    }
}

fn same_cell(a: Cell, b: Cell) -> bool {
    match (a, b) {
        (Cell::Num(x), Cell::Num(y)) => x.to_bits() == y.to_bits() || x == y,
        (Cell::Censored(s, x), Cell::Censored(t, y)) => s == t && x == y,
        (Cell::Label(i), Cell::Label(j)) => i == j,
        _ => false,
    }
}

/// A measured value: a number, or `<x` / `>x` (spaces allowed around both parts) for a
/// value censored at the finite number `x`. Under `positive` (a column read on the log
/// scale) a `<x` needs `x > 0`.
pub fn parse_value(cell: RawCell<'_>, positive: bool) -> Result<Cell, CellError> {
    let RawCell::Text(text) = cell else {
        return parse_number(cell).map(Cell::Num);
    };
    let t = text.trim();
    let (side, rest) = if let Some(rest) = t.strip_prefix('<') {
        (Censor::Below, rest)
    } else if let Some(rest) = t.strip_prefix('>') {
        (Censor::Above, rest)
    } else {
        return parse_number(cell).map(Cell::Num);
    };
    let limit = parse_number(RawCell::Text(rest)).map_err(|why| {
        CellError::new(
            RejectionKind::CensoredLimit,
            format!(
                "`{}` is censored at a limit that is not usable: {}",
                excerpt(t),
                why.reason
            ),
        )
    })?;
    if positive && side == Censor::Below && limit <= 0.0 {
        return Err(CellError::new(
            RejectionKind::CensoredLimit,
            format!(
                "`{}`: a series reads this column on the log scale, where no value lies \
                 below a limit that is not positive",
                excerpt(t)
            ),
        ));
    }
    Ok(Cell::Censored(side, limit))
}

/// A measurement value: finite, within f64.
pub fn parse_number(cell: RawCell<'_>) -> Result<f64, CellError> {
    use RejectionKind::*;
    let nan = || {
        CellError::new(
            NaN,
            "NaN is not a value; leave the cell empty for a missing value",
        )
    };
    let infinite = || CellError::new(Infinite, "infinite values are not accepted");
    match cell {
        RawCell::Float(x) if x.is_nan() => Err(nan()),
        RawCell::Float(x) if x.is_infinite() => Err(infinite()),
        RawCell::Float(x) => Ok(x),
        RawCell::Int(i) => Ok(i as f64),
        RawCell::Unsupported(ty) => Err(CellError::new(
            NotANumber,
            format!("a {ty} is not a number"),
        )),
        RawCell::Empty => Err(CellError::new(NotANumber, "empty")),
        RawCell::Text(t) => {
            let t = t.trim();
            match t.parse::<f64>() {
                Err(_) => Err(CellError::new(
                    NotANumber,
                    format!("`{}` is not a number", excerpt(t)),
                )),
                Ok(x) if x.is_nan() => Err(nan()),
                Ok(x) if x.is_infinite() => {
                    let word = t.trim_start_matches(['+', '-']).to_ascii_lowercase();
                    if word.starts_with("inf") {
                        Err(infinite())
                    } else {
                        Err(CellError::new(
                            TooLarge,
                            format!("`{}` overflows a 64-bit floating-point number", excerpt(t)),
                        ))
                    }
                }
                // Parsing rounds a non-zero number below the smallest subnormal to zero,
                // which would turn a small positive concentration into a zero (and drop
                // it from a log-scale fit) without a word.
                Ok(x) if x == 0.0 && has_nonzero_digit(t) => Err(CellError::new(
                    TooSmall,
                    format!(
                        "`{t}` is too small for a 64-bit floating-point number (it would be stored as 0)"
                    ),
                )),
                Ok(x) => Ok(x),
            }
        }
    }
}

/// Whether the digits of a decimal number (before any exponent) are not all zero.
fn has_nonzero_digit(t: &str) -> bool {
    t.split(['e', 'E'])
        .next()
        .is_some_and(|m| m.bytes().any(|b| (b'1'..=b'9').contains(&b)))
}

/// A cell's text as quoted in a reason: whole when short, else its start (the full text
/// stays in `rejections.raw_value`).
fn excerpt(t: &str) -> std::borrow::Cow<'_, str> {
    const SHOWN: usize = 60;
    match t.char_indices().nth(SHOWN) {
        None => t.into(),
        Some((end, _)) => format!("{}… ({} bytes)", &t[..end], t.len()).into(),
    }
}

/// A year: an integer (an integral decimal such as `2019.0` is accepted) within [`YEARS`].
pub fn parse_year(cell: RawCell<'_>) -> Result<i32, CellError> {
    use RejectionKind::*;
    let no_year = || CellError::new(NoYear, "row has no year");
    let year = match cell {
        RawCell::Empty => return Err(no_year()),
        RawCell::Text(t) if t.trim().is_empty() => return Err(no_year()),
        RawCell::Text(t) => {
            let t = t.trim();
            match t.parse::<i64>() {
                Ok(y) => y,
                Err(_) => match t.parse::<f64>() {
                    Ok(x) if x.is_finite() && x.fract() == 0.0 && x.abs() < 1e9 => x as i64,
                    _ => {
                        return Err(CellError::new(
                            YearNotAnInteger,
                            format!("year `{}` is not an integer", excerpt(t)),
                        ))
                    }
                },
            }
        }
        RawCell::Int(i) => i,
        RawCell::Float(x) if x.is_finite() && x.fract() == 0.0 && x.abs() < 1e9 => x as i64,
        RawCell::Float(x) => {
            return Err(CellError::new(
                YearNotAnInteger,
                format!("year `{x}` is not an integer"),
            ))
        }
        RawCell::Unsupported(ty) => {
            return Err(CellError::new(
                YearNotAnInteger,
                format!("year is a {ty}, not an integer"),
            ))
        }
    };
    if !YEARS.contains(&year) {
        return Err(CellError::new(
            YearOutsideRange,
            format!("year {year} is outside {}..={}", YEARS.start(), YEARS.end()),
        ));
    }
    i32::try_from(year)
        .map_err(|_| CellError::new(YearOutsideRange, format!("year {year} is out of range")))
}

#[cfg(test)]
mod tests {
    use super::*;

    fn numeric(names: &[&str]) -> Vec<Measure> {
        names
            .iter()
            .map(|n| Measure {
                name: n.to_string(),
                kind: ColumnKind::Numeric,
                positive: false,
            })
            .collect()
    }

    fn collector(measures: Vec<Measure>) -> Collector {
        let keys = crate::KeyColumns {
            site: "lake".into(),
            year: "season".into(),
            visit: None,
        };
        Collector::new(
            &FileLayout::numeric(keys.clone(), Default::default()),
            &keys,
            measures,
        )
    }

    #[test]
    fn censored_cells_parse_with_spaces_and_refuse_unusable_limits() {
        let t = RawCell::Text;
        assert_eq!(
            parse_value(t("<0.5"), true),
            Ok(Cell::Censored(Censor::Below, 0.5))
        );
        assert_eq!(
            parse_value(t("  < 0.5 "), false),
            Ok(Cell::Censored(Censor::Below, 0.5))
        );
        assert_eq!(
            parse_value(t(">7.5"), true),
            Ok(Cell::Censored(Censor::Above, 7.5))
        );
        assert_eq!(
            parse_value(t("<-1"), false),
            Ok(Cell::Censored(Censor::Below, -1.0))
        );
        assert_eq!(parse_value(t("3.25"), true), Ok(Cell::Num(3.25)));
        assert_eq!(parse_value(RawCell::Float(2.0), true), Ok(Cell::Num(2.0)));
        for bad in ["<", "<abc", "<NaN", ">inf", "<<1"] {
            let (kind, reason) = refused(parse_value(t(bad), false));
            assert_eq!(kind, RejectionKind::CensoredLimit, "{bad}");
            assert!(reason.contains("not usable"), "{bad}: {reason}");
        }
        // Under a log series no value lies below a non-positive limit; above one is fine.
        for bad in ["<0", "<-0.5", "< 0.0"] {
            let (kind, reason) = refused(parse_value(t(bad), true));
            assert_eq!(kind, RejectionKind::CensoredLimit);
            assert!(reason.contains("log scale"), "{reason}");
        }
        assert_eq!(
            parse_value(t(">0"), true),
            Ok(Cell::Censored(Censor::Above, 0.0))
        );
    }

    #[test]
    fn missing_codes_are_neither_stored_nor_rejected_and_free_text_is_kept() {
        let keys = crate::KeyColumns {
            site: "lake".into(),
            year: "season".into(),
            visit: None,
        };
        let layout = FileLayout {
            missing: vec!["NA".into(), " -999 ".into()],
            ..FileLayout::numeric(keys.clone(), Default::default())
        };
        let measures = vec![
            Measure {
                name: "chl".into(),
                kind: ColumnKind::Numeric,
                positive: true,
            },
            Measure {
                name: "remarks".into(),
                kind: ColumnKind::Free,
                positive: false,
            },
        ];
        let mut c = Collector::new(&layout, &keys, measures);
        let t = RawCell::Text;
        c.row(2, t("A"), t("2020"), None, &[t("NA"), t("ice on, NA")]);
        c.row(3, t("B"), t("2020"), None, &[t("-999.0"), t(" 12 ")]);
        c.row(4, t("C"), t("2020"), None, &[RawCell::Int(-999), t("<0.2")]);
        c.row(5, t("D"), t("2020"), None, &[t("<0.1"), t("NA")]);
        c.row(6, t("E"), t("2020"), None, &[t("n.d."), RawCell::Empty]);
        let (rows, values, rejections) = c.finish();
        assert_eq!(rows, 5);
        let cells: Vec<(u32, Cell)> = values.values.iter().map(|v| (v.site, v.cell)).collect();
        assert_eq!(
            cells,
            [
                (0, Cell::Label(0)),
                (1, Cell::Num(12.0)),
                (2, Cell::Censored(Censor::Below, 0.2)),
                (3, Cell::Censored(Censor::Below, 0.1)),
            ]
        );
        // Free text is kept verbatim, spaces and all.
        assert_eq!(values.labels, ["ice on, NA"]);
        // A column a series reads still rejects what is not a number.
        assert_eq!(rejections.len(), 1);
        assert_eq!(rejections[0].line, Some(6));
        assert_eq!(rejections[0].kind, RejectionKind::NotANumber);
    }

    /// The error of a cell that must not parse: its kind and the start of its reason.
    fn refused<T: std::fmt::Debug>(r: Result<T, CellError>) -> (RejectionKind, String) {
        let e = r.unwrap_err();
        (e.kind, e.reason)
    }

    #[test]
    fn numbers() {
        use RejectionKind::*;
        assert_eq!(parse_number(RawCell::Text(" 1.5 ")), Ok(1.5));
        assert_eq!(parse_number(RawCell::Text("-2e3")), Ok(-2000.0));
        let cases = [
            ("1,5", NotANumber, "not a number"),
            ("NaN", NaN, "NaN"),
            ("-inf", Infinite, "infinite"),
            ("1e400", TooLarge, "overflows"),
            ("1e-400", TooSmall, "too small"),
        ];
        for (text, kind, words) in cases {
            let (k, reason) = refused(parse_number(RawCell::Text(text)));
            assert_eq!(k, kind, "{text}");
            assert!(reason.contains(words), "{text}: {reason}");
        }
        assert_eq!(parse_number(RawCell::Text("0.000e-999")), Ok(0.0));
        assert_eq!(parse_number(RawCell::Text("-0")), Ok(0.0));
        assert_eq!(parse_number(RawCell::Text("5e-324")), Ok(5e-324));
        let long = "y".repeat(100_000);
        assert!(refused(parse_number(RawCell::Text(&long))).1.len() < 100);
        assert_eq!(refused(parse_number(RawCell::Float(f64::NAN))).0, NaN);
        assert_eq!(
            refused(parse_number(RawCell::Unsupported("boolean"))).0,
            NotANumber
        );
        assert_eq!(parse_number(RawCell::Int(-3)), Ok(-3.0));
    }

    #[test]
    fn years() {
        use RejectionKind::*;
        assert_eq!(parse_year(RawCell::Text("2019")), Ok(2019));
        assert_eq!(parse_year(RawCell::Text("2019.0")), Ok(2019));
        let (kind, reason) = refused(parse_year(RawCell::Text("2019.5")));
        assert_eq!(kind, YearNotAnInteger);
        assert!(reason.contains("not an integer"), "{reason}");
        assert_eq!(
            refused(parse_year(RawCell::Text("19x"))).0,
            YearNotAnInteger
        );
        let (kind, reason) = refused(parse_year(RawCell::Int(1700)));
        assert_eq!(kind, YearOutsideRange);
        assert!(reason.contains("outside"), "{reason}");
        let (kind, reason) = refused(parse_year(RawCell::Empty));
        assert_eq!(kind, NoYear);
        assert!(reason.contains("no year"), "{reason}");
        assert_eq!(refused(parse_year(RawCell::Text("  "))).0, NoYear);
    }

    #[test]
    fn conflicts_reject_every_occurrence_and_identical_repeats_stay_once() {
        let mut c = collector(numeric(&["chl", "tp"]));
        let t = RawCell::Text;
        c.row(2, t("A"), t("2020"), None, &[t("1.0"), t("5")]);
        c.row(3, t("A"), t("2020"), None, &[t("2.0"), t("5.0")]);
        c.row(4, t("A"), t("2020"), None, &[t("1"), RawCell::Empty]);
        let (rows, values, rejections) = c.finish();
        assert_eq!(rows, 3);
        // tp: 5 and 5.0 are the same number, kept once; chl conflicts on lines 2, 3, 4.
        assert_eq!(values.values.len(), 1);
        assert_eq!(values.columns[values.values[0].column as usize], "tp");
        assert_eq!(rejections.len(), 3);
        assert!(rejections
            .iter()
            .all(|r| r.reason.contains("lines 2, 3, 4") && r.kind == RejectionKind::Conflict));
        assert_eq!(rejections[1].raw.as_deref(), Some("2.0"));
        // Each occurrence keeps its text as written, the first one included.
        assert_eq!(rejections[0].raw.as_deref(), Some("1.0"));
        assert_eq!(rejections[2].raw.as_deref(), Some("1"));
    }

    #[test]
    fn identical_repeats_before_a_conflict_are_rejected_and_listed_too() {
        let mut c = collector(numeric(&["chl"]));
        let t = RawCell::Text;
        for (line, v) in [(2, "1.0"), (3, "1.0"), (4, "2.0"), (5, "1.00")] {
            c.row(line, t("A"), t("2020"), None, &[t(v)]);
        }
        let (_, values, rejections) = c.finish();
        assert!(values.values.is_empty());
        let got: Vec<_> = rejections
            .iter()
            .map(|r| (r.line, r.raw.as_deref()))
            .collect();
        assert_eq!(
            got,
            [
                (Some(2), Some("1.0")),
                (Some(3), Some("1.0")),
                (Some(4), Some("2.0")),
                (Some(5), Some("1.00"))
            ]
        );
        assert!(rejections
            .iter()
            .all(|r| r.reason.contains("lines 2, 3, 4, 5")));
    }

    #[test]
    fn a_much_repeated_conflict_lists_a_few_lines() {
        let mut c = collector(numeric(&["chl"]));
        let t = RawCell::Text;
        let values: Vec<String> = (0..50).map(|i| i.to_string()).collect();
        for (i, v) in values.iter().enumerate() {
            c.row(i as u64 + 2, t("A"), t("2020"), None, &[t(v)]);
        }
        let (_, _, rejections) = c.finish();
        assert_eq!(rejections.len(), 50);
        assert!(rejections[0]
            .reason
            .contains("lines 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, and 40 more"));
    }

    #[test]
    fn a_row_without_site_is_rejected_value_by_value() {
        let mut c = collector(numeric(&["chl", "tp"]));
        let t = RawCell::Text;
        c.row(2, t(" "), t("2020"), None, &[t("1.0"), t("x")]);
        c.row(
            3,
            t("B"),
            t("20x0"),
            None,
            &[RawCell::Empty, RawCell::Empty],
        );
        let (_, values, rejections) = c.finish();
        assert!(values.values.is_empty());
        assert_eq!(rejections.len(), 3);
        assert!(rejections[0].reason.contains("no site"));
        assert!(rejections[..2]
            .iter()
            .all(|r| r.kind == RejectionKind::NoSite));
        assert_eq!(rejections[2].column, None);
        assert!(rejections[2].reason.contains("20x0"));
        assert_eq!(rejections[2].kind, RejectionKind::YearNotAnInteger);
    }
}
