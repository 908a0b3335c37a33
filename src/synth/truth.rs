//! The device's true transfer matrix and its figures of merit.
//!
//! Random model (rows = out_channel * n_modes + mode, columns = in_polarisation * n_modes +
//! mode, docs/conventions.md "Matrices"), built on K = max(channels, polarisations)
//! polarisation slots so that it is square and unitary before loss:
//! T = U_groups . W . diag(s), truncated to the channels and polarisations present.
//! - U_groups is block-diagonal by mode group: per group either one Haar unitary over all
//!   slots (pol_mixing = 1), or one Haar unitary per slot (pol_mixing = 0), optionally
//!   followed by a polarisation rotation sending on average pol_mixing / 2 of the power to
//!   the other slot. Haar draws by QR with the phase fix (Mezzadri 2007, Notices AMS 54, 592).
//! - W = (I - A)^-1 (I + A) (Cayley transform, unitary for anti-Hermitian A) couples
//!   different groups only; the scale of A is tuned so that the mean fraction of a column's
//!   power leaving its group equals `group_crosstalk_db`.
//! - s: singular values spread log-uniformly over `mdl_db` (random order over the inputs),
//!   scaled so that mean s^2 = 10^(-insertion_loss_db / 10); since U_groups . W is unitary
//!   the square matrix has exactly these singular values.
//!
//! Figures: IL_dB = -10 log10(tr(M M^H) / N), MDL_dB = 20 log10(s_max / s_min) (Ho & Kahn
//! 2011, Opt. Express 19(17), 16612).
use crate::error::{Error, Result};
use crate::matrix::haar::haar_unitary;
use crate::synth::scenario::{Scenario, TransferKind};
use nalgebra::DMatrix;
use ndarray::Array2;
use num_complex::Complex64;
use rand::seq::SliceRandom;
use rand::{RngExt, SeedableRng};
use rand_distr::{Distribution, StandardNormal};
use serde::Serialize;

/// The random generator used everywhere in synth (portable across platforms and versions).
pub type SynthRng = rand::rngs::Xoshiro256PlusPlus;

/// A generator for one purpose (`stream`) and item (`index`) derived from the scenario seed,
/// so that every frame draws the same numbers whatever thread renders it.
pub fn rng_for(seed: u64, stream: u64, index: u64) -> SynthRng {
    let mut z = seed
        ^ stream.wrapping_mul(0x9E37_79B9_7F4A_7C15)
        ^ index.wrapping_mul(0xD1B5_4A32_D192_ED03);
    // splitmix64 finaliser
    z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
    z ^= z >> 31;
    SynthRng::seed_from_u64(z)
}

/// Random streams (the `stream` argument of [`rng_for`]).
pub const STREAM_TRUTH: u64 = 1;
pub const STREAM_DRIFT: u64 = 2;
pub const STREAM_FRAME: u64 = 3;
pub const STREAM_CALIBRATION: u64 = 4;

/// Parameters of the random transfer matrix.
#[derive(Debug, Clone, Copy)]
pub struct RandomTransfer {
    pub mdl_db: f64,
    pub insertion_loss_db: f64,
    pub group_crosstalk_db: Option<f64>,
    pub pol_mixing: f64,
}

