//! `modegram matrix SETUP --out DIR`: the launch sequence named in the setup -> transfer
//! matrix, its standard error and figures of merit.
//!
//! Writes matrix.npy, matrix_stderr.npy, matrix.csv, summary.json, and the decode results
//! (modes.json, coefficients.npy, captured.csv, decode.json). The setup's alignment is used
//! as it is; `modegram run` fits it first.
use super::{Common, Outcome};
use crate::error::Result;
use crate::export::OutDir;
use crate::matrix::{summary_table, write_matrix_files, MATRIX_FILES};
use crate::modes::Basis;
use crate::pipeline;
use crate::setup::Setup;
use clap::Args;
use std::path::PathBuf;

#[derive(Debug, Args)]
pub struct MatrixArgs {
    /// The setup file (TOML).
    pub setup: PathBuf,
    #[command(flatten)]
    pub common: Common,
}

pub fn run(args: &MatrixArgs) -> Result<Outcome> {
    let setup = Setup::load(&args.setup)?;
    let out = OutDir::create(&args.common.out, args.common.force)?;
    let mut names: Vec<&str> = MATRIX_FILES.to_vec();
    names.extend(pipeline::DECODE_FILES);
    out.ensure_writable(&names)?;
    let basis = Basis::from_setup(&setup)?;
    let stack = pipeline::stack_path(&setup)?;
    let total = crate::frames::FrameStack::open(&[stack])?.len();
    let pb = super::progress(total.unwrap_or(0) as u64, "decode", args.common.quiet);
    let d = pipeline::decode_sequence(&setup, &basis, None, None, false, &|n| {
        pb.set_position(n as u64)
    })?;
    pb.finish_and_clear();
    for w in &d.warnings {
        super::warn(args.common.quiet, w);
    }
    // Check the layout before writing anything.
    let analysis = pipeline::analyse_sequence(&setup, &basis, &d)?;
    let problems = pipeline::sequence_problems(&setup, &basis, &d)?;
    for w in &problems {
        super::warn(args.common.quiet, w);
    }
    pipeline::write_decode_files(&out, &basis, &d)?;
    write_matrix_files(&out, &analysis)?;
    Ok(Outcome {
        table: summary_table(&analysis.summary),
        json: serde_json::to_value(&analysis.summary).unwrap_or_default(),
        failed: !problems.is_empty(),
    })
}
