//! Matrix stage: launch layout, drift tracking, assembly, figures of merit, inversion,
//! random transfer matrices, result files and `modegram invert`.
use modegram::export::{read_npy, OutDir};
use modegram::matrix::haar::haar_unitary;
use modegram::matrix::*;
use ndarray::{array, Array2, Array3, Ix2};
use num_complex::Complex64;
use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};

fn c(re: f64, im: f64) -> Complex64 {
    Complex64::new(re, im)
}

fn real(m: &Array2<f64>) -> Array2<Complex64> {
    m.mapv(|x| c(x, 0.0))
}

/// |<a, b>|^2 / (|a|^2 |b|^2) of two vectors given as iterators.
fn fidelity<'a>(
    a: impl Iterator<Item = &'a Complex64> + Clone,
    b: impl Iterator<Item = &'a Complex64> + Clone,
) -> f64 {
    let ip: Complex64 = a.clone().zip(b.clone()).map(|(x, y)| x.conj() * y).sum();
    let na: f64 = a.map(|x| x.norm_sqr()).sum();
    let nb: f64 = b.map(|x| x.norm_sqr()).sum();
    ip.norm_sqr() / (na * nb)
}

/// The six-mode group structure of the first three parabolic groups (groups hold 1, 2, 3
/// spatial modes; shared/REFERENCES.md "Mode counts").
const GROUPS3: [u32; 6] = [1, 2, 2, 3, 3, 3];

// ---------------------------------------------------------------- figures of merit

/// Haar-random unitaries (Mezzadri 2007, Notices AMS 54, 592) have all singular values 1:
/// MDL 0 dB, IL 0 dB and unitarity error 0.
#[test]
fn haar_unitary_is_lossless() {
    let mut rng = rand::rngs::StdRng::seed_from_u64(3);
    let u = haar_unitary(12, &mut rng);
    let f = figures(&u, &GROUPS3, 2, 2, -20.0).unwrap();
    assert!(
        f.mode_dependent_loss_db.abs() < 1e-10,
        "{}",
        f.mode_dependent_loss_db
    );
    assert!(f.insertion_loss_db.abs() < 1e-10);
    assert!(f.unitarity_error < 1e-10, "{}", f.unitarity_error);
    assert!((f.condition_number - 1.0).abs() < 1e-10);
}

/// Ho & Kahn 2011 (Opt. Express 19, 16612) definitions, worked example of
/// shared/REFERENCES.md: diag(1, 0.5): MDL = 20 log10(2) = 6.0206 dB,
/// IL = -10 log10((1 + 0.25)/2) = 2.0412 dB.
#[test]
fn il_and_mdl_of_diag_worked_example() {
    let m = real(&array![[1.0, 0.0], [0.0, 0.5]]);
    let f = figures(&m, &[1, 2], 1, 1, -20.0).unwrap();
    assert!((f.mode_dependent_loss_db - 6.0206).abs() < 1e-4);
    assert!((f.insertion_loss_db - 2.0412).abs() < 1e-4);
    assert!((f.condition_number - 2.0).abs() < 1e-12);
    assert_eq!(f.singular_values.len(), 2);
    assert!((f.singular_values[0] - 1.0).abs() < 1e-12);
}

