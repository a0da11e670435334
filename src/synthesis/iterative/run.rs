//! One optimisation's buffers and its iteration step (the loop [`super::optimise`] drives).

use super::*;

/// The plate as unit phasors from its phases.
pub(super) fn load(holo: &mut [Complex<f32>], phase: &[f64]) {
    holo.par_iter_mut()
        .zip(phase.par_iter())
        .for_each(|(h, &p)| {
            let (s, c) = p.sin_cos();
            *h = Complex::new(c as f32, s as f32);
        });
}

/// The state and buffers of one optimisation, allocated once.
pub(super) struct Run<'a> {
    planes: &'a [Plane],
    opts: &'a IterOptions,
    states: Vec<PlaneState>,
    /// The replay planes stay transposed between the forward and the back propagation.
    transposed: bool,
    /// Length of a replay-plane line in the state's layout.
    line_len: usize,
    nx: usize,
    pub(super) phase: Vec<f64>,
    holo: Vec<Complex<f32>>,
    work: Vec<Complex<f32>>,
    /// The sum over planes (empty with one plane).
    acc: Vec<Complex<f64>>,
    /// The propagators' scratch; in the transposed layout, the replay plane.
    scratch: Vec<Complex<f32>>,
    line_sums: LineSums,
    /// Plate phasors of the shown samples s = 0 ..= 2^b (projected iterations).
    phasors: Vec<Complex<f32>>,
    /// True while `holo` is ahead of `phase` (free iterations update the plate only).
    phase_stale: bool,
    isa: KernelIsa,
}

impl<'a> Run<'a> {
    pub(super) fn new(
        planes: &'a [Plane],
        grid: &Grid,
        opts: &'a IterOptions,
        window: Option<[usize; 4]>,
    ) -> Run<'a> {
        let (nx, ny, n) = (grid.nx, grid.ny, grid.len());
        // Per-plane state.
        let mut states: Vec<PlaneState> = planes
            .iter()
            .map(|p| {
                let mut st = PlaneState {
                    amp: p.target.iter().map(|t| t.sqrt()).collect(),
                    window,
                    weights: vec![1.0; n],
                };
                // Normalise the target to unit power over the signal area.
                let mut power = 0.0;
                for i in 0..ny {
                    for j in 0..nx {
                        if in_area(st.window, i, j) {
                            power += p.target[i * nx + j];
                        }
                    }
                }
                assert!(
                    power > 0.0,
                    "optimise: a target has no light in its signal area"
                );
                let k = 1.0 / power.sqrt();
                for (i, a) in st.amp.iter_mut().enumerate() {
                    if in_area(window, i / nx, i % nx) {
                        *a *= k;
                    } else {
                        *a = 0.0;
                    }
                }
                st
            })
            .collect();

        // The replay planes stay transposed between the forward and the back propagation when every
        // propagator does that at no extra cost (optics::propagation, "Transposed middle plane"):
        // the state then follows that layout, lines of length ny.
        let transposed = planes
            .iter()
            .all(|p| p.propagator.transposes_natively() && p.back.transposes_natively());
        if transposed {
            states = states.iter().map(|st| st.transposed(nx, ny)).collect();
        }
        let line_len = if transposed { ny } else { nx };

