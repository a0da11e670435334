//! `plan`: what a run would do (sizes, supports, work, time, path, output), without computing.

use super::prepare::{point_sum_and_path, sidecar_path, tiff_layout};
use super::spec::{IterativeSpec, JobSpec, Method};
use crate::error::Result;
use crate::synthesis::Approximation;

/// `plan` for iterative synthesis: sizes and replay sampling, without iterating.
fn plan_iterative(spec: &JobSpec, it: &IterativeSpec) -> Result<PlanReport> {
    let p = spec.plate;
    let (cx, cy) = super::iterative::cell_size(spec, it);
    let over = if it.cell_px.is_some() {
        format!("cell {cx} x {cy} px repeated over the plate")
    } else {
        format!("over the whole {cx} x {cy} px plate (no cell_px)")
    };
    let mut lines = vec![
        format!("job: {}", spec.path.display()),
        format!(
            "plate: {} x {} px, pitch {:.4} x {:.4} um, wavelength {:.2} nm",
            p.width,
            p.height,
            p.pitch[0] * 1e6,
            p.pitch[1] * 1e6,
            p.wavelength * 1e9
        ),
        format!(
            "iterative synthesis: {}, {} iterations at most, {over}",
            super::record::algorithm_name(it.algorithm),
            it.iterations
        ),
    ];
    if let super::spec::Geometry::Fourier(f) = it.geometry {
        lines.push(format!(
            "fourier geometry, f = {:.3} mm: replay pitch lambda f / (N p) = {:.3} x {:.3} um, replay field {:.3} x {:.3} mm",
            f * 1e3,
            p.wavelength * f / (cx as f64 * p.pitch[0]) * 1e6,
            p.wavelength * f / (cy as f64 * p.pitch[1]) * 1e6,
            p.wavelength * f / p.pitch[0] * 1e3,
            p.wavelength * f / p.pitch[1] * 1e3
        ));
    }
    if it.carrier_samples != [0, 0] || it.carrier_asked_deg != [0.0, 0.0] {
        lines.push(format!(
            "carrier: asked [{}, {}] deg, snapped to [{:.5}, {:.5}] deg = [{}, {}] whole samples of the plate's replay lattice (sin t = m lambda / (N p))",
            it.carrier_asked_deg[0],
            it.carrier_asked_deg[1],
            it.carrier[0].to_degrees(),
            it.carrier[1].to_degrees(),
            it.carrier_samples[0],
            it.carrier_samples[1]
        ));
    }
    for o in &spec.objects {
        if matches!(o.source, super::spec::ObjectSource::Spots) {
            let spots = crate::scene::spots::read_spots(&o.points)?;
            if let super::spec::Geometry::Fourier(f) = it.geometry {
                crate::synthesis::spots::check(
                    &p,
                    f,
                    &super::iterative::effective_spots(&p, it, f, &spots),
                )
                .map_err(|m| crate::error::Error::job(&o.points, m))?;
            }
            let zs = spots.iter().map(|s| s.z);
            let (zlo, zhi) = zs.fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), z| {
                (a.min(z), b.max(z))
            });
            lines.push(format!(
                "spots {}: {} spots, z from {:.1} to {:.1} um; each iteration on the spot amplitudes (gs, weighted-gs; superposition: one pass) costs about 2 x {} x {:.3} Mpx complex multiply-adds",
                o.points.display(),
                spots.len(),
                zlo * 1e6,
                zhi * 1e6,
                spots.len(),
                p.pixels() as f64 / 1e6
            ));
            continue;
        }
        let (w, h, _) = super::iterative::read_target(&o.points)?;
        if let super::spec::ObjectSource::Image { shift_px, .. } = o.source {
            // The placement `run` will make, refused here the same way.
            super::iterative::placement(&spec.path, &o.points, (w, h), cx, cy, shift_px)?;
        }
        lines.push(format!("target {}: {} x {} px", o.points.display(), w, h));
    }
    if let Some(c) = &spec.correction {
        lines.push(format!(
            "correction: {} Zernike term(s) (Noll normalisation, waves rms) over a {:.3} mm pupil at [{:.3}, {:.3}] mm{}",
            c.terms.len(),
            c.pupil_radius * 1e3,
            c.pupil_centre[0] * 1e3,
            c.pupil_centre[1] * 1e3,
            c.map.as_ref().map_or(String::new(), |m| format!(", plus the map {} (2 pi at grey {})", m.display(), c.map_two_pi_grey.map_or("2^bits".to_string(), |g| g.to_string())))
        ));
        if c.map.is_some() {
            // Reads and size-checks the map, so a run does not fail on it later.
            super::iterative::load_correction(spec)?;
        }
    }
    if let super::spec::EncodingRequest::Fixed(crate::encoding::Encoding::CalibratedPhase {
        levels,
        calibration,
    }) = &spec.encoding
    {
        if calibration.short_of_two_pi(*levels) {
            lines.push(format!(
                "warning: the panel's response covers {:.3} rad at {:.1} nm, short of 2 pi: the levels beyond it are written at the nearer end of the branch, and the design's figures (which assume every level) will not be met",
                calibration.stroke,
                p.wavelength * 1e9
            ));
        }
    }
    lines.extend(super::iterative::placement_warnings(spec, it)?);
    let layout = tiff_layout(spec, &spec.encoding.resolve(|| 1.0));
    let bytes = layout.estimated_file_bytes();
    lines.push(format!(
        "output: {} ({:.3} MB)",
        spec.output.display(),
        bytes as f64 / 1e6
    ));
    Ok(PlanReport {
        lines,
        unreachable: 0,
        updates: p.pixels() as f64,
        bytes,
    })
}

