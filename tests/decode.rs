//! Off-axis decoding: analytic fields written as 16-bit holograms decode to their known
//! mode coefficients; carrier, sign and normalisation conventions; the pruned FFT path
//! against a full FFT; Parseval; bad input.
use modegram::decode::{
    decode_prepared, decode_stack, prepare, projectors, BasisSampler, DecodeOptions,
};
use modegram::frames::write_tiff_u16;
use modegram::grid::{Alignment, Grid};
use modegram::setup::Setup;
use ndarray::Array3;
use num_complex::Complex64;
use std::f64::consts::PI;
use std::path::{Path, PathBuf};

const PITCH_UM: f64 = 5.5;
const MAG: f64 = 20.0;
const FP: f64 = PITCH_UM / MAG; // camera pixel in the fibre plane, um
const LAMBDA_UM: f64 = 1.064;

fn setup_text(region: [usize; 4], extra_channel: &str, extra: &str) -> String {
    format!(
        r#"version = 1
[light]
wavelength_nm = 1064.0
[camera]
pixel_pitch_um = {PITCH_UM}
fill_factor = 1e-6
[fiber]
profile = "graded"
core_radius_um = 25.0
na = 0.2
{extra}
[[channel]]
name = "H"
region = [{}, {}, {}, {}]
magnification = {MAG}
{extra_channel}
"#,
        region[0], region[1], region[2], region[3]
    )
}

fn load(dir: &Path, text: &str) -> Setup {
    let p = dir.join("setup.toml");
    std::fs::write(&p, text).unwrap();
    Setup::load(&p).unwrap()
}

/// Hologram I = |S + R|^2 of a camera-plane signal S (sqrt counts, region-sized) with the
/// reference R = |R| exp(+i 2 pi f_R . (r - r_c)), f_R = -carrier (docs/conventions.md).
fn hologram(
    fw: usize,
    fh: usize,
    region: [usize; 4],
    s: &dyn Fn(f64, f64) -> Complex64,
    carrier: [f64; 2],
    r2: f64,
) -> Vec<f64> {
    let [x0, y0, w, h] = region;
    let (cx, cy) = ((x0 + w / 2) as f64, (y0 + h / 2) as f64);
    let ra = r2.sqrt();
    let mut out = vec![r2; fw * fh];
    for y in 0..fh {
        for x in 0..fw {
            let (dx, dy) = (x as f64 - cx, y as f64 - cy);
            let r = Complex64::from_polar(ra, -2.0 * PI * (carrier[0] * dx + carrier[1] * dy));
            out[y * fw + x] = (s(dx, dy) + r).norm_sqr();
        }
    }
    out
}

fn to_u16(v: &[f64]) -> Vec<u16> {
    v.iter()
        .map(|&x| x.round().clamp(0.0, 65535.0) as u16)
        .collect()
}

fn write_frames(dir: &Path, name: &str, w: usize, h: usize, frames: &[Vec<f64>]) -> PathBuf {
    let p = dir.join(name);
    let q: Vec<Vec<u16>> = frames.iter().map(|f| to_u16(f)).collect();
    let refs: Vec<&[u16]> = q.iter().map(Vec::as_slice).collect();
    write_tiff_u16(&p, w, h, &refs).unwrap();
    p
}

/// Oscillator eigenfunction psi_n(xi) (Hermite functions), physicists' H_n by recurrence.
fn hermite_fn(n: usize, xi: f64) -> f64 {
    let (mut h0, mut h1) = (1.0, 2.0 * xi);
    let mut norm = PI.sqrt(); // 2^k k! sqrt(pi)
    if n == 0 {
        return h0 * (-xi * xi / 2.0).exp() / norm.sqrt();
    }
    norm *= 2.0;
    for k in 1..n {
        let h2 = 2.0 * xi * h1 - 2.0 * k as f64 * h0;
        h0 = h1;
        h1 = h2;
        norm *= 2.0 * (k + 1) as f64;
    }
    h1 * (-xi * xi / 2.0).exp() / norm.sqrt()
}

/// HG_{n,m} of waist w0 (1/e field radius), unit power: psi_n(sqrt2 x/w0) psi_m(sqrt2 y/w0)
/// sqrt(2)/w0.
fn hg(n: usize, m: usize, w0: f64, u: f64, v: f64) -> f64 {
    let s = 2f64.sqrt() / w0;
    hermite_fn(n, s * u) * hermite_fn(m, s * v) * s
}

const NMAX: usize = 8;

fn hg_sampler(w0: f64) -> impl Fn(&Grid, &Alignment) -> modegram::Result<Array3<Complex64>> + Sync {
    move |g: &Grid, a: &Alignment| {
        let mut b = Array3::zeros((NMAX * NMAX, g.ny, g.nx));
        for n in 0..NMAX {
            for m in 0..NMAX {
                for iy in 0..g.ny {
                    for ix in 0..g.nx {
                        let (u, v) = a.to_fibre(g.x_um(ix), g.y_um(iy));
                        b[[n * NMAX + m, iy, ix]] = Complex64::new(hg(n, m, w0, u, v), 0.0);
                    }
                }
            }
        }
        Ok(b)
    }
}

/// Coherent-state coefficients of f(xi) = exp(i p0 xi) psi_0(xi - xi0):
/// c_n = exp(i p0 xi0 / 2) exp(-|alpha|^2/2) alpha^n / sqrt(n!), alpha = (xi0 + i p0)/sqrt2
/// (Glauber 1963, Phys. Rev. 131, 2766: displaced ground state; position form from memory).
fn coherent(n: usize, xi0: f64, p0: f64) -> Complex64 {
    let alpha = Complex64::new(xi0, p0) / 2f64.sqrt();
    let fact: f64 = (1..=n).map(|k| k as f64).product();
    Complex64::from_polar(1.0, p0 * xi0 / 2.0)
        * (-alpha.norm_sqr() / 2.0).exp()
        * alpha.powu(n as u32)
        / fact.sqrt()
}

struct Beam {
    w0: f64,
    d: [f64; 2],
    tilt_mrad: [f64; 2],
    amp: f64,
}

impl Beam {
    /// Fibre-plane field (sqrt counts / um): amp * exp(i k t.x) G(x - d), unit-power Gaussian.
    fn field(&self, x: f64, y: f64) -> Complex64 {
        let k = 2.0 * PI / LAMBDA_UM;
        let g = hg(0, 0, self.w0, x - self.d[0], y - self.d[1]);
        Complex64::from_polar(
            self.amp * g,
            k * 1e-3 * (self.tilt_mrad[0] * x + self.tilt_mrad[1] * y),
        )
    }
    /// Camera-plane signal S = E * FP at pixel offset (dx, dy) from the centre pixel.
    fn camera(&self, dx: f64, dy: f64) -> Complex64 {
        self.field(dx * FP, dy * FP) * FP
    }
    /// HG_{n,m} coefficient: product of 1-D coherent states; xi = sqrt2 x / w0,
    /// p0 = k t w0 / sqrt2 (tilt as momentum in xi units).
    fn coefficient(&self, n: usize, m: usize, tilt_removed_mrad: [f64; 2]) -> Complex64 {
        let k = 2.0 * PI / LAMBDA_UM;
        let s = 2f64.sqrt() / self.w0;
        let p = |i: usize| k * (self.tilt_mrad[i] - tilt_removed_mrad[i]) * 1e-3 / s;
        self.amp * coherent(n, s * self.d[0], p(0)) * coherent(m, s * self.d[1], p(1))
    }
}

