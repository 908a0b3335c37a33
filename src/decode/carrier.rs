//! Automatic carrier estimation: the **centre** of the signal's sideband in the mean power
//! spectrum of a channel's region, not its brightest bin.
//!
//! Why the centre: the sideband of one frame is the field's spectrum shifted to the carrier.
//! The |spectrum| of every real mode, and of every real combination of modes, is point
//! symmetric about its centre (F(-k) = conj F(k) for a real field), and defocus multiplies the
//! spectrum by a phase only, so the power-weighted centroid of the sideband is exactly the
//! carrier; the mean over a launch sequence keeps that symmetry. The brightest bin is not:
//! LP_lm modes with l > 0 have lobed or ring-shaped spectra whose maxima lie away from the
//! centre. (Fields with a net circulation, e.g. a single OAM state, are not point symmetric;
//! their centroid still lies on the sideband's axis of power balance, and the basis
//! refinement in [`super::refine`] removes what is left.)
//!
//! Steps ([`estimate`]):
//! 1. The mean power spectrum over the carrier-search frames, divided by the pixel-aperture
//!    factor sinc^2 (it tilts the sideband's power across its width), mapped onto the full
//!    plane (|F(-k)| = |F(k)| for a real image) with the DC exclusion disc removed.
//! 2. Coarse: the maximum of the map box-smoothed over about the sideband's half-width
//!    (a blob, not a bin). A second blob at least two window radii away with at least half
//!    the strength is a second sideband: an error naming both.
//! 3. Fine: the power-weighted centroid, above the noise floor (median of the map outside the
//!    DC disc and the sidebands), inside a soft-edged disc of the sideband's radius, iterated
//!    until the disc stops moving (1e-4 bin). With the floor subtracted the fixed point is the
//!    sideband's centre; white noise only adds scatter.
//! 4. Uncertainty: the centroid's standard deviation from the floor's scatter (median
//!    absolute deviation) propagated through the weighted sum, combined in quadrature with the
//!    change of the centroid when the disc is shrunk to 3/4 of its radius (zero for a point
//!    symmetric sideband; a measure of asymmetry otherwise).
//! 5. Side: of the twin pair the one in the half-plane `fx > 0` (within half a bin of the
//!    `fy` axis: `fy > 0`) is the signal by default; `conjugate` takes its mirror. Which twin
//!    holds the signal cannot be told from the holograms (docs/decoding.md says how to find
//!    out on the bench).
//!
//! Sign conventions: docs/conventions.md ("Holograms, FFT and carrier").
use realfft::RealFftPlanner;

/// Mean |FFT| and mean |FFT|^2 of a region over several frames, bins `[ky][kx]` for
/// `kx in 0..=w/2`.
pub struct MeanSpectrum {
    pub w: usize,
    pub h: usize,
    /// Mean |F| (pictures).
    pub mag: Vec<f64>,
    /// Mean |F|^2 (the estimator).
    pub power: Vec<f64>,
    /// Frames averaged.
    pub frames: usize,
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
        let mut power = vec![0f64; nk * h];
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
                    let p = cols[k * h + ky].norm_sqr();
                    mag[ky * nk + k] += p.sqrt();
                    power[ky * nk + k] += p;
                }
            }
        }
        let inv = 1.0 / frames.len().max(1) as f64;
        mag.iter_mut().for_each(|m| *m *= inv);
        power.iter_mut().for_each(|m| *m *= inv);
        MeanSpectrum {
            w,
            h,
            mag,
            power,
            frames: frames.len(),
        }
    }

    /// |F| at signed bins (ky, kx), using |F(-k)| = |F(k)| for a real image.
    pub fn at(&self, ky: i64, kx: i64) -> f64 {
        self.mag[self.index(ky, kx)]
    }

    /// Index into the half spectrum of signed bins (ky, kx).
    fn index(&self, ky: i64, kx: i64) -> usize {
        let (w, h) = (self.w as i64, self.h as i64);
        let (mut ky, mut kx) = (ky.rem_euclid(h), kx.rem_euclid(w));
        if kx > w / 2 {
            kx = (w - kx) % w;
            ky = (h - ky) % h;
        }
        ky as usize * (self.w / 2 + 1) + kx as usize
    }
}

/// Signed bin of index `k` of an `n`-point FFT.
fn signed(k: usize, n: usize) -> i64 {
    if k > n / 2 {
        k as i64 - n as i64
    } else {
        k as i64
    }
}

