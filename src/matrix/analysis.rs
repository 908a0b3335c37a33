//! Figures of merit of a transfer matrix M (outputs x inputs), row = out_channel * n_modes +
//! mode, col = in_pol * n_modes + mode.
//!
//! With s_i the K = min(outputs, inputs) singular values of M and m = mean_i s_i^2
//! (= tr(M^H M) / K; Ho & Kahn 2011, Opt. Express 19, 16612):
//! - insertion loss `IL_dB = -10 log10(m)`;
//! - mode-dependent loss `MDL_dB = 20 log10(s_max / s_min)`;
//! - condition number `s_max / s_min`;
//! - unitarity error `||G / m - I||_F / sqrt(K)` with G the smaller Gram matrix
//!   (M^H M when outputs >= inputs, else M M^H); from the singular values it is
//!   `sqrt(mean_i (s_i^2 / m - 1)^2)`: 0 for a scaled unitary, independent of the overall
//!   scale, of the overall insertion loss and of the column phases.
//! - mode-group power: `P_abs[i][j] = (1/n_j) sum_{c in input group j} sum_{r in output
//!   group i} |M_rc|^2` (polarisations and channels summed; n_j = number of inputs in group
//!   j), i.e. the power reaching output group i per unit power launched into one input of
//!   group j; `group_power[i][j] = P_abs[i][j] / sum_i P_abs[i][j]` (columns sum to 1).
//! - group crosstalk of input group j: `10 log10((1 - f_jj) / f_jj)` (power leaving the group
//!   over power staying); overall: the same with the powers summed over all inputs.
//! - polarisation crosstalk (only when the number of output channels equals the number of
//!   input polarisations; channel q is taken to be polarisation q): for input polarisation p,
//!   `10 log10(sum_{q != p} P_pq / P_pp)`, P_pq the power from pol p's inputs into channel q.
//! - received power of output group i: its mean power per output row (summed over all
//!   inputs), in dB relative to the mean over groups; groups below `cut_off_db` (default
//!   -20 dB) are listed as cut off.
//!
//! Phase-insensitive figures: right-multiplying M by a diagonal unitary (arbitrary column
//! phases) changes none of the singular values, IL, MDL, condition number, unitarity
//! error, group or polarisation powers and crosstalk, nor received powers; they stay valid
//! when drift was not tracked. Non-finite values (a zero singular value, a group without
//! leakage) are written to JSON as `null`.
use super::linalg::{check_finite, singular_values};
use crate::error::{Error, Result};
use ndarray::Array2;
use num_complex::Complex64;
use serde::Serialize;

/// Default threshold of a cut-off group, dB relative to the mean group.
pub const DEFAULT_CUT_OFF_DB: f64 = -20.0;

/// How the launched power is known, i.e. what the insertion loss is relative to.
#[derive(Debug, Clone)]
pub enum LossReference {
    /// Counts the signal gives for one unit of launched power: M / sqrt(power_counts).
    PowerCounts(f64),
    /// A back-to-back matrix: M / sqrt(mean s_b2b^2), so IL_device = IL - IL_b2b.
    BackToBack(Array2<Complex64>),
    /// No reference: M scaled so that mean s_i^2 = 1 (IL 0 dB by construction).
    Relative,
}

impl LossReference {
    /// The label written to summary.json as `insertion_loss_reference`.
    pub fn label(&self) -> &'static str {
        match self {
            LossReference::PowerCounts(_) => "power_counts",
            LossReference::BackToBack(_) => "back_to_back",
            LossReference::Relative => "relative",
        }
    }
}

/// The scale applied to a matrix before its figures are computed.
#[derive(Debug, Clone, Serialize)]
pub struct Normalisation {
    /// Factor the amplitudes were multiplied by.
    pub scale: f64,
    /// "power_counts" | "back_to_back" | "relative".
    pub reference: &'static str,
    /// Insertion loss of the back-to-back matrix, dB (back_to_back only).
    pub back_to_back_insertion_loss_db: Option<f64>,
}

