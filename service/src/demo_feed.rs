//! The generator of the demo feed in `demo-feed/`: the invented Lakeshore Network, made by
//! `tidemark_model::simulate::simulate_survey`, with the deliberate defects planted on top.
//! It renders every file (season CSVs, truth CSVs) and the generated sections of
//! `demo-feed/README.md` as text; writing them is the `make_demo_feed` example's job, and
//! `tests/demo_feed.rs` checks that the committed files are exactly what this renders.
//!
//! All lakes, crews and values are invented. Nothing here describes a real water body.

use std::collections::{BTreeMap, BTreeSet};

use tidemark_model::simulate::{
    simulate_survey, CovariateSpec, ResponseSpec, Scale, SurveySite, SurveySpec, SurveyTruth,
};

/// The seed of the committed demo feed.
pub const SEED: u64 = 20110615;
pub const FIRST_SEASON: i32 = 2011;
pub const LAST_SEASON: i32 = 2026;

pub const CREWS: [&str; 6] = ["Alder", "Birch", "Cedar", "Dogwood", "Elm", "Fir"];

/// (name, first season, last season). A few names exercise verbatim storage of the site
/// code: apostrophes, commas, a double quote and non-ASCII letters (NFC).
const LAKES: &[(&str, i32, Option<i32>)] = &[
    ("Alder Lake", 2011, None),
    ("Beaver Flowage", 2011, None),
    ("Birchbark Lake", 2011, None),
    ("Cold Spring Pond", 2011, None),
    ("Crane Lake", 2011, None),
    ("Deepwater Lake", 2011, None),
    ("Elbow Lake", 2011, None),
    ("Fernhill Pond", 2011, None),
    ("Grindstone Lake", 2011, None),
    ("Heron Lake", 2011, None),
    ("Ironwood Lake", 2011, None),
    ("Juniper Pond", 2011, None),
    ("Kettle Lake", 2011, None),
    ("Lac P\u{e9}r\u{e8}le", 2011, None),
    ("Long Lake, North Basin", 2011, None),
    ("Long Lake, South Basin", 2011, None),
    ("Loon Narrows", 2011, None),
    ("Maple Bay Reservoir", 2011, None),
    ("Mirror Lake", 2011, None),
    ("O'Dell Pond", 2011, None),
    ("Pickerel Lake", 2011, None),
    ("Quarry Pond", 2011, Some(2014)),
    ("Rush Lake", 2011, None),
    ("Sandpiper Lake", 2011, None),
    ("Tamarack \"Twin\" Lake", 2011, None),
    ("Upper Cedar Lake", 2012, None),
    ("Lower Cedar Lake", 2012, None),
    ("Vesper Lake", 2013, None),
    ("Willow Marsh Pond", 2014, None),
    ("Yellowbank Lake", 2014, None),
    ("\u{c9}tang des Saules", 2015, None),
    ("Stillwater Lake", 2016, None),
    ("Foxtail Pond", 2016, None),
    ("Granite Lake", 2017, None),
    ("Hollow Lake", 2018, None),
    ("McAllister's Lake", 2018, None),
    ("Otter Slide Lake", 2019, None),
    ("Pine Hollow Reservoir", 2020, None),
    ("Round Lake", 2021, None),
    ("Spruce Lake", 2022, None),
    ("Whitefish Lake", 2023, None),
];

/// Cells holding a missing-value code: (lake, its first season, column, code, the crew's
/// remark). `NA` and `-999` are two of the default `feed.missing` codes.
const MISSING_CODES: [(&str, i32, usize, &str, &str); 5] = [
    (
        "Upper Cedar Lake",
        2012,
        TEMP,
        "-999",
        "temperature logger error",
    ),
    (
        "Willow Marsh Pond",
        2014,
        CHL,
        "NA",
        "sample bottle broken in transit",
    ),
    (
        "Granite Lake",
        2017,
        SECCHI,
        "NA",
        "too windy for a Secchi reading",
    ),
    ("Round Lake", 2021, CHL, "NA", "sample lost at the lab"),
    (
        "Whitefish Lake",
        2023,
        TEMP,
        "NA",
        "thermometer left at the launch",
    ),
];

/// A planned multi-year gap on top of the random skips (access road closed).
const PLANNED_GAP: (&str, [i32; 3]) = ("Kettle Lake", [2017, 2018, 2019]);

/// Lake-summers with a planned number of visits: the ones that carry a deliberate defect,
/// so each defect lands on its lake (several with awkward names) whatever the seed.
const PLANNED_VISITS: &[(&str, i32, u32)] = &[
    ("Crane Lake", 2012, 1),
    ("Tamarack \"Twin\" Lake", 2013, 2),
    ("Long Lake, North Basin", 2015, 1),
    ("Lac P\u{e9}r\u{e8}le", 2018, 2),
    ("Juniper Pond", 2020, 1),
    ("Grindstone Lake", 2021, 1),
    ("Alder Lake", 2022, 1),
    // The row that loses its name is the lake's only visit of the summer.
    ("Pickerel Lake", 2023, 1),
    ("O'Dell Pond", 2025, 2),
];

const P_SKIP: f64 = 0.07;
const P_SECOND_VISIT: f64 = 0.5;

pub const COLUMNS: [&str; 9] = [
    "lake",
    "season",
    "visit",
    "crew",
    "surface_temp_c",
    "chl_ug_l",
    "secchi_m",
    "secchi_flag",
    "remarks",
];
const LAKE: usize = 0;
const CREW: usize = 3;
const TEMP: usize = 4;
const CHL: usize = 5;
const SECCHI: usize = 6;
const FLAG: usize = 7;
const REMARKS: usize = 8;

/// The laboratory's chlorophyll-a methods: (first season, last season, reporting limit in
/// µg/L). A result below the limit is written `<limit`. The older method's limit is high
/// enough that a good share of the early results are censored.
pub const CHL_METHODS: [(i32, i32, f64); 2] = [(2011, 2015, 5.0), (2016, LAST_SEASON, 2.0)];

