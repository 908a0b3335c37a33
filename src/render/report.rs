//! The self-contained `report.html` of a finished run's folder.
//!
//! Reads what is there and tolerates what is not: `summary.json`, `check.json`,
//! `calibration.json`, `modes.json`, `setup.toml`, `fitted.toml` and every `*.png` in the
//! folder (not in sub-folders). Unknown fields are shown as they are; missing files are
//! listed as "not found". A JSON file that does not parse is bad input (an error naming the
//! file). The page is one file: pictures embedded as `data:image/png;base64` URIs, inline
//! CSS, no scripts, no external resources; all text from the folder is HTML-escaped.
use super::matrix::line_chart;
use crate::error::{Error, Result};
use base64::Engine;
use serde_json::Value;
use std::fmt::Write as _;
use std::path::Path;

/// One thing the report looked for, and what became of it.
#[derive(Debug, Clone, PartialEq, serde::Serialize)]
pub struct Included {
    /// What it is ("summary", "picture", ...).
    pub item: String,
    /// File name in the folder (or a description for generated content).
    pub file: String,
    /// "included", "not found", or why it was skipped.
    pub status: String,
}

/// The finished page and the list of what went into it.
#[derive(Debug, Clone)]
pub struct Report {
    pub html: String,
    pub included: Vec<Included>,
}

/// The report of `dir` as HTML text.
pub fn build_report(dir: &Path) -> Result<String> {
    assemble_report(dir).map(|r| r.html)
}

/// Escape text for HTML element content and attribute values.
pub fn escape(s: &str) -> String {
    let mut o = String::with_capacity(s.len());
    for ch in s.chars() {
        match ch {
            '&' => o.push_str("&amp;"),
            '<' => o.push_str("&lt;"),
            '>' => o.push_str("&gt;"),
            '"' => o.push_str("&quot;"),
            '\'' => o.push_str("&#39;"),
            c => o.push(c),
        }
    }
    o
}

/// The laser-safety note printed in every report's footer.
pub const LASER_SAFETY_NOTE: &str = "Laser safety: the beams used for these measurements are \
often invisible infrared. Invisible infrared beams, and their reflections, can cause \
permanent eye damage before anything is seen or felt. Follow your local laser-safety rules \
(e.g. IEC 60825-1) and the instructions of your laser safety officer; wear eyewear rated \
for the wavelength and power in use.";

struct Png {
    name: String,
    bytes: Vec<u8>,
    width: u32,
    height: u32,
}

