//! Fitting one channel's alignment to its decoded fields: maximise the captured power
//! [`Objective::captured`] over centre, rotation, scale, tilt and defocus.
//!
//! Contract: [`fit_channel`] takes fields (frames x ny x nx, carrier removed, no tilt or
//! defocus correction), a geometric basis sampler and a starting alignment, and returns a
//! [`ChannelFit`]. It never panics on bad data; a fit whose simplex search did not meet its
//! stopping test, or that ended on a bound, is reported with `converged = false` and
//! `fitted = start` (the caller decides what to do; the CLI exits 1).
//!
//! Strategy (robust first, then precise):
//! 0. The fields are resampled once onto the compact grid of [`super::compact`] (coarsest
//!    pitch and smallest extent that still hold every mode over the search), and reduced to
//!    their principal components there; the captured fraction keeps the decoding grid's
//!    frame powers as its denominator.
//! 1. Starting candidates: the given alignment; the centre from the intensity centroid of
//!    the summed frames; the tilt from the centroid of the summed spatial power spectrum
//!    (a tilt t shifts the spectrum by t / lambda, docs/conventions.md). The best is kept,
//!    then a coarse tilt scan in whole FFT bins over [`FitSpec::tilt_search_bins`] around it
//!    (a carrier a few bins off is that many bins of tilt).
//! 2. Coarse scans with golden-section refinement of defocus (the basis is sampled once, so
//!    these cost one inverse FFT per mode) and of scale.
//! 3. Nelder-Mead on all free parameters in scaled units (see [`optimise`]), stopped loosely.
//! 4. Newton steps on the residual power from its finite-difference gradient and Hessian,
//!    accepted only when they lower it; the same Hessian gives the uncertainty.
//! 5. A search that ends on a bound is widened once and repeated; rotation (unless forced)
//!    and scale are then tested against their nominal values (likelihood ratio and a
//!    minimum gain, [`SIGNIFICANCE_CHI2`], [`MIN_GAIN`]) and stages 3-4 rerun without the
//!    ones that do not earn their place; [`ChannelFit::decisions`] says which and why.
//!
//! Rotation is fitted only when the objective depends on it: a basis made of complete
//! degenerate sets (every LP group with both cos and sin, every HG/LG group whole) captures
//! the same power at every rotation, since rotation mixes modes within a group only.
//!
//! Uncertainty: with S(theta) = total power x (1 - eta) the residual power (counts), and the
//! residual treated as white noise of variance sigma^2 = S_min / (N - p) per real sample
//! (N = 2 x pixels x frames, p parameters), the least-squares covariance is
//! Cov = 2 sigma^2 H^-1, H the finite-difference Hessian of S (Press et al., Numerical
//! Recipes, 3rd ed., section 15.5). The reported figure is sqrt(diag Cov), one standard
//! deviation; it ignores model error (light outside the basis counts as noise).
use super::compact::{BasisExtent, Compact, Extent, FineFields};
use super::objective::Objective;
use super::optimise::{
    golden_section, gradient, gradient_hessian, nelder_mead, scan, Bounds, NmOptions,
};
use crate::grid::{Alignment, Grid};
use ndarray::{Array3, ArrayView3};
use num_complex::Complex64;
use serde::Serialize;

/// Part of the basis power the search grid may leave out (stages 1-2, see
/// [`super::compact`]): loose, for speed.
const SEARCH_TAIL: f64 = 1e-3;
/// Part of the basis power the fitting grid may leave out (stages 3-4).
const FIT_TAIL: f64 = 1e-5;

/// What to fit and how hard to try.
#[derive(Debug, Clone)]
pub struct FitSpec {
    pub center: bool,
    /// None: fit rotation only when the objective depends on it.
    pub rotation: Option<bool>,
    pub scale: bool,
    pub tilt: bool,
    pub defocus: bool,
    /// Principal components kept beyond the number of modes.
    pub rank_extra: usize,
    /// Half-width of the coarse defocus scan, micrometres; None: 4 lambda / NA^2.
    pub defocus_range_um: Option<f64>,
    /// Half-width of the coarse tilt scan around the best start, FFT bins of the decoding
    /// grid (a carrier this far off is still found).
    pub tilt_search_bins: f64,
    /// Keep rotation (when not forced) and scale at their nominal values unless fitting them
    /// gains significantly (see [`SIGNIFICANCE_CHI2`], [`MIN_GAIN`]).
    pub significance: bool,
    pub nm: NmOptions,
}