/// The chlorophyll-a reporting limit (µg/L) of the method used in `season`.
pub fn chl_reporting_limit(season: i32) -> f64 {
    CHL_METHODS
        .iter()
        .find(|(first, last, _)| (*first..=*last).contains(&season))
        .map_or(CHL_METHODS[0].2, |m| m.2)
}

/// Shallow lakes and their (invented) greatest depth in metres. Where the disk is still
/// visible on the bottom, the crew writes the lake's depth in `secchi_m` and flags it in
/// `secchi_flag`: the true Secchi depth is greater than the depth written.
pub const SHALLOW_LAKES: [(&str, f64); 5] = [
    ("Beaver Flowage", 2.6),
    ("Cold Spring Pond", 3.0),
    ("Fernhill Pond", 3.4),
    ("Willow Marsh Pond", 2.8),
    ("Foxtail Pond", 3.1),
];

/// What each crew (in [`CREWS`] order) writes in `secchi_flag` for a disk on the bottom:
/// two habits, so the series' qualifier list names both.
pub const BOTTOM_FLAGS: [&str; 6] = ["bottom", "bottom", "bottom", ">", ">", ">"];

/// Field notes the crews jot in `remarks`; some jot only the air temperature (a number).
const REMARK_TEXTS: [&str; 7] = [
    "calm, glassy surface",
    "windy, whitecaps",
    "light rain during sampling",
    "algae scum along the east shore",
    "loons near the sampling buoy",
    "boat launch closed; sampled from the dock",
    "water \"tea-coloured\" after storms",
];

/// The two series of the feed, in the order of [`spec`]'s responses.
const SERIES: [(&str, &str); 2] = [("chlorophyll", "chl_ug_l"), ("secchi", "secchi_m")];

/// The true model of the demo network.
pub fn spec(seed: u64) -> SurveySpec {
    SurveySpec {
        sites: LAKES
            .iter()
            .map(|(name, first, last)| SurveySite {
                first_year: *first,
                last_year: *last,
                gaps: if *name == PLANNED_GAP.0 {
                    PLANNED_GAP.1.to_vec()
                } else {
                    vec![]
                },
                planned: PLANNED_VISITS
                    .iter()
                    .filter(|(lake, _, _)| lake == name)
                    .map(|(_, season, n)| (*season, *n))
                    .collect(),
            })
            .collect(),
        first_year: FIRST_SEASON,
        last_year: LAST_SEASON,
        p_skip: P_SKIP,
        p_second_visit: P_SECOND_VISIT,
        groups: CREWS.len(),
        covariate: CovariateSpec {
            centre: 21.0,
            sd_year: 1.0,
            sd_site: 0.8,
            sd_visit: 1.2,
            resolution: 0.1,
            reference: 20.0,
        },
        responses: vec![
            // Chlorophyll-a, lognormal: lakes dominate. Median 8 µg/L at 20 °C.
            ResponseSpec {
                scale: Scale::Log,
                intercept: libm::log(8.0),
                coef: 0.06,
                sd_site: 0.55,
                sd_year: 0.25,
                sd_group: 0.0,
                sd_residual: 0.30,
            },
            // Secchi depth in metres, as is: years dominate, with a crew effect.
            ResponseSpec {
                scale: Scale::Identity,
                intercept: 3.0,
                coef: -0.05,
                sd_site: 0.35,
                sd_year: 0.60,
                sd_group: 0.15,
                sd_residual: 0.25,
            },
        ],
        seed,
    }
}

/// Everything the generator renders.
#[derive(Debug, Clone, PartialEq)]
pub struct DemoFeed {
    /// `(path relative to demo-feed/, contents)`: the season files, then the truth files.
    pub files: Vec<(String, String)>,
    /// `(name, markdown)` of the README sections between `<!-- generated: NAME -->` and
    /// `<!-- end generated: NAME -->`.
    pub readme: Vec<(String, String)>,
    /// Rows per season, for the person who ran the generator.
    pub summary: String,
}

/// `x` with `places` decimals; "-0.00" would read as a negative value, it is zero.
fn fmt(x: f64, places: usize) -> String {
    let s = format!("{x:.places$}");
    match s.strip_prefix('-') {
        Some(rest) if rest.bytes().all(|b| b == b'0' || b == b'.') => rest.to_string(),
        _ => s,
    }
}

/// SplitMix64's finaliser: the remarks need a few independent choices per visit, and a
/// hash of (seed, season, lake, visit) gives them without a random stream whose order
/// would tie one visit's remark to every visit before it.
fn mix(mut z: u64) -> u64 {
    z = z.wrapping_add(0x9E37_79B9_7F4A_7C15);
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^ (z >> 31)
}

/// "remarks" in ASCII: keeps the remark hash apart from anything else derived from the seed.
const REMARKS_STREAM: u64 = 0x0072_656d_6172_6b73;

/// The `remarks` cell of a visit: empty about half the time, otherwise a field note or,
/// now and then, just a number (the air temperature the crew jotted down).
fn remark(seed: u64, season: i32, lake: usize, visit: u32) -> String {
    let h =
        mix(mix(mix(seed ^ REMARKS_STREAM) ^ season as u64)
            ^ ((lake as u64) << 8 | u64::from(visit)));
    match h % 100 {
        0..=49 => String::new(),
        50..=84 => REMARK_TEXTS[(h >> 8) as usize % REMARK_TEXTS.len()].to_string(),
        _ => (15 + (h >> 16) % 15).to_string(),
    }
}

#[derive(Debug, Clone)]
struct Row {
    /// The lake behind the row (also when its name was lost).
    lake: usize,
    season: i32,
    visit: u32,
    cells: [String; 9],
    /// Indices into the defect list of the defects on this row.
    marks: Vec<usize>,
}