/// What the search knows about the channel.
#[derive(Debug, Clone, Copy)]
pub struct SearchSpec {
    /// Radius of the excluded disc around DC, cycles/px.
    pub dc_exclusion: f64,
    /// Take the mirrored sideband.
    pub conjugate: bool,
    /// Pixel fill factor (aperture correction); 0 for none.
    pub fill_factor: f64,
    /// Expected band radius of the signal, cycles/px (NA / (M lambda) * pitch), if known.
    pub band: Option<f64>,
}

/// Which of the twin sidebands was taken.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Side {
    /// The one in the half-plane fx > 0 (or fy > 0 on the fy axis): the default.
    Default,
    /// Its mirror (`conjugate = true`).
    Conjugate,
}

impl Side {
    pub fn as_str(self) -> &'static str {
        match self {
            Side::Default => "fx > 0 (default)",
            Side::Conjugate => "fx < 0 (conjugate)",
        }
    }
}

/// Result of the estimate.
#[derive(Debug, Clone, Copy)]
pub struct Estimate {
    /// Sideband centre, cycles/px (fx, fy), on the side taken.
    pub carrier: [f64; 2],
    /// One standard deviation of each component, cycles/px (module header, step 4).
    pub uncertainty: [f64; 2],
    /// The coarse (smoothed-maximum) position, cycles/px, same side.
    pub coarse: [f64; 2],
    /// Mean power in the sideband disc over the noise floor.
    pub contrast: f64,
    /// Radius of the centroid disc, cycles/px.
    pub disc_radius: f64,
    /// Centroid iterations used.
    pub iterations: usize,
    pub side: Side,
}

/// Why no carrier could be taken.
#[derive(Debug, Clone)]
pub enum Problem {
    /// The region holds no power after background subtraction.
    Flat,
    /// The strongest blob is not above the noise floor.
    NoSideband {
        /// Strongest blob, cycles/px (default side).
        strongest: [f64; 2],
        contrast: f64,
    },
    /// Two blobs of similar strength (two references): positions on the default side and
    /// the weaker's strength relative to the stronger.
    TwoSidebands {
        first: [f64; 2],
        second: [f64; 2],
        ratio: f64,
    },
}

/// Mean sideband power over the floor below which no sideband is taken as found.
pub const MIN_CONTRAST: f64 = 3.0;
/// A second blob at least this strong relative to the first is a second sideband.
pub const SECOND_SIDEBAND_RATIO: f64 = 0.5;

fn sinc(t: f64) -> f64 {
    if t.abs() < 1e-12 {
        1.0
    } else {
        let x = std::f64::consts::PI * t;
        x.sin() / x
    }
}

/// Full-plane map of the corrected mean power, `[ky][kx]` with natural FFT indices.
struct Map {
    w: usize,
    h: usize,
    p: Vec<f64>,
    /// Inside the DC exclusion disc (ignored).
    dc: Vec<bool>,
}

impl Map {
    fn new(s: &MeanSpectrum, spec: &SearchSpec) -> Map {
        let (w, h) = (s.w, s.h);
        let mut p = vec![0.0; w * h];
        let mut dc = vec![false; w * h];
        let ff = spec.fill_factor;
        // Aperture factor per axis, once per column and row.
        let aperture = |n: usize| -> Vec<f64> {
            (0..n)
                .map(|k| {
                    let f = signed(k, n) as f64 / n as f64;
                    if ff > 0.0 {
                        sinc(ff * f).powi(2)
                    } else {
                        1.0
                    }
                })
                .collect()
        };
        let (ax, ay) = (aperture(w), aperture(h));
        let fxs: Vec<f64> = (0..w).map(|k| signed(k, w) as f64 / w as f64).collect();
        let dc2 = spec.dc_exclusion * spec.dc_exclusion;
        for (ky, &ayk) in ay.iter().enumerate() {
            let fy = signed(ky, h) as f64 / h as f64;
            for kx in 0..w {
                let fx = fxs[kx];
                let i = ky * w + kx;
                if fx * fx + fy * fy < dc2 {
                    dc[i] = true;
                    continue;
                }
                let v = s.power[s.index(signed(ky, h), signed(kx, w))];
                p[i] = v / (ax[kx] * ayk).max(1e-6);
            }
        }
        Map { w, h, p, dc }
    }

    fn freq(&self, kx: usize, ky: usize) -> [f64; 2] {
        [
            signed(kx, self.w) as f64 / self.w as f64,
            signed(ky, self.h) as f64 / self.h as f64,
        ]
    }

