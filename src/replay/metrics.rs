//! What a replay reports: intensity images as PNG and numbers about them (power in a region,
//! peaks, uniformity and speckle contrast, agreement with a target image).

use std::path::Path;

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

/// Reads a grey (or colour, converted to luminance) 8/16-bit PNG as intensities in [0, 1].
pub fn read_png_grey(path: &Path) -> Result<(usize, usize, Vec<f64>)> {
    let f = std::fs::File::open(path).map_err(|e| Error::io(path, e))?;
    let mut dec = png::Decoder::new(std::io::BufReader::new(f));
    dec.set_transformations(png::Transformations::EXPAND);
    let mut r = dec
        .read_info()
        .map_err(|e| Error::input(path, format!("not a readable PNG: {e}")))?;
    let size = r
        .output_buffer_size()
        .ok_or_else(|| Error::input(path, "image too large"))?;
    let mut buf = vec![0u8; size];
    let info = r
        .next_frame(&mut buf)
        .map_err(|e| Error::input(path, format!("damaged PNG: {e}")))?;
    let (w, h) = (info.width as usize, info.height as usize);
    let ch = info.color_type.samples();
    let wide = info.bit_depth == png::BitDepth::Sixteen;
    let sample = |i: usize| {
        if wide {
            u16::from_be_bytes([buf[2 * i], buf[2 * i + 1]]) as f64 / 65535.0
        } else {
            buf[i] as f64 / 255.0
        }
    };
    let mut out = Vec::with_capacity(w * h);
    for p in 0..w * h {
        let v = match ch {
            1 | 2 => sample(p * ch),
            _ => {
                0.2126 * sample(p * ch) + 0.7152 * sample(p * ch + 1) + 0.0722 * sample(p * ch + 2)
            }
        };
        out.push(v);
    }
    Ok((w, h, out))
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
    for r in y..y + rh {
        for &v in &i[r * w + x..r * w + x + rw] {
            let v = v as f64;
            s += v;
            s2 += v * v;
            mn = mn.min(v);
            mx = mx.max(v);
        }
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
    let mut a = Vec::with_capacity(rw * rh);
    let mut b = Vec::with_capacity(rw * rh);
    for r in y..y + rh {
        for c in x..x + rw {
            a.push(i[r * w + c] as f64);
            b.push(target[r * w + c]);
        }
    }
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
