//! Overlap integrals of decoded fields with a mode basis sampled on the same grid.
//!
//! Contract (docs/conventions.md "Modes"): `c_k = sum conj(psi_k) E dA` over the decoded grid
//! (dA = pitch_um^2), computed for a batch of frames as one matrix product
//! `C (batch x modes) = F (batch x pixels) . conj(Psi)^T (pixels x modes) * dA`; the captured
//! power of a field is `sum_k |c_k|^2 / sum |E|^2 dA` (1 for a field inside the span of an
//! orthonormal basis, by Parseval's identity for orthonormal expansions).
//!
//! How the product is evaluated (results agree with the f64 sums to
//! [`PROJECTION_RELATIVE_ERROR`]):
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
pub const DROPPED_POWER: f64 = 1e-12;
/// Bound on `|c - c_exact| / (||psi|| ||E|| dA)`: the f32 evaluation (inputs rounded to
/// f32, 2^-24 relative each, then BLOCK_PX / LANES = 64 lane additions and 3 more in the
/// sum of the lanes per partial sum, each adding at most 2^-24 relative to the running
/// sum: Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed., eq. 3.5 with
/// gamma_n = n u; about 70 * 2^-24 = 4.2e-6; the f64 sum of the partial sums adds
/// nothing at this level for grids below ~1e9 pixels) plus the dropped pixels
/// (sqrt(DROPPED_POWER) = 1e-6), rounded up.
pub const PROJECTION_RELATIVE_ERROR: f64 = 1e-5;

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
        let job = self.job(packed, frames, modes);
        run(&job, &mut out);
    }

    /// The product for `frames` packed fields and `modes`.
    fn job<'a>(&'a self, packed: &'a [f32], frames: usize, modes: Range<usize>) -> Job<'a> {
        let (cols, nb) = if self.real {
            (modes, self.n_modes)
        } else {
            (2 * modes.start..2 * modes.end, 2 * self.n_modes)
        };
        Job {
            packed,
            stride: self.stride,
            basis: &self.packed,
            nb,
            k_pad: self.k_pad,
            rows: 2 * frames,
            cols,
            real: self.real,
        }
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
}

/// Sums of products over each block, added in f64 to `dots[(r, j - cols.start)]` (field
/// row r, basis row j); then combined into the coefficients.
fn run(job: &Job, out: &mut ArrayViewMut2<Complex64>) {
    let nc = job.cols.len();
    let mut dots = vec![0f64; job.rows * nc];
    #[cfg(target_arch = "x86_64")]
    {
        if std::is_x86_feature_detected!("avx2") && std::is_x86_feature_detected!("fma") {
            // SAFETY: the CPU has the features the function is compiled for.
            unsafe { avx2::blocks(job, &mut dots) };
            combine(job, &dots, out);
            return;
        }
    }
    blocks_portable(job, &mut dots);
    combine(job, &dots, out);
}

/// Coefficients from the row-by-basis-row sums.
fn combine(job: &Job, dots: &[f64], out: &mut ArrayViewMut2<Complex64>) {
    let nc = job.cols.len();
    for ((f, m), o) in out.indexed_iter_mut() {
        let (re, im) = (&dots[2 * f * nc..][..nc], &dots[(2 * f + 1) * nc..][..nc]);
        *o = if job.real {
            Complex64::new(re[m], im[m])
        } else {
            // c = (Er + i Ei)(Br + i Bi): re = Er Br - Ei Bi, im = Er Bi + Ei Br
            let (r, i) = (2 * m, 2 * m + 1);
            Complex64::new(re[r] - im[i], re[i] + im[r])
        };
    }
}

/// The visiting order of (row block, basis-row block) tiles within one pixel block: rows in
/// blocks of 4 (two fields; a last block of 2) inside basis rows in blocks of 3 (last of 1
/// or 2), so each basis value is read from memory once per call.
fn tiles(rows: usize, cols: Range<usize>, mut f: impl FnMut(usize, usize, usize, usize)) {
    let mut j = cols.start;
    while j < cols.end {
        let nj = (cols.end - j).min(3);
        let mut r0 = 0;
        while r0 < rows {
            let nr = if rows - r0 >= 4 { 4 } else { 2 };
            f(r0, nr, j, nj);
            r0 += nr;
        }
        j += nj;
    }
}

/// Sum of 8 f32 lanes in a fixed tree order: (l, l + 4), then (l, l + 2), then (0, 1).
#[inline(always)]
fn hsum(v: [f32; LANES]) -> f32 {
    let a = [v[0] + v[4], v[1] + v[5], v[2] + v[6], v[3] + v[7]];
    let b = [a[0] + a[2], a[1] + a[3]];
    b[0] + b[1]
}