        // Buffers, allocated once.
        let phase: Vec<f64> = (0..n).map(|i| start_phase(opts.seed, i)).collect();
        // Whole-plane buffers on huge pages where the system offers them (the column passes visit one
        // page per row otherwise).
        let zero = Complex::<f32>::new(0.0, 0.0);
        let mut holo = large_buffer(n, zero);
        let work = large_buffer(n, zero);
        let acc: Vec<Complex<f64>> = if planes.len() > 1 {
            large_buffer(n, Complex::new(0.0, 0.0))
        } else {
            Vec::new()
        };
        // The propagators' scratch; in the transposed layout, the replay plane.
        let scratch_len = if transposed {
            n
        } else {
            planes
                .iter()
                .map(|p| p.propagator.scratch_len().max(p.back.scratch_len()))
                .max()
                .unwrap_or(0)
        };
        let scratch = large_buffer(scratch_len, zero);
        let line_sums = LineSums::new(if transposed { nx } else { 0 });
        load(&mut holo, &phase);
        let phasors: Vec<Complex<f32>> = match opts.levels {
            Some(l) => {
                let b = crate::encoding::phase_bits(l) as u32;
                (0..=(1usize << b))
                    .map(|s| {
                        let (si, c) = (TAU * s as f64 / (1u64 << b) as f64).sin_cos();
                        Complex::new(c as f32, si as f32)
                    })
                    .collect()
            }
            None => Vec::new(),
        };
        Run {
            planes,
            opts,
            states,
            transposed,
            line_len,
            nx,
            phase,
            holo,
            work,
            acc,
            scratch,
            line_sums,
            phasors,
            phase_stale: false,
            isa: kernels::detect(),
        }
    }

    /// One iteration: error of the current phase, constraint, back-propagation, new phase.
    pub(super) fn step(
        &mut self,
        quantize: bool,
        errors: &mut Vec<f64>,
        progress: &mut dyn FnMut(usize, f64),
    ) {
        let nx = self.nx;
        let mut e2 = 0.0;
        // With one plane, a free iteration's new plate is made in place by the back
        // propagation's last hook (transposed layout only).
        let unit_fused = self.transposed && self.planes.len() == 1 && !quantize;
        for (k, (p, st)) in self.planes.iter().zip(self.states.iter_mut()).enumerate() {
            if self.transposed {
                // Forward into the transposed replay plane (`scratch`), summing each line as it
                // leaves the column FFT; the constraint runs on each line ahead of the back
                // propagation's column FFT.
                let (line_len, isa, sums) = (self.line_len, self.isa, &self.line_sums);
                let hook = |j: usize, col: &mut [Complex<f32>]| {
                    sums.set(j, line_stats(j, col, st, line_len, isa))
                };
                p.propagator.propagate_into_transposed(
                    &self.holo,
                    &mut self.work,
                    &mut self.scratch,
                    &hook,
                );
                let s = self.line_sums.total();
                e2 += s.error() * s.error();
                if matches!(self.opts.algorithm, Algorithm::WeightedGs) {
                    update_weights(&self.scratch, st, &s, line_len);
                }
                let c = Constraint::new(&s, &self.opts.algorithm);
                let st: &PlaneState = st;
                let before = |j: usize, col: &mut [Complex<f32>]| c.line(j, col, st, line_len, isa);
                let unit = |_: usize, row: &mut [Complex<f32>]| {
                    if unit_fused {
                        kernels::unit_in_place(isa, row)
                    }
                };
                p.back
                    .propagate_from_transposed(&mut self.scratch, &mut self.work, &before, &unit);
            } else {
                self.work.copy_from_slice(&self.holo);
                p.propagator
                    .propagate_with_scratch(&mut self.work, &mut self.scratch);
                let s = stats(&self.work, st, nx, self.isa);
                e2 += s.error() * s.error();
                if matches!(self.opts.algorithm, Algorithm::WeightedGs) {
                    update_weights(&self.work, st, &s, nx);
                }
                constrain(&mut self.work, st, &s, &self.opts.algorithm, nx, self.isa);
                p.back
                    .propagate_with_scratch(&mut self.work, &mut self.scratch);
            }
            if self.planes.len() > 1 {
                if k == 0 {
                    self.acc
                        .par_iter_mut()
                        .zip(self.work.par_iter())
                        .for_each(|(a, w)| {
                            *a = Complex::new(w.re as f64, w.im as f64);
                        });
                } else {
                    self.acc
                        .par_iter_mut()
                        .zip(self.work.par_iter())
                        .for_each(|(a, w)| {
                            *a += Complex::new(w.re as f64, w.im as f64);
                        });
                }
            }
        }
        let e = (e2 / self.planes.len() as f64).sqrt();
        progress(errors.len(), e);
        errors.push(e);
        // The new plate: the back-propagated field's phase. Free iterations keep the field
        // divided by its modulus (no angle needed; a zero keeps phase 0); projected iterations
        // go through the angle to the phase the encoding shows.
        let field: &[Complex<f64>] = &self.acc; // the sum over planes (empty with one plane)
        let unit = |re: f64, im: f64| -> Complex<f32> {
            let m = (re * re + im * im).sqrt();
            if m > 0.0 {
                Complex::new((re / m) as f32, (im / m) as f32)
            } else {
                Complex::new(1.0, 0.0)
            }
        };
        match (quantize, self.opts.levels) {
            (true, Some(l)) => {
                // Phase and plate from the shown sample: the plate's phasors come from a table
                // made with the same expressions as `load` (same bits, no sin/cos per pixel).
                let b = crate::encoding::phase_bits(l) as u32;
                let shown = |re: f64, im: f64| shown_sample(arg_0_2pi(re, im), l);
                let set = |p: &mut f64, h: &mut Complex<f32>, s: usize| {
                    *p = TAU * s as f64 / (1u64 << b) as f64;
                    *h = self.phasors[s];
                };
                if self.planes.len() > 1 {
                    self.phase
                        .par_iter_mut()
                        .zip(self.holo.par_iter_mut())
                        .zip(field.par_iter())
                        .for_each(|((p, h), a)| set(p, h, shown(a.re, a.im)));
                } else {
                    self.phase
                        .par_iter_mut()
                        .zip(self.holo.par_iter_mut())
                        .zip(self.work.par_iter())
                        .for_each(|((p, h), w)| set(p, h, shown(w.re as f64, w.im as f64)));
                }
                self.phase_stale = false;
            }
            _ => {
                if unit_fused {
                    // `work` holds the new plate already; the old one becomes the work buffer.
                    std::mem::swap(&mut self.holo, &mut self.work);
                } else if self.planes.len() > 1 {
                    self.holo
                        .par_iter_mut()
                        .zip(field.par_iter())
                        .for_each(|(h, a)| *h = unit(a.re, a.im));
                } else {
                    let isa = self.isa;
                    self.holo
                        .par_chunks_mut(nx)
                        .zip(self.work.par_chunks(nx))
                        .for_each(|(h, w)| kernels::unit_row(isa, h, w));
                }
                self.phase_stale = true;
            }
        }
    }

    /// Brings `phase` up to date with the plate, projected onto the levels when no projected
    /// iteration ran.
    pub(super) fn settle_phase(&mut self, q_iters: usize) {
        if self.phase_stale {
            self.phase
                .par_iter_mut()
                .zip(self.holo.par_iter())
                .for_each(|(p, h)| *p = arg_0_2pi(h.re as f64, h.im as f64));
            self.phase_stale = false;
        }
        if let Some(l) = self.opts.levels {
            if q_iters == 0 {
                self.phase
                    .par_iter_mut()
                    .for_each(|p| *p = shown_phase(*p, l));
                load(&mut self.holo, &self.phase);
            }
        }
    }

    /// Error of the plate as it stands (the returned phase).
    pub(super) fn error_of_plate(&mut self) -> f64 {
        let nx = self.nx;
        let mut e2 = 0.0;
        for (p, st) in self.planes.iter().zip(self.states.iter()) {
            let e = if self.transposed {
                let (line_len, isa, sums) = (self.line_len, self.isa, &self.line_sums);
                let hook = |j: usize, col: &mut [Complex<f32>]| {
                    sums.set(j, line_stats(j, col, st, line_len, isa))
                };
                p.propagator.propagate_into_transposed(
                    &self.holo,
                    &mut self.work,
                    &mut self.scratch,
                    &hook,
                );
                self.line_sums.total().error()
            } else {
                self.work.copy_from_slice(&self.holo);
                p.propagator
                    .propagate_with_scratch(&mut self.work, &mut self.scratch);
                stats(&self.work, st, nx, self.isa).error()
            };
            e2 += e * e;
        }
        (e2 / self.planes.len() as f64).sqrt()
    }
}