/// The plate's lines (size, pitch, half-angle, reference) that every point-sum plan starts with.
fn plate_lines(spec: &JobSpec) -> Vec<String> {
    let p = spec.plate;
    let size = p.size();
    let th = p.max_half_angle();
    let mut lines = vec![
        format!("job: {}", spec.path.display()),
        format!(
            "plate: {} x {} px = {:.3} Mpx, pitch {:.4} x {:.4} um, {:.3} x {:.3} mm, wavelength {:.2} nm",
            p.width,
            p.height,
            p.pixels() as f64 / 1e6,
            p.pitch[0] * 1e6,
            p.pitch[1] * 1e6,
            size[0] * 1e3,
            size[1] * 1e3,
            p.wavelength * 1e9
        ),
        format!(
            "largest diffraction half-angle asin(lambda / 2p): {:.3} deg in x, {:.3} deg in y",
            th[0].to_degrees(),
            th[1].to_degrees()
        ),
        format!("reference: {}", spec.reference.describe()),
    ];
    if let crate::optics::Reference::Plane { tilt } = spec.reference {
        for (axis, t, m) in [("x", tilt[0], th[0]), ("y", tilt[1], th[1])] {
            if t.abs() > m {
                lines.push(format!("warning: reference tilt in {axis} ({:.2} deg) exceeds the half-angle the pitch holds: the carrier aliases", t.to_degrees()));
            }
        }
    }
    lines
}

/// `plan` for the layers path: the slabs, the frame, memory, scratch files and time.
fn plan_layers(spec: &JobSpec, auto: Option<String>) -> Result<PlanReport> {
    let (layers, notes) = super::scene::layer_synthesis(spec)?;
    let p = spec.plate;
    let mut lines = plate_lines(spec);
    lines.extend(notes);
    lines.extend(layers.describe());
    let w = layers.work();
    let threads = rayon::current_num_threads();
    let secs = layers_seconds(&layers, spec);
    lines.push(format!(
        "work: {:.3e} FFT element-passes in the slabs, {:.3e} in the frame, {:.3e} in the bands",
        w.slices, w.frame, w.bands
    ));
    lines.push(format!(
        "time: about {} on {threads} thread(s) ({:.2} ns per FFT element-pass, {:.1} ns per lattice point rasterised, {:.0} ns per pixel written, per thread, as measured on the development machine: see BENCHMARKS.md)",
        super::estimate::human(secs),
        super::estimate::SECONDS_PER_FFT_ELEMENT_PASS * 1e9,
        super::estimate::SECONDS_PER_RASTER_POINT * 1e9,
        super::estimate::SECONDS_PER_PIXEL_WRITTEN * 1e9
    ));
    if layers.peak_bytes() > 4 << 30 {
        lines.push(format!(
            "warning: peak memory about {:.1} GB: the front plane is held whole while the slabs are carried",
            layers.peak_bytes() as f64 / 1e9
        ));
    }
    lines.push(match auto {
        None => "path: layers (meshes sliced in depth; asked for by [synthesis] path)".into(),
        Some(why) => format!("path: layers (meshes sliced in depth); {why}"),
    });
    let encoding = spec.encoding.resolve(|| 1.0);
    let layout = tiff_layout(spec, &encoding);
    let bytes = layout.estimated_file_bytes();
    lines.push(format!(
        "output: {} ({} encoding, {} bit, {:.3} MB)",
        spec.output.display(),
        encoding.kind_name(),
        encoding.bits_per_sample(),
        bytes as f64 / 1e6
    ));
    lines.push(format!("sidecar: {}", sidecar_path(&spec.output).display()));
    Ok(PlanReport {
        lines,
        unreachable: 0,
        updates: p.pixels() as f64,
        bytes,
    })
}

