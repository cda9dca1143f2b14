//! Outside text made safe to print: file names, URLs and header names come from whoever
//! drops a file or runs a server, and a newline in one would forge a log line while an ESC
//! sequence would rewrite the operator's terminal. `escape_outside` turns every control
//! character into a visible escape (`\n`, `\u{1b}`) and leaves everything else alone, so the
//! common case costs no allocation. Pure: no IO.

use std::borrow::Cow;
use std::fmt::Write as _;
use std::path::Path;

/// `text` with control characters shown as escapes: `\n`, `\r`, `\t` and `\\` as such, every
/// other C0 and C1 control, DEL, the line and paragraph separators and the bidirectional
/// overrides (which reorder what a terminal shows) as `\u{..}`. Borrowed when nothing needs
/// escaping. The backslash is doubled so an escape in the output is never ambiguous.
pub fn escape_outside(text: &str) -> Cow<'_, str> {
    if !text.chars().any(needs_escape) {
        return Cow::Borrowed(text);
    }
    let mut out = String::with_capacity(text.len() + 8);
    for ch in text.chars() {
        match ch {
            '\n' => out.push_str("\\n"),
            '\r' => out.push_str("\\r"),
            '\t' => out.push_str("\\t"),
            '\\' => out.push_str("\\\\"),
            ch if needs_escape(ch) => {
                let _ = write!(out, "\\u{{{:x}}}", ch as u32);
            }
            ch => out.push(ch),
        }
    }
    Cow::Owned(out)
}

/// A path as printable text: lossy UTF-8 (as `Path::display`), then [`escape_outside`].
pub fn escape_path(path: &Path) -> String {
    escape_outside(&path.to_string_lossy()).into_owned()
}

/// Whether `ch` is shown as an escape: controls (C0, DEL, C1), the backslash, U+2028 and
/// U+2029 (line breaks to some viewers) and the bidirectional embedding, override and
/// isolate marks (the "Trojan Source" characters).
fn needs_escape(ch: char) -> bool {
    ch.is_control()
        || ch == '\\'
        || matches!(ch, '\u{2028}' | '\u{2029}' | '\u{200e}' | '\u{200f}' | '\u{202a}'..='\u{202e}' | '\u{2066}'..='\u{2069}')
}

#[cfg(test)]
mod tests {
    use super::*;

    fn check(input: &str, expected: &str) {
        assert_eq!(escape_outside(input), expected, "{input:?}");
    }

    #[test]
    fn control_characters_show_as_escapes() {
        check("extract-2026-03-01.csv", "extract-2026-03-01.csv");
        check("", "");
        check("café ünïcode ✓.csv", "café ünïcode ✓.csv");
        check("a\nb", "a\\nb");
        check("a\r\nb", "a\\r\\nb");
        check("tab\there", "tab\\there");
        check("\x1b[31mred\x1b[0m", "\\u{1b}[31mred\\u{1b}[0m");
        check("bell\x07", "bell\\u{7}");
        check("nul\0", "nul\\u{0}");
        check("del\x7f", "del\\u{7f}");
        check("c1\u{9b}31m", "c1\\u{9b}31m");
        check("c1 next line\u{85}", "c1 next line\\u{85}");
        check("line\u{2028}sep", "line\\u{2028}sep");
        check("evil\u{202e}vsc.exe", "evil\\u{202e}vsc.exe");
        check("isolate\u{2066}x\u{2069}", "isolate\\u{2066}x\\u{2069}");
        check("back\\slash", "back\\\\slash");
        check("already \\n escaped", "already \\\\n escaped");
    }

    #[test]
    fn a_forged_log_line_stays_on_one_line() {
        let name = "x.csv\n2026-03-01T00:00:00Z  INFO tidemark: extract ingested";
        let escaped = escape_outside(name);
        assert!(!escaped.contains('\n'));
        assert_eq!(escaped.lines().count(), 1);
    }

    #[test]
    fn clean_text_is_borrowed() {
        assert!(matches!(escape_outside("plain.csv"), Cow::Borrowed(_)));
        assert!(matches!(escape_outside("not\nplain"), Cow::Owned(_)));
    }

    #[test]
    fn paths_are_escaped_too() {
        assert_eq!(escape_path(Path::new("/in/a\nb.csv")), "/in/a\\nb.csv");
        use std::os::unix::ffi::OsStrExt;
        let bytes = std::ffi::OsStr::from_bytes(b"/in/\xff\x1b.csv");
        assert_eq!(escape_path(Path::new(bytes)), "/in/\u{fffd}\\u{1b}.csv");
    }
}
