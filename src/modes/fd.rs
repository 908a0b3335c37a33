//! Finite-difference solver of the scalar radial wave equation for any index profile.
//!
//! In rho = r / a the LP radial equation `(1/r)(r R')' - l^2/r^2 R + k^2 n^2 R = beta^2 R`
//! becomes `-(1/rho)(rho R')' + l^2/rho^2 R - V^2 f(rho) R = lambda R` with
//! `lambda = -V^2 b`, `f = (n^2 - n2^2)/(n1^2 - n2^2)`: guided modes have -V^2 < lambda < 0.
//!
//! Discretisation: a cell-centred grid rho_i = (i + 1/2) h, h = 1 / points_per_radius, in
//! flux form, so the flux through rho = 0 vanishes by itself (no special axis row; R ~ rho^l
//! comes out of the l^2/rho^2 term) and a step in f falls on a cell face. Scaling
//! S_i = sqrt(rho_i) R_i makes the matrix symmetric tridiagonal.
//!
//! Outer boundary at rho_max = solver_extent_radii: a ghost cell with R_N = q R_{N-1},
//! `q = K_l(w rho_N) / K_l(w rho_{N-1})`, w = sqrt(-lambda) = V sqrt(b), i.e. the field is
//! matched to the exact decaying cladding solution (its w -> 0 limit, (rho_{N-1}/rho_N)^l,
//! at cut-off). The matrix then depends on lambda through one entry, and
//! `count(lambda)` = number of eigenvalues of A(lambda) below lambda (a Sturm sequence)
//! is still monotone in lambda, so each eigenvalue is found by bisection on the count and
//! its vector by inverse iteration. Cut-off V-numbers: bisection in V on the count at
//! lambda = 0 (the w -> 0 boundary is exact at cut-off).
//!
//! The eigenvalue error is O(h^2); one Richardson step with the grid of spacing 2h
//! (`b = (4 b_h - b_2h)/3`) removes the leading term.
use super::bessel::k_ratio;

/// Settings of the radial solver.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FdSettings {
    pub points_per_radius: usize,
    pub extent_radii: f64,
    /// Richardson extrapolation of the eigenvalue with a half-resolution grid.
    pub richardson: bool,
}

impl Default for FdSettings {
    fn default() -> Self {
        FdSettings {
            points_per_radius: 400,
            extent_radii: 3.0,
            richardson: true,
        }
    }
}

/// A radial grid with the profile sampled at cell centres.
#[derive(Debug, Clone)]
pub struct RadialGrid {
    pub h: f64,
    pub rho: Vec<f64>,
    pub f: Vec<f64>,
    /// -(flux part) diagonal and off-diagonal of the symmetrised Laplacian.
    lap_diag: Vec<f64>,
    lap_off: Vec<f64>,
    /// rho_{N-1/2} / (h^2 rho_{N-1}): coefficient of the outer ghost coupling.
    edge_coupling: f64,
}

impl RadialGrid {
    /// Grid with `points_per_radius` cells per core radius out to `extent_radii`.
    pub fn new(f: impl Fn(f64) -> f64, points_per_radius: usize, extent_radii: f64) -> Self {
        let h = 1.0 / points_per_radius as f64;
        let n = (extent_radii * points_per_radius as f64).round().max(4.0) as usize;
        let rho: Vec<f64> = (0..n).map(|i| (i as f64 + 0.5) * h).collect();
        let fv = rho.iter().map(|&r| f(r)).collect();
        let h2 = h * h;
        let lap_diag = (0..n)
            .map(|i| {
                let rp = (i as f64 + 1.0) * h;
                let rm = i as f64 * h;
                let rp = if i + 1 < n { rp } else { 0.0 }; // outer face added with q
                (rp + rm) / (h2 * rho[i])
            })
            .collect();
        let lap_off = (0..n.saturating_sub(1))
            .map(|i| -((i as f64 + 1.0) * h) / (h2 * (rho[i] * rho[i + 1]).sqrt()))
            .collect();
        let edge_coupling = (n as f64 * h) / (h2 * rho[n - 1]);
        RadialGrid {
            h,
            rho,
            f: fv,
            lap_diag,
            lap_off,
            edge_coupling,
        }
    }

    pub fn len(&self) -> usize {
        self.rho.len()
    }

    pub fn is_empty(&self) -> bool {
        self.rho.is_empty()
    }