/// Read the folder and build the page.
pub fn assemble_report(dir: &Path) -> Result<Report> {
    if !dir.is_dir() {
        return Err(Error::Input(format!(
            "{}: not a folder (give a finished run's output folder)",
            dir.display()
        )));
    }
    let mut inc = Vec::new();
    let summary = read_json(dir, "summary.json", "summary", &mut inc)?;
    let check = read_json(dir, "check.json", "check results", &mut inc)?;
    let calibration = read_json(dir, "calibration.json", "calibration", &mut inc)?;
    let modes = read_json(dir, "modes.json", "mode list", &mut inc)?;
    let setup = read_text(dir, "setup.toml", "setup", &mut inc)?;
    let fitted = read_text(dir, "fitted.toml", "fitted setup", &mut inc)?;
    let pngs = read_pngs(dir, &mut inc)?;

    let (mut p_setup, mut p_cal, mut p_mat, mut p_pow, mut p_other) =
        (vec![], vec![], vec![], vec![], vec![]);
    for p in &pngs {
        let n = p.name.to_lowercase();
        let has = |keys: &[&str]| keys.iter().any(|k| n.contains(k));
        if has(&["captured", "drift"]) {
            p_pow.push(p);
        } else if has(&["matrix", "singular", "group", "crosstalk"]) {
            p_mat.push(p);
        } else if has(&["field", "fourier", "calib", "align", "spectrum"]) {
            p_cal.push(p);
        } else if has(&["gallery", "mode", "basis"]) {
            p_setup.push(p);
        } else {
            p_other.push(p);
        }
    }

    let title = format!(
        "modegram report: {}",
        dir.file_name()
            .map(|s| s.to_string_lossy().into_owned())
            .unwrap_or_else(|| dir.display().to_string())
    );
    let mut h = String::new();
    let _ = write!(
        h,
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n\
         <title>{}</title>\n<style>{CSS}</style>\n</head>\n<body>\n<header><h1>{}</h1>\
         <p>Folder: <code>{}</code></p></header>\n",
        escape(&title),
        escape(&title),
        escape(&dir.display().to_string())
    );
    h.push_str(
        "<nav><a href=\"#setup\">Setup</a> · <a href=\"#check\">Check</a> · \
         <a href=\"#calibration\">Calibration</a> · <a href=\"#matrix\">Matrix</a> · \
         <a href=\"#power\">Captured power</a></nav>\n",
    );

    // Setup
    h.push_str("<section id=\"setup\"><h2>Setup</h2>\n");
    match &setup {
        Some(t) => {
            let _ = writeln!(h, "<h3>setup.toml</h3><pre>{}</pre>", escape(t));
        }
        None => h.push_str("<p class=\"missing\">setup.toml: not found.</p>\n"),
    }
    if let Some(m) = &modes {
        modes_table(&mut h, m);
    }
    figures(&mut h, &p_setup);
    h.push_str("</section>\n");

    // Check
    h.push_str("<section id=\"check\"><h2>Check results</h2>\n");
    match &check {
        Some(c) => check_table(&mut h, c),
        None => h.push_str("<p class=\"missing\">check.json: not found.</p>\n"),
    }
    h.push_str("</section>\n");

    // Calibration
    h.push_str("<section id=\"calibration\"><h2>Calibration</h2>\n");
    match &calibration {
        Some(c) => calibration_table(&mut h, c),
        None => h.push_str("<p class=\"missing\">calibration.json: not found.</p>\n"),
    }
    if let Some(t) = &fitted {
        let _ = writeln!(
            h,
            "<details><summary>fitted.toml</summary><pre>{}</pre></details>",
            escape(t)
        );
    }
    figures(&mut h, &p_cal);
    h.push_str("</section>\n");

    // Matrix
    h.push_str("<section id=\"matrix\"><h2>Transfer matrix and figures of merit</h2>\n");
    match &summary {
        Some(s) => merit_tables(&mut h, s),
        None => h.push_str("<p class=\"missing\">summary.json: not found.</p>\n"),
    }
    figures(&mut h, &p_mat);
    h.push_str("</section>\n");

    // Captured power
    h.push_str("<section id=\"power\"><h2>Captured power</h2>\n");
    let mut chart = None;
    let found: Vec<(&str, &Value)> = CAPTURED_KEYS
        .iter()
        .filter_map(|k| summary.as_ref()?.get(*k).map(|v| (*k, v)))
        .collect();
    if found.is_empty() {
        h.push_str("<p class=\"missing\">No captured power in summary.json.</p>\n");
    } else {
        h.push_str("<table><tr><th>key</th><th>value</th></tr>\n");
        for (k, v) in &found {
            let _ = writeln!(h, "<tr><td>{k}</td><td>{}</td></tr>", escape(&describe(v)));
        }
        h.push_str("</table>\n");
        let series = found
            .iter()
            .map(|(_, v)| per_frame(v))
            .max_by_key(|s| s.len())
            .unwrap_or_default();
        if series.len() > 1 {
            let img = line_chart(
                &series,
                "captured power per frame",
                "frame",
                "captured power (fraction)",
            );
            let bytes = super::canvas::encode_png(&img)?;
            chart = Some(Png {
                name: "captured power per frame (drawn from summary.json)".into(),
                bytes,
                width: img.width(),
                height: img.height(),
            });
        }
    }
    if let Some(c) = &chart {
        inc.push(Included {
            item: "chart".into(),
            file: "captured power (from summary.json)".into(),
            status: format!("drawn, {} × {} px", c.width, c.height),
        });
        figures(&mut h, &[c]);
    }
    figures(&mut h, &p_pow);
    h.push_str("</section>\n");

    if !p_other.is_empty() {
        h.push_str("<section id=\"other\"><h2>Other pictures</h2>\n");
        figures(&mut h, &p_other);
        h.push_str("</section>\n");
    }
    let _ = writeln!(
        h,
        "<footer><p class=\"safety\">{}</p><p>Written by modegram {}.</p></footer>\n</body>\n</html>",
        escape(LASER_SAFETY_NOTE),
        env!("CARGO_PKG_VERSION")
    );
    Ok(Report {
        html: h,
        included: inc,
    })
}