/// Non-diagonal 2x2 worked by hand from the Ho & Kahn definitions: M = [[1, 1], [0, 1]],
/// M^H M = [[1, 1], [1, 2]], eigenvalues (3 +- sqrt 5)/2 (singular values: the golden ratio
/// and its inverse), so MDL = 10 log10 of their ratio = 40 log10(1.618034) = 8.3595 dB and IL = -10 log10(tr / 2) = -10 log10(1.5) = -1.7609 dB. Group powers by hand
/// (rows 0/1 are groups 1/2): group 1 keeps all its power; group 2 sends 1 of 2 away (0 dB);
/// overall 1 leaving / 2 staying = -3.0103 dB. Random column phases change none of them.
#[test]
fn il_mdl_and_group_power_of_a_non_diagonal_matrix() {
    let m = real(&array![[1.0, 1.0], [0.0, 1.0]]);
    let lp = (3.0 + 5f64.sqrt()) / 2.0;
    let lm = (3.0 - 5f64.sqrt()) / 2.0;
    let mdl = 10.0 * (lp / lm).log10();
    assert!((mdl - 8.3595).abs() < 1e-4);
    for phases in [[0.0, 0.0], [1.1, -2.3]] {
        let mp = Array2::from_shape_fn((2, 2), |(i, j)| {
            m[(i, j)] * Complex64::from_polar(1.0, phases[j])
        });
        let f = figures(&mp, &[1, 2], 1, 1, -20.0).unwrap();
        assert!((f.mode_dependent_loss_db - mdl).abs() < 1e-10);
        assert!((f.insertion_loss_db + 10.0 * 1.5f64.log10()).abs() < 1e-12);
        assert!((f.insertion_loss_db + 1.7609).abs() < 1e-4);
        assert_eq!(f.group_crosstalk_db[0], f64::NEG_INFINITY);
        assert!(f.group_crosstalk_db[1].abs() < 1e-12);
        assert!((f.group_crosstalk_overall_db - 10.0 * 0.5f64.log10()).abs() < 1e-12);
        assert!((f.group_power[0][1] - 0.5).abs() < 1e-12);
        assert!((f.group_power_abs[1][1] - 1.0).abs() < 1e-12);
    }
}

/// The unitarity error from singular values equals ||G/m - I||_F / sqrt(N) with the Gram
/// matrix formed directly (definition in docs/matrix.md; common practice, no source).
#[test]
fn unitarity_error_matches_gram_matrix() {
    let mut rng = rand::rngs::StdRng::seed_from_u64(5);
    let m = Array2::from_shape_fn((12, 12), |_| {
        let x: f64 = StandardNormal.sample(&mut rng);
        let y: f64 = StandardNormal.sample(&mut rng);
        c(x, y)
    });
    let f = figures(&m, &GROUPS3, 2, 2, -20.0).unwrap();
    let g = m.t().mapv(|z| z.conj()).dot(&m);
    let mean = (0..12).map(|i| g[(i, i)].re).sum::<f64>() / 12.0;
    let mut e2 = 0.0;
    for i in 0..12 {
        for j in 0..12 {
            let id = if i == j { 1.0 } else { 0.0 };
            e2 += (g[(i, j)] / mean - id).norm_sqr();
        }
    }
    let direct = (e2 / 12.0).sqrt();
    assert!(
        (f.unitarity_error - direct).abs() < 1e-10 * direct.max(1.0),
        "{} vs {direct}",
        f.unitarity_error
    );
    assert!(f.unitarity_error > 0.1);
}

/// Polarisation crosstalk by hand (definition in src/matrix/analysis.rs; common practice, no
/// source): one mode, 2 pols -> 2 channels, M = [[1, 0.1], [0.1, 1]]: 0.01 of the power
/// crosses over, -20 dB per polarisation and overall.
#[test]
fn polarization_crosstalk_by_hand() {
    let m = real(&array![[1.0, 0.1], [0.1, 1.0]]);
    let f = figures(&m, &[1], 2, 2, -20.0).unwrap();
    let p = f.polarization_crosstalk_db.unwrap();
    assert!((p[0] + 20.0).abs() < 1e-10 && (p[1] + 20.0).abs() < 1e-10);
    assert!((f.polarization_crosstalk_overall_db.unwrap() + 20.0).abs() < 1e-10);
    let f1 = figures(&real(&array![[1.0, 0.0]]), &[1], 1, 2, -20.0).unwrap();
    assert!(f1.polarization_crosstalk_db.is_none());
}

/// A group whose rows carry 40 dB less power than the others is reported as cut off
/// (threshold -20 dB; common practice, no source).
#[test]
fn vanished_group_is_reported_cut_off() {
    let mut rng = rand::rngs::StdRng::seed_from_u64(9);
    let mut m = haar_unitary(12, &mut rng);
    for r in 0..12 {
        if GROUPS3[r % 6] == 3 {
            m.row_mut(r).mapv_inplace(|z| z * 0.01);
        }
    }
    let f = figures(&m, &GROUPS3, 2, 2, -20.0).unwrap();
    assert_eq!(f.cut_off_groups, vec![3]);
    let f = figures(&haar_unitary(12, &mut rng), &GROUPS3, 2, 2, -20.0).unwrap();
    assert!(f.cut_off_groups.is_empty());
}

