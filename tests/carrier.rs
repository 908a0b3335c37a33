//! Hands-off decoding: the automatic carrier on simulated launch sequences (the simulator in
//! src/synth, written from the physics of docs/conventions.md), against the carrier the
//! simulation used.
//!
//! Acceptance figures (common practice, no source): the automatic carrier within 0.05 FFT
//! bin of the true sideband centre; per-frame coefficient fidelity |<a, b>| / (|a| |b|) of
//! at least 0.9999 between decoding with the automatic and with the true carrier; the
//! calibration converges; it fits rotation and scale only when the data call for them.
use modegram::align::calibrate::{calibrate, decode_raw, fold_tilt};
use modegram::align::fit::FitSpec;
use modegram::decode::{decode_stack, DecodeOptions, Decoded};
use modegram::export::OutDir;
use modegram::grid::{Alignment, Grid};
use modegram::modes::Basis;
use modegram::setup::{AutoOr, Setup};
use modegram::synth::{self, Scenario, SetupOptions};
use num_complex::Complex64;
use std::path::PathBuf;

/// One simulated channel's geometry.
#[derive(Clone, Copy)]
struct Chan {
    region: [usize; 4],
    carrier: [f64; 2],
    center_um: [f64; 2],
    rotation_deg: f64,
    scale: f64,
    tilt_mrad: [f64; 2],
    defocus_um: f64,
}

impl Chan {
    fn at(region: [usize; 4], carrier: [f64; 2]) -> Chan {
        Chan {
            region,
            carrier,
            center_um: [1.2, -0.8],
            rotation_deg: 0.0,
            scale: 1.0,
            tilt_mrad: [0.0, 0.0],
            defocus_um: 3.0,
        }
    }
}

/// An invented few-mode graded-index fibre at 1310 nm, 4 LP groups (10 modes), two output
/// polarisations on one 320 x 192 sensor; `transfer` is the scenario's [transfer] table.
fn scenario_text(chans: &[Chan; 2], groups: usize, transfer: &str, seed: u64) -> String {
    let ch = |name: &str, c: &Chan| {
        format!(
            "[[channel]]\nname = \"{name}\"\nregion = {:?}\nmagnification = 15.0\n\
             signal_counts = 4.0e6\ncenter_um = {:?}\nrotation_deg = {}\nscale = {}\n\
             tilt_mrad = {:?}\ndefocus_um = {}\ncarrier = {:?}\nreference_waist_px = 300.0\n\
             reference_offset_px = [5.0, -4.0]\nreference_peak_counts = 6000.0\n",
            c.region, c.center_um, c.rotation_deg, c.scale, c.tilt_mrad, c.defocus_um, c.carrier
        )
    };
    format!(
        "version = 1\nseed = {seed}\n[light]\nwavelength_nm = 1310.0\n[camera]\n\
         pixel_pitch_um = 4.8\nfill_factor = 0.9\n[fiber]\nprofile = \"graded\"\n\
         core_radius_um = 9.0\nna = 0.2\ncladding_index = 1.447\nalpha = 2.0\n[basis]\n\
         kind = \"lp\"\ngroups = {groups}\n[sensor]\nwidth_px = 320\nheight_px = 192\n\
         bit_depth = 16\ngain_e_per_count = 0.5\nread_noise_counts = 3.0\n\
         dark_offset_counts = 100.0\nsubpixels = 2\n{}{}{transfer}\n[launch]\n\
         polarizations = [\"H\", \"V\"]\nreference_every = 0\nrepeats = 1\n[noise]\n\
         shot = true\nread = true\nquantisation = true\nsaturation = true\n\
         calibration_averages = 16\n[drift]\nstep_rad = 0.0\nrate_rad_per_frame = 0.0\n",
        ch("H", &chans[0]),
        ch("V", &chans[1])
    )
}

const RANDOM: &str =
    "[transfer]\nkind = \"random\"\nmdl_db = 1.0\ninsertion_loss_db = 0.5\npol_mixing = \"full\"\n";

struct Case {
    _dir: tempfile::TempDir,
    setup: Setup,
    stack: PathBuf,
    basis: Basis,
}

