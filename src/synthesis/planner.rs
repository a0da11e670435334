//! Which path computes a point sum: the decision as a plain recipe (testable without building
//! anything, as `optics::propagation::PropagationRecipe` is), and the source it leads to.

use super::point_sum::PointSum;
use super::recording_plane::RecordingPlane;
use super::source::FringeSource;
use super::{Approximation, Precision};

/// How a point sum is computed (`[synthesis] path`).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum SumPath {
    /// Every emitter summed on the plate itself.
    Direct,
    /// Emitters summed on a recording plane near them, carried to the plate by an FFT step.
    RecordingPlane,
    /// Meshes sliced in depth and carried to the plate by angular-spectrum steps
    /// ([`super::layers`]); not a point sum: the job builds it from its meshes.
    Layers,
    /// The cheaper of the two by the estimates `plan` prints.
    Auto,
}

/// Rough cost weights, in units of one f64 exact update, measured on the benchmark machine
/// (BENCHMARKS.md): an f32 exact update, and one element of one radix-2 pass of a complex f64 FFT.
pub const F32_UPDATE_WEIGHT: f64 = 0.3;
/// See [`F32_UPDATE_WEIGHT`].
pub const FFT_PASS_WEIGHT: f64 = 0.27;
/// `auto` takes the recording plane only when its estimate is this many times below the direct
/// one: the estimate counts the updates inside the supports, while the kernels also walk the
/// slack of the per-row spans (about 6x for emitters 0.25-0.75 mm from the plane in the test
/// scene of BENCHMARKS.md, where the estimate said 2.8x and the run gave 1.6x).
pub const AUTO_PLANE_MARGIN: f64 = 2.0;

/// The decision.
#[derive(Clone, Debug, PartialEq)]
pub enum SumRecipe {
    /// The direct sum, and why.
    Direct(DirectBecause),
    /// The recording plane.
    RecordingPlane,
}

/// Why the direct sum was taken.
#[derive(Clone, Debug, PartialEq)]
pub enum DirectBecause {
    /// The job asks for it.
    Asked,
    /// The recording plane does not apply to the job (the reason).
    PlaneNotApplicable(String),
    /// `auto`: the plane's estimate is not [`AUTO_PLANE_MARGIN`] times below the direct one.
    Cheaper,
}

/// Costs of the two paths, in f64 exact updates.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct PathCosts {
    /// The direct sum.
    pub direct: f64,
    /// The recording plane.
    pub plane: f64,
}

/// Picks the path. `plane` is the recording plane's cost, or why it does not apply. Errors
/// when the job asks for the recording plane and it does not apply.
pub fn choose(ask: SumPath, plane: Result<PathCosts, String>) -> Result<SumRecipe, String> {
    match (ask, plane) {
        (SumPath::Direct, _) => Ok(SumRecipe::Direct(DirectBecause::Asked)),
        (SumPath::Layers, _) => Err(
            "[synthesis] path = \"layers\" slices the meshes themselves: it is not a path of the point sum".into(),
        ),
        (SumPath::RecordingPlane, Err(why)) => {
            Err(format!("[synthesis] path = \"recording-plane\": {why}"))
        }
        (SumPath::RecordingPlane, Ok(_)) => Ok(SumRecipe::RecordingPlane),
        (SumPath::Auto, Err(why)) => Ok(SumRecipe::Direct(DirectBecause::PlaneNotApplicable(why))),
        (SumPath::Auto, Ok(c)) => Ok(if c.plane * AUTO_PLANE_MARGIN < c.direct {
            SumRecipe::RecordingPlane
        } else {
            SumRecipe::Direct(DirectBecause::Cheaper)
        }),
    }
}

/// What `path = "auto"` takes for a job the layers path can also compute.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum AutoChoice {
    /// The point sum (direct or recording plane, as [`choose_path`] decides).
    PointSum,
    /// The layers path.
    Layers,
}

/// `auto` between the point sum (its estimated seconds, or why it cannot run: too many emitters,
/// say) and the layers path (its estimated seconds, or why it does not apply): the faster of those
/// that can run, the point sum on a tie; with a line for `plan` saying why. Errors with the point
/// sum's reason when neither can run.
pub fn choose_layers(
    point: Result<f64, String>,
    layers: Result<f64, String>,
) -> Result<(AutoChoice, String), String> {
    let h = |s: f64| format!("{s:.1} s");
    match (point, layers) {
        (Ok(p), Ok(l)) if l < p => Ok((
            AutoChoice::Layers,
            format!(
                "auto: layers ({}) is faster than the point sum ({})",
                h(l),
                h(p)
            ),
        )),
        (Ok(p), Ok(l)) => Ok((
            AutoChoice::PointSum,
            format!(
                "auto: the point sum ({}) is not slower than layers ({})",
                h(p),
                h(l)
            ),
        )),
        (Err(why), Ok(l)) => Ok((
            AutoChoice::Layers,
            format!(
                "auto: layers ({}), since the point sum cannot run: {why}",
                h(l)
            ),
        )),
        (Ok(p), Err(why)) => Ok((
            AutoChoice::PointSum,
            format!(
                "auto: the point sum ({}); layers does not apply: {why}",
                h(p)
            ),
        )),
        (Err(why), Err(_)) => Err(why),
    }
}

