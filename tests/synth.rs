//! The simulator: forward-model physics, power scaling, determinism, generated files, and
//! the errors of bad scenarios. Modes here are analytic functions built in the test, so
//! the forward model is checked on its own.
use modegram::grid::{Alignment, Grid};
use modegram::synth::optics::{camera_basis, padded_grid, ChannelOptics};
use modegram::synth::{simulate, simulate_with_optics, Scenario, SetupOptions};
use ndarray::{Array2, Array3, Axis};
use num_complex::Complex64;
use std::f64::consts::PI;
use std::path::Path;

const BASE: &str = r#"
version = 1
seed = 11
[light]
wavelength_nm = 1064.0
[camera]
pixel_pitch_um = 5.0
fill_factor = 1.0
[fiber]
profile = "graded"
core_radius_um = 10.0
na = 0.2
[basis]
kind = "hg"
groups = 2
waist_um = 4.0
[sensor]
width_px = 128
height_px = 64
bit_depth = 16
gain_e_per_count = 1.0
read_noise_counts = 2.0
dark_offset_counts = 50.0
subpixels = 1
[[channel]]
name = "H"
region = [0, 0, 64, 64]
magnification = 10.0
signal_counts = 1.0e6
carrier = [0.25, 0.0]
reference_peak_counts = 2000.0
[[channel]]
name = "V"
region = [64, 0, 64, 64]
magnification = 10.0
signal_counts = 1.0e6
carrier = [0.2, 0.2]
reference_peak_counts = 2000.0
center_um = [1.0, -0.5]
[launch]
polarizations = ["H", "V"]
reference_every = 2
[noise]
shot = false
read = false
quantisation = false
saturation = false
"#;

fn scenario(text: &str) -> Scenario {
    Scenario::from_toml(text, Path::new("test-scenario.toml")).unwrap()
}

fn bad(text: &str) -> String {
    Scenario::from_toml(text, Path::new("bad.toml"))
        .unwrap_err()
        .to_string()
}

/// Hermite-Gauss HG_nm(u, v) with 1/e field radius w, unnormalised.
fn hg(n: u32, m: u32, u: f64, v: f64, w: f64) -> f64 {
    let h = |k: u32, t: f64| match k {
        0 => 1.0,
        1 => 2.0 * t,
        _ => 4.0 * t * t - 2.0,
    };
    let (a, b) = (2f64.sqrt() * u / w, 2f64.sqrt() * v / w);
    h(n, a) * h(m, b) * (-(u * u + v * v) / (w * w)).exp()
}

/// HG00, HG10, HG01 (groups 1, 2, 2) sampled at an alignment, normalised on the grid.
fn hg_sampler(w: f64) -> impl Fn(&Grid, &Alignment) -> modegram::Result<Array3<Complex64>> + Sync {
    move |g: &Grid, a: &Alignment| {
        let idx = [(0, 0), (1, 0), (0, 1)];
        let mut out = Array3::from_shape_fn((3, g.ny, g.nx), |(k, r, c)| {
            let (u, v) = a.to_fibre(g.x_um(c), g.y_um(r));
            Complex64::new(hg(idx[k].0, idx[k].1, u, v, w), 0.0)
        });
        for mut m in out.axis_iter_mut(Axis(0)) {
            let p: f64 = m.iter().map(|z| z.norm_sqr()).sum::<f64>() * g.pixel_area_um2();
            m.mapv_inplace(|z| z / p.sqrt());
        }
        Ok(out)
    }
}

/// A single uniform "mode" (a plane wave filling the grid), normalised on the grid.
fn uniform_sampler(g: &Grid, _a: &Alignment) -> modegram::Result<Array3<Complex64>> {
    let v = 1.0 / (g.len() as f64 * g.pixel_area_um2()).sqrt();
    Ok(Array3::from_elem((1, g.ny, g.nx), Complex64::new(v, 0.0)))
}

const HG_GROUPS: [u32; 3] = [1, 2, 2];

fn no_tick() {}