/// Simulate `text` (optionally with a transfer matrix file) and load the setup it writes
/// (automatic carrier, the true alignment unless `nominal`).
fn simulate(text: &str, matrix: Option<ndarray::Array2<Complex64>>, nominal: bool) -> Case {
    let dir = tempfile::tempdir().unwrap();
    if let Some(m) = matrix {
        ndarray_npy::write_npy(dir.path().join("transfer.npy"), &m).unwrap();
    }
    let path = dir.path().join("scenario.toml");
    std::fs::write(&path, text).unwrap();
    let scn = Scenario::load(&path).unwrap();
    let sb = synth::basis::solve(&scn).unwrap();
    let groups = synth::basis::groups(&sb);
    let sampler = |g: &Grid, a: &Alignment| synth::basis::sample(&sb, g, a);
    let sim = synth::simulate(&scn, &groups, &sampler, &|| {}).unwrap();
    let out = OutDir::create(dir.path().join("sim"), false).unwrap();
    let opts = SetupOptions {
        auto_carrier: true,
        true_alignment: !nominal,
    };
    synth::write_all(&out, &scn, &sim, opts).unwrap();
    let mut setup = Setup::load(&dir.path().join("sim/setup.toml")).unwrap();
    // The user's one decision: which half-plane the signal's sideband is in.
    for (ch, c) in setup.channels.iter_mut().zip(&scn.channels) {
        ch.conjugate = c.carrier[0] < 0.0 || (c.carrier[0] == 0.0 && c.carrier[1] < 0.0);
    }
    let stack = setup.resolve(setup.frames.stack.as_ref().unwrap());
    let basis = Basis::from_setup(&setup).unwrap();
    Case {
        _dir: dir,
        setup,
        stack,
        basis,
    }
}

fn decode(case: &Case, carriers: Option<Vec<Option<[f64; 2]>>>) -> Decoded {
    let sampler = |g: &Grid, a: &Alignment| Ok(case.basis.sample(g, a));
    let opts = DecodeOptions {
        carriers,
        ..Default::default()
    };
    decode_stack(
        &case.setup,
        Some(&sampler),
        std::slice::from_ref(&case.stack),
        &opts,
        &|_| {},
    )
    .unwrap()
}

/// The sideband's true centre: the carrier plus the field's tilt as a spatial frequency
/// (docs/conventions.md: tilt phase +k t.x, fibre-plane pitch 4.8 / 15 um).
fn true_centre(c: &Chan) -> [f64; 2] {
    let k = 1e-3 * (4.8 / 15.0) / 1.310;
    [
        c.carrier[0] + k * c.tilt_mrad[0],
        c.carrier[1] + k * c.tilt_mrad[1],
    ]
}

/// Worst per-frame fidelity between two decodings.
fn worst_fidelity(a: &Decoded, b: &Decoded) -> f64 {
    let (nf, nc, nm) = a.coefficients.dim();
    let mut worst: f64 = 1.0;
    for f in 0..nf {
        for c in 0..nc {
            let (mut ip, mut pa, mut pb) = (Complex64::new(0.0, 0.0), 0.0, 0.0);
            for m in 0..nm {
                let (x, y) = (a.coefficients[[f, c, m]], b.coefficients[[f, c, m]]);
                ip += x.conj() * y;
                pa += x.norm_sqr();
                pb += y.norm_sqr();
            }
            if pa > 0.0 && pb > 0.0 {
                worst = worst.min(ip.norm() / (pa * pb).sqrt());
            }
        }
    }
    worst
}

fn check_carriers(case: &Case, chans: &[Chan; 2], what: &str) -> Decoded {
    let d = decode(case, None);
    for (info, c) in d.channels.iter().zip(chans) {
        let t = true_centre(c);
        let bins = [
            (info.carrier_cycles_per_px[0] - t[0]) * c.region[2] as f64,
            (info.carrier_cycles_per_px[1] - t[1]) * c.region[3] as f64,
        ];
        eprintln!(
            "{what} {}: carrier {:?} ({}), true {t:?}, error {bins:.3?} bins",
            info.name, info.carrier_cycles_per_px, info.carrier_source
        );
        assert!(
            bins[0].abs() <= 0.05 && bins[1].abs() <= 0.05,
            "{what} channel {}: automatic carrier {:?} is {bins:?} FFT bins from {t:?}",
            info.name,
            info.carrier_cycles_per_px
        );
        assert!(info.carrier_uncertainty_cycles_per_px.is_some());
    }
    d
}

