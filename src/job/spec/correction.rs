//! `[correction]`: Zernike terms over a pupil and a measured phase map, added to every pattern of
//! an iterative (modulator) job.

use std::path::{Path, PathBuf};

use super::{Method, RawCorrection};
use crate::error::{Error, Result};
use crate::optics::zernike::ZernikeTerm;
use crate::optics::Plate;

/// The validated `[correction]` table.
#[derive(Clone, Debug, PartialEq)]
pub struct CorrectionSpec {
    /// Zernike terms (Noll normalisation: a coefficient is the term's rms in waves).
    pub terms: Vec<ZernikeTerm>,
    /// Pupil radius, metres.
    pub pupil_radius: f64,
    /// Pupil centre, metres [x, y] on the panel.
    pub pupil_centre: [f64; 2],
    /// The measured phase map, if any.
    pub map: Option<PathBuf>,
    /// The map's grey value standing for 2 pi (None: 2^bits of the map).
    pub map_two_pi_grey: Option<f64>,
}

/// Validates `[correction]`.
pub(super) fn parse_correction(
    raw: Option<&RawCorrection>,
    method: &Method,
    plate: &Plate,
    dir: &Path,
    bad: &dyn Fn(String) -> Error,
) -> Result<Option<CorrectionSpec>> {
    let Some(c) = raw else {
        return Ok(None);
    };
    if !matches!(method, Method::Iterative(_)) {
        return Err(bad(
            "[correction] applies to method = \"iterative\" (modulator patterns)".into(),
        ));
    }
    let mut terms = Vec::new();
    for (i, t) in c.zernike.iter().flatten().enumerate() {
        let what = format!("[correction] zernike term #{}", i + 1);
        if t[0].fract() != 0.0 || t[1].fract() != 0.0 || t[0] < 0.0 || t[1].abs() > 1e3 {
            return Err(bad(format!(
                "{what}: n = {} and m = {} must be whole numbers, n >= 0",
                t[0], t[1]
            )));
        }
        terms.push(ZernikeTerm::new(t[0] as u32, t[1] as i32, t[2], &what).map_err(bad)?);
    }
    let half =
        (plate.width as f64 * plate.pitch[0]).min(plate.height as f64 * plate.pitch[1]) / 2.0;
    let pupil_radius = match c.pupil_radius_mm {
        None => half,
        Some(r) if r.is_finite() && r > 0.0 => r * 1e-3,
        Some(r) => {
            return Err(bad(format!(
                "[correction] pupil_radius_mm = {r} must be > 0"
            )))
        }
    };
    let centre = c.pupil_centre_mm.unwrap_or([0.0, 0.0]);
    if centre.iter().any(|v| !v.is_finite()) {
        return Err(bad(format!(
            "[correction] pupil_centre_mm = {centre:?} must be finite"
        )));
    }
    let map_two_pi_grey = match c.map_two_pi_grey {
        None => None,
        Some(g) if (1.0..=65536.0).contains(&g) => Some(g),
        Some(g) => {
            return Err(bad(format!(
                "[correction] map_two_pi_grey = {g} is outside 1 ..= 65536"
            )))
        }
    };
    if c.map_two_pi_grey.is_some() && c.correction_map.is_none() {
        return Err(bad(
            "[correction] map_two_pi_grey applies to a correction_map".into(),
        ));
    }
    if terms.is_empty() && c.correction_map.is_none() {
        return Err(bad(
            "[correction] has neither zernike terms nor a correction_map".into(),
        ));
    }
    Ok(Some(CorrectionSpec {
        terms,
        pupil_radius,
        pupil_centre: [centre[0] * 1e-3, centre[1] * 1e-3],
        map: c.correction_map.as_ref().map(|m| dir.join(m)),
        map_two_pi_grey,
    }))
}
