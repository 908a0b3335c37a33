//! The files `modegram synth` writes: the frames (multi-page TIFF, or NPY without
//! quantisation), truth_matrix.npy, truth.json and a ready-to-run setup.toml.
//!
//! setup.toml is a [`crate::setup::Setup`] serialised with the scenario's light, camera,
//! fibre and basis; each channel gets its region and nominal magnification, the true carrier
//! (or "auto") and the NOMINAL alignment (zeros: what the user knows before calibrating)
//! unless the true alignment is asked for; [launch] repeats the scenario's launch description
//! with power_counts = the signal counts per unit launched power.
use crate::error::{Error, Result};
use crate::export::OutDir;
use crate::matrix::FrameRole;
use crate::setup::{AutoOr, ChannelSpec, FramesSpec, LaunchSpec, Setup};
use crate::synth::scenario::Scenario;
use crate::synth::simulate::Simulation;
use crate::synth::truth::power_counts;
use ndarray::Array2;
use serde_json::json;
use std::path::PathBuf;

/// Choices for the written setup.
#[derive(Debug, Clone, Copy, Default)]
pub struct SetupOptions {
    /// carrier = "auto" instead of the true carrier.
    pub auto_carrier: bool,
    /// Write the true alignment instead of the nominal one.
    pub true_alignment: bool,
}

/// Names of the files written, in order: stack, dark, reference, truth matrix, truth.json,
/// setup.toml.
pub fn file_names(scn: &Scenario) -> [&'static str; 6] {
    if scn.noise.quantisation {
        [
            "launch.tif",
            "dark.tif",
            "reference.tif",
            "truth_matrix.npy",
            "truth.json",
            "setup.toml",
        ]
    } else {
        [
            "launch.npy",
            "dark.npy",
            "reference.npy",
            "truth_matrix.npy",
            "truth.json",
            "setup.toml",
        ]
    }
}

/// Encode frames as one multi-page grayscale TIFF (8 or 16 bits, uncompressed).
pub fn tiff_bytes(frames: &[&Array2<f64>], bit_depth: u32) -> Result<Vec<u8>> {
    use tiff::encoder::{colortype, TiffEncoder};
    let mut cur = std::io::Cursor::new(Vec::new());
    let err = |e: tiff::TiffError| Error::Input(format!("TIFF encoding failed: {e}"));
    {
        let mut enc = TiffEncoder::new(&mut cur).map_err(err)?;
        for f in frames {
            let (h, w) = f.dim();
            if bit_depth == 8 {
                let data: Vec<u8> = f.iter().map(|v| v.clamp(0.0, 255.0) as u8).collect();
                enc.write_image::<colortype::Gray8>(w as u32, h as u32, &data)
                    .map_err(err)?;
            } else {
                let data: Vec<u16> = f.iter().map(|v| v.clamp(0.0, 65535.0) as u16).collect();
                enc.write_image::<colortype::Gray16>(w as u32, h as u32, &data)
                    .map_err(err)?;
            }
        }
    }
    Ok(cur.into_inner())
}

/// The ready-to-run setup for the simulated frames.
pub fn setup_for(scn: &Scenario, opts: SetupOptions) -> Setup {
    let names = file_names(scn);
    let mut fiber = scn.fiber.clone();
    if let Some(t) = &fiber.table {
        let p = scn.resolve(t);
        fiber.table = Some(std::fs::canonicalize(&p).unwrap_or(p));
    }
    let mut camera = scn.camera.clone();
    camera.saturation_counts = Some(scn.saturation_counts());
    let channels = scn
        .channels
        .iter()
        .map(|c| {
            let al = if opts.true_alignment {
                c.alignment()
            } else {
                crate::grid::Alignment::default()
            };
            ChannelSpec {
                name: c.name.clone(),
                region: c.region,
                magnification: c.magnification,
                carrier: if opts.auto_carrier {
                    AutoOr::Auto("auto".into())
                } else {
                    AutoOr::Value(c.carrier)
                },
                carrier_period_px: None,
                carrier_angle_deg: None,
                conjugate: false,
                window_radius: AutoOr::Auto("auto".into()),
                center_um: al.center_um,
                rotation_deg: al.rotation_deg,
                scale: al.scale,
                tilt_mrad: al.tilt_mrad,
                defocus_um: al.defocus_um,
            }
        })
        .collect();
    Setup {
        version: 1,
        light: scn.light.clone(),
        camera,
        fiber,
        basis: scn.basis.clone(),
        frames: FramesSpec {
            stack: Some(PathBuf::from(names[0])),
            dark: Some(PathBuf::from(names[1])),
            reference: Some(PathBuf::from(names[2])),
        },
        channels,
        launch: LaunchSpec {
            polarizations: scn.launch.polarizations.clone(),
            reference_every: scn.launch.reference_every,
            reference_input: scn.launch.reference_input,
            repeats: scn.launch.repeats,
            power_counts: power_counts(scn),
            back_to_back: None,
        },
        decode: Default::default(),
        dir: PathBuf::new(),
        file: PathBuf::new(),
    }
}

/// setup.toml text: a header comment and the serialised setup.
pub fn setup_text(scn: &Scenario, opts: SetupOptions) -> Result<String> {
    let body = toml::to_string(&setup_for(scn, opts))
        .map_err(|e| Error::Input(format!("setup.toml: cannot serialise: {e}")))?;
    let align = if opts.true_alignment {
        "the TRUE alignment of the simulation"
    } else {
        "the nominal alignment (zeros); `modegram calibrate` fits the true one"
    };
    Ok(format!(
        "# Written by `modegram synth` from {}.\n# Channels carry {align}.\n{body}",
        scn.file.display()
    ))
}

