//! The mode basis: which modes, in which order, with which labels, and their fields.
//!
//! [`Basis::from_setup`] solves (LP) or constructs (LG, HG) the modes the setup's `[fiber]`,
//! `[basis]` and `[light]` sections describe. Order (docs/conventions.md): group
//! g = 2m + l - 1 ascending, then l, then cos before sin (+ before -). Fields are
//! continuum-normalised (integral |psi|^2 dA = 1, dA in um^2) in fibre coordinates (u, v):
//! LP: R(r) cos(l phi)/sqrt(pi), R(r) sin(l phi)/sqrt(pi), R(r)/sqrt(2 pi) for l = 0,
//! R(r) exp(+-i l phi)/sqrt(2 pi) when circular, with integral R^2 r dr = 1.
use super::analytic::{hermite_functions, hg_group, lg_group, lg_radial};
use super::fd::{self, RadialGrid};
use super::profile::{Profile, Shape as ProfileShape};
use super::radial::{RadialTable, Stencil};
use super::step;
use crate::error::{Error, Result};
use crate::setup::{BasisKind, Setup};
use num_complex::Complex64;
use rayon::prelude::*;
use serde::Serialize;

/// Azimuthal dependence of a mode.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash, Serialize, serde::Deserialize)]
pub enum Orientation {
    #[serde(rename = "cos")]
    Cos,
    #[serde(rename = "sin")]
    Sin,
    #[serde(rename = "+")]
    Plus,
    #[serde(rename = "-")]
    Minus,
    #[serde(rename = "hg")]
    Hg,
}

impl Orientation {
    /// Name as written in modes.json.
    pub fn as_str(&self) -> &'static str {
        match self {
            Orientation::Cos => "cos",
            Orientation::Sin => "sin",
            Orientation::Plus => "+",
            Orientation::Minus => "-",
            Orientation::Hg => "hg",
        }
    }

    fn rank(&self) -> u8 {
        match self {
            Orientation::Cos | Orientation::Plus | Orientation::Hg => 0,
            Orientation::Sin | Orientation::Minus => 1,
        }
    }
}

/// One basis mode as listed in modes.json.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct ModeInfo {
    pub index: usize,
    pub label: String,
    pub l: u32,
    pub m: u32,
    pub orientation: Orientation,
    pub group: u32,
    pub neff: f64,
    pub near_cutoff: bool,
    pub cutoff_v: Option<f64>,
    pub b: Option<f64>,
}

/// How a mode's field is computed.
#[derive(Debug, Clone, Copy)]
pub(crate) enum Shape {
    Radial {
        table: usize,
        l: u32,
        az: Orientation,
    },
    Lg {
        p: u32,
        l: u32,
        az: Orientation,
    },
    Hg {
        n: u32,
        m: u32,
    },
}

/// A mode basis with its fields.
#[derive(Debug, Clone)]
pub struct Basis {
    pub modes: Vec<ModeInfo>,
    pub wavelength_nm: f64,
    pub v_number: Option<f64>,
    pub core_radius_um: f64,
    pub(crate) shapes: Vec<Shape>,
    pub(crate) tables: Vec<RadialTable>,
    /// Spacing (core radii) and length of the shared radial tables.
    pub(crate) table_h: f64,
    pub(crate) table_len: usize,
    /// Gaussian waist of LG / HG bases, micrometres.
    pub(crate) waist_um: f64,
    pub(crate) kind: BasisKind,
}

/// Most spatial modes (per polarisation) a basis may be solved for. A 50 um graded core at
/// 1550 nm guides about 55 (common practice, no source); beyond this limit the figures
/// usually come from a unit slip (um typed as nm), not from a fibre.
pub const MAX_EXPECTED_MODES: f64 = 5000.0;

/// Expected number of guided spatial modes (per polarisation) for V: `alpha / (alpha + 2)
/// V^2 / 4` for a power-law profile (V^2 / 4 step, V^2 / 8 parabolic; Gloge & Marcatili
/// 1973, total mode number with both polarisations `alpha / (alpha + 2) V^2 / 2`).
pub fn expected_mode_count(v: f64, alpha: Option<f64>) -> f64 {
    let share = alpha.map_or(1.0, |a| a / (a + 2.0));
    share * v * v / 4.0
}

