//! `modegram invert MATRIX TARGET`: the input needed for a target output.
//!
//! MATRIX: NPY, complex128 (or float64), shape (outputs, inputs). TARGET: a mode vector,
//! either NPY (complex128 or float64; 1-D of length outputs, or 2-D (targets, outputs)) or
//! CSV (see [`read_target_csv`]). Writes inputs.npy (complex128 (targets, inputs)),
//! predicted.npy (complex128 (targets, outputs)) and invert.json; everything is read and
//! computed before the first file is written.
use super::{Common, Outcome};
use crate::error::{Error, Result};
use crate::export::{read_npy, OutDir};
use crate::matrix::invert::{invert_targets, InversionResult, Regularization};
use clap::Args;
use ndarray::{Array1, Array2, Ix1, Ix2};
use num_complex::Complex64;
use std::path::{Path, PathBuf};

/// Files `modegram invert` writes.
pub const INVERT_FILES: [&str; 3] = ["inputs.npy", "predicted.npy", "invert.json"];

#[derive(Debug, Args)]
pub struct InvertArgs {
    /// The transfer matrix (NPY, complex128 or float64, outputs x inputs).
    pub matrix: PathBuf,
    /// Target output: mode vector(s) as NPY (1-D of length outputs or 2-D (targets,
    /// outputs)) or CSV (re,im per output row, or re0,im0,re1,im1,... per target row).
    pub target: PathBuf,
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
                "{}: image targets need the mode basis, which this build cannot project onto; \
                 give the target as a mode vector (NPY or CSV)",
                path.display()
            )))
        }
        _ => {
            return Err(Error::Input(format!(
                "{}: unknown target format {ext:?}; use .npy or .csv",
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

pub fn run(args: &InvertArgs) -> Result<Outcome> {
    // Check for existing results without creating the folder: a failed run leaves nothing.
    let probe = OutDir {
        path: args.common.out.clone(),
        force: args.common.force,
    };
    probe.ensure_writable(&INVERT_FILES)?;
    let m = read_complex2(&args.matrix)?;
    let targets = read_targets(&args.target, m.nrows())?;
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
    let out = OutDir::create(&args.common.out, args.common.force)?;
    out.write_npy(INVERT_FILES[0], &res.inputs)?;
    out.write_npy(INVERT_FILES[1], &res.predicted)?;
    out.write_json(INVERT_FILES[2], &json)?;
    Ok(Outcome {
        table: table(&res),
        json,
        failed: false,
    })
}
