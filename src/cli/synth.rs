//! `modegram synth`.
use super::{Common, Outcome};
use crate::error::Result;
use clap::Args;
use std::path::PathBuf;

#[derive(Debug, Args)]
pub struct SynthArgs {
    /// The scenario file (TOML).
    pub scenario: PathBuf,
    #[command(flatten)]
    pub common: Common,
}

pub fn run(_args: &SynthArgs) -> Result<Outcome> {
    Err(super::unavailable("synth"))
}