/// One channel, uniform signal, uniform reference, carrier along x, no noise.
fn plane_wave_scenario(fill: f64, subpixels: usize) -> Scenario {
    let t = BASE
        .replace("fill_factor = 1.0", &format!("fill_factor = {fill}"))
        .replace("subpixels = 1", &format!("subpixels = {subpixels}"))
        .replace("reference_every = 2", "reference_every = 0")
        .replace("polarizations = [\"H\", \"V\"]", "polarizations = [\"H\"]")
        .replace(
            "reference_peak_counts = 2000.0",
            "reference_peak_counts = 2000.0\nreference_waist_px = 1.0e9",
        );
    // keep channel H only
    let cut = t.find("[[channel]]\nname = \"V\"").unwrap();
    let rest = &t[cut..];
    let launch = rest.find("[launch]").unwrap();
    scenario(&format!("{}{}", &t[..cut], &rest[launch..]))
}

/// The expected counts (noise off, dark removed) of the first frame, channel H's region.
fn first_frame_light(scn: &Scenario) -> (Array2<f64>, f64) {
    let groups = [1u32];
    let sim = simulate(scn, &groups, &uniform_sampler, &no_tick).unwrap();
    let [x0, y0, w, h] = scn.channels[0].region;
    let f = sim.frames[0]
        .slice(ndarray::s![y0..y0 + h, x0..x0 + w])
        .to_owned();
    let f = f.mapv(|v| v - scn.sensor.dark_offset_counts);
    // |S|^2 per pixel of the uniform mode: signal_counts |t|^2 / (pixels of the padded grid)
    let pitch = scn.camera.pixel_pitch_um / scn.channels[0].magnification;
    let (g, _, _) = padded_grid(w, h, pitch);
    let t2 = sim.device[(0, 0)].norm_sqr();
    (f, scn.channels[0].signal_counts * t2 / g.len() as f64)
}

/// Two-beam interference: I = |S|^2 + |R|^2 + 2|S||R| cos(phase), visibility
/// 2|S||R| / (|S|^2 + |R|^2) (Born & Wolf, Principles of Optics, two-beam interference; from
/// memory), fringe period 1 / |carrier| pixels.
#[test]
fn point_sampled_hologram_has_two_beam_visibility_and_period() {
    let scn = plane_wave_scenario(1.0, 1);
    let (light, s2) = first_frame_light(&scn);
    let r2 = scn.channels[0].reference_peak_counts;
    let row = light.row(32);
    let n = row.len();
    // I = A + B cos(2 pi x / 4 + theta): A the mean, B from the DFT bin of the carrier
    let mean = row.sum() / n as f64;
    let z: Complex64 = row
        .iter()
        .enumerate()
        .map(|(x, v)| v * Complex64::from_polar(1.0, -2.0 * PI * 0.25 * x as f64))
        .sum();
    let vis = 2.0 * z.norm() / n as f64 / mean;
    let want = 2.0 * (s2 * r2).sqrt() / (s2 + r2);
    assert!((vis - want).abs() < 1e-9, "visibility {vis} vs {want}");
    assert!((mean - (s2 + r2)).abs() < 1e-9 * (s2 + r2));
    // and the samples are exactly A + B cos(...): extremes within [A - B, A + B]
    let b = vis * mean;
    assert!(row.iter().all(|v| (v - mean).abs() <= b * (1.0 + 1e-12)));
    // period: carrier 0.25 -> 4 px; the row's DFT peaks at bin 64 * 0.25 = 16
    let mag = |k: usize| -> f64 {
        let z: Complex64 = row
            .iter()
            .enumerate()
            .map(|(x, v)| v * Complex64::from_polar(1.0, -2.0 * PI * (k * x) as f64 / n as f64))
            .sum();
        z.norm()
    };
    let peak = (1..n / 2)
        .max_by(|&a, &b| mag(a).total_cmp(&mag(b)))
        .unwrap();
    assert_eq!(peak, 16);
    // fringes run along x only: every row is the same
    assert!((&light.row(5) - &light.row(40))
        .iter()
        .all(|d| d.abs() < 1e-9));
}

