//! Reading a PLY body element by element, in ASCII tokens or binary values.

use std::path::Path;

use super::{Element, Encoding, Header, PropKind};
use crate::error::{Error, Result};
use crate::scene::text::{input_error, lines_with_ends, shown};

/// How the rows of an ASCII body may lie on its lines (blank lines are skipped either way).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(crate) enum AsciiRows {
    /// Every row is one line: a line with too few or too many values is an error.
    OnePerLine,
    /// The values run on across lines: a row may span lines or share one with the next row.
    AnyLines,
}

/// One row of an element as read from the body.
pub(crate) struct Row<'r> {
    /// Index of the row's element in [`Header::elements`].
    pub(crate) element: usize,
    /// Index of the row within its element.
    pub(crate) index: u64,
    /// One value per property: the scalar, or for a list its length.
    pub(crate) values: &'r [f64],
    /// The items of each list property (empty for scalars).
    lists: &'r [Vec<f64>],
    name: &'r str,
    at: At,
}

impl Row<'_> {
    /// The items of list property `prop` (empty for a scalar property).
    pub(crate) fn list(&self, prop: usize) -> &[f64] {
        &self.lists[prop]
    }

    /// The row's place in messages: `line 12 (vertex index 3)` for ASCII, `vertex index 3 at
    /// byte offset 200` (where the row starts) for binary.
    pub(crate) fn place(&self) -> String {
        self.at.place(self.name, self.index)
    }
}

/// Where a row is: the body line it was read from (the last one, when it spans lines), or the
/// byte offset of its start.
#[derive(Clone, Copy)]
enum At {
    Line(usize),
    Byte(usize),
}

impl At {
    fn place(self, element: &str, index: u64) -> String {
        match self {
            At::Line(line) => format!("line {line} ({element} index {index})"),
            At::Byte(offset) => format!("{element} index {index} at byte offset {offset}"),
        }
    }
}

/// The row being read, for messages.
#[derive(Clone, Copy)]
struct RowRef<'e> {
    element: &'e Element,
    index: u64,
    path: &'e Path,
}

impl RowRef<'_> {
    fn error(self, at: At, message: String) -> Error {
        let place = at.place(&self.element.name, self.index);
        input_error(self.path, format!("{place}: {message}"))
    }
}

/// Reads the body after `header` in `data`, calling `visit` with every row of every element in
/// file order. Call [`Header::check_body_size`] first when reserving room for rows. `rows` says
/// how ASCII rows lie on lines; binary bodies ignore it.
pub(crate) fn read_body(
    data: &[u8],
    header: &Header,
    rows: AsciiRows,
    path: &Path,
    mut visit: impl FnMut(&Row) -> Result<()>,
) -> Result<()> {
    let mut body = match header.encoding {
        Encoding::Ascii => Body::Ascii(AsciiBody {
            lines: Box::new(
                lines_with_ends(&data[header.body_start..])
                    .zip(header.body_line..)
                    .filter(|((line, _), _)| !line.trim_ascii().is_empty()),
            ),
            tokens: "".split_ascii_whitespace(),
            line: header.body_line - 1,
            rows,
        }),
        Encoding::LittleEndian | Encoding::BigEndian => Body::Binary(BinaryBody {
            data,
            pos: header.body_start,
            big_endian: header.encoding == Encoding::BigEndian,
        }),
    };
    let mut values = Vec::new();
    let mut lists: Vec<Vec<f64>> = Vec::new();
    for (ei, element) in header.elements.iter().enumerate() {
        values.clear();
        values.resize(element.props.len(), 0.0);
        lists.resize_with(element.props.len(), Vec::new);
        lists.iter_mut().for_each(Vec::clear);
        for index in 0..element.count {
            let r = RowRef {
                element,
                index,
                path,
            };
            let at = match &mut body {
                Body::Binary(b) => b.row(r, &mut values, &mut lists)?,
                Body::Ascii(a) => a.row(r, &mut values, &mut lists)?,
            };
            visit(&Row {
                element: ei,
                index,
                values: &values,
                lists: &lists,
                name: &element.name,
                at,
            })?;
        }
    }
    match body {
        Body::Binary(b) => b.finish(path),
        Body::Ascii(a) => a.finish(path),
    }
}

/// The body being read.
enum Body<'a> {
    Binary(BinaryBody<'a>),
    Ascii(AsciiBody<'a>),
}

struct BinaryBody<'a> {
    data: &'a [u8],
    /// Offset of the next unread byte.
    pos: usize,
    big_endian: bool,
}

