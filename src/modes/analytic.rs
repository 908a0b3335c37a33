//! Analytic Gaussian bases: Laguerre-Gauss and Hermite-Gauss modes and the change of basis
//! between them (Beijersbergen et al. 1993, Opt. Commun. 96, 123).
//!
//! w is the 1/e *field* radius (exp(-r^2/w^2)). In Beijersbergen's notation (z = 0):
//! - HG_{n,m}(x, y) = C_nm (1/w) H_n(sqrt2 x/w) H_m(sqrt2 y/w) exp(-r^2/w^2),
//!   C_nm = sqrt(2/(pi n! m!)) 2^{-N/2}, N = n + m;
//! - LG_{n,m}(r, phi) = C'_nm (1/w) (-1)^min(n,m) (sqrt2 r/w)^|n-m| L_min(n,m)^|n-m|(2r^2/w^2)
//!   exp(-r^2/w^2) exp(-i (n-m) phi), C'_nm = sqrt(2/(pi n! m!)) min(n,m)!;
//! - LG_{n,m} = sum_{k=0..N} i^k b(n,m,k) HG_{N-k,k},
//!   b(n,m,k) = sqrt((N-k)! k! / (2^N n! m!)) (1/k!) d^k/dt^k [(1-t)^n (1+t)^m] at t = 0.
//!
//! The basis modes (docs/modes.md) use p = min(n,m), l = |n-m| and a radial function that is
//! positive at the axis side: our `-` mode (exp(-i l phi)) is (-1)^p LG_{p+l,p}, our `+` mode
//! is (-1)^p LG_{p,p+l}, cos = (+ + -)/sqrt2 and sin = (+ - -)/(i sqrt2) (l > 0).
use super::basis::Orientation;
use ndarray::Array2;
use num_complex::Complex64;
use puruspe::ln_gamma;

fn ln_fact(n: u32) -> f64 {
    ln_gamma(n as f64 + 1.0)
}

/// Hermite functions g_0..g_nmax at t, g_n = H_n(t) e^{-t^2/2} / sqrt(2^n n! sqrt(pi))
/// (orthonormal in t), by the stable three-term recurrence.
#[inline]
pub fn hermite_functions(t: f64, out: &mut [f64]) {
    if out.is_empty() {
        return;
    }
    out[0] = std::f64::consts::PI.powf(-0.25) * (-0.5 * t * t).exp();
    if out.len() > 1 {
        out[1] = std::f64::consts::SQRT_2 * t * out[0];
    }
    for n in 2..out.len() {
        let nf = n as f64;
        out[n] = (2.0 / nf).sqrt() * t * out[n - 1] - ((nf - 1.0) / nf).sqrt() * out[n - 2];
    }
}

/// Normalised LG radial function, integral R^2 r dr = 1:
/// R = (2/w) sqrt(p!/(p+l)!) (sqrt2 r/w)^l L_p^l(2 r^2/w^2) exp(-r^2/w^2).
#[inline]
pub fn lg_radial(p: u32, l: u32, r: f64, w: f64) -> f64 {
    let x = 2.0 * r * r / (w * w);
    // associated Laguerre L_p^l(x) by recurrence (DLMF 18.9.13)
    let lf = l as f64;
    let mut lm1 = 1.0;
    let mut lcur = if p == 0 { 1.0 } else { 1.0 + lf - x };
    for k in 1..p {
        let kf = k as f64;
        let next = ((2.0 * kf + 1.0 + lf - x) * lcur - (kf + lf) * lm1) / (kf + 1.0);
        lm1 = lcur;
        lcur = next;
    }
    let lag = if p == 0 { 1.0 } else { lcur };
    let c = (0.5 * (ln_fact(p) - ln_fact(p + l))).exp() * 2.0 / w;
    let s = std::f64::consts::SQRT_2 * r / w;
    c * s.powi(l as i32) * lag * (-r * r / (w * w)).exp()
}

/// Beijersbergen's HG_{n,m}(x, y) with waist w (plane-normalised).
pub fn hg_beijersbergen(n: u32, m: u32, x: f64, y: f64, w: f64) -> f64 {
    let nmax = n.max(m) as usize + 1;
    let mut gx = vec![0.0; nmax];
    let mut gy = vec![0.0; nmax];
    let s2 = std::f64::consts::SQRT_2;
    hermite_functions(s2 * x / w, &mut gx);
    hermite_functions(s2 * y / w, &mut gy);
    // g_n(t) in t = sqrt2 x / w: normalised in x after multiplying by (sqrt2/w)^{1/2}
    gx[n as usize] * gy[m as usize] * s2 / w
}

/// Beijersbergen's LG_{n,m}(x, y) with waist w (plane-normalised).
pub fn lg_beijersbergen(n: u32, m: u32, x: f64, y: f64, w: f64) -> Complex64 {
    let p = n.min(m);
    let l = n.abs_diff(m);
    let r = x.hypot(y);
    let rad = lg_radial(p, l, r, w) / (2.0 * std::f64::consts::PI).sqrt();
    let sign = if p % 2 == 0 { 1.0 } else { -1.0 };
    let phase = Complex64::new(x, -y) / if r > 0.0 { r } else { 1.0 };
    let az = if r > 0.0 {
        if n >= m {
            phase.powu(l)
        } else {
            phase.conj().powu(l)
        }
    } else if l == 0 {
        Complex64::new(1.0, 0.0)
    } else {
        Complex64::new(0.0, 0.0)
    };
    az * rad * sign
}

