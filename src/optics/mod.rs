//! The physical frame shared by every stage: the plate's pixel grid and the reference wave.
//!
//! Conventions (see `shared/physics.md` of the steering side, restated in the crate docs):
//! SI units inside (metres, radians); the plate is the plane z = 0; object points sit at z > 0;
//! pixel (row i, column j) has its centre at x = (j - (W-1)/2) px, y = ((H-1)/2 - i) py, so row 0 is the
//! top row of the image and y points up; time dependence exp(-i w t), a diverging wave is exp(+i k r)/r.
//!
//! Nothing here depends on scenes, encodings or files.

pub mod fft2d;
pub(crate) mod pointwise;
pub mod propagation;
pub mod zernike;

use std::f64::consts::PI;

/// The plate: its pixel grid, pitch and the design wavelength.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct Plate {
    /// Columns.
    pub width: u32,
    /// Rows.
    pub height: u32,
    /// Pixel pitch in x and y, metres.
    pub pitch: [f64; 2],
    /// Wavelength, metres.
    pub wavelength: f64,
}

impl Plate {
    /// Wavenumber k = 2 pi / lambda.
    pub fn k(&self) -> f64 {
        2.0 * PI / self.wavelength
    }
    /// x of the centre of column `j`, metres.
    #[inline]
    pub fn x_of_col(&self, j: f64) -> f64 {
        (j - (self.width as f64 - 1.0) / 2.0) * self.pitch[0]
    }
    /// y of the centre of row `i`, metres.
    #[inline]
    pub fn y_of_row(&self, i: f64) -> f64 {
        ((self.height as f64 - 1.0) / 2.0 - i) * self.pitch[1]
    }
    /// Fractional column whose centre is at `x`.
    #[inline]
    pub fn col_of_x(&self, x: f64) -> f64 {
        x / self.pitch[0] + (self.width as f64 - 1.0) / 2.0
    }
    /// Fractional row whose centre is at `y`.
    #[inline]
    pub fn row_of_y(&self, y: f64) -> f64 {
        (self.height as f64 - 1.0) / 2.0 - y / self.pitch[1]
    }
    /// Half the band the pixel grid can hold, as direction cosines: lambda / (2 p) per axis.
    /// A fringe whose local frequency f satisfies |f| <= 1 / (2 p) has |lambda f| <= this.
    pub fn nyquist_cosines(&self) -> [f64; 2] {
        [
            self.wavelength / (2.0 * self.pitch[0]),
            self.wavelength / (2.0 * self.pitch[1]),
        ]
    }
    /// Largest diffraction half-angle asin(lambda / 2p) per axis, radians (pi/2 when lambda >= 2p).
    pub fn max_half_angle(&self) -> [f64; 2] {
        let c = self.nyquist_cosines();
        [c[0].min(1.0).asin(), c[1].min(1.0).asin()]
    }
    /// Physical size (width x pitch, height x pitch), metres.
    pub fn size(&self) -> [f64; 2] {
        [
            self.width as f64 * self.pitch[0],
            self.height as f64 * self.pitch[1],
        ]
    }
    /// Number of pixels.
    pub fn pixels(&self) -> u64 {
        self.width as u64 * self.height as u64
    }
}

/// The reference wave, unit amplitude on the whole plate.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Reference {
    /// R = exp(i k (x sin tx + y sin ty)); tilts in radians.
    Plane {
        /// [tx, ty], radians.
        tilt: [f64; 2],
    },
    /// R = exp(i k rR), rR the distance from the source at `position` (metres) to the pixel.
    Spherical {
        /// Source position, metres.
        position: [f64; 3],
    },
}

impl Reference {
    /// The reference in words and user units, for `plan` and messages.
    pub fn describe(&self) -> String {
        match *self {
            Reference::Plane { tilt } => format!(
                "plane wave, tilted {:.3} deg in x and {:.3} deg in y",
                tilt[0].to_degrees(),
                tilt[1].to_degrees()
            ),
            Reference::Spherical { position } => format!(
                "spherical wave from ({:.3}, {:.3}, {:.3}) mm",
                position[0] * 1e3,
                position[1] * 1e3,
                position[2] * 1e3
            ),
        }
    }

    /// Phase of R at (x, y), radians (not reduced).
    #[inline]
    pub fn phase(&self, x: f64, y: f64, k: f64) -> f64 {
        match *self {
            Reference::Plane { tilt } => k * (x * tilt[0].sin() + y * tilt[1].sin()),
            Reference::Spherical { position: p } => {
                let (dx, dy) = (x - p[0], y - p[1]);
                k * (dx * dx + dy * dy + p[2] * p[2]).sqrt()
            }
        }
    }
    /// Local direction cosines of R at (x, y): lambda times its local spatial frequency.
    #[inline]
    pub fn direction(&self, x: f64, y: f64) -> [f64; 2] {
        match *self {
            Reference::Plane { tilt } => [tilt[0].sin(), tilt[1].sin()],
            Reference::Spherical { position: p } => {
                let (dx, dy) = (x - p[0], y - p[1]);
                let r = (dx * dx + dy * dy + p[2] * p[2]).sqrt();
                [dx / r, dy / r]
            }
        }
    }
    /// Range [min, max] of the direction cosines of R over the rectangle [x0, x1] x [y0, y1]:
    /// `([sx_min, sx_max], [sy_min, sy_max])`. Exact for both kinds: for a spherical source, sx is
    /// monotonic in x and extremal in y either at an edge or at y = yR (and likewise for sy).
    pub fn direction_range(&self, x: [f64; 2], y: [f64; 2]) -> ([f64; 2], [f64; 2]) {
        match *self {
            Reference::Plane { .. } => {
                let d = self.direction(0.0, 0.0);
                ([d[0], d[0]], [d[1], d[1]])
            }
            Reference::Spherical { position: p } => {
                let yc = p[1].clamp(y[0], y[1]);
                let xc = p[0].clamp(x[0], x[1]);
                let mut sx = [f64::INFINITY, f64::NEG_INFINITY];
                let mut sy = [f64::INFINITY, f64::NEG_INFINITY];
                for &xx in &x {
                    for &yy in &[y[0], y[1], yc] {
                        let d = self.direction(xx, yy);
                        sx = [sx[0].min(d[0]), sx[1].max(d[0])];
                    }
                }
                for &yy in &y {
                    for &xx in &[x[0], x[1], xc] {
                        let d = self.direction(xx, yy);
                        sy = [sy[0].min(d[1]), sy[1].max(d[1])];
                    }
                }
                (sx, sy)
            }
        }
    }
}