const CSS: &str = "body{font-family:sans-serif;max-width:1250px;margin:1em auto;padding:0 1em;\
color:#222}h1{font-size:1.5em}h2{border-bottom:1px solid #ccc;padding-bottom:.2em;\
margin-top:1.6em}table{border-collapse:collapse;margin:.6em 0}td,th{border:1px solid #ccc;\
padding:.25em .6em;text-align:left;vertical-align:top}th{background:#f2f2f2}\
td.num{text-align:right;font-variant-numeric:tabular-nums}pre{background:#f7f7f7;\
padding:.6em;overflow-x:auto;border:1px solid #ddd}figure{display:inline-block;margin:.5em;\
vertical-align:top}img{max-width:100%;height:auto;border:1px solid #ddd}\
figcaption{font-size:.85em;color:#555}.pass{background:#dafbe1;color:#116329}\
.warn{background:#fff4c2;color:#7a4d00}.fail{background:#ffdcd7;color:#a40e26}\
.unknown{background:#eee}.status{font-weight:bold;text-transform:uppercase}\
.missing{color:#777;font-style:italic}footer{margin-top:2em;border-top:1px solid #ccc;\
font-size:.9em}.safety{background:#fff4c2;border:1px solid #e0c060;padding:.6em}";

fn read_json(dir: &Path, name: &str, item: &str, inc: &mut Vec<Included>) -> Result<Option<Value>> {
    let Some(text) = read_text(dir, name, item, inc)? else {
        return Ok(None);
    };
    serde_json::from_str(&text)
        .map(Some)
        .map_err(|e| Error::Input(format!("{}: not valid JSON: {e}", dir.join(name).display())))
}

fn read_text(
    dir: &Path,
    name: &str,
    item: &str,
    inc: &mut Vec<Included>,
) -> Result<Option<String>> {
    let path = dir.join(name);
    if !path.is_file() {
        inc.push(Included {
            item: item.into(),
            file: name.into(),
            status: "not found".into(),
        });
        return Ok(None);
    }
    let bytes = std::fs::read(&path).map_err(|e| Error::io(&path, e))?;
    inc.push(Included {
        item: item.into(),
        file: name.into(),
        status: "included".into(),
    });
    Ok(Some(String::from_utf8_lossy(&bytes).into_owned()))
}

fn read_pngs(dir: &Path, inc: &mut Vec<Included>) -> Result<Vec<Png>> {
    let rd = std::fs::read_dir(dir).map_err(|e| Error::io(dir, e))?;
    let mut names: Vec<String> = rd
        .filter_map(|e| e.ok())
        .filter(|e| e.path().is_file())
        .map(|e| e.file_name().to_string_lossy().into_owned())
        .filter(|n| n.to_lowercase().ends_with(".png") && !n.starts_with('.'))
        .collect();
    names.sort();
    let mut out = Vec::new();
    for name in names {
        let path = dir.join(&name);
        let bytes = std::fs::read(&path).map_err(|e| Error::io(&path, e))?;
        let dims =
            image::ImageReader::with_format(std::io::Cursor::new(&bytes), image::ImageFormat::Png)
                .into_dimensions();
        match dims {
            Ok((width, height)) if width > 0 && height > 0 => {
                inc.push(Included {
                    item: "picture".into(),
                    file: name.clone(),
                    status: format!("included, {width} × {height} px"),
                });
                out.push(Png {
                    name,
                    bytes,
                    width,
                    height,
                });
            }
            Ok(_) | Err(_) => inc.push(Included {
                item: "picture".into(),
                file: name,
                status: "skipped: not a readable PNG".into(),
            }),
        }
    }
    Ok(out)
}

fn figures(h: &mut String, pngs: &[&Png]) {
    for p in pngs {
        let b64 = base64::engine::general_purpose::STANDARD.encode(&p.bytes);
        let _ = writeln!(
            h,
            "<figure><img src=\"data:image/png;base64,{b64}\" width=\"{w}\" height=\"{hh}\" \
             alt=\"{n}\"><figcaption>{n} ({w} × {hh} px)</figcaption></figure>",
            w = p.width,
            hh = p.height,
            n = escape(&p.name)
        );
    }
}

