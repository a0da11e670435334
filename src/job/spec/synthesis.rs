//! `[synthesis]`: the method, the point sum's options and path, the iterative keys.

use super::{
    AlgorithmChoice, Geometry, IterativeSpec, Method, ObjectSource, ObjectSpec, RawSynthesis,
    SumPath,
};
use crate::error::{Error, Result};
use crate::optics::Plate;
use crate::synthesis::{Approximation, PointSumOptions, Precision};

/// Which method computes the plate.
pub(super) fn parse_method(
    s: &RawSynthesis,
    objects: &[ObjectSpec],
    plate: &Plate,
    bad: &dyn Fn(String) -> Error,
) -> Result<Method> {
    let iter_keys = [
        ("geometry", s.geometry.is_some()),
        ("focal_mm", s.focal_mm.is_some()),
        ("iterations", s.iterations.is_some()),
        ("seed", s.seed.is_some()),
        ("algorithm", s.algorithm.is_some()),
        ("mix", s.mix.is_some()),
        ("quantize_last", s.quantize_last.is_some()),
        ("stall_tolerance", s.stall_tolerance.is_some()),
        ("min_iterations", s.min_iterations.is_some()),
        ("cell_px", s.cell_px.is_some()),
        ("carrier_deg", s.carrier_deg.is_some()),
        ("lens_mm", s.lens_mm.is_some()),
        ("zero_order_guard_um", s.zero_order_guard_um.is_some()),
    ];
    let images = objects
        .iter()
        .filter(|o| matches!(o.source, ObjectSource::Image { .. } | ObjectSource::Spots))
        .count();
    Ok(match s.method.as_deref().unwrap_or("point-sum") {
        "point-sum" => {
            if let Some((k, _)) = iter_keys.iter().find(|k| k.1) {
                return Err(bad(format!(
                    "[synthesis] {k} applies to method = \"iterative\""
                )));
            }
            if images > 0 {
                return Err(bad(
                    "image and spot objects need [synthesis] method = \"iterative\"".into(),
                ));
            }
            Method::PointSum
        }
        "iterative" => {
            if images != objects.len() {
                return Err(bad(
                    "method = \"iterative\" takes spot lists or image objects only (no points or meshes)"
                        .into(),
                ));
            }
            Method::Iterative(iterative_spec(s, objects, plate, bad)?)
        }
        other => {
            return Err(bad(format!(
                "[synthesis] method = \"{other}\" is not one of \"point-sum\", \"iterative\""
            )))
        }
    })
}

/// The point sum's keys of `[synthesis]`, validated.
pub(super) struct PointSumKeys {
    pub options: PointSumOptions,
    pub path: SumPath,
    pub plane_gap: Option<f64>,
    pub layer_slabs: Option<usize>,
    pub band_rows: Option<usize>,
}

/// Validates the point sum's keys (they also set the precision of the iterative loop's replay).
pub(super) fn parse_point_sum(
    s: &RawSynthesis,
    bad: &dyn Fn(String) -> Error,
) -> Result<PointSumKeys> {
    let approximation = match s.approximation.as_deref().unwrap_or("exact") {
        "exact" => Approximation::Exact,
        "fresnel" => Approximation::Fresnel,
        other => {
            return Err(bad(format!(
                "[synthesis] approximation = \"{other}\" is not one of \"exact\", \"fresnel\""
            )))
        }
    };
    let precision = match s.precision.as_deref().unwrap_or("f32") {
        "f64" => Precision::F64,
        "f32" => Precision::F32,
        other => {
            return Err(bad(format!(
                "[synthesis] precision = \"{other}\" is not one of \"f64\", \"f32\""
            )))
        }
    };
    let sum_path = match s.path.as_deref().unwrap_or("direct") {
        "direct" => SumPath::Direct,
        "recording-plane" => SumPath::RecordingPlane,
        "auto" => SumPath::Auto,
        "layers" => SumPath::Layers,
        other => {
            return Err(bad(format!(
                "[synthesis] path = \"{other}\" is not one of \"direct\", \"recording-plane\", \"layers\", \"auto\""
            )))
        }
    };
    let layer_slabs = match s.layers {
        None => None,
        Some(_) if !matches!(sum_path, SumPath::Layers | SumPath::Auto) => return Err(bad(
            "[synthesis] layers applies to path = \"layers\" (or \"auto\", when it takes layers)"
                .into(),
        )),
        Some(n) if (1..=100_000).contains(&n) => Some(n as usize),
        Some(n) => {
            return Err(bad(format!(
                "[synthesis] layers = {n} is outside 1..=100000"
            )))
        }
    };
    let recording_plane_gap = match s.recording_plane_gap_mm {
        None => None,
        Some(g) if g.is_finite() && g > 0.0 => Some(g * 1e-3),
        Some(g) => {
            return Err(bad(format!(
                "[synthesis] recording_plane_gap_mm = {g} must be a positive number"
            )))
        }
    };
    let band_rows = match s.band_rows {
        None => None,
        Some(b) if (1..=65536).contains(&b) => Some(b as usize),
        Some(b) => {
            return Err(bad(format!(
                "[synthesis] band_rows = {b} is outside 1..=65536"
            )))
        }
    };

    Ok(PointSumKeys {
        options: PointSumOptions {
            approximation,
            obliquity: s.obliquity.unwrap_or(false),
            anti_alias: true,
            precision,
        },
        path: sum_path,
        plane_gap: recording_plane_gap,
        layer_slabs,
        band_rows,
    })
}