/// Eight reference directions (both half-planes, near each axis and on the diagonals),
/// carriers 0.2 - 0.33 cycles/px, regions away from the frame's corner, with shot, read and
/// quantisation noise; the calibration converges on each.
#[test]
fn automatic_carrier_in_eight_directions() {
    let dirs: [(f64, f64); 8] = [
        (8.0, 0.26),
        (82.0, 0.22),
        (45.0, 0.30),
        (-40.0, 0.24),
        (98.0, 0.28),
        (172.0, 0.20),
        (-135.0, 0.33),
        (-95.0, 0.25),
    ];
    let r1 = [18, 30, 128, 128];
    let r2 = [170, 44, 128, 128];
    for (k, pair) in dirs.chunks(2).enumerate() {
        let cv = |(a, f): (f64, f64)| {
            let r = a.to_radians();
            [f * r.cos(), f * r.sin()]
        };
        let chans = [Chan::at(r1, cv(pair[0])), Chan::at(r2, cv(pair[1]))];
        let case = simulate(&scenario_text(&chans, 4, RANDOM, 7 + k as u64), None, false);
        let auto = check_carriers(&case, &chans, &format!("directions {pair:?}"));
        let truth = decode(
            &case,
            Some(chans.iter().map(|c| Some(true_centre(c))).collect()),
        );
        let fid = worst_fidelity(&auto, &truth);
        eprintln!("directions {pair:?}: worst per-frame fidelity {fid:.7}");
        assert!(fid >= 0.9999, "fidelity {fid} for {pair:?}");
        let (fits, _) = run_calibration(&case);
        for f in &fits {
            assert!(f.converged, "calibration for {pair:?}: {}", f.message);
        }
    }
}

/// A launch sequence that excites only the two highest groups (ring- and lobe-shaped
/// spectra, whose maximum is away from the sideband's centre): every input goes to a
/// random combination of the top-group modes.
#[test]
fn automatic_carrier_with_ring_spectra_only() {
    let chans = [
        Chan::at([24, 36, 128, 128], [0.27, 0.09]),
        Chan::at([176, 30, 128, 128], [-0.12, 0.25]),
    ];
    // 4 groups: modes 0 (LP01), 1-2 (LP11), 3-5 (LP02, LP21), 6-9 (LP12, LP31): 10 modes.
    let n = 10;
    let top: Vec<usize> = (3..n).collect();
    let mut m = ndarray::Array2::<Complex64>::zeros((2 * n, 2 * n));
    let mut s: u64 = 12345;
    let mut rnd = || {
        s = s
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        ((s >> 11) as f64 / (1u64 << 53) as f64) - 0.5
    };
    for j in 0..2 * n {
        for ch in 0..2 {
            for &i in &top {
                m[[ch * n + i, j]] = Complex64::new(rnd(), rnd()) * 0.3;
            }
        }
    }
    let transfer = "[transfer]\nkind = \"file\"\nfile = \"transfer.npy\"\n";
    let text = scenario_text(&chans, 4, transfer, 99);
    let case = simulate(&text, Some(m), false);
    let auto = check_carriers(&case, &chans, "ring spectra");
    let truth = decode(
        &case,
        Some(chans.iter().map(|c| Some(true_centre(c))).collect()),
    );
    let fid = worst_fidelity(&auto, &truth);
    eprintln!("ring spectra: worst per-frame fidelity {fid:.7}");
    assert!(fid >= 0.9999, "fidelity {fid}");
}

fn run_calibration(case: &Case) -> (Vec<modegram::align::fit::ChannelFit>, Vec<[f64; 2]>) {
    let raw = decode_raw(&case.setup, std::slice::from_ref(&case.stack), &|_| {}).unwrap();
    let used: Vec<[f64; 2]> = raw.info.iter().map(|i| i.carrier_cycles_per_px).collect();
    let fits = calibrate(
        &case.setup,
        &case.basis,
        &raw,
        None,
        &FitSpec::default(),
        &|_, _| {},
    )
    .unwrap();
    (fits, used)
}

