//! Random transfer matrices with a prescribed mode-dependent loss and mode-group crosstalk,
//! for the simulator and the tests.
//!
//! Construction of M (outputs = n_channels * n_modes, inputs = n_pols * n_modes):
//! 1. Singular values: K = min(outputs, inputs) values `s_i = 10^(-MDL_dB/20 * i/(K-1))`
//!    (log-uniformly spaced, so s_max / s_min is exactly the requested MDL), shuffled over the
//!    modes with the seeded generator and scaled to mean s_i^2 = 1 (IL 0 dB).
//! 2. A block-diagonal part B: for each mode group a block `U_g diag(s_g) V_g^H` over that
//!    group's rows and columns, with U_g, V_g Haar-random (Mezzadri 2007, Notices AMS 54,
//!    592; [`super::haar::haar_unitary`]). Polarisation mixing:
//!    `Full`: U_g, V_g span both polarisations / all channels of the group (truncated to
//!    K_g columns when channels and polarisations differ in number);
//!    `Rotation`: the block is `J_g (x) (U_g diag(s_g) V_g^H)` with J_g a Haar-random unitary
//!    over polarisations (the same spatial singular values in every polarisation);
//!    `None`: one independent block per polarisation, input polarisation p reaching channel p
//!    only. `Rotation` and `None` need as many channels as polarisations.
//! 3. Inter-group crosstalk: `M = W B` with `W = exp(t A)` unitary, A anti-Hermitian with
//!    complex Gaussian entries only between rows of different groups (and, with `None`, only
//!    within one channel). W is unitary, so the singular values of M are exactly s and the
//!    MDL is exact. t is found by bisection so that the overall group crosstalk of M (power
//!    leaving the input's group over power staying, summed over all inputs, as in
//!    [`super::analysis`]) equals `group_crosstalk_db`; per-group values scatter around it.
//!    `group_crosstalk_db = -inf` gives W = I (no crosstalk).
use super::haar::haar_unitary;
use crate::error::{Error, Result};
use nalgebra::DMatrix;
use ndarray::Array2;
use num_complex::Complex64;
use rand::seq::SliceRandom;
use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};
use serde::{Deserialize, Serialize};

/// How the polarisations are mixed inside each mode group.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize, Deserialize, Default)]
#[serde(rename_all = "lowercase")]
pub enum PolMixing {
    /// No mixing: input polarisation p reaches channel p only.
    None,
    /// A random 2x2 (n_pols x n_pols) unitary per group times one spatial block.
    Rotation,
    /// One Haar block over all polarisations and modes of the group.
    #[default]
    Full,
}

