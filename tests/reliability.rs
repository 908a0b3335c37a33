//! Mistakes labs make, through the binary: each bad value exits 2 with the key (or file)
//! named, never a panic (exit 101) or an abort, never a hang, and writes nothing.
//! Expected behaviour: common practice, no source (a tool trusted with irreplaceable data).
use assert_cmd::Command;
use std::path::Path;
use std::time::Duration;

const SETUP: &str =
    "version = 1\n[light]\nwavelength_nm = 1550.0\n[camera]\npixel_pitch_um = 5.5\n\
                     [fiber]\nprofile = \"graded\"\ncore_radius_um = 25.0\nna = 0.2\n";

/// Run `modegram ARGS` in `dir` with a time limit; (exit code, stderr).
fn run(dir: &Path, args: &[&str]) -> (Option<i32>, String) {
    let o = Command::cargo_bin("modegram")
        .unwrap()
        .current_dir(dir)
        .args(args)
        .timeout(Duration::from_secs(60))
        .output()
        .unwrap();
    (
        o.status.code(),
        String::from_utf8_lossy(&o.stderr).into_owned(),
    )
}

fn out_is_empty(dir: &Path) -> bool {
    std::fs::read_dir(dir.join("out"))
        .map(|mut r| r.next().is_none())
        .unwrap_or(true)
}

/// Setup values that used to overflow, abort or run for ever: (replace, with, key named).
#[test]
fn absurd_setup_values_are_refused_naming_the_key() {
    let cases: &[(&str, &str, &[&str])] = &[
        (
            "na = 0.2\n",
            "na = 0.2\nsolver_extent_radii = 1e308\n",
            &["fiber.solver_extent_radii"],
        ),
        (
            "na = 0.2\n",
            "na = 0.2\nsolver_extent_radii = 4294967296\n",
            &["fiber.solver_extent_radii"],
        ),
        (
            "na = 0.2\n",
            "na = 0.2\nsolver_points_per_radius = 9223372036854775807\n",
            &["fiber.solver_points_per_radius"],
        ),
        // um typed as nm: V ~ 3e4
        (
            "wavelength_nm = 1550.0",
            "wavelength_nm = 1.064",
            &["light.wavelength_nm", "micrometres", "V ="],
        ),
        (
            "core_radius_um = 25.0",
            "core_radius_um = 1e5",
            &["fiber.core_radius_um", "V ="],
        ),
    ];
    for (from, to, keys) in cases {
        let d = tempfile::tempdir().unwrap();
        std::fs::write(d.path().join("s.toml"), SETUP.replace(from, to)).unwrap();
        let (code, err) = run(d.path(), &["modes", "s.toml", "--out", "out"]);
        assert_eq!(code, Some(2), "{to}: {err}");
        for k in *keys {
            assert!(err.contains(k), "{to}: {k} not in {err}");
        }
        assert!(out_is_empty(d.path()), "{to}: partial output");
    }
}

#[test]
fn oversized_mode_grid_is_refused_before_allocating() {
    let d = tempfile::tempdir().unwrap();
    std::fs::write(d.path().join("s.toml"), SETUP).unwrap();
    let (code, err) = run(
        d.path(),
        &["modes", "s.toml", "--grid-px", "100000", "--out", "out"],
    );
    assert_eq!(code, Some(2), "{err}");
    assert!(
        err.contains("--grid-px 100000") && err.contains("GB"),
        "{err}"
    );
}