/// No rotation and no scale error, nominal alignment in the setup: the calibration
/// converges, keeps 0 deg and 1.0, says so, and the carrier it records (fitted tilt folded
/// in) is the sideband's true centre.
#[test]
fn calibration_holds_what_the_data_do_not_determine() {
    let mut chans = [
        Chan::at([20, 32, 128, 128], [0.24, 0.12]),
        Chan::at([172, 40, 128, 128], [0.21, -0.16]),
    ];
    chans[0].tilt_mrad = [0.9, -0.6];
    chans[1].tilt_mrad = [-0.5, 0.7];
    let case = simulate(&scenario_text(&chans, 4, RANDOM, 3), None, true);
    let (fits, used) = run_calibration(&case);
    let dec = fold_tilt(&case.setup, &used, &fits);
    for ((f, c), d) in fits.iter().zip(&chans).zip(&dec) {
        assert!(f.converged, "{}", f.message);
        for p in ["rotation_deg", "scale"] {
            let x = f.decisions.iter().find(|d| d.parameter == p).unwrap();
            assert!(!x.fitted, "{p} fitted without cause: {}", x.reason);
        }
        assert_eq!(f.fitted.rotation_deg, 0.0);
        assert_eq!(f.fitted.scale, 1.0);
        let got = d.carrier_cycles_per_px.expect("automatic carrier folded");
        let t = true_centre(c);
        let bins = [(got[0] - t[0]) * 128.0, (got[1] - t[1]) * 128.0];
        eprintln!("recorded carrier {got:?} vs {t:?}: {bins:.4?} bins");
        assert!(bins[0].abs() < 0.05 && bins[1].abs() < 0.05, "{bins:?}");
        assert!((f.fitted.center_um[0] - c.center_um[0]).abs() < 0.1 * 9.0);
    }
}

/// A 2 % scale error in one channel and a 3 deg rotation seen by an incomplete basis (the
/// decoding basis drops the sin members of each LP pair; each launch excites one fibre
/// mode, and only cos modes are lit, so the pattern's orientation is seen): both fitted, within three of their
/// stated standard deviations.
#[test]
fn calibration_fits_scale_and_rotation_when_present() {
    let mut chans = [
        Chan::at([20, 32, 128, 128], [0.24, 0.12]),
        Chan::at([172, 40, 128, 128], [0.21, -0.16]),
    ];
    chans[0].scale = 1.02;
    chans[1].rotation_deg = 3.0;
    // 3 groups: 6 modes per polarisation in the documented order LP01, LP11 cos, LP11 sin,
    // LP02, LP21 cos, LP21 sin (docs/conventions.md). Every launch arrives in one cos (or
    // round) mode: a set of launches that fills cos and sin equally would capture the same
    // power at every rotation.
    let n = 6;
    let partner = [0usize, 1, 1, 3, 4, 4];
    let mut eye = ndarray::Array2::<Complex64>::zeros((2 * n, 2 * n));
    for p in 0..2 {
        for k in 0..n {
            eye[[p * n + partner[k], p * n + k]] = Complex64::new(1.0, 0.0);
        }
    }
    let file = "[transfer]\nkind = \"file\"\nfile = \"transfer.npy\"\n";
    let mut case = simulate(&scenario_text(&chans, 3, file, 5), Some(eye), true);
    // Incomplete basis for the rotation: only the cos members (orientation "a").
    case.basis
        .retain(|m| m.orientation != modegram::modes::basis::Orientation::Sin);
    let (fits, _) = run_calibration(&case);
    let s = &fits[0];
    assert!(s.converged, "{}", s.message);
    let us = s.uncertainty.scale.expect("scale fitted");
    eprintln!("scale {} +- {us}", s.fitted.scale);
    // Three stated standard deviations, and no less than 5e-4 of scale or 0.05 deg: the
    // stated figure is the white-noise bound and leaves out model error such as the pixel
    // aperture's residual (common practice, no source).
    assert!(
        (s.fitted.scale - 1.02).abs() <= (3.0 * us).max(5e-4),
        "{s:?}"
    );
    let r = &fits[1];
    assert!(r.converged, "{}", r.message);
    let ur = r.uncertainty.rotation_deg.expect("rotation fitted");
    eprintln!("rotation {} +- {ur}", r.fitted.rotation_deg);
    assert!(
        (r.fitted.rotation_deg - 3.0).abs() <= (3.0 * ur).max(0.05),
        "{r:?}"
    );
    let held = |f: &modegram::align::fit::ChannelFit, p: &str| {
        !f.decisions
            .iter()
            .find(|d| d.parameter == p)
            .unwrap()
            .fitted
    };
    assert!(!held(s, "scale") && !held(r, "rotation_deg"));
}

