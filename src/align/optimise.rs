//! Derivative-free minimisers used by the alignment fit: Nelder-Mead simplex, golden-section
//! line search and a coarse grid scan.
//!
//! Contract: every routine *minimises* `f`, is deterministic (no randomness, fixed order of
//! evaluation), evaluates `f` only at finite points inside the given bounds (points are
//! clamped to the box), and reports how many evaluations it used and whether its stopping
//! test was met. Parameters are in "scaled" units chosen by the caller so that a step of 1
//! in every coordinate means roughly the same change of the objective.
//!
//! Nelder-Mead: Nelder & Mead 1965, Computer Journal 7, 308, with the standard coefficients
//! (reflection 1, expansion 2, contraction 1/2, shrink 1/2) and the ordering/tie rules of
//! Lagarias, Reeds, Wright & Wright 1998, SIAM J. Optim. 9, 112. Golden section: Kiefer
//! 1953, Proc. AMS 4, 502.

/// Stopping rules and limits of [`nelder_mead`].
#[derive(Debug, Clone, Copy)]
pub struct NmOptions {
    /// Stop when the simplex's function values differ by at most this (absolute) ...
    pub ftol: f64,
    /// ... and its vertices lie within this distance (max-norm, scaled units) of the best.
    pub xtol: f64,
    /// Give up (not converged) after this many evaluations.
    pub max_evals: usize,
    /// Restart from the optimum with a fresh simplex this many times (guards against a
    /// collapsed simplex; Lagarias et al. 1998 discuss the failure mode).
    pub restarts: usize,
}

impl Default for NmOptions {
    fn default() -> Self {
        NmOptions {
            ftol: 1e-10,
            xtol: 1e-4,
            max_evals: 4000,
            restarts: 1,
        }
    }
}

/// Result of a minimisation.
#[derive(Debug, Clone)]
pub struct Minimum {
    pub x: Vec<f64>,
    pub f: f64,
    /// Objective evaluations used.
    pub evals: usize,
    /// True when the stopping test was met before the evaluation limit.
    pub converged: bool,
}

/// Box bounds in scaled units; `None` means unbounded.
#[derive(Debug, Clone)]
pub struct Bounds {
    pub lo: Vec<f64>,
    pub hi: Vec<f64>,
}

impl Bounds {
    /// No bounds in `n` dimensions.
    pub fn none(n: usize) -> Bounds {
        Bounds {
            lo: vec![f64::NEG_INFINITY; n],
            hi: vec![f64::INFINITY; n],
        }
    }

    fn clamp(&self, x: &mut [f64]) {
        for (i, v) in x.iter_mut().enumerate() {
            *v = v.clamp(self.lo[i], self.hi[i]);
        }
    }
}

/// Minimise `f` from `x0` with an initial simplex of axis steps `step` (scaled units).
/// Non-finite objective values are treated as +infinity.
pub fn nelder_mead(
    mut f: impl FnMut(&[f64]) -> f64,
    x0: &[f64],
    step: &[f64],
    bounds: &Bounds,
    opt: &NmOptions,
) -> Minimum {
    let n = x0.len();
    assert_eq!(step.len(), n, "one step per parameter");
    let mut evals = 0usize;
    let mut eval = |x: &mut Vec<f64>, evals: &mut usize| -> f64 {
        bounds.clamp(x);
        *evals += 1;
        let v = f(x);
        if v.is_finite() {
            v
        } else {
            f64::INFINITY
        }
    };
    let mut best_x = x0.to_vec();
    let mut best_f = eval(&mut best_x, &mut evals);
    if n == 0 {
        return Minimum {
            x: best_x,
            f: best_f,
            evals,
            converged: true,
        };
    }
    let mut converged = false;
    for round in 0..=opt.restarts {
        // Fresh simplex around the best point; a step that the bounds clamp away is taken
        // in the other direction.
        let mut simplex: Vec<(Vec<f64>, f64)> = Vec::with_capacity(n + 1);
        simplex.push((best_x.clone(), best_f));
        for i in 0..n {
            let mut x = best_x.clone();
            x[i] += step[i];
            if x[i] > bounds.hi[i] {
                x[i] = best_x[i] - step[i];
            }
            let v = eval(&mut x, &mut evals);
            simplex.push((x, v));
        }
        converged = false;
        while evals < opt.max_evals {
            // Lagarias et al.: stable sort keeps the older vertex first on ties.
            simplex.sort_by(|a, b| a.1.total_cmp(&b.1));
            let f0 = simplex[0].1;
            let fspread = simplex[n].1 - f0;
            let xspread = simplex[1..]
                .iter()
                .flat_map(|(x, _)| x.iter().zip(&simplex[0].0).map(|(a, b)| (a - b).abs()))
                .fold(0.0, f64::max);
            if fspread <= opt.ftol && xspread <= opt.xtol {
                converged = true;
                break;
            }
            let mut centroid = vec![0.0; n];
            for (x, _) in &simplex[..n] {
                for (c, v) in centroid.iter_mut().zip(x) {
                    *c += v / n as f64;
                }
            }
            let worst = simplex[n].0.clone();
            let along = |t: f64| -> Vec<f64> {
                centroid
                    .iter()
                    .zip(&worst)
                    .map(|(c, w)| c + t * (c - w))
                    .collect()
            };
            let mut xr = along(1.0);
            let fr = eval(&mut xr, &mut evals);
            if fr < simplex[0].1 {
                let mut xe = along(2.0);
                let fe = eval(&mut xe, &mut evals);
                simplex[n] = if fe < fr { (xe, fe) } else { (xr, fr) };
                continue;
            }
            if fr < simplex[n - 1].1 {
                simplex[n] = (xr, fr);
                continue;
            }
            // Contraction: outside when the reflection beat the worst, else inside.
            let (mut xc, limit) = if fr < simplex[n].1 {
                (along(0.5), fr)
            } else {
                (along(-0.5), simplex[n].1)
            };
            let fc = eval(&mut xc, &mut evals);
            if fc <= limit {
                simplex[n] = (xc, fc);
                continue;
            }
            // Shrink towards the best vertex.
            let x0b = simplex[0].0.clone();
            for v in simplex.iter_mut().skip(1) {
                let mut x: Vec<f64> = x0b
                    .iter()
                    .zip(&v.0)
                    .map(|(b, a)| b + 0.5 * (a - b))
                    .collect();
                let fx = eval(&mut x, &mut evals);
                *v = (x, fx);
            }
        }
        simplex.sort_by(|a, b| a.1.total_cmp(&b.1));
        let improved = simplex[0].1 < best_f;
        if simplex[0].1 <= best_f {
            best_x = simplex[0].0.clone();
            best_f = simplex[0].1;
        }
        if !converged || evals >= opt.max_evals {
            break;
        }
        // A restart that found nothing better confirms the optimum.
        if round > 0 && !improved {
            break;
        }
    }
    Minimum {
        x: best_x,
        f: best_f,
        evals,
        converged,
    }
}

