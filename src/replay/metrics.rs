//! What a replay reports: intensity images as PNG and numbers about them (power in a region,
//! peaks, uniformity and speckle contrast, agreement with a target image).

use std::path::Path;

use ndarray::{s, ArrayView2};
use serde::Serialize;

use crate::error::{Error, Result};

/// How intensities map to grey levels.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum ToneScale {
    /// I / Imax.
    Linear,
    /// (I / Imax)^(1/2.2).
    Gamma,
    /// log10(1 + 1000 I / Imax) / 3: three decades.
    Log,
}

impl ToneScale {
    /// Parses linear | gamma | log.
    pub fn parse(s: &str) -> std::result::Result<Self, String> {
        match s {
            "linear" => Ok(ToneScale::Linear),
            "gamma" => Ok(ToneScale::Gamma),
            "log" => Ok(ToneScale::Log),
            _ => Err(format!("'{s}': expected linear, gamma or log")),
        }
    }
}

/// Writes an intensity image as an 8- or 16-bit grey PNG (through a temporary name).
pub fn write_png(
    path: &Path,
    w: usize,
    h: usize,
    intensity: &[f32],
    scale: ToneScale,
    bits: u8,
) -> Result<()> {
    let max = intensity
        .iter()
        .cloned()
        .fold(0.0f32, f32::max)
        .max(f32::MIN_POSITIVE) as f64;
    let top = if bits == 16 { 65535.0 } else { 255.0 };
    let v = |i: f32| {
        let x = i as f64 / max;
        let y = match scale {
            ToneScale::Linear => x,
            ToneScale::Gamma => x.powf(1.0 / 2.2),
            ToneScale::Log => (1.0 + 1000.0 * x).log10() / 3.0,
        };
        (y.clamp(0.0, 1.0) * top).round()
    };
    let data: Vec<u8> = if bits == 16 {
        intensity
            .iter()
            .flat_map(|&i| (v(i) as u16).to_be_bytes())
            .collect()
    } else {
        intensity.iter().map(|&i| v(i) as u8).collect()
    };
    let mut buf = Vec::new();
    {
        let mut enc = png::Encoder::new(&mut buf, w as u32, h as u32);
        enc.set_color(png::ColorType::Grayscale);
        enc.set_depth(if bits == 16 {
            png::BitDepth::Sixteen
        } else {
            png::BitDepth::Eight
        });
        let mut wr = enc
            .write_header()
            .map_err(|e| Error::input(path, e.to_string()))?;
        wr.write_image_data(&data)
            .map_err(|e| Error::input(path, e.to_string()))?;
    }
    crate::output::atomic::write_atomically(path, &buf)
}

/// A pixel rectangle of the replay image: first column, first row, width, height.
pub type Region = [usize; 4];

/// A local maximum of the intensity.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct Peak {
    /// Column and row in the image.
    pub col: usize,
    /// Row (0 on top).
    pub row: usize,
    /// x, y in plate coordinates, millimetres.
    pub x_mm: f64,
    /// y (up), millimetres.
    pub y_mm: f64,
    /// Intensity relative to the brightest pixel.
    pub relative: f64,
}

/// Statistics of intensities inside a region.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct RegionStats {
    /// The region.
    pub region: Region,
    /// Share of the image's total power inside it.
    pub power_fraction: f64,
    /// min / max of the intensity inside.
    pub min_over_max: f64,
    /// Standard deviation / mean of the intensity inside (speckle contrast).
    pub speckle_contrast: f64,
}

/// Agreement with a target image of the same size.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct TargetStats {
    /// Pearson correlation of the intensities (inside the region when one is given).
    pub correlation: f64,
    /// RMS difference after scaling both to unit mean (inside the region when given).
    pub rmse: f64,
}

