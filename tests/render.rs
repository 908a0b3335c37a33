//! Pictures and the HTML report: sizes, colour conventions, overlay positions, PNG encoding,
//! embedding and escaping, and the `modegram report` command.
use modegram::export::OutDir;
use modegram::render::colour::complex_rgb;
use modegram::render::{self, matrix, Geometry};
use ndarray::{Array2, Array3};
use num_complex::Complex64;
use std::f64::consts::{PI, TAU};
use std::path::Path;

fn px(img: &image::RgbImage, x: f64, y: f64) -> [u8; 3] {
    img.get_pixel(x.floor() as u32, y.floor() as u32).0
}

fn dominant(c: [u8; 3]) -> usize {
    (0..3).max_by_key(|&i| c[i]).unwrap()
}

// --- field pictures -------------------------------------------------------------------

#[test]
fn field_picture_has_its_geometry_and_cell_colours() {
    // Common practice, no source: the picture's data area shows each cell's complex colour.
    let f = Array2::from_shape_fn((48, 64), |(r, c)| {
        Complex64::from_polar(1.0 + (r + c) as f64 / 100.0, 0.1 * c as f64)
    });
    let img = render::field_picture(&f, 0.5, "test field");
    let g = render::field_geometry(48, 64);
    assert_eq!(img.dimensions(), (g.image_width, g.image_height));
    assert_eq!(g.width, (64.0 * g.px_per_cell) as u32);
    let peak = f.iter().map(|z| z.norm()).fold(0.0, f64::max);
    for (r, c) in [(0, 0), (10, 40), (47, 63)] {
        let (x, y) = g.data_to_px(r as f64, c as f64);
        assert_eq!(px(&img, x, y), complex_rgb(f[[r, c]], peak), "cell {r},{c}");
    }
    // The title is drawn: dark pixels in the band above the data area.
    let dark = (0..g.image_width)
        .flat_map(|x| (0..g.top).map(move |y| (x, y)))
        .filter(|&(x, y)| img.get_pixel(x, y).0.iter().all(|&v| v < 100))
        .count();
    assert!(dark > 30, "title text missing ({dark} dark pixels)");
}

#[test]
fn colour_wheel_hue_follows_the_phase_convention() {
    // docs/conventions.md (common practice, no source): phase 0 red, 2 pi/3 green,
    // 4 pi/3 blue; wheel angle measured from +x towards +y (y downwards on screen).
    let f = Array2::from_elem((32, 32), Complex64::new(1.0, 0.0));
    let img = render::field_picture(&f, 1.0, "wheel");
    let (cx, cy, r) = render::field_geometry(32, 32).wheel.expect("legend");
    for (angle, colour) in [(0.0, 0), (TAU / 3.0, 1), (2.0 * TAU / 3.0, 2)] {
        let c = px(
            &img,
            cx + 0.8 * r * f64::cos(angle),
            cy + 0.8 * r * f64::sin(angle),
        );
        assert_eq!(dominant(c), colour, "angle {angle}: {c:?}");
        assert!(c[colour] > 150, "angle {angle}: {c:?}");
    }
    // Radius = amplitude: dark near the centre, bright at the rim.
    let centre = px(&img, cx + 1.0, cy + 1.0);
    assert!(centre.iter().all(|&v| v < 30), "{centre:?}");
    // Phase pi/2 sits straight below the centre (y down): hue 90 degrees, yellow-green.
    let below = px(&img, cx, cy + 0.9 * r);
    assert!(
        below[1] > 200 && below[0] > 90 && below[0] < 160 && below[2] < 30,
        "{below:?}"
    );
}

