//! From a job's objects to the emitters the point sum adds: point clouds placed, meshes placed,
//! sampled and shaded, occlusion prepared, and objects grouped into channels by reference.
//!
//! Channel 0 holds every object that uses the job's `[reference]`, in object order; each object with
//! its own `reference` forms a further channel, in object order. That is the summation order.

use std::sync::Arc;

use super::spec::{JobSpec, MeshObject, ObjectSource, ObjectSpec, Occlusion};
use crate::error::{Error, Result};
use crate::optics::Reference;
use crate::scene::bvh::{visible_from, Bvh};
use crate::scene::mesh::load_mesh;
use crate::scene::points::read_points;
use crate::scene::sampling::{sample_surface, Density, SamplingOptions};
use crate::synthesis::layers::{LayerObject, LayerSynthesis};
use crate::synthesis::point_sum::Visibility;
use crate::synthesis::Emitter;

/// The emitters of a job, ready for the point sum.
pub struct Scene {
    /// (reference, emitters) per channel, in summation order.
    pub channels: Vec<(Reference, Vec<Emitter>)>,
    /// Surface normal of each emitter in summation order (None for point clouds).
    pub normals: Vec<Option<[f64; 3]>>,
    /// Occlusion per tile, when a mesh asks for it.
    pub visibility: Option<Arc<dyn Visibility>>,
    /// Per object: a description line for `plan` (placed bounding box, emitter count).
    pub notes: Vec<String>,
}

impl Scene {
    /// All emitters in summation order.
    pub fn emitters(&self) -> Vec<Emitter> {
        self.channels
            .iter()
            .flat_map(|c| c.1.iter().copied())
            .collect()
    }
}

/// Emitters of a mesh whose visibility is tested per tile.
struct Occluded {
    /// Global index range [start, end) in summation order.
    start: usize,
    end: usize,
    bvh: Arc<Bvh>,
    pos: Vec<[f64; 3]>,
    tri: Vec<u32>,
}

struct MeshVisibility(Vec<Occluded>);

impl Visibility for MeshVisibility {
    fn visible(&self, j: usize, eye: [f64; 3]) -> bool {
        match self.0.iter().find(|o| j >= o.start && j < o.end) {
            Some(o) => !o
                .bvh
                .occluded(o.pos[j - o.start], eye, Some(o.tri[j - o.start])),
            None => true,
        }
    }
}

/// One object's emitters before grouping.
struct ObjectEmitters {
    emitters: Vec<Emitter>,
    normals: Vec<Option<[f64; 3]>>,
    occluder: Option<(Arc<Bvh>, Vec<u32>)>,
}

/// Builds the scene of a job: each object's emitters, then the channels. Errors name the object
/// file and what is wrong.
pub fn build_scene(spec: &JobSpec) -> Result<Scene> {
    let mut per_object = Vec::new();
    let mut notes = Vec::new();
    for (i, o) in spec.objects.iter().enumerate() {
        let n = i + 1;
        per_object.push(match &o.source {
            ObjectSource::Image { .. } | ObjectSource::Spots => {
                return Err(Error::job(&spec.path, format!("[[object]] #{n}: image and spot objects are targets of iterative synthesis, not emitters")));
            }
            ObjectSource::Points => point_object(spec, o, n, &mut notes)?,
            ObjectSource::Mesh(m) => mesh_object(spec, o, m, n, &mut notes)?,
        });
    }
    let (channels, normals, visibility) = group_channels(spec, per_object);
    Ok(Scene {
        channels,
        normals,
        visibility,
        notes,
    })
}

/// A point file's emitters, scaled and offset (object number `n`, for messages).
fn point_object(
    spec: &JobSpec,
    o: &ObjectSpec,
    n: usize,
    notes: &mut Vec<String>,
) -> Result<ObjectEmitters> {
    let pts = read_points(&o.points)?;
    let mut em = Vec::with_capacity(pts.len());
    for (k, q) in pts.iter().enumerate() {
        let pos = [
            q.x_mm * 1e-3 * o.scale + o.offset[0],
            q.y_mm * 1e-3 * o.scale + o.offset[1],
            q.z_mm * 1e-3 * o.scale + o.offset[2],
        ];
        if !(pos[2] > 0.0) {
            return Err(Error::job(
                &spec.path,
                format!(
                    "point {k} of {} lands at z = {} mm after scale and offset_mm; points must sit in front of the plate (z > 0)",
                    o.points.display(),
                    pos[2] * 1e3
                ),
            ));
        }
        em.push(Emitter {
            pos,
            amplitude: q.amplitude * o.gain,
            phase: q.phase_rad,
        });
    }
    notes.push(format!(
        "object #{n}: {} points from {}",
        em.len(),
        o.points.display()
    ));
    Ok(ObjectEmitters {
        normals: vec![None; em.len()],
        emitters: em,
        occluder: None,
    })
}

