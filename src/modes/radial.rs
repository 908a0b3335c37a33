//! Tabulated radial functions R(rho) of solved modes and their evaluation.
//!
//! A table holds R at the cell centres rho_i = (i + 1/2) h (h in core radii), plus two ghost
//! values in front from the parity R(-rho) = (-1)^l R(rho), so a 4-point cubic Lagrange
//! stencil works down to the axis. Beyond the table the exact evanescent tail
//! R(rho) = R(rho_last) K_l(w rho) / K_l(w rho_last) is used (w = V sqrt(b)).
//! Normalisation: integral R(r)^2 r dr = 1 with r in micrometres (midpoint rule on the table
//! plus the analytic tail integral, DLMF 10.43 / Bessel indefinite integral
//! int x K_l^2 dx = (x^2/2)(K_l^2 - K_{l-1} K_{l+1})); sign: the value at the first
//! extremum of |R| is positive.
use super::bessel::{k_lm1_over_kl, k_lp1_over_kl, k_ratio};

/// Shared interpolation stencil for every table of a basis (same spacing and length).
#[derive(Debug, Clone, Copy)]
pub enum Stencil {
    /// Index of the first of the four stored values and the Lagrange weights.
    Inside(usize, [f64; 4]),
    /// Beyond the table: rho (core radii).
    Tail(f64),
}

/// Cubic Lagrange weights at fraction t in [0, 1) for nodes -1, 0, 1, 2.
#[inline]
pub fn lagrange4(t: f64) -> [f64; 4] {
    let tm1 = t - 1.0;
    let tm2 = t - 2.0;
    let tp1 = t + 1.0;
    [
        -t * tm1 * tm2 / 6.0,
        tp1 * tm1 * tm2 / 2.0,
        -tp1 * t * tm2 / 2.0,
        tp1 * t * tm1 / 6.0,
    ]
}

/// A radial function on the shared cell-centred grid.
#[derive(Debug, Clone)]
pub struct RadialTable {
    pub l: u32,
    /// Cell spacing, core radii.
    pub h: f64,
    /// Two ghost values, then R at rho_i = (i + 1/2) h; units 1/um (normalised).
    vals: Vec<f64>,
    /// Decay constant of the tail per core radius, w = V sqrt(b).
    pub w: f64,
}

impl RadialTable {
    /// Build from values at the first `samples.len()` cell centres; the table is extended
    /// with the exact tail to `n_total` cells, signed, and normalised for core radius a.
    pub fn new(l: u32, h: f64, samples: &[f64], w: f64, n_total: usize, a_um: f64) -> Self {
        let n0 = samples.len();
        let n = n_total.max(n0);
        let mut r: Vec<f64> = Vec::with_capacity(n + 2);
        r.extend_from_slice(samples);
        let last = samples[n0 - 1];
        let rho_last = (n0 as f64 - 0.5) * h;
        for i in n0..n {
            let rho = (i as f64 + 0.5) * h;
            r.push(last * k_ratio(l, w * rho_last, w * rho));
        }
        // sign: first local maximum of |R|
        let mut k = 0;
        while k + 1 < r.len() && r[k + 1].abs() >= r[k].abs() {
            k += 1;
        }
        let sign = if r[k] < 0.0 { -1.0 } else { 1.0 };
        // normalisation in rho units: sum R^2 rho h + tail from rho_e = n h
        let mut s: f64 = r
            .iter()
            .enumerate()
            .map(|(i, v)| v * v * (i as f64 + 0.5) * h * h)
            .sum();
        s += tail_integral(l, w, (n as f64 - 0.5) * h, n as f64 * h) * r[n - 1] * r[n - 1];
        let scale = sign / (s.sqrt() * a_um);
        let par = if l % 2 == 0 { 1.0 } else { -1.0 };
        let mut vals = Vec::with_capacity(n + 2);
        vals.push(par * r[1] * scale);
        vals.push(par * r[0] * scale);
        vals.extend(r.iter().map(|v| v * scale));
        RadialTable { l, h, vals, w }
    }

    /// Number of tabulated cells (without ghosts).
    pub fn len(&self) -> usize {
        self.vals.len() - 2
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The stencil for rho (core radii) on a table of `len` cells with spacing h.
    #[inline]
    pub fn stencil(h: f64, len: usize, rho: f64) -> Stencil {
        let x = rho / h - 0.5;
        let j = x.floor();
        // nodes j-1 .. j+2 must be < len
        if j + 2.0 < len as f64 {
            let ji = j as i64; // >= -1
            let t = x - j;
            Stencil::Inside((ji + 1) as usize, lagrange4(t))
        } else {
            Stencil::Tail(rho)
        }
    }

    /// R at a stencil (1/um).
    #[inline]
    pub fn at(&self, s: &Stencil) -> f64 {
        match *s {
            Stencil::Inside(i, w) => {
                let v = &self.vals[i..i + 4];
                w[0] * v[0] + w[1] * v[1] + w[2] * v[2] + w[3] * v[3]
            }
            Stencil::Tail(rho) => {
                let n = self.len();
                let rho_last = (n as f64 - 0.5) * self.h;
                self.vals[n + 1] * k_ratio(self.l, self.w * rho_last, self.w * rho.max(rho_last))
            }
        }
    }

    /// R(rho), rho in core radii.
    pub fn value(&self, rho: f64) -> f64 {
        self.at(&RadialTable::stencil(self.h, self.len(), rho))
    }

    /// The tabulated values at the cell centres (normalised, 1/um).
    pub fn samples(&self) -> &[f64] {
        &self.vals[2..]
    }
}

/// integral_{rho_e}^inf (K_l(w rho)/K_l(w rho_0))^2 rho drho.
fn tail_integral(l: u32, w: f64, rho0: f64, rho_e: f64) -> f64 {
    if w <= 0.0 {
        return 0.0;
    }
    let x = w * rho_e;
    if x > 700.0 {
        return 0.0;
    }
    let r = k_lm1_over_kl(l, x);
    let rp = k_lp1_over_kl(l, x);
    let kk = k_ratio(l, w * rho0, x);
    (x * x / 2.0) * (r * rp - 1.0) * kk * kk / (w * w)
}