/// Coefficients c_k, k = 0..N, with LG_{n,m} = sum_k c_k HG_{N-k,k},
/// c_k = i^k b(n,m,k) (Beijersbergen et al. 1993, eq. 9).
pub fn hg_to_lg_coefficients(n: u32, m: u32) -> Vec<Complex64> {
    let nn = n + m;
    (0..=nn)
        .map(|k| {
            // (1/k!) d^k/dt^k [(1-t)^n (1+t)^m] at 0 = coefficient of t^k
            let mut coef = 0.0;
            for j in 0..=k.min(n) {
                if k - j > m {
                    continue;
                }
                let sgn = if j % 2 == 0 { 1.0 } else { -1.0 };
                coef += sgn * binom(n, j) * binom(m, k - j);
            }
            let pre = (0.5
                * (ln_fact(nn - k) + ln_fact(k)
                    - nn as f64 * std::f64::consts::LN_2
                    - ln_fact(n)
                    - ln_fact(m)))
            .exp();
            let ik = match k % 4 {
                0 => Complex64::new(1.0, 0.0),
                1 => Complex64::new(0.0, 1.0),
                2 => Complex64::new(-1.0, 0.0),
                _ => Complex64::new(0.0, -1.0),
            };
            ik * (pre * coef)
        })
        .collect()
}

fn binom(n: u32, k: u32) -> f64 {
    if k > n {
        return 0.0;
    }
    (ln_fact(n) - ln_fact(k) - ln_fact(n - k)).exp().round()
}

/// (l, m, orientation) of the LG modes of group g, in basis order (l ascending, cos before
/// sin / + before -); m holds p + 1.
pub fn lg_group(g: u32, circular: bool) -> Vec<(u32, u32, Orientation)> {
    let nn = g - 1;
    let mut out = Vec::new();
    let mut l = nn % 2;
    while l <= nn {
        let p = (nn - l) / 2;
        if l == 0 {
            out.push((0, p + 1, Orientation::Cos));
        } else if circular {
            out.push((l, p + 1, Orientation::Plus));
            out.push((l, p + 1, Orientation::Minus));
        } else {
            out.push((l, p + 1, Orientation::Cos));
            out.push((l, p + 1, Orientation::Sin));
        }
        l += 2;
    }
    out
}

/// (n, m) of the HG modes of group g in basis order (n ascending).
pub fn hg_group(g: u32) -> Vec<(u32, u32)> {
    (0..g).map(|n| (n, g - 1 - n)).collect()
}

/// The unitary matrix T with LG_i = sum_j T[i, j] HG_j over groups 1..=groups, rows in the
/// LG basis order (cos/sin, or +/- when `circular`), columns in the HG basis order.
pub fn hg_to_lg_matrix(groups: u32, circular: bool) -> Array2<Complex64> {
    let mut lg_rows: Vec<(u32, u32, Orientation)> = Vec::new();
    let mut hg_cols: Vec<(u32, u32)> = Vec::new();
    let mut offsets = Vec::new();
    for g in 1..=groups {
        offsets.push(hg_cols.len());
        lg_rows.extend(lg_group(g, circular));
        hg_cols.extend(hg_group(g));
    }
    let n = hg_cols.len();
    let mut t = Array2::<Complex64>::zeros((n, n));
    // row of Beijersbergen LG_{a,b} in HG columns
    let beij = |a: u32, b: u32| -> Vec<(usize, Complex64)> {
        let nn = a + b;
        let off = offsets[nn as usize];
        hg_to_lg_coefficients(a, b)
            .into_iter()
            .enumerate()
            // HG_{N-k,k} has n = N-k: index N-k within the group
            .map(|(k, c)| (off + (nn as usize - k), c))
            .collect()
    };
    let s2 = std::f64::consts::FRAC_1_SQRT_2;
    for (row, &(l, m1, o)) in lg_rows.iter().enumerate() {
        let p = m1 - 1;
        let sign = if p % 2 == 0 { 1.0 } else { -1.0 };
        let plus = beij(p, p + l);
        let minus = beij(p + l, p);
        let mut add = |v: &[(usize, Complex64)], f: Complex64| {
            for &(j, c) in v {
                t[[row, j]] += c * f * sign;
            }
        };
        match o {
            Orientation::Plus => add(&plus, Complex64::new(1.0, 0.0)),
            Orientation::Minus => add(&minus, Complex64::new(1.0, 0.0)),
            Orientation::Cos if l == 0 => add(&plus, Complex64::new(1.0, 0.0)),
            Orientation::Cos => {
                add(&plus, Complex64::new(s2, 0.0));
                add(&minus, Complex64::new(s2, 0.0));
            }
            Orientation::Sin => {
                // (plus - minus) / (i sqrt2) = -i (plus - minus) / sqrt2
                add(&plus, Complex64::new(0.0, -s2));
                add(&minus, Complex64::new(0.0, s2));
            }
            Orientation::Hg => {}
        }
    }
    t
}