fn rel_err(got: &[Complex64], want: &[Complex64]) -> f64 {
    let num: f64 = got.iter().zip(want).map(|(a, b)| (a - b).norm_sqr()).sum();
    let den: f64 = want.iter().map(|b| b.norm_sqr()).sum();
    (num / den).sqrt()
}

fn no_progress(_: usize) {}

/// A tilted, offset Gaussian beam decodes to its coherent-state HG coefficients within
/// 1e-3 (relative norm of the coefficient error), with a reference frame and without one
/// (reference intensity estimated from the hologram).
#[test]
fn tilted_offset_gaussian_decodes_to_its_hg_coefficients() {
    let d = tempfile::tempdir().unwrap();
    let region = [0, 0, 256, 256];
    let carrier = [0.23, 0.11];
    let beam = Beam {
        w0: 4.0,
        d: [2.5, -1.5],
        tilt_mrad: [30.0, -20.0],
        amp: 1500.0,
    };
    let r2 = 20000.0;
    let holo = hologram(256, 256, region, &|x, y| beam.camera(x, y), carrier, r2);
    let stack = write_frames(d.path(), "h.tif", 256, 256, &[holo]);
    write_frames(d.path(), "ref.tif", 256, 256, &[vec![r2; 256 * 256]]);
    let sampler = hg_sampler(beam.w0);
    for (with_ref, removed) in [
        (true, [0.0, 0.0]),
        (false, [0.0, 0.0]),
        (true, [30.0, -20.0]),
    ] {
        let extra = if with_ref {
            "[frames]\nreference = \"ref.tif\""
        } else {
            ""
        };
        // the carrier is given: an automatic search would take the tilted beam's spectral
        // peak, absorbing the tilt into the carrier
        let ch = format!(
            "carrier = [{}, {}]\ntilt_mrad = [{}, {}]",
            carrier[0], carrier[1], removed[0], removed[1]
        );
        let setup = load(d.path(), &setup_text(region, &ch, extra));
        let dec = decode_stack(
            &setup,
            Some(&sampler as BasisSampler),
            std::slice::from_ref(&stack),
            &DecodeOptions::default(),
            &no_progress,
        )
        .unwrap();
        let got: Vec<Complex64> = dec.coefficients.iter().copied().collect();
        let want: Vec<Complex64> = (0..NMAX)
            .flat_map(|n| (0..NMAX).map(move |m| (n, m)))
            .map(|(n, m)| beam.coefficient(n, m, removed))
            .collect();
        let e = rel_err(&got, &want);
        assert!(
            e < 1e-3,
            "with_ref {with_ref}, removed {removed:?}: relative error {e:.2e}"
        );
        // field power in counts: amp^2 (unit-power Gaussian)
        let p = dec.field_power[[0, 0]];
        assert!((p / (beam.amp * beam.amp) - 1.0).abs() < 2e-3, "power {p}");
        assert!(dec.captured[[0, 0]] > 0.999, "{}", dec.captured[[0, 0]]);
    }
}

/// The automatic carrier is found within 0.01 cycles/px for several angles and periods,
/// down to 2.5 px per fringe, with a warning below 3 px per fringe (common practice, no
/// source; REFERENCES.md "Fringe sampling").
#[test]
fn carrier_found_for_angles_and_periods() {
    let d = tempfile::tempdir().unwrap();
    let region = [0, 0, 128, 128];
    let beam = Beam {
        w0: 3.0,
        d: [0.5, 0.3],
        tilt_mrad: [0.0, 0.0],
        amp: 600.0,
    };
    for (period, angle_deg) in [
        (8.0, 0.0),
        (5.0, 30.0),
        (4.0, 135.0),
        (6.5, -60.0),
        (3.2, 45.0),
        (2.5, 10.0),
        (2.2, 90.0),
    ] {
        let a: f64 = f64::to_radians(angle_deg);
        let carrier = [a.cos() / period, a.sin() / period];
        let holo = hologram(
            128,
            128,
            region,
            &|x, y| beam.camera(x, y),
            carrier,
            10000.0,
        );
        let name = format!("c{period}_{angle_deg}.tif");
        let stack = write_frames(d.path(), &name, 128, 128, &[holo]);
        // the half-plane rule picks fx > 0 (or fx == 0, fy > 0); conjugate flips to the mirror
        let flip = carrier[0] < -1e-12 || (carrier[0].abs() < 1e-12 && carrier[1] < 0.0);
        let ch = if flip { "conjugate = true" } else { "" };
        let setup = load(d.path(), &setup_text(region, ch, ""));
        let p = prepare(&setup, &[stack], &DecodeOptions::default()).unwrap();
        let c = p.channels[0].carrier_cycles_per_px;
        assert!(
            (c[0] - carrier[0]).abs() < 0.01 && (c[1] - carrier[1]).abs() < 0.01,
            "period {period} angle {angle_deg}: found {c:?}, true {carrier:?}"
        );
        let warned = p
            .warnings
            .iter()
            .any(|w| w.contains("below 3 px per fringe"));
        assert_eq!(warned, period < 3.0, "period {period}: {:?}", p.warnings);
    }
}

/// Direction of the conventions (docs/conventions.md): the signal's sideband sits at
/// -f_R (= the setup's carrier), found in the fx > 0 half-plane; a signal carrying the phase
/// +k t x decodes with a phase growing along +x with slope k t (common practice, no source).
#[test]
fn sideband_position_and_tilt_phase_slope_have_the_documented_sign() {
    let d = tempfile::tempdir().unwrap();
    let region = [0, 0, 128, 128];
    let beam = Beam {
        w0: 6.0,
        d: [0.0, 0.0],
        tilt_mrad: [40.0, 0.0],
        amp: 800.0,
    };
    // reference tilted towards -x: f_R = (-0.25, 0), so the signal sideband is at +0.25;
    // the beam's tilt moves its spectral peak by +t / lambda * FP along +x
    let holo = hologram(
        128,
        128,
        region,
        &|x, y| beam.camera(x, y),
        [0.25, 0.0],
        10000.0,
    );
    let stack = write_frames(d.path(), "t.tif", 128, 128, &[holo]);
    let shift = 0.040 / LAMBDA_UM * FP;
    for (conj, sign) in [("", 1.0), ("conjugate = true", -1.0)] {
        let setup = load(d.path(), &setup_text(region, conj, ""));
        let p = prepare(
            &setup,
            std::slice::from_ref(&stack),
            &DecodeOptions::default(),
        )
        .unwrap();
        let c = p.channels[0].carrier_cycles_per_px;
        assert!(
            (c[0] - sign * (0.25 + shift)).abs() < 2e-3 && c[1].abs() < 2e-3,
            "{conj}: {c:?}"
        );
    }
    let opts = DecodeOptions {
        keep_fields: true,
        ..Default::default()
    };
    let k = 2.0 * PI / LAMBDA_UM;
    for (carrier, sign) in [
        ("carrier = [0.25, 0.0]", 1.0),
        ("carrier = [-0.25, 0.0]", -1.0),
    ] {
        let setup = load(d.path(), &setup_text(region, carrier, ""));
        let dec = decode_stack(
            &setup,
            None,
            std::slice::from_ref(&stack),
            &opts,
            &no_progress,
        )
        .unwrap();
        let g = dec.channels[0].grid();
        let f = &dec.fields.as_ref().unwrap()[0];
        let (cy, cx) = (g.ny / 2, g.nx / 2);
        let dphi = (f[[0, cy, cx + 1]] * f[[0, cy, cx]].conj()).arg() / g.pitch_um;
        // the mirrored order (-carrier) holds conj(S): its phase slope is reversed
        let want = sign * k * 0.040;
        assert!(
            (dphi - want).abs() < 0.02 * want.abs(),
            "{carrier}: slope {dphi}, expected {want}"
        );
        // phase origin at the region's centre pixel: the beam's phase there is 0
        assert!(
            f[[0, cy, cx]].arg().abs() < 1e-2,
            "{}",
            f[[0, cy, cx]].arg()
        );
    }
}