/// Refuse a V number that would guide an absurd number of modes, naming the likely slip.
fn check_mode_count(file: &str, setup: &Setup, v: f64, n1: f64, n2: f64, a: f64) -> Result<()> {
    let alpha = match setup.fiber.profile {
        crate::setup::ProfileKind::Graded => Some(setup.fiber.alpha),
        _ => None,
    };
    let m = expected_mode_count(v, alpha);
    if m <= MAX_EXPECTED_MODES {
        return Ok(());
    }
    let lambda = setup.light.wavelength_nm;
    let (key, value, hint) = if lambda < 150.0 {
        (
            "light.wavelength_nm",
            lambda.to_string(),
            format!(
                " wavelength_nm = {lambda} looks like micrometres: {lambda} um = {} nm",
                lambda * 1e3
            ),
        )
    } else if a > 500.0 {
        (
            "fiber.core_radius_um",
            a.to_string(),
            format!(" core_radius_um = {a} looks like nanometres or a diameter in the wrong unit"),
        )
    } else {
        (
            "fiber.na",
            format!("{:.4}", (n1 * n1 - n2 * n2).sqrt()),
            String::new(),
        )
    };
    Err(Error::setup(
        file,
        key,
        value,
        format!(
            "n1 = {n1:.5}, n2 = {n2:.5}, core radius {a} um, wavelength {lambda} nm give V = \
             {v:.1}, about {m:.3e} guided modes per polarisation, more than the {MAX_EXPECTED_MODES} \
             this tool solves for.{hint}"
        ),
    ))
}

/// A solved LP mode before ordering.
struct Solved {
    l: u32,
    m: u32,
    b: f64,
    cutoff_v: Option<f64>,
    table: RadialTable,
}

/// Label "LP01"; "LP_12,3" when an index has two digits.
pub fn lp_label(l: u32, m: u32) -> String {
    if l < 10 && m < 10 {
        format!("LP{l}{m}")
    } else {
        format!("LP_{l},{m}")
    }
}

/// The fundamental Gaussian width of the infinite parabola, w0 = sqrt(2 a / (k NA))
/// (1/e field radius), micrometres.
pub fn parabolic_waist_um(core_radius_um: f64, na: f64, wavelength_nm: f64) -> f64 {
    let k = 2.0 * std::f64::consts::PI / (wavelength_nm * 1e-3);
    (2.0 * core_radius_um / (k * na)).sqrt()
}

/// Solve every guided LP mode of `profile` at V.
fn solve_lp(profile: &Profile, v: f64, ppr: usize, extent: f64) -> Vec<Solved> {
    let a = profile.core_radius_um;
    let h = 1.0 / ppr as f64;
    let n_total = (extent.max(4.0) * ppr as f64).round() as usize;
    let l_max = v.ceil() as u32 + 2;
    if profile.shape == ProfileShape::Step {
        let per_l: Vec<Vec<Solved>> = (0..=l_max)
            .into_par_iter()
            .map(|l| {
                step::solve_l(v, l)
                    .into_iter()
                    .map(|sm| {
                        let samples: Vec<f64> = (0..n_total)
                            .map(|i| sm.field((i as f64 + 0.5) * h))
                            .collect();
                        Solved {
                            l,
                            m: sm.m,
                            b: sm.b,
                            cutoff_v: step::cutoff_v(l, sm.m),
                            table: RadialTable::new(l, h, &samples, sm.w, n_total, a),
                        }
                    })
                    .collect()
            })
            .collect();
        return per_l.into_iter().flatten().collect();
    }
    let grid = RadialGrid::new(|r| profile.f(r), ppr, extent);
    let coarse = RadialGrid::new(|r| profile.f(r), (ppr / 2).max(10), extent);
    let per_l: Vec<Vec<Solved>> = (0..=l_max)
        .into_par_iter()
        .map(|l| {
            fd::solve_l(&grid, Some(&coarse), v, l)
                .into_iter()
                .map(|fm| {
                    let w = v * fm.b_fine.max(0.0).sqrt();
                    Solved {
                        l,
                        m: fm.m,
                        b: fm.b,
                        cutoff_v: fd::cutoff_v(&grid, l, fm.m, v),
                        table: RadialTable::new(l, h, &fm.field, w, n_total, a),
                    }
                })
                .collect()
        })
        .collect();
    per_l.into_iter().flatten().collect()
}

