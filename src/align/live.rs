//! Per-frame alignment figures for `modegram watch`: from one decoded field (carrier removed,
//! no tilt/defocus correction) the fringe period, separation margin, centring, captured power
//! at the setup's alignment and the best focus, fast enough for a live view.
//!
//! Contract: [`LiveChannel::new`] samples the basis once at the channel's geometry and keeps
//! its spectra; [`LiveChannel::measure`] then costs one FFT of the field plus, per defocus
//! tried, one pass over the spectra (no FFT): by Parseval, `<psi, P(-dz) E'> =
//! (dA / N) sum conj(Psi) H(-dz) E'^` with `E' = M(-t) E` (docs/conventions.md signs), N the
//! grid's pixel count. The fringe period uses the field's spectral centroid: a residual
//! carrier error dc (cycles/px on the camera) appears as a phase ramp of dc / p_fibre
//! cycles/um in the decoded field.
use super::objective::{apply_tilt, freq, Fft2};
use super::optimise::{golden_section, scan};
use crate::grid::{Alignment, Grid};
use ndarray::Array3;
use num_complex::Complex64;
use serde::Serialize;

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

/// Precomputed state of one channel.
pub struct LiveChannel {
    pub grid: Grid,
    pub wavelength_nm: f64,
    pub alignment: Alignment,
    pub carrier: [f64; 2],
    pub window: f64,
    pub band: f64,
    /// Camera pixel pitch in the fibre plane, um.
    pub camera_fibre_pitch_um: f64,
    pub core_radius_um: f64,
    pub focus_range_um: f64,
    fft: Fft2,
    spectra: Vec<Vec<Complex64>>,
    kz_minus_k: Vec<f64>,
    scratch: Vec<Complex64>,
    work: Vec<Complex64>,
    hbuf: Vec<Complex64>,
}

impl LiveChannel {
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
        let mut scratch = vec![Complex64::new(0.0, 0.0); fft.scratch_len()];
        let spectra = basis
            .outer_iter()
            .map(|m| {
                let mut v: Vec<Complex64> = m.iter().copied().collect();
                fft.forward(&mut v, &mut scratch);
                v
            })
            .collect();
        let kz_minus_k = super::objective::Propagator::new(&grid, wavelength_nm)
            .kz_minus_k()
            .to_vec();
        LiveChannel {
            work: vec![Complex64::new(0.0, 0.0); grid.len()],
            hbuf: vec![Complex64::new(0.0, 0.0); grid.len()],
            grid,
            wavelength_nm,
            alignment,
            carrier,
            window,
            band,
            camera_fibre_pitch_um,
            core_radius_um,
            focus_range_um,
            fft,
            spectra,
            kz_minus_k,
            scratch,
        }
    }

    /// Captured fraction of the spectrum `e` (of the tilt-corrected field, power `p`) after
    /// propagation by `-dz`; `h` is scratch for the transfer function.
    fn captured_at(&self, e: &[Complex64], p: f64, dz: f64, h: &mut [Complex64]) -> f64 {
        let n = self.grid.len() as f64;
        let da = self.grid.pixel_area_um2();
        for ((hv, &q), ev) in h.iter_mut().zip(&self.kz_minus_k).zip(e) {
            *hv = if q.is_nan() {
                Complex64::new(0.0, 0.0)
            } else {
                ev * Complex64::from_polar(1.0, -q * dz)
            };
        }
        let mut total = 0.0;
        for s in &self.spectra {
            let acc: Complex64 = s.iter().zip(h.iter()).map(|(a, b)| a.conj() * b).sum();
            total += (acc * (da / n)).norm_sqr();
        }
        if p > 0.0 {
            total / p
        } else {
            0.0
        }
    }

    /// Figures of one decoded field (row-major on `grid`); `saturated_fraction` from the frame.
    pub fn measure(&mut self, field: &[Complex64], saturated_fraction: f64) -> LiveFigures {
        let g = self.grid;
        let da = g.pixel_area_um2();
        let p: f64 = field.iter().map(|z| z.norm_sqr()).sum::<f64>() * da;
        // centroid
        let power: Vec<f64> = field.iter().map(|z| z.norm_sqr()).collect();
        let c = super::fit::centroid_um(&power, &g, 0.05).unwrap_or([0.0, 0.0]);
        let centring = (c[0] * c[0] + c[1] * c[1]).sqrt() / self.core_radius_um;
        // spectrum of the raw field: residual carrier from its centroid
        self.work.copy_from_slice(field);
        let mut work = std::mem::take(&mut self.work);
        self.fft.forward(&mut work, &mut self.scratch);
        let (mut s, mut fx, mut fy) = (0.0, 0.0, 0.0);
        for (i, z) in work.iter().enumerate() {
            let w = z.norm_sqr();
            s += w;
            fx += w * freq(i % g.nx, g.nx, g.pitch_um);
            fy += w * freq(i / g.nx, g.ny, g.pitch_um);
        }
        let dc = if s > 0.0 {
            [
                fx / s * self.camera_fibre_pitch_um,
                fy / s * self.camera_fibre_pitch_um,
            ]
        } else {
            [0.0, 0.0]
        };
        let cm = [self.carrier[0] + dc[0], self.carrier[1] + dc[1]];
        let cf = (cm[0] * cm[0] + cm[1] * cm[1]).sqrt();
        let d_dc = dc_distance(cm);
        // tilt-corrected spectrum
        work.copy_from_slice(field);
        apply_tilt(
            &mut work,
            &g,
            self.wavelength_nm,
            self.alignment.tilt_mrad,
            -1.0,
        );
        self.fft.forward(&mut work, &mut self.scratch);
        let mut hbuf = std::mem::take(&mut self.hbuf);
        let captured = self.captured_at(&work, p, self.alignment.defocus_um, &mut hbuf);
        let z0 = self.alignment.defocus_um;
        let r = self.focus_range_um;
        let (z, _) = scan(
            |z| -self.captured_at(&work, p, z, &mut hbuf),
            z0 - r,
            z0 + r,
            9,
        );
        let h = 2.0 * r / 8.0;
        let (focus, _, _) = golden_section(
            |z| -self.captured_at(&work, p, z, &mut hbuf),
            z - h,
            z + h,
            0.02 * h,
        );
        self.hbuf = hbuf;
        self.work = work;
        LiveFigures {
            fringe_period_px: if cf > 0.0 { 1.0 / cf } else { f64::INFINITY },
            separation: (d_dc - self.window) / (2.0 * self.band),
            saturated_fraction,
            centring,
            captured,
            focus_um: focus,
        }
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
