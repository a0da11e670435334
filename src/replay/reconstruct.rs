//! `reconstruct`: replay images written as PNG, with the figures a user reads (peaks, regions,
//! agreement with a target, spot arrays, the oversampled lattice) in a JSON beside them.

use std::path::PathBuf;

use super::*;
use crate::error::{Error, Result};

/// Everything `fringemill reconstruct` asks for.
#[derive(Clone, Debug)]
pub struct ReconstructRequest {
    /// The plate.
    pub tif: PathBuf,
    /// Depths, metres.
    pub distances: Vec<f64>,
    /// Replay through a lens of this focal length onto its focal plane instead (metres).
    pub focal: Option<f64>,
    /// Window of the plate; None for the whole plate.
    pub window: Option<Window>,
    /// Lighting.
    pub illumination: Illumination,
    /// Output PNG (a stack adds `-zD.DDDmm` before the extension).
    pub out: PathBuf,
    /// Grey mapping.
    pub scale: metrics::ToneScale,
    /// 8 or 16.
    pub bits: u8,
    /// Region of the replay image for power fraction, uniformity and speckle contrast.
    pub region: Option<metrics::Region>,
    /// Target image to compare with.
    pub target: Option<PathBuf>,
    /// How many peaks to report.
    pub peaks: usize,
    /// Fourier replays: also replay on a lattice this many times finer (zero padding).
    pub oversample: Option<usize>,
    /// Check the TIFF against its sidecar's SHA-256 before replaying (reads the whole file).
    pub verify: bool,
    /// Fourier replays of modulator patterns: the panel's fill factor (0 < F <= 1), for the
    /// zero order's strength and the designed light's share.
    pub fill_factor: Option<f64>,
}

