//! Grey raster images read as intensities: the one reader for target images (iterative
//! synthesis, replay comparisons). PNG and TIFF, 8 or 16 bits, grey or colour (converted to
//! luminance with the Rec. 709 weights 0.2126, 0.7152, 0.0722 on the stored values, common
//! practice for a grey target), through the `image` crate. The declared size is checked before
//! any pixel is decoded, and the decoder runs under an allocation limit, so a small file that
//! declares a huge image is refused instead of exhausting memory.

use std::path::Path;

use image::{DynamicImage, ImageReader, Limits};

use crate::error::{Error, Result};

/// Largest side of a target image, pixels (replay grids are at most 8192 x 8192; twice that
/// leaves room for oversampled references).
pub const MAX_SIDE: u32 = 16384;

/// Largest decoder allocation, bytes (a 16384^2 RGBA 16-bit image is 2 GiB; targets are grey).
const MAX_ALLOC: u64 = 1 << 30;

/// Reads an image as intensities in [0, 1], row-major, row 0 on top: (width, height, values).
///
/// # Errors
/// One line naming the file: unreadable, not PNG or TIFF, damaged, larger than [`MAX_SIDE`] on
/// a side, or an allocation beyond the decoder's limit.
pub fn read_grey(path: &Path) -> Result<(usize, usize, Vec<f64>)> {
    let (w, h, img) = decode(path)?;
    Ok((w, h, intensities(&img)))
}

/// Reads a grey image's stored values (0..=255 or 0..=65535), for maps whose grey codes mean
/// something (a measured phase map): (width, height, codes, bits). Colour images are refused.
pub fn read_grey_levels(path: &Path) -> Result<(usize, usize, Vec<f64>, u8)> {
    let (w, h, img) = decode(path)?;
    let (v, bits): (Vec<f64>, u8) = match &img {
        DynamicImage::ImageLuma8(b) => (b.as_raw().iter().map(|&v| f64::from(v)).collect(), 8),
        DynamicImage::ImageLuma16(b) => (b.as_raw().iter().map(|&v| f64::from(v)).collect(), 16),
        _ => return Err(Error::input(
            path,
            "is not a grey image without alpha (8 or 16 bits): a map's grey codes are its values",
        )),
    };
    Ok((w, h, v, bits))
}

fn decode(path: &Path) -> Result<(usize, usize, DynamicImage)> {
    let ext = path
        .extension()
        .map(|e| e.to_string_lossy().to_ascii_lowercase())
        .unwrap_or_default();
    let format = match ext.as_str() {
        "png" => image::ImageFormat::Png,
        "tif" | "tiff" => image::ImageFormat::Tiff,
        other => {
            return Err(Error::unsupported(
                path,
                format!("target image type '.{other}': use PNG or TIFF"),
            ))
        }
    };
    let kind = if format == image::ImageFormat::Png {
        "PNG"
    } else {
        "TIFF"
    };
    let open = |limited: bool| -> Result<ImageReader<std::io::BufReader<std::fs::File>>> {
        let f = std::fs::File::open(path).map_err(|e| Error::io(path, e))?;
        let mut r = ImageReader::with_format(std::io::BufReader::new(f), format);
        if limited {
            let mut limits = Limits::default();
            limits.max_image_width = Some(MAX_SIDE);
            limits.max_image_height = Some(MAX_SIDE);
            limits.max_alloc = Some(MAX_ALLOC);
            r.limits(limits);
        } else {
            r.no_limits();
        }
        Ok(r)
    };
    // The header first (read only): its declared size decides whether decoding may start.
    let (w, h) = open(false)?
        .into_dimensions()
        .map_err(|e| readable(path, kind, e))?;
    if w == 0 || h == 0 || w > MAX_SIDE || h > MAX_SIDE {
        return Err(Error::input(
            path,
            format!("declares {w} x {h} px; a target is at most {MAX_SIDE} x {MAX_SIDE}"),
        ));
    }
    let img = open(true)?.decode().map_err(|e| readable(path, kind, e))?;
    Ok((w as usize, h as usize, img))
}

fn readable(path: &Path, kind: &str, e: image::ImageError) -> Error {
    match e {
        image::ImageError::Limits(l) => {
            Error::input(path, format!("too large to decode as a target ({l})"))
        }
        image::ImageError::IoError(io) => Error::io(path, io),
        other => Error::input(path, format!("not a readable {kind}: {other}")),
    }
}

