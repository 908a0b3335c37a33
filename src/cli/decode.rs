//! `modegram decode SETUP FRAMES... --out DIR`: frames -> fields -> mode coefficients.
//!
//! Writes coefficients.npy (complex128, (frames, channels, modes)), captured.csv, decode.json
//! and, with `--fields`, fields.npy (complex128, (frames, channels, ny, nx)).
use super::{Common, Outcome};
use crate::decode::{decode_stack, BasisSampler, DecodeOptions, Decoded};
use crate::error::{Error, Result};
use crate::export::OutDir;
use crate::setup::Setup;
use clap::Args;
use ndarray::{s, Array4};
use num_complex::Complex64;
use std::fmt::Write;
use std::path::PathBuf;

#[derive(Debug, Args)]
pub struct DecodeArgs {
    /// The setup file (TOML).
    pub setup: PathBuf,
    /// Frame files (TIFF, PNG, NPY), decoded in order as one stack.
    #[arg(required = true)]
    pub frames: Vec<PathBuf>,
    /// Also write every decoded field to fields.npy (frames x channels x ny x nx complex128).
    #[arg(long)]
    pub fields: bool,
    /// Overlap of the sideband with the DC order is an error (default: a warning).
    #[arg(long)]
    pub strict: bool,
    #[command(flatten)]
    pub common: Common,
}

const OUTPUTS: [&str; 3] = ["coefficients.npy", "captured.csv", "decode.json"];

pub fn run(args: &DecodeArgs) -> Result<Outcome> {
    let setup = Setup::load(&args.setup)?;
    let out = OutDir::create(&args.common.out, args.common.force)?;
    let mut names: Vec<&str> = OUTPUTS.to_vec();
    if args.fields {
        names.push("fields.npy");
    }
    out.ensure_writable(&names)?;
    let opts = DecodeOptions {
        keep_fields: args.fields,
        strict: args.strict,
        ..Default::default()
    };
    let total = crate::frames::FrameStack::open(&args.frames)?.len();
    let pb = super::progress(total.unwrap_or(0) as u64, "decode", args.common.quiet);
    let basis = crate::modes::Basis::from_setup(&setup)?;
    let labels: Vec<String> = basis.modes.iter().map(|m| m.label.clone()).collect();
    let sampler = move |g: &crate::grid::Grid, a: &crate::grid::Alignment| Ok(basis.sample(g, a));
    let d = decode_stack(
        &setup,
        Some(&sampler as BasisSampler),
        &args.frames,
        &opts,
        &|n| pb.set_position(n as u64),
    )?;
    pb.finish_and_clear();
    for w in &d.warnings {
        super::warn(args.common.quiet, w);
    }
    write_outputs(&out, &d, &labels)?;
    Ok(Outcome {
        table: table(&d),
        json: summary(&d),
        failed: false,
    })
}

fn write_outputs(out: &OutDir, d: &Decoded, labels: &[String]) -> Result<()> {
    out.write_npy("coefficients.npy", &d.coefficients)?;
    let (nf, nc) = d.captured.dim();
    out.write_text("captured.csv", &crate::pipeline::captured_csv(d))?;
    out.write_json(
        "decode.json",
        &serde_json::json!({
            "frames": nf,
            "modes": labels,
            "channels": d.channels,
            "warnings": d.warnings,
        }),
    )?;
    if let Some(fields) = &d.fields {
        let (ny, nx) = (fields[0].dim().1, fields[0].dim().2);
        if fields.iter().any(|f| f.dim().1 != ny || f.dim().2 != nx) {
            return Err(Error::Input(
                "fields.npy: the channels' decoded grids differ in size; set decode.grid_px \
                 so that they match"
                    .into(),
            ));
        }
        let mut all = Array4::<Complex64>::zeros((nf, nc, ny, nx));
        for (c, f) in fields.iter().enumerate() {
            all.slice_mut(s![.., c, .., ..]).assign(f);
        }
        out.write_npy("fields.npy", &all)?;
    }
    Ok(())
}

fn mean_captured(d: &Decoded, c: usize) -> f64 {
    let col = d.captured.column(c);
    if col.is_empty() {
        0.0
    } else {
        col.sum() / col.len() as f64
    }
}

fn saturated_frames(d: &Decoded, c: usize) -> usize {
    d.saturated.column(c).iter().filter(|&&n| n > 0).count()
}

fn table(d: &Decoded) -> String {
    let rows: Vec<Vec<String>> = d
        .channels
        .iter()
        .enumerate()
        .map(|(c, ch)| {
            vec![
                ch.name.clone(),
                format!(
                    "({:.4}, {:.4}) {}",
                    ch.carrier_cycles_per_px[0], ch.carrier_cycles_per_px[1], ch.carrier_source
                ),
                ch.carrier_uncertainty_cycles_per_px
                    .map_or("-".into(), |u| format!("({:.1e}, {:.1e})", u[0], u[1])),
                ch.carrier_side.clone(),
                format!("{:.4}", ch.window_radius_cycles_per_px),
                format!("{:.4}", ch.separation_margin_cycles_per_px),
                format!("{}x{} @ {:.3}", ch.nx, ch.ny, ch.pitch_um),
                format!("{:.4}", mean_captured(d, c)),
                format!("{}", saturated_frames(d, c)),
            ]
        })
        .collect();
    let mut t = super::table(
        &[
            "channel",
            "carrier [cycles/px]",
            "carrier 1-sigma",
            "side",
            "window [cycles/px]",
            "margin [cycles/px]",
            "grid [px @ um]",
            "mean captured",
            "saturated frames",
        ],
        &rows,
    );
    let _ = writeln!(t, "{} frames decoded", d.captured.nrows());
    t
}

fn summary(d: &Decoded) -> serde_json::Value {
    let ch: Vec<serde_json::Value> = d
        .channels
        .iter()
        .enumerate()
        .map(|(c, ch)| {
            serde_json::json!({
                "name": ch.name,
                "carrier_cycles_per_px": ch.carrier_cycles_per_px,
                "window_radius_cycles_per_px": ch.window_radius_cycles_per_px,
                "separation_margin_cycles_per_px": ch.separation_margin_cycles_per_px,
                "pitch_um": ch.pitch_um, "nx": ch.nx, "ny": ch.ny,
                "mean_captured_power": mean_captured(d, c),
                "saturated_frames": saturated_frames(d, c),
            })
        })
        .collect();
    serde_json::json!({
        "frames": d.captured.nrows(),
        "modes": d.coefficients.dim().2,
        "channels": ch,
        "warnings": d.warnings,
    })
}
