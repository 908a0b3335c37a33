//! From an assembled matrix to its summary: normalisation by the launched power
//! ([`LossReference`]), the figures of merit ([`super::analysis`]), the drift and reference
//! stability ([`super::drift`]) and the captured power of the frames, plus the human table.
//!
//! The normalised matrix is the one written to matrix.npy: with `power_counts` it is the
//! field transfer per unit launched amplitude, with a back-to-back matrix the transfer
//! relative to the back-to-back path, otherwise scaled to mean s_i^2 = 1.
use super::analysis::{figures, normalisation, Figures, LossReference, DEFAULT_CUT_OFF_DB};
use super::assemble::Assembly;
use crate::error::{Error, Result};
use ndarray::Array2;
use num_complex::Complex64;
use serde::Serialize;

/// Figures that do not depend on the column phases of the matrix (see [`super::analysis`]).
pub const PHASE_INSENSITIVE: [&str; 10] = [
    "singular_values",
    "insertion_loss_db",
    "mode_dependent_loss_db",
    "unitarity_error",
    "condition_number",
    "group_power",
    "group_crosstalk_db",
    "group_received_db",
    "polarization_crosstalk_db",
    "cut_off_groups",
];

/// What the analysis needs beside the assembled matrix.
#[derive(Debug, Clone)]
pub struct AnalysisOptions<'a> {
    /// Group number of every mode (modes.json order).
    pub groups: &'a [u32],
    /// What the insertion loss is relative to.
    pub loss: LossReference,
    /// Threshold of a cut-off group, dB relative to the mean group.
    pub cut_off_db: f64,
    /// Captured power of every frame (fraction), when known.
    pub captured_power: Option<&'a [f64]>,
}

impl<'a> AnalysisOptions<'a> {
    /// Relative insertion loss, default cut-off, no captured power.
    pub fn new(groups: &'a [u32]) -> Self {
        AnalysisOptions {
            groups,
            loss: LossReference::Relative,
            cut_off_db: DEFAULT_CUT_OFF_DB,
            captured_power: None,
        }
    }
}

/// Everything summary.json holds.
#[derive(Debug, Clone, Serialize)]
pub struct MatrixSummary {
    #[serde(flatten)]
    pub figures: Figures,
    /// "power_counts" | "back_to_back" | "relative".
    pub insertion_loss_reference: &'static str,
    /// Factor the assembled amplitudes were multiplied by.
    pub normalisation_scale: f64,
    pub back_to_back_insertion_loss_db: Option<f64>,
    /// "drift_tracked" | "arbitrary".
    pub column_phases: &'static str,
    /// Names of the figures that hold whatever the column phases.
    pub phase_insensitive: Vec<&'static str>,
    pub n_channels: usize,
    pub n_modes: usize,
    pub n_pols: usize,
    pub repeats: usize,
    /// rms standard error over rms entry (None with one repeat).
    pub stderr_relative: Option<f64>,
    /// Drift at each reference launch, rad.
    pub drift_rad: Option<Vec<f64>>,
    pub drift_max_abs_rad: Option<f64>,
    pub reference_frames: Option<Vec<usize>>,
    pub reference_power_ratio: Option<Vec<f64>>,
    pub reference_power_rel_std: Option<f64>,
    pub reference_shape_fidelity_min: Option<f64>,
    /// Mean captured power over the frames.
    pub captured_power: Option<f64>,
    pub captured_power_min: Option<f64>,
    pub captured_power_per_frame: Option<Vec<f64>>,
}

/// The normalised matrix, its standard error and its summary.
#[derive(Debug, Clone)]
pub struct Analysis {
    pub matrix: Array2<Complex64>,
    pub stderr: Array2<f64>,
    pub summary: MatrixSummary,
}

