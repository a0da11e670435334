//! Iterative synthesis of a job: target images placed on their replay grids, the phase of one cell
//! optimised (`synthesis::iterative`), and the cell laid over the plate (`synthesis::phase_cell`).
//!
//! Fourier geometry: the replay plane is the focal plane of a lens of focal length f, sampled at
//! lambda f / (N p) for an N-pixel cell of pitch p, with the optical axis on sample floor(N/2) (the
//! lattice of a plain FFT after fftshift); each target pixel is one sample, the image's middle
//! pixel on the axis (moved by `shift_px`). Fresnel geometry: each image sits at its distance,
//! on the grid of the propagator the planner picks for it (angular spectrum below N p^2 / lambda,
//! pitch p; single-FFT Fresnel above, pitch lambda z / (N p)).

use std::path::Path;

use super::progress::{Progress, ProgressMode};
use super::spec::{
    AlgorithmChoice, EncodingRequest, Geometry, IterativeSpec, JobSpec, ObjectSource,
};
use crate::encoding::Encoding;
use crate::error::{Error, Result};
use crate::optics::propagation::{Grid, PropagationPlanner, PropagationRecipe};
use crate::optics::zernike::Correction;
use crate::output::sidecar::{SpotRecord, SpotsRecord};
use crate::synthesis::iterative::{optimise, Algorithm, IterOptions, Plane};
use crate::synthesis::phase_cell::PhaseCell;
use crate::synthesis::spots::{design, SpotAlgorithm, SpotOptions, SpotProblem};

/// What the iteration produced, for the sidecar.
#[derive(Clone, Debug)]
pub struct IterationRecord {
    /// Error per iteration.
    pub errors: Vec<f64>,
    /// Early stop.
    pub stopped_early: bool,
    /// Cell size.
    pub cell: [usize; 2],
    /// Replay-plane pitch per image, metres.
    pub replay_pitch: Vec<[f64; 2]>,
    /// Spot lists: the spots and their predicted figures.
    pub spots: Option<crate::output::sidecar::SpotsRecord>,
    /// The correction added, for the sidecar.
    pub correction: Option<crate::output::sidecar::CorrectionRecord>,
}

/// Reads a target image as intensities (PNG or TIFF; [`crate::raster::read_grey`]).
pub fn read_target(path: &Path) -> Result<(usize, usize, Vec<f64>)> {
    crate::raster::read_grey(path)
}

/// Places an image on an nx x ny replay lattice, shifted by [right, up] pixels: with no shift the
/// image's pixel (floor(h/2), floor(w/2)) lands on the optical axis, sample (floor(ny/2),
/// floor(nx/2)) (physics.md, "Replay lattices"); an image as large as the lattice lands pixel for
/// pixel.
fn place(
    job: &Path,
    path: &Path,
    img: (usize, usize, Vec<f64>),
    nx: usize,
    ny: usize,
    shift: [i64; 2],
) -> Result<(Vec<f64>, [usize; 4])> {
    let (w, h, v) = img;
    let (x0, y0) = placement(job, path, (w, h), nx, ny, shift)?;
    let mut t = vec![0.0; nx * ny];
    for r in 0..h {
        for c in 0..w {
            t[(y0 + r) * nx + x0 + c] = v[r * w + c].max(0.0);
        }
    }
    if t.iter().all(|&x| x == 0.0) {
        return Err(Error::input(path, "the target image is black everywhere"));
    }
    Ok((t, [x0, y0, w, h]))
}

/// The top-left sample of a w x h target shifted by [right, up] on an nx x ny replay lattice
/// (the image centre on the axis sample, as `place` lays it), or the job's error when it does
/// not fit: `plan` and `run` both ask here.
pub fn placement(
    job: &Path,
    path: &Path,
    (w, h): (usize, usize),
    nx: usize,
    ny: usize,
    shift: [i64; 2],
) -> Result<(usize, usize)> {
    let x0 = (nx / 2) as i64 - (w / 2) as i64 + shift[0];
    let y0 = (ny / 2) as i64 - (h / 2) as i64 - shift[1];
    if x0 < 0 || y0 < 0 || x0 + w as i64 > nx as i64 || y0 + h as i64 > ny as i64 {
        return Err(Error::job(
            job,
            format!(
                "[[object]] image {}: the {w} x {h} px target, shifted by {shift:?}, does not fit the {nx} x {ny} replay grid of the cell (a smaller shift_px or target, or a larger cell_px)",
                path.display()
            ),
        ));
    }
    Ok((x0 as usize, y0 as usize))
}