    /// Ghost ratio q = R_N / R_{N-1} for decay constant w (per core radius).
    fn ghost_q(&self, l: u32, w: f64) -> f64 {
        let n = self.len();
        let r1 = self.rho[n - 1];
        let r2 = r1 + self.h;
        if w * r2 <= 1e-9 {
            // w -> 0 limit: K_l(w r) ~ r^-l (l >= 1); K_0 ratio -> 1
            return (r1 / r2).powi(l as i32);
        }
        k_ratio(l, w * r1, w * r2)
    }

    /// Diagonal of A(lambda) (l, V fixed) written into `d`.
    fn diag(&self, l: u32, v: f64, lambda: f64, d: &mut Vec<f64>) {
        let n = self.len();
        d.clear();
        let l2 = (l * l) as f64;
        let v2 = v * v;
        d.extend(
            (0..n).map(|i| self.lap_diag[i] + l2 / (self.rho[i] * self.rho[i]) - v2 * self.f[i]),
        );
        let w = (-lambda).max(0.0).sqrt();
        d[n - 1] += self.edge_coupling * (1.0 - self.ghost_q(l, w));
    }

    /// Number of eigenvalues of A(lambda) below lambda.
    fn count(&self, l: u32, v: f64, lambda: f64, d: &mut Vec<f64>) -> usize {
        self.diag(l, v, lambda, d);
        let mut neg = 0;
        let mut p = 1.0f64;
        for i in 0..d.len() {
            let off2 = if i > 0 {
                self.lap_off[i - 1].powi(2)
            } else {
                0.0
            };
            let mut q = d[i] - lambda - if i > 0 { off2 / p } else { 0.0 };
            if q == 0.0 {
                q = -1e-300;
            }
            if q < 0.0 {
                neg += 1;
            }
            p = q;
        }
        neg
    }

    /// Number of guided modes of order l at V.
    pub fn guided_count(&self, l: u32, v: f64) -> usize {
        let mut d = Vec::with_capacity(self.len());
        self.count(l, v, 0.0, &mut d)
    }

    /// The j-th (0-based, most bound first) eigenvalue lambda in (-V^2, 0).
    fn eigenvalue(&self, l: u32, v: f64, j: usize, d: &mut Vec<f64>) -> f64 {
        let fmax = self.f.iter().cloned().fold(0.0f64, f64::max);
        let mut lo = -v * v * fmax.max(1e-300) - 1.0;
        let mut hi = 0.0;
        let tol = 1e-15 * v * v * fmax.max(1e-300);
        for _ in 0..200 {
            let mid = 0.5 * (lo + hi);
            if hi - lo <= tol || mid <= lo || mid >= hi {
                break;
            }
            if self.count(l, v, mid, d) > j {
                hi = mid;
            } else {
                lo = mid;
            }
        }
        0.5 * (lo + hi)
    }

    /// Eigenvector R_i (not normalised) of A(lambda) at eigenvalue lambda, by inverse
    /// iteration with a tridiagonal LU (partial pivoting).
    fn eigenvector(&self, l: u32, v: f64, lambda: f64) -> Vec<f64> {
        let n = self.len();
        let mut d = Vec::with_capacity(n);
        self.diag(l, v, lambda, &mut d);
        let shift = lambda + 1e-10 * (1.0 + lambda.abs());
        let mut x = vec![1.0; n];
        for _ in 0..3 {
            x = solve_tridiagonal(&d, &self.lap_off, shift, &x);
            let norm = x.iter().map(|a| a * a).sum::<f64>().sqrt();
            if !(norm.is_finite() && norm > 0.0) {
                break;
            }
            x.iter_mut().for_each(|a| *a /= norm);
        }
        // back from S = sqrt(rho) R
        x.iter().zip(&self.rho).map(|(s, r)| s / r.sqrt()).collect()
    }
}