/// A number with about four significant digits.
pub fn fmt_num(x: f64) -> String {
    if x == 0.0 {
        return "0".into();
    }
    if !x.is_finite() {
        return format!("{x}");
    }
    let a = x.abs();
    if (1e-3..1e5).contains(&a) {
        let d = (3 - a.log10().floor() as i64).max(0) as usize;
        format!("{x:.d$}")
    } else {
        format!("{x:.3e}")
    }
}

fn numbers(v: &Value) -> Option<Vec<f64>> {
    v.as_array()?.iter().map(Value::as_f64).collect()
}

/// A JSON value as short text: numbers formatted, short lists in full, long lists as
/// statistics, anything else as compact JSON (cut at 300 characters).
fn describe(v: &Value) -> String {
    match v {
        Value::Null => "–".into(),
        Value::Bool(b) => b.to_string(),
        Value::Number(n) => n.as_f64().map(fmt_num).unwrap_or_else(|| n.to_string()),
        Value::String(s) => s.clone(),
        Value::Array(a) => match numbers(v) {
            Some(x) if x.len() <= 8 => {
                let parts: Vec<String> = x.iter().map(|&y| fmt_num(y)).collect();
                format!("[{}]", parts.join(", "))
            }
            Some(x) => {
                let (lo, hi) = x
                    .iter()
                    .fold((f64::INFINITY, f64::NEG_INFINITY), |(a, b), &y| {
                        (a.min(y), b.max(y))
                    });
                let mean = x.iter().sum::<f64>() / x.len() as f64;
                format!(
                    "{} values: mean {}, min {}, max {}",
                    x.len(),
                    fmt_num(mean),
                    fmt_num(lo),
                    fmt_num(hi)
                )
            }
            None if a.iter().all(|r| numbers(r).is_some()) && !a.is_empty() => {
                let s = per_frame(v);
                format!(
                    "{} rows; per row mean: {}",
                    a.len(),
                    describe(&Value::from(s))
                )
            }
            None => cut(&v.to_string()),
        },
        Value::Object(_) => cut(&v.to_string()),
    }
}

fn cut(s: &str) -> String {
    if s.chars().count() > 300 {
        s.chars().take(300).collect::<String>() + " …"
    } else {
        s.to_string()
    }
}

/// A per-frame series from a number, a list of numbers, a list of lists (mean of each row)
/// or an object holding one of those under `per_frame`.
fn per_frame(v: &Value) -> Vec<f64> {
    if let Some(x) = numbers(v) {
        return x;
    }
    if let Some(rows) = v.as_array() {
        let mut out = Vec::new();
        for r in rows {
            match numbers(r) {
                Some(x) if !x.is_empty() => out.push(x.iter().sum::<f64>() / x.len() as f64),
                _ => return Vec::new(),
            }
        }
        return out;
    }
    if let Some(inner) = v.get("per_frame") {
        return per_frame(inner);
    }
    v.as_f64().map(|x| vec![x]).unwrap_or_default()
}

/// Summary keys shown in the captured-power section.
const CAPTURED_KEYS: &[&str] = &[
    "captured_power",
    "captured_power_min",
    "captured_power_per_frame",
];

const MERITS: &[(&str, &str, &str)] = &[
    ("insertion_loss_db", "Insertion loss", "dB"),
    ("mode_dependent_loss_db", "Mode-dependent loss", "dB"),
    ("unitarity_error", "Unitarity error", ""),
    ("condition_number", "Condition number", ""),
    (
        "group_crosstalk_overall_db",
        "Group crosstalk, overall",
        "dB",
    ),
    (
        "group_crosstalk_db",
        "Group crosstalk per input group",
        "dB",
    ),
    (
        "polarization_crosstalk_overall_db",
        "Polarisation crosstalk, overall",
        "dB",
    ),
    ("drift_max_abs_rad", "Phase drift, largest", "rad"),
    ("drift_rad", "Phase drift", "rad"),
];