/// The pixel integrates intensity over its light-sensitive width ff: the fringe amplitude
/// is multiplied by sinc(ff f) (the box's transfer function; common practice, no source),
/// the mean is unchanged.
#[test]
fn pixel_aperture_attenuates_fringes_by_sinc() {
    let (point, s2) = first_frame_light(&plane_wave_scenario(1.0, 1));
    let amp = |img: &Array2<f64>| -> (f64, f64) {
        let row = img.row(32);
        let n = row.len();
        let z: Complex64 = row
            .iter()
            .enumerate()
            .map(|(x, v)| v * Complex64::from_polar(1.0, -2.0 * PI * 0.25 * x as f64))
            .sum();
        (2.0 * z.norm() / n as f64, row.sum() / n as f64)
    };
    let (a0, m0) = amp(&point);
    assert!(s2 > 0.0);
    for ff in [1.0, 0.6] {
        let (img, _) = first_frame_light(&plane_wave_scenario(ff, 4));
        let (a, m) = amp(&img);
        let x = PI * ff * 0.25;
        let sinc = x.sin() / x;
        assert!(
            ((a / a0) - sinc).abs() < 1e-5,
            "ff {ff}: {} vs {sinc}",
            a / a0
        );
        assert!((m - m0).abs() < 1e-6 * m0);
    }
}

/// Energy on the camera: the hologram minus the reference alone sums to the signal's counts,
/// sum |S|^2 = signal_counts |t|^2, with tilt and defocus too (the angular-spectrum
/// propagator is unitary; Goodman, Introduction to Fourier Optics, from memory). The
/// interference term sums to ~0 because it sits at the carrier.
#[test]
fn signal_power_scales_with_counts_and_column_power() {
    let text = BASE
        .replace(
            "center_um = [1.0, -0.5]",
            "center_um = [1.0, -0.5]\ntilt_mrad = [3.0, -2.0]\ndefocus_um = 4.0",
        )
        .replace("subpixels = 1", "subpixels = 3");
    let scn = scenario(&text);
    let sim = simulate(&scn, &HG_GROUPS, &hg_sampler(4.0), &no_tick).unwrap();
    let dark = scn.sensor.dark_offset_counts;
    for (f, role) in sim.layout.roles.iter().enumerate().take(4) {
        let col = match role {
            modegram::matrix::FrameRole::Input { pol, mode, .. } => pol * 3 + mode,
            _ => sim.layout.reference_input,
        };
        for (c, ch) in scn.channels.iter().enumerate() {
            let [x0, y0, w, h] = ch.region;
            let s = ndarray::s![y0..y0 + h, x0..x0 + w];
            let sig: f64 = sim.frames[f]
                .slice(s)
                .iter()
                .zip(sim.reference.slice(s).iter())
                .map(|(a, b)| (a - dark) - (b - dark))
                .sum();
            let t2: f64 = (0..3)
                .map(|m| sim.device[(c * 3 + m, col)].norm_sqr())
                .sum();
            let want = ch.signal_counts * t2;
            assert!(
                (sig - want).abs() < 2e-4 * ch.signal_counts,
                "frame {f} channel {c}: {sig} vs {want}"
            );
        }
    }
}

