//! The state of one replay plane: target amplitudes, weights, the sums over a plane and the
//! constraint imposed on it.

use super::*;

/// Per-plane state: normalised target amplitude, signal mask and weights.
pub(super) struct PlaneState {
    /// sqrt(target), scaled so that its squares sum to 1 over the signal area.
    pub(super) amp: Vec<f64>,
    /// Signal window, or None for the whole plane.
    pub(super) window: Option<[usize; 4]>,
    /// Weighted-GS weights (lit pixels only carry meaning), normalised so sum (w A)^2 = 1.
    pub(super) weights: Vec<f64>,
}

impl PlaneState {
    /// The same state for the transposed layout of an `nx x ny` plane: line j is column j.
    pub(super) fn transposed(&self, nx: usize, ny: usize) -> PlaneState {
        let t = |v: &[f64]| {
            let mut out = vec![0.0; v.len()];
            crate::optics::fft2d::transpose_into(v, nx, 0, ny, &mut out, ny, 0, None);
            out
        };
        PlaneState {
            amp: t(&self.amp),
            window: self.window.map(|[x, y, w, h]| [y, x, h, w]),
            weights: t(&self.weights),
        }
    }
}

/// True when (row, col) is in the signal area: the window, or the whole plane without one.
#[inline]
pub(super) fn in_area(window: Option<[usize; 4]>, row: usize, col: usize) -> bool {
    match window {
        None => true,
        Some([x, y, w, h]) => col >= x && col < x + w && row >= y && row < y + h,
    }
}

/// Sums of one forward propagation, in f64.
#[derive(Clone, Copy, Default)]
pub(super) struct Stats {
    /// sum |U|^2 over the whole plane.
    p_all: f64,
    /// sum |U|^2 over the signal area.
    p_area: f64,
    /// sum |U| A over the signal area.
    cross: f64,
    /// sum |U| / A over the lit pixels.
    ratio_sum: f64,
    /// number of lit pixels.
    lit: f64,
}

impl Stats {
    pub(super) fn add(mut self, o: Stats) -> Stats {
        self.p_all += o.p_all;
        self.p_area += o.p_area;
        self.cross += o.cross;
        self.ratio_sum += o.ratio_sum;
        self.lit += o.lit;
        self
    }

    /// The error of the module docs (A has unit power over the area).
    pub(super) fn error(&self) -> f64 {
        if self.p_area <= 0.0 {
            return 1.0;
        }
        (2.0 - 2.0 * self.cross / self.p_area.sqrt())
            .max(0.0)
            .sqrt()
    }
}

/// Columns [a0, a1) of row `row` in the signal area (empty when the row misses the window).
pub(super) fn area_columns(window: Option<[usize; 4]>, row: usize, nx: usize) -> (usize, usize) {
    match window {
        None => (0, nx),
        Some([x, y, w, h]) if row >= y && row < y + h => (x.min(nx), (x + w).min(nx)),
        Some(_) => (0, 0),
    }
}

/// Sums of line `i` (length `len`) of a plane in the state's layout.
#[inline]
pub(super) fn line_stats(
    i: usize,
    row: &[Complex<f32>],
    st: &PlaneState,
    len: usize,
    isa: KernelIsa,
) -> Stats {
    let (a0, a1) = area_columns(st.window, i, len);
    let [p_all, p_area, cross, ratio_sum, lit] =
        kernels::stats_row(isa, row, &st.amp[i * len..(i + 1) * len], a0, a1);
    Stats {
        p_all,
        p_area,
        cross,
        ratio_sum,
        lit,
    }
}

pub(super) fn stats(field: &[Complex<f32>], st: &PlaneState, nx: usize, isa: KernelIsa) -> Stats {
    let rows: Vec<Stats> = field
        .par_chunks(nx)
        .enumerate()
        .map(|(i, row)| line_stats(i, row, st, nx, isa))
        .collect();
    rows.into_iter().fold(Stats::default(), Stats::add)
}

