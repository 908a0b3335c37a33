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
pub fn sampler(
    basis: &Basis,
) -> impl Fn(&Grid, &Alignment) -> Result<Array3<Complex64>> + Sync + '_ {
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
/// (`alignments` replaces the setup's, e.g. with fitted values; `carriers` the setup's or
/// automatic carriers, e.g. with a fitted tilt folded in).
pub fn decode_sequence(
    setup: &Setup,
    basis: &Basis,
    alignments: Option<Vec<Alignment>>,
    carriers: Option<Vec<Option<[f64; 2]>>>,
    keep_fields: bool,
    progress: &(dyn Fn(usize) + Sync),
) -> Result<Decoded> {
    let stack = stack_path(setup)?;
    let opts = DecodeOptions {
        keep_fields,
        strict: setup.decode.strict,
        alignments,
        carriers,
        ..Default::default()
    };
    let s = sampler(basis);
    decode_stack(setup, Some(&s as BasisSampler), &[stack], &opts, progress)
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
/// Sanity problems of a decoded sequence ([`crate::matrix::sanity`]).
pub fn sequence_problems(setup: &Setup, basis: &Basis, d: &Decoded) -> Result<Vec<String>> {
    let l = layout(setup, basis, d.coefficients.dim().0)?;
    Ok(crate::matrix::sequence_problems(d, &l))
}

pub fn analyse_sequence(setup: &Setup, basis: &Basis, d: &Decoded) -> Result<Analysis> {
    let n_frames = d.coefficients.dim().0;
    let layout = layout(setup, basis, n_frames)?;
    let asm = assemble(d.coefficients.view(), &layout, DriftPolicy::Auto)?;
    let groups = basis.groups();
    let captured = mean_captured_per_frame(d);
    let mut opts = AnalysisOptions::new(&groups);
    opts.loss = LossReference::from_setup(setup)?;
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

/// Pictures of one frame per channel: the decoded field (tilt and defocus removed at the
/// channel's alignment) and the Fourier plane of the raw region with the window and the DC
/// exclusion drawn. Returns (file name, picture) pairs.
pub fn frame_pictures(
    setup: &Setup,
    alignments: Option<Vec<Alignment>>,
    frame_index: usize,
) -> Result<Vec<(String, image::RgbImage)>> {
    let stack = stack_path(setup)?;
    let opts = DecodeOptions {
        alignments,
        ..Default::default()
    };
    let prepared = crate::decode::prepare(setup, std::slice::from_ref(&stack), &opts)?;
    let mut frames = crate::frames::FrameStack::open(std::slice::from_ref(&stack))?;
    let fw = frames.width();
    let mut buf = vec![0f32; fw * frames.height()];
    for _ in 0..=frame_index {
        if frames.read_next(&mut buf)?.is_none() {
            return Err(Error::frame(&stack, Some(frame_index), "no such frame"));
        }
    }
    let mut pics = Vec::new();
    for (plan, info) in prepared.plans.iter().zip(&prepared.channels) {
        let g = info.grid();
        let mut scratch = plan.scratch();
        let mut field = vec![Complex64::default(); g.nx * g.ny];
        plan.decode(&buf, &mut scratch, &mut field);
        let field = Array2::from_shape_vec((g.ny, g.nx), field)
            .map_err(|e| Error::Input(format!("decoded field shape: {e}")))?;
        let title = format!("channel {} frame {frame_index}: decoded field", info.name);
        pics.push((
            format!("field_{}.png", info.name),
            crate::render::field_picture(&field, g.pitch_um, &title),
        ));
        let spec = crate::decode::carrier::MeanSpectrum::compute(&[&buf], fw, info.region, &[]);
        let (w, h) = (info.region[2], info.region[3]);
        let logmag = Array2::from_shape_fn((h, w), |(r, c)| {
            let ky = r as i64 - (h / 2) as i64;
            let kx = c as i64 - (w / 2) as i64;
            (spec.at(ky, kx) + 1e-12).log10()
        });
        pics.push((
            format!("fourier_{}.png", info.name),
            crate::render::fourier_picture(
                &logmag,
                info.carrier_cycles_per_px,
                info.window_radius_cycles_per_px,
                setup.decode.dc_exclusion,
            ),
        ));
    }
    Ok(pics)
}

/// File names of the matrix pictures.
pub const MATRIX_PICTURES: [&str; 4] = [
    "matrix_db.png",
    "matrix_phase.png",
    "singular_values.png",
    "group_power.png",
];

/// Pictures of an analysed matrix, named as [`MATRIX_PICTURES`].
pub fn matrix_pictures(basis: &Basis, a: &Analysis) -> Vec<(String, image::RgbImage)> {
    let groups = basis.groups();
    let f = &a.summary.figures;
    let ng = f.group_power_abs.len();
    let gp = Array2::from_shape_fn((ng, ng), |(i, j)| f.group_power_abs[i][j]);
    vec![
        (
            MATRIX_PICTURES[0].into(),
            crate::render::matrix_db_picture(&a.matrix, &groups, basis.len(), -40.0),
        ),
        (
            MATRIX_PICTURES[1].into(),
            crate::render::matrix::matrix_phase_picture(&a.matrix),
        ),
        (
            MATRIX_PICTURES[2].into(),
            crate::render::matrix::singular_values_chart(&f.singular_values),
        ),
        (
            MATRIX_PICTURES[3].into(),
            crate::render::matrix::group_power_picture(&gp),
        ),
    ]
}
