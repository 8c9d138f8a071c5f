#!/usr/bin/env python3
"""Generate the Tidemark demo feed: an invented regional lake network, 2011-2026.

All data written by this script are INVENTED for the demo. No lake, crew or value
describes a real place or a real measurement.

Run from anywhere:  python3 demo-feed/generate.py
It rewrites demo-feed/seasons/*.csv and demo-feed/truth/*.csv byte for byte
(Python 3 standard library only; every random number comes from random.Random
instances seeded below, so the output does not depend on the machine).

True data-generating model (the values below are the truth the fits should recover)
-----------------------------------------------------------------------------------
Temperature covariate (surface_temp_c, degrees C), per visit:
    temp = 21 + u_year + u_lake + noise,
    u_year ~ N(0, 1.0^2), u_lake ~ N(0, 0.8^2), noise ~ N(0, 1.2^2), rounded to 0.1.
    The response is generated from the ROUNDED temperature, so the recorded covariate is
    exactly the one in the model.

Series "chlorophyll" (chl_ug_l, ug/L, lognormal; modelled as log(chl)):
    log(chl) = mu + beta_temp * (temp - 20) + a_lake + b_year + e
    mu = log(8) = 2.0794415, beta_temp = 0.06 per degree C,
    sd_site = 0.55, sd_year = 0.25, sd_residual = 0.30          (site-dominated)
    chl is written rounded to 0.01 ug/L.

Series "secchi" (secchi_m, Secchi depth in metres, modelled as is):
    secchi = mu_s + beta_temp * (temp - 20) + a_lake + b_year + c_crew + e
    mu_s = 3.0 m, beta_temp = -0.05 m per degree C,
    sd_site = 0.35, sd_year = 0.60, sd_crew = 0.15, sd_residual = 0.25   (year-dominated)
    secchi is written rounded to 0.01 m. No clipping: with these values (marginal sd about
    0.76 m around 2.95 m) a reading at or below zero is a 3.9 sd event; the script
    reports the smallest value it wrote.

The lake, year and crew effects of the two series are drawn independently. The realized
effects are written to truth/effects.csv, the parameters to truth/parameters.csv and the
deliberate defects (file, line, column, raw value, expected outcome) to truth/defects.csv.
Line numbers count the header as line 1.
"""

import csv
import io
import math
import os
import random
import sys

SEED = 20110615

FIRST_SEASON = 2011
LAST_SEASON = 2026
SEASONS = list(range(FIRST_SEASON, LAST_SEASON + 1))

TEMP_CENTRE = 21.0
SD_TEMP_YEAR = 1.0
SD_TEMP_LAKE = 0.8
SD_TEMP_NOISE = 1.2
TEMP_REFERENCE = 20.0  # covariate enters the model as (temp - 20)

CHL = {
    "mu": math.log(8.0),
    "beta_temp": 0.06,
    "sd_site": 0.55,
    "sd_year": 0.25,
    "sd_residual": 0.30,
}
SECCHI = {
    "mu": 3.0,
    "beta_temp": -0.05,
    "sd_site": 0.35,
    "sd_year": 0.60,
    "sd_crew": 0.15,
    "sd_residual": 0.25,
}

P_SECOND_VISIT = 0.5
P_SKIP_YEAR = 0.07  # chance that an established lake is not sampled in a given summer

CREWS = ["Alder", "Birch", "Cedar", "Dogwood", "Elm", "Fir"]

# (name, first season, last season or None). Names are invented; a few exercise verbatim
# storage: apostrophes, commas, a double quote and non-ASCII letters.
LAKES = [
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
    ("Lac Pérèle", 2011, None),
    ("Long Lake, North Basin", 2011, None),
    ("Long Lake, South Basin", 2011, None),
    ("Loon Narrows", 2011, None),
    ("Maple Bay Reservoir", 2011, None),
    ("Mirror Lake", 2011, None),
    ("O'Dell Pond", 2011, None),
    ("Pickerel Lake", 2011, None),
    ("Quarry Pond", 2011, 2014),  # dropped from the network after 2014
    ("Rush Lake", 2011, None),
    ("Sandpiper Lake", 2011, None),
    ('Tamarack "Twin" Lake', 2011, None),
    ("Upper Cedar Lake", 2012, None),
    ("Lower Cedar Lake", 2012, None),
    ("Vesper Lake", 2013, None),
    ("Willow Marsh Pond", 2014, None),
    ("Yellowbank Lake", 2014, None),
    ("Étang des Saules", 2015, None),
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
]

