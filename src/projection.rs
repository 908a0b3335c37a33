//! Overlap integrals of decoded fields with a mode basis sampled on the same grid.
//!
//! Contract (docs/conventions.md "Modes"): `c_k = sum conj(psi_k) E dA` over the decoded grid
//! (dA = pitch_um^2), computed for a batch of frames as one matrix product
//! `C (batch x modes) = F (batch x pixels) . conj(Psi)^T (pixels x modes) * dA`; the captured
//! power of a field is `sum_k |c_k|^2 / sum |E|^2 dA` (1 for a field inside the span of an
//! orthonormal basis, by Parseval's identity for orthonormal expansions).
//!
//! How the product is evaluated (results agree with the f64 sums to f32 rounding,
//! [`F32_RELATIVE_ERROR`]):
//! - Pixels: only the pixels where the basis lives. Pixels are dropped, weakest first, while
//!   the dropped share of every mode's power stays below [`DROPPED_POWER`]: by the
//!   Cauchy-Schwarz inequality a dropped set changes `|c_k|` by at most
//!   `sqrt(DROPPED_POWER * sum |psi_k|^2 dA * sum |E|^2 dA)`, i.e. 1e-7 of the field's
//!   amplitude for a unit-norm mode. The field power stays the full-grid sum.
//! - Precision: basis and fields in f32, products summed in f32 over blocks of
//!   [`BLOCK_PX`] pixels and the block sums in f64. Coefficients are returned as f64.
//! - Real bases (every imaginary part 0, e.g. LP modes with cos/sin azimuth) need half the
//!   products of complex ones: `Re c = Re E . psi`, `Im c = Im E . psi`.
//! - The basis is packed once into the kernel's layout, so a batch streams it once.
//!   Each (frame, mode) sum runs in one fixed order, so results are the same for any
//!   split of frames or modes between threads.
use crate::error::{Error, Result};
use crate::grid::Grid;
use ndarray::{Array2, Array3, ArrayView2, ArrayView3, ArrayViewMut2};
use num_complex::Complex64;
use std::ops::Range;

/// Pixels summed in f32 before the partial sum is added in f64 (a multiple of [`LANES`]).
pub const BLOCK_PX: usize = 512;
/// Vector width of the kernel (f32 lanes).
const LANES: usize = 8;
/// Largest share of any mode's power on the pixels left out of the overlap.
pub const DROPPED_POWER: f64 = 1e-14;
/// Bound on `|c - c_exact| / (||psi|| ||E|| dA)` from the f32 evaluation, for grids up
/// to a few million pixels: inputs rounded to f32 (2^-24 relative each) and at most
/// BLOCK_PX / LANES = 64 f32 additions per partial sum, each adding at most 2^-24 relative
/// to the running sum (Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed.,
/// eq. 3.5 with gamma_n = n u), bounded by about 70 * 2^-24 = 4e-6, rounded up.
pub const F32_RELATIVE_ERROR: f64 = 1e-5;

/// A basis prepared for projection on one grid.
#[derive(Debug, Clone)]
pub struct Projector {
    pub grid: Grid,
    n_modes: usize,
    /// Every conj(psi_k) dA has imaginary part 0.
    real: bool,
    /// Grid pixels (row-major indices, ascending) where the basis lives.
    active: Vec<u32>,
    /// `active.len()` rounded up to a multiple of LANES.
    k_pad: usize,
    /// Length of one packed field ([`Projector::packed_len`]).
    stride: usize,
    /// conj(psi) dA in f32, `[block][basis row][pixel in block]`; basis row `k` (real) or
    /// `2k` (real part), `2k + 1` (imaginary part) for complex bases.
    packed: Vec<f32>,
}

impl Projector {
    /// `basis` has shape (modes, ny, nx) and must match `grid`.
    pub fn new(basis: ArrayView3<Complex64>, grid: &Grid) -> Result<Projector> {
        Projector::from_array(basis.to_owned(), grid)
    }