/// A random transfer matrix of shape (n_channels * n_modes, n_pols * n_modes);
/// `groups[m]` is the mode group of mode m (modes of one group need not be adjacent).
pub fn random_transfer(
    groups: &[usize],
    n_pols: usize,
    n_channels: usize,
    p: &RandomTransfer,
    seed: u64,
) -> Array2<Complex64> {
    let n = groups.len();
    let k = n_pols.max(n_channels);
    let dim = k * n;
    let mut rng = rng_for(seed, STREAM_TRUTH, 0);
    let mut distinct: Vec<usize> = groups.to_vec();
    distinct.sort_unstable();
    distinct.dedup();
    let zero = Complex64::new(0.0, 0.0);

    // U_groups
    let mut u = Array2::from_elem((dim, dim), zero);
    for &g in &distinct {
        let idx: Vec<usize> = (0..n).filter(|&m| groups[m] == g).collect();
        let s = idx.len();
        if p.pol_mixing >= 1.0 || k == 1 {
            let h = haar_unitary(k * s, &mut rng);
            for (pa, qa, a, b) in quad(k, s) {
                u[(pa * n + idx[a], qa * n + idx[b])] = h[(pa * s + a, qa * s + b)];
            }
        } else {
            let blocks: Vec<Array2<Complex64>> =
                (0..k).map(|_| haar_unitary(s, &mut rng)).collect();
            // polarisation rotation C (identity without mixing)
            let mut c = Array2::from_elem((k, k), zero);
            for i in 0..k {
                c[(i, i)] = Complex64::new(1.0, 0.0);
            }
            if p.pol_mixing > 0.0 && k == 2 {
                let st = (p.pol_mixing / 2.0).sqrt();
                let ct = (1.0 - st * st).sqrt();
                let chi = 2.0 * std::f64::consts::PI * rng.random::<f64>();
                let e = Complex64::from_polar(1.0, chi);
                c[(0, 0)] = Complex64::new(ct, 0.0);
                c[(1, 1)] = Complex64::new(ct, 0.0);
                c[(0, 1)] = -e.conj() * st;
                c[(1, 0)] = e * st;
            }
            for (pa, qa, a, b) in quad(k, s) {
                u[(pa * n + idx[a], qa * n + idx[b])] = c[(pa, qa)] * blocks[qa][(a, b)];
            }
        }
    }

    // W: inter-group coupling
    let group_of = |i: usize| groups[i % n];
    let w = match p.group_crosstalk_db {
        None => identity(dim),
        Some(x_db) => {
            let target = 10f64.powf(x_db / 10.0);
            let s2 = std::f64::consts::FRAC_1_SQRT_2;
            let mut g = Array2::from_elem((dim, dim), zero);
            for v in g.iter_mut() {
                let a: f64 = StandardNormal.sample(&mut rng);
                let b: f64 = StandardNormal.sample(&mut rng);
                *v = Complex64::new(a * s2, b * s2);
            }
            let a0 = Array2::from_shape_fn((dim, dim), |(i, j)| {
                if group_of(i) == group_of(j) {
                    zero
                } else {
                    (g[(i, j)] - g[(j, i)].conj()) * 0.5
                }
            });
            let n_other: f64 = (0..dim)
                .map(|j| (0..dim).filter(|&i| group_of(i) != group_of(j)).count() as f64)
                .sum::<f64>()
                / dim as f64;
            let mut eps = if n_other > 0.0 {
                (target / (2.0 * n_other)).sqrt()
            } else {
                0.0
            };
            let mut w = cayley(&a0, eps);
            for _ in 0..6 {
                let got = mean_group_leakage(&w, &group_of);
                if got <= 0.0 {
                    break;
                }
                eps *= (target / got).sqrt();
                w = cayley(&a0, eps);
            }
            w
        }
    };

    // singular values
    let mut order: Vec<usize> = (0..dim).collect();
    order.shuffle(&mut rng);
    let mut sv: Vec<f64> = (0..dim)
        .map(|i| {
            let t = if dim > 1 {
                order[i] as f64 / (dim - 1) as f64
            } else {
                0.5
            };
            10f64.powf(p.mdl_db / 20.0 * (t - 0.5))
        })
        .collect();
    let mean_s2 = sv.iter().map(|s| s * s).sum::<f64>() / dim as f64;
    let norm = (10f64.powf(-p.insertion_loss_db / 10.0) / mean_s2).sqrt();
    for s in sv.iter_mut() {
        *s *= norm;
    }

    let uw = u.dot(&w);
    Array2::from_shape_fn((n_channels * n, n_pols * n), |(i, j)| uw[(i, j)] * sv[j])
}

/// (slot a, slot b, mode a, mode b) over all pairs.
fn quad(k: usize, s: usize) -> impl Iterator<Item = (usize, usize, usize, usize)> {
    (0..k).flat_map(move |pa| {
        (0..k).flat_map(move |qa| (0..s).flat_map(move |a| (0..s).map(move |b| (pa, qa, a, b))))
    })
}

fn identity(n: usize) -> Array2<Complex64> {
    Array2::from_shape_fn((n, n), |(i, j)| {
        Complex64::new(if i == j { 1.0 } else { 0.0 }, 0.0)
    })
}