# A planned multi-year gap on top of the random skips (access road closed).
PLANNED_GAPS = {("Kettle Lake", 2017), ("Kettle Lake", 2018), ("Kettle Lake", 2019)}

COLUMNS = ["lake", "season", "visit", "crew", "surface_temp_c", "chl_ug_l", "secchi_m"]

HERE = os.path.dirname(os.path.abspath(__file__))


def stream(name):
    """An independent, named random stream, so that adding one component later does not
    shift the numbers drawn for the others (string seeds are hashed deterministically)."""
    return random.Random(f"tidemark-demo/{SEED}/{name}")


def fmt(x, places):
    s = f"{x:.{places}f}"
    # "-0.00" would read as a negative value; it is zero after rounding.
    return s[1:] if s.startswith("-") and float(s) == 0.0 else s


def draw_effects():
    effects = {}
    r = stream("effects")
    for series, par in (("chlorophyll", CHL), ("secchi", SECCHI)):
        effects[(series, "site")] = {n: r.gauss(0.0, par["sd_site"]) for n, _, _ in LAKES}
        effects[(series, "year")] = {y: r.gauss(0.0, par["sd_year"]) for y in SEASONS}
    effects[("secchi", "crew")] = {c: r.gauss(0.0, SECCHI["sd_crew"]) for c in CREWS}
    t = stream("temperature")
    effects[("temperature", "year")] = {y: t.gauss(0.0, SD_TEMP_YEAR) for y in SEASONS}
    effects[("temperature", "site")] = {n: t.gauss(0.0, SD_TEMP_LAKE) for n, _, _ in LAKES}
    return effects


def schedule():
    """(season, lake) -> number of visits, for the lake-summers that were sampled."""
    r = stream("schedule")
    visits = {}
    for season in SEASONS:
        for name, first, last in LAKES:
            if season < first or (last is not None and season > last):
                continue
            if (name, season) in PLANNED_GAPS:
                continue
            # A lake is always sampled in its first summer; later summers may be skipped.
            skip = r.random() < P_SKIP_YEAR
            second = r.random() < P_SECOND_VISIT
            if season > first and skip:
                continue
            visits[(season, name)] = 2 if second else 1
    return visits


def simulate(effects, visits):
    """Clean observations, keyed by (season, lake, visit), with the true values as
    written (rounded) strings and floats."""
    r = stream("observations")
    obs = {}
    for season in SEASONS:
        for name, _, _ in LAKES:
            n = visits.get((season, name), 0)
            for visit in range(1, n + 1):
                crew = CREWS[r.randrange(len(CREWS))]
                temp = (TEMP_CENTRE + effects[("temperature", "year")][season]
                        + effects[("temperature", "site")][name]
                        + r.gauss(0.0, SD_TEMP_NOISE))
                temp = round(temp, 1)
                dt = temp - TEMP_REFERENCE
                log_chl = (CHL["mu"] + CHL["beta_temp"] * dt
                           + effects[("chlorophyll", "site")][name]
                           + effects[("chlorophyll", "year")][season]
                           + r.gauss(0.0, CHL["sd_residual"]))
                secchi = (SECCHI["mu"] + SECCHI["beta_temp"] * dt
                          + effects[("secchi", "site")][name]
                          + effects[("secchi", "year")][season]
                          + effects[("secchi", "crew")][crew]
                          + r.gauss(0.0, SECCHI["sd_residual"]))
                obs[(season, name, visit)] = {
                    "lake": name,
                    "season": str(season),
                    "visit": str(visit),
                    "crew": crew,
                    "surface_temp_c": fmt(temp, 1),
                    "chl_ug_l": fmt(math.exp(log_chl), 2),
                    "secchi_m": fmt(secchi, 2),
                }
    return obs


def season_rows(obs, season):
    """Rows of one season in field order: every lake's first visit (early summer), then
    the second visits (late summer), lakes in network order."""
    order = {name: i for i, (name, _, _) in enumerate(LAKES)}
    keys = [k for k in obs if k[0] == season]
    keys.sort(key=lambda k: (k[2], order[k[1]]))
    return [dict(obs[k]) for k in keys]