// ---------------------------------------------------------------- launch layout

fn inp(pol: usize, mode: usize, repeat: usize) -> FrameRole {
    FrameRole::Input { pol, mode, repeat }
}
fn refr(k: usize) -> FrameRole {
    FrameRole::Reference { k }
}

/// Launch order of docs/conventions.md "Matrices", written out by hand for small cases.
#[test]
fn layout_frames_follow_the_contract() {
    let l = LaunchLayout::from_counts(2, 2, 2, 2, 0).unwrap();
    let want = vec![
        refr(0),
        inp(0, 0, 0),
        inp(0, 0, 1),
        inp(0, 1, 0),
        inp(0, 1, 1),
        refr(1),
        inp(1, 0, 0),
        inp(1, 0, 1),
        inp(1, 1, 0),
        inp(1, 1, 1),
        refr(2),
    ];
    assert_eq!(l.roles, want);
    assert_eq!(l.expected_frames(), 11);
    assert_eq!(l.reference_frames, vec![0, 5, 10]);
    assert_eq!(l.input_frames[2], vec![6, 7]);

    let l = LaunchLayout::from_counts(1, 4, 1, 3, 0).unwrap();
    let want = vec![
        refr(0),
        inp(0, 0, 0),
        inp(0, 1, 0),
        inp(0, 2, 0),
        refr(1),
        inp(0, 3, 0),
        refr(2),
    ];
    assert_eq!(l.roles, want);

    let l = LaunchLayout::from_counts(2, 1, 3, 0, 0).unwrap();
    let want = vec![
        inp(0, 0, 0),
        inp(0, 0, 1),
        inp(0, 0, 2),
        inp(1, 0, 0),
        inp(1, 0, 1),
        inp(1, 0, 2),
    ];
    assert_eq!(l.roles, want);
    assert!(l.reference_frames.is_empty());
}

/// The frame-count message names both counts and the arithmetic (issue text).
#[test]
fn frame_count_mismatch_names_both_counts() {
    let spec = modegram::setup::LaunchSpec {
        polarizations: vec!["H".into(), "V".into()],
        reference_every: 11,
        repeats: 2,
        ..Default::default()
    };
    let l = LaunchLayout::new(&spec, 55).unwrap();
    assert_eq!(l.expected_frames(), 231);
    l.validate_frames(231, "launch.stack").unwrap();
    let e = l
        .validate_frames(230, "launch.stack")
        .unwrap_err()
        .to_string();
    assert!(e.contains("230") && e.contains("231"), "{e}");
    assert!(
        e.contains("2 polarisations x 55 modes x repeats 2 + 11 reference launches"),
        "{e}"
    );
    let bad = modegram::setup::LaunchSpec {
        reference_input: 110,
        ..spec
    };
    let e = LaunchLayout::new(&bad, 55).unwrap_err().to_string();
    assert!(
        e.contains("launch.reference_input") && e.contains("110"),
        "{e}"
    );
}

// ---------------------------------------------------------------- drift and assembly

/// Coefficients of a launch sequence through `truth`, each frame multiplied by
/// exp(i theta_f), theta a linear drift plus a random walk.
fn synth_sequence(
    truth: &Array2<Complex64>,
    layout: &LaunchLayout,
    n_channels: usize,
    seed: u64,
) -> (Array3<Complex64>, Vec<f64>) {
    let n_modes = layout.n_modes;
    let n = layout.expected_frames();
    let mut rng = rand::rngs::StdRng::seed_from_u64(seed);
    let mut theta = Vec::with_capacity(n);
    let mut walk = 0.0;
    for f in 0..n {
        let step: f64 = StandardNormal.sample(&mut rng);
        walk += 0.003 * step;
        theta.push(0.25 * f as f64 + walk + 0.7);
    }
    let mut coeffs = Array3::<Complex64>::zeros((n, n_channels, n_modes));
    for f in 0..n {
        let col = match layout.role(f).unwrap() {
            FrameRole::Input { pol, mode, .. } => pol * n_modes + mode,
            FrameRole::Reference { .. } => layout.reference_input,
        };
        let ph = Complex64::from_polar(1.0, theta[f]);
        for ch in 0..n_channels {
            for m in 0..n_modes {
                coeffs[(f, ch, m)] = truth[(ch * n_modes + m, col)] * ph;
            }
        }
    }
    (coeffs, theta)
}