/// Portable version of the block loop (no FMA).
fn blocks_portable(job: &Job, dots: &mut [f64]) {
    let nc = job.cols.len();
    for (blk, k0) in (0..job.k_pad).step_by(BLOCK_PX).enumerate() {
        let kc = BLOCK_PX.min(job.k_pad - k0);
        tiles(job.rows, job.cols.clone(), |r0, nr, j0, nj| {
            for r in r0..r0 + nr {
                let a = job.field_row(blk, kc, r);
                for j in j0..j0 + nj {
                    let b = job.basis_row(blk, kc, j);
                    let mut t = [0f32; LANES];
                    for (ac, bc) in a.chunks_exact(LANES).zip(b.chunks_exact(LANES)) {
                        for l in 0..LANES {
                            t[l] += ac[l] * bc[l];
                        }
                    }
                    dots[r * nc + j - job.cols.start] += hsum(t) as f64;
                }
            }
        });
    }
}

impl Job<'_> {
    /// Field row `r` (2f: Re E_f, 2f + 1: Im E_f) in pixel block `blk` of width `kc`.
    #[inline(always)]
    fn field_row(&self, blk: usize, kc: usize, r: usize) -> &[f32] {
        &self.packed[(r / 2) * self.stride + 2 * blk * BLOCK_PX + (r % 2) * kc..][..kc]
    }

    /// Basis row `j` in pixel block `blk` of width `kc`.
    #[inline(always)]
    fn basis_row(&self, blk: usize, kc: usize, j: usize) -> &[f32] {
        &self.basis[blk * BLOCK_PX * self.nb + j * kc..][..kc]
    }
}

#[cfg(target_arch = "x86_64")]
mod avx2 {
    //! The block loop with AVX2 + FMA: a tile of up to 4 field rows x 3 basis rows keeps its
    //! 12 sums in registers over a pixel block.
    use super::{hsum, tiles, Job, BLOCK_PX, LANES};
    use std::arch::x86_64::*;

    #[target_feature(enable = "avx2,fma")]
    pub(super) unsafe fn blocks(job: &Job, dots: &mut [f64]) {
        let nc = job.cols.len();
        for (blk, k0) in (0..job.k_pad).step_by(BLOCK_PX).enumerate() {
            let kc = BLOCK_PX.min(job.k_pad - k0);
            tiles(job.rows, job.cols.clone(), |r0, nr, j0, nj| {
                let a: [&[f32]; 4] =
                    std::array::from_fn(|i| job.field_row(blk, kc, r0 + i.min(nr - 1)));
                let b: [&[f32]; 3] =
                    std::array::from_fn(|i| job.basis_row(blk, kc, j0 + i.min(nj - 1)));
                let mut t = [[0f32; LANES]; 12];
                // Fetch from memory what comes next: with the first rows, the next three
                // basis rows (or those of the next pixel block); with the last basis rows,
                // these field rows of the next pixel block.
                let mut pf = [std::ptr::null::<f32>(); 8];
                let mut npf = 0;
                let next = j0 + nj;
                let more = k0 + kc < job.k_pad;
                let next_kc = BLOCK_PX.min(job.k_pad.saturating_sub(k0 + kc));
                if r0 == 0 {
                    let (nb, nk, rows) = if next < job.cols.end {
                        (blk, kc, next..(next + 3).min(job.cols.end))
                    } else if more {
                        (
                            blk + 1,
                            next_kc,
                            job.cols.start..(job.cols.start + 3).min(job.cols.end),
                        )
                    } else {
                        (blk, kc, 0..0)
                    };
                    for j in rows {
                        pf[npf] = job.basis_row(nb, nk, j).as_ptr();
                        npf += 1;
                    }
                }
                if next >= job.cols.end && more {
                    for r in r0..r0 + nr {
                        pf[npf] = job.field_row(blk + 1, next_kc, r).as_ptr();
                        npf += 1;
                    }
                }
                // SAFETY: avx2 and fma are enabled for this function's caller.
                unsafe {
                    match (nr, nj) {
                        (4, 3) => tile::<4, 3>(&a, &b, kc, &mut t, &pf[..npf]),
                        (4, 2) => tile::<4, 2>(&a, &b, kc, &mut t, &pf[..npf]),
                        (4, _) => tile::<4, 1>(&a, &b, kc, &mut t, &pf[..npf]),
                        (_, 3) => tile::<2, 3>(&a, &b, kc, &mut t, &pf[..npf]),
                        (_, 2) => tile::<2, 2>(&a, &b, kc, &mut t, &pf[..npf]),
                        _ => tile::<2, 1>(&a, &b, kc, &mut t, &pf[..npf]),
                    }
                }
                for r in 0..nr {
                    for j in 0..nj {
                        dots[(r0 + r) * nc + j0 + j - job.cols.start] += hsum(t[r * 3 + j]) as f64;
                    }
                }
            });
        }
    }

