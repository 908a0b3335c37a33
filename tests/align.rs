//! Alignment: `modegram calibrate`, `modegram check`, `modegram watch` on simulated launch
//! sequences (`modegram synth`) with known misalignment, and their bad-input behaviour.
//!
//! Tolerances of the recovery test come from the calibrate task (centre within 2% of the
//! core radius; tilt and defocus within 5% of the applied value or an absolute floor of
//! 0.1 mrad / 1 um, stated below; captured power within 1% of the truth's) — the truth is
//! the simulated value, not a published figure.
use assert_cmd::Command;
use modegram::align::calibrate::decode_raw;
use modegram::align::objective::{captured_per_frame, captured_total, Objective, Reduced};
use modegram::grid::{Alignment, Grid};
use modegram::modes::Basis;
use modegram::setup::Setup;
use serde_json::Value;
use std::path::{Path, PathBuf};

/// A few-mode graded-index fibre (3 groups = 6 modes), one channel, 12 launches.
fn scenario(channel_extra: &str, sensor_extra: &str, noise_extra: &str) -> String {
    format!(
        r#"
version = 1
seed = 7
[light]
wavelength_nm = 1064.0
[camera]
pixel_pitch_um = 5.5
fill_factor = 0.8
[fiber]
profile = "graded"
core_radius_um = 12.5
na = 0.2
cladding_index = 1.45
[basis]
kind = "lp"
groups = 3
[sensor]
width_px = 192
height_px = 192
bit_depth = 16
{sensor_extra}
[[channel]]
name = "H"
region = [0, 0, 192, 192]
magnification = 22.0
signal_counts = 2.0e7
reference_peak_counts = 6000.0
{channel_extra}
[transfer]
kind = "random"
mdl_db = 1.0
pol_mixing = "none"
[launch]
polarizations = ["H"]
repeats = 2
[noise]
calibration_averages = 8
{noise_extra}
"#
    )
}

const MISALIGNED: &str = r#"
center_um = [3.0, -2.0]
rotation_deg = 5.0
scale = 1.0
tilt_mrad = [6.0, -4.0]
defocus_um = 8.0
carrier = [0.22, 0.18]
"#;

const ALIGNED: &str = r#"
carrier = [0.22, 0.18]
"#;

fn bin() -> Command {
    Command::cargo_bin("modegram").unwrap()
}

fn synth(dir: &Path, text: &str) -> PathBuf {
    std::fs::write(dir.join("scenario.toml"), text).unwrap();
    let out = bin()
        .arg("synth")
        .arg(dir.join("scenario.toml"))
        .arg("--out")
        .arg(dir.join("sim"))
        .arg("-q")
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "synth: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    dir.join("sim")
}

fn truth(sim: &Path) -> Alignment {
    let t: Value =
        serde_json::from_str(&std::fs::read_to_string(sim.join("truth.json")).unwrap()).unwrap();
    let c = &t["channels"][0];
    let f = |v: &Value| v.as_f64().unwrap();
    Alignment {
        center_um: [f(&c["center_um"][0]), f(&c["center_um"][1])],
        rotation_deg: f(&c["rotation_deg"]),
        scale: f(&c["scale"]),
        tilt_mrad: [f(&c["tilt_mrad"][0]), f(&c["tilt_mrad"][1])],
        defocus_um: f(&c["defocus_um"]),
    }
}

/// Captured power of the launch sequence at a given alignment (decoded without tilt and
/// defocus correction, corrected through the basis: see align::objective).
fn captured_at(setup: &Setup, a: &Alignment) -> f64 {
    let basis = Basis::from_setup(setup).unwrap();
    let stack = setup.resolve(setup.frames.stack.as_ref().unwrap());
    let raw = decode_raw(setup, &[stack], &|_| {}).unwrap();
    let red = Reduced::new(
        raw.fields[0].view(),
        &raw.grids[0],
        setup.light.wavelength_nm,
        1,
    );
    let obj = Objective::new(&red, |g: &Grid, al: &Alignment| basis.sample(g, al));
    let modes = obj.corrected_modes(a);
    captured_total(&captured_per_frame(
        raw.fields[0].view(),
        &raw.grids[0],
        &modes,
    ))
}