/// A mesh's emitters: loaded, placed, sampled with shading, occlusion prepared.
fn mesh_object(
    spec: &JobSpec,
    o: &ObjectSpec,
    m: &MeshObject,
    n: usize,
    notes: &mut Vec<String>,
) -> Result<ObjectEmitters> {
    let p = spec.plate;
    let mesh = load_mesh(&o.points)?.placed(&m.placement);
    let (lo, hi) = mesh.bounds();
    if !(lo[2] > 0.0) {
        return Err(Error::job(
            &spec.path,
            format!(
                "[[object]] #{n} ({}) reaches z = {:.4} mm after placement; the whole mesh must sit in front of the plate (z > 0): raise offset_mm z",
                o.points.display(),
                lo[2] * 1e3
            ),
        ));
    }
    // Default density: the replay cell lambda z / D at the mesh's depth (physics.md).
    let density = m.density.unwrap_or_else(|| {
        let zc = 0.5 * (lo[2] + hi[2]);
        let d = p.size()[0].max(p.size()[1]);
        Density::SpacingM(p.wavelength * zc / d)
    });
    let opts = SamplingOptions {
        density,
        pattern: m.pattern,
        seed: m.seed,
        shading: m.shading,
        phase: m.phase,
        max_emitters: 20_000_000,
    };
    let mut samples = sample_surface(&mesh, &opts).map_err(|e| match e {
        Error::Job { message, .. } => Error::job(
            &spec.path,
            format!("[[object]] #{n} ({}): {message}", o.points.display()),
        ),
        other => other,
    })?;
    let mut occluder = None;
    match m.occlusion {
        Occlusion::None => {}
        Occlusion::Centre => {
            let bvh = Bvh::build(&mesh);
            let vis = visible_from(&samples, &bvh, [0.0, 0.0, 0.0]);
            let mut it = vis.iter();
            samples.retain(|_| *it.next().expect("one flag per sample"));
        }
        Occlusion::Tiles => {
            occluder = Some((
                Arc::new(Bvh::build(&mesh)),
                samples.iter().map(|s| s.triangle).collect(),
            ));
        }
    }
    notes.push(mesh_note(
        n,
        o,
        m,
        &mesh,
        &format!("{} emitters", samples.len()),
    ));
    let em = samples
        .iter()
        .map(|s| Emitter {
            pos: s.pos,
            amplitude: s.amplitude * o.gain,
            phase: s.phase,
        })
        .collect();
    Ok(ObjectEmitters {
        normals: samples.iter().map(|s| Some(s.normal)).collect(),
        emitters: em,
        occluder,
    })
}

/// `plan`'s line for a placed mesh object (number `n`), ending with `tail`.
fn mesh_note(
    n: usize,
    o: &ObjectSpec,
    m: &MeshObject,
    mesh: &crate::scene::mesh::Mesh,
    tail: &str,
) -> String {
    let (lo, hi) = mesh.bounds();
    format!(
        "object #{n}: mesh {}, {} triangles, file unit {} mm, front {} turned to the viewer, placed in x {:.3}..{:.3}, y {:.3}..{:.3}, z {:.3}..{:.3} mm, {tail}",
        o.points.display(),
        mesh.triangles.len(),
        m.placement.unit_mm,
        m.front.name(),
        lo[0] * 1e3,
        hi[0] * 1e3,
        lo[1] * 1e3,
        hi[1] * 1e3,
        lo[2] * 1e3,
        hi[2] * 1e3,
    )
}

/// Channels of emitters with their references, the emitters' normals, the occlusion test.
type Channels = (
    Vec<(Reference, Vec<Emitter>)>,
    Vec<Option<[f64; 3]>>,
    Option<Arc<dyn Visibility>>,
);

/// The channels: the job's reference first, then each object with its own; emitters renumbered
/// in that order, with their normals and the occluded ranges.
fn group_channels(spec: &JobSpec, per_object: Vec<ObjectEmitters>) -> Channels {
    let mut order: Vec<(Reference, Vec<usize>)> = vec![(spec.reference, Vec::new())];
    for (i, o) in spec.objects.iter().enumerate() {
        match o.reference {
            None => order[0].1.push(i),
            Some(r) => order.push((r, vec![i])),
        }
    }
    order.retain(|c| !c.1.is_empty());
    let mut channels = Vec::new();
    let mut normals = Vec::new();
    let mut occluded = Vec::new();
    let mut next = 0usize;
    let mut per_object: Vec<Option<ObjectEmitters>> = per_object.into_iter().map(Some).collect();
    for (r, objs) in order {
        let mut em = Vec::new();
        for i in objs {
            let oe = per_object[i].take().expect("each object in one channel");
            let start = next;
            next += oe.emitters.len();
            if let Some((bvh, tri)) = oe.occluder {
                occluded.push(Occluded {
                    start,
                    end: next,
                    bvh,
                    pos: oe.emitters.iter().map(|e| e.pos).collect(),
                    tri,
                });
            }
            normals.extend(oe.normals);
            em.extend(oe.emitters);
        }
        channels.push((r, em));
    }
    let visibility: Option<Arc<dyn Visibility>> = if occluded.is_empty() {
        None
    } else {
        Some(Arc::new(MeshVisibility(occluded)))
    };
    (channels, normals, visibility)
}

