//! Names and texts made safe to print: whoever names a file must not be able
//! to write a line of leeward's log, a manifest or a listing.
//!
//! In: a path (any bytes but NUL and `/` in a name) or a text. Out: a string
//! with every control character (Unicode general category Cc: C0, DEL, C1),
//! the line and paragraph separators (U+2028, U+2029) and the bidirectional
//! formatting characters (U+202A-U+202E, U+2066-U+2069) written as escapes;
//! for paths also every byte that is not UTF-8 (`\xff`) and the backslash
//! itself (`\\`), so that two different paths never print the same. Names
//! that are plain UTF-8 without such characters print as they are.

use std::borrow::Cow;
use std::fmt;
use std::path::Path;

/// True for the characters that are never printed as they are.
fn unsafe_char(c: char) -> bool {
    c.is_control()
        || matches!(c, '\u{2028}' | '\u{2029}' | '\u{202a}'..='\u{202e}' | '\u{2066}'..='\u{2069}')
}

fn push_escaped(out: &mut impl fmt::Write, c: char) -> fmt::Result {
    match c {
        '\n' => out.write_str("\\n"),
        '\r' => out.write_str("\\r"),
        '\t' => out.write_str("\\t"),
        c => write!(out, "\\u{{{:x}}}", u32::from(c)),
    }
}

/// A text with its control characters escaped (backslashes are left as
/// they are: this is for messages, not for names; see [`path`]).
pub fn text(s: &str) -> Cow<'_, str> {
    if !s.chars().any(unsafe_char) {
        return Cow::Borrowed(s);
    }
    let mut o = String::with_capacity(s.len() + 8);
    for c in s.chars() {
        if unsafe_char(c) {
            let _ = push_escaped(&mut o, c);
        } else {
            o.push(c);
        }
    }
    Cow::Owned(o)
}

fn write_path(out: &mut impl fmt::Write, bytes: &[u8]) -> fmt::Result {
    for chunk in bytes.utf8_chunks() {
        for c in chunk.valid().chars() {
            if c == '\\' {
                out.write_str("\\\\")?;
            } else if unsafe_char(c) {
                push_escaped(out, c)?;
            } else {
                out.write_char(c)?;
            }
        }
        for b in chunk.invalid() {
            write!(out, "\\x{b:02x}")?;
        }
    }
    Ok(())
}

/// A path for printing: see the module's doc. Distinct paths give distinct strings.
pub fn path(p: &Path) -> String {
    shown(p).to_string()
}

/// The path a string of [`path`] stands for (`None` when it is not one).
pub fn unescape_path(s: &str) -> Option<std::path::PathBuf> {
    use std::os::unix::ffi::OsStringExt;
    let mut out: Vec<u8> = Vec::with_capacity(s.len());
    let mut it = s.chars().peekable();
    while let Some(c) = it.next() {
        if c != '\\' {
            let mut b = [0u8; 4];
            out.extend_from_slice(c.encode_utf8(&mut b).as_bytes());
            continue;
        }
        match it.next()? {
            '\\' => out.push(b'\\'),
            'n' => out.push(b'\n'),
            'r' => out.push(b'\r'),
            't' => out.push(b'\t'),
            'x' => {
                let hex: String = [it.next()?, it.next()?].iter().collect();
                out.push(u8::from_str_radix(&hex, 16).ok()?);
            }
            'u' => {
                if it.next()? != '{' {
                    return None;
                }
                let mut hex = String::new();
                loop {
                    match it.next()? {
                        '}' => break,
                        h => hex.push(h),
                    }
                }
                let c = char::from_u32(u32::from_str_radix(&hex, 16).ok()?)?;
                let mut b = [0u8; 4];
                out.extend_from_slice(c.encode_utf8(&mut b).as_bytes());
            }
            _ => return None,
        }
    }
    Some(std::ffi::OsString::from_vec(out).into())
}

/// A path that prints escaped (for `tracing` fields: `file = %shown(path)`).
pub struct Shown<'a>(&'a Path);

/// See [`Shown`].
pub fn shown(p: &Path) -> Shown<'_> {
    Shown(p)
}

impl fmt::Display for Shown<'_> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write_path(f, self.0.as_os_str().as_encoded_bytes())
    }
}

impl fmt::Debug for Shown<'_> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        fmt::Display::fmt(self, f)
    }
}

/// The fields of a text log line with every value escaped by [`text`], so
/// that no value (a file name, a reason quoting a file) can end the line or
/// start a false one. Laid out as `tracing_subscriber`'s default: the message
/// first, then `name=value`; strings quoted as `Debug` quotes them.
#[derive(Debug, Default, Clone, Copy)]
pub struct LogFields;

