//! A phase pattern computed on a cell (by iteration) and laid over a plate of any size: the cell
//! repeats periodically (a Fourier pattern replays the same image from every copy), and an optional
//! blazed carrier and lens term, and an aberration correction (`optics::zernike`), are added over
//! the whole plate. The plate's fringe term is
//! F = exp(i (phi_cell(x mod w, y mod h) + carrier + lens)), unit amplitude.

use num_complex::Complex64;

use crate::optics::zernike::Correction;
use crate::optics::Plate;

/// A periodic phase pattern over a plate.
#[derive(Clone, Debug)]
pub struct PhaseCell {
    plate: Plate,
    /// Cell size [w, h].
    cell: [usize; 2],
    /// Cell phase, row-major, radians.
    phase: Vec<f64>,
    /// Blazed carrier: tilts [tx, ty], radians (phase k (x sin tx + y sin ty)).
    carrier: [f64; 2],
    /// Lens term of focal length f, metres (phase -k (x^2 + y^2) / (2 f)), if any.
    lens: Option<f64>,
    /// Aberration correction added over the plate, if any.
    correction: Option<std::sync::Arc<Correction>>,
}

impl PhaseCell {
    /// A cell pattern over a plate.
    ///
    /// # Panics
    /// If the phase does not have `cell[0] * cell[1]` values.
    pub fn new(
        plate: Plate,
        cell: [usize; 2],
        phase: Vec<f64>,
        carrier: [f64; 2],
        lens: Option<f64>,
    ) -> Self {
        assert_eq!(phase.len(), cell[0] * cell[1], "cell phase size");
        PhaseCell {
            plate,
            cell,
            phase,
            carrier,
            lens,
            correction: None,
        }
    }

    /// Adds an aberration correction (Zernike terms, measured map) to every pixel.
    ///
    /// # Panics
    /// If the correction's map is not the plate's size.
    pub fn with_correction(mut self, c: Correction) -> Self {
        if let Some((w, h, _)) = &c.map {
            assert_eq!(
                (*w, *h),
                (self.plate.width as usize, self.plate.height as usize),
                "correction map size"
            );
        }
        self.correction = (!c.is_empty()).then(|| std::sync::Arc::new(c));
        self
    }

    /// The plate.
    pub fn plate(&self) -> &Plate {
        &self.plate
    }

    /// Cell size [w, h].
    pub fn cell(&self) -> [usize; 2] {
        self.cell
    }

    /// F for rows [row0, row0 + rows) into `out`; returns the pixels written.
    pub fn compute_band(&self, row0: usize, rows: usize, out: &mut [Complex64]) -> u64 {
        let p = &self.plate;
        let w = p.width as usize;
        assert!(out.len() == rows * w, "band buffer mismatch");
        let inv_lambda = 1.0 / p.wavelength;
        let (sx, sy) = (self.carrier[0].sin(), self.carrier[1].sin());
        for (ri, orow) in out.chunks_exact_mut(w).enumerate() {
            let row = row0 + ri;
            let y = p.y_of_row(row as f64);
            let crow = &self.phase[(row % self.cell[1]) * self.cell[0]..][..self.cell[0]];
            for (c, f) in orow.iter_mut().enumerate() {
                let x = p.x_of_col(c as f64);
                // Carrier and lens in cycles (path difference / lambda), reduced before use.
                let mut t = (x * sx + y * sy) * inv_lambda;
                if let Some(fl) = self.lens {
                    t -= (x * x + y * y) / (2.0 * fl) * inv_lambda;
                }
                let t = t - t.floor();
                let extra = self
                    .correction
                    .as_ref()
                    .map_or(0.0, |k| k.phase(row, c, x, y));
                *f = Complex64::from_polar(
                    1.0,
                    crow[c % self.cell[0]] + 2.0 * std::f64::consts::PI * t + extra,
                );
            }
        }
        (rows * w) as u64
    }
}