/// Regression: a carrier given 3 FFT bins off still calibrates, and the fitted tilt absorbs
/// the error (3 bins of 128 px = 3/128 cycles/px = tilt 3/128 * lambda / pitch).
#[test]
fn carrier_three_bins_off_is_absorbed_by_the_tilt() {
    let chans = [
        Chan::at([20, 32, 128, 128], [0.24, 0.12]),
        Chan::at([172, 40, 128, 128], [0.21, -0.16]),
    ];
    let mut case = simulate(&scenario_text(&chans, 4, RANDOM, 11), None, true);
    let off = [3.0 / 128.0, -3.0 / 128.0];
    for (ch, c) in case.setup.channels.iter_mut().zip(&chans) {
        ch.carrier = AutoOr::Value([c.carrier[0] + off[0], c.carrier[1] + off[1]]);
    }
    let (fits, _) = run_calibration(&case);
    let per_mrad = 1e-3 * (4.8 / 15.0) / 1.310;
    for (f, c) in fits.iter().zip(&chans) {
        assert!(f.converged, "{}", f.message);
        let want = [
            c.tilt_mrad[0] - off[0] / per_mrad,
            c.tilt_mrad[1] - off[1] / per_mrad,
        ];
        let t = f.fitted.tilt_mrad;
        eprintln!("fitted tilt {t:?}, expected {want:?}");
        let bin = (1.0 / 128.0) / per_mrad;
        assert!(
            (t[0] - want[0]).abs() < 0.05 * bin && (t[1] - want[1]).abs() < 0.05 * bin,
            "{t:?} vs {want:?}"
        );
        assert!(f.captured_after > 0.98, "{}", f.captured_after);
    }
}

/// The calibration and the decode give bit-identical results on 1 and 2 threads
/// (DEVELOPERS.md: sums are split in fixed chunks and added in a fixed order).
#[test]
fn calibration_and_decode_do_not_depend_on_the_thread_count() {
    let setup = Setup::load(std::path::Path::new("frames-demo/setup.toml")).unwrap();
    let basis = Basis::from_setup(&setup).unwrap();
    let stack = setup.resolve(setup.frames.stack.as_ref().unwrap());
    let go = |threads: usize| {
        rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap()
            .install(|| {
                let raw = decode_raw(&setup, std::slice::from_ref(&stack), &|_| {}).unwrap();
                let fits =
                    calibrate(&setup, &basis, &raw, None, &FitSpec::default(), &|_, _| {}).unwrap();
                let sampler = |g: &Grid, a: &Alignment| Ok(basis.sample(g, a));
                let al: Vec<Alignment> = fits.iter().map(|f| f.fitted).collect();
                let opts = DecodeOptions {
                    alignments: Some(al),
                    ..Default::default()
                };
                let d = decode_stack(
                    &setup,
                    Some(&sampler),
                    std::slice::from_ref(&stack),
                    &opts,
                    &|_| {},
                )
                .unwrap();
                (fits, d.coefficients)
            })
    };
    let (f1, c1) = go(1);
    let (f2, c2) = go(2);
    for (a, b) in f1.iter().zip(&f2) {
        assert_eq!(
            a.fitted, b.fitted,
            "fitted alignment differs between 1 and 2 threads"
        );
        assert_eq!(a.captured_after.to_bits(), b.captured_after.to_bits());
    }
    assert!(
        c1.iter().zip(c2.iter()).all(|(x, y)| x == y),
        "coefficients differ"
    );
}