/// Local maxima (strictly above their 8 neighbours' maximum or equal to it and first), at least
/// `min_relative` of the brightest pixel, brightest first, at most `n`.
pub fn peaks(
    w: usize,
    h: usize,
    i: &[f32],
    n: usize,
    min_relative: f64,
) -> Vec<(usize, usize, f64)> {
    let max = i.iter().cloned().fold(0.0f32, f32::max) as f64;
    if max <= 0.0 {
        return Vec::new();
    }
    let mut found = Vec::new();
    for r in 0..h {
        for c in 0..w {
            let v = i[r * w + c];
            if (v as f64) < min_relative * max {
                continue;
            }
            let mut is_max = true;
            'n: for dr in -1i64..=1 {
                for dc in -1i64..=1 {
                    if dr == 0 && dc == 0 {
                        continue;
                    }
                    let (rr, cc) = (r as i64 + dr, c as i64 + dc);
                    if rr < 0 || cc < 0 || rr >= h as i64 || cc >= w as i64 {
                        continue;
                    }
                    let u = i[rr as usize * w + cc as usize];
                    // Ties: the first in row-major order wins.
                    if u > v || (u == v && (dr < 0 || (dr == 0 && dc < 0))) {
                        is_max = false;
                        break 'n;
                    }
                }
            }
            if is_max {
                found.push((c, r, v as f64 / max));
            }
        }
    }
    found.sort_by(|a, b| b.2.total_cmp(&a.2));
    found.truncate(n);
    found
}

/// A row-major w x h image as a 2-D view (rows, columns).
///
/// # Panics
/// If the slice does not hold w x h values.
fn image_view<T>(w: usize, h: usize, v: &[T]) -> ArrayView2<'_, T> {
    ArrayView2::from_shape((h, w), v).expect("image of w x h values")
}

/// Power fraction, min/max and speckle contrast inside `region`.
pub fn region_stats(
    w: usize,
    h: usize,
    i: &[f32],
    region: Region,
) -> std::result::Result<RegionStats, String> {
    let [x, y, rw, rh] = region;
    if rw == 0 || rh == 0 || x + rw > w || y + rh > h {
        return Err(format!(
            "region {x},{y},{rw},{rh} leaves the {w} x {h} replay image"
        ));
    }
    let total: f64 = i.iter().map(|&v| v as f64).sum();
    let (mut s, mut s2, mut mn, mut mx) = (0.0f64, 0.0f64, f64::INFINITY, 0.0f64);
    for &v in image_view(w, h, i).slice(s![y..y + rh, x..x + rw]) {
        let v = v as f64;
        s += v;
        s2 += v * v;
        mn = mn.min(v);
        mx = mx.max(v);
    }
    let n = (rw * rh) as f64;
    let mean = s / n;
    let var = (s2 / n - mean * mean).max(0.0);
    Ok(RegionStats {
        region,
        power_fraction: if total > 0.0 { s / total } else { 0.0 },
        min_over_max: if mx > 0.0 { mn / mx } else { 0.0 },
        speckle_contrast: if mean > 0.0 { var.sqrt() / mean } else { 0.0 },
    })
}

/// Correlation and RMSE of `i` against `target` (same size), over `region` or the whole image.
pub fn compare(
    w: usize,
    h: usize,
    i: &[f32],
    target: &[f64],
    region: Option<Region>,
) -> TargetStats {
    let [x, y, rw, rh] = region.unwrap_or([0, 0, w, h]);
    let window = s![y..y + rh, x..x + rw];
    let a: Vec<f64> = image_view(w, h, i)
        .slice(window)
        .iter()
        .map(|&v| v as f64)
        .collect();
    let b: Vec<f64> = image_view(w, h, target)
        .slice(window)
        .iter()
        .copied()
        .collect();
    let n = a.len() as f64;
    let (ma, mb) = (a.iter().sum::<f64>() / n, b.iter().sum::<f64>() / n);
    let (mut sab, mut saa, mut sbb, mut se) = (0.0, 0.0, 0.0, 0.0);
    for (u, v) in a.iter().zip(&b) {
        sab += (u - ma) * (v - mb);
        saa += (u - ma) * (u - ma);
        sbb += (v - mb) * (v - mb);
        if ma > 0.0 && mb > 0.0 {
            se += (u / ma - v / mb).powi(2);
        }
    }
    TargetStats {
        correlation: if saa > 0.0 && sbb > 0.0 {
            sab / (saa * sbb).sqrt()
        } else {
            0.0
        },
        rmse: (se / n).sqrt(),
    }
}