/// Mean of the squared singular values, tr(M^H M) / min(rows, cols).
fn mean_s2(m: &Array2<Complex64>) -> f64 {
    let k = m.nrows().min(m.ncols());
    m.iter().map(|z| z.norm_sqr()).sum::<f64>() / k as f64
}

/// The factor that puts `m` on the scale of `reference`.
pub fn normalisation(m: &Array2<Complex64>, reference: &LossReference) -> Result<Normalisation> {
    check_finite(m, "the transfer matrix")?;
    let (scale, b2b) = match reference {
        LossReference::PowerCounts(p) => {
            if !(p.is_finite() && *p > 0.0) {
                return Err(Error::Input(format!(
                    "launch.power_counts = {p}: must be a finite number > 0"
                )));
            }
            (1.0 / p.sqrt(), None)
        }
        LossReference::BackToBack(b) => {
            check_finite(b, "the back-to-back matrix")?;
            if b.dim() != m.dim() {
                return Err(Error::Input(format!(
                    "the back-to-back matrix has shape {:?}, the transfer matrix {:?}: \
                     they must match",
                    b.dim(),
                    m.dim()
                )));
            }
            let mb = mean_s2(b);
            if mb <= 0.0 {
                return Err(Error::Input("the back-to-back matrix is all zeros".into()));
            }
            (1.0 / mb.sqrt(), Some(-10.0 * mb.log10()))
        }
        LossReference::Relative => {
            let mm = mean_s2(m);
            if mm <= 0.0 {
                return Err(Error::Input("the transfer matrix is all zeros".into()));
            }
            (1.0 / mm.sqrt(), None)
        }
    };
    Ok(Normalisation {
        scale,
        reference: reference.label(),
        back_to_back_insertion_loss_db: b2b,
    })
}

/// The figures of merit of one matrix.
#[derive(Debug, Clone, Serialize)]
pub struct Figures {
    pub outputs: usize,
    pub inputs: usize,
    pub insertion_loss_db: f64,
    pub mode_dependent_loss_db: f64,
    /// Descending.
    pub singular_values: Vec<f64>,
    pub unitarity_error: f64,
    pub condition_number: f64,
    /// Group numbers, ascending: the order of the group axes below.
    pub groups: Vec<u32>,
    /// `[output group][input group]`, fraction of the input group's power.
    pub group_power: Vec<Vec<f64>>,
    /// `[output group][input group]`, power per unit power launched into one input.
    pub group_power_abs: Vec<Vec<f64>>,
    /// Per input group, dB (leaving / staying).
    pub group_crosstalk_db: Vec<f64>,
    pub group_crosstalk_overall_db: f64,
    /// Per output group, mean power per row relative to the mean group, dB.
    pub group_received_db: Vec<f64>,
    /// Groups whose received power is below the cut-off threshold.
    pub cut_off_groups: Vec<u32>,
    /// Per input polarisation, dB; None unless channels and polarisations match in number.
    pub polarization_crosstalk_db: Option<Vec<f64>>,
    pub polarization_crosstalk_overall_db: Option<f64>,
}