    /// Like [`Projector::new`], taking the sampled basis by value: conjugated and scaled in
    /// place, so no second f64 copy of the basis is held.
    pub fn from_array(basis: Array3<Complex64>, grid: &Grid) -> Result<Projector> {
        let (m, ny, nx) = basis.dim();
        check_shape(nx, ny, grid)?;
        let da = grid.pixel_area_um2();
        let basis = if basis.is_standard_layout() {
            basis
        } else {
            basis.as_standard_layout().to_owned()
        };
        let mut b = basis
            .into_shape_with_order((m, nx * ny))
            .map_err(|e| Error::Input(format!("basis array: {e}")))?;
        b.mapv_inplace(|z| z.conj() * da);
        Ok(Projector::from_rows(b.view(), grid))
    }

    /// Pack conj(psi_k) dA, shape (modes, pixels).
    fn from_rows(rows: ArrayView2<Complex64>, grid: &Grid) -> Projector {
        let n_modes = rows.nrows();
        let real = rows.iter().all(|z| z.im == 0.0);
        let active = active_pixels(rows);
        let k_pad = active.len().div_ceil(LANES) * LANES;
        let nb = if real { n_modes } else { 2 * n_modes };
        let mut packed = vec![0f32; nb * k_pad];
        for (b, k0) in (0..k_pad).step_by(BLOCK_PX).enumerate() {
            let kc = BLOCK_PX.min(k_pad - k0);
            let base = b * BLOCK_PX * nb;
            for (k, row) in rows.outer_iter().enumerate() {
                for (i, &p) in active[k0..(k0 + kc).min(active.len())].iter().enumerate() {
                    let z = row[p as usize];
                    if real {
                        packed[base + k * kc + i] = z.re as f32;
                    } else {
                        packed[base + 2 * k * kc + i] = z.re as f32;
                        packed[base + (2 * k + 1) * kc + i] = z.im as f32;
                    }
                }
            }
        }
        // Per packed field: re and im rows per block; padded so consecutive fields do not
        // fall on the same cache sets.
        let stride = (2 * k_pad).div_ceil(1024) * 1024 + 16;
        Projector {
            grid: *grid,
            n_modes,
            real,
            active,
            k_pad,
            stride,
            packed,
        }
    }

    /// Number of modes.
    pub fn n_modes(&self) -> usize {
        self.n_modes
    }

    /// Grid pixels that enter the overlap (the rest hold less than [`DROPPED_POWER`] of
    /// every mode).
    pub fn active_pixels(&self) -> usize {
        self.active.len()
    }

    /// True when the basis is real (half the products).
    pub fn is_real(&self) -> bool {
        self.real
    }

    /// f32 values per packed field ([`Projector::pack_field`]).
    pub fn packed_len(&self) -> usize {
        self.stride
    }

    /// Pack one field (grid pixels, row-major) into `dst` (`packed_len()` values) for
    /// [`Projector::project_packed`].
    pub fn pack_field(&self, field: &[Complex64], dst: &mut [f32]) {
        let dst = &mut dst[..self.stride];
        for (b, k0) in (0..self.k_pad).step_by(BLOCK_PX).enumerate() {
            let kc = BLOCK_PX.min(self.k_pad - k0);
            let (re, im) = dst[2 * b * BLOCK_PX..][..2 * kc].split_at_mut(kc);
            let px = &self.active[k0..(k0 + kc).min(self.active.len())];
            for ((r, i), &p) in re.iter_mut().zip(im.iter_mut()).zip(px) {
                let z = field[p as usize];
                *r = z.re as f32;
                *i = z.im as f32;
            }
            for v in re[px.len()..].iter_mut().chain(im[px.len()..].iter_mut()) {
                *v = 0.0;
            }
        }
    }

    /// Coefficients of modes `modes` for `frames` packed fields (`packed`, frame `f` at
    /// `f * packed_len()`): `out[(f, k - modes.start)]`, shape (frames, modes.len()).
    pub fn project_packed(
        &self,
        packed: &[f32],
        frames: usize,
        modes: Range<usize>,
        mut out: ArrayViewMut2<Complex64>,
    ) {
        assert!(modes.end <= self.n_modes && out.dim() == (frames, modes.len()));
        assert!(packed.len() >= frames * self.stride);
        out.fill(Complex64::default());
        if frames == 0 || modes.is_empty() {
            return;
        }
        let (j0, j1) = if self.real {
            (modes.start, modes.end)
        } else {
            (2 * modes.start, 2 * modes.end)
        };
        let nb = if self.real {
            self.n_modes
        } else {
            2 * self.n_modes
        };
        let job = Job {
            packed,
            stride: self.stride,
            basis: &self.packed,
            nb,
            k_pad: self.k_pad,
            rows: 2 * frames,
            cols: j0..j1,
            real: self.real,
            m0: modes.start,
        };
        run(&job, &mut out);
    }