/// `sample`: builds the job's scene and writes its emitters to `out` (refused when `out` is one
/// of the job's inputs, a folder or a special file). Returns the number of emitters.
pub fn sample(spec: &JobSpec, out: &std::path::Path) -> Result<usize> {
    crate::output::guard::check_output(out, "point file", &spec.inputs())?;
    let scene = build_scene(spec)?;
    write_emitters_ply(out, &scene)?;
    Ok(scene.normals.len())
}

/// Writes a scene's emitters as an ASCII PLY for point-cloud viewers: x y z in mm, amplitude, phase
/// (radians), nx ny nz (0 for point clouds) and the channel index.
pub fn write_emitters_ply(path: &std::path::Path, scene: &Scene) -> Result<()> {
    use std::fmt::Write as _;
    let n: usize = scene.channels.iter().map(|c| c.1.len()).sum();
    let mut t = String::new();
    let _ = write!(
        t,
        "ply\nformat ascii 1.0\ncomment emitters of a fringemill job, millimetres, plate at z = 0\nelement vertex {n}\nproperty double x\nproperty double y\nproperty double z\nproperty double amplitude\nproperty double phase\nproperty float nx\nproperty float ny\nproperty float nz\nproperty uchar channel\nend_header\n"
    );
    let mut k = 0;
    for (c, (_, em)) in scene.channels.iter().enumerate() {
        for e in em {
            let nrm = scene.normals[k].unwrap_or([0.0; 3]);
            k += 1;
            let _ = writeln!(
                t,
                "{} {} {} {} {} {} {} {} {}",
                e.pos[0] * 1e3,
                e.pos[1] * 1e3,
                e.pos[2] * 1e3,
                e.amplitude,
                e.phase,
                nrm[0] as f32,
                nrm[1] as f32,
                nrm[2] as f32,
                c.min(255)
            );
        }
    }
    crate::output::atomic::write_atomically(path, t.as_bytes())
}

/// The meshes of a job for the layers path (`[synthesis] path = "layers"`), loaded and placed, with
/// the path built on them; also a line per object for `plan`. Point clouds, objects with their own
/// reference and a paraxial approximation are refused with the reason.
pub fn layer_synthesis(spec: &JobSpec) -> Result<(LayerSynthesis, Vec<String>)> {
    let bad = |m: String| Error::job(&spec.path, m);
    if spec.synthesis.approximation != crate::synthesis::Approximation::Exact {
        return Err(bad(
            "[synthesis] path = \"layers\" propagates exact waves: approximation = \"fresnel\" does not apply".into(),
        ));
    }
    let mut objects = Vec::new();
    let mut notes = Vec::new();
    for (i, o) in spec.objects.iter().enumerate() {
        let n = i + 1;
        let m = match &o.source {
            ObjectSource::Mesh(m) => m,
            _ => {
                return Err(bad(format!(
                    "[[object]] #{n} ({}): path = \"layers\" slices meshes; point clouds take path = \"direct\"",
                    o.points.display()
                )))
            }
        };
        if o.reference.is_some() {
            return Err(bad(format!(
                "[[object]] #{n} ({}): path = \"layers\" records every object with the job's one reference",
                o.points.display()
            )));
        }
        let mesh = load_mesh(&o.points)?.placed(&m.placement);
        mesh.check().map_err(|e| Error::input(&o.points, e))?;
        let (lo, _) = mesh.bounds();
        if !(lo[2] > 0.0) {
            return Err(bad(format!(
                "[[object]] #{n} ({}) reaches z = {:.4} mm after placement; the whole mesh must sit in front of the plate (z > 0): raise offset_mm z",
                o.points.display(),
                lo[2] * 1e3
            )));
        }
        notes.push(mesh_note(
            n,
            o,
            m,
            &mesh,
            if m.occlusion == Occlusion::None {
                "not occluding"
            } else {
                "occluding (silhouettes)"
            },
        ));
        objects.push(LayerObject {
            mesh,
            shading: m.shading,
            phase: m.phase,
            seed: m.seed,
            gain: o.gain,
            occludes: m.occlusion != Occlusion::None,
        });
    }
    let dir = match spec.output.parent() {
        Some(d) if !d.as_os_str().is_empty() => d.to_path_buf(),
        _ => std::path::PathBuf::from("."),
    };
    let stem = spec
        .output
        .file_stem()
        .map_or_else(|| "plate".to_string(), |s| s.to_string_lossy().into_owned());
    let stem = format!("{stem}.{}", std::process::id());
    let layers = LayerSynthesis::new(
        spec.plate,
        spec.reference,
        objects,
        spec.layer_slabs,
        dir,
        &stem,
    )
    .map_err(bad)?;
    Ok((layers, notes))
}