/// Compute the [`Figures`] of `m` (not rescaled) for modes in `groups` (one group number per
/// mode), `n_channels` output channels and `n_pols` input polarisations.
pub fn figures(
    m: &Array2<Complex64>,
    groups: &[u32],
    n_channels: usize,
    n_pols: usize,
    cut_off_db: f64,
) -> Result<Figures> {
    check_finite(m, "the transfer matrix")?;
    let n_modes = groups.len();
    let (rows, cols) = m.dim();
    if n_modes == 0 || rows != n_channels * n_modes || cols != n_pols * n_modes {
        return Err(Error::Input(format!(
            "the matrix has shape ({rows}, {cols}); {n_channels} channels x {n_modes} modes and \
             {n_pols} polarisations x {n_modes} modes need ({}, {})",
            n_channels * n_modes,
            n_pols * n_modes
        )));
    }
    let s = singular_values(m)?;
    let k = s.len() as f64;
    let ms2 = s.iter().map(|x| x * x).sum::<f64>() / k;
    if ms2 <= 0.0 {
        return Err(Error::Input("the transfer matrix is all zeros".into()));
    }
    let (s_max, s_min) = (s[0], s[s.len() - 1]);
    let unitarity_error = (s.iter().map(|x| (x * x / ms2 - 1.0).powi(2)).sum::<f64>() / k).sqrt();

    let mut ids: Vec<u32> = groups.to_vec();
    ids.sort_unstable();
    ids.dedup();
    let ng = ids.len();
    let gi: Vec<usize> = groups
        .iter()
        .map(|g| ids.binary_search(g).unwrap_or(0))
        .collect();
    let mut total = vec![vec![0.0; ng]; ng];
    let mut n_in = vec![0usize; ng];
    let mut row_power = vec![0.0; ng];
    let mut n_rows = vec![0usize; ng];
    let mut pol = vec![vec![0.0; n_channels]; n_pols];
    for r in 0..rows {
        let (ch, gr) = (r / n_modes, gi[r % n_modes]);
        n_rows[gr] += 1;
        for c in 0..cols {
            let p = m[(r, c)].norm_sqr();
            let (ip, gc) = (c / n_modes, gi[c % n_modes]);
            total[gr][gc] += p;
            row_power[gr] += p;
            pol[ip][ch] += p;
        }
    }
    for c in 0..cols {
        n_in[gi[c % n_modes]] += 1;
    }
    let group_power_abs: Vec<Vec<f64>> = (0..ng)
        .map(|i| (0..ng).map(|j| total[i][j] / n_in[j] as f64).collect())
        .collect();
    let col_sum: Vec<f64> = (0..ng)
        .map(|j| (0..ng).map(|i| total[i][j]).sum())
        .collect();
    let group_power: Vec<Vec<f64>> = (0..ng)
        .map(|i| (0..ng).map(|j| total[i][j] / col_sum[j]).collect())
        .collect();
    let db = |num: f64, den: f64| 10.0 * (num / den).log10();
    let group_crosstalk_db: Vec<f64> = (0..ng)
        .map(|j| db(col_sum[j] - total[j][j], total[j][j]))
        .collect();
    let stay: f64 = (0..ng).map(|j| total[j][j]).sum();
    let all: f64 = col_sum.iter().sum();
    let group_crosstalk_overall_db = db(all - stay, stay);
    let per_row: Vec<f64> = (0..ng).map(|i| row_power[i] / n_rows[i] as f64).collect();
    let mean_row = per_row.iter().sum::<f64>() / ng as f64;
    let group_received_db: Vec<f64> = per_row.iter().map(|p| db(*p, mean_row)).collect();
    let cut_off_groups = ids
        .iter()
        .zip(&group_received_db)
        .filter(|(_, d)| **d < cut_off_db)
        .map(|(g, _)| *g)
        .collect();
    let (polarization_crosstalk_db, polarization_crosstalk_overall_db) = if n_channels == n_pols {
        let per: Vec<f64> = (0..n_pols)
            .map(|p| db(pol[p].iter().sum::<f64>() - pol[p][p], pol[p][p]))
            .collect();
        let diag: f64 = (0..n_pols).map(|p| pol[p][p]).sum();
        (Some(per), Some(db(all - diag, diag)))
    } else {
        (None, None)
    };
    Ok(Figures {
        outputs: rows,
        inputs: cols,
        insertion_loss_db: -10.0 * ms2.log10(),
        mode_dependent_loss_db: 20.0 * (s_max / s_min).log10(),
        condition_number: s_max / s_min,
        unitarity_error,
        singular_values: s,
        groups: ids,
        group_power,
        group_power_abs,
        group_crosstalk_db,
        group_crosstalk_overall_db,
        group_received_db,
        cut_off_groups,
        polarization_crosstalk_db,
        polarization_crosstalk_overall_db,
    })
}
