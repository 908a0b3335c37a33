//! Writing the matrix stage's results through [`OutDir`]: matrix.npy (complex128, outputs x
//! inputs), matrix_stderr.npy (float64, same shape), matrix.csv (long format, one line per
//! entry: `row,col,re,im,stderr`, row-major) and summary.json.
use super::summary::Analysis;
use crate::error::Result;
use crate::export::OutDir;
use ndarray::Array2;
use num_complex::Complex64;
use std::fmt::Write as _;
use std::path::PathBuf;

/// The files [`write_matrix_files`] writes, for `OutDir::ensure_writable`.
pub const MATRIX_FILES: [&str; 4] = [
    "matrix.npy",
    "matrix_stderr.npy",
    "matrix.csv",
    "summary.json",
];

/// The long-format CSV of a matrix and its standard error (header line first).
pub fn matrix_csv(m: &Array2<Complex64>, stderr: &Array2<f64>) -> String {
    let mut s = String::with_capacity(m.len() * 64 + 32);
    s.push_str("row,col,re,im,stderr\n");
    for ((r, c), z) in m.indexed_iter() {
        let _ = writeln!(s, "{r},{c},{:e},{:e},{:e}", z.re, z.im, stderr[(r, c)]);
    }
    s
}

/// Write matrix.npy, matrix_stderr.npy, matrix.csv and summary.json of `a` into `out`.
pub fn write_matrix_files(out: &OutDir, a: &Analysis) -> Result<Vec<PathBuf>> {
    out.ensure_writable(&MATRIX_FILES)?;
    let csv = matrix_csv(&a.matrix, &a.stderr);
    Ok(vec![
        out.write_npy(MATRIX_FILES[0], &a.matrix)?,
        out.write_npy(MATRIX_FILES[1], &a.stderr)?,
        out.write_text(MATRIX_FILES[2], &csv)?,
        out.write_json(MATRIX_FILES[3], &a.summary)?,
    ])
}
