//! A plain 2-D complex FFT for the simulator (row-major `[row, col]` data).
//!
//! Sign (docs/conventions.md): forward `F(k) = sum_n f(n) exp(-i 2 pi k n / N)`, inverse with
//! `+i` and *without* the 1/N factor (callers scale). Plans are built once; the caller owns
//! the scratch, so repeated transforms do not allocate.
use num_complex::Complex64;
use rustfft::{Fft, FftDirection, FftPlanner};
use std::sync::Arc;

/// A planned 2-D transform of `ny` rows by `nx` columns in one direction.
#[derive(Clone)]
pub struct Fft2 {
    pub nx: usize,
    pub ny: usize,
    row: Arc<dyn Fft<f64>>,
    col: Arc<dyn Fft<f64>>,
}

/// Scratch memory for [`Fft2::process`].
#[derive(Default)]
pub struct Fft2Scratch {
    column: Vec<Complex64>,
    fft: Vec<Complex64>,
}

impl Fft2 {
    /// Plan a transform (`inverse`: the +i direction).
    pub fn new(nx: usize, ny: usize, inverse: bool) -> Fft2 {
        let mut p = FftPlanner::new();
        let dir = if inverse {
            FftDirection::Inverse
        } else {
            FftDirection::Forward
        };
        Fft2 {
            nx,
            ny,
            row: p.plan_fft(nx, dir),
            col: p.plan_fft(ny, dir),
        }
    }

    /// Transform `data` (length nx * ny, row-major) in place.
    pub fn process(&self, data: &mut [Complex64], s: &mut Fft2Scratch) {
        let (nx, ny) = (self.nx, self.ny);
        debug_assert_eq!(data.len(), nx * ny);
        let need = self
            .row
            .get_inplace_scratch_len()
            .max(self.col.get_inplace_scratch_len());
        s.fft.resize(need, Complex64::default());
        s.column.resize(ny, Complex64::default());
        for r in data.chunks_exact_mut(nx) {
            self.row.process_with_scratch(r, &mut s.fft);
        }
        for c in 0..nx {
            for r in 0..ny {
                s.column[r] = data[r * nx + c];
            }
            self.col.process_with_scratch(&mut s.column, &mut s.fft);
            for r in 0..ny {
                data[r * nx + c] = s.column[r];
            }
        }
    }
}

/// Signed frequency of FFT bin `k` of `n`, cycles per sample (bins at and above n/2 are
/// negative).
#[inline]
pub fn freq(k: usize, n: usize) -> f64 {
    let k = k as f64;
    let n_f = n as f64;
    if k >= n_f / 2.0 {
        (k - n_f) / n_f
    } else {
        k / n_f
    }
}

/// Smallest n' >= n whose prime factors are 2, 3 and 5 only (fast FFT sizes).
pub fn smooth_size(n: usize) -> usize {
    let mut m = n.max(1);
    loop {
        let mut r = m;
        for p in [2, 3, 5] {
            while r % p == 0 {
                r /= p;
            }
        }
        if r == 1 {
            return m;
        }
        m += 1;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Against the plainly correct O(N^2) DFT (common practice, no source).
    #[test]
    fn matches_naive_dft_and_sign() {
        let (nx, ny) = (6, 5);
        let data: Vec<Complex64> = (0..nx * ny)
            .map(|i| Complex64::new((i as f64 * 0.37).sin(), (i as f64 * 0.11).cos()))
            .collect();
        let mut got = data.clone();
        Fft2::new(nx, ny, false).process(&mut got, &mut Fft2Scratch::default());
        for ky in 0..ny {
            for kx in 0..nx {
                let mut acc = Complex64::default();
                for y in 0..ny {
                    for x in 0..nx {
                        let ph = -2.0
                            * std::f64::consts::PI
                            * (kx as f64 * x as f64 / nx as f64 + ky as f64 * y as f64 / ny as f64);
                        acc += data[y * nx + x] * Complex64::from_polar(1.0, ph);
                    }
                }
                assert!((acc - got[ky * nx + kx]).norm() < 1e-10);
            }
        }
        // exp(+i 2 pi f x) peaks at +f
        let f = 2usize;
        let mut wave: Vec<Complex64> = (0..nx * ny)
            .map(|i| {
                let x = (i % nx) as f64;
                Complex64::from_polar(1.0, 2.0 * std::f64::consts::PI * f as f64 * x / nx as f64)
            })
            .collect();
        Fft2::new(nx, ny, false).process(&mut wave, &mut Fft2Scratch::default());
        assert!((wave[f].norm() - (nx * ny) as f64).abs() < 1e-9);
        assert_eq!(smooth_size(257), 270);
        assert!((freq(4, 6) + 2.0 / 6.0).abs() < 1e-15);
    }
}