fn merit_tables(h: &mut String, s: &Value) {
    h.push_str("<table><tr><th>figure of merit</th><th>value</th><th>unit</th></tr>\n");
    for (key, label, unit) in MERITS {
        let v = s
            .get(*key)
            .map(describe)
            .unwrap_or_else(|| "not given".into());
        let _ = writeln!(
            h,
            "<tr><td>{}</td><td class=\"num\">{}</td><td>{}</td></tr>",
            escape(label),
            escape(&v),
            unit
        );
    }
    h.push_str("</table>\n");
    if let Some(sv) = s.get("singular_values").and_then(numbers) {
        let _ = writeln!(
            h,
            "<h3>Singular values</h3><details{}><summary>{}</summary>\
             <table><tr><th>i</th><th>s_i</th><th>s_i² (dB)</th></tr>",
            if sv.len() <= 12 { " open" } else { "" },
            escape(&describe(&Value::from(sv.clone())))
        );
        for (i, x) in sv.iter().enumerate() {
            let _ = writeln!(
                h,
                "<tr><td>{i}</td><td class=\"num\">{}</td><td class=\"num\">{}</td></tr>",
                fmt_num(*x),
                fmt_num(20.0 * x.abs().log10())
            );
        }
        h.push_str("</table></details>\n");
    }
    if let Some(rows) = s.get("group_power").and_then(Value::as_array) {
        let rows: Option<Vec<Vec<f64>>> = rows.iter().map(numbers).collect();
        if let Some(rows) = rows.filter(|r| !r.is_empty()) {
            let names: Vec<String> = match s.get("groups").and_then(numbers) {
                Some(g) if g.len() == rows.len() => g.iter().map(|x| format!("G{x}")).collect(),
                _ => (1..=rows.len()).map(|i| format!("G{i}")).collect(),
            };
            h.push_str("<h3>Group power (dB; row: output group, column: input group)</h3><table><tr><th></th>");
            for j in 0..rows[0].len() {
                let name = names
                    .get(j)
                    .cloned()
                    .unwrap_or_else(|| format!("G{}", j + 1));
                let _ = write!(h, "<th>{}</th>", escape(&name));
            }
            h.push_str("</tr>\n");
            for (i, r) in rows.iter().enumerate() {
                let _ = write!(h, "<tr><th>{}</th>", escape(&names[i]));
                for x in r {
                    let _ = write!(h, "<td class=\"num\">{}</td>", fmt_num(10.0 * x.log10()));
                }
                h.push_str("</tr>\n");
            }
            h.push_str("</table>\n");
        }
    }
    let known: Vec<&str> = MERITS
        .iter()
        .map(|m| m.0)
        .chain(CAPTURED_KEYS.iter().copied())
        .chain(["singular_values", "group_power", "groups"])
        .collect();
    if let Some(obj) = s.as_object() {
        let rest: Vec<_> = obj
            .iter()
            .filter(|(k, _)| !known.contains(&k.as_str()))
            .collect();
        if !rest.is_empty() {
            h.push_str("<h3>Other summary values</h3><table><tr><th>key</th><th>value</th></tr>\n");
            for (k, v) in rest {
                let _ = writeln!(
                    h,
                    "<tr><td>{}</td><td>{}</td></tr>",
                    escape(k),
                    escape(&describe(v))
                );
            }
            h.push_str("</table>\n");
        }
    }
}

fn check_items(c: &Value) -> Vec<&Value> {
    if let Some(a) = c.as_array() {
        return a.iter().collect();
    }
    for key in ["items", "checks", "results"] {
        if let Some(a) = c.get(key).and_then(Value::as_array) {
            return a.iter().collect();
        }
    }
    Vec::new()
}