#[derive(Debug, Clone)]
struct Defect {
    season_file: i32,
    line: usize,
    lake: String,
    season: i32,
    visit: u32,
    column: usize,
    raw_value: String,
    kind: &'static str,
    true_value: String,
    expected: String,
}

/// One line of the README's defect table (several manifest entries may share one).
struct Entry {
    season_file: i32,
    defects: Vec<usize>,
    who: String,
    column: String,
    raw: String,
    what: String,
    outcome: String,
}

struct Planter {
    files: BTreeMap<i32, Vec<Row>>,
    clean: BTreeMap<(i32, usize, u32), Row>,
    defects: Vec<Defect>,
    entries: Vec<Entry>,
}

impl Planter {
    /// The row of `visit` of `lake` in `season` (planned in [`PLANNED_VISITS`]).
    fn pick(&self, season: i32, lake: &str, visit: u32) -> usize {
        let lake = LAKES
            .iter()
            .position(|(n, _, _)| *n == lake)
            .expect("a lake of the network");
        self.files[&season]
            .iter()
            .position(|r| r.lake == lake && r.visit == visit && r.season == season)
            .expect("a planned visit")
    }

    /// The row of visit 1 of `lake` in `season`, which must be the lake's first season
    /// (never skipped, so it exists for every seed).
    fn pick_first_visit(&self, season: i32, lake: &str) -> usize {
        let first = LAKES
            .iter()
            .find(|(n, _, _)| *n == lake)
            .map(|l| l.1)
            .expect("a lake of the network");
        assert_eq!(first, season, "{lake} is first sampled in {first}");
        self.pick(season, lake, 1)
    }

    fn mark(
        &mut self,
        file: i32,
        row: usize,
        column: usize,
        kind: &'static str,
        expected: String,
    ) -> usize {
        let r = &self.files[&file][row];
        let clean = &self.clean[&(r.season, r.lake, r.visit)];
        let d = Defect {
            season_file: file,
            line: 0,
            lake: r.cells[LAKE].clone(),
            season: r.season,
            visit: r.visit,
            column,
            raw_value: r.cells[column].clone(),
            kind,
            true_value: clean.cells[column].clone(),
            expected,
        };
        self.defects.push(d);
        let k = self.defects.len() - 1;
        self.files
            .get_mut(&file)
            .expect("a season file")
            .as_mut_slice()[row]
            .marks
            .push(k);
        k
    }

    fn who(&self, file: i32, row: usize, bold_season: bool) -> String {
        let r = &self.files[&file][row];
        let season = if bold_season {
            format!("**{}**", r.season)
        } else {
            r.season.to_string()
        };
        let lake = if r.cells[LAKE].is_empty() {
            "*(empty)*".to_string()
        } else {
            r.cells[LAKE].clone()
        };
        format!("{lake} / {season} / {}", r.visit)
    }

    /// A wrong but plausible value, accepted on arrival and corrected by a later file
    /// that re-sends the whole row with the true value.
    fn correction(
        &mut self,
        season: i32,
        preferred: &str,
        visit: u32,
        column: usize,
        how: &str,
        fix_season: i32,
    ) {
        let i = self.pick(season, preferred, visit);
        let true_value = self.files[&season][i].cells[column].clone();
        let x: f64 = true_value.parse().expect("generated values parse");
        let wrong = match column {
            CHL => fmt(x * 10.0, 2),
            SECCHI => fmt(x / 0.3048, 2),
            _ => fmt(x * 9.0 / 5.0 + 32.0, 1),
        };
        self.files.get_mut(&season).expect("a season file")[i].cells[column] = wrong.clone();
        let a = self.mark(
            season,
            i,
            column,
            "superseded",
            format!("accepted, then superseded by seasons/{fix_season}.csv ({how})"),
        );
        let original = self.files[&season][i].clone();
        let mut resend = self.clean[&(original.season, original.lake, original.visit)].clone();
        resend.marks.clear();
        let fix = self.files.get_mut(&fix_season).expect("a season file");
        fix.push(resend);
        let j = fix.len() - 1;
        let b = self.mark(
            fix_season,
            j,
            column,
            "correction",
            format!(
                "supersedes the {season} value from seasons/{season}.csv (the earlier value stays in history)"
            ),
        );
        self.entries.push(Entry {
            season_file: season,
            defects: vec![a],
            who: self.who(season, i, false),
            column: format!("`{}`", COLUMNS[column]),
            raw: format!("`{wrong}`"),
            what: format!("{how} (true {true_value})"),
            outcome: format!("accepted (it parses), then superseded by `{fix_season}.csv`"),
        });
        self.entries.push(Entry {
            season_file: fix_season,
            defects: vec![b],
            who: self.who(fix_season, j, true),
            column: format!("`{}`", COLUMNS[column]),
            raw: format!("`{true_value}`"),
            what: "late correction (whole row re-sent, only this cell differs)".into(),
            outcome: format!("supersedes the {season} value; the earlier value stays in history"),
        });
    }

    /// Replace one cell by a bad value.
    #[allow(clippy::too_many_arguments)]
    fn spoil(
        &mut self,
        season: i32,
        row: usize,
        column: usize,
        raw: &str,
        kind: &'static str,
        expected: &str,
        what: &str,
        outcome: &str,
    ) {
        self.files.get_mut(&season).expect("a season file")[row].cells[column] = raw.to_string();
        let k = self.mark(season, row, column, kind, expected.to_string());
        let shown = if raw.is_empty() {
            "*(empty)*".to_string()
        } else {
            format!("`{raw}`")
        };
        self.entries.push(Entry {
            season_file: season,
            defects: vec![k],
            who: self.who(season, row, false),
            column: format!("`{}`", COLUMNS[column]),
            raw: shown,
            what: what.to_string(),
            outcome: outcome.to_string(),
        });
    }
}