/// The iterated cell's size: `cell_px`, or the plate, each side at most the plate's.
pub fn cell_size(spec: &JobSpec, it: &IterativeSpec) -> (usize, usize) {
    let p = spec.plate;
    let cell = it.cell_px.unwrap_or([p.width, p.height]);
    (
        cell[0].min(p.width) as usize,
        cell[1].min(p.height) as usize,
    )
}

/// The phase levels the encoding will store, if it is a phase encoding.
fn phase_levels(spec: &JobSpec) -> Option<u32> {
    match &spec.encoding {
        EncodingRequest::Fixed(Encoding::Phase { levels })
        | EncodingRequest::Fixed(Encoding::CalibratedPhase { levels, .. }) => Some(*levels),
        EncodingRequest::Fixed(Encoding::BinaryPhase) => Some(2),
        _ => None,
    }
}

/// Runs the iteration and returns the cell laid over the plate, with the job's correction.
pub fn build_cell(
    spec: &JobSpec,
    it: &IterativeSpec,
    mode: ProgressMode,
) -> Result<(PhaseCell, IterationRecord)> {
    let (cell, mut record) = match spec
        .objects
        .iter()
        .find(|o| matches!(o.source, ObjectSource::Spots))
    {
        Some(o) => build_spots(spec, it, &o.points, mode)?,
        None => build_image_cell(spec, it, mode)?,
    };
    let cell = match load_correction(spec)? {
        Some(c) => cell.with_correction(c),
        None => cell,
    };
    record.correction = super::record::correction_record(spec.correction.as_ref());
    Ok((cell, record))
}

/// The job's `[correction]` with its map read (grey codes to radians).
pub fn load_correction(spec: &JobSpec) -> Result<Option<Correction>> {
    let Some(c) = &spec.correction else {
        return Ok(None);
    };
    let map = match &c.map {
        None => None,
        Some(path) => {
            let (w, h, codes, bits) = crate::raster::read_grey_levels(path)?;
            // Default: 2 pi at 2^bits (grey g is 2 pi g / 256 in an 8-bit map, / 65536 in 16-bit).
            let two_pi = c.map_two_pi_grey.unwrap_or(f64::from(1u32 << bits));
            let scale = std::f64::consts::TAU / two_pi;
            let v = codes.iter().map(|&g| (g * scale) as f32).collect();
            Some((w, h, v))
        }
    };
    let corr = Correction {
        terms: c.terms.clone(),
        pupil_radius: c.pupil_radius,
        pupil_centre: c.pupil_centre,
        map,
    };
    if let Some(path) = &c.map {
        corr.check_map_size(path, spec.plate.width, spec.plate.height)?;
    }
    Ok(Some(corr))
}

/// Where the plate puts its spots: the designed positions moved by the blazed carrier (m whole
/// plate samples = m lambda f / (N p) in the focal plane, x right, y up) and, with a lens term of
/// focal length L added to the pattern, moved along the axis by -f^2 / L (its phase
/// -k r^2 / (2 L) is the defocus term pi z r^2 / (lambda f^2) of z = -f^2 / L).
pub fn effective_spots(
    plate: &crate::optics::Plate,
    it: &IterativeSpec,
    focal: f64,
    spots: &[crate::synthesis::spots::Spot],
) -> Vec<crate::synthesis::spots::Spot> {
    let shift = [
        it.carrier_samples[0] as f64 * plate.wavelength * focal
            / (plate.width as f64 * plate.pitch[0]),
        it.carrier_samples[1] as f64 * plate.wavelength * focal
            / (plate.height as f64 * plate.pitch[1]),
    ];
    let dz = it.lens.map_or(0.0, |l| -focal * focal / l);
    spots
        .iter()
        .map(|s| crate::synthesis::spots::Spot {
            x: s.x + shift[0],
            y: s.y + shift[1],
            z: s.z + dz,
            ..*s
        })
        .collect()
}

