//! The report opened in a real browser (headless Chromium): every embedded picture decodes
//! to its natural size and the page renders with its styles. Skipped, with a note, when
//! /usr/bin/chromium (or $MODEGRAM_CHROMIUM) is absent; CI installs it
//! (.ci/install-browser.sh).
use modegram::export::OutDir;
use modegram::render;
use ndarray::Array2;
use num_complex::Complex64;
use std::path::{Path, PathBuf};
use std::process::{Command, Stdio};
use std::time::{Duration, Instant};

fn chromium() -> Option<PathBuf> {
    let p = std::env::var_os("MODEGRAM_CHROMIUM")
        .map(PathBuf::from)
        .unwrap_or_else(|| PathBuf::from("/usr/bin/chromium"));
    p.is_file().then_some(p)
}

/// Run the browser headless with a fresh profile; stdout, or a panic after two minutes.
fn browse(bin: &Path, profile: &Path, args: &[String]) -> String {
    let mut cmd = Command::new(bin);
    cmd.args([
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--hide-scrollbars",
    ])
    .arg(format!("--user-data-dir={}", profile.display()))
    .args(args)
    .stdin(Stdio::null())
    .stdout(Stdio::piped())
    .stderr(Stdio::null());
    let mut child = cmd.spawn().expect("start chromium");
    let stdout = child.stdout.take().unwrap();
    let reader = std::thread::spawn(move || {
        let mut s = String::new();
        use std::io::Read;
        let mut stdout = stdout;
        let _ = stdout.read_to_string(&mut s);
        s
    });
    let start = Instant::now();
    loop {
        if child.try_wait().unwrap().is_some() {
            break;
        }
        if start.elapsed() > Duration::from_secs(120) {
            let _ = child.kill();
            let _ = child.wait();
            panic!("chromium did not finish within 120 s");
        }
        std::thread::sleep(Duration::from_millis(100));
    }
    reader.join().unwrap()
}

fn run_folder(d: &Path) -> Vec<(u32, u32)> {
    let out = OutDir::create(d, true).unwrap();
    let m = Array2::from_shape_fn((12, 12), |(r, c)| {
        Complex64::from_polar(
            1.0 / (1.0 + (r as f64 - c as f64).abs()),
            (r + 2 * c) as f64,
        )
    });
    let a = render::matrix_db_picture(&m, &[1, 2, 2, 3, 3, 3], 6, -40.0);
    let f = Array2::from_shape_fn((40, 50), |(r, c)| {
        Complex64::from_polar(
            (-((r as f64 - 20.0).powi(2) + (c as f64 - 25.0).powi(2)) / 80.0).exp(),
            0.2 * c as f64,
        )
    });
    let b = render::field_picture(&f, 0.4, "field H");
    render::write_png(&out, "matrix_db.png", &a).unwrap();
    render::write_png(&out, "field_H.png", &b).unwrap();
    out.write_json(
        "summary.json",
        &serde_json::json!({"insertion_loss_db": -1.0, "captured_power": [0.9, 0.92, 0.95]}),
    )
    .unwrap();
    out.write_json(
        "check.json",
        &serde_json::json!([{"name": "saturation", "status": "fail", "value": 3, "threshold": 0, "hint": "lower the exposure"}]),
    )
    .unwrap();
    // Pictures in the page's order: calibration section (field), matrix section, then the
    // captured-power chart drawn by the report (800 x 420).
    vec![b.dimensions(), a.dimensions(), (800, 420)]
}

#[test]
fn report_renders_in_a_headless_browser() {
    // Common practice, no source: a self-contained page shows every picture at its size.
    let Some(bin) = chromium() else {
        println!("note: /usr/bin/chromium not found; browser check skipped (.ci/install-browser.sh installs it)");
        return;
    };
    let d = tempfile::tempdir().unwrap();
    let expected = run_folder(d.path());
    let html = render::build_report(d.path()).unwrap();
    let report = d.path().join("report.html");
    std::fs::write(&report, &html).unwrap();

    // 1. Natural sizes of the decoded images, written into the DOM by a probe script added
    //    to a copy of the page (the report itself has no scripts).
    let probe = "<script>window.addEventListener('load', function () {\
        var o = []; for (var i = 0; i < document.images.length; i++) {\
        var im = document.images[i]; o.push(im.naturalWidth + 'x' + im.naturalHeight); }\
        var p = document.createElement('pre'); p.textContent = 'SIZ' + 'ES[' + o.join(',') + ']';\
        document.body.appendChild(p); });</script></body>";
    let probed = d.path().join("probe.html");
    std::fs::write(&probed, html.replace("</body>", probe)).unwrap();
    let profile = tempfile::tempdir().unwrap();
    let dom = browse(
        &bin,
        profile.path(),
        &["--dump-dom".into(), format!("file://{}", probed.display())],
    );
    let start = dom.find("SIZES[").expect("probe output in the DOM") + 6;
    let end = start + dom[start..].find(']').unwrap();
    let sizes: Vec<(u32, u32)> = dom[start..end]
        .split(',')
        .map(|s| {
            let (w, h) = s.split_once('x').unwrap();
            (w.parse().unwrap(), h.parse().unwrap())
        })
        .collect();
    assert_eq!(sizes, expected, "decoded image sizes");

    // 2. A screenshot of the page itself: not blank, pictures and styles visible.
    let shot = d.path().join("shot.png");
    let profile = tempfile::tempdir().unwrap();
    browse(
        &bin,
        profile.path(),
        &[
            format!("--screenshot={}", shot.display()),
            "--window-size=1200,2000".into(),
            format!("file://{}", report.display()),
        ],
    );
    let img = image::open(&shot).expect("screenshot written").to_rgb8();
    assert_eq!(img.dimensions(), (1200, 2000));
    let total = (img.width() * img.height()) as usize;
    let non_white = img.pixels().filter(|p| p.0 != [255, 255, 255]).count();
    assert!(
        non_white * 20 > total,
        "page looks blank: {non_white} of {total} pixels"
    );
    // The failed check's row background (#ffdcd7) shows that the inline CSS applied.
    let fail_bg = img.pixels().filter(|p| p.0 == [0xff, 0xdc, 0xd7]).count();
    assert!(fail_bg > 500, "fail row not coloured: {fail_bg} pixels");
    // Saturated colours of the field picture show that the pictures were painted.
    let vivid = img
        .pixels()
        .filter(|p| p.0.iter().max().unwrap() - p.0.iter().min().unwrap() > 200)
        .count();
    assert!(vivid > 2000, "pictures not painted: {vivid} vivid pixels");
}