/// Plant the deliberate defects; returns the notes the README adds under its table.
fn plant(p: &mut Planter) -> Vec<String> {
    let mut notes = vec![
        "The three superseded values are plausible numbers, so they are accepted when their \
         file arrives and fits made before the correction see them (as happens in practice). \
         After the correction the store holds the true value; the wrong one stays in history."
            .to_string(),
    ];
    p.correction(
        2015,
        "Long Lake, North Basin",
        1,
        CHL,
        "decimal point slipped, x10",
        2016,
    );
    p.correction(
        2018,
        "Lac P\u{e9}r\u{e8}le",
        2,
        SECCHI,
        "entered in feet, not metres",
        2019,
    );
    p.correction(2022, "Alder Lake", 1, TEMP, "entered in degrees F", 2024);

    let i = p.pick(2012, "Crane Lake", 1);
    p.spoil(
        2012,
        i,
        CHL,
        "n/a",
        "rejected",
        "rejected: value does not parse as a number",
        "text instead of a number",
        "rejected: does not parse as a number",
    );
    let i = p.pick(2013, "Tamarack \"Twin\" Lake", 2);
    p.spoil(
        2013,
        i,
        SECCHI,
        "",
        "missing",
        "missing value: no rejection; this visit has no Secchi reading",
        "missing reading",
        "missing value, not a rejection; the rest of the row is kept",
    );
    // Missing-value codes: the first visit of a lake's first season always exists, so
    // each code lands on its lake whatever the seed. The crew's remark says why.
    for (lake, season, column, code, remark) in MISSING_CODES {
        let i = p.pick_first_visit(season, lake);
        p.files.get_mut(&season).expect("a season file")[i].cells[REMARKS] = remark.to_string();
        p.spoil(
            season,
            i,
            column,
            code,
            "missing",
            &format!(
                "missing value (code {code}): not stored, not rejected; the rest of the row is kept"
            ),
            &format!("missing-value code ({remark})"),
            "missing value, not stored and not a rejection; the rest of the row is kept",
        );
    }
    let i = p.pick(2020, "Juniper Pond", 1);
    p.spoil(
        2020,
        i,
        CHL,
        "-1",
        "excluded",
        "accepted at ingest (it parses); excluded from series chlorophyll because log of a \
         non-positive value is undefined",
        "non-positive value under a log transform",
        "accepted at ingest (it parses); excluded from series `chlorophyll` (log undefined)",
    );
    let i = p.pick(2021, "Grindstone Lake", 1);
    p.spoil(
        2021,
        i,
        SECCHI,
        "1e999",
        "rejected",
        "rejected: value is not a finite number (overflows to infinity)",
        "overflows to infinity",
        "rejected: not a finite number",
    );
    notes.push(
        "`1e999` parses to infinity in many number parsers; it must be rejected as not finite \
         rather than stored."
            .into(),
    );

    // A row without a lake: the name was lost when the field sheet was keyed in. It is the
    // lake's only visit that season, so the lake simply has no data that season.
    let i = p.pick(2023, "Pickerel Lake", 1);
    let lost = LAKES[p.files[&2023][i].lake].0;
    p.files.get_mut(&2023).expect("a season file")[i].cells[LAKE] = String::new();
    // Every filled cell after the key is rejected, the remark too when there is one.
    let filled: Vec<usize> = [CREW, TEMP, CHL, SECCHI, FLAG, REMARKS]
        .into_iter()
        .filter(|&c| !p.files[&2023][i].cells[c].is_empty())
        .collect();
    let marks: Vec<usize> = filled
        .iter()
        .map(|&c| {
            let k = p.mark(
                2023,
                i,
                c,
                "rejected",
                "rejected: row has no site (lake is empty)".into(),
            );
            p.defects[k].lake = String::new();
            k
        })
        .collect();
    let cells = &p.files[&2023][i].cells;
    p.entries.push(Entry {
        season_file: 2023,
        defects: marks,
        who: p.who(2023, i, false),
        column: filled
            .iter()
            .map(|&c| format!("`{}`", COLUMNS[c]))
            .collect::<Vec<_>>()
            .join(", "),
        raw: filled
            .iter()
            .map(|&c| format!("`{}`", cells[c]))
            .collect::<Vec<_>>()
            .join(", "),
        what: "row without a lake".into(),
        outcome: "every value on the line rejected: row has no site".into(),
    });
    notes.push(format!(
        "The row without a lake is {lost}'s only 2023 visit with the name lost: {lost} \
         simply has no 2023 data."
    ));

    // A conflicting duplicate inside one file: the same visit keyed twice, two digits of
    // the chlorophyll value swapped; the other cells agree.
    let i = p.pick(2025, "O'Dell Pond", 2);
    let first = p.files[&2025][i].clone();
    let mut dup = p.clean[&(first.season, first.lake, first.visit)].clone();
    let v = dup.cells[CHL].clone();
    let mut chars: Vec<char> = v.chars().collect();
    let at: Vec<usize> = (0..chars.len())
        .filter(|&k| chars[k].is_ascii_digit())
        .take(2)
        .collect();
    chars.swap(at[0], at[1]);
    let mut swapped: String = chars.into_iter().collect();
    if swapped == v {
        swapped = fmt(v.parse::<f64>().expect("a generated value") + 1.0, 2);
    }
    dup.cells[CHL] = swapped.clone();
    let rows = p.files.get_mut(&2025).expect("a season file");
    rows.push(dup);
    let j = rows.len() - 1;
    let expected = "rejected: conflicting duplicate inside one file (same lake, season, visit; \
                    other columns agree and are kept once)";
    let a = p.mark(2025, i, CHL, "rejected", expected.into());
    let b = p.mark(2025, j, CHL, "rejected", expected.into());
    p.entries.push(Entry {
        season_file: 2025,
        defects: vec![a, b],
        who: p.who(2025, i, false),
        column: "`chl_ug_l`".into(),
        raw: format!("`{v}` and `{swapped}`"),
        what: "conflicting duplicate inside one file (digits swapped)".into(),
        outcome: "both `chl_ug_l` values rejected as conflicting; the other cells of the two \
                  lines agree and are kept once"
            .into(),
    });
    notes.push(
        "Every other cell is clean: a censored result (`<5.0`, a depth flagged `bottom`) and a \
         remark are what the delivery is meant to hold, not defects. A lake that is missing \
         from a season is a gap in sampling, not a defect."
            .into(),
    );
    notes
}