    /// `t[r * 3 + j]` = lane sums of a[r] * b[j] over `kc` pixels (kc a multiple of 8);
    /// meanwhile asks for the cache lines of the rows starting at `pf` (prefetches never
    /// fault, so the addresses are formed with wrapping arithmetic).
    #[inline]
    #[target_feature(enable = "avx2,fma")]
    unsafe fn tile<const R: usize, const MB: usize>(
        a: &[&[f32]; 4],
        b: &[&[f32]; 3],
        kc: usize,
        t: &mut [[f32; LANES]; 12],
        pf: &[*const f32],
    ) {
        let mut acc = [[_mm256_setzero_ps(); MB]; R];
        let ap: [*const f32; R] = std::array::from_fn(|r| a[r].as_ptr());
        let bp: [*const f32; MB] = std::array::from_fn(|j| b[j].as_ptr());
        let mut k = 0;
        while k < kc {
            if k % 16 == 0 {
                for &p in pf {
                    _mm_prefetch::<_MM_HINT_T0>(p.wrapping_add(k) as *const i8);
                }
            }
            // SAFETY: every row holds kc values and k + 8 <= kc.
            let bv: [__m256; MB] =
                std::array::from_fn(|j| unsafe { _mm256_loadu_ps(bp[j].add(k)) });
            for r in 0..R {
                let av = unsafe { _mm256_loadu_ps(ap[r].add(k)) };
                for j in 0..MB {
                    acc[r][j] = _mm256_fmadd_ps(av, bv[j], acc[r][j]);
                }
            }
            k += LANES;
        }
        for r in 0..R {
            for j in 0..MB {
                // SAFETY: t holds 8 f32 per entry.
                unsafe { _mm256_storeu_ps(t[r * 3 + j].as_mut_ptr(), acc[r][j]) };
            }
        }
    }
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

#[cfg(test)]
mod tests {
    use super::*;

    /// The portable and the AVX2 block loops both give the f64 sums of products of the packed
    /// rows to PROJECTION_RELATIVE_ERROR of the rows' norms (error bound: Higham, Accuracy
    /// and Stability of Numerical Algorithms, 2nd ed., eq. 3.5); more pixels than one block
    /// and a frame count that leaves a row block of 2.
    #[test]
    fn block_loops_match_f64_sums() {
        let (nx, ny, modes, frames) = (40, 30, 5, 3);
        let g = Grid::centred(nx, ny, 0.5);
        let basis = Array3::from_shape_fn((modes, ny, nx), |(k, y, x)| {
            let t = (k * 1301 + y * 41 + x) as f64;
            Complex64::new((0.7 * t).sin(), (0.3 * t).cos())
        });
        let pr = Projector::new(basis.view(), &g).unwrap();
        assert!(pr.k_pad > BLOCK_PX && !pr.real);
        let fields: Vec<Vec<Complex64>> = (0..frames)
            .map(|f| {
                (0..nx * ny)
                    .map(|i| Complex64::new((0.11 * (i + 7 * f) as f64).cos(), 0.5))
                    .collect()
            })
            .collect();
        let mut packed = vec![0f32; frames * pr.packed_len()];
        for (f, d) in fields.iter().zip(packed.chunks_exact_mut(pr.packed_len())) {
            pr.pack_field(f, d);
        }
        let job = pr.job(&packed, frames, 0..modes);
        let nc = job.cols.len();
        let mut want = vec![0f64; job.rows * nc];
        let (mut a2, mut b2) = (vec![0f64; job.rows], vec![0f64; nc]);
        let da = g.pixel_area_um2();
        for (f, field) in fields.iter().enumerate() {
            for k in 0..modes {
                for (p, e) in field.iter().enumerate() {
                    let b = basis[[k, p / nx, p % nx]].conj() * da;
                    for (r, ev) in [(2 * f, e.re), (2 * f + 1, e.im)] {
                        for (j, bv) in [(2 * k, b.re), (2 * k + 1, b.im)] {
                            want[r * nc + j] += ev * bv;
                            if k == 0 {
                                a2[r] += ev * ev;
                            }
                            if f == 0 {
                                b2[j] += bv * bv;
                            }
                        }
                    }
                }
            }
        }
        let mut runs = Vec::new();
        let mut d = vec![0f64; job.rows * nc];
        blocks_portable(&job, &mut d);
        runs.push(d);
        #[cfg(target_arch = "x86_64")]
        if std::is_x86_feature_detected!("avx2") && std::is_x86_feature_detected!("fma") {
            let mut d = vec![0f64; job.rows * nc];
            // SAFETY: the features were detected.
            unsafe { avx2::blocks(&job, &mut d) };
            runs.push(d);
        }
        for d in &runs {
            for i in 0..d.len() {
                let tol = PROJECTION_RELATIVE_ERROR * (a2[i / nc] * b2[i % nc]).sqrt();
                assert!(
                    (d[i] - want[i]).abs() <= tol,
                    "{i}: {} vs {}",
                    d[i],
                    want[i]
                );
            }
        }
    }
}
