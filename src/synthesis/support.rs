//! Where an emitter may contribute: the anti-aliasing support.
//!
//! The local spatial frequency of F = O conj(R) from emitter j at a pixel is
//! (d_j - d_R) / lambda, where d_j is the direction of the emitter's wave at the pixel,
//! (x - x_j, y - y_j) / r_j for exact waves and (x - x_j, y - y_j) / z_j for Fresnel waves (the
//! derivative of the phase actually computed), and d_R the direction of the reference there.
//! The pixel grid holds it when |lambda f| <= lambda / (2 p) on each axis (physics.md, Sampling limits).
//!
//! [`in_support`] is the exact per-pixel test. The other functions give *conservative* bounds
//! (a superset of the pixels that pass the test) used to skip work: the y-extent of an emitter on the
//! whole plate and its column span on one row. The kernels always apply the exact test inside the
//! spans, so the bounds only need to be supersets.

use super::{Approximation, Emitter};
use crate::optics::Plate;

/// Exact test: `dir` is the emitter's wave direction at the pixel, `dref` the reference's,
/// `half_band` = lambda / (2 p) per axis.
#[inline(always)]
pub fn in_support(dir: [f64; 2], dref: [f64; 2], half_band: [f64; 2]) -> bool {
    (dir[0] - dref[0]).abs() <= half_band[0] && (dir[1] - dref[1]).abs() <= half_band[1]
}

/// The window of emitter directions that pass the test somewhere in a region where the reference
/// directions lie in `sx_ref` x `sy_ref`: `([lo, hi], [lo, hi])`.
pub fn direction_window(
    sx_ref: [f64; 2],
    sy_ref: [f64; 2],
    half_band: [f64; 2],
) -> ([f64; 2], [f64; 2]) {
    (
        [sx_ref[0] - half_band[0], sx_ref[1] + half_band[0]],
        [sy_ref[0] - half_band[1], sy_ref[1] + half_band[1]],
    )
}

/// Conservative range of v = y - y_j (metres) over which an emitter at depth z can pass the test,
/// given the direction window. Returns None when no direction of the window is possible.
pub fn y_offset_extent(
    z: f64,
    wx: [f64; 2],
    wy: [f64; 2],
    approx: Approximation,
) -> Option<[f64; 2]> {
    match approx {
        Approximation::Fresnel => {
            (wx[0] <= wx[1] && wy[0] <= wy[1]).then(|| [z * wy[0], z * wy[1]])
        }
        Approximation::Exact => {
            // Directions of a real wave lie in the unit disc; v = z sy / sqrt(1 - sx^2 - sy^2).
            let (ax, bx) = (wx[0].max(-1.0), wx[1].min(1.0));
            let (ay, by) = (wy[0].max(-1.0), wy[1].min(1.0));
            if ax > bx || ay > by {
                return None;
            }
            let sx2_max = (ax * ax).max(bx * bx);
            let sx2_min = if ax <= 0.0 && bx >= 0.0 {
                0.0
            } else {
                (ax * ax).min(bx * bx)
            };
            // v is increasing in sy; at fixed sy its magnitude grows with sx^2.
            let v_at = |sy: f64, sx2: f64, unbounded: f64| {
                let den = 1.0 - sx2 - sy * sy;
                if den <= 1e-12 {
                    unbounded
                } else {
                    z * sy / den.sqrt()
                }
            };
            let vmax = v_at(by, if by > 0.0 { sx2_max } else { sx2_min }, f64::INFINITY);
            let vmin = v_at(
                ay,
                if ay < 0.0 { sx2_max } else { sx2_min },
                f64::NEG_INFINITY,
            );
            Some([vmin, vmax])
        }
    }
}