/// Defocus sign: the camera basis of a Gaussian waist w0 propagated by +dz is the Gaussian
/// beam u = (w0/w) exp(-r^2/w^2) exp(+i k r^2 / (2 R)) exp(-i atan(z/zR)) (Siegman, Lasers,
/// 1986, ch. 17, from memory; time convention exp(-i omega t), docs/conventions.md), and a
/// tilt t_x of the recorded field multiplies it by exp(+i k t_x x) without moving it.
#[test]
fn defocus_and_tilt_follow_the_documented_signs() {
    let w0 = 3.0;
    let dz = 10.0;
    let lambda = 1.064;
    let k = 2.0 * PI / lambda;
    let mut scn = scenario(BASE);
    scn.channels[0].defocus_um = dz;
    scn.channels[0].tilt_mrad = [5.0, 0.0];
    let ch = &scn.channels[0];
    let b = camera_basis(ch, 5.0, 1064.0, &hg_sampler(w0)).unwrap();
    let pitch = 0.5;
    let zr = PI * w0 * w0 / lambda;
    let wz = w0 * (1.0 + (dz / zr).powi(2)).sqrt();
    let rz = dz * (1.0 + (zr / dz).powi(2));
    let gouy = (dz / zr).atan();
    let tx = 5e-3;
    let mut worst: f64 = 0.0;
    let norm = (2.0 / PI).sqrt() / w0 * pitch; // continuous normalisation times sqrt(dA)
    for r in 0..64 {
        for c in 0..64 {
            // propagation, then the tilt phase of the recorded field
            let x = (c as f64 - 32.0) * pitch;
            let y = (r as f64 - 32.0) * pitch;
            let r2 = x * x + y * y;
            let want = Complex64::from_polar(
                norm * w0 / wz * (-r2 / (wz * wz)).exp(),
                k * r2 / (2.0 * rz) - gouy + k * tx * x,
            );
            worst = worst.max((b[(0, r, c)] - want).norm());
        }
    }
    assert!(worst < 5e-3 * norm, "max deviation {worst} (peak {norm})");
}

/// Same seed -> identical frames for 1 and 3 threads; another seed -> other noise.
#[test]
fn frames_are_deterministic_for_any_thread_count() {
    let text = BASE
        .replace("shot = false", "shot = true")
        .replace("read = false", "read = true")
        .replace("quantisation = false", "quantisation = true")
        + "[drift]\nstep_rad = 0.05\n";
    let scn = scenario(&text);
    let optics: Vec<ChannelOptics> = (0..2)
        .map(|c| ChannelOptics::new(&scn, c, &hg_sampler(4.0)).unwrap())
        .collect();
    let run = |threads: usize, scn: &Scenario| {
        rayon::ThreadPoolBuilder::new()
            .num_threads(threads)
            .build()
            .unwrap()
            .install(|| simulate_with_optics(scn, &HG_GROUPS, &optics, &no_tick).unwrap())
    };
    let a = run(1, &scn);
    let b = run(3, &scn);
    assert_eq!(a.frames.len(), b.frames.len());
    assert!(a.frames.iter().zip(&b.frames).all(|(x, y)| x == y));
    assert_eq!(a.drift_rad, b.drift_rad);
    let mut other = scn.clone();
    other.seed = 12;
    let c = run(2, &other);
    assert!(a.frames[0] != c.frames[0]);
    // quantised counts
    assert!(a.frames.iter().all(|f| f.iter().all(|v| v.fract() == 0.0)));
}

/// The generated setup parses with Setup::load, points at the written files, and its launch
/// description gives the number of frames in launch.tif.
#[test]
fn written_setup_parses_and_matches_the_stack() {
    let text = BASE.replace("quantisation = false", "quantisation = true");
    let scn = scenario(&text);
    let sim = simulate(&scn, &HG_GROUPS, &hg_sampler(4.0), &no_tick).unwrap();
    let dir = tempfile::tempdir().unwrap();
    let out = modegram::export::OutDir::create(dir.path(), false).unwrap();
    for true_al in [false, true] {
        let out = modegram::export::OutDir {
            force: true,
            ..out.clone()
        };
        modegram::synth::write_all(
            &out,
            &scn,
            &sim,
            SetupOptions {
                auto_carrier: false,
                true_alignment: true_al,
            },
        )
        .unwrap();
        let setup = modegram::setup::Setup::load(&dir.path().join("setup.toml")).unwrap();
        assert_eq!(setup.channels.len(), 2);
        assert_eq!(setup.channels[1].carrier_cycles_per_px(), Some([0.2, 0.2]));
        let c = setup.channels[1].center_um;
        assert_eq!(c, if true_al { [1.0, -0.5] } else { [0.0, 0.0] });
        assert!((setup.launch.power_counts - 1.0e6).abs() < 1e-6);
        let layout = modegram::matrix::LaunchLayout::new(&setup.launch, 3).unwrap();
        let stack = setup.resolve(setup.frames.stack.as_ref().unwrap());
        let mut dec = tiff::decoder::Decoder::new(std::io::BufReader::new(
            std::fs::File::open(&stack).unwrap(),
        ))
        .unwrap();
        let mut pages = 1;
        while dec.more_images() {
            dec.next_image().unwrap();
            pages += 1;
        }
        assert_eq!(pages, layout.expected_frames());
        assert_eq!(pages, 2 * 3 + 4);
        assert_eq!(dec.dimensions().unwrap(), (128, 64));
        let truth: ndarray::Array2<Complex64> =
            modegram::export::read_npy(&dir.path().join("truth_matrix.npy")).unwrap();
        assert_eq!(truth.dim(), (6, 6));
    }
    let json: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(dir.path().join("truth.json")).unwrap())
            .unwrap();
    assert_eq!(json["drift_rad"].as_array().unwrap().len(), 10);
    // unitary random truth: IL 0 dB, MDL 0 dB (Ho & Kahn 2011 definitions)
    assert!(json["truth"]["insertion_loss_db"].as_f64().unwrap().abs() < 1e-9);
    assert!(
        json["truth"]["mode_dependent_loss_db"]
            .as_f64()
            .unwrap()
            .abs()
            < 1e-6
    );
}