/// Drift removal (docs/matrix.md): with a known drift on every frame and references every
/// 3 inputs, the assembled matrix equals the truth up to one global phase (noise-free:
/// column fidelity >= 0.9999 and whole-matrix fidelity >= 0.999); the drift at the
/// references is recovered exactly; without tracking the column phases are arbitrary and
/// the whole-matrix fidelity is poor. Common practice, no source.
#[test]
fn drift_is_removed_up_to_a_global_phase() {
    let truth = random_transfer(&GROUPS3, 2, 2, 4.0, -15.0, PolMixing::Full, 21).unwrap();
    let layout = LaunchLayout::from_counts(2, 6, 2, 3, 4).unwrap();
    let (coeffs, theta) = synth_sequence(&truth, &layout, 2, 22);
    let asm = assemble(coeffs.view(), &layout, DriftPolicy::Require).unwrap();
    assert_eq!(asm.column_phases, ColumnPhases::DriftTracked);
    let d = asm.drift.as_ref().unwrap();
    for (k, &f) in d.reference_frames.iter().enumerate() {
        let want = theta[f] - theta[d.reference_frames[0]];
        assert!(
            (d.drift_rad[k] - want).abs() < 1e-9,
            "ref {k}: {} vs {want}",
            d.drift_rad[k]
        );
    }
    assert!(d.reference_power_rel_std < 1e-12);
    for col in 0..12 {
        let fc = fidelity(truth.column(col).iter(), asm.matrix.column(col).iter());
        assert!(fc >= 0.9999, "column {col}: {fc}");
    }
    let whole = fidelity(truth.iter(), asm.matrix.iter());
    assert!(whole >= 0.999, "whole-matrix fidelity {whole}");

    let off = assemble(coeffs.view(), &layout, DriftPolicy::Off).unwrap();
    assert_eq!(off.column_phases, ColumnPhases::Arbitrary);
    let whole_off = fidelity(truth.iter(), off.matrix.iter());
    assert!(
        whole_off < 0.5,
        "untracked whole-matrix fidelity {whole_off}"
    );
    // Phase-insensitive figures agree with and without tracking.
    let a = figures(&asm.matrix, &GROUPS3, 2, 2, -20.0).unwrap();
    let b = figures(&off.matrix, &GROUPS3, 2, 2, -20.0).unwrap();
    assert!((a.mode_dependent_loss_db - b.mode_dependent_loss_db).abs() < 0.05);
}

/// Asking for drift tracking without reference launches is an error naming the key.
#[test]
fn drift_tracking_without_references_is_an_error() {
    let layout = LaunchLayout::from_counts(2, 6, 1, 0, 0).unwrap();
    let coeffs = Array3::<Complex64>::from_elem((12, 2, 6), c(1.0, 0.0));
    let e = assemble(coeffs.view(), &layout, DriftPolicy::Require).unwrap_err();
    assert_eq!(e.exit_code(), 2);
    assert!(e.to_string().contains("reference_every"), "{e}");
    let ok = assemble(coeffs.view(), &layout, DriftPolicy::Auto).unwrap();
    assert_eq!(ok.column_phases, ColumnPhases::Arbitrary);
    let short = Array3::<Complex64>::zeros((11, 2, 6));
    let e = assemble(short.view(), &layout, DriftPolicy::Auto)
        .unwrap_err()
        .to_string();
    assert!(e.contains("11") && e.contains("12"), "{e}");
}

