//! `modegram watch`.
use super::{Common, Outcome};
use crate::error::Result;
use clap::Args;
use std::path::PathBuf;

#[derive(Debug, Args)]
pub struct WatchArgs {
    /// The setup file (TOML).
    pub setup: PathBuf,
    /// Folder to watch for new frames.
    pub dir: PathBuf,
    #[command(flatten)]
    pub common: Common,
}

pub fn run(_args: &WatchArgs) -> Result<Outcome> {
    Err(super::unavailable("watch"))
}
