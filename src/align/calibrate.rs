//! `modegram calibrate` as a library call: decode the launch sequence once (carrier removed,
//! tilt and defocus NOT corrected), fit every channel's alignment on the decoded fields
//! ([`super::fit::fit_channel`]), and produce calibration.json and fitted.toml.
//!
//! Contract: [`calibrate`] returns one [`ChannelFit`] per channel in setup order;
//! [`calibration_json`] gives the calibration.json value (an object keyed by channel name);
//! [`fitted_toml`] rewrites the setup text with the fitted values (every other key kept,
//! comments dropped) and every path made absolute, so the fitted setup works from any folder.
//! A channel that did not converge keeps its starting values in both files.
use super::fit::{fit_channel, ChannelFit, FitContext, FitSpec};
use crate::decode::{decode_stack, DecodeOptions};
use crate::error::{Error, Result};
use crate::grid::{Alignment, Grid};
use crate::modes::Basis;
use crate::setup::Setup;
use ndarray::{Array3, Axis};
use num_complex::Complex64;
use serde_json::json;
use std::path::{Path, PathBuf};

/// Decoded fields of every channel without tilt or defocus correction.
pub struct RawFields {
    /// Per channel (frames, ny, nx).
    pub fields: Vec<Array3<Complex64>>,
    pub grids: Vec<Grid>,
    pub info: Vec<crate::decode::ChannelPlanInfo>,
    /// (frames, channels) saturated pixel counts of the regions.
    pub saturated: ndarray::Array2<usize>,
    pub warnings: Vec<String>,
}

pub use crate::pipeline::stack_path;

/// Decode `frames` with every channel's tilt and defocus set to zero (geometry kept).
pub fn decode_raw(
    setup: &Setup,
    frames: &[PathBuf],
    progress: &(dyn Fn(usize) + Sync),
) -> Result<RawFields> {
    let alignments: Vec<Alignment> = setup
        .channels
        .iter()
        .map(|c| super::objective::geometry(&c.alignment()))
        .collect();
    let opts = DecodeOptions {
        keep_fields: true,
        alignments: Some(alignments),
        ..Default::default()
    };
    let d = decode_stack(setup, None, frames, &opts, progress)?;
    let fields = d
        .fields
        .ok_or_else(|| Error::Input("decoder returned no fields".into()))?;
    Ok(RawFields {
        grids: d.channels.iter().map(|c| c.grid()).collect(),
        info: d.channels,
        fields,
        saturated: d.saturated,
        warnings: d.warnings,
    })
}

/// Parse a frame selection like `0,5,10-20` (inclusive ranges) against `n` frames.
pub fn parse_frames(spec: &str, n: usize) -> Result<Vec<usize>> {
    let bad = |why: String| Error::Input(format!("--frames {spec:?}: {why}"));
    let mut out = Vec::new();
    for part in spec.split(',').map(str::trim).filter(|p| !p.is_empty()) {
        let (a, b) = match part.split_once('-') {
            Some((a, b)) => (a.trim(), b.trim()),
            None => (part, part),
        };
        let a: usize = a
            .parse()
            .map_err(|_| bad(format!("{part:?} is not a frame index or range")))?;
        let b: usize = b
            .parse()
            .map_err(|_| bad(format!("{part:?} is not a frame index or range")))?;
        if a > b {
            return Err(bad(format!("range {part:?} runs backwards")));
        }
        if b >= n {
            return Err(bad(format!(
                "frame {b} is past the last frame ({} frames, 0-based)",
                n
            )));
        }
        out.extend(a..=b);
    }
    if out.is_empty() {
        return Err(bad("selects no frame".into()));
    }
    out.sort_unstable();
    out.dedup();
    Ok(out)
}

/// Physical context of a setup's basis.
pub fn context(setup: &Setup, basis: &Basis) -> FitContext {
    let wl = setup.light.wavelength_nm;
    let na = setup
        .na_and_core_index()
        .map(|x| x.0)
        .or_else(|| {
            basis
                .v_number
                .map(|v| v * wl * 1e-3 / (2.0 * std::f64::consts::PI * basis.core_radius_um))
        })
        .unwrap_or(0.2);
    FitContext {
        wavelength_nm: wl,
        core_radius_um: basis.core_radius_um,
        na,
    }
}