/// A spot list's pattern over the whole plate (module `synthesis::spots`).
fn build_spots(
    spec: &JobSpec,
    it: &IterativeSpec,
    path: &Path,
    mode: ProgressMode,
) -> Result<(PhaseCell, IterationRecord)> {
    let p = spec.plate;
    let Geometry::Fourier(focal) = it.geometry else {
        return Err(Error::job(
            &spec.path,
            "spot lists need geometry = \"fourier\"",
        ));
    };
    let spots = crate::scene::spots::read_spots(path)?;
    crate::synthesis::spots::check(&p, focal, &effective_spots(&p, it, focal, &spots))
        .map_err(|m| Error::job(path, m))?;
    let algorithm = match it.algorithm {
        AlgorithmChoice::Superposition => SpotAlgorithm::Superposition,
        AlgorithmChoice::Gs => SpotAlgorithm::Gs,
        _ => SpotAlgorithm::WeightedGs,
    };
    let levels = phase_levels(spec);
    let steps = if algorithm == SpotAlgorithm::Superposition {
        0
    } else {
        it.iterations
    };
    let mut progress = Progress::new("spot iterations", steps.max(1) as f64, mode);
    let d = design(
        SpotProblem {
            plate: &p,
            focal,
            spots: &spots,
        },
        SpotOptions {
            algorithm,
            iterations: steps,
            seed: it.seed,
            levels,
        },
        &mut |_, _, _| progress.advance(1.0),
    );
    progress.finish();
    let record = IterationRecord {
        errors: d.history.iter().map(|h| 1.0 - h.1).collect(),
        stopped_early: false,
        cell: [p.width as usize, p.height as usize],
        replay_pitch: vec![[
            p.wavelength * focal / (p.width as f64 * p.pitch[0]),
            p.wavelength * focal / (p.height as f64 * p.pitch[1]),
        ]],
        spots: Some(SpotsRecord {
            model: format!(
                "paraxial far field of the {} pattern at each spot, V_m = (1/N) sum_j exp(i (phi_j - D_jm)) with D_jm = 2 pi (x_j x_m + y_j y_m) / (lambda f) + pi z_m (x_j^2 + y_j^2) / (lambda f^2); intensity |V_m|^2 = share of the panel's power (uniform illumination, ideal pixels, carrier, lens and correction left out)",
                if levels.is_some() { "quantized" } else { "continuous" }
            ),
            spots: spots
                .iter()
                .zip(&d.figures.intensity)
                .zip(&effective_spots(&p, it, focal, &spots))
                .map(|((s, &i), e)| SpotRecord {
                    replayed_at_um: [e.x * 1e6, e.y * 1e6, e.z * 1e6],
                    x_um: s.x * 1e6,
                    y_um: s.y * 1e6,
                    z_um: s.z * 1e6,
                    weight: s.weight,
                    phase_rad: s.phase,
                    predicted_intensity: i,
                })
                .collect(),
            efficiency: d.figures.efficiency,
            uniformity: d.figures.uniformity,
            history: d.history.iter().map(|h| [h.0, h.1]).collect(),
        }),
        correction: None,
    };
    Ok((
        PhaseCell::new(p, record.cell, d.phase, it.carrier, it.lens),
        record,
    ))
}

