//! `modegram invert`.
use super::{Common, Outcome};
use crate::error::Result;
use clap::Args;
use std::path::PathBuf;

#[derive(Debug, Args)]
pub struct InvertArgs {
    /// The transfer matrix (NPY, outputs x inputs).
    pub matrix: PathBuf,
    /// Target output: mode vector(s) (NPY / CSV) or an image (PNG).
    pub target: PathBuf,
    #[command(flatten)]
    pub common: Common,
}

pub fn run(_args: &InvertArgs) -> Result<Outcome> {
    Err(super::unavailable("invert"))
}