def find(rows, lake, visit):
    for i, row in enumerate(rows):
        if row["lake"] == lake and row["visit"] == str(visit):
            return i
    raise SystemExit(f"generator bug: no row for {lake!r} visit {visit}")


def apply_defects(files, obs):
    """Plant the deliberate defects. Returns the manifest (before line numbers are known,
    rows carry a marker; line numbers are filled in by write_files)."""
    defects = []

    def mark(season, row, column, kind, expected, raw=None):
        row.setdefault("_marks", []).append(len(defects))
        defects.append({
            "file": f"seasons/{season}.csv", "line": None, "lake": row["lake"],
            "season": row["season"], "visit": row["visit"], "column": column,
            "raw_value": row[column] if raw is None else raw, "kind": kind,
            "true_value": "", "expected": expected,
        })
        return defects[-1]

    # --- late corrections: the original file carries a wrong value, a later file re-sends
    # the whole row with the corrected (true) value. Only the corrected cell changes.
    corrections = [
        # (season of the value, lake, visit, column, how it went wrong, file that corrects)
        (2015, "Long Lake, North Basin", 1, "chl_ug_l", "decimal point slipped (x10)", 2016),
        (2018, "Lac Pérèle", 2, "secchi_m", "entered in feet, not metres", 2019),
        (2022, "Alder Lake", 1, "surface_temp_c", "entered in degrees F", 2024),
    ]
    for season, lake, visit, column, how, fix_season in corrections:
        rows = files[season]
        i = find(rows, lake, visit)
        true_value = rows[i][column]
        x = float(true_value)
        if column == "chl_ug_l":
            wrong = fmt(x * 10.0, 2)
        elif column == "secchi_m":
            wrong = fmt(x / 0.3048, 2)
        else:
            wrong = fmt(x * 9.0 / 5.0 + 32.0, 1)
        rows[i][column] = wrong
        d = mark(season, rows[i], column, "superseded",
                 f"accepted, then superseded by seasons/{fix_season}.csv ({how})")
        d["true_value"] = true_value
        resend = dict(obs[(season, lake, visit)])
        files[fix_season].append(resend)
        d = mark(fix_season, resend, column, "correction",
                 f"supersedes the {season} value from seasons/{season}.csv "
                 "(the earlier value stays in history)")
        d["true_value"] = true_value

    # --- bad values (rare: well under 1% of the values)
    def spoil(season, lake, visit, column, raw, kind, expected):
        rows = files[season]
        i = find(rows, lake, visit)
        true_value = rows[i][column]
        rows[i][column] = raw
        d = mark(season, rows[i], column, kind, expected)
        d["true_value"] = true_value

    spoil(2012, "Crane Lake", 1, "chl_ug_l", "n/a", "rejected",
          "rejected: value does not parse as a number")
    # A censored lab result goes on the clearest-water visit of the season.
    low = min(files[2017], key=lambda row: float(row["chl_ug_l"]))
    spoil(2017, low["lake"], int(low["visit"]), "chl_ug_l", "<0.5", "rejected",
          "rejected: value does not parse as a number (a below-detection marker)")
    spoil(2020, "Juniper Pond", 1, "chl_ug_l", "-1", "excluded",
          "accepted at ingest (it parses); excluded from series chlorophyll because "
          "log of a non-positive value is undefined")
    spoil(2013, 'Tamarack "Twin" Lake', 2, "secchi_m", "", "missing",
          "missing value: no rejection; this visit has no Secchi reading")
    spoil(2021, "Grindstone Lake", 1, "secchi_m", "1e999", "rejected",
          "rejected: value is not a finite number (overflows to infinity)")

    # --- a row without a lake: the name was lost when the field sheet was keyed in.
    rows = files[2023]
    i = find(rows, "Pickerel Lake", 1)
    row = rows[i]
    row["lake"] = ""
    for column in COLUMNS[3:]:
        d = mark(2023, row, column, "rejected",
                 "rejected: row has no site (lake is empty)")
        d["lake"] = ""
        d["true_value"] = obs[(2023, "Pickerel Lake", 1)][column]
        d["true_lake"] = "Pickerel Lake"

    # --- a conflicting duplicate inside one file: the same visit keyed twice, with two
    # digits of the chlorophyll value swapped; the other cells agree.
    rows = files[2025]
    i = find(rows, "O'Dell Pond", 2)
    first = rows[i]
    dup = dict(obs[(2025, "O'Dell Pond", 2)])
    v = dup["chl_ug_l"]
    at = [k for k, c in enumerate(v) if c.isdigit()][:2]
    chars = list(v)
    chars[at[0]], chars[at[1]] = chars[at[1]], chars[at[0]]
    swapped = "".join(chars)
    if swapped == v:
        swapped = fmt(float(v) + 1.0, 2)
    dup["chl_ug_l"] = swapped
    rows.append(dup)
    for r in (first, dup):
        d = mark(2025, r, "chl_ug_l", "rejected",
                 "rejected: conflicting duplicate inside one file (same lake, season, "
                 "visit; other columns agree and are kept once)")
        d["true_value"] = obs[(2025, "O'Dell Pond", 2)]["chl_ug_l"]
    return defects