/// Runs a reconstruction: writes one PNG per depth and one JSON of metrics (`OUT.json`).
/// Returns the files written.
pub fn reconstruct(req: &ReconstructRequest) -> Result<Vec<PathBuf>> {
    let pf = PlateFile::open(&req.tif)?;
    check_outputs(req, &pf)?;
    if req.verify {
        pf.verify()?;
    }
    let win = req.window.unwrap_or(Window {
        x: 0,
        y: 0,
        w: pf.plate.width,
        h: pf.plate.height,
    });
    let target = match &req.target {
        Some(t) => Some(crate::raster::read_grey(t)?),
        None => None,
    };
    if let Some(k) = req.oversample {
        if req.focal.is_none() {
            return Err(Error::job(
                &req.tif,
                "--oversample applies to Fourier replays (--focal-mm)",
            ));
        }
        if !(2..=8).contains(&k) {
            return Err(Error::job(
                &req.tif,
                format!("--oversample {k}: expected 2..=8"),
            ));
        }
    }
    if let Some(f) = req.fill_factor {
        if req.focal.is_none() || !(f > 0.0 && f <= 1.0) {
            return Err(Error::job(
                &req.tif,
                format!(
                    "--fill-factor {f}: expected 0 < F <= 1, with a Fourier replay (--focal-mm)"
                ),
            ));
        }
    }
    let images = replay_planes(&pf, win, req.illumination, &req.distances, req.focal)?;
    // Fourier replays: the lit window's mean (zero order) and, for a spot-list plate replayed
    // whole, its figures per spot read off the samples.
    let whole = win.x == 0 && win.y == 0 && win.w == pf.plate.width && win.h == pf.plate.height;
    let (mean_t, spot_replay) = match req.focal {
        Some(_) => {
            let t: Vec<num_complex::Complex64> = lit_window(&pf, win, req.illumination)?
                .iter()
                .map(|v| num_complex::Complex64::new(v.re.into(), v.im.into()))
                .collect();
            let mean = t.iter().sum::<num_complex::Complex64>() / t.len().max(1) as f64;
            let spots = match &pf.spots {
                Some((design_focal, sp)) if whole => {
                    Some(spot_figures(&pf, req, *design_focal, sp, &t))
                }
                _ => None,
            };
            (mean, spots)
        }
        None => (num_complex::Complex64::new(0.0, 0.0), None),
    };
    let mut written = Vec::new();
    let mut planes = Vec::new();
    // Depth planes are drawn as the plate's viewer sees them (physics.md, "Viewing side"): the
    // viewer stands at z < 0 looking towards +z, so the image's right is plate -x and its columns
    // run opposite to the grid's. Fourier planes keep the FFT lattice (column = +x of the focal
    // plane, as a plain FFT after fftshift shows it), on which targets are designed.
    let mirrored = req.focal.is_none() && !pf.real_image;
    for img in &images {
        let (path, plane) =
            plane_report(req, img, images.len(), mirrored, target.as_ref(), mean_t)?;
        written.push(path);
        planes.push(plane);
    }
    let mut oversampled = None;
    if let (Some(k), Some(f)) = (req.oversample, req.focal) {
        let img = replay_fourier_oversampled(&pf, win, req.illumination, f, k)?;
        let (fw, fh) = (img.grid.nx, img.grid.ny);
        let stem = req
            .out
            .file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_else(|| "replay".into());
        let path = req.out.with_file_name(format!("{stem}-os{k}.png"));
        metrics::write_png(&path, fw, fh, &img.intensity, req.scale, req.bits)?;
        written.push(path.clone());
        // The target's flat top, on the designed samples and on everything between them.
        let flat = match &target {
            Some((tw, th, t)) => {
                let cells = metrics::flat_cells(*tw, *th, t);
                let (w, h) = (*tw, *th);
                let fine = |r: usize, c: usize, dr: usize, dc: usize| {
                    let fr = fh / 2 + k * r + dr - k * (h / 2);
                    let fc = fw / 2 + k * c + dc - k * (w / 2);
                    img.intensity[fr * fw + fc] as f64
                };
                let on = metrics::FlatStats::of(cells.iter().map(|&(c, r)| fine(r, c, 0, 0)));
                let all = metrics::FlatStats::of(cells.iter().flat_map(|&(c, r)| {
                    (0..k)
                        .flat_map(move |dr| (0..k).map(move |dc| (dr, dc)))
                        .map(move |(dr, dc)| fine(r, c, dr, dc))
                }));
                on.map(|on| serde_json::json!({
                    "cells": cells.len(),
                    "what": "the target's flat top (pixels at its maximum whose right, lower and lower-right neighbours are too): on the designed samples, and on every fine sample of the cells they span",
                    "on_samples": on,
                    "between_samples": all,
                }))
            }
            None => None,
        };
        oversampled = Some(serde_json::json!({
            "factor": k,
            "image": path.file_name().map(|f| f.to_string_lossy().into_owned()),
            "width_px": fw, "height_px": fh,
            "pitch_um": [img.grid.pitch[0] * 1e6, img.grid.pitch[1] * 1e6],
            "lattice": "the plate window zero-padded to factor N before the transform: axis on sample floor(factor N / 2); fine sample floor(factor N / 2) + factor a is plain sample floor(N / 2) + a",
            "flat": flat,
        }));
    }
    let json = serde_json::json!({
        "plate": req.tif.file_name().map(|f| f.to_string_lossy().into_owned()),
        "window": [win.x, win.y, win.w, win.h],
        "illumination": match req.illumination {
            Illumination::Recorded => serde_json::json!("recorded reference"),
            Illumination::Plane(t) => serde_json::json!({"plane_tilt_deg": [t[0].to_degrees(), t[1].to_degrees()]}),
        },
        "drawn_as": if pf.real_image && req.focal.is_none() { "the design plane of an iterative Fresnel plate: the field propagated by +D (the real image its targets describe), drawn as the targets are given (image right = +x of the plane)" } else if mirrored { "seen by the plate's viewer (standing at z < 0, looking towards +z through the plate): image right = plate -x, image up = plate +y; peak col/row count in the image" } else { "the FFT lattice of the focal plane (optical axis on sample floor(N/2), as a plain FFT after fftshift): image right = +x of the focal plane, image up = +y" },
        "depth_convention": if req.focal.is_some() { "focal plane of a lens of focal length focal_mm behind the plate (Fourier geometry); centre_mm is the optical axis" } else if pf.real_image { "distance D is the design plane of the plate's targets, a real image at +D (field propagated by +D)" } else { "distance D shows the plane z = D in front of the plate (field propagated by -D)" },
        "planes": planes,
        "oversampled": oversampled,
        "spot_list": spot_replay,
    });
    let jp = req.out.with_extension("json");
    crate::output::atomic::write_atomically(
        &jp,
        (serde_json::to_string_pretty(&json).expect("plain data") + "\n").as_bytes(),
    )?;
    written.push(jp);
    Ok(written)
}

