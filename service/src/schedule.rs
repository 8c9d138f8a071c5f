//! When scheduled runs happen: the `[schedule]` cron expression and time zone, parsed with
//! the `cron` and `chrono-tz` crates.
//!
//! We accept the standard 5-field form (minute hour day-of-month month day-of-week) and a
//! 6-field form with seconds in front. Day-of-week numbers follow the standard convention
//! (0 or 7 = Sunday, 1 = Monday … 6 = Saturday); the `cron` crate counts 1 = Sunday, so
//! numbers are rewritten to day names before parsing, which both read the same way.

use std::str::FromStr;

use chrono::{DateTime, Utc};
use chrono_tz::Tz;

/// A parsed schedule.
#[derive(Debug, Clone)]
pub struct Schedule {
    pub cron: String,
    pub timezone: Tz,
    /// Whether `serve` makes one catch-up run at start when a tick was missed while it was
    /// down (`[schedule] catch_up`, default true).
    pub catch_up: bool,
    /// One schedule, or two when both day fields are restricted: standard cron fires
    /// when *either* day matches, the `cron` crate only when both do, so each day field
    /// gets its own schedule with the other one unrestricted and the earlier tick wins.
    parsed: Vec<cron::Schedule>,
}

/// What is wrong with a schedule, and under which config key.
#[derive(Debug)]
pub struct ScheduleError {
    pub key: &'static str,
    pub message: String,
}

const DAY_NAMES: [&str; 8] = ["SUN", "MON", "TUE", "WED", "THU", "FRI", "SAT", "SUN"];

impl Schedule {
    pub fn parse(cron_text: &str, timezone: &str) -> Result<Schedule, ScheduleError> {
        let timezone = Tz::from_str(timezone.trim()).map_err(|_| ScheduleError {
            key: "schedule.timezone",
            message: format!(
                "{timezone:?} is not a time zone name (use an IANA name such as \"UTC\" or \"Europe/Helsinki\")"
            ),
        })?;
        let fields: Vec<&str> = cron_text.split_whitespace().collect();
        let cron_err = |why: String| ScheduleError {
            key: "schedule.cron",
            message: format!("{cron_text:?}: {why}"),
        };
        let mut full: Vec<String> = match fields.len() {
            5 => std::iter::once("0")
                .chain(fields.iter().copied())
                .map(String::from)
                .collect(),
            6 => fields.iter().map(|s| s.to_string()).collect(),
            n => {
                return Err(cron_err(format!(
                "has {n} fields; expected 5 (minute hour day-of-month month day-of-week) or 6 (seconds first)"
            )))
            }
        };
        check_ranges(&full).map_err(cron_err)?;
        full[5] = day_numbers_to_names(&full[5]).map_err(cron_err)?;
        // A day field that begins with `*` (`*`, `*/2`) counts as unrestricted, as in the
        // common crontab implementations.
        let restricted = |f: &str| !f.starts_with('*') && f != "?";
        let variants: Vec<Vec<String>> = if restricted(&full[3]) && restricted(&full[5]) {
            let mut by_month_day = full.clone();
            by_month_day[5] = "*".into();
            let mut by_week_day = full.clone();
            by_week_day[3] = "*".into();
            vec![by_month_day, by_week_day]
        } else {
            vec![full]
        };
        let parsed = variants
            .iter()
            .map(|f| cron::Schedule::from_str(&f.join(" ")).map_err(|e| cron_err(e.to_string())))
            .collect::<Result<Vec<_>, _>>()?;
        // `serve` would hold the lease and never run: a schedule must fire at least once.
        if parsed.iter().all(|p| p.upcoming(timezone).next().is_none()) {
            return Err(cron_err(
                "never fires (no such date, e.g. 30 February); fix the day-of-month or month fields"
                    .into(),
            ));
        }
        Ok(Schedule {
            cron: cron_text.to_string(),
            timezone,
            catch_up: true,
            parsed,
        })
    }

    /// The scheduled tick missed since `last_run` (when the newest finished run started),
    /// if one is due by `now`. With no run recorded yet, nothing was missed.
    pub fn missed_since(
        &self,
        last_run: Option<DateTime<Utc>>,
        now: DateTime<Utc>,
    ) -> Option<DateTime<Utc>> {
        let tick = self.next_after(last_run?)?;
        (tick <= now).then_some(tick)
    }

    /// `t` as wall-clock time in the schedule's time zone (RFC 3339 with its offset).
    pub fn local(&self, t: DateTime<Utc>) -> String {
        t.with_timezone(&self.timezone)
            .to_rfc3339_opts(chrono::SecondsFormat::Secs, false)
    }