/// Validates the iterative keys of `[synthesis]`.
fn iterative_spec(
    s: &RawSynthesis,
    objects: &[ObjectSpec],
    plate: &Plate,
    bad: &dyn Fn(String) -> Error,
) -> Result<IterativeSpec> {
    let geometry = match s.geometry.as_deref() {
        Some("fourier") => {
            let f = s
                .focal_mm
                .ok_or_else(|| bad("[synthesis] geometry = \"fourier\" needs focal_mm".into()))?;
            if !(f.is_finite() && f > 0.0) {
                return Err(bad(format!("[synthesis] focal_mm = {f} must be > 0")));
            }
            if objects.iter().any(|o| {
                matches!(
                    o.source,
                    ObjectSource::Image {
                        distance: Some(_),
                        ..
                    }
                )
            }) {
                return Err(bad("distance_mm does not apply in fourier geometry (the image plane is the lens's focal plane)".into()));
            }
            if objects.len() > 1 {
                return Err(bad(
                    "fourier geometry has one image plane: give one image object".into(),
                ));
            }
            Geometry::Fourier(f * 1e-3)
        }
        Some("fresnel") => {
            if s.focal_mm.is_some() {
                return Err(bad(
                    "[synthesis] focal_mm applies to geometry = \"fourier\"".into(),
                ));
            }
            if let Some(i) = objects
                .iter()
                .position(|o| matches!(o.source, ObjectSource::Image { distance: None, .. }))
            {
                return Err(bad(format!(
                    "[[object]] #{} needs distance_mm in fresnel geometry",
                    i + 1
                )));
            }
            Geometry::Fresnel
        }
        Some(other) => {
            return Err(bad(format!(
                "[synthesis] geometry = \"{other}\" is not one of \"fourier\", \"fresnel\""
            )))
        }
        None => {
            return Err(bad(
                "[synthesis] method = \"iterative\" needs geometry = \"fourier\" or \"fresnel\""
                    .into(),
            ))
        }
    };
    let iterations = match s.iterations.unwrap_or(50) {
        i if (1..=100_000).contains(&i) => i as usize,
        i => {
            return Err(bad(format!(
                "[synthesis] iterations = {i} is outside 1..=100000"
            )))
        }
    };
    let spots = objects
        .iter()
        .any(|o| matches!(o.source, ObjectSource::Spots));
    if spots {
        if !matches!(geometry, Geometry::Fourier(_)) {
            return Err(bad(
                "spot lists need geometry = \"fourier\" (positions are in the lens's focal plane)"
                    .into(),
            ));
        }
        if s.cell_px.is_some() {
            return Err(bad("[synthesis] cell_px does not apply to spot lists (the gratings and lenses of the spots span the whole panel)".into()));
        }
        for k in ["quantize_last", "mix", "stall_tolerance"] {
            let set = match k {
                "quantize_last" => s.quantize_last.is_some(),
                "mix" => s.mix.is_some(),
                _ => s.stall_tolerance.is_some(),
            };
            if set {
                return Err(bad(format!("[synthesis] {k} does not apply to spot lists")));
            }
        }
    }
    let default_algorithm = if spots { "weighted-gs" } else { "gs" };
    let algorithm = match s.algorithm.as_deref().unwrap_or(default_algorithm) {
        "superposition" if spots => AlgorithmChoice::Superposition,
        "superposition" => return Err(bad("[synthesis] algorithm = \"superposition\" applies to spot lists".into())),
        "mixed-region" if spots => return Err(bad("[synthesis] algorithm = \"mixed-region\" applies to images, not to spot lists (use \"weighted-gs\")".into())),
        "gs" => AlgorithmChoice::Gs,
        "weighted-gs" => AlgorithmChoice::WeightedGs,
        "mixed-region" => {
            let m = s.mix.unwrap_or(0.6);
            if !(m > 0.0 && m <= 1.0) {
                return Err(bad(format!("[synthesis] mix = {m} must be within (0, 1]")));
            }
            AlgorithmChoice::MixedRegion(m)
        }
        other => return Err(bad(format!("[synthesis] algorithm = \"{other}\" is not one of \"gs\", \"weighted-gs\", \"mixed-region\", \"superposition\" (spot lists)"))),
    };
    if s.mix.is_some() && !matches!(algorithm, AlgorithmChoice::MixedRegion(_)) {
        return Err(bad(
            "[synthesis] mix applies to algorithm = \"mixed-region\"".into(),
        ));
    }
    let quantize_last =
        match s
            .quantize_last
            .unwrap_or(if spots { 0 } else { 5.min(iterations as i64) })
        {
            q if q >= 0 && q as usize <= iterations => q as usize,
            q => {
                return Err(bad(format!(
                    "[synthesis] quantize_last = {q} must be within 0..=iterations"
                )))
            }
        };
    let stall_tolerance = s.stall_tolerance.unwrap_or(1e-3);
    let min_iterations = match s.min_iterations.unwrap_or(30) {
        m if m >= 0 => m as usize,
        m => {
            return Err(bad(format!(
                "[synthesis] min_iterations = {m} must be >= 0"
            )))
        }
    };
    if !(stall_tolerance.is_finite() && stall_tolerance >= 0.0) {
        return Err(bad(format!(
            "[synthesis] stall_tolerance = {stall_tolerance} must be >= 0"
        )));
    }
    let cell_px = match s.cell_px {
        None => None,
        Some(c) if c[0] > plate.width as i64 || c[1] > plate.height as i64 => {
            return Err(bad(format!(
                "[synthesis] cell_px = [{}, {}] is larger than the {} x {} plate: the cell repeats over the plate, so it must fit in it",
                c[0], c[1], plate.width, plate.height
            )))
        }
        Some(c) if c.iter().all(|&v| (1..=8192).contains(&v)) => Some([c[0] as u32, c[1] as u32]),
        Some(c) => {
            return Err(bad(format!(
                "[synthesis] cell_px = {c:?}: each side must be within 1..=8192"
            )))
        }
    };
    let asked = s.carrier_deg.unwrap_or([0.0, 0.0]);
    if asked.iter().any(|t| !(t.is_finite() && t.abs() < 90.0)) {
        return Err(bad(format!(
            "[synthesis] carrier_deg = {asked:?} must be between -90 and 90"
        )));
    }
    // Snap the carrier to a whole number of replay samples of the plate's FFT lattice:
    // sin t = m lambda / (N p) moves the replay by exactly m samples.
    let n = [plate.width as f64, plate.height as f64];
    let mut carrier_samples = [0i64; 2];
    let mut carrier = [0.0f64; 2];
    for a in 0..2 {
        let step = plate.wavelength / (n[a] * plate.pitch[a]);
        let m = (asked[a].to_radians().sin() / step).round();
        let sin = m * step;
        if sin.abs() > plate.wavelength / (2.0 * plate.pitch[a]) {
            return Err(bad(format!(
                "[synthesis] carrier_deg = {} in {} is beyond the {:.3} deg half-angle the pitch holds: the carrier would alias",
                asked[a],
                ["x", "y"][a],
                (plate.wavelength / (2.0 * plate.pitch[a])).asin().to_degrees()
            )));
        }
        carrier_samples[a] = m as i64;
        carrier[a] = sin.asin().to_degrees();
    }
    let carrier_asked = asked;
    let lens = match s.lens_mm {
        None => None,
        Some(f) if f.is_finite() && f != 0.0 => Some(f * 1e-3),
        Some(f) => {
            return Err(bad(format!(
                "[synthesis] lens_mm = {f} must be finite and non-zero"
            )))
        }
    };
    let zero_order_guard = match s.zero_order_guard_um {
        None => None,
        Some(_) if !matches!(geometry, Geometry::Fourier(_)) => {
            return Err(bad(
                "[synthesis] zero_order_guard_um applies to geometry = \"fourier\"".into(),
            ))
        }
        Some(g) if g.is_finite() && g >= 0.0 => Some(g * 1e-6),
        Some(g) => {
            return Err(bad(format!(
                "[synthesis] zero_order_guard_um = {g} must be >= 0"
            )))
        }
    };
    Ok(IterativeSpec {
        zero_order_guard,
        geometry,
        iterations,
        seed: s.seed.unwrap_or(1),
        algorithm,
        quantize_last,
        stall_tolerance,
        min_iterations,
        cell_px,
        carrier: [carrier[0].to_radians(), carrier[1].to_radians()],
        carrier_asked_deg: carrier_asked,
        carrier_samples,
        lens,
    })
}