def render(rows):
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n", quoting=csv.QUOTE_MINIMAL)
    w.writerow(COLUMNS)
    for row in rows:
        w.writerow([row[c] for c in COLUMNS])
    return buf.getvalue()


def write_text(path, text):
    os.makedirs(os.path.dirname(path), exist_ok=True)
    tmp = path + ".tmp"
    with open(tmp, "w", encoding="utf-8", newline="") as f:
        f.write(text)
    os.replace(tmp, path)


def main():
    effects = draw_effects()
    visits = schedule()
    obs = simulate(effects, visits)
    files = {s: season_rows(obs, s) for s in SEASONS}
    defects = apply_defects(files, obs)

    n_values = 0
    for season in SEASONS:
        rows = files[season]
        for line, row in enumerate(rows, start=2):
            for k in row.get("_marks", []):
                defects[k]["line"] = line
            n_values += 4  # crew, surface_temp_c, chl_ug_l, secchi_m
        write_text(os.path.join(HERE, "seasons", f"{season}.csv"), render(rows))

    out = io.StringIO()
    w = csv.writer(out, lineterminator="\n")
    head = ["file", "line", "lake", "season", "visit", "column", "raw_value", "kind",
            "true_value", "expected"]
    w.writerow(head)
    for d in sorted(defects, key=lambda d: (d["file"], d["line"], d["column"])):
        w.writerow([d[c] for c in head])
    write_text(os.path.join(HERE, "truth", "defects.csv"), out.getvalue())

    out = io.StringIO()
    w = csv.writer(out, lineterminator="\n")
    w.writerow(["series", "parameter", "value"])
    for series, par in (("chlorophyll", CHL), ("secchi", SECCHI)):
        for k, v in par.items():
            w.writerow([series, k, repr(v)])
    for k, v in (("centre", TEMP_CENTRE), ("sd_year", SD_TEMP_YEAR),
                 ("sd_site", SD_TEMP_LAKE), ("sd_residual", SD_TEMP_NOISE),
                 ("reference", TEMP_REFERENCE)):
        w.writerow(["temperature", k, repr(v)])
    write_text(os.path.join(HERE, "truth", "parameters.csv"), out.getvalue())

    out = io.StringIO()
    w = csv.writer(out, lineterminator="\n")
    w.writerow(["series", "term", "level", "value"])
    for (series, term), levels in effects.items():
        for level, v in levels.items():
            w.writerow([series, term, level, f"{v:.6f}"])
    write_text(os.path.join(HERE, "truth", "effects.csv"), out.getvalue())

    bad = sum(1 for d in defects if d["kind"] in ("rejected", "excluded"))
    secchi_min = min(float(o["secchi_m"]) for o in obs.values())
    print("season  rows  lakes")
    for season in SEASONS:
        lakes = {r["lake"] for r in files[season] if r["season"] == str(season)}
        print(f"{season}  {len(files[season]):4d}  {len(lakes):5d}")
    print(f"total rows {sum(len(r) for r in files.values())}, values {n_values}, "
          f"bad values {bad} ({100.0 * bad / n_values:.2f}%), "
          f"smallest true secchi_m {secchi_min:.2f}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