#[test]
fn calibrate_recovers_known_misalignment() {
    let d = tempfile::tempdir().unwrap();
    let sim = synth(d.path(), &scenario(MISALIGNED, "", ""));
    let t = truth(&sim);
    let out = d.path().join("cal");
    let o = bin()
        .args(["calibrate"])
        .arg(sim.join("setup.toml"))
        .arg("--out")
        .arg(&out)
        .arg("-q")
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let cal: Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("calibration.json")).unwrap())
            .unwrap();
    let h = &cal["H"];
    let g = |k: &str, i: usize| h[k][i].as_f64().unwrap();
    let a = 12.5;
    // centre within 2% of the core radius
    assert!((g("center_um", 0) - t.center_um[0]).abs() < 0.02 * a, "{h}");
    assert!((g("center_um", 1) - t.center_um[1]).abs() < 0.02 * a, "{h}");
    // tilt within 5% of the applied value, floor 0.1 mrad
    for i in 0..2 {
        let tol = (0.05 * t.tilt_mrad[i].abs()).max(0.1);
        assert!(
            (g("tilt_mrad", i) - t.tilt_mrad[i]).abs() < tol,
            "tilt {i}: {h}"
        );
    }
    // defocus within 5% of the applied value, floor 1 um (depth of focus lambda/NA^2 = 27 um)
    let dz = h["defocus_um"].as_f64().unwrap();
    assert!(
        (dz - t.defocus_um).abs() < (0.05 * t.defocus_um.abs()).max(1.0),
        "{h}"
    );
    assert_eq!(h["converged"], Value::Bool(true));
    // captured power within 1% of the truth's
    let setup = Setup::load(&sim.join("setup.toml")).unwrap();
    let eta_truth = captured_at(&setup, &t);
    let eta_fit = h["captured_after"].as_f64().unwrap();
    assert!(
        (eta_fit - eta_truth).abs() < 0.01 * eta_truth,
        "fit {eta_fit} truth {eta_truth}"
    );
    assert!(h["captured_before"].as_f64().unwrap() < eta_fit);
    // fitted.toml loads from its own folder and carries the values
    let fitted = Setup::load(&out.join("fitted.toml")).unwrap();
    let fa = fitted.channels[0].alignment();
    assert!((fa.center_um[0] - g("center_um", 0)).abs() < 1e-9);
    assert!(fitted
        .resolve(fitted.frames.stack.as_ref().unwrap())
        .exists());
    // nothing is overwritten without --force
    let o = bin()
        .args(["calibrate"])
        .arg(sim.join("setup.toml"))
        .arg("--out")
        .arg(&out)
        .arg("-q")
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("--force"));
}

#[test]
fn calibrate_frame_subset_and_non_convergence() {
    let d = tempfile::tempdir().unwrap();
    let sim = synth(d.path(), &scenario(MISALIGNED, "", ""));
    // a bad selection names the option and value
    let o = bin()
        .args(["calibrate"])
        .arg(sim.join("setup.toml"))
        .arg("--out")
        .arg(d.path().join("x"))
        .args(["--frames", "0,99", "-q"])
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(2));
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("--frames"),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    // too few evaluations: not converged, exit 1, starting values kept
    let out = d.path().join("nc");
    let o = bin()
        .args(["calibrate"])
        .arg(sim.join("setup.toml"))
        .arg("--out")
        .arg(&out)
        .args(["--frames", "0-5", "--max-evals", "4", "-q"])
        .output()
        .unwrap();
    assert_eq!(
        o.status.code(),
        Some(1),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    let err = String::from_utf8_lossy(&o.stderr);
    assert!(
        err.contains("did not converge") && err.contains("channel H"),
        "{err}"
    );
    let cal: Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("calibration.json")).unwrap())
            .unwrap();
    assert_eq!(cal["H"]["converged"], Value::Bool(false));
    assert_eq!(cal["H"]["center_um"][0].as_f64().unwrap(), 0.0);
    assert_eq!(cal["H"]["frames_used"].as_u64().unwrap(), 6);
}

fn check_items(sim: &Path, out: &Path) -> (Option<i32>, Vec<Value>) {
    let o = bin()
        .arg("check")
        .arg(sim.join("setup.toml"))
        .arg("--out")
        .arg(out)
        .arg("-q")
        .output()
        .unwrap();
    let items: Vec<Value> = serde_json::from_str(
        &std::fs::read_to_string(out.join("check.json"))
            .unwrap_or_else(|_| panic!("no check.json: {}", String::from_utf8_lossy(&o.stderr))),
    )
    .unwrap();
    (o.status.code(), items)
}

