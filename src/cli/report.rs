//! `modegram report DIR`: write the self-contained `report.html` of a finished run's folder.
//!
//! The report goes into DIR itself unless `--out` is given with a value other than its
//! default (`modegram-out`); then it goes into that folder. An existing `report.html` is
//! kept unless `--force`. The table lists every file looked for and what became of it.
use super::{Common, Outcome};
use crate::error::Result;
use crate::export::OutDir;
use clap::Args;
use std::path::PathBuf;

#[derive(Debug, Args)]
pub struct ReportArgs {
    /// A finished run's output folder (the report is written into it unless --out is
    /// given with another folder than the default).
    pub dir: PathBuf,
    #[command(flatten)]
    pub common: Common,
}

/// Name of the report file.
pub const REPORT_FILE: &str = "report.html";

/// The folder the report is written to: DIR, or `--out` when it differs from its default.
pub fn report_folder(args: &ReportArgs) -> PathBuf {
    if args.common.out.as_os_str() == default_out().as_os_str() {
        args.dir.clone()
    } else {
        args.common.out.clone()
    }
}

/// The default of `--out`, read from the option's definition.
fn default_out() -> std::ffi::OsString {
    use clap::Args as _;
    let cmd = Common::augment_args(clap::Command::new("report"));
    let out = cmd
        .get_arguments()
        .find(|a| a.get_id() == "out")
        .and_then(|a| a.get_default_values().first().map(|s| s.to_os_string()));
    out.unwrap_or_default()
}

pub fn run(args: &ReportArgs) -> Result<Outcome> {
    let folder = report_folder(args);
    if folder.exists() {
        let out = OutDir {
            path: folder.clone(),
            force: args.common.force,
        };
        out.ensure_writable(&[REPORT_FILE])?;
    }
    let report = crate::render::assemble_report(&args.dir)?;
    let out = OutDir::create(&folder, args.common.force)?;
    let path = out.write_text(REPORT_FILE, &report.html)?;
    let rows: Vec<Vec<String>> = report
        .included
        .iter()
        .map(|i| vec![i.item.clone(), i.file.clone(), i.status.clone()])
        .collect();
    let mut table = super::table(&["item", "file", "status"], &rows);
    table.push_str(&format!(
        "report: {} ({} bytes)\n",
        path.display(),
        report.html.len()
    ));
    Ok(Outcome {
        table,
        json: serde_json::json!({
            "report": path.display().to_string(),
            "bytes": report.html.len(),
            "included": report.included,
        }),
        failed: false,
    })
}
