//! `modegram report`.
use super::{Common, Outcome};
use crate::error::Result;
use clap::Args;
use std::path::PathBuf;

#[derive(Debug, Args)]
pub struct ReportArgs {
    /// A finished run's output folder.
    pub dir: PathBuf,
    #[command(flatten)]
    pub common: Common,
}

pub fn run(_args: &ReportArgs) -> Result<Outcome> {
    Err(super::unavailable("report"))
}