impl Basis {
    /// Solve or construct the basis the setup describes.
    pub fn from_setup(setup: &Setup) -> Result<Basis> {
        let file = setup.file_name();
        let fb = &setup.fiber;
        let bs = &setup.basis;
        let lambda = setup.light.wavelength_nm;
        if !(lambda.is_finite() && lambda > 0.0) {
            return Err(Error::setup(
                &file,
                "light.wavelength_nm",
                lambda,
                "must be a finite number > 0",
            ));
        }
        let profile = Profile::from_setup(setup)?;
        let a = profile.core_radius_um;
        let na = profile.na();
        let n1 = profile.core_index;
        let n2 = profile.cladding_index;
        let v = profile.v_number(lambda);
        if !(v.is_finite() && v > 0.0) {
            return Err(Error::setup(
                &file,
                "fiber.na",
                na,
                format!("gives V = {v}: no guided mode"),
            ));
        }
        check_mode_count(&file, setup, v, n1, n2, a)?;
        let margin = fb.cutoff_margin_b;
        let neff_of_b = |b: f64| (n2 * n2 + b * na * na).max(0.0).sqrt();
        let mut entries: Vec<(ModeInfo, Shape)> = Vec::new();
        let mut tables = Vec::new();
        let mut waist = 0.0;
        match bs.kind {
            BasisKind::Lp => {
                let solved = solve_lp(
                    &profile,
                    v,
                    fb.solver_points_per_radius,
                    fb.solver_extent_radii,
                );
                for s in solved {
                    let t = tables.len();
                    tables.push(s.table);
                    let orients: &[Orientation] = if s.l == 0 {
                        &[Orientation::Cos]
                    } else if bs.circular {
                        &[Orientation::Plus, Orientation::Minus]
                    } else {
                        &[Orientation::Cos, Orientation::Sin]
                    };
                    for &o in orients {
                        entries.push((
                            ModeInfo {
                                index: 0,
                                label: lp_label(s.l, s.m),
                                l: s.l,
                                m: s.m,
                                orientation: o,
                                group: 2 * s.m + s.l - 1,
                                neff: neff_of_b(s.b),
                                near_cutoff: s.b < margin,
                                cutoff_v: s.cutoff_v,
                                b: Some(s.b),
                            },
                            Shape::Radial {
                                table: t,
                                l: s.l,
                                az: o,
                            },
                        ));
                    }
                }
            }
            BasisKind::Lg | BasisKind::Hg => {
                let groups = bs.groups.unwrap_or(1) as u32;
                waist = bs
                    .waist_um
                    .unwrap_or_else(|| parabolic_waist_um(a, na, lambda));
                let k = 2.0 * std::f64::consts::PI / (lambda * 1e-3);
                for g in 1..=groups {
                    // infinite-parabola propagation constant: beta^2 = k^2 n1^2 - 2 g k NA / a
                    let neff2 = n1 * n1 - 2.0 * g as f64 * na / (k * a);
                    let neff = neff2.max(0.0).sqrt();
                    let b = (neff2 - n2 * n2) / (na * na);
                    let mk = |label: String, l, m, o, shape| {
                        (
                            ModeInfo {
                                index: 0,
                                label,
                                l,
                                m,
                                orientation: o,
                                group: g,
                                neff,
                                near_cutoff: b < margin,
                                cutoff_v: None,
                                b: Some(b),
                            },
                            shape,
                        )
                    };
                    if bs.kind == BasisKind::Lg {
                        for (l, m1, o) in lg_group(g, bs.circular) {
                            let p = m1 - 1;
                            entries.push(mk(
                                format!("LG_{p},{l}"),
                                l,
                                m1,
                                o,
                                Shape::Lg { p, l, az: o },
                            ));
                        }
                    } else {
                        for (n, m) in hg_group(g) {
                            entries.push(mk(
                                format!("HG_{n},{m}"),
                                n,
                                m,
                                Orientation::Hg,
                                Shape::Hg { n, m },
                            ));
                        }
                    }
                }
            }
        }
        if let Some(gmax) = bs.groups {
            entries.retain(|(mi, _)| mi.group as usize <= gmax);
        }
        if bs.drop_near_cutoff {
            entries.retain(|(mi, _)| !mi.near_cutoff);
        }
        if entries.is_empty() {
            let why = if bs.drop_near_cutoff {
                "every guided mode is near cut-off and basis.drop_near_cutoff is set"
            } else {
                "no guided mode"
            };
            return Err(Error::setup(
                &file,
                "fiber.na",
                na,
                format!("{why} (V = {v:.4})"),
            ));
        }
        entries.sort_by(|(x, _), (y, _)| {
            (x.group, x.l, x.orientation.rank()).cmp(&(y.group, y.l, y.orientation.rank()))
        });
        let (mut modes, shapes): (Vec<ModeInfo>, Vec<Shape>) = entries.into_iter().unzip();
        for (i, m) in modes.iter_mut().enumerate() {
            m.index = i;
        }
        let table_h = 1.0 / fb.solver_points_per_radius as f64;
        let table_len = tables.first().map(|t: &RadialTable| t.len()).unwrap_or(0);
        Ok(Basis {
            modes,
            wavelength_nm: lambda,
            v_number: Some(v),
            core_radius_um: a,
            shapes,
            tables,
            table_h,
            table_len,
            waist_um: waist,
            kind: bs.kind,
        })
    }

