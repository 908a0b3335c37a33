//! The whole job as library calls, shared by `modegram matrix`, `modegram run` and the
//! alignment tools: the setup's launch sequence -> decoded coefficients -> transfer matrix ->
//! figures of merit -> files and pictures.
//!
//! Nothing here computes physics of its own; it wires the stages together and decides which
//! files a run writes (listed up front, so a run refuses to start rather than overwrite).
use crate::decode::{decode_stack, BasisSampler, DecodeOptions, Decoded};
use crate::error::{Error, Result};
use crate::export::OutDir;
use crate::grid::{Alignment, Grid};
use crate::matrix::{
    analyse, assemble, Analysis, AnalysisOptions, DriftPolicy, LaunchLayout, LossReference,
};
use crate::modes::Basis;
use crate::setup::Setup;
use ndarray::{Array2, Array3};
use num_complex::Complex64;
use std::fmt::Write as _;
use std::path::PathBuf;

/// The basis sampled on a grid at an alignment, as the decoder asks for it.
pub fn sampler(basis: &Basis) -> impl Fn(&Grid, &Alignment) -> Result<Array3<Complex64>> + Sync + '_ {
    move |g: &Grid, a: &Alignment| Ok(basis.sample(g, a))
}

/// The launch sequence named in the setup (`frames.stack`), which must exist.
pub fn stack_path(setup: &Setup) -> Result<PathBuf> {
    let Some(p) = &setup.frames.stack else {
        return Err(Error::setup(
            setup.file_name(),
            "frames.stack",
            "(missing)",
            "name the launch sequence (TIFF, PNG or NPY stack) to build a matrix from",
        ));
    };
    let p = setup.resolve(p);
    if !p.exists() {
        return Err(Error::setup(
            setup.file_name(),
            "frames.stack",
            p.display(),
            "no such file",
        ));
    }
    Ok(p)
}

/// Decode the setup's launch sequence with the basis projected at each channel's alignment
/// (`alignments` replaces the setup's, e.g. with fitted values).
pub fn decode_sequence(
    setup: &Setup,
    basis: &Basis,
    alignments: Option<Vec<Alignment>>,
    keep_fields: bool,
    progress: &(dyn Fn(usize) + Sync),
) -> Result<Decoded> {
    let stack = stack_path(setup)?;
    let opts = DecodeOptions {
        keep_fields,
        strict: setup.decode.strict,
        alignments,
        ..Default::default()
    };
    let s = sampler(basis);
    decode_stack(setup, Some(&s as BasisSampler), &[stack], &opts, progress)
}

/// What the insertion loss is relative to, from the setup's [launch].
pub fn loss_reference(setup: &Setup) -> Result<LossReference> {
    if let Some(p) = &setup.launch.back_to_back {
        let p = setup.resolve(p);
        let m: Array2<Complex64> = crate::export::read_npy(&p)?;
        return Ok(LossReference::BackToBack(m));
    }
    if setup.launch.power_counts > 0.0 {
        return Ok(LossReference::PowerCounts(setup.launch.power_counts));
    }
    Ok(LossReference::Relative)
}

/// The launch layout of the setup for `basis`, checked against the decoded frame count.
pub fn layout(setup: &Setup, basis: &Basis, n_frames: usize) -> Result<LaunchLayout> {
    let layout = LaunchLayout::new(&setup.launch, basis.len())?;
    let what = setup
        .frames
        .stack
        .as_ref()
        .map(|p| format!("frames.stack ({})", setup.resolve(p).display()))
        .unwrap_or_else(|| "the frames".into());
    layout.validate_frames(n_frames, &what)?;
    Ok(layout)
}

/// Assemble and analyse the matrix of a decoded launch sequence.
pub fn analyse_sequence(setup: &Setup, basis: &Basis, d: &Decoded) -> Result<Analysis> {
    let n_frames = d.coefficients.dim().0;
    let layout = layout(setup, basis, n_frames)?;
    let asm = assemble(d.coefficients.view(), &layout, DriftPolicy::Auto)?;
    let groups = basis.groups();
    let captured = mean_captured_per_frame(d);
    let mut opts = AnalysisOptions::new(&groups);
    opts.loss = loss_reference(setup)?;
    opts.captured_power = Some(&captured);
    analyse(&asm, &opts)
}

/// Captured power of each frame, averaged over the channels weighted by field power.
pub fn mean_captured_per_frame(d: &Decoded) -> Vec<f64> {
    let (nf, nc) = d.captured.dim();
    (0..nf)
        .map(|f| {
            let (mut num, mut den) = (0.0, 0.0);
            for c in 0..nc {
                let p = d.field_power[[f, c]];
                num += d.captured[[f, c]] * p;
                den += p;
            }
            if den > 0.0 {
                num / den
            } else {
                0.0
            }
        })
        .collect()
}

/// Files the decode part of a run writes.
pub const DECODE_FILES: [&str; 4] = [
    "modes.json",
    "coefficients.npy",
    "captured.csv",
    "decode.json",
];

/// Write modes.json, coefficients.npy, captured.csv and decode.json.
pub fn write_decode_files(out: &OutDir, basis: &Basis, d: &Decoded) -> Result<()> {
    out.write_json("modes.json", &serde_json::json!({ "modes": basis.modes }))?;
    out.write_npy("coefficients.npy", &d.coefficients)?;
    out.write_text("captured.csv", &captured_csv(d))?;
    out.write_json(
        "decode.json",
        &serde_json::json!({
            "frames": d.coefficients.dim().0,
            "channels": d.channels,
            "warnings": d.warnings,
        }),
    )?;
    Ok(())
}

/// captured.csv: frame, channel, captured power, saturated pixels, field power.
pub fn captured_csv(d: &Decoded) -> String {
    let mut csv = String::from("frame,channel,captured_power,saturated_px,field_power\n");
    let (nf, nc) = d.captured.dim();
    for f in 0..nf {
        for c in 0..nc {
            let _ = writeln!(
                csv,
                "{f},{},{:.6e},{},{:.6e}",
                d.channels[c].name,
                d.captured[[f, c]],
                d.saturated[[f, c]],
                d.field_power[[f, c]]
            );
        }
    }
    csv
}