    /// Periodic box sum over (2 rx + 1) x (2 ry + 1) bins (separable running sums).
    fn smoothed(&self, rx: usize, ry: usize) -> Vec<f64> {
        let (w, h) = (self.w, self.h);
        let rx = rx.min((w - 1) / 2);
        let ry = ry.min((h - 1) / 2);
        let wrap = |i: usize, n: usize| if i >= n { i - n } else { i };
        let mut a = vec![0.0; w * h];
        for y in 0..h {
            let row = &self.p[y * w..(y + 1) * w];
            let mut acc: f64 = (0..=2 * rx).map(|d| row[(d + w - rx) % w]).sum();
            for x in 0..w {
                a[y * w + x] = acc;
                acc += row[wrap(x + rx + 1, w)] - row[wrap(x + w - rx, w)];
            }
        }
        let mut b = vec![0.0; w * h];
        let mut acc: Vec<f64> = (0..w)
            .map(|x| (0..=2 * ry).map(|d| a[((d + h - ry) % h) * w + x]).sum())
            .collect();
        for y in 0..h {
            b[y * w..(y + 1) * w].copy_from_slice(&acc);
            let (add, sub) = (wrap(y + ry + 1, h) * w, wrap(y + h - ry, h) * w);
            for x in 0..w {
                acc[x] += a[add + x] - a[sub + x];
            }
        }
        b
    }

    /// Weighted centroid around `c` (cycles/px) within a soft disc of `radius`, after
    /// subtracting `floor`: (centroid, sum of weights x excess, variance factor
    /// sum w^2 (f - c)^2 per axis).
    fn centroid(&self, c: [f64; 2], radius: f64, floor: f64) -> Option<([f64; 2], f64, [f64; 2])> {
        let (w, h) = (self.w as f64, self.h as f64);
        let edge = 1.5 / w.min(h);
        let outer = radius + edge;
        let (cx, cy) = (c[0] * w, c[1] * h);
        let (rx, ry) = ((outer * w).ceil() as i64, (outer * h).ceil() as i64);
        let (mut s, mut sx, mut sy) = (0.0, 0.0, 0.0);
        let mut rows = Vec::new();
        for dy in -ry..=ry {
            let ky = cy.round() as i64 + dy;
            for dx in -rx..=rx {
                let kx = cx.round() as i64 + dx;
                let f = [kx as f64 / w, ky as f64 / h];
                let d = (f[0] - c[0]).hypot(f[1] - c[1]);
                let wt = if d <= radius - edge {
                    1.0
                } else if d >= outer {
                    continue;
                } else {
                    0.5 * (1.0 + (std::f64::consts::PI * (d - radius + edge) / (2.0 * edge)).cos())
                };
                let i = ky.rem_euclid(self.h as i64) as usize * self.w
                    + kx.rem_euclid(self.w as i64) as usize;
                if self.dc[i] {
                    continue;
                }
                let v = wt * (self.p[i] - floor);
                s += v;
                sx += v * f[0];
                sy += v * f[1];
                rows.push((wt, f));
            }
        }
        if s.is_nan() || s <= 0.0 {
            return None;
        }
        let m = [sx / s, sy / s];
        let mut var = [0.0; 2];
        for (wt, f) in rows {
            var[0] += wt * wt * (f[0] - m[0]).powi(2);
            var[1] += wt * wt * (f[1] - m[1]).powi(2);
        }
        Some((m, s, var))
    }
}

/// On the default side: `c` or its mirror, whichever lies in fx > 0 (fy > 0 within half a
/// bin of the fy axis).
fn default_side(c: [f64; 2], w: usize) -> [f64; 2] {
    let half_bin = 0.5 / w as f64;
    let keep = if c[0].abs() > half_bin {
        c[0] > 0.0
    } else {
        c[1] > 0.0
    };
    if keep {
        c
    } else {
        [-c[0], -c[1]]
    }
}

/// Largest window radius that keeps a sideband at `c` clear of DC and its twin (see
/// [`super::window::auto_radius`]).
fn clear_radius(c: [f64; 2]) -> f64 {
    super::window::auto_radius(c)
}

