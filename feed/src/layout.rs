//! How the columns of a feed file are understood: which hold the key (site, year, visit),
//! which hold labels rather than numbers, and where they sit in one file's header.

use std::collections::BTreeSet;

use crate::collect::{ColumnKind, Measure};

/// Names of the columns that identify a visit in feed files.
#[derive(Debug, Clone, PartialEq, Eq, Default)]
pub struct KeyColumns {
    pub site: String,
    pub year: String,
    pub visit: Option<String>,
}

/// The key columns, which other columns hold labels, which hold numbers, and the codes
/// that mean "no value".
#[derive(Debug, Clone)]
pub struct FileLayout {
    /// The key columns of every series, each set once, in config order: a file is read
    /// with the set whose site and year columns its header has (`FileLayout::plan`).
    pub keys: Vec<KeyColumns>,
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
            keys: vec![keys],
            labels,
            numbers: NumberColumns::All,
            positive: BTreeSet::new(),
            missing: Vec::new(),
        }
    }

    /// The key set a file is read with: of the sets whose site and year columns the
    /// header has, one whose visit column it has too, else the first such set in config
    /// order.
    /// Returns the set with the positions of its site and year columns.
    fn choose_keys(&self, header: &[String]) -> Result<(KeyColumns, usize, usize), Unreadable> {
        let find = |name: &str| header.iter().position(|h| h == name);
        let has = |name: &str| find(name).is_some();
        let fitting: Vec<(&KeyColumns, usize, usize)> = self
            .keys
            .iter()
            .filter_map(|k| Some((k, find(&k.site)?, find(&k.year)?)))
            .collect();
        let chosen = fitting
            .iter()
            .find(|(k, _, _)| k.visit.as_deref().is_some_and(has))
            .or(fitting.first());
        if let Some(&(k, site_at, year_at)) = chosen {
            return Ok((k.clone(), site_at, year_at));
        }
        // Name what is missing for the closest set: the one whose site column is there,
        // else the first.
        let k = self
            .keys
            .iter()
            .find(|k| has(&k.site))
            .or(self.keys.first())
            .ok_or_else(|| Unreadable("no key columns are configured".into()))?;
        let columns = header.join(", ");
        Err(Unreadable(if !has(&k.site) {
            format!(
                "no site column `{}` in the header (columns: {columns})",
                k.site
            )
        } else {
            format!(
                "no year column `{}` in the header (columns: {columns})",
                k.year
            )
        }))
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
    /// The key columns the file is read with.
    pub keys: KeyColumns,
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
        let (mut keys, site_at, year_at) = self.choose_keys(header)?;
        let visit_at = keys.visit.as_deref().and_then(find);
        if visit_at.is_none() {
            // What the file is read with: every visit is `1`.
            keys.visit = None;
        }
        // A column that is a key of any series is never a measurement.
        let any_key = |h: &str| {
            self.keys
                .iter()
                .any(|k| k.site == h || k.year == h || k.visit.as_deref() == Some(h))
        };
        let mut measure_at = Vec::new();
        let mut measures = Vec::new();
        for (i, h) in header.iter().enumerate() {
            if i == site_at || i == year_at || Some(i) == visit_at || any_key(h) {
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
            keys,
            site_at,
            year_at,
            visit_at,
            measure_at,
            measures,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn keys(site: &str, year: &str, visit: Option<&str>) -> KeyColumns {
        KeyColumns {
            site: site.into(),
            year: year.into(),
            visit: visit.map(str::to_string),
        }
    }

    fn header(cols: &[&str]) -> Vec<String> {
        cols.iter().map(|c| c.to_string()).collect()
    }

    #[test]
    fn a_file_is_read_with_the_key_set_its_header_has() {
        let layout = FileLayout {
            keys: vec![
                keys("lake", "season", None),
                keys("lake", "season", Some("visit")),
                keys("station", "year", None),
            ],
            ..FileLayout::numeric(KeyColumns::default(), BTreeSet::new())
        };
        let plan = layout.plan(&header(&["station", "year", "flow"])).unwrap();
        assert_eq!(plan.keys, keys("station", "year", None));
        assert_eq!((plan.site_at, plan.year_at), (0, 1));
        // The set with a visit column wins when the header has it; the first otherwise.
        let plan = layout
            .plan(&header(&["visit", "lake", "season", "chl"]))
            .unwrap();
        assert_eq!(plan.keys, keys("lake", "season", Some("visit")));
        assert_eq!(plan.visit_at, Some(0));
        let plan = layout.plan(&header(&["lake", "season", "chl"])).unwrap();
        assert_eq!(plan.keys, keys("lake", "season", None));
        assert_eq!(plan.visit_at, None);
        // Key columns of other sets are never measurements.
        let plan = layout
            .plan(&header(&["lake", "season", "year", "chl"]))
            .unwrap();
        let names: Vec<&str> = plan.measures.iter().map(|m| m.name.as_str()).collect();
        assert_eq!(names, ["chl"]);
        // Nothing fits: the message names what the closest set misses.
        let Err(Unreadable(why)) = layout.plan(&header(&["station", "season", "x"])) else {
            panic!("no set fits");
        };
        assert!(why.starts_with("no year column `year`"), "{why}");
        let Err(Unreadable(why)) = layout.plan(&header(&["site", "when"])) else {
            panic!("no set fits");
        };
        assert!(why.starts_with("no site column `lake`"), "{why}");
    }
}