/// Minimise a function of one variable on `[a, b]` by golden-section search down to an
/// interval of width `tol`. Returns (x, f(x), evaluations). Assumes one minimum in the
/// interval; with several it returns one of them.
pub fn golden_section(
    mut f: impl FnMut(f64) -> f64,
    mut a: f64,
    mut b: f64,
    tol: f64,
) -> (f64, f64, usize) {
    let g = (5f64.sqrt() - 1.0) / 2.0;
    let mut c = b - g * (b - a);
    let mut d = a + g * (b - a);
    let mut fc = f(c);
    let mut fd = f(d);
    let mut evals = 2;
    while (b - a).abs() > tol && evals < 200 {
        if fc < fd {
            b = d;
            d = c;
            fd = fc;
            c = b - g * (b - a);
            fc = f(c);
        } else {
            a = c;
            c = d;
            fc = fd;
            d = a + g * (b - a);
            fd = f(d);
        }
        evals += 1;
    }
    if fc < fd {
        (c, fc, evals)
    } else {
        (d, fd, evals)
    }
}

/// Evaluate `f` at `n` equally spaced points of `[a, b]` (n >= 2) and return the best
/// (x, f(x)). Used as the coarse stage before a local search.
pub fn scan(mut f: impl FnMut(f64) -> f64, a: f64, b: f64, n: usize) -> (f64, f64) {
    let n = n.max(2);
    let mut best = (a, f64::INFINITY);
    for i in 0..n {
        let x = a + (b - a) * i as f64 / (n - 1) as f64;
        let v = f(x);
        if v < best.1 {
            best = (x, v);
        }
    }
    best
}

/// Central-difference gradient of `f` at `x` with steps `h` (2n evaluations).
pub fn gradient(mut f: impl FnMut(&[f64]) -> f64, x: &[f64], h: &[f64]) -> Vec<f64> {
    let mut p = x.to_vec();
    (0..x.len())
        .map(|i| {
            p[i] = x[i] + h[i];
            let fp = f(&p);
            p[i] = x[i] - h[i];
            let fm = f(&p);
            p[i] = x[i];
            (fp - fm) / (2.0 * h[i])
        })
        .collect()
}