/// Time estimates of a prepared point sum: the direct sum's, and the recording plane's when the
/// choice takes it (`plane_cost` in f64 exact update equivalents).
pub(super) struct PointSumEstimate {
    /// Visibility tests.
    pub tests: f64,
    /// Share of emitter-tile pairs visible (1 without occlusion).
    pub visible_share: f64,
    /// Seconds per update of the kernel that runs.
    pub per_update: f64,
    /// Wall-clock seconds of the direct sum.
    pub direct_seconds: f64,
    /// Wall-clock seconds of the recording plane, when it is the path.
    pub plane_seconds: Option<f64>,
}

impl PointSumEstimate {
    /// Seconds of the path the choice takes.
    pub fn seconds(&self) -> f64 {
        self.plane_seconds.unwrap_or(self.direct_seconds)
    }
}

pub(super) fn point_sum_estimate(
    spec: &JobSpec,
    sum: &crate::synthesis::point_sum::PointSum,
    plane_cost: Option<f64>,
) -> PointSumEstimate {
    let p = spec.plate;
    let updates = sum.estimate_updates(256);
    let tests = sum
        .occlusion()
        .map_or(0, |o| o.tests_needed(sum.row_ranges())) as f64;
    let visible_share = sum
        .occlusion()
        .map_or(1.0, |o| o.sampled_visible_share(sum.row_ranges(), 4000));
    let threads = rayon::current_num_threads();
    let sep = spec.synthesis.approximation == Approximation::Fresnel
        && sum.occlusion().is_none()
        && sum.channel_count() == 1
        && matches!(spec.reference, crate::optics::Reference::Plane { .. });
    let per_update = super::estimate::seconds_per_update(
        spec.synthesis.approximation,
        spec.synthesis.precision,
        sep,
    );
    let direct_seconds = super::estimate::wall_seconds(
        updates * visible_share * per_update,
        tests,
        p.pixels() as f64,
        threads,
    );
    // The plane's cost is in f64 exact update equivalents.
    let plane_seconds = plane_cost.map(|c| {
        super::estimate::wall_seconds(
            c * super::estimate::seconds_per_update(
                Approximation::Exact,
                crate::synthesis::Precision::F64,
                false,
            ),
            0.0,
            p.pixels() as f64,
            threads,
        )
    });
    PointSumEstimate {
        tests,
        visible_share,
        per_update,
        direct_seconds,
        plane_seconds,
    }
}

/// Wall-clock seconds of a layers synthesis on this machine's threads.
pub(super) fn layers_seconds(
    layers: &crate::synthesis::layers::LayerSynthesis,
    spec: &JobSpec,
) -> f64 {
    super::estimate::layer_seconds(
        layers.prepare_work() + layers.work().bands,
        layers.raster_work(),
        spec.plate.pixels() as f64,
        rayon::current_num_threads(),
    )
}

/// What `plan` reports.
#[derive(Clone, Debug)]
pub struct PlanReport {
    /// Text lines for the user.
    pub lines: Vec<String>,
    /// Emitters whose support misses the plate.
    pub unreachable: usize,
    /// Estimated point-pixel updates.
    pub updates: f64,
    /// Estimated bytes on disk (uncompressed size for deflate).
    pub bytes: u64,
}