/// The files a reconstruction will write: the PNG per depth (a stack adds `-zD.DDDmm`), the
/// oversampled PNG and the metrics JSON.
fn planned_outputs(req: &ReconstructRequest) -> Vec<PathBuf> {
    let stem = req
        .out
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_else(|| "replay".into());
    let mut v = Vec::new();
    if req.focal.is_some() || req.distances.len() == 1 {
        v.push(req.out.clone());
    } else {
        for d in &req.distances {
            v.push(
                req.out
                    .with_file_name(format!("{stem}-z{:.3}mm.png", d * 1e3)),
            );
        }
    }
    if let Some(k) = req.oversample {
        v.push(req.out.with_file_name(format!("{stem}-os{k}.png")));
    }
    v.push(req.out.with_extension("json"));
    v
}

/// Refuses outputs that would replace the plate, its sidecar or fields, the target, a file of
/// another kind (an existing image name that is not a PNG, a JSON that is a plate's sidecar), a
/// folder or a special file.
fn check_outputs(req: &ReconstructRequest, pf: &PlateFile) -> Result<()> {
    let mut inputs = vec![
        req.tif.clone(),
        pf.tif.clone(),
        sidecar_of(&req.tif),
        sidecar_of(&pf.tif),
    ];
    let dir = pf.tif.parent().map(PathBuf::from).unwrap_or_default();
    if !pf.fields.is_empty() {
        let stem = pf
            .tif
            .file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_default();
        inputs.push(pf.tif.with_file_name(format!("{stem}.fields.json")));
    }
    inputs.extend(pf.fields.iter().map(|f| dir.join(&f.file)));
    inputs.extend(req.target.iter().cloned());
    for out in planned_outputs(req) {
        let json = out.extension().is_some_and(|e| e == "json");
        crate::output::guard::check_output(
            &out,
            if json { "metrics file" } else { "replay image" },
            &inputs,
        )?;
        let Ok(bytes) = head_bytes(&out) else {
            continue;
        };
        if json {
            if String::from_utf8_lossy(&bytes).contains(crate::output::sidecar::FORMAT_NAME) {
                return Err(Error::job(
                    &out,
                    "is a plate's sidecar; the metrics would replace it (name another --out)",
                ));
            }
        } else if !bytes.starts_with(b"\x89PNG\r\n\x1a\n") && !bytes.is_empty() {
            return Err(Error::job(
                &out,
                "exists and is not a PNG image; the replay would replace it (name another --out)",
            ));
        }
    }
    Ok(())
}

/// The first 4 KiB of a file.
fn head_bytes(p: &std::path::Path) -> std::io::Result<Vec<u8>> {
    use std::io::Read;
    let mut v = Vec::new();
    std::fs::File::open(p)?.take(4096).read_to_end(&mut v)?;
    Ok(v)
}

/// The figures of a spot-list plate replayed whole through a Fourier lens, read off its lit
/// samples `t`: in ideal optics, and through the aberration its correction is for.
fn spot_figures(
    pf: &PlateFile,
    req: &ReconstructRequest,
    design_focal: f64,
    sp: &[crate::synthesis::spots::Spot],
    t: &[num_complex::Complex64],
) -> serde_json::Value {
    // The spots sit in the focal plane of the design's lens (a replay through
    // another lens scales them; the figures stay those of the design's), moved
    // by the illumination's tilt: f sin t.
    let focal = design_focal;
    let tilt = match (req.illumination, &pf.reference) {
        (Illumination::Plane(t), _) => t,
        (Illumination::Recorded, crate::optics::Reference::Plane { tilt }) => *tilt,
        (Illumination::Recorded, _) => [0.0, 0.0],
    };
    let sp: Vec<crate::synthesis::spots::Spot> = sp
        .iter()
        .map(|s| crate::synthesis::spots::Spot {
            x: s.x + focal * tilt[0].sin(),
            y: s.y + focal * tilt[1].sin(),
            ..*s
        })
        .collect();
    let sp = &sp;
    let ideal = super::orders::spot_replay(&pf.plate, focal, sp, t, req.fill_factor);
    // Through the optics the correction is for: the plate with its Zernike
    // correction taken out again (the aberration cancels it).
    let through = pf.correction.as_ref().map(|c| {
        let p = &pf.plate;
        let w = p.width as usize;
        let ta: Vec<num_complex::Complex64> = t
            .iter()
            .enumerate()
            .map(|(k, v)| {
                let (r, col) = (k / w, k % w);
                let ph = c.zernike_phase(p.x_of_col(col as f64), p.y_of_row(r as f64));
                v * num_complex::Complex64::from_polar(1.0, -ph)
            })
            .collect();
        super::orders::spot_replay(p, focal, sp, &ta, req.fill_factor)
    });
    serde_json::json!({
        "design_focal_mm": focal * 1e3,
        "evaluated_at_um": sp.iter().map(|s| [s.x * 1e6, s.y * 1e6, s.z * 1e6]).collect::<Vec<_>>(),
        "where": "each spot where the plate puts it (the sidecar's replayed_at_um, moved by f sin t of the illumination's tilt; a spherical illumination is not followed), in the focal plane of the design's lens whatever --focal-mm says",
        "ideal_optics": ideal,
        "through_the_corrected_aberration": through,
    })
}

