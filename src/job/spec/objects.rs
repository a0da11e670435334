//! `[[object]]` tables and `[reference]`: sources, placement and mesh keys.

use std::path::Path;

use super::{finite, MeshObject, ObjectSource, ObjectSpec, Occlusion, RawObject, RawReference};
use crate::error::{Error, Result};
use crate::optics::Reference;

/// Validates the `[[object]]` tables.
pub(super) fn parse_objects(
    raw: &[RawObject],
    dir: &Path,
    bad: &dyn Fn(String) -> Error,
) -> Result<Vec<ObjectSpec>> {
    let finite = |name: &str, v: f64| finite(bad, name, v);
    if raw.is_empty() {
        return Err(bad("no [[object]] table: nothing to record".into()));
    }
    let mut objects = Vec::new();
    for (i, o) in raw.iter().enumerate() {
        let n = i + 1;
        let mesh_keys = [
            ("rotation_deg", o.rotation_deg.is_some()),
            ("fit_mm", o.fit_mm.is_some()),
            ("units", o.units.is_some()),
            ("front", o.front.is_some()),
            ("emitters", o.emitters.is_some()),
            ("spacing_um", o.spacing_um.is_some()),
            ("pattern", o.pattern.is_some()),
            ("seed", o.seed.is_some()),
            ("light_dir", o.light_dir.is_some()),
            ("ambient", o.ambient.is_some()),
            ("normals", o.normals.is_some()),
            ("phase", o.phase.is_some()),
            ("occlusion", o.occlusion.is_some()),
        ];
        let img_keys = [
            ("distance_mm", o.distance_mm.is_some()),
            ("shift_px", o.shift_px.is_some()),
        ];
        if o.image.is_none() {
            if let Some((k, _)) = img_keys.iter().find(|k| k.1) {
                return Err(bad(format!(
                    "[[object]] #{n}: {k} applies to image objects"
                )));
            }
        }
        if let Some(sp) = &o.spots {
            if o.points.is_some() || o.mesh.is_some() || o.image.is_some() {
                return Err(bad(format!(
                    "[[object]] #{n}: one source per object (spots, image, points or mesh)"
                )));
            }
            if let Some((k, _)) = mesh_keys.iter().chain(&img_keys).find(|k| k.1) {
                return Err(bad(format!(
                    "[[object]] #{n}: {k} does not apply to spot lists"
                )));
            }
            if o.offset_mm.is_some()
                || o.scale.is_some()
                || o.gain.is_some()
                || o.reference.is_some()
            {
                return Err(bad(format!("[[object]] #{n}: a spot list takes no offset_mm, scale, gain or reference (positions are in the file, in the focal plane)")));
            }
            objects.push(ObjectSpec {
                points: dir.join(sp),
                source: ObjectSource::Spots,
                offset: [0.0; 3],
                scale: 1.0,
                gain: 1.0,
                reference: None,
            });
            continue;
        }
        let (points, source) = match (&o.points, &o.mesh) {
            (None, None) if o.image.is_some() => {
                if let Some((k, _)) = mesh_keys.iter().find(|k| k.1) {
                    return Err(bad(format!("[[object]] #{n}: {k} applies to mesh objects, not to images")));
                }
                let distance = match o.distance_mm {
                    None => None,
                    Some(d) if d.is_finite() && d > 0.0 => Some(d * 1e-3),
                    Some(d) => return Err(bad(format!("[[object]] #{n} distance_mm = {d} must be > 0"))),
                };
                (o.image.as_ref().expect("checked"), ObjectSource::Image { distance, shift_px: o.shift_px.unwrap_or([0, 0]) })
            }
            (_, _) if o.image.is_some() => return Err(bad(format!("[[object]] #{n}: one source per object (image, points or mesh)"))),
            (Some(p), None) => {
                if let Some((k, _)) = mesh_keys.iter().find(|k| k.1) {
                    return Err(bad(format!("[[object]] #{n}: {k} applies to mesh objects, not to points")));
                }
                (p, ObjectSource::Points)
            }
            (None, Some(m)) => (m, ObjectSource::Mesh(mesh_object(o, n, &bad)?)),
            (Some(_), Some(_)) => return Err(bad(format!("[[object]] #{n} has both points and mesh: one object, one source"))),
            (None, None) => return Err(bad(format!("[[object]] #{n} needs points = \"file.ply\" or \"file.csv\", or mesh = \"file.glb\""))),
        };
        let own_reference = match &o.reference {
            Some(r) => Some(parse_reference(
                r,
                &format!("[[object]] #{n} reference"),
                &bad,
            )?),
            None => None,
        };
        let off = o.offset_mm.unwrap_or([0.0; 3]);
        for v in off {
            finite(&format!("[[object]] #{n} offset_mm"), v)?;
        }
        let scale = finite(&format!("[[object]] #{n} scale"), o.scale.unwrap_or(1.0))?;
        if scale <= 0.0 {
            return Err(bad(format!("[[object]] #{n} scale = {scale} must be > 0")));
        }
        let gain = finite(&format!("[[object]] #{n} gain"), o.gain.unwrap_or(1.0))?;
        if gain < 0.0 {
            return Err(bad(format!("[[object]] #{n} gain = {gain} must be >= 0")));
        }
        if o.fit_mm.is_some() && o.scale.is_some() {
            return Err(bad(format!(
                "[[object]] #{n}: give scale or fit_mm, not both"
            )));
        }
        objects.push(ObjectSpec {
            points: dir.join(points),
            source,
            offset: [off[0] * 1e-3, off[1] * 1e-3, off[2] * 1e-3],
            scale,
            gain,
            reference: own_reference,
        });
    }

    Ok(objects)
}

