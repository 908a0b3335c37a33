//! `modegram invert MATRIX TARGET`: the input needed for a target output.
//!
//! MATRIX: NPY, complex128 (or float64), shape (outputs, inputs). TARGET: a mode vector,
//! either NPY (complex128 or float64; 1-D of length outputs, or 2-D (targets, outputs)) or
//! CSV (see [`read_target_csv`]), or a grey-scale PNG of the target intensity in one output
//! channel (`--setup SETUP --channel NAME`; see [`crate::matrix::target`]): the image must
//! have the size of the channel's region, and is projected onto the basis the setup
//! describes, sampled on that region's grid. Writes inputs.npy (complex128 (targets,
//! inputs)), predicted.npy (complex128 (targets, outputs)) and invert.json, plus
//! target_field.png and predicted_field.png for an image target; everything is read and
//! computed before the first file is written.
use super::{Common, Outcome};
use crate::error::{Error, Result};
use crate::export::{read_npy, OutDir};
use crate::grid::Grid;
use crate::matrix::invert::{invert_targets, InversionResult, Regularization};
use crate::matrix::target::{field_from_coefficients, image_target};
use crate::modes::Basis;
use crate::render::canvas::write_png;
use crate::render::field::field_picture;
use crate::setup::Setup;
use clap::Args;
use ndarray::{Array1, Array2, Ix1, Ix2};
use num_complex::Complex64;
use std::path::{Path, PathBuf};

/// Files `modegram invert` writes.
pub const INVERT_FILES: [&str; 3] = ["inputs.npy", "predicted.npy", "invert.json"];
/// Pictures written beside them for an image target.
pub const IMAGE_FILES: [&str; 2] = ["target_field.png", "predicted_field.png"];

#[derive(Debug, Args)]
pub struct InvertArgs {
    /// The transfer matrix (NPY, complex128 or float64, outputs x inputs).
    pub matrix: PathBuf,
    /// Target output: mode vector(s) as NPY (1-D of length outputs or 2-D (targets,
    /// outputs)) or CSV (re,im per output row, or re0,im0,re1,im1,... per target row), or a
    /// grey-scale PNG of the target intensity (needs --setup and --channel).
    pub target: PathBuf,
    /// Setup file (TOML) giving the mode basis and the channel's grid, for a PNG target.
    #[arg(long, value_name = "SETUP")]
    pub setup: Option<PathBuf>,
    /// Output channel (its `name` in the setup) a PNG target is for.
    #[arg(long, value_name = "NAME")]
    pub channel: Option<String>,
    /// Tikhonov regularisation lambda, in units of the matrix entries
    /// [default: 1e-6 x the largest singular value].
    #[arg(long, value_name = "VALUE", conflicts_with = "relative_regularization")]
    pub regularization: Option<f64>,
    /// Tikhonov regularisation lambda as a fraction of the largest singular value
    /// [default: 1e-6].
    #[arg(long, value_name = "FRACTION")]
    pub relative_regularization: Option<f64>,
    #[command(flatten)]
    pub common: Common,
}

/// Read a complex matrix from NPY (complex128, or float64 taken as real).
fn read_complex2(path: &Path) -> Result<Array2<Complex64>> {
    match read_npy::<Complex64, Ix2>(path) {
        Ok(a) => Ok(a),
        Err(first) => match read_npy::<f64, Ix2>(path) {
            Ok(a) => Ok(a.mapv(|x| Complex64::new(x, 0.0))),
            Err(_) => Err(first),
        },
    }
}

fn read_complex1(path: &Path) -> Option<Array1<Complex64>> {
    if let Ok(a) = read_npy::<Complex64, Ix1>(path) {
        return Some(a);
    }
    read_npy::<f64, Ix1>(path)
        .ok()
        .map(|a| a.mapv(|x| Complex64::new(x, 0.0)))
}

/// Read the targets of a CSV file for a matrix with `outputs` outputs.
///
/// Format: comma-separated numbers; blank lines and lines starting with `#` are skipped, and
/// so is a first line that does not parse as numbers (a header). Either `outputs` rows of two
/// columns `re,im` (one target, row i = output i), or one row per target with `2 * outputs`
/// columns `re0,im0,re1,im1,...`.
pub fn read_target_csv(path: &Path, outputs: usize) -> Result<Array2<Complex64>> {
    let text = std::fs::read_to_string(path).map_err(|e| Error::io(path, e))?;
    let mut rows: Vec<Vec<f64>> = Vec::new();
    let mut first = true;
    for (ln, line) in text.lines().enumerate() {
        let line = line.trim();
        if line.is_empty() || line.starts_with('#') {
            continue;
        }
        let parsed: std::result::Result<Vec<f64>, _> =
            line.split(',').map(|c| c.trim().parse::<f64>()).collect();
        match parsed {
            Ok(v) => rows.push(v),
            Err(_) if first => {}
            Err(e) => {
                return Err(Error::Input(format!(
                    "{}: line {}: not a list of numbers ({e}): {line:?}",
                    path.display(),
                    ln + 1
                )))
            }
        }
        first = false;
    }
    let n_rows = rows.len();
    let n_cols = rows.first().map_or(0, Vec::len);
    if let Some((i, r)) = rows.iter().enumerate().find(|(_, r)| r.len() != n_cols) {
        return Err(Error::Input(format!(
            "{}: data row {} has {} columns, the first has {n_cols}",
            path.display(),
            i + 1,
            r.len()
        )));
    }
    let z = |r: &[f64], k: usize| Complex64::new(r[2 * k], r[2 * k + 1]);
    if n_cols == 2 && n_rows == outputs {
        Ok(Array2::from_shape_fn((1, outputs), |(_, i)| z(&rows[i], 0)))
    } else if n_cols == 2 * outputs && n_rows > 0 {
        Ok(Array2::from_shape_fn((n_rows, outputs), |(t, i)| {
            z(&rows[t], i)
        }))
    } else {
        Err(Error::Input(format!(
            "{}: {n_rows} rows of {n_cols} columns do not fit a matrix with {outputs} outputs: \
             give {outputs} rows of re,im or one row of {} columns (re0,im0,...) per target",
            path.display(),
            2 * outputs
        )))
    }
}