fn csv_text(header: &[&str], rows: impl IntoIterator<Item = Vec<String>>) -> String {
    let mut w = csv::WriterBuilder::new()
        .terminator(csv::Terminator::Any(b'\n'))
        .quote_style(csv::QuoteStyle::Necessary)
        .from_writer(Vec::new());
    // Writing to memory cannot fail.
    w.write_record(header).expect("in-memory CSV");
    for r in rows {
        w.write_record(&r).expect("in-memory CSV");
    }
    String::from_utf8(w.into_inner().expect("in-memory CSV")).expect("UTF-8 cells")
}

fn population_sd(x: &[f64]) -> f64 {
    let m = x.iter().sum::<f64>() / x.len() as f64;
    (x.iter().map(|v| (v - m).powi(2)).sum::<f64>() / x.len() as f64).sqrt()
}

/// Generate the demo feed for `seed` ([`SEED`] is the committed one).
pub fn generate(seed: u64) -> DemoFeed {
    let spec = spec(seed);
    let (visits, truth) = simulate_survey(&spec);
    let smallest_secchi = visits
        .iter()
        .map(|v| v.values[1])
        .fold(f64::INFINITY, f64::min);
    assert!(
        smallest_secchi > 0.0,
        "seed {seed} draws a non-positive true Secchi depth; the scenario has no such value"
    );

    let mut clean = BTreeMap::new();
    let mut files: BTreeMap<i32, Vec<Row>> = (FIRST_SEASON..=LAST_SEASON)
        .map(|s| (s, Vec::new()))
        .collect();
    for v in &visits {
        let row = Row {
            lake: v.site,
            season: v.year,
            visit: v.visit,
            cells: [
                LAKES[v.site].0.to_string(),
                v.year.to_string(),
                v.visit.to_string(),
                CREWS[v.group].to_string(),
                fmt(v.covariate, 1),
                fmt(v.values[0], 2),
                fmt(v.values[1], 2),
                String::new(),
                remark(seed, v.year, v.site, v.visit),
            ],
            marks: vec![],
        };
        clean.insert((v.year, v.site, v.visit), row.clone());
        files.get_mut(&v.year).expect("a season file").push(row);
    }
    // Field order: every lake's first visit (early summer), then the second visits.
    for rows in files.values_mut() {
        rows.sort_by_key(|r| (r.visit, r.lake));
    }
    let mut p = Planter {
        files,
        clean,
        defects: Vec::new(),
        entries: Vec::new(),
    };
    let notes = plant(&mut p);
    let censored = censor(&mut p);
    for (season, rows) in &p.files {
        for (k, row) in rows.iter().enumerate() {
            for &d in &row.marks {
                p.defects[d].line = k + 2;
                debug_assert_eq!(p.defects[d].season_file, *season);
            }
        }
    }

    let mut out = Vec::new();
    for (season, rows) in &p.files {
        out.push((
            format!("seasons/{season}.csv"),
            csv_text(&COLUMNS, rows.iter().map(|r| r.cells.to_vec())),
        ));
    }
    let mut order: Vec<&Defect> = p.defects.iter().collect();
    order.sort_by_key(|d| (d.season_file, d.line, COLUMNS[d.column]));
    out.push((
        "truth/defects.csv".into(),
        csv_text(
            &[
                "file",
                "line",
                "lake",
                "season",
                "visit",
                "column",
                "raw_value",
                "kind",
                "true_value",
                "expected",
            ],
            order.iter().map(|d| {
                vec![
                    format!("seasons/{}.csv", d.season_file),
                    d.line.to_string(),
                    d.lake.clone(),
                    d.season.to_string(),
                    d.visit.to_string(),
                    COLUMNS[d.column].to_string(),
                    d.raw_value.clone(),
                    d.kind.to_string(),
                    d.true_value.clone(),
                    d.expected.clone(),
                ]
            }),
        ),
    ));
    out.push(("truth/censored.csv".into(), censored_csv(&p, &censored)));
    out.push(("truth/effects.csv".into(), effects_csv(&truth)));
    out.push(("truth/parameters.csv".into(), parameters_csv(&spec)));

    let n_rows: usize = p.files.values().map(Vec::len).sum();
    let readme = vec![
        ("rows".to_string(), rows_table(&p.files)),
        (
            "parameters".to_string(),
            parameters_md(&spec, &truth, smallest_secchi),
        ),
        ("censoring".to_string(), censoring_md(&p, &censored)),
        ("defects".to_string(), defects_md(&p, n_rows, &notes)),
    ];
    let mut summary = String::from("season  rows  lakes\n");
    for (season, rows) in &p.files {
        let lakes: BTreeSet<&str> = rows
            .iter()
            .filter(|r| r.season == *season && !r.cells[LAKE].is_empty())
            .map(|r| r.cells[LAKE].as_str())
            .collect();
        summary.push_str(&format!("{season}  {:4}  {:5}\n", rows.len(), lakes.len()));
    }
    let below = censored.iter().filter(|c| c.column == CHL).count();
    summary.push_str(&format!(
        "total rows {n_rows}, smallest true secchi_m {smallest_secchi:.2}, {below} chl_ug_l cells \
         written <limit, {} secchi_m cells flagged on the bottom\n",
        censored.len() - below
    ));
    DemoFeed {
        files: out,
        readme,
        summary,
    }
}

/// A cell written censored: a chlorophyll result below its method's reporting limit, or
/// a Secchi depth at a shallow lake where the disk lay on the bottom.
struct CensoredCell {
    season_file: i32,
    /// Index of the row in its file.
    row: usize,
    column: usize,
    side: &'static str,
    limit: f64,
}