#[test]
fn a_vortex_field_turns_like_the_wheel() {
    // docs/conventions.md: azimuth phi = atan2(y, x), y downwards; a field exp(+i phi) shows
    // phase 0 right of the centre and pi/2 below it, the same hues as the legend.
    let n = 64;
    let f = Array2::from_shape_fn((n, n), |(r, c)| {
        let (x, y) = (c as f64 - 32.0, r as f64 - 32.0);
        Complex64::from_polar(1.0, y.atan2(x))
    });
    let img = render::field_picture(&f, 1.0, "vortex");
    let g = render::field_geometry(n, n);
    let right = g.data_to_px(32.0, 56.0);
    let below = g.data_to_px(56.0, 32.0);
    assert_eq!(
        px(&img, right.0, right.1),
        complex_rgb(Complex64::new(1.0, 0.0), 1.0)
    );
    let expect = complex_rgb(Complex64::from_polar(1.0, PI / 2.0), 1.0);
    assert_eq!(px(&img, below.0, below.1), expect);
}

#[test]
fn empty_field_gives_a_picture_without_panic() {
    // Common practice, no source: bad input never panics.
    let img = render::field_picture(&Array2::zeros((0, 0)), f64::NAN, "empty");
    let g = render::field_geometry(0, 0);
    assert_eq!(img.dimensions(), (g.image_width, g.image_height));
}

#[test]
fn gallery_tiles_every_mode() {
    // Common practice, no source: one tile per mode, `cols` per row.
    let modes = Array3::from_shape_fn((5, 20, 30), |(k, r, c)| {
        Complex64::new((k + 1) as f64 * (r as f64 - 10.0), c as f64)
    });
    let labels: Vec<String> = (0..5).map(|k| format!("LP{k}")).collect();
    let img = render::gallery_picture(&modes, &labels, 3);
    let (w, h, tw, th, cols) = render::gallery_geometry(5, 20, 30, 3);
    assert_eq!(cols, 3);
    assert_eq!(img.dimensions(), (w, h));
    assert!(w >= 3 * tw && h >= 2 * th, "two rows of three tiles");
    // Fewer labels than modes and zero columns are tolerated.
    let img = render::gallery_picture(&modes, &labels[..2], 0);
    assert_eq!(img.dimensions().0, render::gallery_geometry(5, 20, 30, 0).0);
}

// --- Fourier plane --------------------------------------------------------------------

/// Distances (pixels) from `centre` along direction `a` where pixels have colour `c`.
fn hits_along(
    img: &image::RgbImage,
    g: &Geometry,
    centre: (f64, f64),
    a: f64,
    c: [u8; 3],
) -> Vec<f64> {
    let mut d = Vec::new();
    let mut t = 0.0;
    while t < 400.0 {
        let (x, y) = (centre.0 + t * a.cos(), centre.1 + t * a.sin());
        let inside = x >= g.left as f64
            && y >= g.top as f64
            && x < (g.left + g.width) as f64
            && y < (g.top + g.height) as f64;
        if inside && px(img, x, y) == c {
            d.push(t);
        }
        t += 0.25;
    }
    d
}

#[test]
fn fourier_window_circle_has_the_window_radius() {
    // docs/conventions.md: shifted bin [row, col] holds f = (index - n/2) / n cycles/px, so a
    // window of radius r cycles/px spans r * n bins (common practice, no source).
    for (ny, nx) in [(128, 128), (96, 128)] {
        let spec = Array2::from_shape_fn((ny, nx), |(r, c)| ((r * 7 + c * 3) % 11) as f64);
        let carrier = [0.25, -0.125];
        let (radius, dc) = (0.1, 0.05);
        let img = render::fourier_picture(&spec, carrier, radius, dc);
        let g = render::fourier_geometry(ny, nx);
        assert_eq!(img.dimensions(), (g.image_width, g.image_height));
        let centre = render::frequency_to_px(&g, ny, nx, carrier);
        let (rx, ry) = (
            radius * nx as f64 * g.px_per_cell,
            radius * ny as f64 * g.px_per_cell,
        );
        for (a, expect) in [(0.0, rx), (PI, rx), (PI / 2.0, ry), (-PI / 2.0, ry)] {
            let d = hits_along(&img, &g, centre, a, render::fourier::WINDOW_RGB);
            assert!(!d.is_empty(), "{ny}x{nx} angle {a}: no window outline");
            let mean = d.iter().sum::<f64>() / d.len() as f64;
            assert!(
                (mean - expect).abs() < 1.0,
                "{ny}x{nx} angle {a}: {mean} vs {expect}"
            );
        }
        let dcp = render::frequency_to_px(&g, ny, nx, [0.0, 0.0]);
        let d = hits_along(&img, &g, dcp, PI / 2.0, render::fourier::DC_RGB);
        let mean = d.iter().sum::<f64>() / d.len().max(1) as f64;
        let expect = dc * ny as f64 * g.px_per_cell;
        assert!((mean - expect).abs() < 1.0, "DC circle {mean} vs {expect}");
        // The carrier sits right of and above DC for fx > 0, fy < 0 (y downwards).
        assert!(centre.0 > dcp.0 && centre.1 < dcp.1);
    }
}

