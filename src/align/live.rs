//! Per-frame alignment figures for `modegram watch`: from one decoded field (carrier removed,
//! no tilt/defocus correction) the fringe period, separation margin, centring, captured power
//! at the setup's alignment and the best focus, fast enough for a live view.
//!
//! Contract: [`LiveChannel::new`] takes the basis sampled at the channel's geometry, keeps
//! the mode spectra on the bins where the modes live and groups those bins into rings of
//! equal `|f|`. [`LiveChannel::measure_with`] is a pure function of the field (nothing is
//! carried from one frame to the next, so any split over threads gives the same figures); it
//! costs two FFTs of the field, one pass over the kept spectra and sums over the rings.
//!
//! Captured power after propagation by `-dz` (docs/conventions.md signs), by Parseval with
//! the FFT of docs/conventions.md (N the grid's pixel count, dA the pixel area):
//!
//!   c_k(dz) = <psi_k, P(-dz) E'> = (dA / N) sum_f conj(Psi_k(f)) exp(-i dz q(f)) E'^(f),
//!   eta(dz) = sum_k |c_k(dz)|^2 / ||E||^2,
//!
//! with `E' = M(-t) E` the tilt-corrected field and `q = kz - k` the angular-spectrum phase
//! rate (Goodman, Introduction to Fourier Optics, 3rd ed., sec. 3.10; evanescent bins carry
//! nothing). `q` depends on `|f|` only, so with the ring sums `A_rk = (dA / N) sum_{f in ring
//! r} conj(Psi_k) E'^` (one pass per frame) and `u_r = exp(-i dz q_r)`:
//!
//!   c_k = sum_r A_rk u_r,  d_k = sum_r q_r A_rk u_r,  s_k = sum_r q_r^2 A_rk u_r,
//!   eta' = 2 sum_k Im(conj(c_k) d_k) / ||E||^2,  eta'' = 2 sum_k (|d_k|^2 - Re(conj(c_k) s_k)) / ||E||^2.
//!
//! Best focus: `eta` on [`FOCUS_SCAN`] points over `defocus_um +- focus_range_um` (the factors
//! `u_r` of the scan are precomputed, so the scan is one small matrix product), then from the
//! vertex of the parabola through the best point and its neighbours, Newton's method on
//! `eta' = 0`, kept inside that bracket by bisection, to [`FOCUS_TOL`] of the scan step.
//!
//! Support: bins are dropped, weakest first, while every mode keeps all but [`SUPPORT_EPS`]
//! of its energy. By Cauchy-Schwarz each `c_k` then moves by at most `sqrt(SUPPORT_EPS ||E_o||^2)`,
//! `E_o` the field's part on the dropped bins, so `eta` by at most `2 sqrt(eta K SUPPORT_EPS
//! f_o) + K SUPPORT_EPS f_o` for K modes and the fraction `f_o` of the field's power outside
//! the support (a decoded field keeps little there: the decoder's window is the fibre's band).
//!
//! Fringe period: from the field's spectral centroid; a residual carrier error dc (cycles/px
//! on the camera) appears as a phase ramp of dc / p_fibre cycles/um in the decoded field.
use super::objective::{freq, Fft2, Propagator};
use crate::grid::{Alignment, Grid};
use ndarray::Array3;
use num_complex::Complex64;
use serde::Serialize;

/// Energy fraction each mode may lose to the dropped spectral bins.
pub const SUPPORT_EPS: f64 = 1e-8;
/// Points of the coarse focus scan over `defocus_um +- focus_range_um` (odd: the middle one
/// is the setup's defocus).
pub const FOCUS_SCAN: usize = 33;
/// Newton/bisection stop: step below this fraction of the scan step.
pub const FOCUS_TOL: f64 = 1e-6;

/// Distance (cycles/px) from `c` to the nearest copy of the DC order: the sampled spectrum
/// repeats at every integer frequency.
pub fn dc_distance(c: [f64; 2]) -> f64 {
    let (dx, dy) = (c[0] - c[0].round(), c[1] - c[1].round());
    (dx * dx + dy * dy).sqrt()
}

