//! One line that says why something failed: an error and its causes, each said once.
//!
//! Several error types print their cause inside their own message (`database X: {source}`)
//! and also expose it as `source()`, so the usual `{:#}` chain says the same cause two or
//! three times. [`reason`] walks the chain and leaves out a cause whose text the line
//! already holds. Checked by the unit tests below and end to end by
//! `tests/e2e_faults.rs::serve_reports_a_full_disk_and_recovers_on_the_next_tick_once_space_is_free`.

/// `error` and its causes joined by `: `, skipping a cause already said.
pub fn reason(error: &(dyn std::error::Error + 'static)) -> String {
    let mut line = error.to_string();
    let mut cause = error.source();
    while let Some(c) = cause {
        let text = c.to_string();
        if !text.is_empty() && !line.contains(&text) {
            line.push_str(": ");
            line.push_str(&text);
        }
        cause = c.source();
    }
    line
}

/// [`reason`] for an [`anyhow::Error`] (its context layers included).
pub fn reason_of(error: &anyhow::Error) -> String {
    reason(error.as_ref())
}

#[cfg(test)]
mod tests {
    use super::*;

    #[derive(Debug, thiserror::Error)]
    #[error("disk: no space left")]
    struct Disk;

    #[derive(Debug, thiserror::Error)]
    #[error("database x.db: {0}")]
    struct Repeats(#[source] Disk);

    #[derive(Debug, thiserror::Error)]
    #[error("cannot write the batch")]
    struct Hides(#[source] Disk);

    #[test]
    fn a_cause_already_in_the_message_is_said_once() {
        assert_eq!(reason(&Repeats(Disk)), "database x.db: disk: no space left");
        let e = anyhow::Error::new(Repeats(Disk)).context("ingest 2021.csv");
        assert_eq!(
            reason_of(&e),
            "ingest 2021.csv: database x.db: disk: no space left"
        );
        // `{:#}` repeats it; that is what this module exists for.
        assert_eq!(
            format!("{e:#}"),
            "ingest 2021.csv: database x.db: disk: no space left: disk: no space left"
        );
    }

    #[test]
    fn a_cause_not_in_the_message_is_added() {
        assert_eq!(
            reason(&Hides(Disk)),
            "cannot write the batch: disk: no space left"
        );
    }
}
