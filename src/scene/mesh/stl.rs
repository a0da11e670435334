//! STL reader, ASCII and binary.
//!
//! A file is binary when its size is exactly `84 + 50 n`, with `n` the triangle count stored at
//! byte 80; otherwise it must be ASCII text starting with `solid` (binary files often start with
//! `solid` too, so that prefix alone decides nothing). Coordinates are taken as millimetres.
//!
//! STL stores every triangle with its own three corners; corners with bit-identical
//! coordinates are merged into one vertex (in order of first appearance) so that smooth
//! normals can be computed across triangles. The stored facet normals are not used: the
//! winding of the corners decides which side faces out, as the format prescribes. The
//! attribute bytes of binary records (used by some programs for colour) are ignored.
//!
//! An ASCII file must close every `solid` with `endsolid`; several solids in one file are read
//! as one mesh. Polygons with more than three `vertex` lines inside one loop are split as a fan.

use std::collections::HashMap;
use std::path::Path;

use super::{fan, Mesh};
use crate::error::Result;
use crate::scene::text::{input_error, lines_with_ends, parse_finite, shown};

/// Reads an STL file.
pub fn read(path: &Path) -> Result<Mesh> {
    let data = std::fs::read(path).map_err(|e| crate::error::Error::io(path, e))?;
    parse(&data, path)
}

/// Parses STL bytes; `path` names the source in error messages.
pub fn parse(data: &[u8], path: &Path) -> Result<Mesh> {
    let binary_count = (data.len() >= 84)
        .then(|| u32::from_le_bytes(data[80..84].try_into().expect("4 bytes")))
        .filter(|&n| data.len() as u64 == 84 + 50 * u64::from(n));
    if let Some(n) = binary_count {
        return parse_binary(data, n as usize, path);
    }
    if data.trim_ascii_start().starts_with(b"solid") {
        return parse_ascii(data, path);
    }
    if data.len() >= 84 {
        let n = u32::from_le_bytes(data[80..84].try_into().expect("4 bytes"));
        Err(input_error(
            path,
            format!(
                "not an STL file: it does not start with 'solid' (ASCII), and as binary STL its \
                 header declares {n} triangles, which take {} bytes, but the file has {} \
                 (truncated?)",
                84 + 50 * u64::from(n),
                data.len()
            ),
        ))
    } else {
        Err(input_error(
            path,
            format!(
                "not an STL file: it does not start with 'solid' (ASCII) and its {} bytes are \
                 fewer than the 84 of a binary STL header",
                data.len()
            ),
        ))
    }
}

/// Merges corners with identical coordinates into indexed vertices.
#[derive(Default)]
struct Welder {
    positions: Vec<[f64; 3]>,
    index: HashMap<[u64; 3], u32>,
}

impl Welder {
    fn vertex(&mut self, p: [f64; 3]) -> u32 {
        // Adding 0.0 turns -0.0 into +0.0 so that both merge.
        let key = p.map(|v| (v + 0.0).to_bits());
        let next = self.positions.len() as u32;
        *self.index.entry(key).or_insert_with(|| {
            self.positions.push(p);
            next
        })
    }
}

fn parse_binary(data: &[u8], n: usize, path: &Path) -> Result<Mesh> {
    if n == 0 {
        return Err(input_error(path, "binary STL declares 0 triangles"));
    }
    let mut welder = Welder::default();
    // The size check above bounds `n` by the file size.
    let mut triangles = Vec::with_capacity(n);
    for (k, rec) in data[84..].chunks_exact(50).enumerate() {
        let f = |o: usize| f32::from_le_bytes(rec[o..o + 4].try_into().expect("4 bytes"));
        let mut corners = [0u32; 3];
        for (c, corner) in corners.iter_mut().enumerate() {
            let o = 12 + 12 * c;
            let p = [f(o), f(o + 4), f(o + 8)];
            if !p.iter().all(|v| v.is_finite()) {
                return Err(input_error(
                    path,
                    format!(
                        "triangle {k} (byte offset {}): corner {c} has a non-finite coordinate",
                        84 + 50 * k
                    ),
                ));
            }
            *corner = welder.vertex(p.map(f64::from));
        }
        triangles.push(corners);
    }
    Ok(Mesh::from_triangles(welder.positions, triangles, path))
}

/// Whitespace-separated tokens of a text file with their line numbers.
struct Tokens<'a> {
    lines: Box<dyn Iterator<Item = (&'a [u8], usize)> + 'a>,
    current: std::str::SplitAsciiWhitespace<'a>,
    line: usize,
}

impl<'a> Tokens<'a> {
    fn new(data: &'a [u8]) -> Self {
        Tokens {
            lines: Box::new(lines_with_ends(data).map(|(l, _)| l).zip(1..)),
            current: "".split_ascii_whitespace(),
            line: 0,
        }
    }

