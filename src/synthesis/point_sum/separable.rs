//! The separable Fresnel paths of the point sum (plane reference, one channel, no occlusion):
//! exp(i 2 pi (t_row + dx^2 q)) splits into a row factor and a column factor, and the support
//! test into an x part (columns) and a y part (whole rows), in f64 and in f32 register tiles.

use super::*;

/// Row factor of emitter `e`'s Fresnel wave on the row at height `y` under a plane reference of
/// direction cosine `ref_y` in y: `(sin, cos)` of 2 pi (z + dy^2 / 2z) / lambda + phi, or None
/// where the y half of the support test fails (the same expression as the per-pixel kernel's).
fn fresnel_row_factor(
    e: &Emitter,
    y: f64,
    ref_y: f64,
    half_band_y: f64,
    inv_lambda: f64,
) -> Option<(f64, f64)> {
    let z = e.pos[2];
    let inv_z = 1.0 / z;
    let dy = y - e.pos[1];
    if (dy * inv_z - ref_y).abs() > half_band_y {
        return None;
    }
    let t_row = (z + dy * dy * 0.5 * inv_z) * inv_lambda + reduced_cycles(e.phase);
    Some(kernels::sincos_cycles(t_row - t_row.floor()))
}

impl PointSum {
    /// Fresnel waves with a plane reference: exp(i 2 pi (t_row + dx^2 q)) separates into a row
    /// factor and a column factor, and the support test into an x part (columns) and a y part
    /// (whole rows). Per emitter, the column factor is computed once per band and each row adds it
    /// times its row factor. Emitters are still added to every pixel in input order.
    pub(super) fn fresnel_band(
        &self,
        row0: usize,
        rows: usize,
        out: &mut [Complex64],
        scratch: &mut BandScratch,
        cands: &[u32],
    ) -> u64 {
        let w = self.plate.width as usize;
        let inv_lambda = 1.0 / self.plate.wavelength;
        let d = self.plane_band_setup(rows, scratch);
        let inputs = RowInputs {
            xs: &self.xs,
            rdx: &scratch.ref_dir_x,
            rdy: &scratch.ref_dir_y,
            half_band: self.half_band,
            inv_lambda,
            taper_start: self.taper_start,
        };
        let (wx, _) = direction_window([d[0], d[0]], [d[1], d[1]], self.half_band);
        let mut updates = 0u64;
        for &j in cands {
            let e = &self.emitters[j as usize];
            let z = e.pos[2];
            let Some((c0, c1)) = self.fresnel_x_span(e, wx) else {
                continue;
            };
            scratch.col_re.resize(c1 - c0, 0.0);
            scratch.col_im.resize(c1 - c0, 0.0);
            let nx = kernels::fresnel_columns(
                self.isa,
                &inputs,
                e.pos[0],
                z,
                e.amplitude,
                c0,
                c1,
                &mut scratch.col_re,
                &mut scratch.col_im,
            );
            if nx == 0 {
                continue;
            }
            for r in 0..rows {
                let y = self.plate.y_of_row((row0 + r) as f64);
                let Some((s, c)) = fresnel_row_factor(e, y, d[1], self.half_band[1], inv_lambda)
                else {
                    continue;
                };
                let base = r * w;
                kernels::mac(
                    self.isa,
                    c,
                    s,
                    &scratch.col_re,
                    &scratch.col_im,
                    &mut scratch.band_re[base + c0..base + c1],
                    &mut scratch.band_im[base + c0..base + c1],
                );
                updates += nx;
            }
        }
        self.times_plane_conj(row0, d, out, scratch);
        updates
    }

    /// Columns [c0, c1) of a Fresnel emitter's x support (u = z sx for sx in the window `wx`),
    /// one pixel of slack each side; None when it misses the plate.
    pub(super) fn fresnel_x_span(&self, e: &Emitter, wx: [f64; 2]) -> Option<(usize, usize)> {
        let z = e.pos[2];
        let last = self.plate.width as f64 - 1.0;
        let c0 = (self.plate.col_of_x(e.pos[0] + z * wx[0]).ceil() - 1.0).max(0.0);
        let c1 = (self.plate.col_of_x(e.pos[0] + z * wx[1]).floor() + 1.0).min(last);
        (c0 <= c1).then(|| (c0 as usize, c1 as usize + 1))
    }

    /// Set-up shared by the separable Fresnel paths: the plane reference's direction cosines in
    /// the per-column arrays, and zeroed f64 band sums. Returns the direction cosines.
    pub(super) fn plane_band_setup(&self, rows: usize, scratch: &mut BandScratch) -> [f64; 2] {
        let w = self.plate.width as usize;
        let d = self.channels[0].reference.direction(0.0, 0.0);
        scratch.ref_dir_x.clear();
        scratch.ref_dir_x.resize(w, d[0]);
        scratch.ref_dir_y.clear();
        scratch.ref_dir_y.resize(w, d[1]);
        for v in [&mut scratch.band_re, &mut scratch.band_im] {
            v.clear();
            v.resize(rows * w, 0.0);
        }
        d
    }