/// A straightforward full complex-FFT decoder (whole spectrum, hard circular window,
/// inverse FFT at full size, demodulation by exp(-i 2 pi c.(r - r_c)), divide by |R| FP),
/// sampled every `step` pixels. Reference implementation for the pruned path.
fn full_fft_decode(
    img: &[f64],
    n: usize,
    c: [f64; 2],
    radius: f64,
    r_amp: f64,
    step: usize,
) -> Vec<Complex64> {
    use rustfft::FftPlanner;
    let mut p = FftPlanner::<f64>::new();
    let (f, inv) = (p.plan_fft_forward(n), p.plan_fft_inverse(n));
    let mut a: Vec<Complex64> = img.iter().map(|&v| Complex64::new(v, 0.0)).collect();
    let fft2 = |a: &mut Vec<Complex64>, plan: &std::sync::Arc<dyn rustfft::Fft<f64>>| {
        for row in a.chunks_exact_mut(n) {
            plan.process(row);
        }
        let mut col = vec![Complex64::default(); n];
        for x in 0..n {
            for y in 0..n {
                col[y] = a[y * n + x];
            }
            plan.process(&mut col);
            for y in 0..n {
                a[y * n + x] = col[y];
            }
        }
    };
    fft2(&mut a, &f);
    let sf = |k: usize| if k > n / 2 { k as f64 - n as f64 } else { k as f64 } / n as f64;
    for ky in 0..n {
        for kx in 0..n {
            if (sf(kx) - c[0]).hypot(sf(ky) - c[1]) > radius {
                a[ky * n + kx] = Complex64::default();
            }
        }
    }
    fft2(&mut a, &inv);
    let rc = (n / 2) as f64;
    let m = n / step;
    let mut out = Vec::with_capacity(m * m);
    for jy in 0..m {
        for jx in 0..m {
            let (x, y) = ((jx * step) as f64, (jy * step) as f64);
            let ph = Complex64::from_polar(1.0, -2.0 * PI * (c[0] * (x - rc) + c[1] * (y - rc)));
            out.push(a[jy * step * n + jx * step] / (n * n) as f64 * ph / (r_amp * FP));
        }
    }
    out
}

fn beam_hologram(n: usize, carrier: [f64; 2], r2: f64) -> (Vec<f64>, Beam) {
    let beam = Beam {
        w0: 3.0,
        d: [1.0, -0.7],
        tilt_mrad: [25.0, 10.0],
        amp: 900.0,
    };
    let region = [0, 0, n, n];
    let h = hologram(n, n, region, &|x, y| beam.camera(x, y), carrier, r2);
    (h, beam)
}

/// The pruned real-to-complex path equals a full complex FFT implementation to 1e-4 of the
/// field's peak (the forward transform runs in f32; common practice, no source).
#[test]
fn pruned_path_equals_full_fft() {
    let d = tempfile::tempdir().unwrap();
    let n = 256;
    let c = [0.2137, -0.1491]; // sub-bin carrier, given
    let (holo, _) = beam_hologram(n, c, 15000.0);
    let q: Vec<f64> = to_u16(&holo).iter().map(|&v| v as f64).collect();
    let stack = write_frames(d.path(), "p.tif", n, n, &[holo]);
    let ch = format!("carrier = [{}, {}]\nwindow_radius = 0.08", c[0], c[1]);
    let setup = load(
        d.path(),
        &setup_text([0, 0, n, n], &ch, "[decode]\ngrid_px = 64"),
    );
    let opts = DecodeOptions {
        keep_fields: true,
        ..Default::default()
    };
    let p = prepare(&setup, std::slice::from_ref(&stack), &opts).unwrap();
    let r_amp = match &p.plans[0].spec.reference {
        modegram::decode::RefAmplitude::Constant(a) => *a,
        other => panic!("{other:?}"),
    };
    let dec = decode_prepared(&p, &[], &[stack], &opts, &no_progress).unwrap();
    let fast: Vec<Complex64> = dec.fields.unwrap()[0].iter().copied().collect();
    let slow = full_fft_decode(&q, n, c, 0.08, r_amp, 4);
    let peak = slow.iter().map(|z| z.norm()).fold(0.0, f64::max);
    let worst = fast
        .iter()
        .zip(&slow)
        .map(|(a, b)| (a - b).norm())
        .fold(0.0, f64::max);
    assert!(
        worst < 1e-4 * peak,
        "max difference {worst:.3e}, peak {peak:.3e}"
    );
}

