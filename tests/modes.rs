//! Mode solver and bases: physics checks against published values (each test names its
//! source), sampling and orthonormality, bad input.
use modegram::grid::{Alignment, Grid};
use modegram::modes::fd::{self, RadialGrid};
use modegram::modes::profile::Profile;
use modegram::modes::{self, analytic, step, Basis, Orientation};
use modegram::setup::Setup;
use num_complex::Complex64;
use std::path::Path;

/// A setup for a fibre of the given profile whose V-number is exactly `v`
/// (core radius 10 um, NA 0.1, wavelength chosen).
fn setup_v(profile: &str, v: f64, extra: &str) -> Setup {
    let a = 10.0;
    let na = 0.1;
    let lambda_nm = 2.0 * std::f64::consts::PI * a * na / v * 1e3;
    let text = format!(
        "version = 1\n[light]\nwavelength_nm = {lambda_nm}\n[camera]\npixel_pitch_um = 5.5\n\
         [fiber]\nprofile = \"{profile}\"\ncore_radius_um = {a}\nna = {na}\n{extra}"
    );
    Setup::from_toml(&text, Path::new("test.toml")).unwrap()
}

fn setup_text(text: &str) -> modegram::Result<Setup> {
    Setup::from_toml(text, Path::new("test.toml"))
}

// ---- cut-offs -------------------------------------------------------------------------

#[test]
fn lp_cutoffs_are_bessel_zeros() {
    // DLMF 10.21 / A&S table 9.5; cut-off of LP_lm = m-th zero of J_{l-1} (Gloge 1971).
    let cases = [
        (1, 1, 2.404825557695773),
        (2, 1, 3.831705970207512),
        (0, 2, 3.831705970207512),
        (3, 1, 5.135622301840683),
        (1, 2, 5.520078110286311),
    ];
    for (l, m, zero) in cases {
        let vc = step::cutoff_v(l, m).unwrap();
        assert!((vc - zero).abs() < 1e-12, "LP{l}{m}: {vc} vs {zero}");
        // the mode exists just above and not just below its cut-off
        let has = |v: f64| step::solve_l(v, l).iter().any(|s| s.m == m);
        assert!(has(zero + 1e-6), "LP{l}{m} missing just above cut-off");
        assert!(!has(zero - 1e-6), "LP{l}{m} present just below cut-off");
    }
    assert_eq!(step::cutoff_v(0, 1), None);
}

#[test]
fn basis_reports_step_cutoffs() {
    // Gloge 1971 / DLMF 10.21: the cutoff_v field of the listed modes.
    let b = Basis::from_setup(&setup_v("step", 6.0, "")).unwrap();
    let find = |label: &str| b.modes.iter().find(|m| m.label == label).unwrap();
    assert_eq!(find("LP01").cutoff_v, None);
    assert!((find("LP11").cutoff_v.unwrap() - 2.404825557695773).abs() < 1e-12);
    assert!((find("LP12").cutoff_v.unwrap() - 5.520078110286311).abs() < 1e-12);
    assert!((find("LP31").cutoff_v.unwrap() - 5.135622301840683).abs() < 1e-12);
}

#[test]
fn fd_cutoffs_of_step_profile_match_bessel_zeros() {
    // The FD solver's cut-off bisection on a step profile vs DLMF 10.21 zeros (tolerance
    // set by the O(h^2) discretisation at 400 points per radius).
    let p = Profile::step(10.0, 0.1, 1.444);
    let grid = RadialGrid::new(|r| p.f(r), 400, 3.0);
    for (l, m, zero) in [
        (1, 1, 2.404825557695773),
        (2, 1, 3.831705970207512),
        (0, 2, 3.831705970207512),
    ] {
        let vc = fd::cutoff_v(&grid, l, m, 8.0).unwrap();
        assert!((vc - zero).abs() < 2e-3 * zero, "LP{l}{m}: {vc} vs {zero}");
    }
}

// ---- FD vs exact --------------------------------------------------------------------

#[test]
fn fd_matches_exact_step_solution() {
    // Gloge 1971 characteristic equation vs the finite-difference solver, 1e-4 in b.
    let p = Profile::step(10.0, 0.1, 1.444);
    let grid = RadialGrid::new(|r| p.f(r), 400, 3.0);
    let coarse = RadialGrid::new(|r| p.f(r), 200, 3.0);
    for v in [2.4, 5.0, 8.0, 20.0] {
        let mut worst: f64 = 0.0;
        for l in 0..(v as u32 + 2) {
            let exact = step::solve_l(v, l);
            let num = fd::solve_l(&grid, Some(&coarse), v, l);
            assert_eq!(exact.len(), num.len(), "V={v} l={l}: mode count");
            for (e, n) in exact.iter().zip(&num) {
                worst = worst.max((e.b - n.b).abs());
            }
        }
        println!("V = {v}: max |b_fd - b_exact| = {worst:.2e}");
        assert!(worst < 1e-4, "V = {v}: {worst}");
    }
}

#[test]
fn step_regression_anchors() {
    // shared/REFERENCES.md regression anchors (numeric).
    let b01 = step::solve_l(2.4, 0)[0].b;
    assert!((b01 - 0.530026).abs() < 1e-6, "{b01}");
    let want = [(0, 0.840949), (1, 0.602413), (2, 0.301489)];
    for (l, b) in want {
        let got = step::solve_l(5.0, l)[0].b;
        assert!((got - b).abs() < 1e-6, "LP{l}1: {got}");
    }
    let lp02 = step::solve_l(5.0, 0)[1].b;
    assert!((lp02 - 0.215426).abs() < 1e-6, "{lp02}");
    assert_eq!(step::solve_all(5.0).len(), 4);
}
