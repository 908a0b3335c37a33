//! `modegram run`.
use super::{Common, Outcome};
use crate::error::Result;
use clap::Args;
use std::path::PathBuf;

#[derive(Debug, Args)]
pub struct RunArgs {
    /// The setup file (TOML).
    pub setup: PathBuf,
    #[command(flatten)]
    pub common: Common,
}

pub fn run(_args: &RunArgs) -> Result<Outcome> {
    Err(super::unavailable("run"))
}