/// Parseval: the captured power from real-space overlaps equals the one from the overlaps of
/// the DFTs of field and modes (sum conj(a) b = (1/N) sum conj(A) B; any DSP text, e.g.
/// Oppenheim & Schafer, Discrete-Time Signal Processing, DFT properties).
#[test]
fn captured_power_agrees_in_real_and_fourier_space() {
    use rustfft::FftPlanner;
    let d = tempfile::tempdir().unwrap();
    let n = 128;
    let (holo, beam) = beam_hologram(n, [0.27, 0.05], 12000.0);
    let stack = write_frames(d.path(), "q.tif", n, n, &[holo]);
    let setup = load(d.path(), &setup_text([0, 0, n, n], "", ""));
    let sampler = hg_sampler(beam.w0 * 3.0); // a mismatched waist: captured power < 1
    let opts = DecodeOptions {
        keep_fields: true,
        ..Default::default()
    };
    let dec = decode_stack(
        &setup,
        Some(&sampler as BasisSampler),
        &[stack],
        &opts,
        &no_progress,
    )
    .unwrap();
    let g = dec.channels[0].grid();
    let field = &dec.fields.as_ref().unwrap()[0];
    let basis = sampler(&g, &Alignment::default()).unwrap();
    let (nx, ny) = (g.nx, g.ny);
    let mut p = FftPlanner::<f64>::new();
    let (fx, fy) = (p.plan_fft_forward(nx), p.plan_fft_forward(ny));
    let fft2 = |v: Vec<Complex64>| {
        let mut v = v;
        for row in v.chunks_exact_mut(nx) {
            fx.process(row);
        }
        let mut col = vec![Complex64::default(); ny];
        for x in 0..nx {
            for y in 0..ny {
                col[y] = v[y * nx + x];
            }
            fy.process(&mut col);
            for y in 0..ny {
                v[y * nx + x] = col[y];
            }
        }
        v
    };
    let e_hat = fft2(field.iter().copied().collect());
    let npx = (nx * ny) as f64;
    let da = g.pixel_area_um2();
    let power_f: f64 = e_hat.iter().map(|z| z.norm_sqr()).sum::<f64>() / npx * da;
    let mut cap_f = 0.0;
    for k in 0..basis.dim().0 {
        let b_hat = fft2(
            basis
                .index_axis(ndarray::Axis(0), k)
                .iter()
                .copied()
                .collect(),
        );
        let c: Complex64 = b_hat
            .iter()
            .zip(&e_hat)
            .map(|(b, e)| b.conj() * e)
            .sum::<Complex64>()
            / npx
            * da;
        cap_f += c.norm_sqr();
    }
    cap_f /= power_f;
    // the same captured power from real-space overlaps, summed directly in f64
    let power_r: f64 = field.iter().map(|z| z.norm_sqr()).sum::<f64>() * da;
    let mut cap_r = 0.0;
    for k in 0..basis.dim().0 {
        let c: Complex64 = basis
            .index_axis(ndarray::Axis(0), k)
            .iter()
            .zip(field.iter())
            .map(|(b, e)| b.conj() * e)
            .sum::<Complex64>()
            * da;
        cap_r += c.norm_sqr();
    }
    cap_r /= power_r;
    assert!((power_f - dec.field_power[[0, 0]]).abs() < 1e-9 * power_f);
    assert!(
        (cap_f - cap_r).abs() < 1e-9,
        "Fourier {cap_f}, real {cap_r}"
    );
    // The decoder's captured power comes from the f32 projection: with unit-norm modes each
    // coefficient is within eps sqrt(P) of the exact one (eps = PROJECTION_RELATIVE_ERROR), so
    // |d captured| <= 2 eps sqrt(M captured) + M eps^2 for M modes (triangle and
    // Cauchy-Schwarz inequalities).
    let eps = modegram::projection::PROJECTION_RELATIVE_ERROR;
    let m = basis.dim().0 as f64;
    let tol = 2.0 * eps * (m * cap_r).sqrt() + m * eps * eps;
    let cap_d = dec.captured[[0, 0]];
    assert!(
        (cap_d - cap_r).abs() < tol,
        "decoder {cap_d}, direct {cap_r}, tolerance {tol:.1e}"
    );
    assert!(cap_r < 0.99 && cap_r > 0.1, "{cap_r}");
}

/// Direct f64 sums c_k = sum conj(psi_k) E dA of a (modes, ny, nx) basis and (frames,
/// pixels) fields, with the bound ||psi_k|| ||E_f|| dA the f32 error is relative to.
fn direct_overlaps(
    basis: &Array3<Complex64>,
    fields: &ndarray::Array2<Complex64>,
    g: &Grid,
) -> Vec<(Complex64, f64)> {
    let (modes, ny, nx) = basis.dim();
    let mut out = Vec::new();
    for f in 0..fields.nrows() {
        let e_norm = fields
            .row(f)
            .iter()
            .map(|z| z.norm_sqr())
            .sum::<f64>()
            .sqrt();
        for k in 0..modes {
            let mut s = Complex64::default();
            let mut b2 = 0.0;
            for y in 0..ny {
                for x in 0..nx {
                    s += basis[[k, y, x]].conj() * fields[[f, y * nx + x]] * g.pixel_area_um2();
                    b2 += basis[[k, y, x]].norm_sqr();
                }
            }
            out.push((s, b2.sqrt() * e_norm * g.pixel_area_um2()));
        }
    }
    out
}

/// The batched projection equals the direct sums c_k = sum conj(psi_k) E dA
/// (docs/conventions.md "Modes"). The projection runs in f32 with f64 block sums: each
/// coefficient is within PROJECTION_RELATIVE_ERROR of ||psi_k|| ||E|| dA (the Cauchy-Schwarz
/// bound on |c_k|; error analysis of summation: Higham, Accuracy and Stability of
/// Numerical Algorithms, 2nd ed., section 3.1).
#[test]
fn batched_projection_equals_direct_sums() {
    use modegram::projection::{Projector, PROJECTION_RELATIVE_ERROR};
    let g = Grid::centred(12, 10, 0.7);
    let modes = 5;
    let basis = Array3::from_shape_fn((modes, 10, 12), |(k, y, x)| {
        Complex64::new(
            ((k * 7 + y * 3 + x) % 11) as f64 - 5.0,
            ((k + 2 * x + y * y) % 5) as f64,
        )
    });
    let fields = ndarray::Array2::from_shape_fn((3, 120), |(f, i)| {
        Complex64::new(((f * 13 + i) % 17) as f64, -(((f + i * 3) % 7) as f64))
    });
    let pr = Projector::new(basis.view(), &g).unwrap();
    assert!(!pr.is_real());
    let c = pr.project(fields.view());
    let owned = Projector::from_array(basis.clone(), &g).unwrap();
    assert_eq!(owned.project(fields.view()), c);
    for (i, (s, bound)) in direct_overlaps(&basis, &fields, &g).into_iter().enumerate() {
        let (f, k) = (i / modes, i % modes);
        assert!(
            (s - c[[f, k]]).norm() <= PROJECTION_RELATIVE_ERROR * bound,
            "frame {f} mode {k}: {} vs {s}",
            c[[f, k]]
        );
    }
}

/// A real basis confined to a disk (a grid larger than the modes, as for LP modes on the
/// decoded grid): only the pixels inside enter the product, and the coefficients still equal
/// the direct sums over the whole grid (docs/conventions.md "Modes"), to the f32 bound of
/// the test above; a split of frames or modes changes no bit (common practice, no source).
#[test]
fn real_basis_on_a_disk_projects_like_direct_sums() {
    use modegram::projection::{Projector, PROJECTION_RELATIVE_ERROR};
    let (nx, ny) = (40, 36);
    let g = Grid::centred(nx, ny, 0.5);
    let modes = 7;
    let basis = Array3::from_shape_fn((modes, ny, nx), |(k, y, x)| {
        let (u, v) = (g.x_um(x), g.y_um(y));
        let r2 = u * u + v * v;
        if r2 < 36.0 {
            let phi = v.atan2(u);
            Complex64::new(
                (k as f64 * phi + 0.3).cos() * (1.0 + 0.1 * k as f64 * r2.sqrt()),
                0.0,
            )
        } else {
            Complex64::default()
        }
    });
    let fields = ndarray::Array2::from_shape_fn((5, nx * ny), |(f, i)| {
        let t = (f * 31 + i * 7) as f64;
        Complex64::new((0.37 * t).sin() + 0.2, (0.11 * t).cos())
    });
    let pr = Projector::new(basis.view(), &g).unwrap();
    assert!(pr.is_real());
    let inside = (0..nx * ny)
        .filter(|&i| {
            let (u, v) = (g.x_um(i % nx), g.y_um(i / nx));
            u * u + v * v < 36.0
        })
        .count();
    assert_eq!(pr.active_pixels(), inside);
    let c = pr.project(fields.view());
    for (i, (s, bound)) in direct_overlaps(&basis, &fields, &g).into_iter().enumerate() {
        let (f, k) = (i / modes, i % modes);
        assert!(
            (s - c[[f, k]]).norm() <= PROJECTION_RELATIVE_ERROR * bound,
            "frame {f} mode {k}: {} vs {s}",
            c[[f, k]]
        );
    }
    // frames 1..4 and modes 2..6 projected on their own give the same bits
    let mut packed = vec![0f32; 3 * pr.packed_len()];
    for (f, dst) in (1..4).zip(packed.chunks_exact_mut(pr.packed_len())) {
        let row: Vec<Complex64> = fields.row(f).to_vec();
        pr.pack_field(&row, dst);
    }
    let mut part = ndarray::Array2::<Complex64>::zeros((3, 4));
    pr.project_packed(&packed, 3, 2..6, part.view_mut());
    assert_eq!(part, c.slice(ndarray::s![1..4, 2..6]));
}