/// Validates a reference table (`what` names it in messages).
pub(super) fn parse_reference(
    r: &RawReference,
    what: &str,
    bad: &dyn Fn(String) -> Error,
) -> Result<Reference> {
    let finite = |name: &str, v: f64| -> Result<f64> {
        if v.is_finite() {
            Ok(v)
        } else {
            Err(bad(format!("{what} {name} = {v} is not a finite number")))
        }
    };
    match r.kind.as_str() {
        "plane" => {
            if r.position_mm.is_some() {
                return Err(bad(format!(
                    "{what} position_mm belongs to kind = \"spherical\", not \"plane\""
                )));
            }
            let t = r.tilt_deg.unwrap_or([0.0, 0.0]);
            for v in t {
                if !(finite("tilt_deg", v)?.abs() < 90.0) {
                    return Err(bad(format!(
                        "{what} tilt_deg = {v} must be between -90 and 90"
                    )));
                }
            }
            Ok(Reference::Plane {
                tilt: [t[0].to_radians(), t[1].to_radians()],
            })
        }
        "spherical" => {
            if r.tilt_deg.is_some() {
                return Err(bad(format!(
                    "{what} tilt_deg belongs to kind = \"plane\", not \"spherical\""
                )));
            }
            let p = r.position_mm.ok_or_else(|| {
                bad(format!(
                    "{what} kind = \"spherical\" needs position_mm = [x, y, z]"
                ))
            })?;
            for v in p {
                finite("position_mm", v)?;
            }
            if p[2] == 0.0 {
                return Err(bad(format!(
                    "{what} position_mm: z must not be 0 (the source cannot sit on the plate)"
                )));
            }
            Ok(Reference::Spherical {
                position: [p[0] * 1e-3, p[1] * 1e-3, p[2] * 1e-3],
            })
        }
        other => Err(bad(format!(
            "{what} kind = \"{other}\" is not one of \"plane\", \"spherical\""
        ))),
    }
}

