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

// ---- mode-field radius -----------------------------------------------------------------

/// Radial integration grid (um) and R(r) of mode k.
fn radial_samples(b: &Basis, k: usize, r_max: f64, n: usize) -> (Vec<f64>, Vec<f64>, f64) {
    let dr = r_max / n as f64;
    let r: Vec<f64> = (0..n).map(|i| (i as f64 + 0.5) * dr).collect();
    let e: Vec<f64> = r.iter().map(|&x| b.radial(k, x).unwrap()).collect();
    (r, e, dr)
}

/// Radius of the best-overlap Gaussian exp(-r^2/w^2) (golden-section search).
fn best_overlap_waist(r: &[f64], e: &[f64], lo: f64, hi: f64) -> f64 {
    let eta = |w: f64| {
        let (mut eg, mut gg, mut ee) = (0.0, 0.0, 0.0);
        for (x, v) in r.iter().zip(e) {
            let g = (-x * x / (w * w)).exp();
            eg += v * g * x;
            gg += g * g * x;
            ee += v * v * x;
        }
        eg * eg / (gg * ee)
    };
    let (mut a, mut b) = (lo, hi);
    let phi = 0.5 * (5f64.sqrt() - 1.0);
    for _ in 0..100 {
        let c = b - phi * (b - a);
        let d = a + phi * (b - a);
        if eta(c) > eta(d) {
            b = d;
        } else {
            a = c;
        }
    }
    0.5 * (a + b)
}

#[test]
fn lp01_mode_field_radius_matches_marcuse() {
    // Marcuse 1977, BSTJ 56, 703: w/a = 0.65 + 1.619 V^-1.5 + 2.879 V^-6, about 1% for
    // 1.2 < V < 2.4; w = radius of the best-overlap Gaussian.
    for v in [1.3, 1.6, 2.0, 2.4] {
        let b = Basis::from_setup(&setup_v("step", v, "")).unwrap();
        let a = b.core_radius_um;
        let (r, e, _) = radial_samples(&b, 0, 12.0 * a, 12000);
        let w = best_overlap_waist(&r, &e, 0.5 * a, 4.0 * a);
        let marcuse = 0.65 + 1.619 * v.powf(-1.5) + 2.879 * v.powi(-6);
        let rel = (w / a - marcuse) / marcuse;
        println!(
            "V = {v}: w/a = {:.5}, Marcuse {marcuse:.5}, {:.3}%",
            w / a,
            100.0 * rel
        );
        assert!(rel.abs() < 0.01, "V = {v}: {rel}");
    }
}

#[test]
fn g652_like_fibre_mfd_within_envelope() {
    // ITU-T G.652 MFD at 1310 nm (envelope 8.2-9.6 um, from memory), definition Petermann II
    // (ITU-T G.650.1): MFD = 2 sqrt(2 int E^2 r dr / int E'^2 r dr). Marcuse 1977 fit: 9.13 um.
    let text = "version = 1\n[light]\nwavelength_nm = 1310.0\n[camera]\npixel_pitch_um = 5.5\n\
                [fiber]\nprofile = \"step\"\ncore_radius_um = 4.1\nna = 0.12\n";
    let b = Basis::from_setup(&setup_text(text).unwrap()).unwrap();
    assert_eq!(b.len(), 1, "single-mode at 1310 nm");
    let v = b.v_number.unwrap();
    let (r, e, dr) = radial_samples(&b, 0, 60.0, 60000);
    let (mut num, mut den) = (0.0, 0.0);
    for i in 1..r.len() - 1 {
        let de = (e[i + 1] - e[i - 1]) / (2.0 * dr);
        num += e[i] * e[i] * r[i];
        den += de * de * r[i];
    }
    let mfd = 2.0 * (2.0 * num / den).sqrt();
    let marcuse = 2.0 * 4.1 * (0.65 + 1.619 * v.powf(-1.5) + 2.879 * v.powi(-6));
    println!("V = {v:.4}: Petermann II MFD {mfd:.3} um, Marcuse fit {marcuse:.3} um");
    assert!((8.2..=9.6).contains(&mfd), "{mfd}");
    assert!((marcuse - 9.13).abs() < 0.01, "{marcuse}");
}

// ---- mode counts -----------------------------------------------------------------------

/// Number of guided modes counting both polarisations.
fn total_modes(b: &Basis) -> usize {
    2 * b.len()
}

#[test]
fn step_mode_count_at_v_20_27_is_210() {
    // shared/REFERENCES.md (numeric): 210 modes with both polarisations at V = 20.27.
    let b = Basis::from_setup(&setup_v("step", 20.27, "")).unwrap();
    assert_eq!(total_modes(&b), 210);
}

