//! `[encoding]`: the kind, its levels or bits, and a modulator's calibration.

use std::path::Path;

use super::{finite, EncodingRequest, RawEncoding};
use crate::encoding::Encoding;
use crate::error::{Error, Result};
use crate::optics::Plate;

/// Validates `[encoding]`; `job` is the job file (named in errors of keys without a file).
pub(super) fn parse_encoding(
    e: &RawEncoding,
    dir: &Path,
    job: &Path,
    plate: &Plate,
    bad: &dyn Fn(String) -> Error,
) -> Result<EncodingRequest> {
    let finite = |name: &str, v: f64| finite(bad, name, v);
    let only = |key: &str, present: bool, kinds: &str| -> Result<()> {
        if present {
            Err(bad(format!(
                "[encoding] {key} does not apply to kind = \"{}\" (only {kinds})",
                e.kind
            )))
        } else {
            Ok(())
        }
    };
    Ok(match e.kind.as_str() {
        "phase" => {
            only("bits", e.bits.is_some(), "\"amplitude\"")?;
            only("bipolar_scale", e.bipolar_scale.is_some(), "\"amplitude\"")?;
            let levels = e.levels.unwrap_or(256);
            if !(2..=65536).contains(&levels) {
                return Err(bad(format!("[encoding] levels = {levels} is outside 2..=65536")));
            }
            let levels = levels as u32;
            let justify = e.justify.as_deref().unwrap_or("left");
            if !matches!(justify, "left" | "right") {
                return Err(bad(format!("[encoding] justify = \"{justify}\" is not one of \"left\", \"right\"")));
            }
            if e.calibration.is_some() as u8 + e.two_pi_grey.is_some() as u8 + (justify == "right") as u8 > 1 {
                return Err(bad("[encoding] calibration, two_pi_grey and justify = \"right\" each set the grey of every level: give one of them".into()));
            }
            if e.calibration_nm.is_some() && e.calibration.is_none() && e.two_pi_grey.is_none() {
                return Err(bad("[encoding] calibration_nm needs a calibration table or two_pi_grey (the wavelength they were measured at)".into()));
            }
            let calibrated = |c: std::result::Result<crate::encoding::Calibration, String>, at: &Path| -> Result<EncodingRequest> {
                let cal = c.map_err(|m| Error::input(at, m))?;
                Ok(EncodingRequest::Fixed(Encoding::CalibratedPhase { levels, calibration: std::sync::Arc::new(cal) }))
            };
            if let Some(c) = &e.calibration {
                let path = dir.join(c);
                let mut table = read_calibration(&path)?;
                let mut source = format!("table {}", path.file_name().map(|f| f.to_string_lossy().into_owned()).unwrap_or_default());
                if let Some(nm) = e.calibration_nm {
                    if !(finite("[encoding] calibration_nm", nm)? > 0.0) {
                        return Err(bad(format!("[encoding] calibration_nm = {nm} must be > 0")));
                    }
                    // A liquid-crystal retardance 2 pi dn d / lambda: phase scales as 1 / lambda
                    // when the dispersion of dn is neglected (common practice for a first
                    // correction; a table measured at the working wavelength is better).
                    let scale = nm * 1e-9 / plate.wavelength;
                    for r in &mut table {
                        r.1 *= scale;
                    }
                    source += &format!(", measured at {nm} nm, phases scaled by {scale:.6}");
                }
                calibrated(crate::encoding::Calibration::new(table, levels, source), &path)?
            } else if let Some(g) = e.two_pi_grey {
                if !(2..=65535).contains(&g) {
                    return Err(bad(format!("[encoding] two_pi_grey = {g} is outside 2..=65535")));
                }
                match e.calibration_nm {
                    None => calibrated(crate::encoding::Calibration::linear(g as u16, levels, format!("linear, 2 pi at grey {g}")), job)?,
                    Some(nm) => {
                        if !(finite("[encoding] calibration_nm", nm)? > 0.0) {
                            return Err(bad(format!("[encoding] calibration_nm = {nm} must be > 0")));
                        }
                        // 2 pi at grey g when measured at nm: the retardance 2 pi dn d / lambda
                        // scales as 1 / lambda (dispersion of dn neglected, common practice), so
                        // at the design wavelength grey s gives 2 pi (s / g) (nm / lambda). The
                        // linear response runs to the panel's top grey (255, or 65535 when g
                        // needs 16 bits).
                        let top: u16 = if g <= 255 { 255 } else { 65535 };
                        let scale = nm * 1e-9 / plate.wavelength;
                        let table = vec![(0, 0.0), (top, std::f64::consts::TAU * scale * f64::from(top) / g as f64)];
                        calibrated(
                            crate::encoding::Calibration::new(table, levels, format!("linear, 2 pi at grey {g} at {nm} nm; at {:.1} nm 2 pi at grey {:.2}", plate.wavelength * 1e9, g as f64 / scale)),
                            job,
                        )?
                    }
                }
            } else if justify == "right" && levels < 65536 {
                calibrated(crate::encoding::Calibration::linear(levels as u16, levels, "right-justified: s = g"), job)?
            } else {
                EncodingRequest::Fixed(Encoding::Phase { levels })
            }
        }
        "binary-phase" | "binary-amplitude" => {
            only("calibration", e.calibration.is_some(), "\"phase\"")?;
            only("calibration_nm", e.calibration_nm.is_some(), "\"phase\"")?;
            only("two_pi_grey", e.two_pi_grey.is_some(), "\"phase\"")?;
            only("justify", e.justify.is_some(), "\"phase\"")?;
            only("levels", e.levels.is_some(), "\"phase\"")?;
            only("bits", e.bits.is_some(), "\"amplitude\"")?;
            only("bipolar_scale", e.bipolar_scale.is_some(), "\"amplitude\"")?;
            EncodingRequest::Fixed(if e.kind == "binary-phase" { Encoding::BinaryPhase } else { Encoding::BinaryAmplitude })
        }
        "amplitude" => {
            only("calibration", e.calibration.is_some(), "\"phase\"")?;
            only("calibration_nm", e.calibration_nm.is_some(), "\"phase\"")?;
            only("two_pi_grey", e.two_pi_grey.is_some(), "\"phase\"")?;
            only("justify", e.justify.is_some(), "\"phase\"")?;
            only("levels", e.levels.is_some(), "\"phase\"")?;
            let bits = match e.bits.unwrap_or(8) {
                8 => 8u8,
                16 => 16u8,
                b => return Err(bad(format!("[encoding] bits = {b} must be 8 or 16"))),
            };
            match e.bipolar_scale {
                None => EncodingRequest::AmplitudeAuto { bits },
                Some(b0) => {
                    if !(finite("[encoding] bipolar_scale", b0)? > 0.0) {
                        return Err(bad(format!("[encoding] bipolar_scale = {b0} must be > 0")));
                    }
                    EncodingRequest::Fixed(Encoding::Amplitude { bits, scale: b0 })
                }
            }
        }
        other => return Err(bad(format!("[encoding] kind = \"{other}\" is not one of \"phase\", \"binary-phase\", \"binary-amplitude\", \"amplitude\""))),
    })
}