#[cfg(test)]
mod unit_tests {
    use super::*;

    #[test]
    fn peaks_and_region_and_compare() {
        let (w, h) = (8, 6);
        let mut i = vec![0.1f32; w * h];
        i[2 * w + 3] = 5.0;
        i[4 * w + 6] = 2.5;
        let p = peaks(w, h, &i, 5, 0.1);
        assert_eq!(p, vec![(3, 2, 1.0), (6, 4, 0.5)]);
        let s = region_stats(w, h, &i, [2, 1, 3, 3]).unwrap();
        let total: f64 = i.iter().map(|&v| v as f64).sum();
        assert!((s.power_fraction - (5.0 + 8.0 * 0.1) / total).abs() < 1e-6);
        assert!((s.min_over_max - 0.02).abs() < 1e-6);
        assert!(region_stats(w, h, &i, [6, 0, 3, 1]).is_err());
        let t: Vec<f64> = i.iter().map(|&v| 2.0 * v as f64).collect();
        let c = compare(w, h, &i, &t, None);
        assert!((c.correlation - 1.0).abs() < 1e-9 && c.rmse < 1e-6);
    }
}

/// One spot of a spot target, as replayed.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct SpotReading {
    /// Column of the spot in the replay image (and the target).
    pub col: usize,
    /// Row of the spot.
    pub row: usize,
    /// The target's value there (its designed weight), 0..1.
    pub target: f64,
    /// Replayed intensity at the spot sample, divided by the target weight.
    pub intensity: f64,
    /// `intensity` over the mean of all spots.
    pub relative: f64,
}

/// Spot-array figures (Di Leonardo, Ianni and Ruocco, Optics Express 15, 1913, 2007): intensity
/// I_m at each designed spot sample (divided by the spot's target weight), efficiency
/// sum I_m / total power, and the spread (I_max - I_min) / (I_max + I_min), whose complement
/// 1 - spread is the paper's uniformity u.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct SpotStats {
    /// Number of spots.
    pub count: usize,
    /// Share of the replay image's total power on the spot samples.
    pub efficiency: f64,
    /// (I_max - I_min) / (I_max + I_min) over the spots (0 for equal spots).
    pub spread: f64,
    /// 1 - spread (Di Leonardo et al. 2007, "uniformity").
    pub uniformity: f64,
    /// I_min / I_max.
    pub min_over_max: f64,
    /// Standard deviation / mean of the spot intensities.
    pub rms_relative: f64,
    /// Every spot, in row-major order.
    pub spots: Vec<SpotReading>,
}

/// Largest number of spots a target is read as a spot array with.
pub const MAX_SPOTS: usize = 100_000;

/// The lit pixels of a target when it is a spot array: every lit pixel (value > 0) has no lit
/// pixel among its 8 neighbours, and there are 1..=[`MAX_SPOTS`] of them. Returns (col, row,
/// value) in row-major order, or None for a target that is not a spot array.
pub fn spot_target(w: usize, h: usize, target: &[f64]) -> Option<Vec<(usize, usize, f64)>> {
    let lit = |r: i64, c: i64| {
        r >= 0
            && c >= 0
            && r < h as i64
            && c < w as i64
            && target[r as usize * w + c as usize] > 0.0
    };
    let mut spots = Vec::new();
    for r in 0..h {
        for c in 0..w {
            let v = target[r * w + c];
            if v <= 0.0 {
                continue;
            }
            for dr in -1i64..=1 {
                for dc in -1i64..=1 {
                    if (dr, dc) != (0, 0) && lit(r as i64 + dr, c as i64 + dc) {
                        return None;
                    }
                }
            }
            spots.push((c, r, v));
            if spots.len() > MAX_SPOTS {
                return None;
            }
        }
    }
    (!spots.is_empty()).then_some(spots)
}

