//! `modegram decode`.
use super::{Common, Outcome};
use crate::error::Result;
use clap::Args;
use std::path::PathBuf;

#[derive(Debug, Args)]
pub struct DecodeArgs {
    /// The setup file (TOML).
    pub setup: PathBuf,
    /// Frame files (TIFF, PNG, NPY), decoded in order.
    #[arg(required = true)]
    pub frames: Vec<PathBuf>,
    #[command(flatten)]
    pub common: Common,
}

pub fn run(_args: &DecodeArgs) -> Result<Outcome> {
    Err(super::unavailable("decode"))
}