/// Fit every channel. `frames`: optional subset of frame indices (already validated).
/// `progress(channel, evaluations)`.
pub fn calibrate(
    setup: &Setup,
    basis: &Basis,
    raw: &RawFields,
    frames: Option<&[usize]>,
    spec: &FitSpec,
    progress: &(dyn Fn(usize, usize) + Sync),
) -> Result<Vec<ChannelFit>> {
    let ctx = context(setup, basis);
    let mut out = Vec::new();
    for (c, ch) in setup.channels.iter().enumerate() {
        let f = &raw.fields[c];
        let sel;
        let view = match frames {
            Some(idx) => {
                sel = f.select(Axis(0), idx);
                sel.view()
            }
            None => f.view(),
        };
        if view.dim().0 == 0 {
            return Err(Error::Input(format!(
                "channel {}: no frames to fit",
                ch.name
            )));
        }
        let sampler = |g: &Grid, a: &Alignment| basis.sample(g, a);
        let fit = fit_channel(
            view,
            &raw.grids[c],
            &ctx,
            &ch.alignment(),
            sampler,
            spec,
            &|n| progress(c, n),
        );
        out.push(fit);
    }
    Ok(out)
}

/// What to decode with after a fit: per channel the alignment and, for a channel whose
/// carrier is automatic, the physical carrier with the fitted tilt folded back in.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Decoding {
    pub alignment: Alignment,
    /// Some: the carrier (cycles/px) to decode with in place of the automatic search.
    pub carrier_cycles_per_px: Option<[f64; 2]>,
    /// The tilt moved into the carrier, cycles/px (zero when nothing was folded).
    pub folded_cycles_per_px: [f64; 2],
}

/// Fold each automatic-carrier channel's fitted tilt back into its carrier.
///
/// A residual carrier error `dc` (cycles/px) and a field tilt are the same thing: the
/// decoded field carries `exp(+i 2 pi dc . r)`, r in camera pixels, which is the tilt phase
/// `exp(+i k t . x)` with `x = r * pitch` (fibre-plane pitch of the channel) when
/// `dc = t * pitch / lambda` (docs/conventions.md). So the fitted tilt beyond the setup's is
/// moved into the carrier, `c' = c + (t_fit - t_setup) pitch / lambda`, and the setup's tilt
/// kept: the recorded carrier is then where the sideband physically sits, and the setup
/// works for any other frames of the same bench. Channels with a given carrier keep it and
/// the fitted tilt. `used` holds the carriers the fields were decoded with.
pub fn fold_tilt(setup: &Setup, used: &[[f64; 2]], fits: &[ChannelFit]) -> Vec<Decoding> {
    let wl_um = setup.light.wavelength_nm * 1e-3;
    setup
        .channels
        .iter()
        .zip(used)
        .zip(fits)
        .map(|((ch, c), f)| {
            let a = f.fitted;
            if ch.carrier_cycles_per_px().is_some() || !f.converged {
                return Decoding {
                    alignment: a,
                    carrier_cycles_per_px: None,
                    folded_cycles_per_px: [0.0; 2],
                };
            }
            let pitch = ch.fibre_pitch_um(&setup.camera);
            let t0 = ch.tilt_mrad;
            let d = [
                (a.tilt_mrad[0] - t0[0]) * 1e-3 * pitch / wl_um,
                (a.tilt_mrad[1] - t0[1]) * 1e-3 * pitch / wl_um,
            ];
            Decoding {
                alignment: Alignment { tilt_mrad: t0, ..a },
                carrier_cycles_per_px: Some([c[0] + d[0], c[1] + d[1]]),
                folded_cycles_per_px: d,
            }
        })
        .collect()
}