fn check_table(h: &mut String, c: &Value) {
    let items = check_items(c);
    if items.is_empty() {
        h.push_str("<p class=\"missing\">check.json holds no check items.</p>\n");
        return;
    }
    let count = |s: &str| {
        items
            .iter()
            .filter(|i| i.get("status").and_then(Value::as_str) == Some(s))
            .count()
    };
    let _ = writeln!(
        h,
        "<p><span class=\"pass status\">{} pass</span> · <span class=\"warn status\">{} warn</span> · \
         <span class=\"fail status\">{} fail</span></p>",
        count("pass"),
        count("warn"),
        count("fail")
    );
    h.push_str("<table><tr><th>check</th><th>status</th><th>value</th><th>threshold</th><th>hint</th></tr>\n");
    for it in items {
        let text = |k: &str| it.get(k).map(describe).unwrap_or_default();
        let status = it.get("status").and_then(Value::as_str).unwrap_or("?");
        let class = match status {
            "pass" | "warn" | "fail" => status,
            _ => "unknown",
        };
        let _ = writeln!(
            h,
            "<tr class=\"{class}\"><td>{}</td><td class=\"status\">{}</td><td class=\"num\">{}</td>\
             <td class=\"num\">{}</td><td>{}</td></tr>",
            escape(&text("name")),
            escape(status),
            escape(&text("value")),
            escape(&text("threshold")),
            escape(&text("hint"))
        );
    }
    h.push_str("</table>\n");
}

const CAL_KEYS: &[(&str, &str)] = &[
    ("center_um", "centre (µm)"),
    ("rotation_deg", "rotation (°)"),
    ("tilt_mrad", "tilt (mrad)"),
    ("defocus_um", "defocus (µm)"),
    ("scale", "scale"),
    ("captured_before", "captured before"),
    ("captured_after", "captured after"),
];

fn calibration_table(h: &mut String, c: &Value) {
    let inner = c.get("channels").unwrap_or(c);
    let channels: Vec<(String, &Value)> = match inner {
        Value::Object(o) => o
            .iter()
            .filter(|(_, v)| v.is_object())
            .map(|(k, v)| (k.clone(), v))
            .collect(),
        Value::Array(a) => a
            .iter()
            .enumerate()
            .filter(|(_, v)| v.is_object())
            .map(|(i, v)| {
                let name = v
                    .get("name")
                    .map(describe)
                    .unwrap_or_else(|| format!("{i}"));
                (name, v)
            })
            .collect(),
        _ => Vec::new(),
    };
    if channels.is_empty() {
        let _ = writeln!(
            h,
            "<p>calibration.json holds no channels; as written:</p><pre>{}</pre>",
            escape(&cut(&c.to_string()))
        );
        return;
    }
    h.push_str("<table><tr><th>channel</th>");
    for (_, label) in CAL_KEYS {
        let _ = write!(h, "<th>{label}</th>");
    }
    h.push_str("<th>other fitted values</th></tr>\n");
    for (name, v) in channels {
        let _ = write!(h, "<tr><td>{}</td>", escape(&name));
        for (key, _) in CAL_KEYS {
            let t = v.get(*key).map(describe).unwrap_or_else(|| "–".into());
            let _ = write!(h, "<td class=\"num\">{}</td>", escape(&t));
        }
        let other: Vec<String> = v
            .as_object()
            .map(|o| {
                o.iter()
                    .filter(|(k, _)| {
                        k.as_str() != "name" && !CAL_KEYS.iter().any(|c| c.0 == k.as_str())
                    })
                    .map(|(k, x)| format!("{k}: {}", describe(x)))
                    .collect()
            })
            .unwrap_or_default();
        let _ = writeln!(h, "<td>{}</td></tr>", escape(&other.join("; ")));
    }
    h.push_str("</table>\n");
}

fn modes_table(h: &mut String, m: &Value) {
    let Some(list) = m.get("modes").and_then(Value::as_array) else {
        h.push_str("<p class=\"missing\">modes.json holds no mode list.</p>\n");
        return;
    };
    let _ = write!(
        h,
        "<details{}><summary>Mode basis: {} modes</summary>\n<table><tr>",
        if list.len() <= 40 { " open" } else { "" },
        list.len()
    );
    const KEYS: [&str; 7] = ["index", "label", "l", "m", "orientation", "group", "neff"];
    for k in KEYS {
        let _ = write!(h, "<th>{k}</th>");
    }
    h.push_str("</tr>\n");
    for mode in list {
        h.push_str("<tr>");
        for k in KEYS {
            let t = match mode.get(k) {
                Some(Value::Number(n)) if k == "neff" => {
                    n.as_f64().map(|x| format!("{x:.6}")).unwrap_or_default()
                }
                Some(v) => describe(v),
                None => "–".into(),
            };
            let _ = write!(h, "<td>{}</td>", escape(&t));
        }
        h.push_str("</tr>\n");
    }
    h.push_str("</table></details>\n");
}