/// Live figures of one channel in one frame.
#[derive(Debug, Clone, Copy, Default, Serialize)]
pub struct LiveFigures {
    pub fringe_period_px: f64,
    /// (|c| - W) / (2 B): below 1 the window reaches into the DC order.
    pub separation: f64,
    pub saturated_fraction: f64,
    /// Centroid offset from the region centre, fraction of the core radius.
    pub centring: f64,
    pub captured: f64,
    /// Best-focus defocus, um (absolute, like defocus_um).
    pub focus_um: f64,
}

/// Per-thread buffers of [`LiveChannel::measure_with`]; make one with
/// [`LiveChannel::scratch`].
#[derive(Debug, Clone)]
pub struct LiveScratch {
    work: Vec<Complex64>,
    fft: Vec<Complex64>,
    power: Vec<f64>,
    /// The tilt-corrected spectrum on the kept bins.
    e: Vec<Complex64>,
    /// Ring sums A, real and imaginary parts (rings x modes).
    amp_re: Vec<f64>,
    amp_im: Vec<f64>,
    /// Mode overlaps per scan point (scan x modes), then c, d, s of one defocus (3 x modes).
    c_re: Vec<f64>,
    c_im: Vec<f64>,
}

/// Precomputed state of one channel, read-only once built (build a new one for another
/// alignment or focus range).
pub struct LiveChannel {
    grid: Grid,
    alignment: Alignment,
    carrier: [f64; 2],
    window: f64,
    band: f64,
    camera_fibre_pitch_um: f64,
    core_radius_um: f64,
    fft: Fft2,
    n_modes: usize,
    /// FFT-order indices of the kept bins, ring by ring.
    bins: Vec<usize>,
    /// Offsets of the rings in `bins` (rings + 1 entries).
    ring_start: Vec<usize>,
    /// `kz - k` of each ring, rad/um.
    ring_q: Vec<f64>,
    /// `(dA / N) conj(Psi_k)` on the kept bins, real and imaginary parts (bins x modes).
    spec_re: Vec<f64>,
    spec_im: Vec<f64>,
    /// Scan defocus values and their factors `exp(-i z_j q_r)` (rings x scan).
    scan_z: Vec<f64>,
    scan_re: Vec<f64>,
    scan_im: Vec<f64>,
    /// Tilt removal `exp(-i k t.r)` along x (per column) and y (per row).
    tilt_x: Vec<Complex64>,
    tilt_y: Vec<Complex64>,
    own: Option<LiveScratch>,
}