/// The calibration.json value: `{name: {center_um, rotation_deg, tilt_mrad, defocus_um,
/// scale, captured_before, captured_after, uncertainty, ...}}`.
pub fn calibration_json(
    setup: &Setup,
    fits: &[ChannelFit],
    decoding: &[Decoding],
    used: &[[f64; 2]],
    frames_used: usize,
) -> serde_json::Value {
    let mut m = serde_json::Map::new();
    for (((ch, f), d), c) in setup.channels.iter().zip(fits).zip(decoding).zip(used) {
        let a = &d.alignment;
        m.insert(
            ch.name.clone(),
            json!({
                "center_um": a.center_um,
                "rotation_deg": a.rotation_deg,
                "tilt_mrad": a.tilt_mrad,
                "defocus_um": a.defocus_um,
                "scale": a.scale,
                "captured_before": f.captured_before,
                "captured_after": f.captured_after,
                "uncertainty": f.uncertainty,
                "uncertainty_kind": "one standard deviation from the curvature (finite-difference Hessian) of the residual power, residual treated as white noise",
                "iterations": f.iterations,
                "converged": f.converged,
                "message": f.message,
                "rotation_fitted": f.rotation_fitted,
                "parameters": f.decisions,
                "fitted_tilt_mrad": f.fitted.tilt_mrad,
                "carrier": {
                    "decoded_with_cycles_per_px": c,
                    "recorded_cycles_per_px": d.carrier_cycles_per_px.unwrap_or(*c),
                    "tilt_folded_cycles_per_px": d.folded_cycles_per_px,
                    "source": if d.carrier_cycles_per_px.is_some() {
                        "automatic, fitted tilt folded in"
                    } else if ch.carrier_cycles_per_px().is_some() {
                        "given (the fitted tilt stays in tilt_mrad)"
                    } else {
                        "automatic (fit did not converge: not refined)"
                    },
                },
                "start": {
                    "center_um": f.start.center_um,
                    "rotation_deg": f.start.rotation_deg,
                    "tilt_mrad": f.start.tilt_mrad,
                    "defocus_um": f.start.defocus_um,
                    "scale": f.start.scale,
                },
                "attempted": {
                    "center_um": f.attempted.center_um,
                    "rotation_deg": f.attempted.rotation_deg,
                    "tilt_mrad": f.attempted.tilt_mrad,
                    "defocus_um": f.attempted.defocus_um,
                    "scale": f.attempted.scale,
                },
                "frames_used": frames_used,
                "retained_fraction": f.retained_fraction,
            }),
        );
    }
    serde_json::Value::Object(m)
}

fn absolute(setup_dir: &Path, p: &str) -> String {
    let pb = Path::new(p);
    let full = if pb.is_absolute() {
        pb.to_path_buf()
    } else {
        setup_dir.join(pb)
    };
    std::fs::canonicalize(&full)
        .unwrap_or_else(|_| {
            std::env::current_dir()
                .map(|d| d.join(&full))
                .unwrap_or(full)
        })
        .display()
        .to_string()
}