impl<'a> BinaryBody<'a> {
    /// Reads one row into `values` and `lists`; returns where it starts.
    fn row(&mut self, r: RowRef, values: &mut [f64], lists: &mut [Vec<f64>]) -> Result<At> {
        let at = At::Byte(self.pos);
        let file_len = self.data.len();
        let big = self.big_endian;
        for (pi, prop) in r.element.props.iter().enumerate() {
            let truncated = || {
                let name = &prop.name;
                r.error(
                    at,
                    format!("file ends at byte {file_len} inside property '{name}' (truncated?)"),
                )
            };
            match prop.kind {
                PropKind::Scalar(t) => {
                    values[pi] = t.decode(self.take(t.size() as u64).ok_or_else(truncated)?, big);
                }
                PropKind::List { count, item } => {
                    let n =
                        count.decode(self.take(count.size() as u64).ok_or_else(truncated)?, big);
                    if n < 0.0 {
                        let name = &prop.name;
                        return Err(r.error(at, format!("list '{name}' has negative length {n}")));
                    }
                    // n < 2^32 and item size <= 8, so this cannot overflow u64; the bytes are
                    // taken before any item is kept, so a huge length allocates nothing.
                    let bytes = self
                        .take(n as u64 * item.size() as u64)
                        .ok_or_else(truncated)?;
                    lists[pi].clear();
                    lists[pi].extend(bytes.chunks_exact(item.size()).map(|b| item.decode(b, big)));
                    values[pi] = n;
                }
            }
        }
        Ok(at)
    }

    /// The next `len` bytes, or `None` when the file ends before them.
    fn take(&mut self, len: u64) -> Option<&'a [u8]> {
        let end = (self.pos as u64)
            .checked_add(len)
            .filter(|&end| end <= self.data.len() as u64)? as usize;
        let bytes = &self.data[self.pos..end];
        self.pos = end;
        Some(bytes)
    }

    fn finish(self, path: &Path) -> Result<()> {
        let (len, pos) = (self.data.len(), self.pos);
        if pos == len {
            return Ok(());
        }
        Err(input_error(
            path,
            format!(
                "{} unexpected byte(s) after the last element, from byte offset {pos} (the \
                 header declares fewer rows or smaller types than the file holds)",
                len - pos
            ),
        ))
    }
}

/// Non-blank lines of an ASCII body, numbered, each with whether a `\n` ends it.
type Lines<'a> = Box<dyn Iterator<Item = ((&'a [u8], bool), usize)> + 'a>;

struct AsciiBody<'a> {
    lines: Lines<'a>,
    /// The unread tokens of the current line.
    tokens: std::str::SplitAsciiWhitespace<'a>,
    /// Number of the current line.
    line: usize,
    rows: AsciiRows,
}

impl<'a> AsciiBody<'a> {
    /// Reads one row into `values` and `lists`; returns the line it ends on.
    fn row(&mut self, r: RowRef, values: &mut [f64], lists: &mut [Vec<f64>]) -> Result<At> {
        if self.rows == AsciiRows::OnePerLine {
            self.next_line(r)?;
        }
        for (pi, prop) in r.element.props.iter().enumerate() {
            let name = &prop.name;
            match prop.kind {
                PropKind::Scalar(t) => {
                    let token = self.token(r, &|| format!("property '{name}'"))?;
                    values[pi] = t.parse_text(token).ok_or_else(|| {
                        let (token, t) = (shown(token), t.name());
                        self.error(
                            r,
                            format!("property '{name}': '{token}' is not a valid {t}"),
                        )
                    })?;
                }
                PropKind::List { count, item } => {
                    let token = self.token(r, &|| format!("the length of list '{name}'"))?;
                    let n = count
                        .parse_text(token)
                        .filter(|n| *n >= 0.0)
                        .ok_or_else(|| {
                            let (token, t) = (shown(token), count.name());
                            let msg = format!(
                                "list '{name}': length '{token}' is not a non-negative {t}"
                            );
                            self.error(r, msg)
                        })?;
                    lists[pi].clear();
                    // Each item consumes a token of the body, so a huge length fails at the end
                    // of the line (or of the body) instead of looping or allocating.
                    for k in 0..n as u64 {
                        let token = self.token(r, &|| format!("item {k} of list '{name}'"))?;
                        let v = item.parse_text(token).ok_or_else(|| {
                            let (token, t) = (shown(token), item.name());
                            let msg =
                                format!("list '{name}' item {k}: '{token}' is not a valid {t}");
                            self.error(r, msg)
                        })?;
                        lists[pi].push(v);
                    }
                    values[pi] = n;
                }
            }
        }
        if self.rows == AsciiRows::OnePerLine && self.tokens.next().is_some() {
            let (n, element) = (r.element.props.len(), &r.element.name);
            return Err(self.error(
                r,
                format!("more values than the {n} properties the header declares for '{element}'"),
            ));
        }
        Ok(At::Line(self.line))
    }