    /// The first scheduled instant strictly after `now`.
    pub fn next_after(&self, now: DateTime<Utc>) -> Option<DateTime<Utc>> {
        let local = now.with_timezone(&self.timezone);
        self.parsed
            .iter()
            .filter_map(|p| p.after(&local).next())
            .min()
            .map(|t| t.with_timezone(&Utc))
    }
}

/// The fields before day-of-week (in the 6-field form) with their standard ranges.
const FIELD_RANGES: [(&str, u32, u32); 5] = [
    ("second", 0, 59),
    ("minute", 0, 59),
    ("hour", 0, 23),
    ("day of month", 1, 31),
    ("month", 1, 12),
];

/// Numbers outside a field's range, said in the field's own terms (the `cron` crate's
/// message for `61` is "Minutes must be less than 59", which is off by one and names the
/// seconds field we add in front).
fn check_ranges(full: &[String]) -> Result<(), String> {
    for ((name, low, high), field) in FIELD_RANGES.iter().zip(full) {
        for item in field.split(',') {
            let (base, step) = match item.split_once('/') {
                Some((b, s)) => (b, Some(s)),
                None => (item, None),
            };
            if let Some(step) = step {
                if step.parse::<u32>().is_ok_and(|n| n == 0) {
                    return Err(format!("{name} step must be at least 1, found {item:?}"));
                }
            }
            let ends = match base.split_once('-') {
                Some((a, b)) => vec![a, b],
                None => vec![base],
            };
            for end in ends {
                if let Ok(n) = end.parse::<u32>() {
                    if n < *low || n > *high {
                        return Err(format!(
                            "{name} {n} is out of range {low}-{high} (in {field:?})"
                        ));
                    }
                }
            }
        }
    }
    Ok(())
}

/// Rewrite standard day-of-week numbers (0–7) as names so that the `cron` crate, which
/// counts from 1 = Sunday, reads them as a standard crontab would.
fn day_numbers_to_names(field: &str) -> Result<String, String> {
    let name = |s: &str| -> Result<String, String> {
        match s.parse::<usize>() {
            Ok(n) if n <= 7 => Ok(DAY_NAMES[n].to_string()),
            Ok(n) => Err(format!("day of week {n} is out of range 0-7")),
            Err(_) => Ok(s.to_string()),
        }
    };
    let mut items = Vec::new();
    for item in field.split(',') {
        let (base, step) = match item.split_once('/') {
            Some((b, s)) => (b, Some(s)),
            None => (item, None),
        };
        let rewritten = match base.split_once('-') {
            // "5-7" (Friday to Sunday) must not become the empty range FRI-SUN.
            Some((a, "7")) if step.is_none() && a != "0" && a != "7" => {
                format!("{}-SAT,SUN", name(a)?)
            }
            Some((a, b)) => format!("{}-{}", name(a)?, name(b)?),
            None => name(base)?,
        };
        items.push(match step {
            Some(s) => format!("{rewritten}/{s}"),
            None => rewritten,
        });
    }
    Ok(items.join(","))
}

#[cfg(test)]
mod tests {
    use super::*;
    use chrono::{Datelike, TimeZone, Timelike, Weekday};

    fn next(cron: &str, tz: &str, now: DateTime<Utc>) -> DateTime<Utc> {
        Schedule::parse(cron, tz).unwrap().next_after(now).unwrap()
    }

    #[test]
    fn restricted_day_of_month_and_day_of_week_combine_with_or_as_in_standard_cron() {
        // 2026-12-02 is a Wednesday. `0 2 1 * 1`: the 1st of a month OR a Monday.
        let now = Utc.with_ymd_and_hms(2026, 12, 2, 12, 0, 0).unwrap();
        assert_eq!(
            next("0 2 1 * 1", "UTC", now),
            Utc.with_ymd_and_hms(2026, 12, 7, 2, 0, 0).unwrap(),
            "the next Monday comes before the next 1st"
        );
        let later = Utc.with_ymd_and_hms(2026, 12, 29, 12, 0, 0).unwrap();
        assert_eq!(
            next("0 2 1 * 1", "UTC", later),
            Utc.with_ymd_and_hms(2027, 1, 1, 2, 0, 0).unwrap(),
            "the 1st (a Friday) comes before the next Monday"
        );
        // A day-of-week that begins with `*` leaves day-of-month alone: the 15th only.
        assert_eq!(
            next("0 2 15 * */2", "UTC", now),
            Utc.with_ymd_and_hms(2026, 12, 15, 2, 0, 0).unwrap()
        );
    }