/// Read the targets (targets, outputs) from NPY or CSV.
pub fn read_targets(path: &Path, outputs: usize) -> Result<Array2<Complex64>> {
    let ext = path
        .extension()
        .and_then(|e| e.to_str())
        .map(str::to_ascii_lowercase)
        .unwrap_or_default();
    let t = match ext.as_str() {
        "npy" => {
            if let Some(v) = read_complex1(path) {
                let n = v.len();
                v.into_shape_with_order((1, n))
                    .map_err(|e| Error::Input(format!("{}: {e}", path.display())))?
            } else {
                read_complex2(path).map_err(|_| {
                    Error::Input(format!(
                        "{}: not a 1-D or 2-D complex128 / float64 NPY array",
                        path.display()
                    ))
                })?
            }
        }
        "csv" => read_target_csv(path, outputs)?,
        "png" => {
            return Err(Error::Input(format!(
                "{}: an image target needs --setup SETUP and --channel NAME (the basis and \
                 the channel's grid to project it on)",
                path.display()
            )))
        }
        _ => {
            return Err(Error::Input(format!(
                "{}: unknown target format {ext:?}; use .npy, .csv or .png",
                path.display()
            )))
        }
    };
    if t.ncols() != outputs {
        return Err(Error::Input(format!(
            "{}: the target has length {}, the matrix has {outputs} outputs",
            path.display(),
            t.ncols()
        )));
    }
    Ok(t)
}

fn table(res: &InversionResult) -> String {
    let r = &res.report;
    let mut s = format!(
        "matrix {} x {}, condition number {:.4e}, lambda {:.3e} ({:.1e} x s_max, {})\n",
        r.outputs,
        r.inputs,
        r.condition_number,
        r.regularization,
        r.regularization_relative,
        r.regularization_source
    );
    let rows: Vec<Vec<String>> = (0..r.targets)
        .map(|t| {
            let p: f64 = res.inputs.row(t).iter().map(|z| z.norm_sqr()).sum();
            vec![
                t.to_string(),
                format!("{:.6}", r.fidelity[t]),
                format!("{:.3e}", r.relative_residual[t]),
                format!("{p:.4e}"),
            ]
        })
        .collect();
    s.push_str(&super::table(
        &["target", "fidelity", "rel. residual", "input power"],
        &rows,
    ));
    s
}

/// Read a grey-scale PNG (8 or 16 bit) as intensities (ny, nx).
pub fn read_grey_png(path: &Path) -> Result<Array2<f64>> {
    let img = image::ImageReader::open(path)
        .map_err(|e| Error::io(path, e))?
        .decode()
        .map_err(|e| Error::Input(format!("{}: not a readable PNG: {e}", path.display())))?;
    let (w, h) = (img.width() as usize, img.height() as usize);
    match img {
        image::DynamicImage::ImageLuma8(g) => Ok(Array2::from_shape_fn((h, w), |(r, c)| {
            g.get_pixel(c as u32, r as u32).0[0] as f64
        })),
        image::DynamicImage::ImageLuma16(g) => Ok(Array2::from_shape_fn((h, w), |(r, c)| {
            g.get_pixel(c as u32, r as u32).0[0] as f64
        })),
        other => Err(Error::Input(format!(
            "{}: a target image must be a grey-scale PNG (8 or 16 bit), this one is {:?}",
            path.display(),
            other.color()
        ))),
    }
}

/// An image target prepared on its channel's grid.
struct ImageJob {
    sampled: ndarray::Array3<Complex64>,
    projected: Array2<Complex64>,
    channel: usize,
    channel_name: String,
    pitch_um: f64,
    captured_power: f64,
}

