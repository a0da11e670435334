//! Spot lists for modulator patterns (optical traps): a CSV file with a header naming the columns
//! `x_um, y_um, z_um, weight` and optionally `phase_rad`, in any order; one spot per line; `#`
//! starts a comment line. x and y are positions in the lens's focal plane (x along the replay
//! lattice's columns, y up), z the distance beyond that plane along the axis; weight the relative
//! intensity wanted (> 0); phase_rad fixes the spot's phase (an empty cell, or no such column,
//! lets the design choose it).

use std::path::Path;

use super::text::{
    input_error, lines_with_ends, parse_finite, read_checked, shown, strip_cr, Expect,
};
use crate::error::Result;

/// One spot: position in the focal plane and defocus, metres; relative intensity; an optional
/// fixed phase, radians.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Spot {
    /// Focal-plane x (replay columns increasing), metres.
    pub x: f64,
    /// Focal-plane y (up), metres.
    pub y: f64,
    /// Distance beyond the focal plane along the axis, metres.
    pub z: f64,
    /// Relative intensity wanted (> 0).
    pub weight: f64,
    /// The spot's phase, if fixed.
    pub phase: Option<f64>,
}

/// Most spots a list may hold (the design costs spots x pixels per iteration).
pub const MAX_SPOTS: usize = 10_000;

/// Reads a spot list (positions converted to metres).
pub fn read_spots(path: &Path) -> Result<Vec<Spot>> {
    parse_spots(&read_checked(path, Expect::Text)?, path)
}

/// Parses a spot list; `path` names the source in messages.
pub fn parse_spots(data: &[u8], path: &Path) -> Result<Vec<Spot>> {
    let text = std::str::from_utf8(data).map_err(|e| {
        input_error(
            path,
            format!("is not UTF-8 text (byte {})", e.valid_up_to()),
        )
    })?;
    let mut cols: Option<[Option<usize>; 5]> = None;
    let mut spots = Vec::new();
    for (no, (line, _)) in lines_with_ends(text.as_bytes()).enumerate() {
        let line_no = no + 1;
        let line = std::str::from_utf8(strip_cr(line)).unwrap_or("").trim();
        let line = line.strip_prefix('\u{feff}').unwrap_or(line);
        if line.is_empty() || line.starts_with('#') {
            continue;
        }
        let fields: Vec<&str> = line.split(',').map(str::trim).collect();
        let Some(c) = cols else {
            let names = ["x_um", "y_um", "z_um", "weight", "phase_rad"];
            let mut found = [None; 5];
            for (i, f) in fields.iter().enumerate() {
                match names.iter().position(|n| n == f) {
                    Some(k) if found[k].is_none() => found[k] = Some(i),
                    Some(_) => {
                        return Err(input_error(path, format!("line {line_no}: column {f} named twice")))
                    }
                    None => {
                        return Err(input_error(
                            path,
                            format!(
                                "line {line_no}: unknown column '{}' (the header names x_um, y_um, z_um, weight and optionally phase_rad)",
                                shown(f)
                            ),
                        ))
                    }
                }
            }
            if let Some(k) = (0..4).find(|&k| found[k].is_none()) {
                return Err(input_error(
                    path,
                    format!("line {line_no}: the header lacks column {}", names[k]),
                ));
            }
            cols = Some(found);
            continue;
        };
        let width = c.iter().flatten().count();
        if fields.len() != width {
            return Err(input_error(
                path,
                format!(
                    "line {line_no}: {} values, the header names {width}",
                    fields.len()
                ),
            ));
        }
        let get = |k: usize, name: &str| -> Result<f64> {
            let i = c[k].expect("header checked");
            parse_finite(fields[i]).ok_or_else(|| {
                input_error(
                    path,
                    format!(
                        "line {line_no}: {name} = '{}' is not a finite number",
                        shown(fields[i])
                    ),
                )
            })
        };
        let (x, y, z, w) = (
            get(0, "x_um")?,
            get(1, "y_um")?,
            get(2, "z_um")?,
            get(3, "weight")?,
        );
        // An empty phase_rad cell leaves that spot's phase free.
        let phase = match c[4] {
            Some(i) if fields[i].is_empty() => None,
            Some(_) => Some(get(4, "phase_rad")?),
            None => None,
        };
        if w <= 0.0 {
            return Err(input_error(
                path,
                format!("line {line_no}: weight = {w} must be > 0"),
            ));
        }
        for (name, v) in [("x_um", x), ("y_um", y), ("z_um", z)] {
            if v.abs() > 1e6 {
                return Err(input_error(
                    path,
                    format!("line {line_no}: {name} = {v} is beyond 1 m from the axis"),
                ));
            }
        }
        if spots.len() == MAX_SPOTS {
            return Err(input_error(
                path,
                format!("holds more than {MAX_SPOTS} spots"),
            ));
        }
        spots.push(Spot {
            x: x / 1e6,
            y: y / 1e6,
            z: z / 1e6,
            weight: w,
            phase,
        });
    }
    if cols.is_none() {
        return Err(input_error(
            path,
            "has no header line (x_um, y_um, z_um, weight)",
        ));
    }
    if spots.is_empty() {
        return Err(input_error(path, "lists no spots"));
    }
    Ok(spots)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn parse(s: &str) -> std::result::Result<Vec<Spot>, String> {
        parse_spots(s.as_bytes(), Path::new("t.csv")).map_err(|e| e.to_string())
    }

    #[test]
    fn reads_columns_in_any_order_with_comments() {
        let v =
            parse("# traps\nweight, z_um, y_um, x_um, phase_rad\n2, 5, -3, 10, 0.5\n\n1,0,0,0,0\n")
                .unwrap();
        assert_eq!(v.len(), 2);
        assert_eq!(
            v[0],
            Spot {
                x: 10e-6,
                y: -3e-6,
                z: 5e-6,
                weight: 2.0,
                phase: Some(0.5)
            }
        );
        let v = parse("x_um,y_um,z_um,weight\r\n1,2,3,4\r\n").unwrap();
        assert_eq!(v[0].phase, None);
        let v = parse("x_um,y_um,z_um,weight,phase_rad\n1,2,3,4,\n1,2,3,4,1.5\n").unwrap();
        assert_eq!((v[0].phase, v[1].phase), (None, Some(1.5)));
    }

    #[test]
    fn bad_lists_are_refused_naming_the_line() {
        for (text, want) in [
            ("x_um,y_um,weight\n1,2,3\n", "lacks column z_um"),
            ("x_um,y_um,z_um,weight,size\n", "unknown column 'size'"),
            ("x_um,y_um,z_um,weight\n1,2,3\n", "line 2: 3 values"),
            ("x_um,y_um,z_um,weight\n1,2,nan,1\n", "line 2: z_um"),
            ("x_um,y_um,z_um,weight\n1,2,3,0\n", "weight = 0 must be > 0"),
            ("x_um,y_um,z_um,weight\n", "lists no spots"),
            ("", "no header"),
        ] {
            let e = parse(text).unwrap_err();
            assert!(e.contains(want) && e.contains("t.csv"), "{text:?}: {e}");
        }
    }
}