impl LiveChannel {
    /// `basis` (modes x ny x nx) sampled at the channel's geometry, each mode normalised on
    /// `grid`; `carrier`, `window` and `band` in cycles/px on the camera;
    /// `camera_fibre_pitch_um` the camera pixel pitch in the fibre plane; the best focus is
    /// searched over `alignment.defocus_um +- focus_range_um`.
    #[allow(clippy::too_many_arguments)]
    pub fn new(
        grid: Grid,
        wavelength_nm: f64,
        alignment: Alignment,
        basis: Array3<Complex64>,
        carrier: [f64; 2],
        window: f64,
        band: f64,
        camera_fibre_pitch_um: f64,
        core_radius_um: f64,
        focus_range_um: f64,
    ) -> LiveChannel {
        let fft = Fft2::new(grid.ny, grid.nx);
        let n = grid.len();
        let mut scratch = vec![Complex64::new(0.0, 0.0); fft.scratch_len()];
        let full: Vec<Vec<Complex64>> = basis
            .outer_iter()
            .map(|m| {
                let mut v: Vec<Complex64> = m.iter().copied().collect();
                fft.forward(&mut v, &mut scratch);
                v
            })
            .collect();
        let n_modes = full.len();
        // each mode's spectral power as a fraction of its total
        let frac: Vec<Vec<f64>> = full
            .iter()
            .map(|s| {
                let t: f64 = s.iter().map(|z| z.norm_sqr()).sum();
                let t = if t > 0.0 { t } else { 1.0 };
                s.iter().map(|z| z.norm_sqr() / t).collect()
            })
            .collect();
        let prop = Propagator::new(&grid, wavelength_nm);
        let q = prop.kz_minus_k();
        // weakest bins first; drop while every mode keeps all but SUPPORT_EPS
        let mut order: Vec<(f64, usize)> = (0..n)
            .filter(|&b| !q[b].is_nan())
            .map(|b| (frac.iter().map(|f| f[b]).fold(0.0, f64::max), b))
            .collect();
        order.sort_by(|a, b| a.0.total_cmp(&b.0).then(a.1.cmp(&b.1)));
        let mut dropped = vec![0.0; n_modes];
        let mut first_kept = order.len();
        for (i, &(_, b)) in order.iter().enumerate() {
            if frac
                .iter()
                .zip(&dropped)
                .any(|(f, d)| d + f[b] > SUPPORT_EPS)
            {
                first_kept = i;
                break;
            }
            for (d, f) in dropped.iter_mut().zip(&frac) {
                *d += f[b];
            }
        }
        // rings: equal f^2 = (kx^2 ny^2 + ky^2 nx^2) / (nx ny pitch)^2, an exact integer key
        let signed = |i: usize, m: usize| -> i128 {
            if i < m.div_ceil(2) {
                i as i128
            } else {
                i as i128 - m as i128
            }
        };
        let key = |b: usize| -> u128 {
            let (kx, ky) = (signed(b % grid.nx, grid.nx), signed(b / grid.nx, grid.ny));
            (kx * kx) as u128 * (grid.ny * grid.ny) as u128
                + (ky * ky) as u128 * (grid.nx * grid.nx) as u128
        };
        let mut kept: Vec<(u128, usize)> = order[first_kept..]
            .iter()
            .map(|&(_, b)| (key(b), b))
            .collect();
        kept.sort_unstable();
        let mut bins = Vec::with_capacity(kept.len());
        let mut ring_start = Vec::new();
        let mut ring_q = Vec::new();
        for (i, &(k, b)) in kept.iter().enumerate() {
            if i == 0 || kept[i - 1].0 != k {
                ring_start.push(i);
                ring_q.push(q[b]);
            }
            bins.push(b);
        }
        ring_start.push(bins.len());
        let scale = grid.pixel_area_um2() / n as f64;
        let (mut spec_re, mut spec_im) = (Vec::new(), Vec::new());
        for &b in &bins {
            for s in &full {
                let v = s[b].conj() * scale;
                spec_re.push(v.re);
                spec_im.push(v.im);
            }
        }
        let z0 = alignment.defocus_um;
        let h = 2.0 * focus_range_um / (FOCUS_SCAN - 1) as f64;
        let mid = (FOCUS_SCAN / 2) as f64;
        let scan_z: Vec<f64> = (0..FOCUS_SCAN).map(|j| z0 + (j as f64 - mid) * h).collect();
        let (mut scan_re, mut scan_im) = (Vec::new(), Vec::new());
        for &qr in &ring_q {
            for &z in &scan_z {
                let u = Complex64::from_polar(1.0, -z * qr);
                scan_re.push(u.re);
                scan_im.push(u.im);
            }
        }
        let kw = 2.0 * std::f64::consts::PI / (wavelength_nm * 1e-3) * 1e-3;
        let t = alignment.tilt_mrad;
        let tilt_x = (0..grid.nx)
            .map(|c| Complex64::from_polar(1.0, -kw * t[0] * grid.x_um(c)))
            .collect();
        let tilt_y = (0..grid.ny)
            .map(|r| Complex64::from_polar(1.0, -kw * t[1] * grid.y_um(r)))
            .collect();
        let mut live = LiveChannel {
            grid,
            alignment,
            carrier,
            window,
            band,
            camera_fibre_pitch_um,
            core_radius_um,
            fft,
            n_modes,
            bins,
            ring_start,
            ring_q,
            spec_re,
            spec_im,
            scan_z,
            scan_re,
            scan_im,
            tilt_x,
            tilt_y,
            own: None,
        };
        live.own = Some(live.scratch());
        live
    }