/// The random truth honours the scenario's MDL and IL exactly (Ho & Kahn 2011 definitions).
#[test]
fn random_truth_has_the_asked_mdl_and_insertion_loss() {
    let text = BASE.replace(
        "[launch]",
        "[transfer]\nmdl_db = 4.0\ninsertion_loss_db = 1.5\ngroup_crosstalk_db = -20.0\n[launch]",
    );
    let scn = scenario(&text);
    let dev = modegram::synth::truth::device_matrix(&scn, &HG_GROUPS).unwrap();
    let f = modegram::matrix::figures(&dev, &HG_GROUPS, 2, 2, -20.0).unwrap();
    assert!(
        (f.mode_dependent_loss_db - 4.0).abs() < 1e-6,
        "{}",
        f.mode_dependent_loss_db
    );
    assert!(
        (f.insertion_loss_db - 1.5).abs() < 1e-6,
        "{}",
        f.insertion_loss_db
    );
}

#[test]
fn bad_scenarios_name_key_and_value() {
    let cases = [
        (
            "read_noise_counts = 2.0",
            "read_noise_counts = -1.0",
            "sensor.read_noise_counts",
            "-1",
        ),
        (
            "carrier = [0.25, 0.0]",
            "carrier = [0.6, 0.0]",
            "channel[0].carrier",
            "0.6",
        ),
        (
            "region = [64, 0, 64, 64]",
            "region = [100, 0, 64, 64]",
            "channel[1].region",
            "100",
        ),
        (
            "region = [64, 0, 64, 64]",
            "region = [32, 0, 64, 64]",
            "overlaps",
            "32",
        ),
        (
            "signal_counts = 1.0e6\ncarrier = [0.25",
            "signal_counts = 0.0\ncarrier = [0.25",
            "channel[0].signal_counts",
            "0",
        ),
        ("bit_depth = 16", "bit_depth = 12", "sensor.bit_depth", "12"),
        (
            "reference_peak_counts = 2000.0\ncenter",
            "reference_peak_counts = -5.0\ncenter",
            "channel[1].reference_peak_counts",
            "-5",
        ),
        (
            "[launch]",
            "[drift]\nstep_rad = -0.1\n[launch]",
            "drift.step_rad",
            "-0.1",
        ),
        (
            "[launch]",
            "[transfer]\npol_mixing = \"sideways\"\n[launch]",
            "pol_mixing",
            "sideways",
        ),
    ];
    for (from, to, key, value) in cases {
        assert!(BASE.contains(from), "{from}");
        let e = bad(&BASE.replace(from, to));
        assert!(e.contains(key) && e.contains(value), "{key}: {e}");
    }
    // a matrix file of the wrong shape
    let dir = tempfile::tempdir().unwrap();
    let out = modegram::export::OutDir::create(dir.path(), false).unwrap();
    out.write_npy(
        "m.npy",
        &Array2::from_elem((4, 6), Complex64::new(1.0, 0.0)),
    )
    .unwrap();
    let text = BASE.replace(
        "[launch]",
        "[transfer]\nkind = \"file\"\nfile = \"m.npy\"\n[launch]",
    );
    let scn = Scenario::from_toml(&text, &dir.path().join("s.toml")).unwrap();
    let e = simulate(&scn, &HG_GROUPS, &hg_sampler(4.0), &no_tick)
        .err()
        .unwrap()
        .to_string();
    assert!(
        e.contains("transfer.file") && e.contains("(4, 6)") && e.contains("(6, 6)"),
        "{e}"
    );
    // unknown key
    let e = bad(&BASE.replace("[launch]", "[launch]\nrepeets = 2"));
    assert!(e.contains("repeets"), "{e}");
}