impl Default for FitSpec {
    fn default() -> Self {
        FitSpec {
            center: true,
            rotation: None,
            scale: true,
            tilt: true,
            defocus: true,
            rank_extra: 10,
            defocus_range_um: None,
            tilt_search_bins: 3.5,
            significance: true,
            nm: NmOptions {
                ftol: 1e-6,
                xtol: 0.05,
                max_evals: 1500,
                restarts: 0,
            },
        }
    }
}

/// Likelihood-ratio threshold for keeping an optional parameter: the 0.999 quantile of the
/// chi-square distribution with one degree of freedom (Abramowitz & Stegun, Handbook of
/// Mathematical Functions, table 26.8: 10.828).
pub const SIGNIFICANCE_CHI2: f64 = 10.828;
/// Smallest gain in captured fraction for which an optional parameter is kept: with
/// millions of pixels any model mismatch is "significant", so the gain must also matter
/// (a 1e-4 change of captured power moves insertion loss by 4e-4 dB).
pub const MIN_GAIN: f64 = 1e-4;

/// Whether a parameter was fitted, and why.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Decision {
    pub parameter: &'static str,
    pub fitted: bool,
    pub reason: String,
    /// Likelihood-ratio statistic of fitting it against keeping it nominal (rotation, scale).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub statistic: Option<f64>,
    /// Captured fraction it gains (quadratic model at the fit).
    #[serde(skip_serializing_if = "Option::is_none")]
    pub gain: Option<f64>,
}

impl Decision {
    fn new(parameter: &'static str, fitted: bool, reason: String) -> Decision {
        Decision {
            parameter,
            fitted,
            reason,
            statistic: None,
            gain: None,
        }
    }
}

/// Physical context of a channel.
#[derive(Debug, Clone, Copy)]
pub struct FitContext {
    pub wavelength_nm: f64,
    pub core_radius_um: f64,
    pub na: f64,
}

impl FitContext {
    /// Depth of focus lambda / NA^2, micrometres (Born & Wolf, Principles of Optics, 7th ed.,
    /// section 8.8, order of magnitude of the axial extent of focus).
    pub fn depth_of_focus_um(&self) -> f64 {
        self.wavelength_nm * 1e-3 / (self.na * self.na)
    }
}

/// One-sigma uncertainties of the fitted values (None: not fitted or not determined).
#[derive(Debug, Clone, Default, Serialize)]
pub struct Uncertainty {
    pub center_um: Option<[f64; 2]>,
    pub rotation_deg: Option<f64>,
    pub scale: Option<f64>,
    pub tilt_mrad: Option<[f64; 2]>,
    pub defocus_um: Option<f64>,
}

/// Result of fitting one channel.
#[derive(Debug, Clone)]
pub struct ChannelFit {
    pub start: Alignment,
    /// The fitted alignment (= start when not converged).
    pub fitted: Alignment,
    /// Where the search ended (also when it did not converge).
    pub attempted: Alignment,
    /// Captured fraction at the start and at the fit (exact, on every given frame).
    pub captured_before: f64,
    pub captured_after: f64,
    pub uncertainty: Uncertainty,
    /// Objective evaluations used.
    pub iterations: usize,
    pub converged: bool,
    pub rotation_fitted: bool,
    /// Why the fit did not converge, empty when it did.
    pub message: String,
    /// Part of the fields' power in the kept principal components.
    pub retained_fraction: f64,
    /// Per parameter group: fitted or held, and why.
    pub decisions: Vec<Decision>,
}

#[derive(Debug, Clone, Copy, PartialEq)]
enum P {
    Cx,
    Cy,
    Rot,
    Scale,
    Tx,
    Ty,
    Dz,
}

fn get(a: &Alignment, p: P) -> f64 {
    match p {
        P::Cx => a.center_um[0],
        P::Cy => a.center_um[1],
        P::Rot => a.rotation_deg,
        P::Scale => a.scale,
        P::Tx => a.tilt_mrad[0],
        P::Ty => a.tilt_mrad[1],
        P::Dz => a.defocus_um,
    }
}