/// An image-target cell: the FFT-grid iteration (module `synthesis::iterative`).
fn build_image_cell(
    spec: &JobSpec,
    it: &IterativeSpec,
    mode: ProgressMode,
) -> Result<(PhaseCell, IterationRecord)> {
    let p = spec.plate;
    let (nx, ny) = cell_size(spec, it);
    if nx > 8192 || ny > 8192 {
        return Err(Error::job(&spec.path, format!("the iterated cell would be {nx} x {ny} px; set [synthesis] cell_px (at most 8192 x 8192) and let it repeat over the plate")));
    }
    let grid = Grid {
        nx,
        ny,
        pitch: p.pitch,
        wavelength: p.wavelength,
        lattice: Default::default(),
    };
    let mut planner = PropagationPlanner::<f32>::new();
    let mut planes = Vec::new();
    let mut windows = Vec::new();
    let mut pitches = Vec::new();
    for o in &spec.objects {
        let ObjectSource::Image { distance, shift_px } = o.source else {
            continue;
        };
        let (fwd, back) = match it.geometry {
            Geometry::Fourier(f) => {
                let fwd = planner.plan_recipe(&grid, 0.0, PropagationRecipe::Fourier { focal: f });
                // The inverse starts from the replay lattice the forward transform ends on.
                let back = planner.plan_recipe(
                    &fwd.output(),
                    0.0,
                    PropagationRecipe::Fourier { focal: -f },
                );
                (fwd, back)
            }
            Geometry::Fresnel => {
                let z = distance.expect("validated: fresnel images carry a distance");
                let recipe = planner.recipe(&grid, z);
                let fwd = planner.plan_recipe(&grid, z, recipe);
                let back = planner.plan_recipe(&fwd.output(), -z, recipe);
                (fwd, back)
            }
        };
        let img = read_target(&o.points)?;
        let (target, win) = place(&spec.path, &o.points, img, nx, ny, shift_px)?;
        pitches.push(fwd.output().pitch);
        windows.push(win);
        planes.push(Plane {
            target,
            propagator: fwd,
            back,
        });
    }
    let levels = phase_levels(spec);
    let algorithm = match it.algorithm {
        AlgorithmChoice::Gs => Algorithm::GerchbergSaxton,
        AlgorithmChoice::WeightedGs => Algorithm::WeightedGs,
        AlgorithmChoice::MixedRegion(mix) => {
            if windows.len() != 1 {
                return Err(Error::job(
                    &spec.path,
                    "mixed-region takes one image (its window is the signal window)",
                ));
            }
            Algorithm::MixedRegion {
                signal: windows[0],
                mix,
            }
        }
        AlgorithmChoice::Superposition => {
            return Err(Error::job(
                &spec.path,
                "algorithm = \"superposition\" applies to spot lists",
            ))
        }
    };
    let opts = IterOptions {
        algorithm,
        iterations: it.iterations,
        seed: it.seed,
        levels,
        quantize_last: if levels.is_some() {
            it.quantize_last
        } else {
            0
        },
        stall_tolerance: it.stall_tolerance,
        min_iterations: it.min_iterations,
    };
    let mut progress = Progress::new("iterations", it.iterations as f64, mode);
    let mut last = 0usize;
    let res = optimise(&planes, &grid, &opts, &mut |k, _err| {
        progress.advance((k + 1).saturating_sub(last) as f64);
        last = k + 1;
    });
    progress.finish();
    let record = IterationRecord {
        errors: res.errors.clone(),
        stopped_early: res.stopped_early,
        cell: [nx, ny],
        replay_pitch: pitches,
        spots: None,
        correction: None,
    };
    Ok((
        PhaseCell::new(p, [nx, ny], res.phase, it.carrier, it.lens),
        record,
    ))
}