/// The path chosen for a point sum, with the recording plane when it was built, and lines for
/// `plan` (costs and choice).
pub struct PathChoice {
    /// The decision.
    pub recipe: SumRecipe,
    /// The recording plane, when the recipe takes it.
    pub plane: Option<RecordingPlane>,
    /// What `plan` prints about the choice.
    pub lines: Vec<String>,
    /// Both paths' costs, when the recording plane applies.
    pub costs: Option<PathCosts>,
}

impl PathChoice {
    /// The source the choice leads to: the recording plane, or the direct sum itself.
    pub fn into_source(self, sum: PointSum) -> Box<dyn FringeSource> {
        match self.plane {
            Some(p) => Box::new(p.with_unreachable(sum.unreachable())),
            None => Box::new(sum),
        }
    }
}

/// Chooses the path of a prepared direct sum (`[synthesis] path = ask`), building the recording
/// plane where it applies and is asked for or cheaper.
pub fn choose_path(
    sum: &PointSum,
    ask: SumPath,
    plane_gap: Option<f64>,
) -> Result<PathChoice, String> {
    let mut lines = Vec::new();
    let opts = *sum.options();
    let plane = if ask == SumPath::Direct {
        Err(String::new())
    } else {
        match sum.single_channel() {
            Some((reference, emitters)) => {
                RecordingPlane::new(*sum.plate(), reference, emitters.to_vec(), opts, plane_gap)
            }
            None => Err("the recording plane takes one reference and no occlusion".to_string()),
        }
    };
    let unit = if opts.precision == Precision::F32 && opts.approximation == Approximation::Exact {
        F32_UPDATE_WEIGHT
    } else {
        1.0
    };
    let costs = plane.as_ref().map_err(String::clone).map(|p| {
        // The plane's updates run in the precision the job asks for too (soft edges in f32 since
        // the per-pixel f32 path takes them).
        let c = PathCosts {
            direct: sum.estimate_updates(64) * unit,
            plane: p.estimate_cost(unit, FFT_PASS_WEIGHT),
        };
        lines.push(format!(
            "estimated cost in f64 exact update equivalents (one {} {} update counts {unit}): direct {:.3e}, recording plane {:.3e} (plane {:.3} mm from the plate, grid margins {} x {} px, bands of {} rows)",
            opts.precision.name(),
            opts.approximation.name(),
            c.direct,
            c.plane,
            p.distance() * 1e3,
            p.margins()[0],
            p.margins()[1],
            p.band_rows()
        ));
        c
    });
    let recipe = choose(ask, costs.clone())?;
    lines.push(match &recipe {
        SumRecipe::Direct(DirectBecause::Asked) => "path: direct point sum".into(),
        SumRecipe::Direct(DirectBecause::PlaneNotApplicable(why)) => {
            format!("path: direct point sum (recording plane not applicable: {why})")
        }
        SumRecipe::Direct(DirectBecause::Cheaper) => {
            "path: direct point sum (auto takes the recording plane below half the direct estimate)"
                .into()
        }
        SumRecipe::RecordingPlane => "path: recording plane".into(),
    });
    let plane = match recipe {
        SumRecipe::RecordingPlane => plane.ok(),
        SumRecipe::Direct(_) => None,
    };
    Ok(PathChoice {
        recipe,
        plane,
        lines,
        costs: costs.ok(),
    })
}

#[cfg(test)]
mod unit_tests {
    use super::*;

    #[test]
    fn recipe_follows_the_request_and_the_margin() {
        let c = |direct, plane| Ok(PathCosts { direct, plane });
        assert_eq!(
            choose(SumPath::Direct, c(1.0, 0.001)),
            Ok(SumRecipe::Direct(DirectBecause::Asked))
        );
        assert_eq!(
            choose(SumPath::RecordingPlane, c(1.0, 100.0)),
            Ok(SumRecipe::RecordingPlane)
        );
        let e = choose(SumPath::RecordingPlane, Err("occlusion".into())).unwrap_err();
        assert!(
            e.contains("recording-plane") && e.contains("occlusion"),
            "{e}"
        );
        // auto: the plane only below half the direct estimate.
        assert_eq!(
            choose(SumPath::Auto, c(10.0, 4.9)),
            Ok(SumRecipe::RecordingPlane)
        );
        assert_eq!(
            choose(SumPath::Auto, c(10.0, 5.0)),
            Ok(SumRecipe::Direct(DirectBecause::Cheaper))
        );
        assert_eq!(
            choose_layers(Ok(10.0), Ok(9.0)).unwrap().0,
            AutoChoice::Layers
        );
        assert_eq!(
            choose_layers(Ok(10.0), Ok(10.0)).unwrap().0,
            AutoChoice::PointSum
        );
        let (c, why) = choose_layers(Err("too many emitters".into()), Ok(1e4)).unwrap();
        assert!(
            c == AutoChoice::Layers && why.contains("too many emitters"),
            "{why}"
        );
        let (c, why) = choose_layers(Ok(1e4), Err("a point cloud".into())).unwrap();
        assert!(
            c == AutoChoice::PointSum && why.contains("a point cloud"),
            "{why}"
        );
        assert_eq!(
            choose_layers(Err("bad file".into()), Err("bad file too".into())),
            Err("bad file".into())
        );
        assert_eq!(
            choose(SumPath::Auto, Err("two references".into())),
            Ok(SumRecipe::Direct(DirectBecause::PlaneNotApplicable(
                "two references".into()
            )))
        );
    }
}