/// Reads a calibration table: a header line, then `grey,phase_rad` rows (`#` comments allowed).
pub fn read_calibration(path: &Path) -> Result<Vec<(u16, f64)>> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
    let mut rows = Vec::new();
    let mut header = true;
    for (i, line) in text.lines().enumerate() {
        let l = line.trim();
        if l.is_empty() || l.starts_with('#') {
            continue;
        }
        if header {
            header = false;
            if l.replace(' ', "") != "grey,phase_rad" {
                return Err(Error::input(
                    path,
                    format!("line {}: expected the header 'grey,phase_rad'", i + 1),
                ));
            }
            continue;
        }
        let mut it = l.split(',').map(str::trim);
        let (Some(g), Some(p), None) = (it.next(), it.next(), it.next()) else {
            return Err(Error::input(
                path,
                format!("line {}: expected two fields, grey,phase_rad", i + 1),
            ));
        };
        let g: u16 = g.parse().map_err(|_| {
            Error::input(
                path,
                format!("line {}: grey '{g}' is not a whole number 0..=65535", i + 1),
            )
        })?;
        let p: f64 = p
            .parse()
            .ok()
            .filter(|v: &f64| v.is_finite())
            .ok_or_else(|| {
                Error::input(
                    path,
                    format!("line {}: phase '{p}' is not a finite number", i + 1),
                )
            })?;
        rows.push((g, p));
    }
    if rows.is_empty() {
        return Err(Error::input(path, "no calibration rows"));
    }
    Ok(rows)
}