/// Validates a job without computing the plate and says what a run will do.
pub fn plan(spec: &JobSpec) -> Result<PlanReport> {
    if let Method::Iterative(it) = &spec.method {
        return plan_iterative(spec, it);
    }
    if spec.sum_path == super::spec::SumPath::Layers {
        return plan_layers(spec, None);
    }
    let (auto, why) = super::prepare::auto_layers(spec)?;
    if auto.is_some() {
        return plan_layers(spec, why);
    }
    let (sum, choice, notes) = point_sum_and_path(spec)?;
    let emitters = sum.emitters();
    let p = spec.plate;
    let mut lines = plate_lines(spec);
    for (k, o) in spec.objects.iter().enumerate() {
        if let Some(r) = &o.reference {
            lines.push(format!(
                "object {} ({}): its own reference, a separate channel: {}",
                k + 1,
                o.points.display(),
                r.describe()
            ));
        }
    }
    let zs: Vec<f64> = {
        let mut z: Vec<f64> = emitters.iter().map(|e| e.pos[2]).collect();
        z.sort_by(f64::total_cmp);
        z
    };
    lines.push(format!(
        "emitters: {} from {} object(s) in {} channel(s)",
        emitters.len(),
        spec.objects.len(),
        sum.channel_count()
    ));
    lines.extend(notes);
    // The direct sum's figures (supports, reach, work) are reported whichever path runs.
    let sum = &sum;
    let path_lines = choice.lines;
    let plane_cost = match choice.recipe {
        crate::synthesis::planner::SumRecipe::RecordingPlane => choice.costs.map(|c| c.plane),
        _ => None,
    };
    if !zs.is_empty() {
        for (name, z) in [
            ("nearest", zs[0]),
            ("median", zs[zs.len() / 2]),
            ("farthest", zs[zs.len() - 1]),
        ] {
            // Support half-widths on the foot row for a point on the axis at this depth.
            let b = p.nyquist_cosines();
            let rx = if b[0] >= 1.0 {
                f64::INFINITY
            } else {
                z * b[0] / (1.0 - b[0] * b[0]).sqrt()
            };
            let ry = if b[1] >= 1.0 {
                f64::INFINITY
            } else {
                z * b[1] / (1.0 - b[1] * b[1]).sqrt()
            };
            lines.push(format!(
                "support radius at {name} depth z = {:.3} mm: {:.3} mm in x, {:.3} mm in y (z tan theta_max, before the reference shifts it)",
                z * 1e3,
                rx * 1e3,
                ry * 1e3
            ));
        }
    }
    let unreachable = sum.unreachable();
    if unreachable > 0 {
        lines.push(format!("warning: {unreachable} emitter(s) lie outside the zone the plate can reproduce (no pixel passes the Nyquist test): they contribute nothing"));
    } else {
        lines.push("every emitter reaches the plate".into());
    }
    let updates = sum.estimate_updates(256);
    lines.push(format!(
        "work: about {:.3e} point-pixel updates ({:.1} per pixel on average)",
        updates,
        updates / p.pixels() as f64
    ));
    let est = point_sum_estimate(spec, sum, plane_cost);
    if let Some(o) = sum.occlusion() {
        lines.push(format!(
            "occlusion: visibility tested from the centre of each {} x {} px tile (a grid fixed in plate pixels): about {:.3e} tests; about {:.0} % of emitter-tile pairs visible (4000 sampled), so about {:.3e} updates",
            o.tile()[0],
            o.tile()[1],
            est.tests,
            est.visible_share * 100.0,
            updates * est.visible_share
        ));
    }
    let threads = rayon::current_num_threads();
    lines.push(format!(
        "time: about {} on {threads} thread(s) for the direct sum ({:.2} ns per update, {:.1} us per visibility test, {:.0} ns per pixel written, per thread, as measured on the development machine: see BENCHMARKS.md)",
        super::estimate::human(est.direct_seconds),
        est.per_update * 1e9,
        super::estimate::SECONDS_PER_VISIBILITY_TEST * 1e6,
        super::estimate::SECONDS_PER_PIXEL_WRITTEN * 1e9
    ));
    if let Some(plane_secs) = est.plane_seconds {
        lines.push(format!(
            "time: about {} on {threads} thread(s) for the recording plane, the path this job takes",
            super::estimate::human(plane_secs)
        ));
    }
    lines.extend(path_lines);
    lines.extend(why);
    let encoding = spec.encoding.resolve(|| 1.0);
    let layout = tiff_layout(spec, &encoding);
    let bytes = layout.estimated_file_bytes();
    lines.push(format!(
        "output: {} ({} encoding, {} bit, {}, {:.3} MB{}{})",
        spec.output.display(),
        encoding.kind_name(),
        encoding.bits_per_sample(),
        match spec.compression {
            crate::output::tiff::Compression::None => "uncompressed",
            crate::output::tiff::Compression::Deflate => "deflate",
        },
        bytes as f64 / 1e6,
        if matches!(spec.compression, crate::output::tiff::Compression::Deflate) {
            " at most"
        } else {
            ""
        },
        if layout.uses_bigtiff() {
            ", BigTIFF"
        } else {
            ""
        }
    ));
    lines.push(format!("sidecar: {}", sidecar_path(&spec.output).display()));
    Ok(PlanReport {
        lines,
        unreachable,
        updates,
        bytes,
    })
}