/// Write every result the way the laboratory and the crews would have: a chlorophyll value
/// below its method's limit as `<limit`, a Secchi depth beyond a shallow lake's depth as
/// the depth with the crew's flag. The decision is made on the generated value as it
/// would have been written (0.01 units), so each censoring is true of the truth files.
/// A cell that carries a planted defect keeps what the defect wrote.
fn censor(p: &mut Planter) -> Vec<CensoredCell> {
    let mut out = Vec::new();
    for (season_file, rows) in p.files.iter_mut() {
        for (k, row) in rows.iter_mut().enumerate() {
            let spoiled: BTreeSet<usize> = row.marks.iter().map(|&d| p.defects[d].column).collect();
            let clean = &p.clean[&(row.season, row.lake, row.visit)];
            let value = |c: usize| -> f64 {
                clean.cells[c]
                    .parse()
                    .expect("generated values are numbers")
            };
            let limit = chl_reporting_limit(row.season);
            if !spoiled.contains(&CHL) && value(CHL) < limit {
                row.cells[CHL] = format!("<{limit:.1}");
                out.push(CensoredCell {
                    season_file: *season_file,
                    row: k,
                    column: CHL,
                    side: "below",
                    limit,
                });
            }
            let depth = SHALLOW_LAKES
                .iter()
                .find(|(lake, _)| *lake == LAKES[row.lake].0)
                .map(|l| l.1);
            if let Some(depth) = depth {
                if !spoiled.contains(&SECCHI) && value(SECCHI) > depth {
                    let crew = CREWS
                        .iter()
                        .position(|c| *c == clean.cells[CREW])
                        .expect("a crew of the network");
                    row.cells[SECCHI] = fmt(depth, 2);
                    row.cells[FLAG] = BOTTOM_FLAGS[crew].to_string();
                    out.push(CensoredCell {
                        season_file: *season_file,
                        row: k,
                        column: SECCHI,
                        side: "above",
                        limit: depth,
                    });
                }
            }
        }
    }
    out
}

fn censored_csv(p: &Planter, censored: &[CensoredCell]) -> String {
    csv_text(
        &[
            "file",
            "line",
            "lake",
            "season",
            "visit",
            "column",
            "raw_value",
            "qualifier",
            "side",
            "limit",
            "true_value",
        ],
        censored.iter().map(|c| {
            let r = &p.files[&c.season_file][c.row];
            let clean = &p.clean[&(r.season, r.lake, r.visit)];
            vec![
                format!("seasons/{}.csv", c.season_file),
                (c.row + 2).to_string(),
                r.cells[LAKE].clone(),
                r.season.to_string(),
                r.visit.to_string(),
                COLUMNS[c.column].to_string(),
                r.cells[c.column].clone(),
                if c.column == SECCHI {
                    r.cells[FLAG].clone()
                } else {
                    String::new()
                },
                c.side.to_string(),
                fmt(c.limit, 2),
                clean.cells[c.column].clone(),
            ]
        }),
    )
}

fn censoring_md(p: &Planter, censored: &[CensoredCell]) -> String {
    // Visits, not lines: a re-sent row or a duplicate line is the same visit.
    let key = |c: &CensoredCell| {
        let r = &p.files[&c.season_file][c.row];
        (r.season, r.lake, r.visit)
    };
    let below: BTreeSet<(i32, usize, u32)> = censored
        .iter()
        .filter(|c| c.column == CHL)
        .map(key)
        .collect();
    let bottom: BTreeSet<(i32, usize, u32)> = censored
        .iter()
        .filter(|c| c.column == SECCHI)
        .map(key)
        .collect();
    let shallow = |lake: usize| SHALLOW_LAKES.iter().any(|(n, _)| *n == LAKES[lake].0);
    let visits: BTreeSet<(i32, usize, u32)> = p.clean.keys().copied().collect();
    let mut md = String::from(
        "| season | chlorophyll reporting limit (µg/L) | visits | `chl_ug_l` written `<limit` | \
         visits to the shallow lakes | `secchi_m` on the bottom (flagged) |\n\
         |---|---|---|---|---|---|\n",
    );
    for season in FIRST_SEASON..=LAST_SEASON {
        let of = |set: &BTreeSet<(i32, usize, u32)>| set.iter().filter(|k| k.0 == season).count();
        let n = of(&visits);
        let at_shallow = visits
            .iter()
            .filter(|k| k.0 == season && shallow(k.1))
            .count();
        md.push_str(&format!(
            "| {season} | {:.1} | {n} | {} | {at_shallow} | {} |\n",
            chl_reporting_limit(season),
            of(&below),
            of(&bottom)
        ));
    }
    let at_shallow = visits.iter().filter(|k| shallow(k.1)).count();
    md.push_str(&format!(
        "| **total** | | {} | {} ({:.1}%) | {at_shallow} | {} ({:.1}% of all visits) |\n\n",
        visits.len(),
        below.len(),
        100.0 * below.len() as f64 / visits.len() as f64,
        bottom.len(),
        100.0 * bottom.len() as f64 / visits.len() as f64,
    ));
    md.push_str("| shallow lake | depth (m) | visits | disk on the bottom |\n|---|---|---|---|\n");
    for (name, depth) in SHALLOW_LAKES {
        let lake = LAKES
            .iter()
            .position(|l| l.0 == name)
            .expect("a lake of the network");
        md.push_str(&format!(
            "| {name} | {depth:.1} | {} | {} |\n",
            visits.iter().filter(|k| k.1 == lake).count(),
            bottom.iter().filter(|k| k.1 == lake).count()
        ));
    }
    let mut by_flag: BTreeMap<&str, Vec<&str>> = BTreeMap::new();
    for (crew, flag) in CREWS.iter().zip(BOTTOM_FLAGS) {
        by_flag.entry(flag).or_default().push(crew);
    }
    let habits: Vec<String> = by_flag
        .iter()
        .map(|(flag, crews)| format!("{} write `{flag}`", crews.join(", ")))
        .collect();
    md.push_str(&format!(
        "\nCrews {}. Each censored cell is listed with its generated value in \
         `truth/censored.csv`, once for each line it is on (a re-sent row is on two).\n",
        habits.join("; ")
    ));
    md
}

