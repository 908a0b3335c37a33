//! `modegram check`.
use super::{Common, Outcome};
use crate::error::Result;
use clap::Args;
use std::path::PathBuf;

#[derive(Debug, Args)]
pub struct CheckArgs {
    /// The setup file (TOML).
    pub setup: PathBuf,
    /// Frames to check (default: the setup's launch sequence).
    pub frames: Vec<PathBuf>,
    #[command(flatten)]
    pub common: Common,
}

pub fn run(_args: &CheckArgs) -> Result<Outcome> {
    Err(super::unavailable("check"))
}
