//! `modegram calibrate SETUP`: fit each channel's alignment on the launch sequence; write
//! calibration.json and fitted.toml (docs/alignment.md). Exit 1 when a fit does not converge
//! (its channel keeps the starting values in both files).
use super::{Common, Outcome};
use crate::align::calibrate::{
    calibrate, calibration_json, decode_raw, fitted_toml, fold_tilt, parse_frames, stack_path,
};
use crate::align::fit::FitSpec;
use crate::error::{Error, Result};
use crate::export::OutDir;
use crate::modes::Basis;
use crate::setup::Setup;
use clap::Args;
use std::path::PathBuf;

#[derive(Debug, Args)]
pub struct CalibrateArgs {
    /// The setup file (TOML).
    pub setup: PathBuf,
    /// Frames to fit on, 0-based: e.g. `0,5,10-20` (default: every frame of the launch
    /// sequence).
    #[arg(long)]
    pub frames: Option<String>,
    /// Keep the scale (magnification correction) fixed at the setup's value.
    #[arg(long)]
    pub no_scale: bool,
    /// Keep tilt_mrad fixed.
    #[arg(long)]
    pub no_tilt: bool,
    /// Keep defocus_um fixed.
    #[arg(long)]
    pub no_defocus: bool,
    /// Rotation: "auto" (fitted when the captured power depends on it; a basis of complete
    /// degenerate groups does not see rotation), "yes" or "no". Default: auto.
    #[arg(long, default_value = "auto")]
    pub rotation: String,
    /// Half-width of the coarse defocus scan, micrometres (default: 4 lambda / NA^2).
    #[arg(long)]
    pub defocus_range_um: Option<f64>,
    /// Objective evaluations the simplex search may use per channel (default 1500).
    #[arg(long, default_value_t = 1500)]
    pub max_evals: usize,
    #[command(flatten)]
    pub common: Common,
}

pub fn run(args: &CalibrateArgs) -> Result<Outcome> {
    let setup = Setup::load(&args.setup)?;
    let text = std::fs::read_to_string(&args.setup).map_err(|e| Error::io(&args.setup, e))?;
    let out = OutDir::create(&args.common.out, args.common.force)?;
    out.ensure_writable(&["calibration.json", "fitted.toml"])?;
    let rotation = match args.rotation.as_str() {
        "auto" => None,
        "yes" => Some(true),
        "no" => Some(false),
        v => {
            return Err(Error::Input(format!(
                "--rotation {v:?}: use auto, yes or no"
            )))
        }
    };
    if args.max_evals < 1 {
        return Err(Error::Input("--max-evals 0: give at least 1".into()));
    }
    let mut spec = FitSpec {
        rotation,
        scale: !args.no_scale,
        tilt: !args.no_tilt,
        defocus: !args.no_defocus,
        defocus_range_um: args.defocus_range_um,
        ..Default::default()
    };
    spec.nm.max_evals = args.max_evals;
    if let Some(r) = args.defocus_range_um {
        if !(r.is_finite() && r > 0.0) {
            return Err(Error::Input(format!("--defocus-range-um {r}: must be > 0")));
        }
    }
    let basis = Basis::from_setup(&setup)?;
    let stack = stack_path(&setup)?;
    let q = args.common.quiet;
    let pb = super::progress(0, "decode", q);
    let raw = decode_raw(&setup, &[stack], &|n| pb.set_position(n as u64))?;
    pb.finish_and_clear();
    for w in &raw.warnings {
        super::warn(q, w);
    }
    let n_frames = raw.fields.first().map_or(0, |f| f.dim().0);
    let sel = match &args.frames {
        Some(s) => Some(parse_frames(s, n_frames)?),
        None => None,
    };
    let used = sel.as_ref().map_or(n_frames, Vec::len);
    let bars: Vec<_> = setup
        .channels
        .iter()
        .map(|c| super::progress(args.max_evals as u64, &format!("fit {}", c.name), q))
        .collect();
    let fits = calibrate(&setup, &basis, &raw, sel.as_deref(), &spec, &|c, n| {
        bars[c].set_position(n as u64)
    })?;
    for b in &bars {
        b.finish_and_clear();
    }
    let carriers: Vec<[f64; 2]> = raw.info.iter().map(|i| i.carrier_cycles_per_px).collect();
    let decoding = fold_tilt(&setup, &carriers, &fits);
    let json = calibration_json(&setup, &fits, &decoding, &carriers, used);
    let fitted = fitted_toml(&setup, &text, &decoding)?;
    out.write_json("calibration.json", &json)?;
    out.write_text("fitted.toml", &fitted)?;

    let rows: Vec<Vec<String>> = setup
        .channels
        .iter()
        .zip(&fits)
        .map(|(c, f)| {
            let a = &f.fitted;
            vec![
                c.name.clone(),
                format!("{:.2}, {:.2}", a.center_um[0], a.center_um[1]),
                format!("{:.2}", a.rotation_deg),
                format!("{:.4}", a.scale),
                format!("{:.3}, {:.3}", a.tilt_mrad[0], a.tilt_mrad[1]),
                format!("{:.2}", a.defocus_um),
                format!("{:.4}", f.captured_before),
                format!("{:.4}", f.captured_after),
                {
                    let held: Vec<&str> = f
                        .decisions
                        .iter()
                        .filter(|d| !d.fitted)
                        .map(|d| d.parameter)
                        .collect();
                    if held.is_empty() {
                        "-".into()
                    } else {
                        held.join(" ")
                    }
                },
                if f.converged {
                    "yes".into()
                } else {
                    "NO".into()
                },
            ]
        })
        .collect();
    let table = super::table(
        &[
            "channel",
            "center_um",
            "rotation_deg",
            "scale",
            "tilt_mrad",
            "defocus_um",
            "captured_before",
            "captured_after",
            "held (calibration.json: parameters)",
            "converged",
        ],
        &rows,
    );
    let failed: Vec<String> = setup
        .channels
        .iter()
        .zip(&fits)
        .filter(|(_, f)| !f.converged)
        .map(|(c, f)| format!("channel {}: {} (starting values kept)", c.name, f.message))
        .collect();
    if !failed.is_empty() {
        if !q {
            eprint!("{table}");
        }
        return Err(Error::NotConverged(format!(
            "{}; results in {}",
            failed.join("; "),
            out.path.display()
        )));
    }
    Ok(Outcome {
        table,
        json,
        failed: false,
    })
}