/// Warnings `plan` gives about where light lands (Fourier geometry): a target window that covers
/// the zero order (the undiffracted light of fill factor and phase errors, which stays on the
/// optical axis of the plate's lattice: a carrier moves the image, not the zero order), and a
/// plate that is not a whole number of cells (the cut tiling spreads each designed sample).
pub fn placement_warnings(spec: &JobSpec, it: &IterativeSpec) -> Result<Vec<String>> {
    let p = &spec.plate;
    let (cx, cy) = cell_size(spec, it);
    let cell = [cx as u32, cy as u32];
    let mut out = Vec::new();
    if !p.width.is_multiple_of(cell[0]) || !p.height.is_multiple_of(cell[1]) {
        out.push(format!(
            "warning: the {} x {} plate is not a whole number of {} x {} cells: the repeated cell is cut at the plate's edge, so a designed sample spreads over its neighbours in the plate's replay",
            p.width, p.height, cell[0], cell[1]
        ));
    }
    let spot_lists = spec
        .objects
        .iter()
        .any(|o| matches!(o.source, ObjectSource::Spots));
    if !matches!(it.geometry, Geometry::Fourier(_)) || (it.lens.is_some() && !spot_lists) {
        return Ok(out);
    }
    let (nx, ny) = (cell[0] as usize, cell[1] as usize);
    let Geometry::Fourier(focal) = it.geometry else {
        return Ok(out);
    };
    // Replay samples of the cell's lattice, metres, and the guard distance.
    let step = [
        p.wavelength * focal / (nx as f64 * p.pitch[0]),
        p.wavelength * focal / (ny as f64 * p.pitch[1]),
    ];
    let guard = it.zero_order_guard.unwrap_or(2.0 * step[0].max(step[1]));
    // Spots: where the plate puts them (the carrier and a lens term move them). Their twins
    // (the conjugate order, at -x, -y, -z) carry light of the design's strength only for two
    // phase levels (an N-level kinoform sends its light to orders 1 + kN: Swanson, Binary Optics
    // Technology, 1989), so that check is made for binary patterns.
    let two_levels = phase_levels(spec).is_none_or(|l| l == 2);
    for o in spec
        .objects
        .iter()
        .filter(|o| matches!(o.source, ObjectSource::Spots))
    {
        let spots = effective_spots(p, it, focal, &crate::scene::spots::read_spots(&o.points)?);
        for (k, a) in spots.iter().enumerate() {
            let r = a.x.hypot(a.y);
            if r < guard {
                out.push(format!(
                    "warning: spot {} of {} is {:.1} um from the zero order (guard {:.1} um): the undiffracted light lands on it; move the spots off the axis or block the zero order",
                    k + 1,
                    o.points.display(),
                    r * 1e6,
                    guard * 1e6
                ));
            }
            if let Some(j) = spots
                .iter()
                .enumerate()
                .position(|(j, b)| two_levels && j != k && (a.x + b.x).hypot(a.y + b.y) < guard)
            {
                out.push(format!(
                    "warning: the twin of spot {} (its conjugate at -x, -y, -z: as bright as the spot with two phase levels) falls on spot {} of {} laterally: that spot gets the twin's light too",
                    k + 1,
                    j + 1,
                    o.points.display()
                ));
            }
        }
    }
    let guard_px = [guard / step[0], guard / step[1]];
    // The zero order relative to the image, in cell samples: the carrier moves the image by m
    // plate samples = m Nc / Np cell samples (x right, y up).
    let zx = (nx / 2) as f64 - it.carrier_samples[0] as f64 * nx as f64 / p.width as f64;
    let zy = (ny / 2) as f64 + it.carrier_samples[1] as f64 * ny as f64 / p.height as f64;
    for o in &spec.objects {
        let ObjectSource::Image { shift_px, .. } = o.source else {
            continue;
        };
        let (w, h, _) = read_target(&o.points)?;
        let x0 = (nx / 2) as f64 - (w / 2) as f64 + shift_px[0] as f64;
        let y0 = (ny / 2) as f64 - (h / 2) as f64 - shift_px[1] as f64;
        let (gx, gy) = (guard_px[0].max(0.5), guard_px[1].max(0.5));
        let covers =
            zx > x0 - 0.5 && zx < x0 + w as f64 - 0.5 && zy > y0 - 0.5 && zy < y0 + h as f64 - 0.5;
        let near = zx > x0 - gx
            && zx < x0 + w as f64 - 1.0 + gx
            && zy > y0 - gy
            && zy < y0 + h as f64 - 1.0 + gy;
        if !covers && near && it.zero_order_guard.is_some() {
            out.push(format!(
                "warning: target {} comes within {:.1} um of the zero order (zero_order_guard_um)",
                o.points.display(),
                guard * 1e6
            ));
        }
        if covers {
            out.push(format!(
                "warning: target {} covers the zero order (undiffracted light on the optical axis, at its pixel ({:.0}, {:.0})): move the image off it with carrier_deg or shift_px",
                o.points.display(),
                zx - x0,
                zy - y0
            ));
        }
    }
    Ok(out)
}
