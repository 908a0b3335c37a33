//! Automatic carrier search: the strongest peak of the mean |spectrum| of a channel's region
//! outside a DC exclusion disc, in the half-plane `fx > 0` (or `fx == 0, fy > 0`), refined
//! below one FFT bin by a parabola through the log magnitudes of the peak and its
//! neighbours along each axis (exact for a Gaussian peak; common practice, no source).
//! With `conjugate` the mirrored peak (`-f`) is returned. Sign conventions:
//! docs/conventions.md ("Holograms, FFT and carrier").
use realfft::RealFftPlanner;

/// Mean |FFT| of a region over several frames, bins `[ky][kx]` for `kx in 0..=w/2`.
pub struct MeanSpectrum {
    pub w: usize,
    pub h: usize,
    pub mag: Vec<f64>,
}

impl MeanSpectrum {
    /// Sum |FFT| of each `frame` (full frames of width `frame_w`) over `region`
    /// `[x0, y0, w, h]`, after subtracting `background` (region-sized, may be empty), and
    /// divide by the number of frames.
    pub fn compute(
        frames: &[&[f32]],
        frame_w: usize,
        region: [usize; 4],
        background: &[f32],
    ) -> MeanSpectrum {
        let [x0, y0, w, h] = region;
        let nk = w / 2 + 1;
        let mut planner = RealFftPlanner::<f64>::new();
        let rfft = planner.plan_fft_forward(w);
        let cfft = rustfft::FftPlanner::<f64>::new().plan_fft_forward(h);
        let mut row = vec![0f64; w];
        let mut spec = vec![num_complex::Complex64::default(); nk];
        let mut cols = vec![num_complex::Complex64::default(); nk * h];
        let mut mag = vec![0f64; nk * h];
        for f in frames {
            for y in 0..h {
                let src = &f[(y0 + y) * frame_w + x0..][..w];
                for x in 0..w {
                    let b = if background.is_empty() {
                        0.0
                    } else {
                        background[y * w + x]
                    };
                    row[x] = (src[x] - b) as f64;
                }
                rfft.process(&mut row, &mut spec)
                    .expect("sizes match the plan");
                for k in 0..nk {
                    cols[k * h + y] = spec[k];
                }
            }
            for k in 0..nk {
                cfft.process(&mut cols[k * h..(k + 1) * h]);
                for ky in 0..h {
                    mag[ky * nk + k] += cols[k * h + ky].norm();
                }
            }
        }
        let inv = 1.0 / frames.len().max(1) as f64;
        mag.iter_mut().for_each(|m| *m *= inv);
        MeanSpectrum { w, h, mag }
    }

    /// |F| at signed bins (ky, kx), using |F(-k)| = |F(k)| for a real image.
    pub fn at(&self, ky: i64, kx: i64) -> f64 {
        let (w, h) = (self.w as i64, self.h as i64);
        let (mut ky, mut kx) = (ky.rem_euclid(h), kx.rem_euclid(w));
        if kx > w / 2 {
            kx = (w - kx) % w;
            ky = (h - ky) % h;
        }
        self.mag[ky as usize * (self.w / 2 + 1) + kx as usize]
    }

    /// Signed frequency (cycles/px) of bin index `k` of an `n`-point FFT.
    fn signed(k: usize, n: usize) -> i64 {
        if k > n / 2 {
            k as i64 - n as i64
        } else {
            k as i64
        }
    }
}

/// Result of the search.
#[derive(Debug, Clone, Copy)]
pub struct Peak {
    /// Refined position of the sideband, cycles/px (fx, fy).
    pub carrier: [f64; 2],
    /// Mean |F| at the peak bin.
    pub magnitude: f64,
    /// The peak's magnitude over the median magnitude outside the DC exclusion.
    pub contrast: f64,
}

/// Find the sideband; see the module header. `dc_exclusion` in cycles/px.
pub fn find_peak(s: &MeanSpectrum, dc_exclusion: f64, conjugate: bool) -> Peak {
    let (w, h) = (s.w, s.h);
    let nk = w / 2 + 1;
    let mut best = (-1.0f64, 0i64, 0i64);
    let mut outside = Vec::with_capacity(nk * h);
    for ky in 0..h {
        let fy_bin = MeanSpectrum::signed(ky, h);
        let fy = fy_bin as f64 / h as f64;
        for kx in 0..nk {
            let fx = kx as f64 / w as f64;
            if (fx * fx + fy * fy).sqrt() < dc_exclusion {
                continue;
            }
            // half-plane fx > 0, or fx == 0 with fy > 0 (the Nyquist column counts as fx > 0)
            if kx == 0 && fy_bin <= 0 {
                continue;
            }
            let m = s.mag[ky * nk + kx];
            outside.push(m);
            if m > best.0 {
                best = (m, fy_bin, kx as i64);
            }
        }
    }
    let (m, ky, kx) = best;
    let median = if outside.is_empty() {
        0.0
    } else {
        let mid = outside.len() / 2;
        *outside.select_nth_unstable_by(mid, |a, b| a.total_cmp(b)).1
    };
    let refine = |lo: f64, mid: f64, hi: f64| {
        let (l, c, r) = (
            lo.max(1e-300).ln(),
            mid.max(1e-300).ln(),
            hi.max(1e-300).ln(),
        );
        let den = l - 2.0 * c + r;
        if den < 0.0 {
            (0.5 * (l - r) / den).clamp(-0.5, 0.5)
        } else {
            0.0
        }
    };
    let dx = refine(s.at(ky, kx - 1), m, s.at(ky, kx + 1));
    let dy = refine(s.at(ky - 1, kx), m, s.at(ky + 1, kx));
    let mut c = [(kx as f64 + dx) / w as f64, (ky as f64 + dy) / h as f64];
    if conjugate {
        c = [-c[0], -c[1]];
    }
    Peak {
        carrier: c,
        magnitude: m,
        contrast: if median > 0.0 {
            m / median
        } else {
            f64::INFINITY
        },
    }
}