#[test]
fn mode_counts_follow_gloge_marcatili() {
    // Gloge & Marcatili 1973 (BSTJ 52, 1563; from memory): M ~ (alpha/(alpha+2)) V^2/2,
    // i.e. V^2/2 for a step and V^2/4 for a parabola, within 10% for V > 25.
    for v in [26.0, 35.0] {
        let step_b = Basis::from_setup(&setup_v("step", v, "")).unwrap();
        let n = total_modes(&step_b) as f64;
        assert!((n / (v * v / 2.0) - 1.0).abs() < 0.10, "step V={v}: {n}");
        let gr = Basis::from_setup(&setup_v("graded", v, "")).unwrap();
        let n = total_modes(&gr) as f64;
        assert!((n / (v * v / 4.0) - 1.0).abs() < 0.10, "graded V={v}: {n}");
        // parabolic principal groups ~ V/2 (infinite-parabola eigenvalues)
        let groups = *gr.groups().iter().max().unwrap() as f64;
        assert!((groups - v / 2.0).abs() <= 1.0, "V={v}: {groups} groups");
    }
}

#[test]
fn om4_like_graded_fibre_has_10_groups_and_55_modes() {
    // 50 um core, NA 0.2, 1550 nm (V = 20.27): 10 groups, 55 spatial modes per
    // polarisation (common practice, no source; parabolic count G(G+1)/2).
    let text = "version = 1\n[light]\nwavelength_nm = 1550.0\n[camera]\npixel_pitch_um = 5.5\n\
                [fiber]\nprofile = \"graded\"\ncore_radius_um = 25.0\nna = 0.2\n";
    let b = Basis::from_setup(&setup_text(text).unwrap()).unwrap();
    assert_eq!(b.len(), 55);
    assert_eq!(*b.groups().iter().max().unwrap(), 10);
    // each parabolic group g holds g spatial modes
    for g in 1..=10u32 {
        assert_eq!(b.groups().iter().filter(|&&x| x == g).count(), g as usize);
    }
    // the outermost group sits close to cut-off: every cut-off V within 5% below V
    let v = b.v_number.unwrap();
    for m in b.modes.iter().filter(|m| m.group == 10) {
        let vc = m.cutoff_v.unwrap();
        assert!(vc < v && vc > 0.95 * v, "{}: cut-off {vc}", m.label);
        assert!(m.b.unwrap() < 0.03);
    }
    // with a wider margin the outermost group is flagged and can be dropped
    let t2 = format!("{text}cutoff_margin_b = 0.03\n[basis]\ndrop_near_cutoff = true\n");
    let b2 = Basis::from_setup(&setup_text(&t2).unwrap()).unwrap();
    assert_eq!(b2.len(), 45);
}

#[test]
fn groups_key_keeps_first_groups_in_order() {
    // docs/conventions.md mode order: group, then l, then cos before sin.
    let b = Basis::from_setup(&setup_v("graded", 20.27, "[basis]\ngroups = 3\n")).unwrap();
    let got: Vec<(String, Orientation)> = b
        .modes
        .iter()
        .map(|m| (m.label.clone(), m.orientation))
        .collect();
    use Orientation::*;
    let want = [
        ("LP01", Cos),
        ("LP11", Cos),
        ("LP11", Sin),
        ("LP02", Cos),
        ("LP21", Cos),
        ("LP21", Sin),
    ];
    assert_eq!(got.len(), 6);
    for (g, w) in got.iter().zip(want) {
        assert_eq!((g.0.as_str(), g.1), w);
    }
    for (i, m) in b.modes.iter().enumerate() {
        assert_eq!(m.index, i);
    }
    // neff descends group by group
    for w in b.modes.windows(2) {
        if w[1].group > w[0].group {
            assert!(w[1].neff < w[0].neff);
        }
    }
}

#[test]
fn tabulated_parabola_matches_graded_profile() {
    // A parabola given as a 201-row table solves like the power-law profile (common
    // practice, no source; linear interpolation error ~ (dr)^2).
    let d = tempfile::tempdir().unwrap();
    let n1 = (1.444f64.powi(2) + 0.01).sqrt();
    let mut csv = String::from("radius_um,index\n");
    for i in 0..=200 {
        let r = 10.0 * i as f64 / 200.0;
        let n2sq = n1 * n1 - 0.01 * (r / 10.0).powi(2);
        csv.push_str(&format!("{r},{}\n", n2sq.sqrt()));
    }
    std::fs::write(d.path().join("p.csv"), csv).unwrap();
    let v = 12.0;
    let lambda = 2.0 * std::f64::consts::PI * 10.0 * 0.1 / v * 1e3;
    let text = format!(
        "version = 1\n[light]\nwavelength_nm = {lambda}\n[camera]\npixel_pitch_um = 5.5\n\
         [fiber]\nprofile = \"table\"\ntable = \"p.csv\"\n"
    );
    let st = Setup::from_toml(&text, &d.path().join("s.toml")).unwrap();
    let bt = Basis::from_setup(&st).unwrap();
    let bg = Basis::from_setup(&setup_v("graded", v, "")).unwrap();
    assert_eq!(bt.len(), bg.len());
    for (x, y) in bt.modes.iter().zip(&bg.modes) {
        assert_eq!(x.label, y.label);
        assert!((x.b.unwrap() - y.b.unwrap()).abs() < 1e-4, "{}", x.label);
    }
}