/// Angular-spectrum propagation by `dz` um of a camera-plane field sampled at FP um
/// (exp(i (kz - k) dz), docs/conventions.md; Goodman, Introduction to Fourier Optics,
/// angular spectrum transfer function).
fn propagate(s: &[Complex64], n: usize, dz: f64) -> Vec<Complex64> {
    use rustfft::FftPlanner;
    let mut p = FftPlanner::<f64>::new();
    let (f, inv) = (p.plan_fft_forward(n), p.plan_fft_inverse(n));
    let fft2 = |a: &mut Vec<Complex64>, plan: &std::sync::Arc<dyn rustfft::Fft<f64>>| {
        for row in a.chunks_exact_mut(n) {
            plan.process(row);
        }
        let mut col = vec![Complex64::default(); n];
        for x in 0..n {
            for y in 0..n {
                col[y] = a[y * n + x];
            }
            plan.process(&mut col);
            for y in 0..n {
                a[y * n + x] = col[y];
            }
        }
    };
    let mut a = s.to_vec();
    fft2(&mut a, &f);
    let k = 2.0 * PI / LAMBDA_UM;
    let sf = |i: usize| {
        (if i > n / 2 {
            i as f64 - n as f64
        } else {
            i as f64
        }) / (n as f64 * FP)
    };
    for ky in 0..n {
        for kx in 0..n {
            let kt2 = (2.0 * PI).powi(2) * (sf(kx).powi(2) + sf(ky).powi(2));
            a[ky * n + kx] *= if kt2 < k * k {
                Complex64::from_polar(1.0, ((k * k - kt2).sqrt() - k) * dz) / (n * n) as f64
            } else {
                Complex64::default() // evanescent
            };
        }
    }
    fft2(&mut a, &inv);
    a
}

/// Defocus: a beam recorded `dz` downstream of the fibre face decodes, with
/// defocus_um = dz, to the face field's coefficients (1e-3); without it, it does not.
#[test]
fn defocus_is_undone_with_the_documented_sign() {
    let d = tempfile::tempdir().unwrap();
    let n = 256;
    let beam = Beam {
        w0: 3.0,
        d: [1.0, 0.5],
        tilt_mrad: [15.0, 0.0],
        amp: 1200.0,
    };
    let dz = 15.0;
    let rc = (n / 2) as f64;
    let face: Vec<Complex64> = (0..n * n)
        .map(|i| beam.camera((i % n) as f64 - rc, (i / n) as f64 - rc))
        .collect();
    let rec = propagate(&face, n, dz);
    let carrier = [0.26, 0.08];
    let holo = hologram(
        n,
        n,
        [0, 0, n, n],
        &|x, y| rec[(y + rc) as usize * n + (x + rc) as usize],
        carrier,
        20000.0,
    );
    let stack = write_frames(d.path(), "dz.tif", n, n, &[holo]);
    write_frames(d.path(), "ref.tif", n, n, &[vec![20000.0; n * n]]);
    let want: Vec<Complex64> = (0..NMAX)
        .flat_map(|a| (0..NMAX).map(move |b| (a, b)))
        .map(|(a, b)| beam.coefficient(a, b, [0.0, 0.0]))
        .collect();
    let sampler = hg_sampler(beam.w0);
    let mut errs = Vec::new();
    for set_dz in [dz, 0.0] {
        let ch = format!(
            "carrier = [{}, {}]\ndefocus_um = {set_dz}",
            carrier[0], carrier[1]
        );
        let setup = load(
            d.path(),
            &setup_text([0, 0, n, n], &ch, "[frames]\nreference = \"ref.tif\""),
        );
        let dec = decode_stack(
            &setup,
            Some(&sampler as BasisSampler),
            std::slice::from_ref(&stack),
            &DecodeOptions::default(),
            &no_progress,
        )
        .unwrap();
        let got: Vec<Complex64> = dec.coefficients.iter().copied().collect();
        errs.push(rel_err(&got, &want));
    }
    assert!(errs[0] < 1e-3, "with defocus: {:.2e}", errs[0]);
    assert!(
        errs[1] > 0.05,
        "without defocus the error should be large: {:.2e}",
        errs[1]
    );
}

/// Dark subtraction and saturation: adding a dark pattern to the frames and giving it as
/// the dark frame leaves the field unchanged; saturated pixels are counted per channel.
#[test]
fn dark_frame_is_subtracted_and_saturation_counted() {
    let d = tempfile::tempdir().unwrap();
    let n = 128;
    let (holo, _) = beam_hologram(n, [0.25, 0.1], 12000.0);
    let dark: Vec<f64> = (0..n * n).map(|i| 100.0 + ((i * 31) % 50) as f64).collect();
    let with_dark: Vec<f64> = holo.iter().zip(&dark).map(|(a, b)| a + b).collect();
    let mut sat = with_dark.clone();
    for i in 0..7 {
        sat[(40 + i) * n + 60] = 65535.0;
    }
    let s0 = write_frames(d.path(), "a.tif", n, n, std::slice::from_ref(&holo));
    let s1 = write_frames(d.path(), "b.tif", n, n, &[with_dark]);
    let s2 = write_frames(d.path(), "c.tif", n, n, &[sat]);
    write_frames(d.path(), "dark.tif", n, n, &[dark]);
    let opts = DecodeOptions {
        keep_fields: true,
        ..Default::default()
    };
    let setup0 = load(d.path(), &setup_text([0, 0, n, n], "", ""));
    let a = decode_stack(&setup0, None, &[s0], &opts, &no_progress).unwrap();
    let setup1 = load(
        d.path(),
        &setup_text([0, 0, n, n], "", "[frames]\ndark = \"dark.tif\""),
    );
    let b = decode_stack(&setup1, None, &[s1], &opts, &no_progress).unwrap();
    let c = decode_stack(&setup1, None, &[s2.clone(), s2], &opts, &no_progress).unwrap();
    let fa = &a.fields.as_ref().unwrap()[0];
    let fb = &b.fields.as_ref().unwrap()[0];
    let peak = fa.iter().map(|z| z.norm()).fold(0.0, f64::max);
    let diff = fa
        .iter()
        .zip(fb.index_axis(ndarray::Axis(0), 0).iter())
        .map(|(x, y)| (x - y).norm())
        .fold(0.0, f64::max);
    assert!(diff < 1e-3 * peak, "{diff} vs {peak}");
    assert_eq!(b.saturated[[0, 0]], 0);
    assert_eq!((c.saturated[[0, 0]], c.saturated[[1, 0]]), (7, 7));
}

fn err_text(r: modegram::Result<impl Sized>) -> (String, i32) {
    match r {
        Ok(_) => panic!("expected an error"),
        Err(e) => (e.to_string(), e.exit_code()),
    }
}