fn effects_csv(truth: &SurveyTruth) -> String {
    let mut rows = Vec::new();
    let lakes = || LAKES.iter().map(|(n, _, _)| n.to_string());
    let years = || (FIRST_SEASON..=LAST_SEASON).map(|y| y.to_string());
    let mut add = |series: &str, term: &str, levels: Vec<String>, values: &[f64]| {
        for (level, v) in levels.into_iter().zip(values) {
            rows.push(vec![
                series.to_string(),
                term.to_string(),
                level,
                format!("{v:.6}"),
            ]);
        }
    };
    for ((series, _), e) in SERIES.iter().zip(&truth.responses) {
        add(series, "site", lakes().collect(), &e.site);
        add(series, "year", years().collect(), &e.year);
    }
    add(
        "secchi",
        "crew",
        CREWS.iter().map(|c| c.to_string()).collect(),
        &truth.responses[1].group,
    );
    add(
        "temperature",
        "year",
        years().collect(),
        &truth.covariate.year,
    );
    add(
        "temperature",
        "site",
        lakes().collect(),
        &truth.covariate.site,
    );
    csv_text(&["series", "term", "level", "value"], rows)
}

fn parameters_csv(spec: &SurveySpec) -> String {
    let mut rows = Vec::new();
    for ((series, _), r) in SERIES.iter().zip(&spec.responses) {
        let mut params = vec![
            ("mu", r.intercept),
            ("beta_temp", r.coef),
            ("sd_site", r.sd_site),
            ("sd_year", r.sd_year),
        ];
        if r.sd_group > 0.0 {
            params.push(("sd_crew", r.sd_group));
        }
        params.push(("sd_residual", r.sd_residual));
        for (k, v) in params {
            rows.push(vec![series.to_string(), k.to_string(), format!("{v:?}")]);
        }
    }
    let c = &spec.covariate;
    for (k, v) in [
        ("centre", c.centre),
        ("sd_year", c.sd_year),
        ("sd_site", c.sd_site),
        ("sd_residual", c.sd_visit),
        ("reference", c.reference),
    ] {
        rows.push(vec!["temperature".into(), k.into(), format!("{v:?}")]);
    }
    csv_text(&["series", "parameter", "value"], rows)
}

fn rows_table(files: &BTreeMap<i32, Vec<Row>>) -> String {
    let mut md = String::from(
        "| file | rows | rows of that season | re-sent rows of earlier seasons | lakes sampled |\n\
         |---|---|---|---|---|\n",
    );
    let mut all = BTreeSet::new();
    let mut total = 0;
    for (season, rows) in files {
        let own: Vec<&Row> = rows.iter().filter(|r| r.season == *season).collect();
        let lakes: BTreeSet<&str> = own
            .iter()
            .filter(|r| !r.cells[LAKE].is_empty())
            .map(|r| r.cells[LAKE].as_str())
            .collect();
        all.extend(lakes.iter().copied());
        let mut keys = BTreeSet::new();
        let twice = own
            .iter()
            .any(|r| !r.cells[LAKE].is_empty() && !keys.insert((r.lake, r.visit)));
        let nameless = own.iter().filter(|r| r.cells[LAKE].is_empty()).count();
        md.push_str(&format!(
            "| `seasons/{season}.csv` | {} | {}{} | {} | {}{} |\n",
            rows.len(),
            own.len(),
            if twice {
                " (one visit keyed twice)"
            } else {
                ""
            },
            rows.len() - own.len(),
            lakes.len(),
            match nameless {
                0 => String::new(),
                1 => " (+1 row without a lake)".into(),
                n => format!(" (+{n} rows without a lake)"),
            },
        ));
        total += rows.len();
    }
    md.push_str(&format!(
        "| **total** | **{total}** | | | {} distinct lakes |\n",
        all.len()
    ));
    md
}