/// Per-line sums written by a propagation hook (one slot per line, so the sum over lines keeps
/// its order whatever the thread count).
pub(super) struct LineSums(Vec<std::sync::Mutex<Stats>>);

impl LineSums {
    pub(super) fn new(lines: usize) -> Self {
        LineSums((0..lines).map(|_| Default::default()).collect())
    }
    pub(super) fn set(&self, i: usize, s: Stats) {
        *self.0[i].lock().unwrap_or_else(|e| e.into_inner()) = s;
    }
    pub(super) fn total(&self) -> Stats {
        self.0
            .iter()
            .map(|m| *m.lock().unwrap_or_else(|e| e.into_inner()))
            .fold(Stats::default(), Stats::add)
    }
}

/// Updates the weighted-GS weights in place: `w <- w mean(r) / r`, then normalises so that
/// `sum (w A)^2 = 1`.
pub(super) fn update_weights(field: &[Complex<f32>], st: &mut PlaneState, s: &Stats, nx: usize) {
    if s.lit == 0.0 {
        return;
    }
    let mean = s.ratio_sum / s.lit;
    let floor = 1e-6 * mean;
    let amp = &st.amp;
    let rows: Vec<f64> = st
        .weights
        .par_chunks_mut(nx)
        .zip(field.par_chunks(nx))
        .zip(amp.par_chunks(nx))
        .map(|((w, row), amp)| {
            let mut acc = 0.0;
            for ((w, u), &a) in w.iter_mut().zip(row).zip(amp) {
                if a > 0.0 {
                    let (re, im) = (u.re as f64, u.im as f64);
                    let r = ((re * re + im * im).sqrt() / a).max(floor);
                    *w *= mean / r;
                    acc += (*w * a) * (*w * a);
                }
            }
            acc
        })
        .collect();
    let total: f64 = rows.iter().sum();
    if total > 0.0 && total.is_finite() {
        let k = 1.0 / total.sqrt();
        st.weights.par_iter_mut().for_each(|w| *w *= k);
    }
}

/// The replay-plane constraint of one iteration, from the plane's sums.
pub(super) struct Constraint {
    weighted: bool,
    /// sqrt(P) (times the mix): the target amplitude's scale inside the signal area.
    scale: f64,
    /// Factor of the free field outside the area (mixed region only).
    outside: f32,
}

impl Constraint {
    pub(super) fn new(s: &Stats, alg: &Algorithm) -> Self {
        let mix = match alg {
            Algorithm::MixedRegion { mix, .. } => Some(*mix),
            _ => None,
        };
        // Inside the signal area: target amplitude sqrt(P) a (w) (mix), the field's phase kept.
        // Outside it (mixed region only): the field kept, scaled by 1 - mix.
        Constraint {
            weighted: matches!(alg, Algorithm::WeightedGs),
            scale: s.p_all.sqrt() * mix.unwrap_or(1.0),
            outside: (1.0 - mix.unwrap_or(0.0)) as f32,
        }
    }

    /// Imposes the constraint on line `i` (length `len`) of a plane in the state's layout.
    #[inline]
    pub(super) fn line(
        &self,
        i: usize,
        row: &mut [Complex<f32>],
        st: &PlaneState,
        len: usize,
        isa: KernelIsa,
    ) {
        let (a0, a1) = area_columns(st.window, i, len);
        let span = i * len..(i + 1) * len;
        let w = self.weighted.then(|| &st.weights[span.clone()]);
        kernels::constrain_row(isa, row, &st.amp[span], w, self.scale, a0, a1, self.outside);
    }
}

/// Imposes the replay-plane constraint on `field` in place.
pub(super) fn constrain(
    field: &mut [Complex<f32>],
    st: &PlaneState,
    s: &Stats,
    alg: &Algorithm,
    nx: usize,
    isa: KernelIsa,
) {
    let c = Constraint::new(s, alg);
    field
        .par_chunks_mut(nx)
        .enumerate()
        .for_each(|(i, row)| c.line(i, row, st, nx, isa));
}