fn set(a: &mut Alignment, p: P, v: f64) {
    match p {
        P::Cx => a.center_um[0] = v,
        P::Cy => a.center_um[1] = v,
        P::Rot => a.rotation_deg = v,
        P::Scale => a.scale = v,
        P::Tx => a.tilt_mrad[0] = v,
        P::Ty => a.tilt_mrad[1] = v,
        P::Dz => a.defocus_um = v,
    }
}

/// Intensity centroid (x, y) in um of `power` (row-major on grid), over pixels above
/// `frac` of the peak (suppresses the bias of a noise floor towards the grid centre).
pub fn centroid_um(power: &[f64], grid: &Grid, frac: f64) -> Option<[f64; 2]> {
    let peak = power.iter().cloned().fold(0.0, f64::max);
    if peak.is_nan() || peak <= 0.0 {
        return None;
    }
    let (mut s, mut sx, mut sy) = (0.0, 0.0, 0.0);
    for (i, &p) in power.iter().enumerate() {
        if p > frac * peak {
            s += p;
            sx += p * grid.x_um(i % grid.nx);
            sy += p * grid.y_um(i / grid.nx);
        }
    }
    (s > 0.0).then(|| [sx / s, sy / s])
}

/// Fit the alignment of one channel. `progress` is called with the evaluations used so far.
pub fn fit_channel<S>(
    fields: ArrayView3<Complex64>,
    grid: &Grid,
    ctx: &FitContext,
    start: &Alignment,
    sampler: S,
    spec: &FitSpec,
    progress: &(dyn Fn(usize) + Sync),
) -> ChannelFit
where
    S: Fn(&Grid, &Alignment) -> Array3<Complex64> + Sync,
{
    let fields = fields.as_standard_layout();
    let wl_um = ctx.wavelength_nm * 1e-3;
    let dof = ctx.depth_of_focus_um();
    let a_um = ctx.core_radius_um;
    let defocus_range = spec.defocus_range_um.unwrap_or(4.0 * dof);
    let fine = FineFields::new(fields.view(), grid);
    let (bext, rank) = {
        let b = sampler(grid, &super::objective::geometry(start));
        (
            BasisExtent::new(b.view(), grid, start.center_um),
            b.dim().0 + spec.rank_extra,
        )
    };
    // Fields on a compact grid, reduced to principal components; the denominator stays the
    // decoding grid's power.
    let build = |ext: &Extent| {
        let c = Compact::new(&fine, &bext, ext);
        let r = c.reduce(ctx.wavelength_nm, rank);
        (c, r)
    };
    let used = std::sync::atomic::AtomicUsize::new(0);
    let count = || progress(used.fetch_add(1, std::sync::atomic::Ordering::Relaxed) + 1);

    // Scaled units: one unit changes the objective by a comparable amount.
    let unit = |p: P| match p {
        P::Cx | P::Cy => 0.05 * a_um,
        P::Rot => 2.0,
        P::Scale => 0.02,
        P::Tx | P::Ty => 1e3 * wl_um / (2.0 * std::f64::consts::PI * a_um),
        P::Dz => 0.2 * dof,
    };

    // One FFT bin of the decoding grid as a tilt, mrad, per axis.
    let bin_mrad = [
        1e3 * wl_um / (grid.nx as f64 * grid.pitch_um),
        1e3 * wl_um / (grid.ny as f64 * grid.pitch_um),
    ];
    let bin_cycles_per_um = (1.0 / (grid.nx.min(grid.ny) as f64 * grid.pitch_um)).max(0.0);
    let tilt_margin = if spec.tilt {
        (spec.tilt_search_bins.max(0.0) + 0.5) * bin_cycles_per_um
    } else {
        0.0
    };

    // Stages 1 and 2 on a loose grid that holds the start and the whole defocus scan.
    let mut best = *start;
    let rotation_fitted;
    {
        let (_, red) = build(&Extent {
            wavelength_nm: ctx.wavelength_nm,
            center_um: None,
            around: vec![*start],
            center_margin_um: 0.3 * a_um,
            defocus_margin_um: defocus_range,
            tail: SEARCH_TAIL,
            tilt_margin_cycles_per_um: tilt_margin,
        });
        let obj = Objective::new(&red, &sampler);
        let eta = |a: &Alignment| {
            count();
            obj.captured(a)
        };
        // 1. Starting candidates.
        let mut best_eta = eta(&best);
        let c0 = if spec.center { fine.centroid_um } else { None };
        let t0 = if spec.tilt {
            fine.tilt_start_mrad(ctx.wavelength_nm)
        } else {
            None
        };
        let mut cands = Vec::new();
        if let Some(c) = c0 {
            cands.push(Alignment {
                center_um: c,
                ..*start
            });
        }
        if let Some(t) = t0 {
            cands.push(Alignment {
                tilt_mrad: t,
                ..*start
            });
            if let Some(c) = c0 {
                cands.push(Alignment {
                    center_um: c,
                    tilt_mrad: t,
                    ..*start
                });
            }
        }
        for c in cands {
            let v = eta(&c);
            if v > best_eta {
                best = c;
                best_eta = v;
            }
        }
        // Coarse tilt scan: a carrier k bins off is a tilt of k bins; whole-bin steps over
        // the search half-width (the captured power of a pattern smaller than the grid
        // varies over more than a bin of tilt), the simplex finishes.
        if spec.tilt {
            let k = spec.tilt_search_bins.max(0.0).floor() as i32;
            let base = best;
            for i in -k..=k {
                for j in -k..=k {
                    if i == 0 && j == 0 {
                        continue;
                    }
                    let a = Alignment {
                        tilt_mrad: [
                            base.tilt_mrad[0] + i as f64 * bin_mrad[0],
                            base.tilt_mrad[1] + j as f64 * bin_mrad[1],
                        ],
                        ..base
                    };
                    let v = eta(&a);
                    if v > best_eta {
                        best = a;
                        best_eta = v;
                    }
                }
            }
        }

        // 2. Coarse scans with refinement.
        if spec.defocus {
            let d = defocus_range;
            let base = best;
            let f = |z: f64| {
                -eta(&Alignment {
                    defocus_um: z,
                    ..base
                })
            };
            let n = 17;
            let (z, _) = scan(f, base.defocus_um - d, base.defocus_um + d, n);
            let h = 2.0 * d / (n - 1) as f64;
            let (z, v, _) = golden_section(f, z - h, z + h, 0.1 * unit(P::Dz));
            if -v > best_eta {
                best.defocus_um = z;
                best_eta = -v;
            }
        }
        if spec.scale {
            let base = best;
            let f = |s: f64| -eta(&Alignment { scale: s, ..base });
            let (s, _) = scan(f, base.scale * 0.85, base.scale * 1.15, 7);
            let (s, v, _) = golden_section(f, s - 0.05 * base.scale, s + 0.05 * base.scale, 5e-3);
            if -v > best_eta {
                best.scale = s;
                best_eta = -v;
            }
        }

        // Rotation only when it matters.
        rotation_fitted = match spec.rotation {
            Some(r) => r,
            None => {
                let e1 = eta(&Alignment {
                    rotation_deg: best.rotation_deg + 5.0,
                    ..best
                });
                let e2 = eta(&Alignment {
                    rotation_deg: best.rotation_deg - 5.0,
                    ..best
                });
                (e1 - best_eta).abs().max((e2 - best_eta).abs()) > 1e-7 * best_eta.abs().max(1e-12)
            }
        };
    }

    let held = |what: &str| format!("held at the setup's value ({what})");
    let requested = |parameter: &'static str, on: bool| {
        Decision::new(
            parameter,
            on,
            if on {
                "fitted".into()
            } else {
                held("not requested")
            },
        )
    };
    let rotation_reason = match spec.rotation {
        Some(true) => "fitted (requested)".into(),
        Some(false) => held("not requested"),
        None if rotation_fitted => "fitted".into(),
        None => held(
            "not observable: the basis holds complete degenerate groups, whose captured \
             power does not depend on rotation",
        ),
    };
    let mut decisions = vec![
        requested("center_um", spec.center),
        Decision::new("rotation_deg", rotation_fitted, rotation_reason),
        requested("scale", spec.scale),
        requested("tilt_mrad", spec.tilt),
        requested("defocus_um", spec.defocus),
    ];

    let mut free = Vec::new();
    if spec.center {
        free.extend([P::Cx, P::Cy]);
    }
    if rotation_fitted {
        free.push(P::Rot);
    }
    if spec.scale {
        free.push(P::Scale);
    }
    if spec.tilt {
        free.extend([P::Tx, P::Ty]);
    }
    if spec.defocus {
        free.push(P::Dz);
    }
    // Parameters the significance test may drop.
    let optional: Vec<P> = free
        .iter()
        .copied()
        .filter(|&p| (p == P::Rot && spec.rotation.is_none()) || p == P::Scale)
        .collect();

    // Stages 3 and 4 on a tight grid around the best candidate; rebuilt once around the
    // result when the search left the part of the grid that holds the modes, once wider
    // when it ended on a bound, and once without the parameters that did not earn their
    // place.
    let mut recentred = false;
    let mut widened = false;
    let mut tested = !spec.significance;
    let mut center_margin = 0.1 * a_um;
    let mut tilt_room = tilt_margin;
    let mut dz_room = 20.0;
    loop {
        let n = free.len();
        let (compact, red) = build(&Extent {
            wavelength_nm: ctx.wavelength_nm,
            center_um: Some(best.center_um),
            around: vec![best, *start],
            center_margin_um: center_margin,
            defocus_margin_um: dof,
            tail: FIT_TAIL,
            tilt_margin_cycles_per_um: tilt_room,
        });
        let obj = Objective::new(&red, &sampler);
        let eta = |a: &Alignment| {
            count();
            obj.captured(a)
        };
        let exact = |a: &Alignment| compact.captured(&obj.corrected_modes(a));

        // 3. Simplex on every free parameter. Bounds: the modes stay on the compact grid
        // and inside its band (see [`super::compact`]), scale in [0.5, 2], defocus within
        // 20 depths of focus of the start (40 once widened).
        let cb = compact.center_bounds_um;
        let tmax = compact.tilt_max_mrad;
        let bound = |p: P| -> (f64, f64) {
            match p {
                P::Cx => (cb[0][0], cb[0][1]),
                P::Cy => (cb[1][0], cb[1][1]),
                P::Rot => (f64::NEG_INFINITY, f64::INFINITY),
                P::Scale => (0.5, 2.0),
                P::Tx | P::Ty => (-tmax, tmax),
                P::Dz => (
                    start.defocus_um - dz_room * dof,
                    start.defocus_um + dz_room * dof,
                ),
            }
        };
        let base = best;
        let to_alignment = |x: &[f64]| {
            let mut a = base;
            for (p, v) in free.iter().zip(x) {
                set(&mut a, *p, v * unit(*p));
            }
            a
        };
        let x0: Vec<f64> = free
            .iter()
            .map(|&p| {
                let (lo, hi) = bound(p);
                get(&best, p).clamp(lo, hi) / unit(p)
            })
            .collect();
        let bounds = Bounds {
            lo: free.iter().map(|&p| bound(p).0 / unit(p)).collect(),
            hi: free.iter().map(|&p| bound(p).1 / unit(p)).collect(),
        };
        let m = nelder_mead(
            |x| -eta(&to_alignment(x)),
            &x0,
            &vec![1.0; n],
            &bounds,
            &spec.nm,
        );
        let mut message = String::new();
        if !m.converged {
            message = format!(
                "the simplex search did not settle within {} evaluations",
                spec.nm.max_evals
            );
        }

        // 4. Newton polish of the residual power S = total (1 - eta) from its
        // finite-difference gradient and Hessian: the simplex stops loosely, the quadratic
        // model finishes, and the same curvature gives the uncertainty.
        let s = |x: &[f64]| red.total * (1.0 - eta(&to_alignment(x)));
        let h: Vec<f64> = vec![0.02; n];
        let mut x_fit = m.x.clone();
        let mut s_fit = red.total * (1.0 + m.f);
        let mut curvature: Option<nalgebra::DMatrix<f64>> = None;
        if m.converged && n > 0 {
            let (s0, g, hs) = gradient_hessian(s, &x_fit, &h);
            s_fit = s0;
            let hm = nalgebra::DMatrix::from_fn(n, n, |i, j| hs[i][j]);
            if let Some(ch) = hm.clone().cholesky() {
                let mut g = nalgebra::DVector::from_vec(g);
                for _ in 0..2 {
                    let step = -ch.solve(&g);
                    let len = step.amax();
                    let shrink = if len > 0.5 { 0.5 / len } else { 1.0 };
                    let x1: Vec<f64> = (0..n)
                        .map(|i| (x_fit[i] + shrink * step[i]).clamp(bounds.lo[i], bounds.hi[i]))
                        .collect();
                    let s1 = s(&x1);
                    if s1.is_nan() || s1 >= s_fit {
                        break;
                    }
                    x_fit = x1;
                    s_fit = s1;
                    if len * shrink < 0.01 {
                        break;
                    }
                    g = nalgebra::DVector::from_vec(gradient(s, &x_fit, &h));
                }
                curvature = Some(hm);
            }
        }
        let attempted = to_alignment(&x_fit);
        if !recentred && m.converged && !compact.holds(&attempted) {
            best = attempted;
            recentred = true;
            continue;
        }
        let at_bound: Vec<usize> = (0..n)
            .filter(|&i| {
                let (lo, hi) = (bounds.lo[i], bounds.hi[i]);
                (x_fit[i] - lo).abs() < 1e-9 || (x_fit[i] - hi).abs() < 1e-9
            })
            .collect();
        if !at_bound.is_empty() && !widened && m.converged {
            // Widen once: three times the room for the centre, the tilt and the defocus,
            // and search again from where this search ended.
            widened = true;
            center_margin *= 3.0;
            tilt_room = 3.0 * tilt_room.max(bin_cycles_per_um)
                + attempted.tilt_mrad[0]
                    .abs()
                    .max(attempted.tilt_mrad[1].abs())
                    * 1e-3
                    / wl_um;
            dz_room *= 2.0;
            best = attempted;
            continue;
        }
        if let Some(&i) = at_bound.first() {
            let p = free[i];
            let v = x_fit[i] * unit(p);
            let by = v - get(start, p);
            let axis_bin = match p {
                P::Tx => Some(bin_mrad[0]),
                P::Ty => Some(bin_mrad[1]),
                _ => None,
            };
            let extra = axis_bin.map_or(String::new(), |bin| {
                format!(
                    " = {:.1} FFT bins of tilt from the start (a carrier that far off: give \
                     `carrier`)",
                    by / bin
                )
            });
            message = format!(
                "{} ran into its bound {:.4} after the search was widened once ({:+.4} from \
                 the start{extra}); the pattern may be off the grid, or the start is far off",
                name(p),
                v,
                by
            );
        }
        let converged = message.is_empty();

        // Significance of the optional parameters from the quadratic model at the fit:
        // holding parameter p at its nominal value c costs
        // dS = (c - x_p)^2 / (2 [H^-1]_pp) of residual power (H the Hessian of S), and the
        // likelihood-ratio statistic is dS / sigma^2 with sigma^2 the residual's variance
        // per real sample (chi-square with one degree of freedom when p is not needed).
        if converged && !tested {
            tested = true;
            if let Some(inv) = curvature
                .as_ref()
                .and_then(|hm| hm.clone().cholesky())
                .map(|c| c.inverse())
            {
                let n_real = 2.0 * (compact.fine_pixels * red.frames) as f64;
                let sigma2 = (s_fit.max(0.0) / (n_real - n as f64).max(1.0)).max(1e-300);
                let mut dropped = Vec::new();
                for &p in &optional {
                    let Some(i) = free.iter().position(|&q| q == p) else {
                        continue;
                    };
                    let d = get(start, p) / unit(p) - x_fit[i];
                    let ds = d * d / (2.0 * inv[(i, i)].max(1e-300));
                    let stat = ds / sigma2;
                    let gain = ds / red.total.max(1e-300);
                    let keep = stat > SIGNIFICANCE_CHI2 && gain > MIN_GAIN;
                    if let Some(dec) = decisions.iter_mut().find(|d| d.parameter == name(p)) {
                        dec.fitted = keep;
                        dec.statistic = Some(stat);
                        dec.gain = Some(gain);
                        dec.reason = if keep {
                            format!(
                                "fitted: significant (likelihood ratio {stat:.3e} > \
                                 {SIGNIFICANCE_CHI2}, captured fraction +{gain:.2e} > \
                                 {MIN_GAIN:.0e})"
                            )
                        } else {
                            format!(
                                "held at the setup's value: not significant (likelihood ratio \
                                 {stat:.3e}, threshold {SIGNIFICANCE_CHI2}; captured fraction \
                                 +{gain:.2e}, threshold {MIN_GAIN:.0e})"
                            )
                        };
                    }
                    if !keep {
                        dropped.push(p);
                    }
                }
                if !dropped.is_empty() {
                    let mut a = attempted;
                    for &p in &dropped {
                        set(&mut a, p, get(start, p));
                    }
                    free.retain(|p| !dropped.contains(p));
                    best = a;
                    continue;
                }
            }
        }

        let captured_before = exact(start);
        let captured_after = if converged {
            exact(&attempted)
        } else {
            captured_before
        };

        // Uncertainty from the curvature of the residual power.
        let mut uncertainty = Uncertainty::default();
        if let (true, Some(hm)) = (converged, curvature) {
            let n_real = 2.0 * (compact.fine_pixels * red.frames) as f64;
            let sigma2 = s_fit.max(0.0) / (n_real - n as f64).max(1.0);
            if let Some(inv) = hm.cholesky().map(|c| c.inverse()) {
                let sd = |i: usize| (2.0 * sigma2 * inv[(i, i)]).sqrt() * unit(free[i]);
                let idx = |p: P| free.iter().position(|&q| q == p);
                let pair = |a: P, b: P| match (idx(a), idx(b)) {
                    (Some(i), Some(j)) => Some([sd(i), sd(j)]),
                    _ => None,
                };
                uncertainty = Uncertainty {
                    center_um: pair(P::Cx, P::Cy),
                    rotation_deg: idx(P::Rot).map(sd),
                    scale: idx(P::Scale).map(sd),
                    tilt_mrad: pair(P::Tx, P::Ty),
                    defocus_um: idx(P::Dz).map(sd),
                };
            }
        }
        let rotation_kept = free.contains(&P::Rot);
        return ChannelFit {
            start: *start,
            fitted: if converged { attempted } else { *start },
            attempted,
            captured_before,
            captured_after,
            uncertainty,
            iterations: used.load(std::sync::atomic::Ordering::Relaxed),
            converged,
            rotation_fitted: rotation_kept,
            message,
            retained_fraction: red.retained_fraction,
            decisions,
        };
    }
}