/// The check scenarios: a signal level that leaves every pixel below the clipping level.
fn check_scenario(channel_extra: &str, sensor_extra: &str, noise_extra: &str) -> String {
    scenario(channel_extra, sensor_extra, noise_extra)
        .replace("signal_counts = 2.0e7", "signal_counts = 5.0e6")
}

fn status<'a>(items: &'a [Value], name: &str) -> &'a str {
    items
        .iter()
        .find(|i| i["name"] == name)
        .unwrap_or_else(|| panic!("no item {name}"))["status"]
        .as_str()
        .unwrap()
}

/// Thresholds: docs/alignment.md (Nyquist 2 px per fringe, Picart 2015; separation,
/// Cuche et al. 2000; the rest common practice, no source).
#[test]
fn check_passes_a_good_setup_and_fails_broken_ones() {
    let d = tempfile::tempdir().unwrap();
    let good = synth(
        &d.path().join("good").tap_mkdir(),
        &check_scenario(ALIGNED, "", ""),
    );
    let (code, items) = check_items(&good, &d.path().join("good/out"));
    for i in &items {
        assert!(
            i["status"] == "pass" || i["status"] == "skip",
            "good setup: {i}"
        );
    }
    assert_eq!(code, Some(0));

    // fringes too fine: 1.8 px per fringe
    let fine = synth(
        &d.path().join("fine").tap_mkdir(),
        &check_scenario("carrier = [0.45, 0.3]", "", ""),
    );
    let (code, items) = check_items(&fine, &d.path().join("fine/out"));
    assert_eq!(status(&items, "fringe_period"), "fail");
    assert_eq!(code, Some(1));

    // overlapping orders: carrier close to DC, window reaching into the DC order
    let overlap = synth(
        &d.path().join("ovl").tap_mkdir(),
        &check_scenario("carrier = [0.07, 0.05]", "", ""),
    );
    let (_, items) = check_items(&overlap, &d.path().join("ovl/out"));
    assert_eq!(status(&items, "separation"), "fail");

    // saturation: a reference far above the clipping level
    let sat = synth(
        &d.path().join("sat").tap_mkdir(),
        &check_scenario("carrier = [0.22, 0.18]", "", "").replace(
            "reference_peak_counts = 6000.0",
            "reference_peak_counts = 60000.0",
        ),
    );
    let (_, items) = check_items(&sat, &d.path().join("sat/out"));
    assert_eq!(status(&items, "saturation"), "fail");

    // defocus of 4 depths of focus (lambda / NA^2 = 26.6 um)
    let foc = synth(
        &d.path().join("foc").tap_mkdir(),
        &check_scenario("carrier = [0.22, 0.18]\ndefocus_um = 100.0", "", ""),
    );
    let (_, items) = check_items(&foc, &d.path().join("foc/out"));
    assert_eq!(status(&items, "focus"), "fail");
    let hint = items.iter().find(|i| i["name"] == "focus").unwrap()["hint"]
        .as_str()
        .unwrap()
        .to_string();
    assert!(hint.contains("past the fibre face"), "{hint}");

    // off-centre by 40% of the core radius
    let off = synth(
        &d.path().join("off").tap_mkdir(),
        &check_scenario("carrier = [0.22, 0.18]\ncenter_um = [5.0, 0.0]", "", ""),
    );
    let (_, items) = check_items(&off, &d.path().join("off/out"));
    assert_eq!(status(&items, "centring"), "fail");
    let hint = items.iter().find(|i| i["name"] == "centring").unwrap()["hint"]
        .as_str()
        .unwrap()
        .to_string();
    assert!(hint.contains("towards -x (left on the camera)"), "{hint}");
}

trait TapMkdir {
    fn tap_mkdir(self) -> Self;
}

impl TapMkdir for PathBuf {
    fn tap_mkdir(self) -> Self {
        std::fs::create_dir_all(&self).unwrap();
        self
    }
}