/// Standard error of two repeats by hand (common practice, no source): with sample variance
/// |a - b|^2 / 2 the standard error is |a - b| / 2; the entry is the mean. Without drift
/// tracking the second repeat is first turned to the first one's phase.
#[test]
fn repeats_are_averaged_with_standard_error() {
    let layout = LaunchLayout::from_counts(1, 1, 2, 0, 0).unwrap();
    let mut coeffs = Array3::<Complex64>::zeros((2, 1, 1));
    coeffs[(0, 0, 0)] = c(1.0, 0.0);
    coeffs[(1, 0, 0)] = c(0.0, 1.2); // same phase after alignment: 1.2
    let asm = assemble(coeffs.view(), &layout, DriftPolicy::Off).unwrap();
    assert!((asm.matrix[(0, 0)] - c(1.1, 0.0)).norm() < 1e-12);
    assert!((asm.stderr[(0, 0)] - 0.1).abs() < 1e-12);
    let one = LaunchLayout::from_counts(1, 1, 1, 0, 0).unwrap();
    let asm = assemble(
        coeffs.slice(ndarray::s![0..1, .., ..]),
        &one,
        DriftPolicy::Off,
    )
    .unwrap();
    assert_eq!(asm.stderr[(0, 0)], 0.0);
}

// ---------------------------------------------------------------- insertion-loss references

/// Insertion-loss references (docs/matrix.md): coefficients of a unitary device carrying
/// half the launched power with power_counts = 1000 give IL = 10 log10 2 = 3.0103 dB; a
/// back-to-back matrix of twice the amplitude gives IL_device = IL - IL_b2b = 6.0206 dB;
/// relative gives 0 dB. Ho & Kahn 2011 IL definition.
#[test]
fn insertion_loss_references() {
    let mut rng = rand::rngs::StdRng::seed_from_u64(13);
    let u = haar_unitary(12, &mut rng);
    let layout = LaunchLayout::from_counts(2, 6, 1, 0, 0).unwrap();
    let amp = (1000.0f64 * 0.5).sqrt();
    let coeffs = Array3::from_shape_fn((12, 2, 6), |(f, ch, m)| u[(ch * 6 + m, f)] * amp);
    let asm = assemble(coeffs.view(), &layout, DriftPolicy::Auto).unwrap();
    let mut opts = AnalysisOptions::new(&GROUPS3);
    opts.loss = LossReference::PowerCounts(1000.0);
    let a = analyse(&asm, &opts).unwrap();
    assert!((a.summary.figures.insertion_loss_db - 3.0103).abs() < 1e-4);
    assert_eq!(a.summary.insertion_loss_reference, "power_counts");
    opts.loss = LossReference::BackToBack(u.mapv(|z| z * 2.0 * amp));
    let a = analyse(&asm, &opts).unwrap();
    assert!((a.summary.figures.insertion_loss_db - 6.0206).abs() < 1e-4);
    assert!(a.summary.back_to_back_insertion_loss_db.is_some());
    opts.loss = LossReference::Relative;
    let a = analyse(&asm, &opts).unwrap();
    assert!(a.summary.figures.insertion_loss_db.abs() < 1e-12);
    assert_eq!(a.summary.column_phases, "arbitrary");
    opts.loss = LossReference::BackToBack(Array2::zeros((3, 3)));
    let e = analyse(&asm, &opts).unwrap_err().to_string();
    assert!(e.contains("(3, 3)") && e.contains("(12, 12)"), "{e}");
}

// ---------------------------------------------------------------- random transfer matrices