fn name(p: P) -> &'static str {
    match p {
        P::Cx => "center_um[0]",
        P::Cy => "center_um[1]",
        P::Rot => "rotation_deg",
        P::Scale => "scale",
        P::Tx => "tilt_mrad[0]",
        P::Ty => "tilt_mrad[1]",
        P::Dz => "defocus_um",
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::align::analytic::{hg_fields, hg_indices, hg_sampler, sample_hg};
    use ndarray::Axis;

    fn ctx() -> FitContext {
        FitContext {
            wavelength_nm: 1064.0,
            core_radius_um: 12.0,
            na: 0.12,
        }
    }

    #[test]
    fn centroid_of_a_shifted_spot() {
        let g = Grid::centred(32, 32, 1.0);
        let p: Vec<f64> = (0..g.len())
            .map(|i| {
                let (x, y) = (g.x_um(i % 32) - 3.0, g.y_um(i / 32) + 2.0);
                (-(x * x + y * y) / 8.0).exp()
            })
            .collect();
        let c = centroid_um(&p, &g, 0.01).unwrap();
        assert!(
            (c[0] - 3.0).abs() < 1e-3 && (c[1] + 2.0).abs() < 1e-3,
            "{c:?}"
        );
        assert!(centroid_um(&[0.0; 4], &Grid::centred(2, 2, 1.0), 0.1).is_none());
    }

    /// Recovering a known misalignment from analytic HG fields (the truth is the simulated
    /// value; tolerances as in the calibrate task: centre within 2% of the core radius,
    /// tilt and defocus within 5% of the applied value).
    #[test]
    fn recovers_known_misalignment_of_hg_fields() {
        let grid = Grid::centred(64, 64, 0.75);
        let truth = Alignment {
            center_um: [2.5, -1.8],
            rotation_deg: 0.0,
            scale: 1.04,
            tilt_mrad: [6.0, -4.0],
            defocus_um: 15.0,
        };
        let (fields, _) = hg_fields(&grid, 3, 5.0, &truth, 1064.0, 24, 0.02, 3);
        let fit = fit_channel(
            fields.view(),
            &grid,
            &ctx(),
            &Alignment::default(),
            hg_sampler(3, 5.0),
            &FitSpec::default(),
            &|_| {},
        );
        assert!(fit.converged, "{}", fit.message);
        let f = fit.fitted;
        let a = ctx().core_radius_um;
        assert!((f.center_um[0] - 2.5).abs() < 0.02 * a, "{f:?}");
        assert!((f.center_um[1] + 1.8).abs() < 0.02 * a, "{f:?}");
        assert!(
            (f.tilt_mrad[0] - 6.0).abs() < 0.3 && (f.tilt_mrad[1] + 4.0).abs() < 0.2,
            "{f:?}"
        );
        assert!((f.defocus_um - 15.0).abs() < 0.75, "{f:?}");
        assert!((f.scale - 1.04).abs() < 0.01, "{f:?}");
        assert!(
            !fit.rotation_fitted,
            "complete HG groups do not see rotation"
        );
        assert!(fit.captured_after > fit.captured_before);
        assert!(fit.captured_after > 0.99, "{}", fit.captured_after);
        let u = fit.uncertainty.center_um.expect("uncertainty");
        assert!(u[0] > 0.0 && u[0] < 0.2, "{u:?}");
    }

    /// With an incomplete group (HG_10 without HG_01) the pattern's rotation matters and is
    /// fitted.
    #[test]
    fn fits_rotation_when_the_basis_sees_it() {
        let grid = Grid::centred(48, 48, 0.75);
        let idx: Vec<(usize, usize)> = vec![(0, 0), (1, 0), (2, 0)];
        let truth = Alignment {
            rotation_deg: 12.0,
            ..Default::default()
        };
        let basis = sample_hg(&grid, &truth, &idx, 5.0);
        let mut fields = Array3::<Complex64>::zeros((6, 48, 48));
        for f in 0..6 {
            for k in 0..3 {
                let c = Complex64::new(((f * 3 + k) as f64).sin(), ((f + 2 * k) as f64).cos());
                let mut dst = fields.index_axis_mut(Axis(0), f);
                dst.zip_mut_with(&basis.index_axis(Axis(0), k), |o, b| *o += c * b);
            }
        }
        let idx2 = idx.clone();
        let spec = FitSpec {
            tilt: false,
            defocus: false,
            scale: false,
            ..Default::default()
        };
        let fit = fit_channel(
            fields.view(),
            &grid,
            &ctx(),
            &Alignment::default(),
            move |g: &Grid, a: &Alignment| sample_hg(g, a, &idx2, 5.0),
            &spec,
            &|_| {},
        );
        assert!(fit.converged && fit.rotation_fitted, "{fit:?}");
        let r = fit.fitted.rotation_deg.rem_euclid(180.0);
        assert!((r - 12.0).abs() < 0.2, "{r}");
        let _ = hg_indices(1);
    }

    #[test]
    fn evaluation_limit_reports_not_converged_and_keeps_start() {
        let grid = Grid::centred(32, 32, 1.0);
        let truth = Alignment {
            center_um: [2.0, 1.0],
            ..Default::default()
        };
        let (fields, _) = hg_fields(&grid, 2, 5.0, &truth, 1064.0, 6, 0.0, 1);
        let mut spec = FitSpec::default();
        spec.nm.max_evals = 5;
        let start = Alignment {
            center_um: [0.5, 0.5],
            ..Default::default()
        };
        let fit = fit_channel(
            fields.view(),
            &grid,
            &ctx(),
            &start,
            hg_sampler(2, 5.0),
            &spec,
            &|_| {},
        );
        assert!(!fit.converged);
        assert!(!fit.message.is_empty());
        assert_eq!(fit.fitted, start);
    }
}