/// Conservative range of u = x - x_j (metres) on a row at offset `dy` = y - y_j where the emitter
/// can pass the test, given the direction window. None when empty.
pub fn row_offset_span(
    dy: f64,
    z: f64,
    wx: [f64; 2],
    wy: [f64; 2],
    approx: Approximation,
) -> Option<[f64; 2]> {
    match approx {
        Approximation::Fresnel => {
            let sy = dy / z;
            if sy < wy[0] || sy > wy[1] || wx[0] > wx[1] {
                return None;
            }
            Some([z * wx[0], z * wx[1]])
        }
        Approximation::Exact => {
            let d2 = dy * dy + z * z;
            let d = d2.sqrt();
            // x: u / sqrt(u^2 + d^2) in [wx0, wx1], increasing in u.
            let solve = |s: f64| {
                if s <= -1.0 {
                    f64::NEG_INFINITY
                } else if s >= 1.0 {
                    f64::INFINITY
                } else {
                    s * d / (1.0 - s * s).sqrt()
                }
            };
            if wx[0] >= 1.0 || wx[1] <= -1.0 || wx[0] > wx[1] {
                return None;
            }
            let (mut lo, mut hi) = (solve(wx[0]), solve(wx[1]));
            // y: h = dy / sqrt(u^2 + d^2) in [wy0, wy1]; |h| is largest at u = 0 and falls with |u|.
            // Keep the hull |u| <= cap of the allowed set.
            let cap = if dy > 0.0 {
                if wy[1] <= 0.0 {
                    return None;
                }
                if wy[0] <= 0.0 {
                    f64::INFINITY
                } else {
                    let q = (dy / wy[0]).powi(2) - d2;
                    if q < 0.0 {
                        return None;
                    }
                    q.sqrt()
                }
            } else if dy < 0.0 {
                if wy[0] >= 0.0 {
                    return None;
                }
                if wy[1] >= 0.0 {
                    f64::INFINITY
                } else {
                    let q = (dy / wy[1]).powi(2) - d2;
                    if q < 0.0 {
                        return None;
                    }
                    q.sqrt()
                }
            } else {
                if wy[0] > 0.0 || wy[1] < 0.0 {
                    return None;
                }
                f64::INFINITY
            };
            lo = lo.max(-cap);
            hi = hi.min(cap);
            (lo <= hi).then_some([lo, hi])
        }
    }
}

/// Exact test only: the half-width `hole` of the offsets |u| < hole on a row at offset `dy` where
/// the y test surely fails. Off the foot row, dy / sqrt(u^2 + dy^2 + z^2) is largest in magnitude
/// at u = 0 and falls as |u| grows, so where it exceeds the window at u = 0 the support splits into
/// two intervals either side of the foot point. A subset of the failing set (rounded inwards by a
/// relative 1e-9); None when there is no hole (or the approximation is Fresnel, whose y test takes
/// whole rows).
pub fn row_offset_hole(dy: f64, z: f64, wy: [f64; 2], approx: Approximation) -> Option<f64> {
    if approx != Approximation::Exact {
        return None;
    }
    // The bound the value dy / r must not pass: wy1 above the row's foot, wy0 below it.
    let limit = if dy > 0.0 && wy[1] > 0.0 {
        dy / wy[1]
    } else if dy < 0.0 && wy[0] < 0.0 {
        dy / wy[0]
    } else {
        return None;
    };
    // |dy| / r > |limit bound| <=> r < limit <=> u^2 < limit^2 - dy^2 - z^2.
    let q = limit * limit - dy * dy - z * z;
    (q > 0.0).then(|| q.sqrt() * (1.0 - 1e-9))
}

/// Columns [start, end) of `plate` that lie wholly inside the hole of [`row_offset_hole`] on the
/// row at height `y` (one pixel of slack on each side), if any.
pub fn row_hole_columns(
    plate: &Plate,
    e: &Emitter,
    y: f64,
    wy: [f64; 2],
    approx: Approximation,
) -> Option<(usize, usize)> {
    let h = row_offset_hole(y - e.pos[1], e.pos[2], wy, approx)?;
    let c0 = (plate.col_of_x(e.pos[0] - h).floor() + 1.0).max(0.0);
    let c1 = (plate.col_of_x(e.pos[0] + h).ceil() - 1.0).min(plate.width as f64 - 1.0);
    (c0 <= c1).then(|| (c0 as usize, c1 as usize + 1))
}

/// Columns [start, end) of `plate` that may hold the emitter's support on the row at height `y`,
/// with one pixel of slack on each side; None when empty.
pub fn row_columns(
    plate: &Plate,
    e: &Emitter,
    y: f64,
    wx: [f64; 2],
    wy: [f64; 2],
    approx: Approximation,
) -> Option<(usize, usize)> {
    let [ulo, uhi] = row_offset_span(y - e.pos[1], e.pos[2], wx, wy, approx)?;
    let c0 = (plate.col_of_x(e.pos[0] + ulo).ceil() - 1.0).max(0.0);
    let c1 = (plate.col_of_x(e.pos[0] + uhi).floor() + 1.0).min(plate.width as f64 - 1.0);
    if !(c0 <= c1) {
        return None;
    }
    Some((c0 as usize, c1 as usize + 1))
}

/// Rows [start, end) of `plate` that may hold the emitter's support anywhere, with one row of slack.
pub fn plate_rows(
    plate: &Plate,
    e: &Emitter,
    wx: [f64; 2],
    wy: [f64; 2],
    approx: Approximation,
) -> Option<(usize, usize)> {
    let [vlo, vhi] = y_offset_extent(e.pos[2], wx, wy, approx)?;
    // Row index decreases as y grows.
    let r0 = (plate.row_of_y(e.pos[1] + vhi).ceil() - 1.0).max(0.0);
    let r1 = (plate.row_of_y(e.pos[1] + vlo).floor() + 1.0).min(plate.height as f64 - 1.0);
    if !(r0 <= r1) {
        return None;
    }
    Some((r0 as usize, r1 as usize + 1))
}