    /// out = (band_re + i band_im) conj(R) for a plane reference of direction cosines `d`, row by
    /// row (the last step of both separable Fresnel paths). The plane wave factors,
    /// conj(R) = exp(-i 2 pi x dx / lambda) exp(-i 2 pi y dy / lambda): one phasor per column for the
    /// band and one per row, so a pixel costs two complex products instead of a sine and cosine
    /// (rounding error of order 1e-16 against the direct phasor).
    pub(super) fn times_plane_conj(
        &self,
        row0: usize,
        d: [f64; 2],
        out: &mut [Complex64],
        scratch: &mut BandScratch,
    ) {
        let w = self.plate.width as usize;
        let inv_lambda = 1.0 / self.plate.wavelength;
        let (ax, ay) = (d[0] * inv_lambda, d[1] * inv_lambda);
        let conj_phasor = |t: f64| {
            let (s, c) = kernels::sincos_cycles(t - t.floor());
            Complex64::new(c, -s)
        };
        scratch.col_phasor.clear();
        scratch
            .col_phasor
            .extend(self.xs.iter().map(|&x| conj_phasor(x * ax)));
        for (r, orow) in out.chunks_exact_mut(w).enumerate() {
            let ry = conj_phasor(self.plate.y_of_row((row0 + r) as f64) * ay);
            let (bre, bim) = (
                &scratch.band_re[r * w..(r + 1) * w],
                &scratch.band_im[r * w..(r + 1) * w],
            );
            for (c, o) in orow.iter_mut().enumerate() {
                *o = Complex64::new(bre[c], bim[c]) * (scratch.col_phasor[c] * ry);
            }
        }
    }