    /// Coefficients of a batch: `fields` (batch, pixels) -> `out` (batch, modes).
    pub fn project_into(&self, fields: ArrayView2<Complex64>, out: ArrayViewMut2<Complex64>) {
        let n = fields.nrows();
        let mut packed = vec![0f32; n * self.stride];
        let mut row = Vec::with_capacity(fields.ncols());
        for (f, dst) in fields
            .outer_iter()
            .zip(packed.chunks_exact_mut(self.stride))
        {
            row.clear();
            row.extend(f.iter());
            self.pack_field(&row, dst);
        }
        self.project_packed(&packed, n, 0..self.n_modes, out);
    }

    /// Coefficients of a batch (batch, pixels) -> (batch, modes).
    pub fn project(&self, fields: ArrayView2<Complex64>) -> Array2<Complex64> {
        let mut out = Array2::zeros((fields.nrows(), self.n_modes()));
        self.project_into(fields, out.view_mut());
        out
    }
}

fn check_shape(nx: usize, ny: usize, grid: &Grid) -> Result<()> {
    if (ny, nx) != (grid.ny, grid.nx) {
        return Err(Error::Input(format!(
            "basis sampled on {nx}x{ny} pixels, the decoded grid has {}x{}",
            grid.nx, grid.ny
        )));
    }
    Ok(())
}

/// Pixels kept: drop the weakest (by the largest share of any one mode's power) while the
/// dropped shares sum to at most DROPPED_POWER; ascending pixel order.
fn active_pixels(rows: ArrayView2<Complex64>) -> Vec<u32> {
    let n = rows.ncols();
    let mut w = vec![0f64; n];
    for r in rows.outer_iter() {
        let s = r.iter().map(|z| z.norm_sqr()).sum::<f64>();
        if s > 0.0 && s.is_finite() {
            for (w, z) in w.iter_mut().zip(r) {
                *w = w.max(z.norm_sqr() / s);
            }
        } else if !s.is_finite() {
            // keep every pixel of a non-finite mode (the result is then non-finite anyway)
            w.iter_mut().for_each(|w| *w = f64::INFINITY);
        }
    }
    let mut order: Vec<u32> = (0..n as u32).collect();
    order.sort_by(|&a, &b| w[a as usize].total_cmp(&w[b as usize]).then(a.cmp(&b)));
    let mut dropped = 0.0;
    let mut cut = 0;
    for &p in &order {
        dropped += w[p as usize];
        if dropped > DROPPED_POWER {
            break;
        }
        cut += 1;
    }
    let mut keep = order.split_off(cut);
    keep.sort_unstable();
    keep
}

/// One product: rows `2f` (Re E_f) and `2f + 1` (Im E_f) of the packed fields against
/// basis rows `cols`.
struct Job<'a> {
    packed: &'a [f32],
    stride: usize,
    basis: &'a [f32],
    nb: usize,
    k_pad: usize,
    rows: usize,
    cols: Range<usize>,
    real: bool,
    m0: usize,
}

/// Add the f64 block sums `d[r][j]` (field row r0 + r, basis row j0 + j) to the coefficients.
#[inline(always)]
fn store<const R: usize, const MB: usize>(
    job: &Job,
    r0: usize,
    j0: usize,
    d: &[[f32; LANES]],
    out: &mut ArrayViewMut2<Complex64>,
) {
    for r in 0..R {
        let (f, imag_e) = ((r0 + r) / 2, (r0 + r) % 2 == 1);
        for j in 0..MB {
            let s: f64 = d[r * MB + j].iter().map(|&v| v as f64).sum();
            let jj = j0 + j;
            let o = &mut out[(f, jj / if job.real { 1 } else { 2 } - job.m0)];
            if job.real {
                if imag_e {
                    o.im += s;
                } else {
                    o.re += s;
                }
            } else {
                // c = (Er + i Ei)(Br + i Bi): re = Er Br - Ei Bi, im = Er Bi + Ei Br
                match (imag_e, jj % 2 == 1) {
                    (false, false) => o.re += s,
                    (true, true) => o.re -= s,
                    _ => o.im += s,
                }
            }
        }
    }
}