#[cfg(test)]
mod unit_tests {
    use super::*;

    fn dir(u: f64, v: f64, z: f64, approx: Approximation) -> [f64; 2] {
        match approx {
            Approximation::Exact => {
                let r = (u * u + v * v + z * z).sqrt();
                [u / r, v / r]
            }
            Approximation::Fresnel => [u / z, v / z],
        }
    }

    /// The bounds must contain every offset that passes the exact test (brute force on a grid).
    #[test]
    fn bounds_are_supersets_of_the_exact_support() {
        let z = 1.0;
        let windows = [
            ([-0.3, 0.3], [-0.3, 0.3]),
            ([0.1, 0.6], [-0.2, 0.05]),
            ([-0.9, -0.5], [0.4, 0.7]),
            ([-2.0, 2.0], [-0.2, 0.2]),
            ([0.2, 0.25], [-1.5, -0.1]),
        ];
        for approx in [Approximation::Exact, Approximation::Fresnel] {
            for (wx, wy) in windows {
                let ext = y_offset_extent(z, wx, wy, approx);
                for iv in -300..=300 {
                    let v = iv as f64 * 0.01;
                    let span = row_offset_span(v, z, wx, wy, approx);
                    for iu in -300..=300 {
                        let u = iu as f64 * 0.01;
                        let d = dir(u, v, z, approx);
                        let inside =
                            d[0] >= wx[0] && d[0] <= wx[1] && d[1] >= wy[0] && d[1] <= wy[1];
                        if inside {
                            let s = span.unwrap_or_else(|| {
                                panic!("{approx:?} {wx:?} {wy:?} u={u} v={v}: no span")
                            });
                            assert!(
                                u >= s[0] - 1e-9 && u <= s[1] + 1e-9,
                                "{approx:?} u={u} v={v} span {s:?}"
                            );
                            let e = ext.unwrap();
                            assert!(
                                v >= e[0] - 1e-9 && v <= e[1] + 1e-9,
                                "{approx:?} v={v} extent {e:?}"
                            );
                        }
                    }
                }
            }
        }
    }

    /// Offsets inside the hole fail the exact test (brute force on a grid), and the hole is not
    /// trivially small where the geometry makes one: rows beyond the foot row's reach.
    #[test]
    fn holes_hold_only_failing_offsets() {
        let z = 1.0;
        let windows = [
            [-0.3, 0.3],
            [-0.2, 0.05],
            [0.4, 0.7],
            [-0.7, -0.4],
            [-1.5, -0.1],
        ];
        let mut holes = 0;
        for wy in windows {
            for iv in -300..=300 {
                let v = iv as f64 * 0.01;
                let Some(h) = row_offset_hole(v, z, wy, Approximation::Exact) else {
                    continue;
                };
                holes += 1;
                for iu in -300..=300 {
                    let u = iu as f64 * 0.01;
                    let sy = dir(u, v, z, Approximation::Exact)[1];
                    if u.abs() < h {
                        assert!(sy < wy[0] || sy > wy[1], "{wy:?} u={u} v={v} hole {h}");
                    }
                }
            }
        }
        assert!(holes > 500, "only {holes} rows with a hole");
        // On axis, window +-0.3: at v = 2 z the hole is |u| < sqrt((v / 0.3)^2 - v^2 - z^2).
        let h = row_offset_hole(2.0, 1.0, [-0.3, 0.3], Approximation::Exact).unwrap();
        assert!((h - ((2.0f64 / 0.3).powi(2) - 5.0).sqrt()).abs() < 1e-8);
        assert!(row_offset_hole(0.2, 1.0, [-0.3, 0.3], Approximation::Exact).is_none());
        assert!(row_offset_hole(2.0, 1.0, [-0.3, 0.3], Approximation::Fresnel).is_none());
    }

    /// For a plane reference at normal incidence the x-span on the foot row is exactly
    /// |u| <= z tan(theta_max) (physics.md: support about z tan theta_max around the foot point).
    #[test]
    fn foot_row_span_is_z_tan_theta() {
        let b = 0.25f64;
        let s = row_offset_span(0.0, 2.0, [-b, b], [-b, b], Approximation::Exact).unwrap();
        let expect = 2.0 * b.asin().tan();
        assert!((s[1] - expect).abs() < 1e-12 && (s[0] + expect).abs() < 1e-12);
    }
}