#[test]
fn watch_decodes_frames_and_reports_bad_input() {
    let d = tempfile::tempdir().unwrap();
    let sim = synth(
        d.path(),
        &check_scenario(ALIGNED, "", "quantisation = false"),
    );
    let setup = sim.join("setup.toml");
    // a folder that does not exist
    let o = bin()
        .arg("watch")
        .arg(&setup)
        .arg(d.path().join("nope"))
        .args(["--timeout-s", "0.3"])
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("nope"));
    // a folder without frames
    let empty = d.path().join("empty").tap_mkdir();
    let o = bin()
        .arg("watch")
        .arg(&setup)
        .arg(&empty)
        .args(["--timeout-s", "0.3"])
        .output()
        .unwrap();
    assert_eq!(o.status.code(), Some(2));
    assert!(
        String::from_utf8_lossy(&o.stderr).contains("no frame decoded"),
        "{}",
        String::from_utf8_lossy(&o.stderr)
    );
    // frames: split the launch stack into single-frame NPY files, plus one of the wrong size
    let live = d.path().join("live").tap_mkdir();
    let stack: ndarray::Array3<f64> = ndarray_npy::read_npy(sim.join("launch.npy")).unwrap();
    for f in 0..3 {
        let fr = stack.index_axis(ndarray::Axis(0), f).to_owned();
        ndarray_npy::write_npy(live.join(format!("f{f:03}.npy")), &fr).unwrap();
    }
    ndarray_npy::write_npy(
        live.join("f900.npy"),
        &ndarray::Array2::<f64>::ones((64, 64)),
    )
    .unwrap();
    std::fs::write(live.join("f950.npy"), b"\x93NUMPY half").unwrap();
    let o = bin()
        .arg("watch")
        .arg(&setup)
        .arg(&live)
        .args(["--timeout-s", "1.5", "--give-up-s", "0.5", "--json"])
        .output()
        .unwrap();
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let j: Value = serde_json::from_slice(&o.stdout).unwrap();
    assert_eq!(j["frames"].as_u64().unwrap(), 3, "{j}");
    let problems = j["problems"].to_string();
    assert!(
        problems.contains("f900.npy") && problems.contains("64x64"),
        "{problems}"
    );
    assert!(problems.contains("f950.npy"), "{problems}");
    let cap = j["channels"][0]["mean_captured"].as_f64().unwrap();
    assert!(cap > 0.9, "{j}");
    // --max-frames stops early, one line per frame on stdout when not a terminal
    let o = bin()
        .arg("watch")
        .arg(&setup)
        .arg(&live)
        .args(["--max-frames", "2", "--give-up-s", "0.5"])
        .output()
        .unwrap();
    assert!(o.status.success());
    let text = String::from_utf8_lossy(&o.stdout);
    assert_eq!(
        text.lines().filter(|l| l.starts_with("frame ")).count(),
        2,
        "{text}"
    );
    assert!(text.contains("reached --max-frames"), "{text}");
}

/// Captured fraction of `field` after the decoder's correction (tilt removed, propagated by
/// `-dz` on the full grid with FFTs), overlaps summed in real space: the plain twin of the
/// live path's spectral ring sums.
fn brute_captured(
    field: &[num_complex::Complex64],
    basis: &ndarray::Array3<num_complex::Complex64>,
    grid: &Grid,
    tilt_mrad: [f64; 2],
    dz: f64,
) -> f64 {
    use modegram::align::objective::{correct_field, Propagator};
    let prop = Propagator::new(grid, 1064.0);
    let mut scratch = vec![num_complex::Complex64::new(0.0, 0.0); prop.fft.scratch_len()];
    let mut e = field.to_vec();
    let da = grid.pixel_area_um2();
    let p: f64 = e.iter().map(|z| z.norm_sqr()).sum::<f64>() * da;
    correct_field(&mut e, grid, 1064.0, &prop, tilt_mrad, dz, &mut scratch);
    basis
        .outer_iter()
        .map(|m| {
            let c: num_complex::Complex64 = m.iter().zip(&e).map(|(a, b)| a.conj() * b).sum();
            (c * da).norm_sqr()
        })
        .sum::<f64>()
        / p
}