/// Sums of products over one block of `kc` pixels: R field rows x MB basis rows.
#[inline(always)]
fn tile<const R: usize, const MB: usize, const FMA: bool>(
    a: [&[f32]; R],
    b: [&[f32]; MB],
    kc: usize,
    acc: &mut [[f32; LANES]],
) {
    let mut t = [[[0f32; LANES]; MB]; R];
    let mut k = 0;
    while k < kc {
        let mut bv = [[0f32; LANES]; MB];
        for j in 0..MB {
            bv[j].copy_from_slice(&b[j][k..k + LANES]);
        }
        for r in 0..R {
            let mut av = [0f32; LANES];
            av.copy_from_slice(&a[r][k..k + LANES]);
            for j in 0..MB {
                for l in 0..LANES {
                    t[r][j][l] = if FMA {
                        av[l].mul_add(bv[j][l], t[r][j][l])
                    } else {
                        av[l] * bv[j][l] + t[r][j][l]
                    };
                }
            }
        }
        k += LANES;
    }
    for r in 0..R {
        for j in 0..MB {
            acc[r * MB + j] = t[r][j];
        }
    }
}

#[inline(always)]
fn run_generic<const FMA: bool>(job: &Job, out: &mut ArrayViewMut2<Complex64>) {
    const R: usize = 4;
    let mut acc = [[0f32; LANES]; 12];
    for (blk, k0) in (0..job.k_pad).step_by(BLOCK_PX).enumerate() {
        let kc = BLOCK_PX.min(job.k_pad - k0);
        let bbase = blk * BLOCK_PX * job.nb;
        let brow = |j: usize| &job.basis[bbase + j * kc..][..kc];
        let arow = |r: usize| {
            &job.packed[(r / 2) * job.stride + 2 * blk * BLOCK_PX + (r % 2) * kc..][..kc]
        };
        let mut r0 = 0;
        while r0 < job.rows {
            // rows come in (re, im) pairs: blocks of 4 rows, then one of 2
            let two = job.rows - r0 < R;
            let mut j = job.cols.start;
            while j < job.cols.end {
                let left = job.cols.end - j;
                macro_rules! go {
                    ($r:literal, $mb:literal) => {{
                        let a: [&[f32]; $r] = std::array::from_fn(|i| arow(r0 + i));
                        let b: [&[f32]; $mb] = std::array::from_fn(|i| brow(j + i));
                        tile::<$r, $mb, FMA>(a, b, kc, &mut acc);
                        store::<$r, $mb>(job, r0, j, &acc, out);
                        j += $mb;
                    }};
                }
                match (two, left) {
                    (false, 3..) => go!(4, 3),
                    (false, 2) => go!(4, 2),
                    (false, _) => go!(4, 1),
                    (true, 3..) => go!(2, 3),
                    (true, 2) => go!(2, 2),
                    (true, _) => go!(2, 1),
                }
            }
            r0 += if two { 2 } else { R };
        }
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn run_avx2_fma(job: &Job, out: &mut ArrayViewMut2<Complex64>) {
    run_generic::<true>(job, out)
}

fn run(job: &Job, out: &mut ArrayViewMut2<Complex64>) {
    #[cfg(target_arch = "x86_64")]
    {
        if std::is_x86_feature_detected!("avx2") && std::is_x86_feature_detected!("fma") {
            // SAFETY: the CPU supports the features the function is compiled for.
            unsafe { run_avx2_fma(job, out) };
            return;
        }
    }
    run_generic::<false>(job, out)
}

/// Power of a field on a grid, `sum |E|^2 dA`.
pub fn field_power(field: &[Complex64], grid: &Grid) -> f64 {
    field.iter().map(|z| z.norm_sqr()).sum::<f64>() * grid.pixel_area_um2()
}

/// Captured power `sum |c|^2 / field_power` (0 for a zero field).
pub fn captured_power(coefficients: &[Complex64], field_power: f64) -> f64 {
    if field_power > 0.0 {
        coefficients.iter().map(|c| c.norm_sqr()).sum::<f64>() / field_power
    } else {
        0.0
    }
}