/// A 74-byte PNG whose header declares 100000 x 100000 pixels, as the stack, with no dark
/// frame: refused naming the file, nothing allocated.
#[test]
fn frame_header_declaring_a_huge_image_is_refused() {
    let d = tempfile::tempdir().unwrap();
    let mut png = Vec::new();
    png.extend_from_slice(&[0x89, b'P', b'N', b'G', 0x0D, 0x0A, 0x1A, 0x0A]);
    let mut ihdr = Vec::new();
    ihdr.extend_from_slice(&100000u32.to_be_bytes());
    ihdr.extend_from_slice(&100000u32.to_be_bytes());
    ihdr.extend_from_slice(&[16, 0, 0, 0, 0]);
    let chunk = |kind: &[u8], data: &[u8]| {
        let mut c = Vec::new();
        c.extend_from_slice(&(data.len() as u32).to_be_bytes());
        c.extend_from_slice(kind);
        c.extend_from_slice(data);
        let mut crc_in = kind.to_vec();
        crc_in.extend_from_slice(data);
        c.extend_from_slice(&crc32(&crc_in).to_be_bytes());
        c
    };
    png.extend(chunk(b"IHDR", &ihdr));
    png.extend(chunk(
        b"IDAT",
        &[0x78, 0x9c, 0x03, 0x00, 0x00, 0x00, 0x00, 0x01],
    ));
    png.extend(chunk(b"IEND", &[]));
    std::fs::write(d.path().join("big.png"), &png).unwrap();
    let text = format!(
        "{SETUP}[[channel]]\nname = \"H\"\nregion = [0, 0, 256, 256]\nmagnification = 40.0\n"
    );
    std::fs::write(d.path().join("s.toml"), text).unwrap();
    let (code, err) = run(d.path(), &["decode", "s.toml", "big.png", "--out", "out"]);
    assert_eq!(code, Some(2), "{err}");
    assert!(
        err.contains("big.png") && err.contains("100000 x 100000"),
        "{err}"
    );
    assert!(out_is_empty(d.path()));
}

/// CRC-32 (ISO 3309, as PNG uses).
fn crc32(data: &[u8]) -> u32 {
    let mut c = 0xFFFF_FFFFu32;
    for &b in data {
        c ^= b as u32;
        for _ in 0..8 {
            c = if c & 1 != 0 {
                0xEDB8_8320 ^ (c >> 1)
            } else {
                c >> 1
            };
        }
    }
    !c
}

/// A FIFO given as the frame file: refused at once, not read for ever.
#[cfg(unix)]
#[test]
fn a_fifo_as_frame_file_is_refused() {
    let d = tempfile::tempdir().unwrap();
    let fifo = d.path().join("pipe.tif");
    let ok = std::process::Command::new("mkfifo")
        .arg(&fifo)
        .status()
        .map(|s| s.success())
        .unwrap_or(false);
    if !ok {
        eprintln!("mkfifo unavailable: skipped");
        return;
    }
    let text = format!(
        "{SETUP}[[channel]]\nname = \"H\"\nregion = [0, 0, 64, 64]\nmagnification = 40.0\n"
    );
    std::fs::write(d.path().join("s.toml"), text).unwrap();
    let (code, err) = run(d.path(), &["decode", "s.toml", "pipe.tif", "--out", "out"]);
    assert_eq!(code, Some(2), "{err}");
    assert!(
        err.contains("pipe.tif") && err.contains("regular file"),
        "{err}"
    );
}

/// A tabulated profile takes its cladding from the table's last row (docs/setup.md), not
/// from the default `cladding_index`: a 4.5 um step of NA sqrt(1.4500^2 - 1.4470^2) = 0.0932
/// at 1310 nm has V = 2.01, one LP01 mode only (single-mode below V = 2.405, Gloge 1971).
#[test]
fn table_profile_cladding_is_the_last_row() {
    let d = tempfile::tempdir().unwrap();
    let mut csv = String::from("radius_um,index\n");
    for i in 0..=8 {
        let r = i as f64 * 0.5;
        csv.push_str(&format!("{r},1.4500\n"));
    }
    csv.push_str("4.5,1.4500\n4.51,1.4470\n6.0,1.4470\n8.0,1.4470\n");
    std::fs::write(d.path().join("p.csv"), csv).unwrap();
    let text = "version = 1\n[light]\nwavelength_nm = 1310.0\n[camera]\npixel_pitch_um = 5.5\n\
                [fiber]\nprofile = \"table\"\ntable = \"p.csv\"\ncore_radius_um = 4.5\n";
    std::fs::write(d.path().join("s.toml"), text).unwrap();
    let setup = modegram::setup::Setup::load(&d.path().join("s.toml")).unwrap();
    let basis = modegram::modes::Basis::from_setup(&setup).unwrap();
    let labels: Vec<&str> = basis.modes.iter().map(|m| m.label.as_str()).collect();
    assert_eq!(labels, vec!["LP01"], "{labels:?}");
    let v = basis.v_number.unwrap();
    let want =
        2.0 * std::f64::consts::PI * 4.5 * (1.45f64.powi(2) - 1.447f64.powi(2)).sqrt() / 1.31;
    assert!((v - want).abs() < 1e-6, "V {v} vs {want}");
}