/// (I - eps A)^-1 (I + eps A).
fn cayley(a: &Array2<Complex64>, eps: f64) -> Array2<Complex64> {
    let n = a.nrows();
    let ea = DMatrix::<Complex64>::from_fn(n, n, |i, j| a[(i, j)] * eps);
    let id = DMatrix::<Complex64>::identity(n, n);
    let lhs = &id - &ea;
    let rhs = &id + &ea;
    // I - A is invertible for anti-Hermitian A (its eigenvalues are 1 - i lambda, lambda real).
    let w = lhs.lu().solve(&rhs).unwrap_or(id);
    Array2::from_shape_fn((n, n), |(i, j)| w[(i, j)])
}

/// Mean over columns of the fraction of the column's power outside the column's group.
fn mean_group_leakage(m: &Array2<Complex64>, group_of: &dyn Fn(usize) -> usize) -> f64 {
    let (rows, cols) = m.dim();
    let mut acc = 0.0;
    for j in 0..cols {
        let mut tot = 0.0;
        let mut out = 0.0;
        for i in 0..rows {
            let p = m[(i, j)].norm_sqr();
            tot += p;
            if group_of(i) != group_of(j) {
                out += p;
            }
        }
        if tot > 0.0 {
            acc += out / tot;
        }
    }
    acc / cols as f64
}

/// Figures of merit of a transfer matrix.
#[derive(Debug, Clone, Serialize)]
pub struct Figures {
    pub insertion_loss_db: f64,
    pub mode_dependent_loss_db: f64,
    pub singular_values: Vec<f64>,
    /// Mean fraction of a column's power outside its own mode group, dB (None: no leakage).
    pub group_crosstalk_db: Option<f64>,
}

/// IL, MDL (Ho & Kahn 2011) and group crosstalk of `m`; `groups[m]` per mode.
pub fn figures(m: &Array2<Complex64>, groups: &[usize]) -> Figures {
    let (r, c) = m.dim();
    let d = DMatrix::<Complex64>::from_fn(r, c, |i, j| m[(i, j)]);
    let mut sv: Vec<f64> = d.singular_values().iter().copied().collect();
    sv.sort_by(|a, b| b.total_cmp(a));
    let n = r.min(c).max(1) as f64;
    let tr: f64 = m.iter().map(|z| z.norm_sqr()).sum();
    let il = -10.0 * (tr / n).log10();
    let (smax, smin) = (sv.first().copied().unwrap_or(0.0), sv.last().copied().unwrap_or(0.0));
    let mdl = if smin > 0.0 {
        20.0 * (smax / smin).log10()
    } else {
        f64::INFINITY
    };
    let nm = groups.len().max(1);
    let leak = mean_group_leakage(m, &|i| groups[i % nm]);
    Figures {
        insertion_loss_db: il,
        mode_dependent_loss_db: mdl,
        singular_values: sv,
        group_crosstalk_db: (leak > 0.0).then(|| 10.0 * leak.log10()),
    }
}

/// The scenario's transfer matrix: random, or read from its NPY file (shape checked).
pub fn transfer_matrix(scn: &Scenario, groups: &[usize]) -> Result<Array2<Complex64>> {
    let n = groups.len();
    let rows = scn.channels.len() * n;
    let cols = scn.launch.polarizations.len() * n;
    let t = &scn.transfer;
    match t.kind {
        TransferKind::Random => Ok(random_transfer(
            groups,
            scn.launch.polarizations.len(),
            scn.channels.len(),
            &RandomTransfer {
                mdl_db: t.mdl_db,
                insertion_loss_db: t.insertion_loss_db,
                group_crosstalk_db: t.group_crosstalk_db,
                pol_mixing: t.pol_mixing,
            },
            scn.seed,
        )),
        TransferKind::File => {
            let rel = t.file.clone().unwrap_or_default();
            let path = scn.resolve(&rel);
            let file = scn.file.display().to_string();
            let m: Array2<Complex64> = crate::export::read_npy(&path).map_err(|e| {
                Error::setup(&file, "transfer.file", rel.display(), e.to_string())
            })?;
            if m.dim() != (rows, cols) {
                return Err(Error::setup(
                    &file,
                    "transfer.file",
                    rel.display(),
                    format!(
                        "matrix has shape {:?}; this scenario needs ({rows}, {cols}) \
                         (channels * modes, polarizations * modes)",
                        m.dim()
                    ),
                ));
            }
            if m.iter().any(|z| !z.re.is_finite() || !z.im.is_finite()) {
                return Err(Error::setup(
                    &file,
                    "transfer.file",
                    rel.display(),
                    "matrix holds non-finite values",
                ));
            }
            Ok(m)
        }
    }
}