    /// Fresh buffers for [`LiveChannel::measure_with`].
    pub fn scratch(&self) -> LiveScratch {
        let z = Complex64::new(0.0, 0.0);
        let (rings, k) = (self.ring_q.len(), self.n_modes);
        LiveScratch {
            work: vec![z; self.grid.len()],
            fft: vec![z; self.fft.scratch_len()],
            power: vec![0.0; self.grid.len()],
            e: vec![z; self.bins.len()],
            amp_re: vec![0.0; rings * k],
            amp_im: vec![0.0; rings * k],
            c_re: vec![0.0; FOCUS_SCAN.max(3) * k],
            c_im: vec![0.0; FOCUS_SCAN.max(3) * k],
        }
    }

    /// Spectral bins kept and the rings they form.
    pub fn support(&self) -> (usize, usize) {
        (self.bins.len(), self.ring_q.len())
    }

    /// Ring sums `A_rk` of the kept spectrum `s.e` into `s.amp_*`.
    fn ring_sums(&self, s: &mut LiveScratch) {
        let k = self.n_modes;
        for (r, w) in self.ring_start.windows(2).enumerate() {
            let (are, aim) = (
                &mut s.amp_re[r * k..(r + 1) * k],
                &mut s.amp_im[r * k..(r + 1) * k],
            );
            are.fill(0.0);
            aim.fill(0.0);
            for i in w[0]..w[1] {
                let e = s.e[i];
                let (sr, si) = (
                    &self.spec_re[i * k..(i + 1) * k],
                    &self.spec_im[i * k..(i + 1) * k],
                );
                for (((ar, ai), &x), &y) in are.iter_mut().zip(aim.iter_mut()).zip(sr).zip(si) {
                    *ar += x * e.re - y * e.im;
                    *ai += x * e.im + y * e.re;
                }
            }
        }
    }

    /// `sum_k |c_k|^2` at every scan point (the module header's matrix product).
    fn scan_values(&self, s: &mut LiveScratch, out: &mut [f64; FOCUS_SCAN]) {
        let k = self.n_modes;
        let (cre, cim) = (&mut s.c_re[..FOCUS_SCAN * k], &mut s.c_im[..FOCUS_SCAN * k]);
        cre.fill(0.0);
        cim.fill(0.0);
        for r in 0..self.ring_q.len() {
            let (are, aim) = (&s.amp_re[r * k..(r + 1) * k], &s.amp_im[r * k..(r + 1) * k]);
            let (ure, uim) = (
                &self.scan_re[r * FOCUS_SCAN..(r + 1) * FOCUS_SCAN],
                &self.scan_im[r * FOCUS_SCAN..(r + 1) * FOCUS_SCAN],
            );
            for j in 0..FOCUS_SCAN {
                let (ur, ui) = (ure[j], uim[j]);
                let (cr, ci) = (&mut cre[j * k..(j + 1) * k], &mut cim[j * k..(j + 1) * k]);
                for (((cr, ci), &ar), &ai) in cr.iter_mut().zip(ci.iter_mut()).zip(are).zip(aim) {
                    *cr += ar * ur - ai * ui;
                    *ci += ar * ui + ai * ur;
                }
            }
        }
        for (j, o) in out.iter_mut().enumerate() {
            let (cr, ci) = (&cre[j * k..(j + 1) * k], &cim[j * k..(j + 1) * k]);
            *o = cr.iter().zip(ci).map(|(a, b)| a * a + b * b).sum();
        }
    }

    /// `(sum_k |c_k|^2, its first and second dz-derivatives)` at `dz` (module header).
    fn value_deriv(&self, s: &mut LiveScratch, dz: f64) -> (f64, f64, f64) {
        let k = self.n_modes;
        let (cre, cim) = (&mut s.c_re[..3 * k], &mut s.c_im[..3 * k]);
        cre.fill(0.0);
        cim.fill(0.0);
        for (r, &q) in self.ring_q.iter().enumerate() {
            let u = Complex64::from_polar(1.0, -dz * q);
            let (are, aim) = (&s.amp_re[r * k..(r + 1) * k], &s.amp_im[r * k..(r + 1) * k]);
            for (n, w) in [u, u * q, u * (q * q)].into_iter().enumerate() {
                let (cr, ci) = (&mut cre[n * k..(n + 1) * k], &mut cim[n * k..(n + 1) * k]);
                for (((cr, ci), &ar), &ai) in cr.iter_mut().zip(ci.iter_mut()).zip(are).zip(aim) {
                    *cr += ar * w.re - ai * w.im;
                    *ci += ar * w.im + ai * w.re;
                }
            }
        }
        let (mut f, mut g, mut h) = (0.0, 0.0, 0.0);
        for m in 0..k {
            let c = Complex64::new(cre[m], cim[m]);
            let d = Complex64::new(cre[k + m], cim[k + m]);
            let s = Complex64::new(cre[2 * k + m], cim[2 * k + m]);
            f += c.norm_sqr();
            g += 2.0 * (c.conj() * d).im;
            h += 2.0 * (d.norm_sqr() - (c.conj() * s).re);
        }
        (f, g, h)
    }

