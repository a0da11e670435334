//! Where a modulator pattern's light goes besides the design, for Fourier replays: the
//! undiffracted zero order (on the optical axis, sample floor(N/2); physics.md, "Replay
//! lattices"), the conjugate (twin) image point-mirrored through it, the panel's fill factor, and
//! the figures of a spot-list design read off the plate itself.
//!
//! Fill factor model (common practice for pixelated panels): a share F of each pixel's area
//! carries the pattern's transmittance t, the rest passes the light unmodulated (as phase 0; a
//! dead area with its own phase psi would give |F mean(t) + (1 - F) exp(i psi)|^2). The field is then
//! F t + (1 - F) plus the pixel grid's own orders; its zero order has amplitude F mean(t) + (1 - F)
//! (share |F mean(t) + 1 - F|^2 of the power) and every designed sample keeps F^2 of its power.

use num_complex::Complex64;
use serde::Serialize;

use crate::optics::Plate;
use crate::synthesis::spots::{Spot, SpotFactors, SpotFigures};

/// The zero order of a Fourier replay.
#[derive(Clone, Debug, Serialize)]
pub struct ZeroOrder {
    /// Replay sample of the optical axis [column, row].
    pub sample: [usize; 2],
    /// Share of the replayed power on that sample (|mean t|^2 for a unit-modulus pattern).
    pub share: f64,
    /// With the fill factor: the share of the incident power in the zero order.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub share_with_fill_factor: Option<f64>,
}

/// The conjugate of a region (the twin image).
#[derive(Clone, Debug, Serialize)]
pub struct Twin {
    /// The region [x, y, w, h] of the replay image the twin of `--region` falls on (samples
    /// point-mirrored through the axis; wrapped on the periodic lattice).
    pub mirrored_region: [usize; 4],
    /// Share of the replayed power in the region.
    pub region_share: f64,
    /// Share in the mirrored region.
    pub twin_share: f64,
}

/// Zero order and twin of one Fourier replay image (`intensity`, w x h, on the FFT lattice).
pub fn orders(
    w: usize,
    h: usize,
    intensity: &[f32],
    mean_t: Complex64,
    region: Option<[usize; 4]>,
    fill: Option<f64>,
) -> (ZeroOrder, Option<Twin>) {
    let total: f64 = intensity
        .iter()
        .map(|&v| f64::from(v))
        .sum::<f64>()
        .max(f64::MIN_POSITIVE);
    let (ac, ar) = (w / 2, h / 2);
    let zero = ZeroOrder {
        sample: [ac, ar],
        share: f64::from(intensity[ar * w + ac]) / total,
        share_with_fill_factor: fill.map(|f| (mean_t * f + (1.0 - f)).norm_sqr()),
    };
    let twin = region.map(|[rx, ry, rw, rh]| {
        let mirror = |c: usize, r: usize| ((2 * ac + w - c) % w, (2 * ar + h - r) % h);
        let (mut on, mut off) = (0.0, 0.0);
        for r in ry..(ry + rh).min(h) {
            for c in rx..(rx + rw).min(w) {
                on += f64::from(intensity[r * w + c]);
                let (mc, mr) = mirror(c, r);
                off += f64::from(intensity[mr * w + mc]);
            }
        }
        let (cw, ch) = ((rx + rw).min(w) - rx, (ry + rh).min(h) - ry);
        let (mc, mr) = mirror(rx + cw - 1, ry + ch - 1);
        Twin {
            mirrored_region: [mc, mr, cw, ch],
            region_share: on / total,
            twin_share: off / total,
        }
    });
    (zero, twin)
}

/// Figures of a spot-list plate read off its own samples.
#[derive(Clone, Debug, Serialize)]
pub struct SpotReplay {
    /// How they were computed.
    pub model: &'static str,
    /// Share of the panel's power in each spot (times F^2 with a fill factor).
    pub intensity: Vec<f64>,
    /// Sum of the intensities.
    pub efficiency: f64,
    /// 1 - (max - min) / (max + min) of intensity / weight.
    pub uniformity: f64,
    /// Share in each spot's conjugate (-x, -y, -z): the twin traps.
    pub twin_intensity: Vec<f64>,
}

/// The spots' figures of the plate's field `t` (unit-modulus samples of the whole plate).
pub fn spot_replay(
    plate: &Plate,
    focal: f64,
    spots: &[Spot],
    t: &[Complex64],
    fill: Option<f64>,
) -> SpotReplay {
    let scale = fill.map_or(1.0, |f| f * f);
    let at = |sp: &[Spot]| {
        let v = SpotFactors::new(plate, focal, sp).fields(t);
        SpotFigures::of(&v, sp)
    };
    let f = at(spots);
    let twins: Vec<Spot> = spots
        .iter()
        .map(|s| Spot {
            x: -s.x,
            y: -s.y,
            z: -s.z,
            ..*s
        })
        .collect();
    let tw = at(&twins);
    SpotReplay {
        model: "direct sum over the plate's samples of the paraxial far field at each spot, V_m = (1/N) sum_j t_j exp(-i D_jm) (Di Leonardo, Ianni and Ruocco, Optics Express 15, 1913, 2007, eq. 1)",
        intensity: f.intensity.iter().map(|i| i * scale).collect(),
        efficiency: f.efficiency * scale,
        uniformity: f.uniformity,
        twin_intensity: tw.intensity.iter().map(|i| i * scale).collect(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A binary phase grating (0, pi) puts no light in the zero order and as much in the twin as
    /// in the image (its orders +1 and -1 are equal: Goodman, Introduction to Fourier Optics,
    /// ch. 9); the mirrored region is the point reflection through sample floor(N/2).
    #[test]
    fn mirrored_region_and_zero_order() {
        let (w, h) = (8usize, 6usize);
        let mut i = vec![0.0f32; w * h];
        i[3 * w + 4] = 1.0; // axis
        i[3 * w + 6] = 2.0; // +2 samples right
        i[3 * w + 2] = 2.0; // its twin
        let (z, t) = orders(
            w,
            h,
            &i,
            Complex64::new(0.0, 0.0),
            Some([6, 3, 1, 1]),
            Some(0.9),
        );
        assert_eq!(z.sample, [4, 3]);
        assert!((z.share - 0.2).abs() < 1e-12);
        // Dead area 10 %: zero order (1 - F)^2 = 1 % of the incident power for mean(t) = 0.
        assert!((z.share_with_fill_factor.unwrap() - 0.01).abs() < 1e-12);
        let t = t.unwrap();
        assert_eq!(t.mirrored_region, [2, 3, 1, 1]);
        assert!((t.twin_share - 0.4).abs() < 1e-12 && (t.region_share - 0.4).abs() < 1e-12);
    }
}