/// random_transfer (construction in src/matrix/random.rs): the requested MDL is reproduced
/// exactly (MDL definition of Ho & Kahn 2011), the overall group crosstalk equals the request,
/// per-group values scatter around it; no crosstalk gives an exactly block-diagonal matrix,
/// and PolMixing::None leaves the polarisations apart.
#[test]
fn random_transfer_has_requested_mdl_and_crosstalk() {
    let groups: Vec<u32> = (1..=4u32)
        .flat_map(|g| std::iter::repeat_n(g, g as usize))
        .collect();
    for (mix, mdl, xt) in [
        (PolMixing::Full, 6.0, -20.0),
        (PolMixing::Rotation, 3.0, -25.0),
        (PolMixing::None, 10.0, -15.0),
    ] {
        let m = random_transfer(&groups, 2, 2, mdl, xt, mix, 77).unwrap();
        assert_eq!(m.dim(), (20, 20));
        let f = figures(&m, &groups, 2, 2, -20.0).unwrap();
        assert!(
            (f.mode_dependent_loss_db - mdl).abs() < 1e-8,
            "{mix:?}: {}",
            f.mode_dependent_loss_db
        );
        assert!(f.insertion_loss_db.abs() < 1e-10);
        assert!(
            (f.group_crosstalk_overall_db - xt).abs() < 0.01,
            "{mix:?}: {}",
            f.group_crosstalk_overall_db
        );
        for (g, x) in f.group_crosstalk_db.iter().enumerate() {
            assert!((x - xt).abs() < 4.0, "{mix:?} group {g}: {x} dB vs {xt}");
        }
        if mix == PolMixing::None {
            assert_eq!(f.polarization_crosstalk_overall_db, Some(f64::NEG_INFINITY));
        }
    }
    let m = random_transfer(&groups, 2, 2, 5.0, f64::NEG_INFINITY, PolMixing::Full, 1).unwrap();
    let n = groups.len();
    for ((r, col), z) in m.indexed_iter() {
        if groups[r % n] != groups[col % n] {
            assert_eq!(*z, c(0.0, 0.0));
        }
    }
    assert_eq!(
        m,
        random_transfer(&groups, 2, 2, 5.0, f64::NEG_INFINITY, PolMixing::Full, 1).unwrap()
    );
    assert!(random_transfer(&groups, 2, 1, 5.0, -20.0, PolMixing::None, 1).is_err());
}

// ---------------------------------------------------------------- inversion

/// Inversion (Tikhonov / pseudo-inverse, src/matrix/invert.rs): for a well-conditioned
/// matrix the predicted output of the computed input matches the target to 1e-6, the
/// default regularisation is reported. Common practice, no source.
#[test]
fn inversion_reaches_targets() {
    let m = random_transfer(&GROUPS3, 2, 2, 6.0, -20.0, PolMixing::Full, 31).unwrap();
    let mut rng = rand::rngs::StdRng::seed_from_u64(32);
    let y = Array2::from_shape_fn((3, 12), |_| {
        let a: f64 = StandardNormal.sample(&mut rng);
        let b: f64 = StandardNormal.sample(&mut rng);
        c(a, b)
    });
    let r = invert_targets(&m, &y, Regularization::Default).unwrap();
    assert_eq!(r.inputs.dim(), (3, 12));
    let pred = r.inputs.dot(&m.t());
    for t in 0..3 {
        for i in 0..12 {
            assert!((pred[(t, i)] - y[(t, i)]).norm() < 1e-6);
            assert!((r.predicted[(t, i)] - y[(t, i)]).norm() < 1e-6);
        }
        assert!(r.report.fidelity[t] > 1.0 - 1e-10);
        assert!(r.report.relative_residual[t] < 1e-6);
    }
    assert_eq!(r.report.regularization_source, "default");
    assert!((r.report.regularization_relative - 1e-6).abs() < 1e-18);
    assert!((r.report.condition_number - 10f64.powf(6.0 / 20.0)).abs() < 1e-8);
}

/// An ill-conditioned matrix is refused with its condition number unless a regularisation
/// is given; then the condition number and a warning are reported. A singular matrix is
/// refused likewise; a target of the wrong length names both lengths.
#[test]
fn ill_conditioned_and_singular_matrices() {
    let m = real(&array![[1.0, 0.0], [0.0, 1e-8]]);
    let y = real(&array![[1.0, 1.0]]);
    let e = invert_targets(&m, &y, Regularization::Default)
        .unwrap_err()
        .to_string();
    assert!(e.contains("condition number 1.000e8"), "{e}");
    let r = invert_targets(&m, &y, Regularization::Relative(1e-3)).unwrap();
    assert!((r.report.condition_number - 1e8).abs() < 1.0);
    assert_eq!(r.report.regularization_source, "relative");
    assert!(!r.report.warnings.is_empty());
    // lambda = 1e-3: the weak direction is suppressed, x_1 = 1e-8 / (1e-16 + 1e-6).
    assert!((r.inputs[(0, 1)].re - 1e-8 / (1e-16 + 1e-6)).abs() < 1e-9);
    let singular = real(&array![[1.0, 1.0], [1.0, 1.0]]);
    let e = invert_targets(&singular, &y, Regularization::Default).unwrap_err();
    assert_eq!(e.exit_code(), 2);
    assert!(e.to_string().contains("condition number"), "{e}");
    let e = invert_targets(&m, &real(&array![[1.0, 1.0, 1.0]]), Regularization::Default)
        .unwrap_err()
        .to_string();
    assert!(e.contains("length 3") && e.contains("2 outputs"), "{e}");
}