/// Intensities of a decoded image: the grey channel, or the luminance of colour.
fn intensities(img: &DynamicImage) -> Vec<f64> {
    let luma = |r: f64, g: f64, b: f64| 0.2126 * r + 0.7152 * g + 0.0722 * b;
    match img {
        DynamicImage::ImageLuma8(b) => b.as_raw().iter().map(|&v| v as f64 / 255.0).collect(),
        DynamicImage::ImageLumaA8(b) => b.pixels().map(|p| p.0[0] as f64 / 255.0).collect(),
        DynamicImage::ImageLuma16(b) => b.as_raw().iter().map(|&v| v as f64 / 65535.0).collect(),
        DynamicImage::ImageLumaA16(b) => b.pixels().map(|p| p.0[0] as f64 / 65535.0).collect(),
        DynamicImage::ImageRgb8(b) => b
            .pixels()
            .map(|p| luma(p.0[0] as f64, p.0[1] as f64, p.0[2] as f64) / 255.0)
            .collect(),
        DynamicImage::ImageRgba8(b) => b
            .pixels()
            .map(|p| luma(p.0[0] as f64, p.0[1] as f64, p.0[2] as f64) / 255.0)
            .collect(),
        DynamicImage::ImageRgb16(b) => b
            .pixels()
            .map(|p| luma(p.0[0] as f64, p.0[1] as f64, p.0[2] as f64) / 65535.0)
            .collect(),
        DynamicImage::ImageRgba16(b) => b
            .pixels()
            .map(|p| luma(p.0[0] as f64, p.0[1] as f64, p.0[2] as f64) / 65535.0)
            .collect(),
        other => other
            .to_rgb32f()
            .pixels()
            .map(|p| luma(p.0[0] as f64, p.0[1] as f64, p.0[2] as f64))
            .collect(),
    }
}

#[cfg(test)]
mod unit_tests {
    use super::*;

    fn png(path: &Path, w: u32, h: u32, color: png::ColorType, depth: png::BitDepth, data: &[u8]) {
        let f = std::fs::File::create(path).unwrap();
        let mut e = png::Encoder::new(std::io::BufWriter::new(f), w, h);
        e.set_color(color);
        e.set_depth(depth);
        e.write_header().unwrap().write_image_data(data).unwrap();
    }

    /// Grey 8 and 16 bit, colour as Rec. 709 luminance (ITU-R BT.709, the weights of the
    /// module docs), TIFF grey, and refusals of a huge declared size and other formats.
    #[test]
    fn reads_grey_colour_and_refuses_huge_declarations() {
        let d = tempfile::tempdir().unwrap();
        let p = d.path().join("g.png");
        png(
            &p,
            3,
            1,
            png::ColorType::Grayscale,
            png::BitDepth::Eight,
            &[0, 51, 255],
        );
        assert_eq!(read_grey(&p).unwrap(), (3, 1, vec![0.0, 0.2, 1.0]));
        let p = d.path().join("g16.png");
        png(
            &p,
            2,
            1,
            png::ColorType::Grayscale,
            png::BitDepth::Sixteen,
            &[0, 0, 0xff, 0xff],
        );
        assert_eq!(read_grey(&p).unwrap(), (2, 1, vec![0.0, 1.0]));
        let p = d.path().join("c.png");
        png(
            &p,
            1,
            1,
            png::ColorType::Rgb,
            png::BitDepth::Eight,
            &[255, 0, 0],
        );
        let (_, _, v) = read_grey(&p).unwrap();
        assert!((v[0] - 0.2126).abs() < 1e-12);
        let t = d.path().join("g.tif");
        {
            let f = std::fs::File::create(&t).unwrap();
            let mut e = tiff::encoder::TiffEncoder::new(f).unwrap();
            e.write_image::<tiff::encoder::colortype::Gray16>(2, 1, &[0u16, 65535])
                .unwrap();
        }
        assert_eq!(read_grey(&t).unwrap(), (2, 1, vec![0.0, 1.0]));
        // A header declaring 60000 x 60000 px, with no pixels behind it: refused from the header.
        let p = d.path().join("huge.png");
        let mut bytes = b"\x89PNG\r\n\x1a\n".to_vec();
        let mut ihdr = b"IHDR".to_vec();
        ihdr.extend_from_slice(&60000u32.to_be_bytes());
        ihdr.extend_from_slice(&60000u32.to_be_bytes());
        ihdr.extend_from_slice(&[8, 0, 0, 0, 0]);
        bytes.extend_from_slice(&13u32.to_be_bytes());
        bytes.extend_from_slice(&ihdr);
        bytes.extend_from_slice(&crc32(&ihdr).to_be_bytes());
        for chunk in [&b"IDAT"[..], &b"IEND"[..]] {
            bytes.extend_from_slice(&0u32.to_be_bytes());
            bytes.extend_from_slice(chunk);
            bytes.extend_from_slice(&crc32(chunk).to_be_bytes());
        }
        std::fs::write(&p, bytes).unwrap();
        let e = read_grey(&p).unwrap_err().to_string();
        assert!(e.contains("huge.png") && e.contains("60000"), "{e}");
        let p = d.path().join("t.bmp");
        std::fs::write(&p, b"BM").unwrap();
        assert!(read_grey(&p)
            .unwrap_err()
            .to_string()
            .contains("PNG or TIFF"));
    }

    /// CRC-32 (ISO 3309 / PNG specification, annex D), bit by bit.
    fn crc32(data: &[u8]) -> u32 {
        let mut c = 0xffff_ffffu32;
        for &b in data {
            c ^= b as u32;
            for _ in 0..8 {
                c = if c & 1 != 0 {
                    0xedb8_8320 ^ (c >> 1)
                } else {
                    c >> 1
                };
            }
        }
        !c
    }
}