/// One replayed plane: drawn (mirrored for depth replays), written as PNG, and its metrics
/// (peaks, region, target comparison, spot array, orders of Fourier replays).
fn plane_report(
    req: &ReconstructRequest,
    img: &super::ReplayImage,
    planes: usize,
    mirrored: bool,
    target: Option<&(usize, usize, Vec<f64>)>,
    mean_t: num_complex::Complex64,
) -> Result<(PathBuf, serde_json::Value)> {
    let (w, h) = (img.grid.nx, img.grid.ny);
    let drawn: Vec<f32> = if mirrored {
        img.intensity
            .chunks_exact(w)
            .flat_map(|row| row.iter().rev().copied())
            .collect()
    } else {
        img.intensity.clone()
    };
    let grid_col = |c: usize| if mirrored { w - 1 - c } else { c };
    let path = if planes == 1 {
        req.out.clone()
    } else {
        let stem = req
            .out
            .file_stem()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_else(|| "replay".into());
        req.out
            .with_file_name(format!("{stem}-z{:.3}mm.png", img.distance * 1e3))
    };
    metrics::write_png(&path, w, h, &drawn, req.scale, req.bits)?;
    let pk: Vec<metrics::Peak> = metrics::peaks(w, h, &drawn, req.peaks, 0.05)
        .into_iter()
        .map(|(c, r, rel)| metrics::Peak {
            col: c,
            row: r,
            x_mm: (img.centre[0] + img.grid.x_of_col(grid_col(c))) * 1e3,
            y_mm: (img.centre[1] + img.grid.y_of_row(r)) * 1e3,
            relative: rel,
        })
        .collect();
    let region = match req.region {
        Some(rg) => {
            Some(metrics::region_stats(w, h, &drawn, rg).map_err(|m| Error::job(&req.tif, m))?)
        }
        None => None,
    };
    let cmp = match target {
        Some((tw, th, t)) => {
            if (*tw, *th) != (w, h) {
                return Err(Error::input(
                    req.target.as_ref().unwrap(),
                    format!("is {tw} x {th} px; the replay image is {w} x {h}"),
                ));
            }
            Some(metrics::compare(w, h, &drawn, t, req.region))
        }
        None => None,
    };
    // A target of isolated lit pixels is a spot array: figures per spot.
    let spots = match target {
        Some((tw, _, t)) if *tw == w => {
            metrics::spot_target(w, h, t).map(|sp| metrics::spot_stats(w, &drawn, &sp))
        }
        _ => None,
    };
    let orders = req.focal.map(|_| {
        let (zero, twin) =
            super::orders::orders(w, h, &drawn, mean_t, req.region, req.fill_factor);
        serde_json::json!({
            "zero_order": zero,
            "twin": twin,
            "fill_factor": req.fill_factor,
            "what": "zero order: the undiffracted light on the optical axis (a carrier moves the image, not it); twin: the conjugate image, point-mirrored through the axis (as strong as the image for binary phase, weak for many levels); with a fill factor F the zero order is |F mean(t) + 1 - F|^2 of the incident power and designed light keeps F^2",
        })
    });
    let report = serde_json::json!({
        "image": path.file_name().map(|f| f.to_string_lossy().into_owned()),
        "distance_mm": if req.focal.is_some() { None } else { Some(img.distance * 1e3) },
        "focal_mm": req.focal.map(|f| f * 1e3),
        "width_px": w, "height_px": h,
        "pitch_um": [img.grid.pitch[0] * 1e6, img.grid.pitch[1] * 1e6],
        "centre_mm": [img.centre[0] * 1e3, img.centre[1] * 1e3],
        "total_power": img.intensity.iter().map(|&v| v as f64).sum::<f64>() * img.grid.pixel_area(),
        "peaks": pk,
        "region": region,
        "target": cmp,
        "spots": spots,
        "orders": orders,
    });
    Ok((path, report))
}