// --- matrices -------------------------------------------------------------------------

#[test]
fn group_boundaries_sit_between_groups_and_blocks() {
    // docs/conventions.md matrix layout: index = block * n_modes + mode; groups [1,2,2,3,3,3]
    // change before modes 1 and 3 of each block (common practice, no source).
    let groups = [1u32, 2, 2, 3, 3, 3];
    let n = 6;
    let m = Array2::from_shape_fn((12, 12), |(r, c)| {
        Complex64::new(1.0 + 0.01 * (r + c) as f64, 0.0)
    });
    let img = render::matrix_db_picture(&m, &groups, n, -40.0);
    let g = render::matrix_geometry(12, 12);
    assert_eq!(img.dimensions(), (g.image_width, g.image_height));
    let s = g.px_per_cell;
    assert!(s >= 4.0);
    let white = matrix::BOUNDARY_RGB;
    let y_mid_row0 = g.top as f64 + 0.5 * s;
    let x_mid_col0 = g.left as f64 + 0.5 * s;
    let expected = [1usize, 3, 6, 7, 9];
    for k in 1..12 {
        let b = g.left as f64 + k as f64 * s;
        let at_x = px(&img, b, y_mid_row0);
        let at_y = px(&img, x_mid_col0, g.top as f64 + k as f64 * s);
        let want = expected.contains(&k);
        assert_eq!(at_x == white, want, "column boundary {k}: {at_x:?}");
        assert_eq!(at_y == white, want, "row boundary {k}: {at_y:?}");
        // Cell interiors are not lines.
        assert_ne!(px(&img, b + 0.5 * s, y_mid_row0), white);
    }
    // The block boundary is thicker than a group boundary.
    assert_eq!(px(&img, g.left as f64 + 6.0 * s - 2.0, y_mid_row0), white);
    assert_ne!(px(&img, g.left as f64 + 1.0 * s - 2.0, y_mid_row0), white);
    // A group list that does not fit draws no boundaries (and does not panic).
    let img = render::matrix_db_picture(&m, &groups[..4], n, -40.0);
    assert_ne!(px(&img, g.left as f64 + s, y_mid_row0), white);
}

#[test]
fn boundary_list_names_groups_and_blocks() {
    // Common practice, no source.
    let b = matrix::boundaries(8, &[1, 1, 2, 2], 4);
    assert_eq!(b, vec![(2, false), (4, true), (6, false)]);
    assert!(matrix::boundaries(7, &[1, 1, 2, 2], 4).is_empty());
}