/// Value, central-difference gradient and Hessian of `f` at `x` with steps `h`, from
/// `1 + 2n + n(n-1)/2` evaluations: the diagonal from `f(x +- h_i e_i)`, each off-diagonal
/// term from the one extra point `f(x + h_i e_i + h_j e_j)` (forward differences, error
/// O(h) against O(h^2) for the four-point formula; Press et al., Numerical Recipes, 3rd ed., sec. 5.7).
pub fn gradient_hessian(
    mut f: impl FnMut(&[f64]) -> f64,
    x: &[f64],
    h: &[f64],
) -> (f64, Vec<f64>, Vec<Vec<f64>>) {
    let n = x.len();
    let f0 = f(x);
    let mut g = vec![0.0; n];
    let mut hm = vec![vec![0.0; n]; n];
    let mut fp = vec![0.0; n];
    let mut p = x.to_vec();
    for i in 0..n {
        p[i] = x[i] + h[i];
        fp[i] = f(&p);
        p[i] = x[i] - h[i];
        let fm = f(&p);
        p[i] = x[i];
        g[i] = (fp[i] - fm) / (2.0 * h[i]);
        hm[i][i] = (fp[i] - 2.0 * f0 + fm) / (h[i] * h[i]);
    }
    for i in 0..n {
        for j in 0..i {
            p[i] = x[i] + h[i];
            p[j] = x[j] + h[j];
            let v = (f(&p) - fp[i] - fp[j] + f0) / (h[i] * h[j]);
            p[i] = x[i];
            p[j] = x[j];
            hm[i][j] = v;
            hm[j][i] = v;
        }
    }
    (f0, g, hm)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Rosenbrock 1960, Computer Journal 3, 175: minimum 0 at (1, 1).
    fn rosenbrock(x: &[f64]) -> f64 {
        100.0 * (x[1] - x[0] * x[0]).powi(2) + (1.0 - x[0]).powi(2)
    }

    #[test]
    fn nelder_mead_finds_rosenbrock_minimum() {
        let m = nelder_mead(
            rosenbrock,
            &[-1.2, 1.0],
            &[0.5, 0.5],
            &Bounds::none(2),
            &NmOptions {
                xtol: 1e-7,
                ftol: 1e-14,
                ..Default::default()
            },
        );
        assert!(m.converged);
        assert!(
            (m.x[0] - 1.0).abs() < 1e-4 && (m.x[1] - 1.0).abs() < 1e-4,
            "{m:?}"
        );
    }

    #[test]
    fn nelder_mead_quadratic_in_five_dimensions() {
        let c = [0.3, -2.0, 1.5, 0.0, 4.0];
        let f = |x: &[f64]| -> f64 {
            x.iter()
                .zip(&c)
                .enumerate()
                .map(|(i, (a, b))| (i as f64 + 1.0) * (a - b).powi(2))
                .sum()
        };
        let m = nelder_mead(
            f,
            &[0.0; 5],
            &[1.0; 5],
            &Bounds::none(5),
            &NmOptions::default(),
        );
        assert!(m.converged);
        for (a, b) in m.x.iter().zip(&c) {
            assert!((a - b).abs() < 1e-3, "{m:?}");
        }
    }

    #[test]
    fn nelder_mead_reports_non_convergence_at_the_limit() {
        let m = nelder_mead(
            rosenbrock,
            &[-1.2, 1.0],
            &[0.5, 0.5],
            &Bounds::none(2),
            &NmOptions {
                max_evals: 20,
                ..Default::default()
            },
        );
        assert!(!m.converged);
        assert!(m.evals <= 22);
    }

    #[test]
    fn bounds_are_respected() {
        let b = Bounds {
            lo: vec![-1.0, -1.0],
            hi: vec![0.5, 1.0],
        };
        let mut worst = f64::NEG_INFINITY;
        let m = nelder_mead(
            |x| {
                worst = worst.max(x[0]);
                (x[0] - 2.0).powi(2) + x[1] * x[1]
            },
            &[0.0, 0.5],
            &[0.3, 0.3],
            &b,
            &NmOptions::default(),
        );
        assert!(worst <= 0.5);
        assert!((m.x[0] - 0.5).abs() < 1e-3 && m.x[1].abs() < 1e-3, "{m:?}");
    }

    #[test]
    fn golden_section_finds_parabola_vertex() {
        let (x, _, n) = golden_section(|x| (x - 0.7).powi(2) + 1.0, -3.0, 5.0, 1e-8);
        assert!((x - 0.7).abs() < 1e-7);
        assert!(n < 60);
    }

    #[test]
    fn scan_picks_best_sample() {
        let (x, _) = scan(|x| (x - 0.26).abs(), 0.0, 1.0, 11);
        assert!((x - 0.3).abs() < 1e-12);
    }

    /// A quadratic form 1/2 x^T A x + b^T x has gradient A x + b and Hessian A exactly; the
    /// forward off-diagonal differences are exact for a quadratic too (Numerical Recipes,
    /// 3rd ed., sec. 5.7).
    #[test]
    fn gradient_and_hessian_of_quadratic_form() {
        let a = [[4.0, 1.0, -0.5], [1.0, 3.0, 0.25], [-0.5, 0.25, 2.0]];
        let b = [0.3, -1.0, 0.7];
        let f = |x: &[f64]| {
            let mut v = 0.0;
            for i in 0..3 {
                v += b[i] * x[i];
                for j in 0..3 {
                    v += 0.5 * a[i][j] * x[i] * x[j];
                }
            }
            v
        };
        let x = [0.2, -0.4, 1.1];
        let mut calls = 0;
        let (_, g, h) = gradient_hessian(
            |p| {
                calls += 1;
                f(p)
            },
            &x,
            &[1e-3; 3],
        );
        assert_eq!(calls, 1 + 6 + 3);
        for i in 0..3 {
            let gi: f64 = b[i] + (0..3).map(|j| a[i][j] * x[j]).sum::<f64>();
            assert!((g[i] - gi).abs() < 1e-7, "{g:?}");
            for j in 0..3 {
                assert!((h[i][j] - a[i][j]).abs() < 1e-5, "{h:?}");
            }
        }
    }
}
