//! Text from outside (file names, site codes, header cells, stored messages) made safe to
//! show a person: every control character becomes a visible escape such as `\u{1b}`, so a
//! name holding `ESC [2J` cannot clear a terminal, forge a line or break the report's SVG.
//!
//! Stored data keeps its bytes verbatim; only what is printed or drawn goes through here.
//! Checked end to end by
//! `tests/e2e_report.rs::control_characters_in_names_and_codes_are_shown_as_escapes`.

use std::borrow::Cow;

/// Whether `c` must not reach a terminal or a page raw: the C0 and C1 control characters
/// and DEL, and the bidirectional overrides and isolates (they reorder what follows).
fn hidden(c: char) -> bool {
    c.is_control() || matches!(c, '\u{202a}'..='\u{202e}' | '\u{2066}'..='\u{2069}')
}

/// `text` with every control character (newline and tab included) as an escape:
/// `\n`, `\r`, `\t`, or `\u{1b}`.
pub fn visible(text: &str) -> Cow<'_, str> {
    escape(text, false)
}

/// Like [`visible`], but line ends stay: for whole blocks of output whose fields were
/// already passed through [`visible`].
pub fn visible_lines(text: &str) -> Cow<'_, str> {
    escape(text, true)
}

/// A path as [`visible`] text.
pub fn visible_path(path: &std::path::Path) -> String {
    visible(&path.display().to_string()).into_owned()
}

fn escape(text: &str, keep_newlines: bool) -> Cow<'_, str> {
    let keep = |c: char| !hidden(c) || (keep_newlines && c == '\n');
    if text.chars().all(keep) {
        return Cow::Borrowed(text);
    }
    let mut out = String::with_capacity(text.len() + 8);
    for c in text.chars() {
        match c {
            c if keep(c) => out.push(c),
            '\n' => out.push_str("\\n"),
            '\r' => out.push_str("\\r"),
            '\t' => out.push_str("\\t"),
            c => out.push_str(&format!("\\u{{{:x}}}", c as u32)),
        }
    }
    Cow::Owned(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn control_characters_become_visible_escapes() {
        assert_eq!(visible("plain Järvi 湖"), "plain Järvi 湖");
        assert!(matches!(visible("plain"), Cow::Borrowed(_)));
        assert_eq!(visible("a\u{1b}[2Jb"), "a\\u{1b}[2Jb");
        assert_eq!(visible("x\ny\tz\r"), "x\\ny\\tz\\r");
        assert_eq!(visible("\u{9b}\u{7f}\u{202e}"), "\\u{9b}\\u{7f}\\u{202e}");
        assert_eq!(visible_lines("a\u{7}\nb\n"), "a\\u{7}\nb\n");
    }
}