struct Visitor<'a, 'w> {
    out: &'a mut tracing_subscriber::fmt::format::Writer<'w>,
    first: bool,
    result: fmt::Result,
}

impl Visitor<'_, '_> {
    fn put(&mut self, name: &str, value: &str) {
        if self.result.is_err() {
            return;
        }
        let sep = if self.first { "" } else { " " };
        self.first = false;
        self.result = if name == "message" {
            write!(self.out, "{sep}{}", text(value))
        } else {
            write!(
                self.out,
                "{sep}{}={}",
                name.trim_start_matches("r#"),
                text(value)
            )
        };
    }
}

impl tracing::field::Visit for Visitor<'_, '_> {
    fn record_str(&mut self, field: &tracing::field::Field, value: &str) {
        if field.name() == "message" {
            self.put("message", value);
        } else {
            self.put(field.name(), &format!("{value:?}"));
        }
    }
    fn record_debug(&mut self, field: &tracing::field::Field, value: &dyn fmt::Debug) {
        self.put(field.name(), &format!("{value:?}"));
    }
}

impl<'w> tracing_subscriber::fmt::FormatFields<'w> for LogFields {
    fn format_fields<R: tracing_subscriber::field::RecordFields>(
        &self,
        mut writer: tracing_subscriber::fmt::format::Writer<'w>,
        fields: R,
    ) -> fmt::Result {
        let mut v = Visitor {
            out: &mut writer,
            first: true,
            result: Ok(()),
        };
        fields.record(&mut v);
        v.result
    }
}

/// A path in a record (JSON strings are UTF-8, a file name is any bytes): written as
/// [`path`] writes it and read back through [`unescape_path`], byte for byte.
/// For `#[serde(with = "crate::escape::serde_path")]`.
pub mod serde_path {
    use serde::{Deserialize, Deserializer, Serializer};
    use std::path::{Path, PathBuf};

    /// Write `p` escaped.
    pub fn serialize<S: Serializer>(p: &Path, s: S) -> Result<S::Ok, S::Error> {
        s.serialize_str(&crate::escape::path(p))
    }

    /// Read an escaped path back.
    pub fn deserialize<'de, D: Deserializer<'de>>(d: D) -> Result<PathBuf, D::Error> {
        let s = String::deserialize(d)?;
        crate::escape::unescape_path(&s)
            .ok_or_else(|| serde::de::Error::custom(format!("not an escaped path: {s}")))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::ffi::OsStr;
    use std::os::unix::ffi::OsStrExt;

    #[test]
    fn control_characters_and_foreign_bytes_are_escaped() {
        let p = Path::new(OsStr::from_bytes(
            b"/in/a\nWARN forged\x1b[31m\xff\\x.grib2",
        ));
        assert_eq!(path(p), "/in/a\\nWARN forged\\u{1b}[31m\\xff\\\\x.grib2");
        assert!(!path(p).contains('\n'));
        assert_eq!(
            path(Path::new("/in/plain ünïcode.grib2")),
            "/in/plain ünïcode.grib2"
        );
        assert_eq!(text("a\u{2028}b\u{202e}c\r"), "a\\u{2028}b\\u{202e}c\\r");
        assert_eq!(text("keep \\d{10}"), "keep \\d{10}");
    }

    #[test]
    fn escaped_paths_read_back_to_their_bytes() {
        for raw in [
            &b"/in/plain.grib2"[..],
            b"/in/a\nb\rc\td\x1b\x7f",
            b"/in/\xff\xfe\\xff\\\\",
            "/in/\u{2028}\u{202e}é".as_bytes(),
        ] {
            let p = Path::new(OsStr::from_bytes(raw));
            assert_eq!(unescape_path(&path(p)).as_deref(), Some(p), "{}", path(p));
        }
        assert_eq!(unescape_path("bad\\q"), None);
    }

    #[test]
    fn distinct_paths_print_distinct() {
        // A literal backslash-x-f-f and the byte 0xff must not print the same.
        let a = Path::new(OsStr::from_bytes(b"a\\xff"));
        let b = Path::new(OsStr::from_bytes(b"a\xff"));
        assert_ne!(path(a), path(b));
        let c = Path::new(OsStr::from_bytes(b"a\xc3"));
        let d = Path::new(OsStr::from_bytes(b"a\\xc3"));
        assert_ne!(path(c), path(d));
    }
}