    #[test]
    fn a_schedule_that_can_never_fire_is_refused() {
        let e = Schedule::parse("0 0 30 2 *", "UTC").expect_err("refused");
        assert_eq!(e.key, "schedule.cron");
        assert!(e.message.contains("never fires"), "{}", e.message);
        // 29 February fires in leap years, so it is a real schedule.
        assert!(Schedule::parse("0 0 29 2 *", "UTC").is_ok());
    }

    #[test]
    fn five_fields_run_at_the_minute() {
        let now = Utc.with_ymd_and_hms(2026, 3, 1, 12, 0, 0).unwrap();
        assert_eq!(
            next("30 2 * * *", "UTC", now),
            Utc.with_ymd_and_hms(2026, 3, 2, 2, 30, 0).unwrap()
        );
        assert_eq!(
            next("15 30 2 * * *", "UTC", now),
            Utc.with_ymd_and_hms(2026, 3, 2, 2, 30, 15).unwrap()
        );
    }

    #[test]
    fn day_of_week_numbers_are_standard() {
        // 2026-03-01 is a Sunday (asserted through chrono's calendar first).
        let now = Utc.with_ymd_and_hms(2026, 3, 1, 12, 0, 0).unwrap();
        assert_eq!(now.weekday(), Weekday::Sun);
        assert_eq!(next("0 3 * * 1", "UTC", now).weekday(), Weekday::Mon);
        assert_eq!(next("0 3 * * 0", "UTC", now).weekday(), Weekday::Sun);
        assert_eq!(next("0 3 * * 6", "UTC", now).weekday(), Weekday::Sat);
        assert_eq!(next("0 3 * * 7", "UTC", now).weekday(), Weekday::Sun);
        assert_eq!(next("0 3 * * 5-7", "UTC", now).weekday(), Weekday::Fri);
        assert_eq!(next("0 3 * * MON-FRI", "UTC", now).weekday(), Weekday::Mon);
    }

    #[test]
    fn time_zone_shifts_the_instant() {
        let now = Utc.with_ymd_and_hms(2026, 1, 10, 12, 0, 0).unwrap();
        // Helsinki is UTC+2 in winter.
        let t = next("30 2 * * *", "Europe/Helsinki", now);
        assert_eq!((t.hour(), t.minute()), (0, 30));
    }

    #[test]
    fn a_tick_is_missed_only_when_it_fell_between_the_last_run_and_now() {
        let s = Schedule::parse("30 2 * * *", "UTC").unwrap();
        let last = Utc.with_ymd_and_hms(2026, 3, 1, 2, 30, 4).unwrap();
        let same_day = Utc.with_ymd_and_hms(2026, 3, 1, 23, 0, 0).unwrap();
        assert_eq!(s.missed_since(Some(last), same_day), None);
        let after_tick = Utc.with_ymd_and_hms(2026, 3, 3, 9, 0, 0).unwrap();
        assert_eq!(
            s.missed_since(Some(last), after_tick),
            Some(Utc.with_ymd_and_hms(2026, 3, 2, 2, 30, 0).unwrap())
        );
        assert_eq!(s.missed_since(None, after_tick), None);
        let t = Utc.with_ymd_and_hms(2026, 1, 10, 0, 30, 0).unwrap();
        let helsinki = Schedule::parse("30 2 * * *", "Europe/Helsinki").unwrap();
        assert_eq!(helsinki.local(t), "2026-01-10T02:30:00+02:00");
    }

    #[test]
    fn bad_expressions_are_refused() {
        assert_eq!(
            Schedule::parse("30 2 * *", "UTC").unwrap_err().key,
            "schedule.cron"
        );
        for (cron, says) in [
            ("61 2 * * *", "minute 61 is out of range 0-59"),
            ("0 24 * * *", "hour 24 is out of range 0-23"),
            ("0 2 0 * *", "day of month 0 is out of range 1-31"),
            ("0 2 1-32 * *", "day of month 32 is out of range 1-31"),
            ("0 2 * 13 *", "month 13 is out of range 1-12"),
            ("60 0 2 * * *", "second 60 is out of range 0-59"),
            ("*/0 2 * * *", "minute step must be at least 1"),
        ] {
            let e = Schedule::parse(cron, "UTC").unwrap_err();
            assert_eq!(e.key, "schedule.cron");
            assert!(e.message.contains(says), "{cron}: {}", e.message);
        }
        // The ends of the ranges are accepted.
        Schedule::parse("59 23 31 12 *", "UTC").unwrap();
        Schedule::parse("0-59/15 0-23 1-31 1-12 0-7", "UTC").unwrap();
        assert_eq!(
            Schedule::parse("0 3 * * 9", "UTC").unwrap_err().key,
            "schedule.cron"
        );
        assert_eq!(
            Schedule::parse("30 2 * * *", "Nowhere").unwrap_err().key,
            "schedule.timezone"
        );
    }
}