/// truth.json: the true alignment, carriers, drift, noise levels, seed and figures.
pub fn truth_json(scn: &Scenario, sim: &Simulation) -> Result<serde_json::Value> {
    let n_ch = scn.channels.len();
    let n_pols = scn.launch.polarizations.len();
    let fig = crate::matrix::figures(&sim.truth, &sim.groups, n_ch, n_pols, -20.0)?;
    let channels: Vec<_> = scn
        .channels
        .iter()
        .map(|c| {
            json!({
                "name": c.name,
                "region": c.region,
                "magnification": c.magnification,
                "center_um": c.center_um,
                "rotation_deg": c.rotation_deg,
                "scale": c.scale,
                "tilt_mrad": c.tilt_mrad,
                "defocus_um": c.defocus_um,
                "carrier_cycles_per_px": c.carrier,
                "reference_wavevector_cycles_per_px": [-c.carrier[0], -c.carrier[1]],
                "reference_waist_px": c.reference_waist_px,
                "reference_offset_px": c.reference_offset_px,
                "reference_peak_counts": c.reference_peak_counts,
                "signal_counts": c.signal_counts,
            })
        })
        .collect();
    let frames: Vec<_> = sim
        .layout
        .roles
        .iter()
        .enumerate()
        .map(|(f, r)| match r {
            FrameRole::Input { pol, mode, repeat } => json!({
                "frame": f, "kind": "input", "input": pol * sim.layout.n_modes + mode,
                "repeat": repeat, "drift_rad": sim.drift_rad[f]}),
            FrameRole::Reference { k } => json!({
                "frame": f, "kind": "reference", "reference": k,
                "input": sim.layout.reference_input, "drift_rad": sim.drift_rad[f]}),
        })
        .collect();
    Ok(json!({
        "seed": scn.seed,
        "scenario": scn.file.display().to_string(),
        "n_frames": sim.frames.len(),
        "n_modes": sim.groups.len(),
        "groups": sim.groups,
        "power_counts": power_counts(scn),
        "phase_reference": "truth_matrix.npy is what an ideal decoder with the true alignment \
            recovers from a frame at drift 0: the decoded field is S conj(R) / |R| with the \
            reference phase 0 at each region's centre pixel. Frame f's reference is \
            R exp(i drift_rad[f]), so its decoded coefficients are the column times \
            exp(-i drift_rad[f]).",
        "channels": channels,
        "drift": {"step_rad": scn.drift.step_rad, "rate_rad_per_frame": scn.drift.rate_rad_per_frame},
        "drift_rad": sim.drift_rad,
        "frames": frames,
        "noise": {
            "shot": scn.noise.shot,
            "read": scn.noise.read,
            "quantisation": scn.noise.quantisation,
            "saturation": scn.noise.saturation,
            "gain_e_per_count": scn.sensor.gain_e_per_count,
            "read_noise_counts": scn.sensor.read_noise_counts,
            "dark_offset_counts": scn.sensor.dark_offset_counts,
            "saturation_counts": scn.saturation_counts(),
            "bit_depth": scn.sensor.bit_depth,
            "fill_factor": scn.camera.fill_factor,
            "subpixels": scn.sensor.subpixels,
            "calibration_averages": scn.noise.calibration_averages,
            "clipped_pixels": sim.clipped_pixels,
        },
        "truth": {
            "insertion_loss_db": fig.insertion_loss_db,
            "mode_dependent_loss_db": fig.mode_dependent_loss_db,
            "singular_values": fig.singular_values,
            "group_crosstalk_db": fig.group_crosstalk_overall_db,
            "polarization_crosstalk_db": fig.polarization_crosstalk_overall_db,
        },
    }))
}

/// Write every file; returns their paths in [`file_names`] order.
pub fn write_all(
    out: &OutDir,
    scn: &Scenario,
    sim: &Simulation,
    opts: SetupOptions,
) -> Result<Vec<PathBuf>> {
    let names = file_names(scn);
    let truth = truth_json(scn, sim)?;
    let setup = setup_text(scn, opts)?;
    let mut paths = Vec::new();
    if scn.noise.quantisation {
        // encode everything first, so an encoding error leaves no file behind
        let bits = scn.sensor.bit_depth;
        let frames: Vec<&Array2<f64>> = sim.frames.iter().collect();
        let bytes = [
            tiff_bytes(&frames, bits)?,
            tiff_bytes(&[&sim.dark], bits)?,
            tiff_bytes(&[&sim.reference], bits)?,
        ];
        for (name, b) in names.iter().zip(bytes.iter()) {
            paths.push(out.write_bytes(name, b)?);
        }
    } else {
        let (h, w) = sim.dark.dim();
        let mut stack = ndarray::Array3::<f64>::zeros((sim.frames.len(), h, w));
        for (i, f) in sim.frames.iter().enumerate() {
            stack.index_axis_mut(ndarray::Axis(0), i).assign(f);
        }
        paths.push(out.write_npy(names[0], &stack)?);
        paths.push(out.write_npy(names[1], &sim.dark)?);
        paths.push(out.write_npy(names[2], &sim.reference)?);
    }
    paths.push(out.write_npy(names[3], &sim.truth)?);
    paths.push(out.write_json(names[4], &truth)?);
    paths.push(out.write_text(names[5], &setup)?);
    Ok(paths)
}