    fn error(&self, r: RowRef, message: String) -> Error {
        r.error(At::Line(self.line), message)
    }

    /// Moves to the next non-blank line.
    fn next_line(&mut self, r: RowRef) -> Result<()> {
        let Some(((raw, terminated), line)) = self.lines.next() else {
            let (count, name) = (r.element.count, &r.element.name);
            return Err(input_error(
                r.path,
                format!(
                    "line {}: file ends after {} of {count} '{name}' rows (truncated?)",
                    self.line, r.index
                ),
            ));
        };
        self.line = line;
        if !terminated {
            return Err(self.error(
                r,
                "the file ends without a final line break (truncated?)".into(),
            ));
        }
        let text =
            std::str::from_utf8(raw).map_err(|_| self.error(r, "line is not valid text".into()))?;
        self.tokens = text.split_ascii_whitespace();
        Ok(())
    }

    /// The next token of the row; `what` names the value it is for.
    fn token(&mut self, r: RowRef, what: &dyn Fn() -> String) -> Result<&'a str> {
        loop {
            if let Some(token) = self.tokens.next() {
                return Ok(token);
            }
            if self.rows == AsciiRows::OnePerLine {
                return Err(self.error(r, format!("too few values: {} is missing", what())));
            }
            self.next_line(r)?;
        }
    }

    fn finish(mut self, path: &Path) -> Result<()> {
        let extra = match self.tokens.next() {
            Some(_) => Some(self.line),
            None => self.lines.next().map(|(_, line)| line),
        };
        match extra {
            None => Ok(()),
            Some(line) => Err(input_error(
                path,
                format!(
                    "line {line}: unexpected data after the last element (the header declares \
                     fewer rows)"
                ),
            )),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A row as (element, values, items of property 0).
    type Seen = (usize, Vec<f64>, Vec<f64>);

    /// Every row of `text`.
    fn rows(text: &str, rows: AsciiRows) -> Result<Vec<Seen>> {
        let path = Path::new("t.ply");
        let header = Header::parse(text.as_bytes(), path)?;
        let mut out = Vec::new();
        read_body(text.as_bytes(), &header, rows, path, |row| {
            out.push((row.element, row.values.to_vec(), row.list(0).to_vec()));
            Ok(())
        })?;
        Ok(out)
    }

    const HEADER: &str = "ply\nformat ascii 1.0\nelement face 1\nproperty list uchar int i\n\
                          element vertex 2\nproperty float x\nproperty float y\nend_header\n";

    #[test]
    fn ascii_rows_on_their_own_lines_or_running_on() {
        // PLY format (Turk, "The PLY polygon file format", 1994): an ASCII row is the values
        // of its properties in order, a list as its length and then its items.
        let want = vec![
            (0, vec![3.0], vec![0.0, 1.0, 1.0]),
            (1, vec![0.5, -2.0], vec![]),
            (1, vec![7.0, 8.0], vec![]),
        ];
        let one_per_line = format!("{HEADER}3 0 1 1\n0.5 -2\n\n7 8\n");
        assert_eq!(rows(&one_per_line, AsciiRows::OnePerLine).unwrap(), want);
        assert_eq!(rows(&one_per_line, AsciiRows::AnyLines).unwrap(), want);
        // Rows spanning and sharing lines (common practice for token-based readers).
        let running_on = format!("{HEADER}3 0\n1 1 0.5\n-2 7 8\n");
        assert_eq!(rows(&running_on, AsciiRows::AnyLines).unwrap(), want);
        let e = rows(&running_on, AsciiRows::OnePerLine)
            .unwrap_err()
            .to_string();
        assert!(e.contains("line 9 (face index 0): too few values"), "{e}");
        let e = rows(
            &format!("{HEADER}3 0 1 1\n0.5 -2\n7 8 9\n"),
            AsciiRows::AnyLines,
        )
        .unwrap_err()
        .to_string();
        assert!(
            e.contains("line 11: unexpected data after the last element"),
            "{e}"
        );
    }
}