fn image_job(args: &InvertArgs, outputs: usize) -> Result<(Array2<Complex64>, ImageJob)> {
    let (Some(setup_path), Some(name)) = (&args.setup, &args.channel) else {
        return Err(Error::Input(format!(
            "{}: an image target needs --setup SETUP and --channel NAME (the basis and the \
             channel's grid to project it on)",
            args.target.display()
        )));
    };
    let setup = Setup::load(setup_path)?;
    let names: Vec<&str> = setup.channels.iter().map(|c| c.name.as_str()).collect();
    let channel = names.iter().position(|n| n == name).ok_or_else(|| {
        Error::Input(format!(
            "--channel {name}: {} has no such [[channel]] (names: {})",
            setup_path.display(),
            if names.is_empty() {
                "none".to_string()
            } else {
                names.join(", ")
            }
        ))
    })?;
    let basis = Basis::from_setup(&setup)?;
    let n_ch = setup.channels.len();
    if outputs != n_ch * basis.len() {
        return Err(Error::Input(format!(
            "the matrix has {outputs} outputs, {} describes {n_ch} channels x {} modes = {}",
            setup_path.display(),
            basis.len(),
            n_ch * basis.len()
        )));
    }
    let ch = &setup.channels[channel];
    let pitch_um = ch.fibre_pitch_um(&setup.camera);
    let grid = Grid::centred(ch.region[2], ch.region[3], pitch_um);
    let intensity = read_grey_png(&args.target)?;
    if intensity.dim() != (grid.ny, grid.nx) {
        return Err(Error::Input(format!(
            "{}: the image is {} x {} pixels, channel {name}'s region is {} x {} \
             (width x height)",
            args.target.display(),
            intensity.ncols(),
            intensity.nrows(),
            grid.nx,
            grid.ny
        )));
    }
    let sampled = basis.sample(&grid, &ch.alignment());
    let t = image_target(&intensity, sampled.view(), &grid, channel, n_ch)?;
    let n = t.vector.len();
    let targets = t
        .vector
        .into_shape_with_order((1, n))
        .map_err(|e| Error::Input(e.to_string()))?;
    Ok((
        targets,
        ImageJob {
            sampled,
            projected: t.projected,
            channel,
            channel_name: name.clone(),
            pitch_um,
            captured_power: t.captured_power,
        },
    ))
}

fn is_png(p: &Path) -> bool {
    p.extension()
        .and_then(|e| e.to_str())
        .is_some_and(|e| e.eq_ignore_ascii_case("png"))
}

pub fn run(args: &InvertArgs) -> Result<Outcome> {
    // Check for existing results without creating the folder: a failed run leaves nothing.
    let probe = OutDir {
        path: args.common.out.clone(),
        force: args.common.force,
    };
    let image = is_png(&args.target);
    let mut names: Vec<&str> = INVERT_FILES.to_vec();
    if image {
        names.extend(IMAGE_FILES);
    }
    probe.ensure_writable(&names)?;
    let m = read_complex2(&args.matrix)?;
    let (targets, job) = if image {
        let (t, j) = image_job(args, m.nrows())?;
        (t, Some(j))
    } else {
        (read_targets(&args.target, m.nrows())?, None)
    };
    let reg = match (args.regularization, args.relative_regularization) {
        (Some(v), _) => Regularization::Absolute(v),
        (None, Some(r)) => Regularization::Relative(r),
        (None, None) => Regularization::Default,
    };
    let res = invert_targets(&m, &targets, reg)?;
    for w in &res.report.warnings {
        super::warn(args.common.quiet, w);
    }
    let mut json = serde_json::to_value(&res.report)
        .map_err(|e| Error::Input(format!("invert.json: cannot serialise: {e}")))?;
    json["matrix"] = serde_json::Value::String(args.matrix.display().to_string());
    json["target"] = serde_json::Value::String(args.target.display().to_string());
    let pictures = job.as_ref().map(|j| {
        let n = j.sampled.dim().0;
        let row = res.predicted.row(0);
        let c: Vec<Complex64> = row.iter().skip(j.channel * n).take(n).copied().collect();
        let predicted = field_from_coefficients(&c, j.sampled.view());
        json["image"] = serde_json::json!({
            "channel": j.channel_name,
            "target_captured_power": j.captured_power,
        });
        (
            field_picture(
                &j.projected,
                j.pitch_um,
                "target (projected onto the basis)",
            ),
            field_picture(&predicted, j.pitch_um, "predicted output"),
        )
    });
    let out = OutDir::create(&args.common.out, args.common.force)?;
    out.write_npy(INVERT_FILES[0], &res.inputs)?;
    out.write_npy(INVERT_FILES[1], &res.predicted)?;
    if let Some((t, p)) = &pictures {
        write_png(&out, IMAGE_FILES[0], t)?;
        write_png(&out, IMAGE_FILES[1], p)?;
    }
    out.write_json(INVERT_FILES[2], &json)?;
    let mut table = table(&res);
    if let Some(j) = &job {
        table.push_str(&format!(
            "image target in channel {}: the basis holds {:.4} of its power\n",
            j.channel_name, j.captured_power
        ));
    }
    Ok(Outcome {
        table,
        json,
        failed: false,
    })
}