/// Estimate the sideband centre; see the module header.
pub fn estimate(s: &MeanSpectrum, spec: &SearchSpec) -> Result<Estimate, Problem> {
    let map = Map::new(s, spec);
    let (w, h) = (map.w, map.h);
    let total: f64 = map.p.iter().sum();
    if !(total > 0.0 && total.is_finite()) {
        return Err(Problem::Flat);
    }
    let n = w.min(h) as f64;
    // Half-width of the smoothing box: about half the band radius.
    let band_guess = match spec.band {
        Some(b) if b > 0.0 => b,
        _ => {
            // From the brightest bin: the clear radius there bounds the band.
            let (i, _) = map
                .p
                .iter()
                .enumerate()
                .fold(
                    (0, f64::NEG_INFINITY),
                    |a, (i, &v)| if v > a.1 { (i, v) } else { a },
                );
            0.5 * clear_radius(map.freq(i % w, i / w))
        }
    };
    let r_box = |len: usize| ((0.5 * band_guess * len as f64).round() as usize).max(1);
    let (rx, ry) = (r_box(w), r_box(h));
    let sm = map.smoothed(rx, ry);
    let guard = spec.dc_exclusion + 2.0 * (rx as f64 / w as f64).max(ry as f64 / h as f64);
    let guard2 = guard * guard;
    let usable = |i: usize| {
        let f = map.freq(i % w, i / w);
        f[0] * f[0] + f[1] * f[1] >= guard2
    };
    let mut best = (usize::MAX, f64::NEG_INFINITY);
    for (i, &v) in sm.iter().enumerate() {
        if v > best.1 && usable(i) {
            best = (i, v);
        }
    }
    if best.0 == usize::MAX {
        return Err(Problem::Flat);
    }
    let coarse = default_side(map.freq(best.0 % w, best.0 / w), w);
    // Disc radius: the sideband's band with a margin, never reaching DC or the twin.
    let clear = clear_radius(coarse);
    let disc = match spec.band {
        Some(b) if b > 0.0 => (1.2 * b + 2.0 / n).min(clear),
        _ => 0.9 * clear,
    };
    // Noise floor: the map outside the DC disc and outside both sideband discs (on a
    // lattice of at most about 2^16 bins: the median of that many is as good as of all).
    let step = (((w * h) as f64 / 65536.0).sqrt().floor() as usize).max(1);
    let mut bg = Vec::with_capacity((w / step + 1) * (h / step + 1));
    for ky in (0..h).step_by(step) {
        for kx in (0..w).step_by(step) {
            let i = ky * w + kx;
            if map.dc[i] {
                continue;
            }
            let f = map.freq(kx, ky);
            let d1 = (f[0] - coarse[0]).powi(2) + (f[1] - coarse[1]).powi(2);
            let d2 = (f[0] + coarse[0]).powi(2) + (f[1] + coarse[1]).powi(2);
            let r1 = (1.5 * disc).powi(2);
            if d1 > r1 && d2 > r1 && f[0] * f[0] + f[1] * f[1] > 4.0 * disc * disc {
                bg.push(map.p[i]);
            }
        }
    }
    let median = |v: &mut Vec<f64>| -> f64 {
        if v.is_empty() {
            return 0.0;
        }
        let mid = v.len() / 2;
        *v.select_nth_unstable_by(mid, |a, b| a.total_cmp(b)).1
    };
    let floor = median(&mut bg);
    let mut dev: Vec<f64> = bg.iter().map(|v| (v - floor).abs()).collect();
    let sigma = 1.4826 * median(&mut dev);

    // Fine: iterate the centroid.
    let mut c = coarse;
    let mut iterations = 0;
    let mut last = None;
    for _ in 0..100 {
        iterations += 1;
        let Some((m, sum, var)) = map.centroid(c, disc, floor) else {
            break;
        };
        let moved = ((m[0] - c[0]) * w as f64).hypot((m[1] - c[1]) * h as f64);
        c = m;
        last = Some((sum, var));
        if moved < 1e-4 {
            break;
        }
    }
    let Some((sum, var)) = last else {
        return Err(Problem::NoSideband {
            strongest: coarse,
            contrast: 0.0,
        });
    };
    // Mean excess in the disc over the floor.
    let disc_bins = std::f64::consts::PI * disc * disc * (w * h) as f64;
    let contrast = if floor > 0.0 {
        1.0 + sum / (disc_bins * floor)
    } else {
        f64::INFINITY
    };
    if contrast < MIN_CONTRAST {
        return Err(Problem::NoSideband {
            strongest: c,
            contrast,
        });
    }
    // Second sideband: a local maximum of the smoothed map away from the first and its twin.
    let first_val = best.1;
    let floor_box = floor * ((2 * rx + 1) * (2 * ry + 1)) as f64;
    let mut second = (usize::MAX, f64::NEG_INFINITY);
    for ky in 0..h {
        for kx in 0..w {
            let i = ky * w + kx;
            let v = sm[i];
            if v <= second.1 || !usable(i) {
                continue;
            }
            let f = map.freq(kx, ky);
            let d1 = (f[0] - coarse[0]).powi(2) + (f[1] - coarse[1]).powi(2);
            let d2 = (f[0] + coarse[0]).powi(2) + (f[1] + coarse[1]).powi(2);
            let r2 = 4.0 * disc * disc;
            if d1 < r2 || d2 < r2 {
                continue;
            }
            let local_max = (-1i64..=1).all(|dy| {
                (-1i64..=1).all(|dx| {
                    let j = (ky as i64 + dy).rem_euclid(h as i64) as usize * w
                        + (kx as i64 + dx).rem_euclid(w as i64) as usize;
                    sm[j] <= v
                })
            });
            if local_max {
                second = (i, v);
            }
        }
    }
    if second.0 != usize::MAX {
        let ratio = (second.1 - floor_box) / (first_val - floor_box);
        if ratio >= SECOND_SIDEBAND_RATIO {
            return Err(Problem::TwoSidebands {
                first: coarse,
                second: default_side(map.freq(second.0 % w, second.0 / w), w),
                ratio,
            });
        }
    }

    let stat = [sigma * var[0].sqrt() / sum, sigma * var[1].sqrt() / sum];
    let asym = map
        .centroid(c, 0.75 * disc, floor)
        .map(|(m, _, _)| [m[0] - c[0], m[1] - c[1]])
        .unwrap_or([0.0; 2]);
    let uncertainty = [stat[0].hypot(asym[0]), stat[1].hypot(asym[1])];
    let c = default_side(c, w);
    let (carrier, coarse, side) = if spec.conjugate {
        ([-c[0], -c[1]], [-coarse[0], -coarse[1]], Side::Conjugate)
    } else {
        (c, coarse, Side::Default)
    };
    Ok(Estimate {
        carrier,
        uncertainty,
        coarse,
        contrast,
        disc_radius: disc,
        iterations,
        side,
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A hologram of a ring-spectrum field on a carrier: the brightest bin is on the ring,
    /// the centroid is the carrier (common practice, no source).
    fn hologram(w: usize, h: usize, c: [f64; 2], ring: f64) -> Vec<f32> {
        let mut out = vec![0f32; w * h];
        // Field: sum of plane waves on a ring of radius `ring` cycles/px, real combination
        // (point-symmetric spectrum), plus a strong unit reference.
        let nwaves = 12;
        for y in 0..h {
            for x in 0..w {
                let (xf, yf) = (x as f64, y as f64);
                let mut s = num_complex::Complex64::default();
                for k in 0..nwaves {
                    let a = std::f64::consts::TAU * k as f64 / nwaves as f64;
                    let f = [c[0] + ring * a.cos(), c[1] + ring * a.sin()];
                    let env = (-((xf - w as f64 / 2.0).powi(2) + (yf - h as f64 / 2.0).powi(2))
                        / (0.08 * (w * w) as f64))
                        .exp();
                    s += env
                        * 0.05
                        * num_complex::Complex64::from_polar(
                            1.0,
                            std::f64::consts::TAU * (f[0] * xf + f[1] * yf),
                        );
                }
                out[y * w + x] = (num_complex::Complex64::new(1.0, 0.0) + s).norm_sqr() as f32;
            }
        }
        out
    }

    #[test]
    fn centroid_not_brightest_bin_for_a_ring_spectrum() {
        let (w, h) = (128, 96);
        let c = [0.2113, 0.0731];
        let fr = hologram(w, h, c, 0.04);
        let s = MeanSpectrum::compute(&[&fr], w, [0, 0, w, h], &[]);
        let spec = SearchSpec {
            dc_exclusion: 0.05,
            conjugate: false,
            fill_factor: 0.0,
            band: Some(0.05),
        };
        let e = estimate(&s, &spec).unwrap();
        assert!((e.carrier[0] - c[0]).abs() * w as f64 <= 0.05, "{e:?}");
        assert!((e.carrier[1] - c[1]).abs() * h as f64 <= 0.05, "{e:?}");
        assert_eq!(e.side, Side::Default);
        let spec2 = SearchSpec {
            conjugate: true,
            ..spec
        };
        let e2 = estimate(&s, &spec2).unwrap();
        assert_eq!(e2.carrier, [-e.carrier[0], -e.carrier[1]]);
    }

    #[test]
    fn flat_region_is_reported() {
        let fr = vec![3f32; 64 * 64];
        let s = MeanSpectrum::compute(&[&fr], 64, [0, 0, 64, 64], &fr);
        let spec = SearchSpec {
            dc_exclusion: 0.05,
            conjugate: false,
            fill_factor: 1.0,
            band: None,
        };
        assert!(matches!(estimate(&s, &spec), Err(Problem::Flat)));
    }
}