    /// Figures of one decoded field with the channel's own buffers.
    pub fn measure(&mut self, field: &[Complex64], saturated_fraction: f64) -> LiveFigures {
        let mut s = self.own.take().unwrap_or_else(|| self.scratch());
        let fig = self.measure_with(field, saturated_fraction, &mut s);
        self.own = Some(s);
        fig
    }

    /// Figures of one decoded field (row-major on the grid); `saturated_fraction` from the
    /// frame. A pure function of its inputs: `s` only holds buffers.
    pub fn measure_with(
        &self,
        field: &[Complex64],
        saturated_fraction: f64,
        s: &mut LiveScratch,
    ) -> LiveFigures {
        let g = self.grid;
        let da = g.pixel_area_um2();
        for (pw, z) in s.power.iter_mut().zip(field) {
            *pw = z.norm_sqr();
        }
        let p: f64 = s.power.iter().sum::<f64>() * da;
        let c = super::fit::centroid_um(&s.power, &g, 0.05).unwrap_or([0.0, 0.0]);
        let centring = (c[0] * c[0] + c[1] * c[1]).sqrt() / self.core_radius_um;
        // spectrum of the raw field: residual carrier from its centroid
        s.work.copy_from_slice(field);
        self.fft.forward(&mut s.work, &mut s.fft);
        let (mut sum, mut fx, mut fy) = (0.0, 0.0, 0.0);
        for (row, zs) in s.work.chunks_exact(g.nx).enumerate() {
            let vy = freq(row, g.ny, g.pitch_um);
            for (col, z) in zs.iter().enumerate() {
                let w = z.norm_sqr();
                sum += w;
                fx += w * freq(col, g.nx, g.pitch_um);
                fy += w * vy;
            }
        }
        let dc = if sum > 0.0 {
            [
                fx / sum * self.camera_fibre_pitch_um,
                fy / sum * self.camera_fibre_pitch_um,
            ]
        } else {
            [0.0, 0.0]
        };
        let cm = [self.carrier[0] + dc[0], self.carrier[1] + dc[1]];
        let cf = (cm[0] * cm[0] + cm[1] * cm[1]).sqrt();
        let d_dc = dc_distance(cm);
        // tilt-corrected spectrum on the kept bins, reduced to ring sums
        for ((row, src), ey) in s
            .work
            .chunks_exact_mut(g.nx)
            .zip(field.chunks_exact(g.nx))
            .zip(&self.tilt_y)
        {
            for ((d, z), ex) in row.iter_mut().zip(src).zip(&self.tilt_x) {
                *d = z * (ex * ey);
            }
        }
        self.fft.forward(&mut s.work, &mut s.fft);
        for (e, &b) in s.e.iter_mut().zip(&self.bins) {
            *e = s.work[b];
        }
        self.ring_sums(s);
        let mut eta = [0.0; FOCUS_SCAN];
        self.scan_values(s, &mut eta);
        let inv_p = if p > 0.0 { 1.0 / p } else { 0.0 };
        let z0 = self.alignment.defocus_um;
        let figures = |focus_um: f64| LiveFigures {
            fringe_period_px: if cf > 0.0 { 1.0 / cf } else { f64::INFINITY },
            separation: (d_dc - self.window) / (2.0 * self.band),
            saturated_fraction,
            centring,
            captured: eta[FOCUS_SCAN / 2] * inv_p,
            focus_um,
        };
        if !(p > 0.0 && p.is_finite()) || self.ring_q.is_empty() {
            return figures(z0);
        }
        let mut j = 0;
        for (i, &v) in eta.iter().enumerate() {
            if v > eta[j] {
                j = i;
            }
        }
        let h = self.scan_z[1] - self.scan_z[0];
        let z = self.scan_z[j];
        let f0 = eta[j];
        let fm = if j > 0 {
            eta[j - 1]
        } else {
            self.value_deriv(s, z - h).0
        };
        let fp = if j + 1 < FOCUS_SCAN {
            eta[j + 1]
        } else {
            self.value_deriv(s, z + h).0
        };
        figures(self.refine(s, z, h, [fm, f0, fp]))
    }