/// A random transfer matrix (see the module documentation for the construction).
pub fn random_transfer(
    groups: &[u32],
    n_pols_in: usize,
    n_channels_out: usize,
    mdl_db: f64,
    group_crosstalk_db: f64,
    pol_mixing: PolMixing,
    seed: u64,
) -> Result<Array2<Complex64>> {
    let n = groups.len();
    if n == 0 || n_pols_in == 0 || n_channels_out == 0 {
        return Err(Error::Input(format!(
            "random transfer matrix needs modes, polarisations and channels \
             (got {n} modes, {n_pols_in} polarisations, {n_channels_out} channels)"
        )));
    }
    if !(mdl_db.is_finite() && mdl_db >= 0.0) {
        return Err(Error::Input(format!(
            "mode-dependent loss {mdl_db} dB: must be a finite number >= 0"
        )));
    }
    if group_crosstalk_db.is_nan() || group_crosstalk_db >= 0.0 {
        return Err(Error::Input(format!(
            "group crosstalk {group_crosstalk_db} dB: must be below 0 dB (-inf for none)"
        )));
    }
    if pol_mixing != PolMixing::Full && n_pols_in != n_channels_out {
        return Err(Error::Input(format!(
            "polarisation mixing {pol_mixing:?} needs as many output channels as input \
             polarisations (got {n_channels_out} channels, {n_pols_in} polarisations)"
        )));
    }
    let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
    let (rows, cols) = (n_channels_out * n, n_pols_in * n);
    // Distinct singular values to spread: spatial ones only for Rotation.
    let k = match pol_mixing {
        PolMixing::Rotation => n,
        _ => rows.min(cols),
    };
    if k == 1 && mdl_db > 0.0 {
        return Err(Error::Input(format!(
            "a matrix with one singular value has no mode-dependent loss (asked {mdl_db} dB)"
        )));
    }
    let mut s: Vec<f64> = (0..k)
        .map(|i| {
            let u = if k > 1 {
                i as f64 / (k - 1) as f64
            } else {
                0.0
            };
            10f64.powf(-mdl_db / 20.0 * u)
        })
        .collect();
    s.shuffle(&mut rng);
    let ms2 = s.iter().map(|x| x * x).sum::<f64>() / k as f64;
    s.iter_mut().for_each(|x| *x /= ms2.sqrt());

    let mut ids: Vec<u32> = groups.to_vec();
    ids.sort_unstable();
    ids.dedup();
    let members: Vec<Vec<usize>> = ids
        .iter()
        .map(|g| (0..n).filter(|&i| groups[i] == *g).collect())
        .collect();
    let mut b = Array2::<Complex64>::zeros((rows, cols));
    let mut next = 0usize; // next unused singular value
    for modes in &members {
        let ng = modes.len();
        match pol_mixing {
            PolMixing::Full => {
                let (br, bc) = (n_channels_out * ng, n_pols_in * ng);
                let kg = br.min(bc);
                let blk = svd_block(br, bc, &s[next..next + kg], &mut rng);
                next += kg;
                for (lr, row) in blk.rows().into_iter().enumerate() {
                    let r = (lr / ng) * n + modes[lr % ng];
                    for (lc, z) in row.iter().enumerate() {
                        b[(r, (lc / ng) * n + modes[lc % ng])] = *z;
                    }
                }
            }
            PolMixing::Rotation => {
                let blk = svd_block(ng, ng, &s[next..next + ng], &mut rng);
                next += ng;
                let j = haar_unitary(n_pols_in, &mut rng);
                for q in 0..n_channels_out {
                    for p in 0..n_pols_in {
                        for a in 0..ng {
                            for c in 0..ng {
                                b[(q * n + modes[a], p * n + modes[c])] = j[(q, p)] * blk[(a, c)];
                            }
                        }
                    }
                }
            }
            PolMixing::None => {
                for p in 0..n_pols_in {
                    let blk = svd_block(ng, ng, &s[next..next + ng], &mut rng);
                    next += ng;
                    for a in 0..ng {
                        for c in 0..ng {
                            b[(p * n + modes[a], p * n + modes[c])] = blk[(a, c)];
                        }
                    }
                }
            }
        }
    }
    if group_crosstalk_db == f64::NEG_INFINITY || ids.len() == 1 {
        return Ok(b);
    }
    // Anti-Hermitian generator between rows of different groups.
    let row_group = |r: usize| groups[r % n];
    let mut a = DMatrix::<Complex64>::zeros(rows, rows);
    let sd = std::f64::consts::FRAC_1_SQRT_2;
    for r in 0..rows {
        for c in (r + 1)..rows {
            let coupled =
                row_group(r) != row_group(c) && (pol_mixing != PolMixing::None || r / n == c / n);
            if coupled {
                let x: f64 = StandardNormal.sample(&mut rng);
                let y: f64 = StandardNormal.sample(&mut rng);
                let z = Complex64::new(x * sd, y * sd);
                a[(r, c)] = z;
                a[(c, r)] = -z.conj();
            }
        }
    }
    let bd = super::linalg::to_dmatrix(&b);
    let x = 10f64.powf(group_crosstalk_db / 10.0);
    let target = x / (1.0 + x);
    let off_fraction = |t: f64| -> (f64, DMatrix<Complex64>) {
        let w = (&a * Complex64::new(t, 0.0)).exp();
        let m = w * &bd;
        let (mut off, mut all) = (0.0, 0.0);
        for c in 0..cols {
            let gc = groups[c % n];
            for r in 0..rows {
                let p = m[(r, c)].norm_sqr();
                all += p;
                if row_group(r) != gc {
                    off += p;
                }
            }
        }
        (off / all, m)
    };
    let mut hi = 1.0 / (rows as f64).sqrt();
    let mut grow = 0;
    while off_fraction(hi).0 < target {
        hi *= 2.0;
        grow += 1;
        if grow > 12 {
            return Err(Error::Input(format!(
                "group crosstalk {group_crosstalk_db} dB is more than this coupling reaches"
            )));
        }
    }
    let mut lo = 0.0;
    for _ in 0..50 {
        let mid = 0.5 * (lo + hi);
        if off_fraction(mid).0 < target {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    let m = off_fraction(0.5 * (lo + hi)).1;
    Ok(super::linalg::from_dmatrix(&m))
}

/// `U[:, :k] diag(s) V[:, :k]^H` with U (rows x rows), V (cols x cols) Haar-random.
fn svd_block<R: rand::Rng + ?Sized>(
    rows: usize,
    cols: usize,
    s: &[f64],
    rng: &mut R,
) -> Array2<Complex64> {
    let u = haar_unitary(rows, rng);
    let v = haar_unitary(cols, rng);
    Array2::from_shape_fn((rows, cols), |(i, j)| {
        s.iter()
            .enumerate()
            .map(|(l, &sl)| u[(i, l)] * sl * v[(j, l)].conj())
            .sum()
    })
}