#[test]
fn matrix_db_colours_follow_relative_power() {
    // Common practice, no source: 0 dB at the largest entry, floor_db and below at the bottom.
    let mut m = Array2::from_elem((4, 4), Complex64::new(0.0, 0.0));
    m[[0, 0]] = Complex64::new(10.0, 0.0);
    m[[1, 1]] = Complex64::new(0.1, 0.0); // -40 dB
    m[[2, 2]] = Complex64::new(1.0, 0.0); // -20 dB
    let img = render::matrix_db_picture(&m, &[1, 1, 1, 1], 4, -40.0);
    let g = render::matrix_geometry(4, 4);
    let at = |r: f64, c: f64| {
        let (x, y) = g.data_to_px(r, c);
        px(&img, x, y)
    };
    use modegram::render::colour::ramp_rgb;
    assert_eq!(at(0.0, 0.0), ramp_rgb(1.0));
    assert_eq!(at(1.0, 1.0), ramp_rgb(0.0));
    assert_eq!(at(2.0, 2.0), ramp_rgb(0.5));
    assert_eq!(at(3.0, 3.0), ramp_rgb(0.0));
}

#[test]
fn phase_picture_dims_weak_entries() {
    // Common practice, no source: hue = arg M, weak entries darker.
    let mut m = Array2::from_elem((2, 2), Complex64::new(1e-4, 0.0));
    m[[0, 0]] = Complex64::new(1.0, 0.0);
    m[[0, 1]] = Complex64::from_polar(1.0, TAU / 3.0);
    let img = render::matrix_phase_picture(&m);
    let g = render::matrix_geometry(2, 2);
    let at = |r: f64, c: f64| {
        let (x, y) = g.data_to_px(r, c);
        px(&img, x, y)
    };
    assert_eq!(at(0.0, 0.0), [255, 0, 0]);
    assert_eq!(at(0.0, 1.0), [0, 255, 0]);
    let weak = at(1.1, 1.1);
    assert!(weak[0] < 60 && weak[0] > 0, "{weak:?}");
}

#[test]
fn charts_are_drawn() {
    // Common practice, no source: a chart has non-white content and the documented size.
    let img = render::singular_values_chart(&[1.0, 0.9, 0.5, 0.0, 0.1]);
    assert_eq!(img.dimensions(), (800, 420));
    let coloured = img.pixels().filter(|p| p.0 == [30, 80, 180]).count();
    assert!(coloured > 100, "series not drawn: {coloured}");
    let p = Array2::from_shape_fn((3, 3), |(i, j)| if i == j { 0.9 } else { 0.05 });
    let img = render::group_power_picture(&p);
    assert!(img.width() > 3 * 24 && img.height() > 3 * 24);
}

#[test]
fn png_written_through_the_output_folder_decodes() {
    // Common practice, no source: PNG round trip is lossless.
    let d = tempfile::tempdir().unwrap();
    let out = OutDir::create(d.path(), false).unwrap();
    let f = Array2::from_shape_fn((16, 16), |(r, c)| Complex64::new(r as f64, c as f64));
    let img = render::field_picture(&f, 2.0, "png");
    let path = render::write_png(&out, "field.png", &img).unwrap();
    let back = image::open(&path).unwrap().to_rgb8();
    assert_eq!(back, img);
    assert!(
        render::write_png(&out, "field.png", &img).is_err(),
        "needs --force"
    );
}

// --- report ---------------------------------------------------------------------------

fn run_folder(d: &Path) {
    let out = OutDir::create(d, true).unwrap();
    let m = Array2::from_shape_fn((8, 8), |(r, c)| {
        Complex64::from_polar(1.0 / (1.0 + (r as f64 - c as f64).abs()), (r * c) as f64)
    });
    render::write_png(
        &out,
        "matrix_db.png",
        &render::matrix_db_picture(&m, &[1, 2, 2, 3], 4, -40.0),
    )
    .unwrap();
    render::write_png(
        &out,
        "singular_values.png",
        &render::singular_values_chart(&[1.0, 0.8, 0.5]),
    )
    .unwrap();
    let summary = serde_json::json!({
        "insertion_loss_db": -1.25,
        "mode_dependent_loss_db": 3.5,
        "singular_values": [1.0, 0.8, 0.5],
        "unitarity_error": 0.02,
        "condition_number": 2.0,
        "group_power": [[0.9, 0.1], [0.1, 0.9]],
        "group_crosstalk_db": -9.54,
        "captured_power": [0.95, 0.96, 0.94, 0.97],
        "something_new": {"x": 1}
    });
    out.write_json("summary.json", &summary).unwrap();
}