#[test]
fn region_outside_the_frame_is_named() {
    let d = tempfile::tempdir().unwrap();
    let (holo, _) = beam_hologram(64, [0.25, 0.0], 10000.0);
    let stack = write_frames(d.path(), "s.tif", 64, 64, &[holo]);
    let setup = load(d.path(), &setup_text([32, 0, 64, 64], "", ""));
    let (m, code) = err_text(prepare(&setup, &[stack], &DecodeOptions::default()));
    assert!(
        m.contains("channel[0].region") && m.contains("[32, 0, 64, 64]") && m.contains("64x64"),
        "{m}"
    );
    assert_eq!(code, 2);
}

#[test]
fn no_sideband_says_where_it_searched() {
    let d = tempfile::tempdir().unwrap();
    // speckle-free noise: no fringes anywhere (fixed-seed LCG)
    let mut x: u64 = 12345;
    let noise: Vec<f64> = (0..64 * 64)
        .map(|_| {
            x = x
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            1000.0 + (x >> 40) as f64 / (1u64 << 24) as f64 * 100.0
        })
        .collect();
    let stack = write_frames(d.path(), "n.tif", 64, 64, &[noise]);
    let setup = load(d.path(), &setup_text([0, 0, 64, 64], "", ""));
    let (m, code) = err_text(prepare(&setup, &[stack], &DecodeOptions::default()));
    assert!(
        m.contains("n.tif")
            && m.contains("no sideband found")
            && m.contains("strongest blob")
            && m.contains("0.05"),
        "{m}"
    );
    assert_eq!(code, 2);
}

/// Separation rule (Cuche 2000; Goodman): a window reaching into the DC term warns with
/// the numbers, and is an error under decode.strict / --strict.
#[test]
fn sideband_overlapping_dc_warns_or_fails_when_strict() {
    let d = tempfile::tempdir().unwrap();
    let (holo, _) = beam_hologram(128, [0.2, 0.0], 10000.0);
    let stack = write_frames(d.path(), "o.tif", 128, 128, &[holo]);
    let ch = "carrier = [0.2, 0.0]\nwindow_radius = 0.12";
    let setup = load(d.path(), &setup_text([0, 0, 128, 128], ch, ""));
    let p = prepare(
        &setup,
        std::slice::from_ref(&stack),
        &DecodeOptions::default(),
    )
    .unwrap();
    assert!(p.channels[0].separation_margin_cycles_per_px < 0.0);
    let w = p.warnings.join("\n");
    assert!(
        w.contains("overlaps the DC order") && w.contains("0.1200") && w.contains("margin"),
        "{w}"
    );
    let strict = DecodeOptions {
        strict: true,
        ..Default::default()
    };
    let (m, code) = err_text(prepare(&setup, std::slice::from_ref(&stack), &strict));
    assert!(
        m.contains("channel[0].window_radius") && m.contains("overlaps"),
        "{m}"
    );
    assert_eq!(code, 2);
    let setup = load(
        d.path(),
        &setup_text([0, 0, 128, 128], ch, "[decode]\nstrict = true"),
    );
    assert!(prepare(&setup, &[stack], &DecodeOptions::default()).is_err());
}

/// Two references of similar strength reaching one region (carrier = "auto"): the error
/// names both sideband positions and how to choose; `decode` writes nothing
/// (common practice, no source: an ambiguous carrier must not be guessed).
#[test]
fn two_sidebands_in_one_auto_region_are_refused_with_both_positions() {
    let d = tempfile::tempdir().unwrap();
    let n = 128;
    let b1 = Beam {
        w0: 3.0,
        d: [0.5, 0.0],
        tilt_mrad: [0.0, 0.0],
        amp: 700.0,
    };
    let b2 = Beam {
        w0: 3.0,
        d: [-0.5, 0.5],
        tilt_mrad: [0.0, 0.0],
        amp: 600.0,
    };
    let h1 = hologram(
        n,
        n,
        [0, 0, n, n],
        &|x, y| b1.camera(x, y),
        [0.3, 0.05],
        8000.0,
    );
    let h2 = hologram(
        n,
        n,
        [0, 0, n, n],
        &|x, y| b2.camera(x, y),
        [0.05, 0.3],
        8000.0,
    );
    let h: Vec<f64> = h1.iter().zip(&h2).map(|(a, b)| a + b).collect();
    let stack = write_frames(d.path(), "two.tif", n, n, &[h]);
    let setup = load(d.path(), &setup_text([0, 0, n, n], "", ""));
    let (m, code) = err_text(prepare(
        &setup,
        std::slice::from_ref(&stack),
        &DecodeOptions::default(),
    ));
    assert!(
        m.contains("two sidebands") && m.contains("`carrier`") && m.contains("`conjugate`"),
        "{m}"
    );
    // Both positions named, each within one FFT bin (1/128 cycles/px).
    let pairs: Vec<[f64; 2]> = m
        .split('(')
        .skip(1)
        .filter_map(|t| {
            let (a, rest) = t.split_once(", ")?;
            let (b, _) = rest.split_once(')')?;
            Some([a.parse().ok()?, b.parse().ok()?])
        })
        .collect();
    for want in [[0.3, 0.05], [0.05, 0.3]] {
        assert!(
            pairs
                .iter()
                .any(|p| (p[0] - want[0]).abs() < 1.0 / 128.0
                    && (p[1] - want[1]).abs() < 1.0 / 128.0),
            "{want:?} not in {pairs:?}: {m}"
        );
    }
    assert_eq!(code, 2);
    let out = d.path().join("out");
    let o = assert_cmd::Command::cargo_bin("modegram")
        .unwrap()
        .arg("decode")
        .arg(d.path().join("setup.toml"))
        .arg(&stack)
        .arg("--out")
        .arg(&out)
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(2));
    let written: Vec<_> = std::fs::read_dir(&out)
        .map(|r| r.filter_map(|e| e.ok()).map(|e| e.file_name()).collect())
        .unwrap_or_default();
    assert!(written.is_empty(), "partial output: {written:?}");
}