fn parameters_md(spec: &SurveySpec, truth: &SurveyTruth, smallest_secchi: f64) -> String {
    let c = &spec.covariate;
    let (chl, sec) = (&spec.responses[0], &spec.responses[1]);
    let mut md = format!(
        "Temperature (the covariate), per visit: `temp = {} + u_year + u_lake + noise` with\n\
         `u_year ~ N(0, {:.1}²)`, `u_lake ~ N(0, {:.1}²)`, `noise ~ N(0, {:.1}²)`, rounded to {} °C.\n\
         The responses are generated from the *rounded* temperature, so the recorded covariate is\n\
         exactly the one in the model. The covariate enters as `(temp − {})`, so the intercepts\n\
         below are the values at {} °C.\n\n",
        c.centre, c.sd_year, c.sd_site, c.sd_visit, c.resolution, c.reference, c.reference
    );
    md.push_str(&format!(
        "**Series `chlorophyll`** (`chl_ug_l`, lognormal, modelled on the log scale) — sites\n\
         dominate:\n\n    log(chl) = mu + beta_temp·(temp − {ref}) + a_lake + b_year + e\n\n\
         | parameter | true value |\n|---|---|\n\
         | `mu` (intercept, log scale, at {ref} °C) | log({median}) = {mu:.7} (median {median} µg/L) |\n\
         | `beta_temp` | {} per °C (log scale) |\n\
         | `sd_site` (lake) | {:.2} |\n| `sd_year` (season) | {:.2} |\n| `sd_residual` | {:.2} |\n\n",
        chl.coef,
        chl.sd_site,
        chl.sd_year,
        chl.sd_residual,
        ref = c.reference,
        mu = chl.intercept,
        median = libm::round(libm::exp(chl.intercept)),
    ));
    md.push_str(&format!(
        "**Series `secchi`** (`secchi_m`, metres, modelled as is) — years dominate, with a crew\n\
         effect:\n\n    secchi = mu_s + beta_temp·(temp − {ref}) + a_lake + b_year + c_crew + e\n\n\
         | parameter | true value |\n|---|---|\n\
         | `mu_s` (intercept, at {ref} °C) | {:.1} m |\n\
         | `beta_temp` | {} m per °C |\n\
         | `sd_site` (lake) | {:.2} |\n| `sd_year` (season) | {:.2} |\n\
         | `sd_crew` (`crew`) | {:.2} |\n| `sd_residual` | {:.2} |\n\n",
        sec.intercept,
        fmt(sec.coef, 2).replace('-', "−"),
        sec.sd_site,
        sec.sd_year,
        sec.sd_group,
        sec.sd_residual,
        ref = c.reference,
    ));
    let (ec, es) = (&truth.responses[0], &truth.responses[1]);
    md.push_str(&format!(
        "The lake, year and crew effects of the two series are drawn independently of each other.\n\
         With only {} lakes, {} seasons and {} crews, the realized effects scatter around these\n\
         values; their population standard deviations are (from `truth/effects.csv`):\n\
         chlorophyll lake {:.3}, year {:.3}; Secchi lake {:.3}, year {:.3}, crew {:.3}. A fit\n\
         should be judged against the true parameters with its posterior uncertainty, and the\n\
         realized effects are there to check the `effect` rows. Rounding of the written values\n\
         (0.01 µg/L, 0.01 m) adds an error of at most 0.005 units, negligible against the\n\
         residual standard deviations.\n\n",
        LAKES.len(),
        LAST_SEASON - FIRST_SEASON + 1,
        CREWS.len(),
        population_sd(&ec.site),
        population_sd(&ec.year),
        population_sd(&es.site),
        population_sd(&es.year),
        population_sd(&es.group),
    ));
    let var_temp = c.sd_year.powi(2) + c.sd_site.powi(2) + c.sd_visit.powi(2);
    let marginal_sd = (sec.sd_site.powi(2)
        + sec.sd_year.powi(2)
        + sec.sd_group.powi(2)
        + sec.sd_residual.powi(2)
        + sec.coef.powi(2) * var_temp)
        .sqrt();
    let mean = sec.intercept + sec.coef * (c.centre - c.reference);
    md.push_str(&format!(
        "Secchi depths are never clipped: at these values (marginal sd about {marginal_sd:.2} m around a mean\n\
         of {mean:.2} m) a reading at or below zero is a {:.1} sd event, and the smallest true Secchi\n\
         depth written is {smallest_secchi:.2} m (the generator refuses a seed that draws one at or below zero).\n",
        mean / marginal_sd
    ));
    md
}

fn defects_md(p: &Planter, n_rows: usize, notes: &[String]) -> String {
    let bad = p
        .defects
        .iter()
        .filter(|d| matches!(d.kind, "rejected" | "excluded"))
        .count();
    let cells = n_rows * 4;
    let corrections = p.defects.iter().filter(|d| d.kind == "correction").count();
    let missing = |empty: bool| {
        p.defects
            .iter()
            .filter(|d| d.kind == "missing" && d.raw_value.is_empty() == empty)
            .count()
    };
    let (empty, codes) = (missing(true), missing(false));
    let mut md = format!(
        "{bad} bad values out of {} value cells ({:.2}%), plus {corrections} late corrections, \
         {empty} empty cell and {codes} missing-value codes. The same list, with the true values, \
         is in `truth/defects.csv`.\n\n\
         | file | line | lake / season / visit | column | raw value | defect | expected outcome |\n\
         |---|---|---|---|---|---|---|\n",
        with_thousands(cells),
        100.0 * bad as f64 / cells as f64
    );
    let mut entries: Vec<&Entry> = p.entries.iter().collect();
    let first_line = |e: &Entry| e.defects.iter().map(|&d| p.defects[d].line).min();
    entries.sort_by_key(|e| (e.season_file, first_line(e)));
    for e in entries {
        let lines: BTreeSet<usize> = e.defects.iter().map(|&d| p.defects[d].line).collect();
        let lines: Vec<String> = lines.iter().map(usize::to_string).collect();
        md.push_str(&format!(
            "| `seasons/{}.csv` | {} | {} | {} | {} | {} | {} |\n",
            e.season_file,
            lines.join(" and "),
            e.who,
            e.column,
            e.raw,
            e.what,
            e.outcome
        ));
    }
    md.push_str("\nNotes:\n");
    for n in notes {
        md.push_str(&format!("- {n}\n"));
    }
    md
}

fn with_thousands(n: usize) -> String {
    let digits = n.to_string();
    let groups: Vec<&str> = digits
        .as_bytes()
        .rchunks(3)
        .rev()
        .map(|g| std::str::from_utf8(g).expect("ASCII digits"))
        .collect();
    groups.join(",")
}

/// `readme` with each generated section replaced by `sections`' text. Every section must
/// be present exactly once, so a README edit cannot silently drop one.
pub fn splice_readme(readme: &str, sections: &[(String, String)]) -> Result<String, String> {
    let mut text = readme.to_string();
    for (name, body) in sections {
        let begin = format!("<!-- generated: {name} -->\n");
        let end = format!("<!-- end generated: {name} -->");
        let (Some(b), Some(e)) = (text.find(&begin), text.find(&end)) else {
            return Err(format!("the README has no section `{begin}` … `{end}`"));
        };
        if text.matches(&begin).count() != 1 || text.matches(&end).count() != 1 || e < b {
            return Err(format!(
                "the README section `{name}` is not marked exactly once"
            ));
        }
        text.replace_range(b + begin.len()..e, body);
    }
    Ok(text)
}