#[test]
fn report_embeds_every_picture_and_loads_nothing_from_outside() {
    // Common practice, no source: one self-contained file.
    let d = tempfile::tempdir().unwrap();
    run_folder(d.path());
    let r = render::assemble_report(d.path()).unwrap();
    let html = &r.html;
    assert_eq!(
        html.matches("src=\"data:image/png;base64,").count(),
        3,
        "2 PNGs + captured-power chart"
    );
    assert_eq!(html.matches("src=").count(), 3);
    for (i, _) in html.match_indices("href=\"") {
        assert!(html[i + 6..].starts_with('#'), "external link at {i}");
    }
    assert!(!html.contains("<script") && !html.contains("<link") && !html.contains("url("));
    for key in [
        "Insertion loss",
        "-1.250",
        "G2",
        "something_new",
        "IEC 60825-1",
    ] {
        assert!(html.contains(key), "{key} missing");
    }
    let pics: Vec<_> = r.included.iter().filter(|i| i.item == "picture").collect();
    assert_eq!(pics.len(), 2);
    assert!(pics.iter().all(|p| p.status.starts_with("included")));
    // The embedded bytes are the files' bytes.
    use base64::Engine;
    let start = html.find("base64,").unwrap() + 7;
    let end = start + html[start..].find('"').unwrap();
    let bytes = base64::engine::general_purpose::STANDARD
        .decode(&html[start..end])
        .unwrap();
    assert_eq!(
        bytes,
        std::fs::read(d.path().join("matrix_db.png")).unwrap()
    );
}

#[test]
fn report_escapes_text_from_the_folder() {
    // Common practice, no source: text from files never becomes markup.
    let d = tempfile::tempdir().unwrap();
    let check = serde_json::json!([
        {"name": "<script>alert(1)</script>", "status": "fail", "value": 3, "threshold": 1, "hint": "a & b"},
        {"name": "carrier", "status": "pass", "value": 0.2, "threshold": 0.1, "hint": ""},
        {"name": "fringe contrast", "status": "warn", "value": "low", "threshold": null, "hint": "\"quoted\""}
    ]);
    std::fs::write(d.path().join("check.json"), check.to_string()).unwrap();
    std::fs::write(d.path().join("setup.toml"), "# <b>bold</b>\nversion = 1\n").unwrap();
    let cal = serde_json::json!({"H": {"center_um": [1.0, -2.0], "rotation_deg": 0.5, "scale": 1.01, "captured_before": 0.8, "captured_after": 0.95, "extra<i>": 1}});
    std::fs::write(d.path().join("calibration.json"), cal.to_string()).unwrap();
    let html = render::build_report(d.path()).unwrap();
    assert!(!html.contains("<script>") && !html.contains("<b>bold") && !html.contains("extra<i>"));
    assert!(html.contains("&lt;script&gt;alert(1)&lt;/script&gt;"));
    assert!(html.contains("a &amp; b") && html.contains("&quot;quoted&quot;"));
    assert!(html.contains("&lt;b&gt;bold&lt;/b&gt;"));
    assert!(
        html.contains("<tr class=\"fail\">")
            && html.contains("<tr class=\"pass\">")
            && html.contains("<tr class=\"warn\">")
    );
    assert!(html.contains("1 pass") && html.contains("1 warn") && html.contains("1 fail"));
    assert!(html.contains("[1.000, -2.000]") && html.contains("0.9500"));
}

