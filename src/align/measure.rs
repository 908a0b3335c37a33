//! Measurements behind the check items, on plain arrays: hologram statistics, sideband and
//! DC-order energies of a hologram's spectrum, reference uniformity over the signal area,
//! the field's centroid, a quick defocus fit.
//!
//! Contract: pure functions of their inputs, no I/O; spectra are in FFT bin order
//! (bin 0 = DC) with frequencies in cycles per pixel (docs/conventions.md).
use super::compact::{BasisExtent, Compact, Extent, FineFields};
use super::objective::{freq, geometry, Objective};
use super::optimise::{golden_section, scan};
use crate::grid::{Alignment, Grid};
use ndarray::{Array3, ArrayView2, ArrayView3};
use num_complex::Complex64;

/// Peak counts and number of pixels at or above `saturation` in `frame`.
pub fn peak_and_saturated(frame: ArrayView2<f64>, saturation: f64) -> (f64, usize) {
    let mut peak = f64::NEG_INFINITY;
    let mut sat = 0;
    for &v in frame.iter() {
        peak = peak.max(v);
        if v >= saturation {
            sat += 1;
        }
    }
    (peak, sat)
}

/// Energy of `power` (|spectrum|^2, FFT order, ny x nx, cycles per pixel) inside the disc of
/// radius `r` around `(fx, fy)`, with frequencies wrapped to [-1/2, 1/2).
pub fn disc_energy(power: ArrayView2<f64>, centre: [f64; 2], r: f64) -> f64 {
    let (ny, nx) = power.dim();
    let mut s = 0.0;
    for iy in 0..ny {
        let fy = freq(iy, ny, 1.0);
        for ix in 0..nx {
            let fx = freq(ix, nx, 1.0);
            let (dx, dy) = (fx - centre[0], fy - centre[1]);
            if dx * dx + dy * dy <= r * r {
                s += power[[iy, ix]];
            }
        }
    }
    s
}

/// Sideband energy (window of radius `window` around `carrier`) over the DC order's energy
/// (disc of radius `dc_radius` around 0).
pub fn sideband_to_dc(
    power: ArrayView2<f64>,
    carrier: [f64; 2],
    window: f64,
    dc_radius: f64,
) -> f64 {
    let dc = disc_energy(power, [0.0, 0.0], dc_radius);
    if dc <= 0.0 {
        return 0.0;
    }
    disc_energy(power, carrier, window) / dc
}

/// min / max of `reference` over the disc of radius `radius_px` around pixel `(cx, cy)`
/// (column, row). None when the disc holds no pixel or the maximum is not positive.
pub fn reference_uniformity(
    reference: ArrayView2<f64>,
    cx: f64,
    cy: f64,
    radius_px: f64,
) -> Option<f64> {
    let (ny, nx) = reference.dim();
    let (mut lo, mut hi) = (f64::INFINITY, f64::NEG_INFINITY);
    for r in 0..ny {
        for c in 0..nx {
            let (dx, dy) = (c as f64 - cx, r as f64 - cy);
            if dx * dx + dy * dy <= radius_px * radius_px {
                let v = reference[[r, c]];
                lo = lo.min(v);
                hi = hi.max(v);
            }
        }
    }
    (hi > 0.0 && lo.is_finite()).then(|| lo.max(0.0) / hi)
}

/// Intensity centroid (um) of the summed |F|^2 of `fields` (frames x ny x nx) on `grid`.
pub fn field_centroid_um(fields: ArrayView3<Complex64>, grid: &Grid) -> Option<[f64; 2]> {
    let mut p = vec![0.0; grid.len()];
    for f in fields.outer_iter() {
        for (a, z) in p.iter_mut().zip(f.iter()) {
            *a += z.norm_sqr();
        }
    }
    super::fit::centroid_um(&p, grid, 0.05)
}

/// Best focus and captured power of `fields` at the fixed geometry and tilt of `a`.
#[derive(Debug, Clone, Copy)]
pub struct FocusScan {
    /// Defocus (um) that maximises the captured power.
    pub defocus_um: f64,
    /// Captured fraction there (reduced objective).
    pub captured_best: f64,
    /// Captured fraction at `a` itself, power-weighted over every frame.
    pub captured_at_start: f64,
}