/// The setup text with the fitted alignment of each channel written in and every path made
/// absolute (resolved against the setup's folder). Other keys are kept.
/// `decoding` (from [`fold_tilt`]) gives each channel's values; a folded carrier is written
/// as a number.
pub fn fitted_toml(setup: &Setup, text: &str, decoding: &[Decoding]) -> Result<String> {
    let mut doc: toml::Table = text.parse().map_err(|e: toml::de::Error| Error::Parse {
        file: setup.file_name(),
        message: e.to_string(),
    })?;
    let dir = setup.dir.clone();
    let fix = |t: &mut toml::Table, key: &str| {
        if let Some(toml::Value::String(s)) = t.get(key) {
            let a = absolute(&dir, s);
            t.insert(key.into(), toml::Value::String(a));
        }
    };
    for (section, key) in [
        ("frames", "stack"),
        ("frames", "dark"),
        ("frames", "reference"),
        ("fiber", "table"),
        ("launch", "back_to_back"),
    ] {
        if let Some(toml::Value::Table(t)) = doc.get_mut(section) {
            fix(t, key);
        }
    }
    if let Some(toml::Value::Array(chs)) = doc.get_mut("channel") {
        for ch in chs.iter_mut() {
            let toml::Value::Table(t) = ch else { continue };
            let Some(toml::Value::String(name)) = t.get("name") else {
                continue;
            };
            let Some(i) = setup.channels.iter().position(|c| &c.name == name) else {
                continue;
            };
            let a = decoding[i].alignment;
            let arr = |v: [f64; 2]| {
                toml::Value::Array(vec![toml::Value::Float(v[0]), toml::Value::Float(v[1])])
            };
            t.insert("center_um".into(), arr(a.center_um));
            t.insert("rotation_deg".into(), toml::Value::Float(a.rotation_deg));
            t.insert("scale".into(), toml::Value::Float(a.scale));
            t.insert("tilt_mrad".into(), arr(a.tilt_mrad));
            t.insert("defocus_um".into(), toml::Value::Float(a.defocus_um));
            if let Some(c) = decoding[i].carrier_cycles_per_px {
                t.insert("carrier".into(), arr(c));
                t.remove("carrier_period_px");
                t.remove("carrier_angle_deg");
            }
        }
    }
    toml::to_string_pretty(&doc)
        .map_err(|e| Error::Input(format!("fitted.toml: cannot write: {e}")))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn frame_selection_parses_ranges() {
        assert_eq!(
            parse_frames("0,5,10-12", 20).unwrap(),
            vec![0, 5, 10, 11, 12]
        );
        assert_eq!(parse_frames("3, 1-3", 4).unwrap(), vec![1, 2, 3]);
        let e = parse_frames("0,25", 20).unwrap_err().to_string();
        assert!(e.contains("25") && e.contains("20 frames"), "{e}");
        assert!(parse_frames("a-3", 5).is_err());
        assert!(parse_frames("4-2", 5).is_err());
        assert!(parse_frames("", 5).is_err());
    }

    #[test]
    fn fitted_toml_keeps_keys_and_makes_paths_absolute() {
        let d = tempfile::tempdir().unwrap();
        std::fs::write(d.path().join("launch.tif"), b"x").unwrap();
        let text = r#"
version = 1
[light]
wavelength_nm = 1064.0
[camera]
pixel_pitch_um = 5.5
[fiber]
profile = "step"
core_radius_um = 12.5
na = 0.1
[frames]
stack = "launch.tif"
[[channel]]
name = "H"
region = [0, 0, 64, 64]
magnification = 20.0
carrier = [0.25, 0.1]
"#;
        let path = d.path().join("setup.toml");
        let setup = Setup::from_toml(text, &path).unwrap();
        let fitted = Alignment {
            center_um: [1.5, -2.0],
            rotation_deg: 3.0,
            scale: 1.02,
            tilt_mrad: [0.5, -0.25],
            defocus_um: 7.0,
        };
        let fit = ChannelFit {
            start: Alignment::default(),
            fitted,
            attempted: fitted,
            captured_before: 0.5,
            captured_after: 0.9,
            uncertainty: Default::default(),
            iterations: 1,
            converged: true,
            rotation_fitted: false,
            message: String::new(),
            retained_fraction: 1.0,
            decisions: Vec::new(),
        };
        let dec = fold_tilt(&setup, &[[0.25, 0.1]], std::slice::from_ref(&fit));
        assert_eq!(
            dec[0].carrier_cycles_per_px, None,
            "a given carrier is kept"
        );
        let out = fitted_toml(&setup, text, &dec).unwrap();
        let other = tempfile::tempdir().unwrap();
        let s2 = Setup::from_toml(&out, &other.path().join("fitted.toml")).unwrap();
        assert_eq!(s2.channels[0].alignment(), fitted);
        assert_eq!(s2.channels[0].carrier_cycles_per_px(), Some([0.25, 0.1]));
        let stack = s2.resolve(s2.frames.stack.as_ref().unwrap());
        assert!(stack.is_absolute() && stack.exists(), "{}", stack.display());

        // Automatic carrier: the fitted tilt goes into the carrier, the setup's tilt stays.
        // 0.5 mrad at 1.064 um over a 5.5 / 20 = 0.275 um pitch: 0.5e-3 * 0.275 / 1.064
        // cycles/px (docs/conventions.md, tilt phase and carrier sign).
        let auto = text.replace("carrier = [0.25, 0.1]", "carrier = \"auto\"");
        let setup = Setup::from_toml(&auto, &path).unwrap();
        let dec = fold_tilt(&setup, &[[0.25, 0.1]], &[fit]);
        let c = dec[0].carrier_cycles_per_px.expect("folded");
        let want = [0.25 + 0.5e-3 * 0.275 / 1.064, 0.1 - 0.25e-3 * 0.275 / 1.064];
        assert!(
            (c[0] - want[0]).abs() < 1e-12 && (c[1] - want[1]).abs() < 1e-12,
            "{c:?}"
        );
        assert_eq!(dec[0].alignment.tilt_mrad, [0.0, 0.0]);
        let out = fitted_toml(&setup, &auto, &dec).unwrap();
        let s3 = Setup::from_toml(&out, &other.path().join("fitted.toml")).unwrap();
        assert_eq!(s3.channels[0].carrier_cycles_per_px(), Some(c));
        assert_eq!(s3.channels[0].alignment().center_um, fitted.center_um);
    }
}
