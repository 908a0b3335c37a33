//! Exact LP modes of the weakly guiding step-index fibre (Gloge 1971, Appl. Opt. 10, 2252).
//!
//! Characteristic equation, u^2 + w^2 = V^2:
//! `u J_{l-1}(u) / J_l(u) = -w K_{l-1}(w) / K_l(w)`, with J_{-1} = -J_1, K_{-1} = K_1;
//! normalised propagation constant b = w^2 / V^2. The root of LP_lm lies between the m-th
//! zero of J_{l-1} (its cut-off; for l = 0 the zeros of J_1 counting x = 0 as the first) and
//! the m-th zero of J_l, where J_l has no zero, so the bracket holds exactly one sign
//! change and is refined by bisection. Fields: J_l(u rho)/J_l(u) in the core,
//! K_l(w rho)/K_l(w) in the cladding.
use super::bessel::{bisect, j_signed, j_zeros, k_lm1_over_kl, k_ratio};
use puruspe::Jn;

/// One exact step-index mode.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct StepMode {
    pub l: u32,
    pub m: u32,
    /// Transverse core parameter u = a sqrt(k^2 n1^2 - beta^2).
    pub u: f64,
    /// Cladding decay parameter w = a sqrt(beta^2 - k^2 n2^2).
    pub w: f64,
    /// b = w^2 / V^2.
    pub b: f64,
}

/// Cut-off zeros for azimuthal order l: the zeros of J_{l-1} below `x_max` (l = 0: 0 and the
/// zeros of J_1).
fn cutoff_zeros(l: u32, x_max: f64) -> Vec<f64> {
    if l == 0 {
        let mut z = vec![0.0];
        z.extend(j_zeros(1, x_max));
        z
    } else {
        j_zeros(l - 1, x_max)
    }
}

/// V-number at which LP_lm cuts off: the m-th zero of J_{l-1} (LP0m: j_{1,m-1}); None for
/// LP01, which never cuts off.
pub fn cutoff_v(l: u32, m: u32) -> Option<f64> {
    if m == 0 || (l == 0 && m == 1) {
        return None;
    }
    // McMahon / Olver bounds: j_{n,k} < n + k pi + n^{1/3} 2 + pi; scan comfortably beyond.
    let x_max = l as f64 + (m as f64 + 2.0) * std::f64::consts::PI + 10.0;
    cutoff_zeros(l, x_max).get(m as usize - 1).copied()
}

/// w K_{l-1}(w)/K_l(w), with its limit 0 at w = 0.
fn cladding_term(l: u32, w: f64) -> f64 {
    if w <= 1e-300 {
        0.0
    } else {
        w * k_lm1_over_kl(l, w)
    }
}

/// All guided LP_lm modes of azimuthal order l at V, m = 1, 2, ... (empty when none).
pub fn solve_l(v: f64, l: u32) -> Vec<StepMode> {
    if !(v.is_finite() && v > 0.0) {
        return Vec::new();
    }
    let lower = cutoff_zeros(l, v);
    let upper = j_zeros(l, v + 4.0);
    let li = l as i64;
    let f = |u: f64| {
        let w = (v * v - u * u).max(0.0).sqrt();
        u * j_signed(li - 1, u) / Jn(l, u) + cladding_term(l, w)
    };
    let mut out = Vec::new();
    for (idx, &lo) in lower.iter().enumerate() {
        if lo >= v {
            break;
        }
        let hi = upper.get(idx).copied().unwrap_or(v).min(v);
        let a = lo + 1e-14 * (1.0 + lo);
        let b = if hi < v { hi * (1.0 - 1e-15) } else { v };
        let fa = f(a);
        let fb = f(b);
        if !(fa > 0.0 && fb < 0.0) {
            // Degenerate bracket (mode exactly at cut-off within rounding): not guided.
            continue;
        }
        let u = bisect(f, a, b, fa);
        let w = (v * v - u * u).max(0.0).sqrt();
        out.push(StepMode {
            l,
            m: idx as u32 + 1,
            u,
            w,
            b: (w / v) * (w / v),
        });
    }
    out
}

/// Every guided mode at V, l = 0, 1, ... (stops at the first l with none).
pub fn solve_all(v: f64) -> Vec<StepMode> {
    let mut all = Vec::new();
    for l in 0.. {
        let modes = solve_l(v, l);
        if modes.is_empty() {
            break;
        }
        all.extend(modes);
    }
    all
}

impl StepMode {
    /// Unnormalised radial field at rho = r / a, continuous at rho = 1 (value 1 there).
    pub fn field(&self, rho: f64) -> f64 {
        if rho <= 1.0 {
            Jn(self.l, self.u * rho) / Jn(self.l, self.u)
        } else {
            k_ratio(self.l, self.w, self.w * rho)
        }
    }
}