/// Two carriers in one region (angle multiplexing) give two channels with their own fields.
#[test]
fn two_carriers_in_one_region_are_two_channels() {
    let d = tempfile::tempdir().unwrap();
    let n = 256;
    let b1 = Beam {
        w0: 3.0,
        d: [1.0, 0.0],
        tilt_mrad: [0.0, 0.0],
        amp: 700.0,
    };
    let b2 = Beam {
        w0: 3.0,
        d: [-1.0, 1.0],
        tilt_mrad: [0.0, 0.0],
        amp: 400.0,
    };
    let (c1, c2) = ([0.3, 0.0], [0.0, 0.3]);
    // I = |S1 + R1|^2 + |S2 + R2|^2 (two mutually incoherent pairs, e.g. two polarisations)
    let h1 = hologram(n, n, [0, 0, n, n], &|x, y| b1.camera(x, y), c1, 8000.0);
    let h2 = hologram(n, n, [0, 0, n, n], &|x, y| b2.camera(x, y), c2, 8000.0);
    let h: Vec<f64> = h1.iter().zip(&h2).map(|(a, b)| a + b).collect();
    let stack = write_frames(d.path(), "m.tif", n, n, &[h]);
    let mut text = setup_text(
        [0, 0, n, n],
        "carrier = [0.3, 0.0]\nwindow_radius = 0.08",
        "",
    );
    text.push_str(&format!("[[channel]]\nname = \"V\"\nregion = [0, 0, {n}, {n}]\nmagnification = {MAG}\ncarrier = [0.0, 0.3]\nwindow_radius = 0.08\n"));
    let setup = load(d.path(), &text);
    let mut p = prepare(
        &setup,
        std::slice::from_ref(&stack),
        &DecodeOptions::default(),
    )
    .unwrap();
    // the reference intensity per channel is 8000 (each channel's own reference)
    for q in p.plans.iter_mut() {
        *q = q.with_reference(modegram::decode::RefAmplitude::Constant(8000f64.sqrt()));
    }
    let sampler = hg_sampler(3.0);
    let pr = projectors(&p, Some(&sampler as BasisSampler)).unwrap();
    let dec = decode_prepared(&p, &pr, &[stack], &DecodeOptions::default(), &no_progress).unwrap();
    for (ch, b) in [(0, &b1), (1, &b2)] {
        let got: Vec<Complex64> = dec
            .coefficients
            .index_axis(ndarray::Axis(1), ch)
            .iter()
            .copied()
            .collect();
        let want: Vec<Complex64> = (0..NMAX)
            .flat_map(|a| (0..NMAX).map(move |m| (a, m)))
            .map(|(a, m)| b.coefficient(a, m, [0.0, 0.0]))
            .collect();
        let e = rel_err(&got, &want);
        assert!(e < 2e-3, "channel {ch}: {e:.2e}");
    }
    let _ = c2;
}

/// NumPy cross-check: tests/numpy_reference.py decodes the same hologram with numpy.fft
/// (full fft2, crop, ifft2); skipped with a note when python3 with numpy is missing.
#[test]
fn numpy_reference_decoder_agrees() {
    let ok = std::process::Command::new("python3")
        .args(["-c", "import numpy"])
        .stderr(std::process::Stdio::null())
        .status()
        .map(|s| s.success())
        .unwrap_or(false);
    if !ok {
        eprintln!("note: numpy_reference_decoder_agrees skipped: python3 with numpy not found");
        return;
    }
    let d = tempfile::tempdir().unwrap();
    let n = 128;
    let c = [0.2413, 0.0871];
    let (holo, _) = beam_hologram(n, c, 12000.0);
    let q: Vec<f64> = to_u16(&holo).iter().map(|&v| v as f64).collect();
    let npy = d.path().join("holo.npy");
    {
        use std::io::Write;
        let mut f = std::fs::File::create(&npy).unwrap();
        f.write_all(&modegram::frames::npy_header("<f8", &[1, n, n]))
            .unwrap();
        for v in &q {
            f.write_all(&v.to_le_bytes()).unwrap();
        }
    }
    let ch = format!("carrier = [{}, {}]\nwindow_radius = 0.07", c[0], c[1]);
    let setup = load(d.path(), &setup_text([0, 0, n, n], &ch, ""));
    let opts = DecodeOptions {
        keep_fields: true,
        ..Default::default()
    };
    let p = prepare(&setup, std::slice::from_ref(&npy), &opts).unwrap();
    let plan = &p.plans[0];
    let r_amp = match &plan.spec.reference {
        modegram::decode::RefAmplitude::Constant(a) => *a,
        other => panic!("{other:?}"),
    };
    let dec = decode_prepared(&p, &[], std::slice::from_ref(&npy), &opts, &no_progress).unwrap();
    let (nx, ny) = plan.spec.grid_px;
    let params = serde_json::json!({
        "carrier": c, "radius": 0.07, "nx": nx, "ny": ny, "r_amp": r_amp, "fibre_pitch_um": FP,
    });
    let pj = d.path().join("params.json");
    std::fs::write(&pj, params.to_string()).unwrap();
    let out = d.path().join("numpy_field.npy");
    let script = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/numpy_reference.py");
    let st = std::process::Command::new("python3")
        .arg(&script)
        .arg(&npy)
        .arg(&pj)
        .arg(&out)
        .status()
        .unwrap();
    assert!(st.success());
    let np: ndarray::Array2<Complex64> = modegram::export::read_npy(&out).unwrap();
    let fast = dec.fields.as_ref().unwrap()[0]
        .index_axis(ndarray::Axis(0), 0)
        .to_owned();
    assert_eq!(np.dim(), fast.dim());
    let peak = np.iter().map(|z| z.norm()).fold(0.0, f64::max);
    let worst = np
        .iter()
        .zip(fast.iter())
        .map(|(a, b)| (a - b).norm())
        .fold(0.0, f64::max);
    assert!(
        worst < 1e-4 * peak,
        "numpy vs modegram: {worst:.3e} (peak {peak:.3e})"
    );
}

/// Existing outputs are kept unless --force (exit status 2, file untouched).
#[test]
fn cli_keeps_existing_outputs_without_force() {
    let d = tempfile::tempdir().unwrap();
    let (holo, _) = beam_hologram(64, [0.25, 0.0], 10000.0);
    let stack = write_frames(d.path(), "s.tif", 64, 64, &[holo]);
    let setup = d.path().join("setup.toml");
    std::fs::write(&setup, setup_text([0, 0, 64, 64], "", "")).unwrap();
    let out = d.path().join("out");
    std::fs::create_dir_all(&out).unwrap();
    std::fs::write(out.join("coefficients.npy"), b"keep me").unwrap();
    let a = assert_cmd::Command::cargo_bin("modegram")
        .unwrap()
        .args(["decode"])
        .arg(&setup)
        .arg(&stack)
        .arg("--out")
        .arg(&out)
        .assert()
        .code(2);
    let err = String::from_utf8_lossy(&a.get_output().stderr).to_string();
    assert!(
        err.contains("coefficients.npy") && err.contains("--force"),
        "{err}"
    );
    assert_eq!(
        std::fs::read(out.join("coefficients.npy")).unwrap(),
        b"keep me"
    );
}

/// Peak memory while decoding a 2000-frame 1024^2 uint16 stack (4 GB on disk) with a
/// 110-mode basis stays below 300 MB: the stack is streamed (VmHWM from /proc, Linux).
/// Ignored by default (disk and time); run with `cargo test --test decode -- --ignored`.
#[test]
#[ignore]
fn peak_memory_of_a_2000_frame_stack() {
    let d = tempfile::tempdir().unwrap();
    let n = 1024;
    let (holo, _) = beam_hologram(n, [0.25, 0.1], 15000.0);
    let q = to_u16(&holo);
    let p = d.path().join("big.tif");
    let mut w = modegram::frames::TiffStackWriter::create(&p).unwrap();
    for _ in 0..2000 {
        w.write_u16(n, n, &q).unwrap();
    }
    w.finish().unwrap();
    drop((holo, q));
    let setup = load(
        d.path(),
        &setup_text(
            [0, 0, n, n],
            "carrier = [0.25, 0.1]\nwindow_radius = 0.08",
            "[decode]\ngrid_px = 256",
        ),
    );
    let sampler = |g: &Grid, _: &Alignment| -> modegram::Result<Array3<Complex64>> {
        Ok(Array3::from_shape_fn((110, g.ny, g.nx), |(k, y, x)| {
            Complex64::from_polar(
                1.0 / (g.len() as f64).sqrt() / g.pitch_um,
                (k * 7 + y * 3 + x) as f64,
            )
        }))
    };
    let t = std::time::Instant::now();
    let dec = decode_stack(
        &setup,
        Some(&sampler as BasisSampler),
        &[p],
        &DecodeOptions::default(),
        &no_progress,
    )
    .unwrap();
    let secs = t.elapsed().as_secs_f64();
    assert_eq!(dec.coefficients.dim(), (2000, 1, 110));
    let status = std::fs::read_to_string("/proc/self/status").unwrap();
    let hwm_kb: f64 = status
        .lines()
        .find(|l| l.starts_with("VmHWM"))
        .and_then(|l| l.split_whitespace().nth(1))
        .unwrap()
        .parse()
        .unwrap();
    eprintln!(
        "2000 frames 1024^2: {secs:.1} s ({:.0} frames/s), peak RSS {:.0} MB",
        2000.0 / secs,
        hwm_kb / 1024.0
    );
    assert!(
        hwm_kb / 1024.0 < 300.0,
        "peak RSS {:.0} MB",
        hwm_kb / 1024.0
    );
}

