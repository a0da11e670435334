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

/// Largest scene file read whole (points or mesh), bytes.
pub const MAX_SCENE_FILE_BYTES: u64 = 2 << 30;

/// What a scene file must look like from its first bytes, checked before the whole file is read.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Expect {
    /// A PLY header (`ply` on the first line).
    Ply,
    /// glTF: the binary magic `glTF`, or JSON text starting with `{`.
    Gltf,
    /// Text (CSV, OBJ): no NUL byte.
    Text,
    /// Anything (formats whose parser checks its own size first, such as binary STL).
    Any,
}

/// Reads a scene file after checking, from its size and first 4 KiB, that it can be what its
/// extension says: a file that is not (a renamed image, a sparse file of zeros) is refused
/// before gigabytes are read into memory.
pub fn read_checked(path: &Path, expect: Expect) -> crate::error::Result<Vec<u8>> {
    use std::io::Read;
    let meta = std::fs::metadata(path).map_err(|e| Error::io(path, e))?;
    if !meta.is_file() {
        return Err(input_error(path, "is not a regular file"));
    }
    if meta.len() > MAX_SCENE_FILE_BYTES {
        return Err(input_error(
            path,
            format!(
                "is {:.2} GB; scene files are read whole, at most {:.2} GB",
                meta.len() as f64 / 1e9,
                MAX_SCENE_FILE_BYTES as f64 / 1e9
            ),
        ));
    }
    let mut head = Vec::new();
    std::fs::File::open(path)
        .and_then(|f| f.take(4096).read_to_end(&mut head))
        .map_err(|e| Error::io(path, e))?;
    let text_start = {
        let t = head.strip_prefix(b"\xef\xbb\xbf").unwrap_or(&head);
        let k = t
            .iter()
            .position(|b| !b.is_ascii_whitespace())
            .unwrap_or(t.len());
        &t[k..]
    };
    let ok = match expect {
        Expect::Any => true,
        Expect::Ply => head.starts_with(b"ply\n") || head.starts_with(b"ply\r\n"),
        Expect::Gltf => head.starts_with(b"glTF") || text_start.starts_with(b"{"),
        Expect::Text => !head.contains(&0),
    };
    if !ok && !head.is_empty() {
        let what = match expect {
            Expect::Ply => "a PLY file (line 1 is not 'ply')",
            Expect::Gltf => "a glTF file (neither the binary 'glTF' magic nor JSON)",
            _ => "a text file (it holds NUL bytes)",
        };
        return Err(input_error(path, format!("is not {what}")));
    }
    std::fs::read(path).map_err(|e| Error::io(path, e))
}
