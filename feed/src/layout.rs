//! How the columns of a feed file are understood: which hold the key (site, year, visit),
//! which hold labels rather than numbers, and where they sit in one file's header.

use std::collections::BTreeSet;

use crate::collect::{ColumnKind, Measure};

/// Names of the columns that identify a visit in feed files.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct KeyColumns {
    pub site: String,
    pub year: String,
    pub visit: Option<String>,
}

/// The key columns, which other columns hold labels, which hold numbers, and the codes
/// that mean "no value".
#[derive(Debug, Clone)]
pub struct FileLayout {
    pub keys: KeyColumns,
    pub labels: BTreeSet<String>,
    /// Columns some series reads as numbers (a response or a covariate): a cell there that
    /// is neither a number nor a censored number is rejected. A cell of any other column
    /// that is not a number is kept verbatim as text, never rejected.
    pub numbers: NumberColumns,
    /// Columns some series reads on the log scale: a `<x` there needs `x > 0` (no positive
    /// value lies below a non-positive limit).
    pub positive: BTreeSet<String>,
    /// Cells that mean "no value" (compared after trimming spaces; a code that is a
    /// number also matches a typed cell of that number): neither stored nor rejected.
    pub missing: Vec<String>,
}

/// Which columns are read as numbers.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum NumberColumns {
    /// Every column that is not a key or a label.
    All,
    /// These; every other column keeps its non-number cells as text.
    Only(BTreeSet<String>),
}

impl FileLayout {
    /// A layout where every column that is not a label is read as numbers, with no
    /// missing-value codes beyond the empty cell and no positive limits.
    pub fn numeric(keys: KeyColumns, labels: BTreeSet<String>) -> FileLayout {
        FileLayout {
            keys,
            labels,
            numbers: NumberColumns::All,
            positive: BTreeSet::new(),
            missing: Vec::new(),
        }
    }

    fn is_number_column(&self, name: &str) -> bool {
        match &self.numbers {
            NumberColumns::All => true,
            NumberColumns::Only(set) => set.contains(name),
        }
    }
}

/// Why a file could not be read at all (it goes to quarantine with this reason).
#[derive(Debug, Clone, PartialEq, Eq)]
pub(crate) struct Unreadable(pub String);

/// Where the key and measurement columns sit in one file.
#[derive(Debug, Clone)]
pub(crate) struct Plan {
    pub site_at: usize,
    pub year_at: usize,
    pub visit_at: Option<usize>,
    pub measure_at: Vec<usize>,
    pub measures: Vec<Measure>,
}

impl FileLayout {
    pub(crate) fn plan(&self, header: &[String]) -> Result<Plan, Unreadable> {
        let mut seen = BTreeSet::new();
        for (i, h) in header.iter().enumerate() {
            if h.is_empty() {
                return Err(Unreadable(format!(
                    "column {} of the header has no name",
                    i + 1
                )));
            }
            if !seen.insert(h.as_str()) {
                return Err(Unreadable(format!(
                    "column `{h}` appears twice in the header"
                )));
            }
        }
        let find = |name: &str| header.iter().position(|h| h == name);
        let site_at = find(&self.keys.site).ok_or_else(|| {
            Unreadable(format!(
                "no site column `{}` in the header (columns: {})",
                self.keys.site,
                header.join(", ")
            ))
        })?;
        let year_at = find(&self.keys.year).ok_or_else(|| {
            Unreadable(format!(
                "no year column `{}` in the header (columns: {})",
                self.keys.year,
                header.join(", ")
            ))
        })?;
        let visit_at = self.keys.visit.as_deref().and_then(find);
        let mut measure_at = Vec::new();
        let mut measures = Vec::new();
        for (i, h) in header.iter().enumerate() {
            if i == site_at || i == year_at || Some(i) == visit_at {
                continue;
            }
            measure_at.push(i);
            measures.push(Measure {
                name: h.clone(),
                kind: if self.labels.contains(h) {
                    ColumnKind::Label
                } else if self.is_number_column(h) {
                    ColumnKind::Numeric
                } else {
                    ColumnKind::Free
                },
                positive: self.positive.contains(h),
            });
        }
        Ok(Plan {
            site_at,
            year_at,
            visit_at,
            measure_at,
            measures,
        })
    }
}