/// `modegram decode` end to end with the setup's HG basis: the files of shared/interface.md,
/// |c_00| of an offset Gaussian of the basis waist (coherent state, Glauber 1963) to 1e-3.
#[test]
fn cli_decode_writes_coefficients_captured_and_metadata() {
    let d = tempfile::tempdir().unwrap();
    let n = 128;
    let beam = Beam {
        w0: 4.0,
        d: [0.8, -0.4],
        tilt_mrad: [0.0, 0.0],
        amp: 700.0,
    };
    let holo = hologram(
        n,
        n,
        [0, 0, n, n],
        &|x, y| beam.camera(x, y),
        [0.26, 0.1],
        12000.0,
    );
    let stack = write_frames(d.path(), "s.tif", n, n, &[holo.clone(), holo]);
    write_frames(d.path(), "ref.tif", n, n, &[vec![12000.0; n * n]]);
    let extra =
        "[basis]\nkind = \"hg\"\ngroups = 4\nwaist_um = 4.0\n[frames]\nreference = \"ref.tif\"";
    let setup = d.path().join("setup.toml");
    std::fs::write(
        &setup,
        setup_text([0, 0, n, n], "carrier = [0.26, 0.1]", extra),
    )
    .unwrap();
    let out = d.path().join("out");
    let run = |force: bool| {
        let mut c = assert_cmd::Command::cargo_bin("modegram").unwrap();
        c.arg("decode")
            .arg(&setup)
            .arg(&stack)
            .arg("--out")
            .arg(&out)
            .arg("--fields")
            .arg("-q");
        if force {
            c.arg("--force");
        }
        c.assert()
    };
    let a = run(false).success();
    let table = String::from_utf8_lossy(&a.get_output().stdout).to_string();
    assert!(
        table.contains("channel") && table.contains("2 frames decoded"),
        "{table}"
    );
    let c: Array3<Complex64> = modegram::export::read_npy(&out.join("coefficients.npy")).unwrap();
    assert_eq!(c.dim(), (2, 1, 10));
    let want = beam.coefficient(0, 0, [0.0, 0.0]).norm();
    assert!(
        (c[[0, 0, 0]].norm() / want - 1.0).abs() < 1e-3,
        "{} vs {want}",
        c[[0, 0, 0]].norm()
    );
    let csv = std::fs::read_to_string(out.join("captured.csv")).unwrap();
    let mut lines = csv.lines();
    assert_eq!(
        lines.next(),
        Some("frame,channel,captured_power,saturated_px,field_power")
    );
    let row: Vec<&str> = lines.next().unwrap().split(',').collect();
    assert_eq!(&row[..2], &["0", "H"]);
    assert!(row[2].parse::<f64>().unwrap() > 0.99);
    let meta: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("decode.json")).unwrap()).unwrap();
    let ch = &meta["channels"][0];
    assert!((ch["carrier_cycles_per_px"][0].as_f64().unwrap() - 0.26).abs() < 1e-12);
    assert!(ch["window_radius_cycles_per_px"].as_f64().unwrap() > 0.0);
    assert!(ch["separation_margin_cycles_per_px"].is_number() && ch["pitch_um"].is_number());
    let f: ndarray::Array4<Complex64> =
        modegram::export::read_npy(&out.join("fields.npy")).unwrap();
    assert_eq!(f.dim().0, 2);
    assert_eq!(f.dim().1, 1);
    run(false).code(2);
    run(true).success();
}

/// Batching changes nothing: 11 frames of two channels decoded with batches of 1, 3 and the
/// default size, on 1 and 2 threads (projected in groups of several batches), give the same
/// bits for coefficients, captured power, field power and fields (common practice, no
/// source: each value is computed in one fixed order).
#[test]
fn batch_size_and_thread_count_change_no_bit() {
    let d = tempfile::tempdir().unwrap();
    let n = 128;
    let frames: Vec<Vec<f64>> = (0..11)
        .map(|k| {
            let b1 = Beam {
                w0: 3.0,
                d: [1.0 - 0.1 * k as f64, 0.2 * k as f64 - 1.0],
                tilt_mrad: [0.0, 0.0],
                amp: 500.0 + 30.0 * k as f64,
            };
            let b2 = Beam {
                w0: 2.5,
                d: [-1.0, 0.05 * k as f64],
                tilt_mrad: [0.0, 0.0],
                amp: 400.0,
            };
            let h1 = hologram(
                n,
                n,
                [0, 0, n, n],
                &|x, y| b1.camera(x, y),
                [0.3, 0.0],
                8000.0,
            );
            let h2 = hologram(
                n,
                n,
                [0, 0, n, n],
                &|x, y| b2.camera(x, y),
                [0.0, 0.3],
                8000.0,
            );
            h1.iter().zip(&h2).map(|(a, b)| a + b).collect()
        })
        .collect();
    let stack = write_frames(d.path(), "b.tif", n, n, &frames);
    let mut text = setup_text(
        [0, 0, n, n],
        "carrier = [0.3, 0.0]\nwindow_radius = 0.08",
        "",
    );
    text.push_str(&format!("[[channel]]\nname = \"V\"\nregion = [0, 0, {n}, {n}]\nmagnification = {MAG}\ncarrier = [0.0, 0.3]\nwindow_radius = 0.08\n"));
    let setup = load(d.path(), &text);
    let sampler = hg_sampler(3.0);
    let run = |batch_frames: usize, threads: usize| {
        let opts = DecodeOptions {
            keep_fields: true,
            batch_frames,
            ..Default::default()
        };
        rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap()
            .install(|| {
                decode_stack(
                    &setup,
                    Some(&sampler as BasisSampler),
                    std::slice::from_ref(&stack),
                    &opts,
                    &no_progress,
                )
                .unwrap()
            })
    };
    let reference = run(0, 2);
    assert_eq!(reference.coefficients.dim().0, 11);
    for (batch, threads) in [(1, 1), (3, 2), (0, 1), (1, 2)] {
        let d = run(batch, threads);
        assert_eq!(
            d.coefficients, reference.coefficients,
            "batch {batch}, {threads} threads"
        );
        assert_eq!(d.captured, reference.captured);
        assert_eq!(d.field_power, reference.field_power);
        assert_eq!(d.fields, reference.fields);
    }
}