/// Defocus that maximises the captured power of `fields` at the fixed geometry and tilt of
/// `a`: a scan over `a.defocus_um +- range_um` (13 points), then golden section; and the
/// captured power at `a`. The fields are resampled once onto a compact grid that holds the
/// modes over the scan ([`super::compact`], all but 1e-5 of the basis power), where the
/// overlaps equal those on the decoding grid; the denominators stay the decoding grid's
/// frame powers.
pub fn focus_scan<S>(
    fields: ArrayView3<Complex64>,
    grid: &Grid,
    wavelength_nm: f64,
    a: &Alignment,
    sampler: S,
    range_um: f64,
    rank: usize,
) -> FocusScan
where
    S: Fn(&Grid, &Alignment) -> Array3<Complex64> + Sync,
{
    let fields = fields.as_standard_layout();
    let fine = FineFields::new(fields.view(), grid);
    let bext = {
        let b = sampler(grid, &geometry(a));
        BasisExtent::new(b.view(), grid, a.center_um)
    };
    let c = Compact::new(
        &fine,
        &bext,
        &Extent {
            wavelength_nm,
            center_um: Some(a.center_um),
            around: vec![*a],
            center_margin_um: 0.0,
            defocus_margin_um: range_um,
            tail: 1e-5,
            tilt_margin_cycles_per_um: 0.0,
        },
    );
    let red = c.reduce(wavelength_nm, rank);
    let obj = Objective::new(&red, sampler);
    let f = |z: f64| {
        -obj.captured(&Alignment {
            defocus_um: z,
            ..*a
        })
    };
    let n = 13;
    let (z, _) = scan(f, a.defocus_um - range_um, a.defocus_um + range_um, n);
    let h = 2.0 * range_um / (n - 1) as f64;
    let (z, v, _) = golden_section(f, z - h, z + h, 1e-3 * range_um.max(1e-6));
    FocusScan {
        defocus_um: z,
        captured_best: -v,
        captured_at_start: c.captured(&obj.corrected_modes(a)),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::align::analytic::{hg_fields, hg_sampler};
    use ndarray::Array2;

    #[test]
    fn saturation_count_and_peak() {
        let a = Array2::from_shape_fn((4, 4), |(r, c)| (r * 4 + c) as f64 * 300.0);
        let (p, n) = peak_and_saturated(a.view(), 4095.0);
        assert_eq!(p, 4500.0);
        assert_eq!(n, 2);
    }

    /// A hologram of a plane-wave signal s and reference r: DC holds (s + r) squared-sum
    /// energy, each sideband s r per pixel^2 (Takeda et al. 1982, JOSA 72, 156):
    /// ratio = s r / (s + r)^2.
    #[test]
    fn sideband_ratio_of_plane_wave_hologram() {
        let n = 64;
        let (s, r) = (1.0f64, 4.0f64);
        let f0 = [8.0 / 64.0, 4.0 / 64.0];
        let mut img: Vec<Complex64> = (0..n * n)
            .map(|i| {
                let (x, y) = ((i % n) as f64, (i / n) as f64);
                let ph = 2.0 * std::f64::consts::PI * (f0[0] * x + f0[1] * y);
                Complex64::new(s + r + 2.0 * (s * r).sqrt() * ph.cos(), 0.0)
            })
            .collect();
        let fft = crate::align::objective::Fft2::new(n, n);
        let mut scratch = vec![Complex64::new(0.0, 0.0); fft.scratch_len()];
        fft.forward(&mut img, &mut scratch);
        let p = Array2::from_shape_fn((n, n), |(a, b)| img[a * n + b].norm_sqr());
        let q = sideband_to_dc(p.view(), f0, 0.03, 0.03);
        assert!((q - s * r / (s + r).powi(2)).abs() < 1e-9, "{q}");
    }

    #[test]
    fn uniformity_over_disc() {
        let a = Array2::from_shape_fn((21, 21), |(_r, c)| 1.0 + 0.1 * (c as f64 - 10.0));
        let u = reference_uniformity(a.view(), 10.0, 10.0, 5.0).unwrap();
        assert!((u - 0.5 / 1.5).abs() < 1e-12);
        assert!(reference_uniformity(a.view(), -50.0, -50.0, 2.0).is_none());
    }

    /// The captured power peaks at the applied defocus, where P(-dz) P(dz) = 1 restores the
    /// basis modes exactly (angular-spectrum propagation; Goodman, Introduction to Fourier
    /// Optics, 3rd ed., sec. 3.10).
    #[test]
    fn focus_scan_finds_applied_value() {
        let grid = Grid::centred(48, 48, 0.75);
        let truth = Alignment {
            defocus_um: -20.0,
            ..Default::default()
        };
        let (f, _) = hg_fields(&grid, 3, 5.0, &truth, 1064.0, 8, 0.0, 5);
        let scan = focus_scan(
            f.view(),
            &grid,
            1064.0,
            &Alignment::default(),
            hg_sampler(3, 5.0),
            60.0,
            16,
        );
        let z = scan.defocus_um;
        assert!((z + 20.0).abs() < 0.2, "{z}");
        assert!(scan.captured_best > 0.999);
        assert!(scan.captured_at_start < scan.captured_best);
    }

    #[test]
    fn centroid_of_fundamental_mode_fields_is_the_axis() {
        let grid = Grid::centred(48, 48, 0.75);
        let truth = Alignment {
            center_um: [2.0, -3.0],
            ..Default::default()
        };
        let (f, _) = hg_fields(&grid, 1, 5.0, &truth, 1064.0, 3, 0.0, 5);
        let c = field_centroid_um(f.view(), &grid).unwrap();
        assert!(
            (c[0] - 2.0).abs() < 0.01 && (c[1] + 3.0).abs() < 0.01,
            "{c:?}"
        );
    }
}