/// Solve (T - shift I) x = rhs for symmetric tridiagonal T (diag d, off-diagonal e) by
/// Gaussian elimination with partial pivoting.
fn solve_tridiagonal(d: &[f64], e: &[f64], shift: f64, rhs: &[f64]) -> Vec<f64> {
    let n = d.len();
    // rows: (sub, diag, sup, sup2) after pivoting
    let mut a = vec![0.0; n]; // diag
    let mut b = vec![0.0; n]; // first super
    let mut c = vec![0.0; n]; // second super (fill-in)
    let mut r = rhs.to_vec();
    let mut cur_d = d[0] - shift;
    let mut cur_b = if n > 1 { e[0] } else { 0.0 };
    let mut cur_c = 0.0;
    for i in 0..n {
        if i + 1 == n {
            a[i] = if cur_d == 0.0 { 1e-300 } else { cur_d };
            b[i] = 0.0;
            c[i] = 0.0;
            break;
        }
        let sub = e[i]; // entry (i+1, i)
        let nd = d[i + 1] - shift;
        let nb = if i + 2 < n { e[i + 1] } else { 0.0 };
        if cur_d.abs() >= sub.abs() {
            let piv = if cur_d == 0.0 { 1e-300 } else { cur_d };
            let m = sub / piv;
            a[i] = piv;
            b[i] = cur_b;
            c[i] = cur_c;
            r[i + 1] -= m * r[i];
            cur_d = nd - m * cur_b;
            cur_b = nb - m * cur_c;
            cur_c = 0.0;
        } else {
            // swap rows i and i+1
            let m = cur_d / sub;
            a[i] = sub;
            b[i] = nd;
            c[i] = nb;
            r.swap(i, i + 1);
            r[i + 1] -= m * r[i];
            let new_d = cur_b - m * nd;
            let new_b = cur_c - m * nb;
            cur_d = new_d;
            cur_b = new_b;
            cur_c = 0.0;
        }
    }
    let mut x = vec![0.0; n];
    for i in (0..n).rev() {
        let mut s = r[i];
        if i + 1 < n {
            s -= b[i] * x[i + 1];
        }
        if i + 2 < n {
            s -= c[i] * x[i + 2];
        }
        x[i] = s / a[i];
    }
    x
}

/// One mode from the finite-difference solver.
#[derive(Debug, Clone)]
pub struct FdMode {
    pub l: u32,
    pub m: u32,
    /// b = -lambda / V^2 (Richardson-extrapolated when enabled).
    pub b: f64,
    /// b on the fine grid alone.
    pub b_fine: f64,
    /// Radial field at the grid's cell centres (unnormalised).
    pub field: Vec<f64>,
}

/// All guided modes of order l at V on `grid` (and, for Richardson, `coarse`).
pub fn solve_l(grid: &RadialGrid, coarse: Option<&RadialGrid>, v: f64, l: u32) -> Vec<FdMode> {
    let mut d = Vec::with_capacity(grid.len());
    let n = grid.count(l, v, 0.0, &mut d);
    let mut dc = Vec::new();
    let nc = coarse.map(|c| c.count(l, v, 0.0, &mut dc)).unwrap_or(0);
    (0..n)
        .map(|j| {
            let lam = grid.eigenvalue(l, v, j, &mut d);
            let b_fine = -lam / (v * v);
            let b = match coarse {
                Some(c) if j < nc => {
                    let bc = -c.eigenvalue(l, v, j, &mut dc) / (v * v);
                    let br = (4.0 * b_fine - bc) / 3.0;
                    if br > 0.0 && br < 1.0 {
                        br
                    } else {
                        b_fine
                    }
                }
                _ => b_fine,
            };
            FdMode {
                l,
                m: j as u32 + 1,
                b,
                b_fine,
                field: grid.eigenvector(l, v, lam),
            }
        })
        .collect()
}

/// The V-number at which mode (l, m) cuts off on this grid's profile: the smallest V at
/// which at least m modes of order l are guided, by bisection in V up to `v_max` (a V at
/// which the mode is known to be guided). None for LP01 (guided at every V > 0).
pub fn cutoff_v(grid: &RadialGrid, l: u32, m: u32, v_max: f64) -> Option<f64> {
    if l == 0 && m == 1 {
        return None;
    }
    let mut d = Vec::with_capacity(grid.len());
    if grid.count(l, v_max, 0.0, &mut d) < m as usize {
        return None;
    }
    let (mut lo, mut hi) = (0.0, v_max);
    while hi - lo > 1e-12 * v_max {
        let mid = 0.5 * (lo + hi);
        if grid.count(l, mid, 0.0, &mut d) >= m as usize {
            hi = mid;
        } else {
            lo = mid;
        }
    }
    Some(0.5 * (lo + hi))
}