/// A frame is all dark where no channel is; a saturating reference clips at the format's top.
#[test]
fn outside_regions_is_dark_and_saturation_clips() {
    let text = BASE
        .replace("width_px = 128", "width_px = 160")
        .replace("saturation = false", "saturation = true")
        .replace(
            "reference_peak_counts = 2000.0\ncenter",
            "reference_peak_counts = 90000.0\ncenter",
        );
    let scn = scenario(&text);
    let sim = simulate(&scn, &HG_GROUPS, &hg_sampler(4.0), &no_tick).unwrap();
    let f = &sim.frames[1];
    assert!(f.slice(ndarray::s![.., 128..]).iter().all(|&v| v == 50.0));
    assert!(f
        .slice(ndarray::s![.., 64..128])
        .iter()
        .all(|&v| v <= 65535.0));
    assert!(sim.clipped_pixels > 0);
}

/// The command: a good scenario writes every file and a JSON summary; a second run without
/// --force refuses (exit 2); a bad scenario exits 2 naming key and value and writes nothing.
#[test]
fn command_writes_files_and_rejects_bad_input() {
    use assert_cmd::Command;
    let dir = tempfile::tempdir().unwrap();
    let scn = dir.path().join("s.toml");
    std::fs::write(
        &scn,
        BASE.replace("quantisation = false", "quantisation = true"),
    )
    .unwrap();
    let out = dir.path().join("out");
    let run = |extra: &[&str]| {
        Command::cargo_bin("modegram")
            .unwrap()
            .arg("synth")
            .arg(&scn)
            .arg("--out")
            .arg(&out)
            .args(extra)
            .output()
            .unwrap()
    };
    let r = run(&["--json", "--auto-carrier"]);
    assert_eq!(
        r.status.code(),
        Some(0),
        "{}",
        String::from_utf8_lossy(&r.stderr)
    );
    let j: serde_json::Value = serde_json::from_slice(&r.stdout).unwrap();
    assert_eq!(j["frames"], 10);
    for f in modegram::synth::file_names(&scenario(
        BASE.replace("quantisation = false", "quantisation = true")
            .as_str(),
    )) {
        assert!(out.join(f).exists(), "{f}");
    }
    let setup = modegram::setup::Setup::load(&out.join("setup.toml")).unwrap();
    assert_eq!(setup.channels[0].carrier_cycles_per_px(), None);
    let r = run(&[]);
    assert_eq!(r.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&r.stderr).contains("--force"));

    std::fs::write(
        &scn,
        BASE.replace("carrier = [0.25, 0.0]", "carrier = [0.75, 0.0]"),
    )
    .unwrap();
    let out2 = dir.path().join("out2");
    let r = Command::cargo_bin("modegram")
        .unwrap()
        .args([
            "synth",
            scn.to_str().unwrap(),
            "--out",
            out2.to_str().unwrap(),
        ])
        .output()
        .unwrap();
    assert_eq!(r.status.code(), Some(2));
    let e = String::from_utf8_lossy(&r.stderr);
    assert!(
        e.contains("channel[0].carrier") && e.contains("0.75"),
        "{e}"
    );
    assert!(!out2.exists());
}