    /// Keep only the modes for which `keep` is true (e.g. one orientation of each pair, for a
    /// partial measurement); indices are renumbered in the kept order.
    pub fn retain(&mut self, keep: impl Fn(&ModeInfo) -> bool) {
        let flags: Vec<bool> = self.modes.iter().map(&keep).collect();
        let mut i = 0;
        self.shapes.retain(|_| {
            i += 1;
            flags[i - 1]
        });
        let mut i = 0;
        self.modes.retain(|_| {
            i += 1;
            flags[i - 1]
        });
        for (k, m) in self.modes.iter_mut().enumerate() {
            m.index = k;
        }
    }

    /// Number of modes.
    pub fn len(&self) -> usize {
        self.modes.len()
    }

    /// True when the basis holds no mode.
    pub fn is_empty(&self) -> bool {
        self.modes.is_empty()
    }

    /// Group of each mode, in basis order.
    pub fn groups(&self) -> Vec<u32> {
        self.modes.iter().map(|m| m.group).collect()
    }

    /// The basis kind (lp, lg, hg).
    pub fn kind(&self) -> BasisKind {
        self.kind
    }

    /// Gaussian waist (1/e field radius, um) of an LG / HG basis; None for LP.
    pub fn waist_um(&self) -> Option<f64> {
        (self.kind != BasisKind::Lp).then_some(self.waist_um)
    }

    /// The normalised radial function R(r) (1/um, integral R^2 r dr = 1) of an LP mode at
    /// r (um); None for LG / HG modes.
    pub fn radial(&self, k: usize, r_um: f64) -> Option<f64> {
        match self.shapes[k] {
            Shape::Radial { table, .. } => {
                Some(self.tables[table].value(r_um / self.core_radius_um))
            }
            _ => None,
        }
    }

    /// Mode k at fibre coordinates (u, v) in micrometres, continuum-normalised.
    pub fn eval(&self, k: usize, u_um: f64, v_um: f64) -> Complex64 {
        let r = u_um.hypot(v_um);
        let z = if r > 0.0 {
            Complex64::new(u_um / r, v_um / r)
        } else {
            Complex64::new(1.0, 0.0)
        };
        match self.shapes[k] {
            Shape::Radial { table, l, az } => {
                let rr = self.tables[table].value(r / self.core_radius_um);
                azimuth(l, az, z.powu(l)) * rr
            }
            Shape::Lg { p, l, az } => azimuth(l, az, z.powu(l)) * lg_radial(p, l, r, self.waist_um),
            Shape::Hg { n, m } => {
                let nm = n.max(m) as usize + 1;
                let mut gu = vec![0.0; nm];
                let mut gv = vec![0.0; nm];
                let s = std::f64::consts::SQRT_2 / self.waist_um;
                hermite_functions(s * u_um, &mut gu);
                hermite_functions(s * v_um, &mut gv);
                Complex64::new(gu[n as usize] * gv[m as usize] * s, 0.0)
            }
        }
    }

    /// Stencil of the shared radial tables at rho (core radii).
    #[inline]
    pub(crate) fn stencil(&self, rho: f64) -> Stencil {
        RadialTable::stencil(self.table_h, self.table_len, rho)
    }
}

/// Normalised azimuthal factor from z^l = exp(i l phi).
#[inline]
pub(crate) fn azimuth(l: u32, az: Orientation, zl: Complex64) -> Complex64 {
    use std::f64::consts::PI;
    let inv_2pi = 1.0 / (2.0 * PI).sqrt();
    let inv_pi = 1.0 / PI.sqrt();
    if l == 0 {
        return Complex64::new(inv_2pi, 0.0);
    }
    match az {
        Orientation::Cos | Orientation::Hg => Complex64::new(zl.re * inv_pi, 0.0),
        Orientation::Sin => Complex64::new(zl.im * inv_pi, 0.0),
        Orientation::Plus => zl * inv_2pi,
        Orientation::Minus => zl.conj() * inv_2pi,
    }
}