    /// The separable Fresnel band in f32 ([`kernels::fresnel32`]) as blocked matrix products:
    /// per group of candidates (the f32 flush groups of `F32_GROUP` indices), the row
    /// coefficients on every row, then column chunk by chunk: the column factors of the members
    /// meeting the chunk (a panel), and register tiles of `TILE_ROWS` live rows, each given the
    /// members live on its rows, whose f32 sums are added straight into the f64 band. Same
    /// support pixels and update count as [`Self::fresnel_band`].
    pub(super) fn fresnel_band32(
        &self,
        row0: usize,
        rows: usize,
        out: &mut [Complex64],
        scratch: &mut BandScratch,
        cands: &[u32],
    ) -> u64 {
        use kernels::fresnel32::{CHUNK, TILE_ROWS as MR};
        let w = self.plate.width as usize;
        let nr = kernels::tile_columns(self.isa);
        let inv_lambda = 1.0 / self.plate.wavelength;
        let d = self.plane_band_setup(rows, scratch);
        // MR - 1 spare rows pad the last tile (zero coefficients: they only ever get zeros added,
        // and the conjugate step reads the band's own rows).
        for v in [&mut scratch.band_re, &mut scratch.band_im] {
            v.resize((rows + MR - 1) * w, 0.0);
        }
        let inputs = RowInputs {
            xs: &self.xs,
            rdx: &scratch.ref_dir_x,
            rdy: &scratch.ref_dir_y,
            half_band: self.half_band,
            inv_lambda,
            taper_start: self.taper_start,
        };
        let (wx, _) = direction_window([d[0], d[0]], [d[1], d[1]], self.half_band);
        let ys: Vec<f64> = (0..rows)
            .map(|r| self.plate.y_of_row((row0 + r) as f64))
            .collect();
        let mut updates = 0u64;
        // (index, first column, end column, rows inside the y support).
        let mut members = std::mem::take(&mut scratch.block_members);
        let mut live_rows: Vec<usize> = Vec::with_capacity(rows);
        let mut k = 0;
        while k < cands.len() {
            // The group: the candidates of one flush group with a non-empty x span.
            let g = cands[k] as usize / F32_GROUP;
            members.clear();
            while k < cands.len() && cands[k] as usize / F32_GROUP == g {
                let j = cands[k];
                if let Some((c0, c1)) = self.fresnel_x_span(&self.emitters[j as usize], wx) {
                    members.push((j, c0, c1, 0));
                }
                k += 1;
            }
            let nm = members.len();
            // Row coefficients, [member][row] (zero outside the y support).
            for v in [&mut scratch.block_cre, &mut scratch.block_cim] {
                v.clear();
                v.resize(nm * rows, 0.0);
            }
            for (p, m) in members.iter_mut().enumerate() {
                let e = &self.emitters[m.0 as usize];
                m.3 = kernels::fresnel_row_coefs32(
                    self.isa,
                    &ys,
                    e.pos[1],
                    e.pos[2],
                    reduced_cycles(e.phase),
                    d[1],
                    self.half_band[1],
                    inv_lambda,
                    &mut scratch.block_cre[p * rows..(p + 1) * rows],
                    &mut scratch.block_cim[p * rows..(p + 1) * rows],
                );
            }
            // Members with no row inside drop out, their coefficient rows with them.
            let mut q = 0;
            for p in 0..nm {
                if members[p].3 > 0 {
                    members[q] = members[p];
                    scratch
                        .block_cre
                        .copy_within(p * rows..(p + 1) * rows, q * rows);
                    scratch
                        .block_cim
                        .copy_within(p * rows..(p + 1) * rows, q * rows);
                    q += 1;
                }
            }
            members.truncate(q);
            let nm = members.len();
            if nm == 0 {
                continue;
            }
            live_rows.clear();
            live_rows.extend((0..rows).filter(|&r| {
                (0..nm).any(|p| {
                    scratch.block_cre[p * rows + r] != 0.0 || scratch.block_cim[p * rows + r] != 0.0
                })
            }));
            // Tiles of MR live rows (the last one padded with the spare rows), their coefficients
            // packed [member][tile row], and which members are live on each.
            let tiles = live_rows.len().div_ceil(MR);
            scratch.tile_coef.clear();
            scratch.tile_coef.resize(tiles * nm * MR, [0.0; 2]);
            scratch.tile_live.clear();
            scratch.tile_live.resize(tiles * nm, false);
            for (i, &r) in live_rows.iter().enumerate() {
                let (t, slot) = (i / MR, i % MR);
                for p in 0..nm {
                    let cf = [
                        scratch.block_cre[p * rows + r],
                        scratch.block_cim[p * rows + r],
                    ];
                    if cf != [0.0; 2] {
                        scratch.tile_coef[(t * nm + p) * MR + slot] = cf;
                        scratch.tile_live[t * nm + p] = true;
                    }
                }
            }
            // Column chunks over the union of the spans, aligned to whole register tiles.
            let u0 = members.iter().map(|m| m.1).min().unwrap_or(0) / nr * nr;
            let u1 = members.iter().map(|m| m.2).max().unwrap_or(0);
            for v in [&mut scratch.group_re, &mut scratch.group_im] {
                v.clear();
                v.resize(nm * CHUNK, 0.0);
            }
            let end = u1.next_multiple_of(nr).min(w);
            let mut c = u0;
            while c < u1 {
                let ce = (c + CHUNK).min(end);
                // The panel: member p's factors in row p over [c, ce), zero outside its span
                // (rows of members that miss the chunk are left as they are and never read).
                scratch.tile_ks.clear();
                for (p, m) in members.iter().enumerate() {
                    if m.1 >= ce || m.2 <= c {
                        continue;
                    }
                    scratch.tile_ks.push(p as u32);
                    let (a, b) = (m.1.max(c), m.2.min(ce));
                    let row = p * CHUNK;
                    let (pre, pim) = (
                        &mut scratch.group_re[row..row + ce - c],
                        &mut scratch.group_im[row..row + ce - c],
                    );
                    pre[..a - c].fill(0.0);
                    pim[..a - c].fill(0.0);
                    pre[b - c..].fill(0.0);
                    pim[b - c..].fill(0.0);
                    let e = &self.emitters[m.0 as usize];
                    let inside = kernels::fresnel_columns32(
                        self.isa,
                        &inputs,
                        e.pos[0],
                        e.pos[2],
                        e.amplitude,
                        a,
                        b,
                        &mut pre[a - c..b - c],
                        &mut pim[a - c..b - c],
                    );
                    updates += inside * m.3;
                }
                let in_chunk = scratch.tile_ks.len();
                for t in 0..tiles {
                    // This tile's list: the chunk's members live on its rows, in index order.
                    scratch.tile_ks.truncate(in_chunk);
                    for q in 0..in_chunk {
                        let p = scratch.tile_ks[q];
                        if scratch.tile_live[t * nm + p as usize] {
                            scratch.tile_ks.push(p);
                        }
                    }
                    if scratch.tile_ks.len() == in_chunk {
                        continue;
                    }
                    let row_at = |i: usize| {
                        let r = live_rows.get(t * MR + i).copied().unwrap_or(rows + i - 1);
                        r * w + c
                    };
                    let tile_rows: [usize; MR] = std::array::from_fn(row_at);
                    kernels::mac_tile32(
                        self.isa,
                        &scratch.tile_ks[in_chunk..],
                        &scratch.tile_coef[t * nm * MR..(t + 1) * nm * MR],
                        &scratch.group_re,
                        &scratch.group_im,
                        CHUNK,
                        0,
                        ce - c,
                        &tile_rows,
                        &mut scratch.band_re,
                        &mut scratch.band_im,
                    );
                }
                c = ce;
            }
        }
        scratch.block_members = members;
        self.times_plane_conj(row0, d, out, scratch);
        updates
    }
}