/// A simulation that would not fit in memory is refused before it starts.
#[test]
fn synth_with_a_million_repeats_is_refused() {
    let d = tempfile::tempdir().unwrap();
    let scn = std::fs::read_to_string(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("frames-demo/scenario.toml"),
    )
    .unwrap()
    .replace("repeats = 1", "repeats = 1000000");
    std::fs::write(d.path().join("scenario.toml"), scn).unwrap();
    let (code, err) = run(d.path(), &["synth", "scenario.toml", "--out", "out"]);
    assert_eq!(code, Some(2), "{err}");
    assert!(
        err.contains("launch.repeats") && err.contains("GB"),
        "{err}"
    );
    assert!(out_is_empty(d.path()));
}

/// Over-long arrays used to be cut silently to their first values.
#[test]
fn over_long_arrays_are_refused_naming_the_key() {
    let ch = "[[channel]]\nname = \"H\"\nmagnification = 40.0\n";
    for (extra, key) in [
        ("region = [0, 0, 256, 256, \"junk\"]\n", "channel[0].region"),
        (
            "region = [0, 0, 256, 256]\ntilt_mrad = [0.0, 0.0, 5.0]\n",
            "channel[0].tilt_mrad",
        ),
        (
            "region = [0, 0, 256, 256]\ncarrier = [0.25, 0.1, 0.0]\n",
            "carrier = [0.25, 0.1, 0.0]",
        ),
    ] {
        let d = tempfile::tempdir().unwrap();
        std::fs::write(d.path().join("s.toml"), format!("{SETUP}{ch}{extra}")).unwrap();
        let (code, err) = run(d.path(), &["modes", "s.toml", "--out", "out"]);
        assert_eq!(code, Some(2), "{extra}: {err}");
        assert!(
            err.contains(key) && (err.contains("values") || err.contains("invalid length")),
            "{extra}: {err}"
        );
    }
}

/// `run --force --no-calibrate` into a calibrated folder: the earlier calibration.json and
/// fitted.toml go (they describe other results), the set is complete, no staging is left.
#[test]
fn rerun_without_calibration_leaves_no_stale_calibration() {
    let d = tempfile::tempdir().unwrap();
    let setup = Path::new(env!("CARGO_MANIFEST_DIR")).join("frames-demo/setup.toml");
    let s = setup.to_str().unwrap();
    let (code, err) = run(d.path(), &["run", s, "--out", "out", "-q"]);
    assert!(code == Some(0) || code == Some(1), "{err}");
    assert!(d.path().join("out/calibration.json").exists());
    let (code, err) = run(
        d.path(),
        &["run", s, "--out", "out", "--force", "--no-calibrate", "-q"],
    );
    assert!(code == Some(0) || code == Some(1), "{err}");
    let out = d.path().join("out");
    assert!(!out.join("calibration.json").exists() && !out.join("fitted.toml").exists());
    assert!(out.join("report.html").exists() && out.join("matrix.npy").exists());
    let hidden: Vec<_> = std::fs::read_dir(&out)
        .unwrap()
        .filter_map(|e| e.ok())
        .filter(|e| e.file_name().to_string_lossy().starts_with('.'))
        .collect();
    assert!(hidden.is_empty(), "left behind: {hidden:?}");
    let html = std::fs::read_to_string(out.join("report.html")).unwrap();
    assert!(
        !html.contains(".staging"),
        "report names the staging folder"
    );
}

/// `--out` naming a file says so in words.
#[test]
fn out_naming_a_file_is_explained() {
    let d = tempfile::tempdir().unwrap();
    std::fs::write(d.path().join("s.toml"), SETUP).unwrap();
    std::fs::write(d.path().join("afile"), "x").unwrap();
    let (code, err) = run(d.path(), &["modes", "s.toml", "--out", "afile"]);
    assert_eq!(code, Some(2), "{err}");
    assert!(
        err.contains("afile") && err.contains("is a file, not a folder"),
        "{err}"
    );
    assert!(!err.contains("os error"), "{err}");
}