// ---------------------------------------------------------------- result files

/// The result files: NPY round trip, CSV long format, summary.json keys of
/// shared/interface.md; an existing result is kept without --force.
#[test]
fn result_files_round_trip() {
    let truth = random_transfer(&GROUPS3, 2, 2, 3.0, -20.0, PolMixing::Full, 41).unwrap();
    let layout = LaunchLayout::from_counts(2, 6, 2, 4, 0).unwrap();
    let (coeffs, _) = synth_sequence(&truth, &layout, 2, 42);
    let asm = assemble(coeffs.view(), &layout, DriftPolicy::Auto).unwrap();
    let cap = vec![0.97; layout.expected_frames()];
    let mut opts = AnalysisOptions::new(&GROUPS3);
    opts.captured_power = Some(&cap);
    let a = analyse(&asm, &opts).unwrap();
    let dir = tempfile::tempdir().unwrap();
    let out = OutDir::create(dir.path(), false).unwrap();
    write_matrix_files(&out, &a).unwrap();
    let m: Array2<Complex64> = read_npy::<Complex64, Ix2>(&out.file("matrix.npy")).unwrap();
    assert_eq!(m, a.matrix);
    let e: Array2<f64> = read_npy::<f64, Ix2>(&out.file("matrix_stderr.npy")).unwrap();
    assert_eq!(e.dim(), (12, 12));
    let csv = std::fs::read_to_string(out.file("matrix.csv")).unwrap();
    let mut lines = csv.lines();
    assert_eq!(lines.next(), Some("row,col,re,im,stderr"));
    let second: Vec<&str> = lines.nth(1).unwrap().split(',').collect();
    assert_eq!(&second[..2], &["0", "1"]);
    assert!(
        (second[2].parse::<f64>().unwrap() - m[(0, 1)].re).abs()
            < 1e-12 * m[(0, 1)].norm().max(1.0)
    );
    assert_eq!(csv.lines().count(), 145);
    let j: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.file("summary.json")).unwrap()).unwrap();
    for key in [
        "insertion_loss_db",
        "mode_dependent_loss_db",
        "singular_values",
        "unitarity_error",
        "condition_number",
        "group_power",
        "group_crosstalk_db",
        "captured_power",
        "drift_rad",
        "column_phases",
        "insertion_loss_reference",
    ] {
        assert!(j.get(key).is_some(), "summary.json lacks {key}");
    }
    assert_eq!(j["column_phases"], "drift_tracked");
    assert_eq!(j["group_power"].as_array().unwrap().len(), 3);
    assert!((j["captured_power"].as_f64().unwrap() - 0.97).abs() < 1e-12);
    let table = summary_table(&a.summary);
    assert!(table.contains("mode-dependent loss") && table.contains("group power"));
    let e = write_matrix_files(&out, &a).unwrap_err();
    assert_eq!(e.exit_code(), 2);
}

// ---------------------------------------------------------------- modegram invert

mod cli {
    use super::*;
    use assert_cmd::cargo::cargo_bin_cmd;

    fn setup_files(dir: &std::path::Path, m: &Array2<Complex64>, y: &Array2<Complex64>) {
        let out = OutDir::create(dir, true).unwrap();
        out.write_npy("m.npy", m).unwrap();
        out.write_npy("y.npy", y).unwrap();
    }