#[test]
fn report_tolerates_missing_files_and_rejects_broken_ones() {
    // Common practice, no source.
    let d = tempfile::tempdir().unwrap();
    let r = render::assemble_report(d.path()).unwrap();
    assert!(r.html.contains("summary.json: not found"));
    assert!(r
        .html
        .contains(render::report::LASER_SAFETY_NOTE.split(' ').next().unwrap()));
    assert!(r.included.iter().all(|i| i.status == "not found"));
    std::fs::write(d.path().join("broken.png"), b"not a png").unwrap();
    let r = render::assemble_report(d.path()).unwrap();
    assert!(r
        .included
        .iter()
        .any(|i| i.file == "broken.png" && i.status.starts_with("skipped")));
    assert!(!r.html.contains("data:image"));
    std::fs::write(d.path().join("summary.json"), "{ not json").unwrap();
    let e = render::assemble_report(d.path()).unwrap_err();
    assert!(e.to_string().contains("summary.json"), "{e}");
    assert_eq!(e.exit_code(), 2);
    let e = render::assemble_report(&d.path().join("absent")).unwrap_err();
    assert_eq!(e.exit_code(), 2);
}

#[test]
fn laser_note_warns_without_naming_products() {
    // IEC 60825-1 (safety of laser products) is the standard the note points to.
    let n = render::report::LASER_SAFETY_NOTE;
    assert!(
        n.contains("invisible infrared")
            && n.contains("eye damage")
            && n.contains("laser safety officer")
    );
    assert!(!n.contains('®') && !n.contains('™'));
}

#[test]
fn report_command_writes_once_and_honours_force_and_out() {
    // Common practice, no source: outputs are not overwritten without --force (exit 2).
    let d = tempfile::tempdir().unwrap();
    run_folder(d.path());
    let bin = assert_cmd::cargo::cargo_bin("modegram");
    let run = |args: &[&str]| {
        std::process::Command::new(&bin)
            .args(args)
            .current_dir(d.path())
            .output()
            .unwrap()
    };
    let dir = d.path().to_str().unwrap();
    let o = run(&["report", dir]);
    assert!(o.status.success(), "{}", String::from_utf8_lossy(&o.stderr));
    let stdout = String::from_utf8_lossy(&o.stdout);
    assert!(
        stdout.contains("matrix_db.png") && stdout.contains("summary.json"),
        "{stdout}"
    );
    assert!(d.path().join("report.html").is_file());
    let o = run(&["report", dir]);
    assert_eq!(o.status.code(), Some(2));
    assert!(String::from_utf8_lossy(&o.stderr).contains("--force"));
    assert!(run(&["report", dir, "--force"]).status.success());
    let other = d.path().join("elsewhere");
    let o = run(&["report", dir, "--out", other.to_str().unwrap(), "--json"]);
    assert!(o.status.success());
    let v: serde_json::Value = serde_json::from_slice(&o.stdout).unwrap();
    assert!(v["report"].as_str().unwrap().contains("elsewhere"));
    assert!(other.join("report.html").is_file());
}

#[test]
fn report_shows_a_mean_and_per_frame_captured_power() {
    // Common practice, no source: summary.json with a mean captured power and a per-frame
    // list; group numbers label the group power table.
    let d = tempfile::tempdir().unwrap();
    let summary = serde_json::json!({
        "captured_power": 0.93,
        "captured_power_min": 0.9,
        "captured_power_per_frame": [0.9, 0.95, 0.94],
        "groups": [2, 5],
        "group_power": [[0.9, 0.1], [0.1, 0.9]],
        "group_crosstalk_overall_db": -9.5
    });
    std::fs::write(d.path().join("summary.json"), summary.to_string()).unwrap();
    let r = render::assemble_report(d.path()).unwrap();
    assert_eq!(
        r.html.matches("src=\"data:image/png;base64,").count(),
        1,
        "per-frame chart"
    );
    assert!(r.included.iter().any(|i| i.item == "chart"));
    assert!(r.html.contains("<th>G5</th>") && r.html.contains("-9.500"));
    assert!(r.html.contains("captured_power_min") && !r.html.contains("Other summary values"));
}
