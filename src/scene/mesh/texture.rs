//! Textures of mesh materials: an sRGB image and the rule that samples it at texture
//! coordinates, and the sRGB decoding shared by the readers.

/// How a texture is read between texel centres.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum TextureFilter {
    /// The texel containing the point.
    Nearest,
    /// Bilinear interpolation of the four nearest texel centres (in linear colour).
    Bilinear,
}

/// How texture coordinates outside `[0, 1]` are folded back.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum TextureWrap {
    /// The image tiles the plane.
    Repeat,
    /// The image is mirrored at every integer.
    MirroredRepeat,
    /// The edge texels extend outwards.
    ClampToEdge,
}

/// An RGBA8 image, sRGB-encoded colour and linear alpha, with its sampling rule.
#[derive(Clone, Debug, PartialEq)]
pub struct Texture {
    /// Width in texels (at least 1).
    pub width: u32,
    /// Height in texels (at least 1).
    pub height: u32,
    /// `width * height * 4` bytes, row-major, top row first.
    pub rgba: Vec<u8>,
    /// Filter used by [`Texture::sample`].
    pub filter: TextureFilter,
    /// Wrapping in u (horizontal) and v (vertical).
    pub wrap: [TextureWrap; 2],
}

impl Texture {
    /// Linear RGBA colour at texture coordinates `uv` (glTF convention: `(0, 0)` is the
    /// top-left corner of the image, texel `(i, j)` has its centre at
    /// `((i + 0.5) / width, (j + 0.5) / height)`). Non-finite coordinates read as 0.
    pub fn sample(&self, uv: [f32; 2]) -> [f32; 4] {
        let (w, h) = (i64::from(self.width), i64::from(self.height));
        let fin = |x: f32| if x.is_finite() { f64::from(x) } else { 0.0 };
        let x = fin(uv[0]) * w as f64 - 0.5;
        let y = fin(uv[1]) * h as f64 - 0.5;
        match self.filter {
            TextureFilter::Nearest => {
                // Nearest texel centre; `as i64` saturates for huge coordinates.
                let i = wrap_index((x + 0.5).floor() as i64, w, self.wrap[0]);
                let j = wrap_index((y + 0.5).floor() as i64, h, self.wrap[1]);
                self.texel(i, j)
            }
            TextureFilter::Bilinear => {
                let (x0, y0) = (x.floor(), y.floor());
                let (fx, fy) = ((x - x0) as f32, (y - y0) as f32);
                let (x0, y0) = (x0 as i64, y0 as i64);
                let i0 = wrap_index(x0, w, self.wrap[0]);
                let i1 = wrap_index(x0.saturating_add(1), w, self.wrap[0]);
                let j0 = wrap_index(y0, h, self.wrap[1]);
                let j1 = wrap_index(y0.saturating_add(1), h, self.wrap[1]);
                let (a, b, c, d) = (
                    self.texel(i0, j0),
                    self.texel(i1, j0),
                    self.texel(i0, j1),
                    self.texel(i1, j1),
                );
                let mut out = [0.0f32; 4];
                for k in 0..4 {
                    let top = a[k] + (b[k] - a[k]) * fx;
                    let bottom = c[k] + (d[k] - c[k]) * fx;
                    out[k] = top + (bottom - top) * fy;
                }
                out
            }
        }
    }

    /// Linear RGBA of texel (column `i`, row `j`), both in range.
    fn texel(&self, i: usize, j: usize) -> [f32; 4] {
        let o = 4 * (j * self.width as usize + i);
        let p = &self.rgba[o..o + 4];
        [
            srgb_to_linear(p[0]),
            srgb_to_linear(p[1]),
            srgb_to_linear(p[2]),
            f32::from(p[3]) / 255.0,
        ]
    }
}

/// Folds texel index `i` into `0..n` (n >= 1) by the wrapping rule.
fn wrap_index(i: i64, n: i64, wrap: TextureWrap) -> usize {
    let k = match wrap {
        TextureWrap::Repeat => i.rem_euclid(n),
        TextureWrap::ClampToEdge => i.clamp(0, n - 1),
        TextureWrap::MirroredRepeat => {
            let k = i.rem_euclid(2 * n);
            if k >= n {
                2 * n - 1 - k
            } else {
                k
            }
        }
    };
    k as usize
}

/// Decodes an 8-bit sRGB value to linear light in `[0, 1]` (IEC 61966-2-1 transfer function).
pub fn srgb_to_linear(v: u8) -> f32 {
    static TABLE: std::sync::OnceLock<[f32; 256]> = std::sync::OnceLock::new();
    TABLE.get_or_init(|| {
        let mut t = [0.0f32; 256];
        for (i, e) in t.iter_mut().enumerate() {
            *e = srgb_unit_to_linear(i as f64 / 255.0) as f32;
        }
        t
    })[v as usize]
}

/// Decodes an sRGB-encoded value in `[0, 1]` to linear light (values outside are clamped).
pub fn srgb_unit_to_linear(c: f64) -> f64 {
    let c = c.clamp(0.0, 1.0);
    if c <= 0.04045 {
        c / 12.92
    } else {
        ((c + 0.055) / 1.055).powf(2.4)
    }
}