/// Validates the mesh keys of an object.
fn mesh_object(o: &RawObject, n: usize, bad: &dyn Fn(String) -> Error) -> Result<MeshObject> {
    use crate::scene::mesh::{Placement, PlacementSize};
    use crate::scene::sampling::{Density, Pattern, PhaseMode, Shading};
    let size = match (o.scale, o.fit_mm) {
        (_, Some(f)) if !(f.is_finite() && f > 0.0) => {
            return Err(bad(format!("[[object]] #{n} fit_mm = {f} must be > 0")))
        }
        (_, Some(f)) => PlacementSize::FitMm(f),
        (s, None) => PlacementSize::Scale(s.unwrap_or(1.0)),
    };
    use crate::scene::mesh::{Front, MeshFormat};
    let unit_mm = match &o.units {
        Some(u) => crate::scene::mesh::unit_mm(u).ok_or_else(|| {
            bad(format!(
                "[[object]] #{n} units = {u:?}: expected \"m\", \"mm\", \"um\" or \"in\""
            ))
        })?,
        // The format's own unit; an unknown extension is refused when the mesh is read.
        None => o
            .mesh
            .as_deref()
            .and_then(|m| std::path::Path::new(m).extension())
            .and_then(|e| MeshFormat::from_extension(&e.to_string_lossy()))
            .map_or(1.0, MeshFormat::default_unit_mm),
    };
    let front = match &o.front {
        Some(f) => Front::parse(f).ok_or_else(|| {
            bad(format!(
                "[[object]] #{n} front = {f:?}: expected \"+z\", \"-z\", \"+x\", \"-x\", \"+y\" or \"-y\""
            ))
        })?,
        None => Front::PlusZ,
    };
    let placement = Placement {
        offset_mm: o.offset_mm.unwrap_or([0.0; 3]),
        unit_mm,
        orientation: front.matrix(),
        rotation_deg: o.rotation_deg.unwrap_or([0.0; 3]),
        size,
    };
    placement
        .validate()
        .map_err(|m| bad(format!("[[object]] #{n}: {m}")))?;
    let density = match (o.emitters, o.spacing_um) {
        (Some(_), Some(_)) => {
            return Err(bad(format!(
                "[[object]] #{n}: give emitters or spacing_um, not both"
            )))
        }
        (Some(c), None) if c >= 1 => Some(Density::Count(c as usize)),
        (Some(c), None) => {
            return Err(bad(format!(
                "[[object]] #{n} emitters = {c} must be at least 1"
            )))
        }
        (None, Some(sp)) if sp.is_finite() && sp > 0.0 => Some(Density::SpacingM(sp * 1e-6)),
        (None, Some(sp)) => {
            return Err(bad(format!(
                "[[object]] #{n} spacing_um = {sp} must be > 0"
            )))
        }
        (None, None) => None,
    };
    let pattern = match o.pattern.as_deref().unwrap_or("stratified") {
        "stratified" => Pattern::Stratified,
        "random" => Pattern::Random,
        other => {
            return Err(bad(format!(
                "[[object]] #{n} pattern = \"{other}\" is not one of \"stratified\", \"random\""
            )))
        }
    };
    let mut shading = Shading::default();
    if let Some(l) = o.light_dir {
        if l.iter().any(|v| !v.is_finite()) || l.iter().all(|&v| v == 0.0) {
            return Err(bad(format!(
                "[[object]] #{n} light_dir = {l:?} must be a finite, non-zero direction"
            )));
        }
        shading.light_dir = l;
    }
    if let Some(a) = o.ambient {
        if !(0.0..=1.0).contains(&a) {
            return Err(bad(format!(
                "[[object]] #{n} ambient = {a} must be within 0..=1"
            )));
        }
        shading.ambient = a;
    }
    shading.smooth_normals = match o.normals.as_deref().unwrap_or("smooth") {
        "smooth" => true,
        "flat" => false,
        other => {
            return Err(bad(format!(
                "[[object]] #{n} normals = \"{other}\" is not one of \"smooth\", \"flat\""
            )))
        }
    };
    let phase = match o.phase.as_deref().unwrap_or("random") {
        "random" => PhaseMode::Random,
        "constant" => PhaseMode::Constant(0.0),
        other => {
            return Err(bad(format!(
                "[[object]] #{n} phase = \"{other}\" is not one of \"random\", \"constant\""
            )))
        }
    };
    let occlusion = match o.occlusion.as_deref().unwrap_or("tiles") {
        "tiles" => Occlusion::Tiles,
        "centre" | "center" => Occlusion::Centre,
        "none" => Occlusion::None,
        other => {
            return Err(bad(format!(
            "[[object]] #{n} occlusion = \"{other}\" is not one of \"tiles\", \"centre\", \"none\""
        )))
        }
    };
    Ok(MeshObject {
        front,
        placement,
        density,
        pattern,
        seed: o.seed.unwrap_or(1),
        shading,
        phase,
        occlusion,
    })
}