    /// The next token, or `None` at the end of the file; an error for a line that is not
    /// text.
    fn next(&mut self, path: &Path) -> Result<Option<&'a str>> {
        loop {
            if let Some(t) = self.current.next() {
                return Ok(Some(t));
            }
            let Some((raw, line)) = self.lines.next() else {
                return Ok(None);
            };
            self.line = line;
            let text = std::str::from_utf8(raw)
                .map_err(|_| input_error(path, format!("line {line}: line is not valid text")))?;
            self.current = text.split_ascii_whitespace();
        }
    }

    /// Skips the rest of the current line (the name after `solid` / `endsolid`).
    fn skip_line(&mut self) {
        self.current = "".split_ascii_whitespace();
    }
}

fn parse_ascii(data: &[u8], path: &Path) -> Result<Mesh> {
    let mut tok = Tokens::new(data);
    let mut welder = Welder::default();
    let mut triangles = Vec::new();
    let mut corners: Vec<u32> = Vec::new();
    let mut solids = 0usize;

    // Expects the keyword `want`; `context` says what was being read.
    fn expect(tok: &mut Tokens, want: &str, context: &str, path: &Path) -> Result<()> {
        match tok.next(path)? {
            Some(t) if t == want => Ok(()),
            Some(t) => Err(input_error(
                path,
                format!(
                    "line {}: expected '{want}' {context}, found '{}'",
                    tok.line,
                    shown(t)
                ),
            )),
            None => Err(input_error(
                path,
                format!(
                    "line {}: the file ends where '{want}' was expected {context} (truncated?)",
                    tok.line
                ),
            )),
        }
    }
    fn number(tok: &mut Tokens, what: &str, path: &Path) -> Result<f64> {
        match tok.next(path)? {
            Some(t) => parse_finite(t).ok_or_else(|| {
                input_error(
                    path,
                    format!(
                        "line {}: {what}: '{}' is not a finite number",
                        tok.line,
                        shown(t)
                    ),
                )
            }),
            None => Err(input_error(
                path,
                format!(
                    "line {}: the file ends inside {what} (truncated?)",
                    tok.line
                ),
            )),
        }
    }

    loop {
        // Between solids.
        match tok.next(path)? {
            None if solids > 0 => break,
            None => return Err(input_error(path, "ASCII STL has no 'solid'")),
            Some("solid") => tok.skip_line(),
            Some(t) => {
                return Err(input_error(
                    path,
                    format!(
                        "line {}: expected 'solid' or the end of the file, found '{}'",
                        tok.line,
                        shown(t)
                    ),
                ))
            }
        }
        // Inside a solid.
        loop {
            match tok.next(path)? {
                Some("endsolid") => {
                    tok.skip_line();
                    solids += 1;
                    break;
                }
                Some("facet") => {}
                Some(t) => {
                    return Err(input_error(
                        path,
                        format!(
                            "line {}: expected 'facet' or 'endsolid', found '{}'",
                            tok.line,
                            shown(t)
                        ),
                    ))
                }
                None => {
                    return Err(input_error(
                        path,
                        format!(
                            "line {}: the file ends before 'endsolid' (truncated?)",
                            tok.line
                        ),
                    ))
                }
            }
            let facet_line = tok.line;
            expect(&mut tok, "normal", "after 'facet'", path)?;
            for _ in 0..3 {
                number(&mut tok, "the facet normal", path)?;
            }
            expect(&mut tok, "outer", "after the facet normal", path)?;
            expect(&mut tok, "loop", "after 'outer'", path)?;
            corners.clear();
            loop {
                match tok.next(path)? {
                    Some("vertex") => {
                        let mut p = [0.0; 3];
                        for v in &mut p {
                            *v = number(&mut tok, "a vertex", path)?;
                        }
                        corners.push(welder.vertex(p));
                    }
                    Some("endloop") => break,
                    Some(t) => {
                        return Err(input_error(
                            path,
                            format!(
                                "line {}: expected 'vertex' or 'endloop', found '{}'",
                                tok.line,
                                shown(t)
                            ),
                        ))
                    }
                    None => {
                        return Err(input_error(
                            path,
                            format!(
                                "line {}: the file ends inside the facet of line {facet_line} \
                                 (truncated?)",
                                tok.line
                            ),
                        ))
                    }
                }
            }
            if corners.len() < 3 {
                return Err(input_error(
                    path,
                    format!(
                        "line {facet_line}: facet has {} vertices, fewer than 3",
                        corners.len()
                    ),
                ));
            }
            fan(&corners, &mut triangles);
            expect(&mut tok, "endfacet", "after 'endloop'", path)?;
        }
    }
    if triangles.is_empty() {
        return Err(input_error(path, "ASCII STL has no facets"));
    }
    Ok(Mesh::from_triangles(welder.positions, triangles, path))
}