/// The live focus estimate (scan + Newton on spectral ring sums over a reduced support)
/// against a brute-force scan that propagates the whole field for every trial defocus, on a
/// simulated field of an LP basis tilted and defocused by known amounts. Source of the
/// check: angular-spectrum propagation (Goodman, Introduction to Fourier Optics, 3rd ed.,
/// sec. 3.10) is unitary, so the correction `P(-dz) M(-t)` of a field made as
/// `P(+dz0) M(+t) sum_k c_k psi_k` restores it and the captured power peaks at dz = dz0.
/// Tolerances: captured within 1e-7 (src/align/live.rs bounds the error of its reduced
/// support; for this field it is ~1e-8), focus within 0.005 um of the brute-force optimum
/// (refined to 1e-3 um), which itself lies within 0.5 um of the applied 18 um (white noise
/// shifts it slightly).
#[test]
fn live_focus_matches_brute_force_scan() {
    use modegram::align::analytic::SplitMix;
    use modegram::align::live::LiveChannel;
    use modegram::align::objective::{apply_tilt, geometry, Propagator};
    use modegram::align::optimise::golden_section;
    use num_complex::Complex64;
    let toml = r#"
version = 1
[light]
wavelength_nm = 1064.0
[camera]
pixel_pitch_um = 5.5
[fiber]
profile = "graded"
core_radius_um = 25.0
na = 0.2
[basis]
kind = "lp"
groups = 6
"#;
    let setup = Setup::from_toml(toml, Path::new("live.toml")).unwrap();
    let basis = Basis::from_setup(&setup).unwrap();
    let grid = Grid::centred(128, 128, 0.7);
    let truth = Alignment {
        center_um: [2.0, -1.5],
        tilt_mrad: [4.0, -3.0],
        defocus_um: 18.0,
        ..Default::default()
    };
    let b = basis.sample(&grid, &geometry(&truth));
    let mut rng = SplitMix(11);
    let mut e = vec![Complex64::new(0.0, 0.0); grid.len()];
    for m in b.outer_iter() {
        let c = Complex64::new(rng.normal(), rng.normal());
        for (o, v) in e.iter_mut().zip(m.iter()) {
            *o += c * v;
        }
    }
    let prop = Propagator::new(&grid, 1064.0);
    let mut scratch = vec![Complex64::new(0.0, 0.0); prop.fft.scratch_len()];
    prop.propagate(&mut e, truth.defocus_um, &mut scratch);
    apply_tilt(&mut e, &grid, 1064.0, truth.tilt_mrad, 1.0);
    let peak = e.iter().map(|z| z.norm()).fold(0.0, f64::max);
    for z in e.iter_mut() {
        *z += Complex64::new(rng.normal(), rng.normal()) * (0.01 * peak);
    }
    let mut setup_alignment = truth;
    setup_alignment.defocus_um = -25.0;
    let range = 60.0;
    let mut live = LiveChannel::new(
        grid,
        1064.0,
        setup_alignment,
        b.clone(),
        [0.25, 0.1],
        0.06,
        0.05,
        0.7 / 8.0,
        25.0,
        range,
    );
    let (kept, rings) = live.support();
    assert!(kept < grid.len() && rings < kept, "{kept} {rings}");
    let fig = live.measure(&e, 0.0);
    // brute force: 241-point scan over the same range, then golden section to 1e-3 um
    let f = |dz: f64| brute_captured(&e, &b, &grid, truth.tilt_mrad, dz);
    let z0 = setup_alignment.defocus_um;
    let (mut zb, mut vb) = (z0, f64::NEG_INFINITY);
    for i in 0..=240 {
        let z = z0 - range + 2.0 * range * i as f64 / 240.0;
        let v = f(z);
        if v > vb {
            (zb, vb) = (z, v);
        }
    }
    let step = 2.0 * range / 240.0;
    let (zbest, _, _) = golden_section(|z| -f(z), zb - step, zb + step, 1e-3);
    assert!(
        (fig.focus_um - zbest).abs() < 0.005,
        "live focus {} vs brute force {zbest}",
        fig.focus_um
    );
    assert!((zbest - truth.defocus_um).abs() < 0.5, "{zbest}");
    assert!(
        (fig.captured - f(z0)).abs() < 1e-7,
        "captured {} vs brute force {}",
        fig.captured,
        f(z0)
    );
    assert!(
        f(zbest) > 0.95 && f(zbest) > f(z0) + 0.1,
        "{} {}",
        f(zbest),
        f(z0)
    );
    // no state from one frame to the next: another field in between, same figures
    let other: Vec<Complex64> = e.iter().rev().copied().collect();
    live.measure(&other, 0.0);
    let again = live.measure(&e, 0.0);
    assert_eq!(again.focus_um, fig.focus_um);
    assert_eq!(again.captured, fig.captured);
    let mut s = live.scratch();
    assert_eq!(live.measure_with(&e, 0.0, &mut s).focus_um, fig.focus_um);
}