    #[test]
    fn invert_writes_inputs_and_predictions() {
        let d = tempfile::tempdir().unwrap();
        let m = random_transfer(&GROUPS3, 2, 2, 3.0, -20.0, PolMixing::Full, 51).unwrap();
        let y = Array2::from_shape_fn((2, 12), |(t, i)| c((t + i) as f64, 0.5));
        setup_files(d.path(), &m, &y);
        let res = d.path().join("res");
        cargo_bin_cmd!("modegram")
            .arg("invert")
            .arg(d.path().join("m.npy"))
            .arg(d.path().join("y.npy"))
            .arg("--out")
            .arg(&res)
            .assert()
            .success();
        let x: Array2<Complex64> = read_npy::<Complex64, Ix2>(&res.join("inputs.npy")).unwrap();
        let p: Array2<Complex64> = read_npy::<Complex64, Ix2>(&res.join("predicted.npy")).unwrap();
        assert_eq!(x.dim(), (2, 12));
        for (a, b) in p.iter().zip(y.iter()) {
            assert!((a - b).norm() < 1e-6);
        }
        let j: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(res.join("invert.json")).unwrap())
                .unwrap();
        assert_eq!(j["regularization_source"], "default");
        // Existing results are kept without --force (exit 2).
        cargo_bin_cmd!("modegram")
            .arg("invert")
            .arg(d.path().join("m.npy"))
            .arg(d.path().join("y.npy"))
            .arg("--out")
            .arg(&res)
            .assert()
            .code(2);
        // CSV target, re,im per output row.
        let csv: String = (0..12)
            .map(|i| format!("{},{}\n", y[(0, i)].re, y[(0, i)].im))
            .collect();
        std::fs::write(d.path().join("y.csv"), format!("re,im\n{csv}")).unwrap();
        let res2 = d.path().join("res2");
        cargo_bin_cmd!("modegram")
            .arg("invert")
            .arg(d.path().join("m.npy"))
            .arg(d.path().join("y.csv"))
            .args(["--relative-regularization", "0", "--json", "--out"])
            .arg(&res2)
            .assert()
            .success();
        let p: Array2<Complex64> = read_npy::<Complex64, Ix2>(&res2.join("predicted.npy")).unwrap();
        assert_eq!(p.dim(), (1, 12));
        assert!((p[(0, 5)] - y[(0, 5)]).norm() < 1e-9);
    }

    #[test]
    fn invert_bad_input_exits_2_and_writes_nothing() {
        let d = tempfile::tempdir().unwrap();
        let m = random_transfer(&GROUPS3, 2, 2, 3.0, -20.0, PolMixing::Full, 52).unwrap();
        let y = Array2::from_elem((1, 11), c(1.0, 0.0));
        setup_files(d.path(), &m, &y);
        let res = d.path().join("res");
        let a = cargo_bin_cmd!("modegram")
            .arg("invert")
            .arg(d.path().join("m.npy"))
            .arg(d.path().join("y.npy"))
            .arg("--out")
            .arg(&res)
            .assert()
            .code(2);
        let err = String::from_utf8_lossy(&a.get_output().stderr).to_string();
        assert!(
            err.contains("length 11") && err.contains("12 outputs"),
            "{err}"
        );
        assert!(!res.exists());
        // Singular matrix.
        let out = OutDir::create(d.path(), true).unwrap();
        out.write_npy("s.npy", &real(&array![[1.0, 2.0], [2.0, 4.0]]))
            .unwrap();
        out.write_npy("y2.npy", &ndarray::arr1(&[c(1.0, 0.0), c(0.0, 1.0)]))
            .unwrap();
        let a = cargo_bin_cmd!("modegram")
            .arg("invert")
            .arg(d.path().join("s.npy"))
            .arg(d.path().join("y2.npy"))
            .arg("--out")
            .arg(&res)
            .assert()
            .code(2);
        let err = String::from_utf8_lossy(&a.get_output().stderr).to_string();
        assert!(err.contains("condition number"), "{err}");
        assert!(!res.exists());
        // Image target without a basis, unknown format.
        std::fs::write(d.path().join("t.png"), b"not really").unwrap();
        for t in ["t.png", "y.txt"] {
            cargo_bin_cmd!("modegram")
                .arg("invert")
                .arg(d.path().join("s.npy"))
                .arg(d.path().join(t))
                .arg("--out")
                .arg(&res)
                .assert()
                .code(2);
        }
        assert!(!res.exists());
    }
}
