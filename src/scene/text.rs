//! Text helpers shared by the scene readers: one-line error messages, text copied from a file
//! into a message, and line splitting of text formats.

use std::path::Path;

use crate::error::Error;

/// An [`Error::Input`] whose message is kept on one line: control characters copied from the
/// file are escaped.
pub(crate) fn input_error(path: &Path, message: impl AsRef<str>) -> Error {
    Error::input(path, one_line(message.as_ref()))
}

/// An [`Error::Unsupported`] with the same escaping as [`input_error`].
pub(crate) fn unsupported_error(path: &Path, message: impl AsRef<str>) -> Error {
    Error::unsupported(path, one_line(message.as_ref()))
}

/// Escapes control characters so that a message copied from a file stays on one line.
pub(crate) fn one_line(message: &str) -> String {
    let mut out = String::with_capacity(message.len());
    for c in message.chars() {
        if c.is_control() {
            out.extend(c.escape_default());
        } else {
            out.push(c);
        }
    }
    out
}

/// Text copied from a file into a message, shortened when long.
pub(crate) fn shown(text: &str) -> String {
    const MAX_CHARS: usize = 40;
    match text.char_indices().nth(MAX_CHARS) {
        Some((cut, _)) => format!("{}...", &text[..cut]),
        None => text.to_string(),
    }
}

/// Splits `data` into lines at `\n`, dropping a `\r` before it. Yields each line and whether it
/// was terminated by `\n`.
pub(crate) fn lines_with_ends(data: &[u8]) -> impl Iterator<Item = (&[u8], bool)> {
    let mut rest = Some(data);
    std::iter::from_fn(move || {
        let d = rest?;
        match d.iter().position(|&b| b == b'\n') {
            Some(i) => {
                rest = Some(&d[i + 1..]);
                Some((strip_cr(&d[..i]), true))
            }
            None => {
                rest = None;
                if d.is_empty() {
                    None
                } else {
                    Some((strip_cr(d), false))
                }
            }
        }
    })
}

/// `line` without a final `\r`.
pub(crate) fn strip_cr(line: &[u8]) -> &[u8] {
    line.strip_suffix(b"\r").unwrap_or(line)
}

/// Parses a decimal number token, rejecting non-finite results.
pub(crate) fn parse_finite(token: &str) -> Option<f64> {
    token.parse::<f64>().ok().filter(|v| v.is_finite())
}
