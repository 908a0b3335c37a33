//! Bessel-function helpers for the step-index solver and the evanescent tails: ratios of
//! modified Bessel functions that stay finite where K_l itself over- or underflows, and
//! zeros of J_n.
//!
//! Recurrence (DLMF 10.29.1): K_{l+1}(x) = K_{l-1}(x) + (2l/x) K_l(x); J likewise with a minus.
//! Forward recurrence of K and of the ratio K_{l-1}/K_l is stable (K_l grows with l).
use puruspe::{Jn, Kn};

/// K_{l-1}(x) / K_l(x) for x > 0, with K_{-1} = K_1.
pub fn k_lm1_over_kl(l: u32, x: f64) -> f64 {
    // r_0 = K_{-1}/K_0 = K_1/K_0; r_{j+1} = K_j/K_{j+1} = 1 / (r_j + 2j/x).
    let r1_over_0 = if x > 700.0 {
        // Large-argument expansion (DLMF 10.40.2): K_1/K_0 = 1 + 1/(2x) - 1/(8x^2) + ...
        1.0 + 0.5 / x - 0.125 / (x * x)
    } else {
        Kn(1, x) / Kn(0, x)
    };
    let mut r = r1_over_0; // K_{-1}/K_0
    for j in 0..l {
        // K_{j+1}/K_j = K_{j-1}/K_j + 2j/x  =>  K_j/K_{j+1} = 1/(r + 2j/x)
        r = 1.0 / (r + 2.0 * j as f64 / x);
    }
    r
}

/// K_{l+1}(x) / K_l(x).
pub fn k_lp1_over_kl(l: u32, x: f64) -> f64 {
    k_lm1_over_kl(l, x) + 2.0 * l as f64 / x
}

/// K_l(x2) / K_l(x1) for 0 <= x1 <= x2 (the decay of an evanescent tail); for x1 -> 0 the
/// limit (x1/x2)^l (l >= 1) or 1 (l = 0) is used.
pub fn k_ratio(l: u32, x1: f64, x2: f64) -> f64 {
    if x1 <= 1e-9 {
        if l == 0 {
            // K_0(x) ~ -ln(x/2) - gamma: the ratio tends to 1 as both arguments -> 0.
            return if x2 <= 1e-9 {
                1.0
            } else {
                let g = 0.5772156649015329;
                let k0 = |x: f64| -(0.5 * x).ln() - g;
                (k0(x2.max(1e-300)) / k0(x1.max(1e-300))).clamp(0.0, 1.0)
            };
        }
        return (x1.max(1e-300) / x2).powi(l as i32).min(1.0);
    }
    let k0ratio = if x2 > 700.0 {
        // DLMF 10.40.2 leading term: K_0(x) ~ sqrt(pi/2x) e^-x.
        let a = |x: f64| (1.0 - 0.125 / x) / x.sqrt();
        a(x2) / a(x1) * (-(x2 - x1)).exp()
    } else {
        Kn(0, x2) / Kn(0, x1)
    };
    let mut ratio = k0ratio;
    if l > 0 {
        // product of (K_{j+1}/K_j)(x2) / (K_{j+1}/K_j)(x1), j = 0..l-1
        let mut r1 = k_lm1_over_kl(0, x1); // K_1/K_0 at x1 (K_{-1}=K_1)
        let mut r2 = k_lm1_over_kl(0, x2);
        for j in 0..l {
            // K_{j+1}/K_j = K_{j-1}/K_j + 2j/x; r holds K_{j-1}/K_j
            let q1 = r1 + 2.0 * j as f64 / x1;
            let q2 = r2 + 2.0 * j as f64 / x2;
            ratio *= q2 / q1;
            r1 = 1.0 / q1;
            r2 = 1.0 / q2;
        }
    }
    ratio
}

/// J_n(x) (puruspe), with J_{-1} = -J_1.
pub fn j_signed(n: i64, x: f64) -> f64 {
    if n < 0 {
        -Jn((-n) as u32, x)
    } else {
        Jn(n as u32, x)
    }
}

/// The positive zeros of J_n below `x_max`, ascending (bracketed on a scan of step 0.1 and
/// refined by bisection to machine precision). Zeros of J_n are at least ~3 apart, so the
/// scan does not miss any (DLMF 10.21(vi)).
pub fn j_zeros(n: u32, x_max: f64) -> Vec<f64> {
    let mut zeros = Vec::new();
    let step = 0.1;
    // J_n has no zero in (0, n] (DLMF 10.21.3: j_{n,1} > n).
    let mut a = (n as f64).max(1e-3);
    let mut fa = Jn(n, a);
    while a < x_max {
        let b = (a + step).min(x_max);
        let fb = Jn(n, b);
        if fa == 0.0 {
            zeros.push(a);
        } else if fa * fb < 0.0 {
            zeros.push(bisect(|x| Jn(n, x), a, b, fa));
        }
        a = b;
        fa = fb;
        if b >= x_max {
            break;
        }
    }
    zeros
}

/// Root of f in [a, b] where f(a) = fa and f changes sign; bisection to adjacent floats.
pub fn bisect(f: impl Fn(f64) -> f64, mut a: f64, mut b: f64, mut fa: f64) -> f64 {
    for _ in 0..200 {
        let m = 0.5 * (a + b);
        if m <= a || m >= b {
            break;
        }
        let fm = f(m);
        if fm == 0.0 {
            return m;
        }
        if (fm < 0.0) == (fa < 0.0) {
            a = m;
            fa = fm;
        } else {
            b = m;
        }
    }
    0.5 * (a + b)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn zeros_match_dlmf_table() {
        // DLMF 10.21 / A&S table 9.5.
        let z = j_zeros(0, 9.0);
        assert!((z[0] - 2.404825557695773).abs() < 1e-12);
        assert!((z[1] - 5.520078110286311).abs() < 1e-12);
        let z = j_zeros(2, 9.0);
        assert!((z[0] - 5.135622301840683).abs() < 1e-12);
    }

    #[test]
    fn k_ratios_agree_with_direct_values() {
        // Recurrence identities (DLMF 10.29.1) against puruspe's K_n directly.
        for l in 0..6u32 {
            for &x in &[0.3, 1.0, 4.0, 20.0] {
                let direct = if l == 0 { Kn(1, x) } else { Kn(l - 1, x) } / Kn(l, x);
                assert!((k_lm1_over_kl(l, x) - direct).abs() < 1e-10 * direct.abs());
                let d2 = Kn(l, 1.7 * x) / Kn(l, x);
                assert!((k_ratio(l, x, 1.7 * x) - d2).abs() < 1e-10 * d2);
            }
        }
    }
}