/// Normalise and analyse an assembled matrix.
pub fn analyse(asm: &Assembly, opts: &AnalysisOptions) -> Result<Analysis> {
    if opts.groups.len() != asm.n_modes {
        return Err(Error::Input(format!(
            "{} group numbers given for {} modes",
            opts.groups.len(),
            asm.n_modes
        )));
    }
    let norm = normalisation(&asm.matrix, &opts.loss)?;
    let matrix = asm.matrix.mapv(|z| z * norm.scale);
    let stderr = asm.stderr.mapv(|e| e * norm.scale);
    let figures = figures(
        &matrix,
        opts.groups,
        asm.n_channels,
        asm.n_pols,
        opts.cut_off_db,
    )?;
    let stderr_relative = (asm.repeats > 1).then(|| {
        let e2: f64 = stderr.iter().map(|e| e * e).sum();
        let m2: f64 = matrix.iter().map(|z| z.norm_sqr()).sum();
        (e2 / m2).sqrt()
    });
    let d = asm.drift.as_ref();
    let (cap_mean, cap_min, cap) = match opts.captured_power {
        Some(c) if !c.is_empty() => (
            Some(c.iter().sum::<f64>() / c.len() as f64),
            Some(c.iter().copied().fold(f64::INFINITY, f64::min)),
            Some(c.to_vec()),
        ),
        _ => (None, None, None),
    };
    let summary = MatrixSummary {
        figures,
        insertion_loss_reference: norm.reference,
        normalisation_scale: norm.scale,
        back_to_back_insertion_loss_db: norm.back_to_back_insertion_loss_db,
        column_phases: asm.column_phases.label(),
        phase_insensitive: PHASE_INSENSITIVE.to_vec(),
        n_channels: asm.n_channels,
        n_modes: asm.n_modes,
        n_pols: asm.n_pols,
        repeats: asm.repeats,
        stderr_relative,
        drift_rad: d.map(|t| t.drift_rad.clone()),
        drift_max_abs_rad: d.map(|t| t.max_abs_rad),
        reference_frames: d.map(|t| t.reference_frames.clone()),
        reference_power_ratio: d.map(|t| t.reference_power_ratio.clone()),
        reference_power_rel_std: d.map(|t| t.reference_power_rel_std),
        reference_shape_fidelity_min: d.map(|t| {
            t.reference_shape_fidelity
                .iter()
                .copied()
                .fold(f64::INFINITY, f64::min)
        }),
        captured_power: cap_mean,
        captured_power_min: cap_min,
        captured_power_per_frame: cap,
    };
    Ok(Analysis {
        matrix,
        stderr,
        summary,
    })
}

fn f(v: f64, digits: usize) -> String {
    if v.is_finite() {
        format!("{v:.digits$}")
    } else {
        format!("{v}")
    }
}

/// The human table of a summary: figures first, then the mode-group power matrix.
pub fn summary_table(s: &MatrixSummary) -> String {
    let g = &s.figures;
    let mut rows: Vec<Vec<String>> = vec![
        vec![
            "matrix".into(),
            format!("{} x {}", g.outputs, g.inputs),
            String::new(),
        ],
        vec![
            "insertion loss".into(),
            f(g.insertion_loss_db, 3),
            format!("dB ({})", s.insertion_loss_reference),
        ],
        vec![
            "mode-dependent loss".into(),
            f(g.mode_dependent_loss_db, 3),
            "dB".into(),
        ],
        vec![
            "unitarity error".into(),
            format!("{:.3e}", g.unitarity_error),
            String::new(),
        ],
        vec![
            "condition number".into(),
            f(g.condition_number, 3),
            String::new(),
        ],
        vec![
            "group crosstalk".into(),
            f(g.group_crosstalk_overall_db, 2),
            "dB".into(),
        ],
    ];
    if let Some(p) = g.polarization_crosstalk_overall_db {
        rows.push(vec!["polarisation crosstalk".into(), f(p, 2), "dB".into()]);
    }
    rows.push(vec![
        "column phases".into(),
        s.column_phases.into(),
        String::new(),
    ]);
    if let Some(d) = s.drift_max_abs_rad {
        rows.push(vec!["max |drift|".into(), f(d, 3), "rad".into()]);
    }
    if let Some(r) = s.reference_power_rel_std {
        rows.push(vec![
            "reference power std".into(),
            f(100.0 * r, 2),
            "%".into(),
        ]);
    }
    if let Some(c) = s.captured_power {
        rows.push(vec!["captured power".into(), f(c, 4), "(mean)".into()]);
    }
    if let Some(e) = s.stderr_relative {
        rows.push(vec![
            "relative std error".into(),
            format!("{e:.3e}"),
            String::new(),
        ]);
    }
    if !g.cut_off_groups.is_empty() {
        let list: Vec<String> = g.cut_off_groups.iter().map(|x| x.to_string()).collect();
        rows.push(vec!["cut-off groups".into(), list.join(" "), String::new()]);
    }
    let mut out = crate::cli::table(&["figure", "value", "unit"], &rows);
    out.push('\n');
    let mut header = vec!["out \\ in group".to_string()];
    header.extend(g.groups.iter().map(|x| x.to_string()));
    let header_ref: Vec<&str> = header.iter().map(String::as_str).collect();
    let mut grows: Vec<Vec<String>> = g
        .groups
        .iter()
        .enumerate()
        .map(|(i, gid)| {
            let mut r = vec![gid.to_string()];
            r.extend(g.group_power[i].iter().map(|p| f(*p, 4)));
            r
        })
        .collect();
    let mut xt = vec!["crosstalk dB".to_string()];
    xt.extend(g.group_crosstalk_db.iter().map(|v| f(*v, 1)));
    grows.push(xt);
    out.push_str("group power (fraction of each input group's power)\n");
    out.push_str(&crate::cli::table(&header_ref, &grows));
    out
}
