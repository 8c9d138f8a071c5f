//! What a feed file becomes: its accepted values (interned, at most one per key), its
//! rejections with their reasons, or the reason it cannot be read at all.

use std::fmt;

use crate::collect::YEARS;

/// A value's content: a number, a censored number (its limit), or text (an index into
/// [`BatchValues::labels`]: a group label, or a cell of a column no series reads as a
/// number, kept verbatim).
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Cell {
    Num(f64),
    /// `<x` (below `x`) or `>x` (above `x`): known only to lie on one side of a limit.
    Censored(Censor, f64),
    Label(u32),
}

/// Which side of its limit a censored value lies on.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum Censor {
    /// `<x`: below a detection or reporting limit.
    Below,
    /// `>x`: beyond a measuring range.
    Above,
}

impl Censor {
    /// The word stored in `observations.censoring`.
    pub fn as_str(self) -> &'static str {
        match self {
            Censor::Below => "below",
            Censor::Above => "above",
        }
    }

    /// The inverse of [`Censor::as_str`].
    pub fn parse(word: &str) -> Option<Censor> {
        match word {
            "below" => Some(Censor::Below),
            "above" => Some(Censor::Above),
            _ => None,
        }
    }
}

/// One accepted value. Site, visit and column are indices into the tables of
/// [`BatchValues`], so a million values do not carry a million strings.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct NewValue {
    pub site: u32,
    pub year: i32,
    pub visit: u32,
    pub column: u32,
    pub cell: Cell,
    pub line: u64,
}

/// The accepted values of one file, at most one per (site, year, visit, column).
#[derive(Debug, Default, Clone)]
pub struct BatchValues {
    /// The key columns the file was read with.
    pub keys: crate::KeyColumns,
    pub sites: Vec<String>,
    pub visits: Vec<String>,
    pub columns: Vec<String>,
    pub labels: Vec<String>,
    pub values: Vec<NewValue>,
}

/// The family a rejection belongs to. `reason` says what exactly was wrong with the cell;
/// the kind lets a file's rejections be counted by cause in one line.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum RejectionKind {
    NotANumber,
    NaN,
    Infinite,
    TooLarge,
    TooSmall,
    NotALabel,
    CensoredLimit,
    NoSite,
    SiteNotTextOrInteger,
    NoYear,
    YearNotAnInteger,
    YearOutsideRange,
    FieldCount,
    CutShort,
    Conflict,
}

impl fmt::Display for RejectionKind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        let text = match self {
            RejectionKind::NotANumber => "not a number",
            RejectionKind::NaN => "NaN",
            RejectionKind::Infinite => "infinite",
            RejectionKind::TooLarge => "too large for 64-bit floating point",
            RejectionKind::TooSmall => "too small for 64-bit floating point",
            RejectionKind::NotALabel => "not usable as a group label",
            RejectionKind::CensoredLimit => "censoring limit not usable",
            RejectionKind::NoSite => "no site",
            RejectionKind::SiteNotTextOrInteger => "site not text or an integer",
            RejectionKind::NoYear => "no year",
            RejectionKind::YearNotAnInteger => "year not an integer",
            RejectionKind::YearOutsideRange => {
                return write!(f, "year outside {}–{}", YEARS.start(), YEARS.end())
            }
            RejectionKind::FieldCount => "wrong number of fields",
            RejectionKind::CutShort => "file cut short",
            RejectionKind::Conflict => "conflicting values in the file",
        };
        f.write_str(text)
    }
}

/// One rejected value (or row) and why.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct NewRejection {
    pub line: Option<u64>,
    pub column: Option<String>,
    pub raw: Option<String>,
    pub kind: RejectionKind,
    pub reason: String,
}

/// What was made of a file.
#[derive(Debug, Clone)]
pub enum BatchContent {
    Parsed {
        rows_read: u64,
        values: BatchValues,
        rejections: Vec<NewRejection>,
    },
    /// The file could not be read at all; it goes to quarantine.
    Unreadable { reason: String },
    /// Never made by [`crate::parse_bytes`]: a caller that already holds a batch with the
    /// same content hash skips parsing and says so.
    KnownDuplicate,
}

/// Rejections counted by kind, the most frequent first (ties in the order of
/// [`RejectionKind`], so the same file always reads the same).
pub fn count_by_kind(rejections: &[NewRejection]) -> Vec<(RejectionKind, u64)> {
    let mut counts = std::collections::BTreeMap::new();
    for r in rejections {
        *counts.entry(r.kind).or_insert(0u64) += 1;
    }
    let mut counts: Vec<_> = counts.into_iter().collect();
    counts.sort_by(|a, b| b.1.cmp(&a.1).then(a.0.cmp(&b.0)));
    counts
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rejection(kind: RejectionKind) -> NewRejection {
        NewRejection {
            line: Some(2),
            column: None,
            raw: None,
            kind,
            reason: "why".into(),
        }
    }

    #[test]
    fn kinds_are_counted_most_frequent_first_with_ties_in_a_fixed_order() {
        use RejectionKind::*;
        let list: Vec<_> = [
            FieldCount, NoSite, Conflict, NotANumber, Conflict, NoSite, Conflict,
        ]
        .into_iter()
        .map(rejection)
        .collect();
        assert_eq!(
            count_by_kind(&list),
            [(Conflict, 3), (NoSite, 2), (NotANumber, 1), (FieldCount, 1)]
        );
        assert!(count_by_kind(&[]).is_empty());
    }

    #[test]
    fn the_year_range_is_named_from_the_accepted_years() {
        assert_eq!(
            RejectionKind::YearOutsideRange.to_string(),
            format!("year outside {}–{}", YEARS.start(), YEARS.end())
        );
        assert_eq!(
            RejectionKind::YearOutsideRange.to_string(),
            "year outside 1800–2200"
        );
    }
}