/// Spot figures of replay intensities `i` (w x h) for the spots of [`spot_target`].
pub fn spot_stats(w: usize, i: &[f32], spots: &[(usize, usize, f64)]) -> SpotStats {
    let total: f64 = i.iter().map(|&v| v as f64).sum();
    let raw: Vec<f64> = spots.iter().map(|&(c, r, _)| i[r * w + c] as f64).collect();
    let top = spots.iter().map(|s| s.2).fold(0.0f64, f64::max);
    let weighted: Vec<f64> = raw
        .iter()
        .zip(spots)
        .map(|(&v, s)| v / (s.2 / top))
        .collect();
    let n = weighted.len() as f64;
    let mean = weighted.iter().sum::<f64>() / n;
    let var = weighted.iter().map(|v| (v - mean).powi(2)).sum::<f64>() / n;
    let (lo, hi) = weighted
        .iter()
        .fold((f64::INFINITY, 0.0f64), |(a, b), &v| (a.min(v), b.max(v)));
    let spread = if hi + lo > 0.0 {
        (hi - lo) / (hi + lo)
    } else {
        0.0
    };
    SpotStats {
        count: spots.len(),
        efficiency: if total > 0.0 {
            raw.iter().sum::<f64>() / total
        } else {
            0.0
        },
        spread,
        uniformity: 1.0 - spread,
        min_over_max: if hi > 0.0 { lo / hi } else { 0.0 },
        rms_relative: if mean > 0.0 { var.sqrt() / mean } else { 0.0 },
        spots: spots
            .iter()
            .zip(&weighted)
            .map(|(&(c, r, t), &v)| SpotReading {
                col: c,
                row: r,
                target: t,
                intensity: v,
                relative: if mean > 0.0 { v / mean } else { 0.0 },
            })
            .collect(),
    }
}

/// Intensity figures of a flat part of a replay: min, max and rms relative to the mean.
#[derive(Clone, Debug, Serialize, PartialEq)]
pub struct FlatStats {
    /// Samples looked at.
    pub samples: usize,
    /// min / mean.
    pub min_relative: f64,
    /// max / mean.
    pub max_relative: f64,
    /// Standard deviation / mean.
    pub rms_relative: f64,
}

impl FlatStats {
    /// Figures of a set of intensities (None when empty).
    pub fn of(v: impl Iterator<Item = f64>) -> Option<FlatStats> {
        let (mut n, mut s, mut s2, mut lo, mut hi) = (0usize, 0.0, 0.0, f64::INFINITY, 0.0f64);
        for x in v {
            n += 1;
            s += x;
            s2 += x * x;
            lo = lo.min(x);
            hi = hi.max(x);
        }
        if n == 0 {
            return None;
        }
        let mean = s / n as f64;
        let var = (s2 / n as f64 - mean * mean).max(0.0);
        let rel = |x: f64| if mean > 0.0 { x / mean } else { 0.0 };
        Some(FlatStats {
            samples: n,
            min_relative: rel(lo),
            max_relative: rel(hi),
            rms_relative: rel(var.sqrt()),
        })
    }
}

/// The flat top of a target: the pixels at its maximum value whose right, lower and lower-right
/// neighbours are at the maximum too, so that everything between them (on an oversampled
/// replay) lies inside the flat part. (col, row) in row-major order.
pub fn flat_cells(w: usize, h: usize, target: &[f64]) -> Vec<(usize, usize)> {
    let top = target.iter().cloned().fold(0.0f64, f64::max);
    if top <= 0.0 {
        return Vec::new();
    }
    let at_top = |r: usize, c: usize| target[r * w + c] >= top * (1.0 - 1e-9);
    let mut out = Vec::new();
    for r in 0..h.saturating_sub(1) {
        for c in 0..w.saturating_sub(1) {
            if at_top(r, c) && at_top(r, c + 1) && at_top(r + 1, c) && at_top(r + 1, c + 1) {
                out.push((c, r));
            }
        }
    }
    out
}