    /// Maximise eta around the scan's best point `z` (neighbours at `z -+ h`, values `f`):
    /// from the vertex of the parabola through the three points, Newton on eta' = 0 inside
    /// `[z - h, z + h]`, bisection when a step leaves the bracket or eta is not concave.
    fn refine(&self, s: &mut LiveScratch, z: f64, h: f64, f: [f64; 3]) -> f64 {
        let (mut a, mut b) = (z - h, z + h);
        let curv = f[0] - 2.0 * f[1] + f[2];
        let mut x = if curv < 0.0 {
            (z + 0.5 * h * (f[0] - f[2]) / curv).clamp(a, b)
        } else {
            z
        };
        let tol = FOCUS_TOL * h;
        for _ in 0..60 {
            let (_, gx, hx) = self.value_deriv(s, x);
            if gx > 0.0 {
                a = x;
            } else {
                b = x;
            }
            let newton = x - gx / hx;
            let next = if hx < 0.0 && newton > a && newton < b {
                newton
            } else {
                0.5 * (a + b)
            };
            let done = (next - x).abs() < tol || b - a < tol;
            x = next;
            if done {
                break;
            }
        }
        x
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::align::analytic::{hg_fields, hg_indices, sample_hg};
    use crate::align::objective::geometry;

    /// The live path (spectral overlaps, Parseval) agrees with the fit's objective on the
    /// same field, and finds the applied defocus.
    #[test]
    fn live_figures_match_applied_misalignment() {
        let grid = Grid::centred(48, 48, 0.75);
        let truth = Alignment {
            center_um: [1.2, 0.0],
            tilt_mrad: [3.0, 0.0],
            defocus_um: 40.0,
            ..Default::default()
        };
        let (f, _) = hg_fields(&grid, 1, 5.0, &truth, 1064.0, 1, 0.0, 2);
        let basis = sample_hg(&grid, &geometry(&truth), &hg_indices(1), 5.0);
        let mut setup_alignment = truth;
        setup_alignment.defocus_um = 0.0;
        let mut live = LiveChannel::new(
            grid,
            1064.0,
            setup_alignment,
            basis,
            [0.25, 0.0],
            0.08,
            0.08,
            0.275,
            10.0,
            60.0,
        );
        let fig = live.measure(f.as_slice().unwrap(), 0.0);
        assert!((fig.focus_um - 40.0).abs() < 0.5, "{fig:?}");
        // HG00 defocused by z keeps 1 / (1 + (z / 2 zR)^2) in HG00 (Siegman 1986, ch. 17)
        let zr = std::f64::consts::PI * 25.0 / 1.064;
        assert!(
            (fig.captured - 1.0 / (1.0 + (40.0 / (2.0 * zr)).powi(2))).abs() < 2e-3,
            "{fig:?}"
        );
        assert!((fig.centring - 0.12).abs() < 0.01, "{fig:?}");
        // tilt 3 mrad = 2.82e-3 cycles/um; x 0.275 um/px = 7.75e-4 cycles/px on the camera
        let want = 1.0 / (0.25 + 3e-3 / 1.064 * 0.275);
        assert!((fig.fringe_period_px - want).abs() < 1e-3, "{fig:?} {want}");
        assert!(((fig.separation) - (0.25 + 7.75e-4 - 0.08) / 0.16).abs() < 1e-3);
    }
}
