//! `modegram check SETUP [FRAMES...]`: validate the holography setup per channel; a table of
//! pass / warn / fail items with hints on stdout, check.json (a list of {channel, name,
//! status, value, threshold, unit, hint}) written when `--out` is given, exit 1 when an
//! item fails. Thresholds and sources: docs/alignment.md.
use super::{Common, Outcome};
use crate::align::calibrate::stack_path;
use crate::align::check::{worst, Status, Thresholds};
use crate::align::inspect::check_setup;
use crate::error::Result;
use crate::export::OutDir;
use crate::modes::Basis;
use crate::setup::Setup;
use clap::Args;
use serde_json::json;
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

/// True when `--out` was given on the command line (check.json is written only then).
fn out_given() -> bool {
    std::env::args().any(|a| a == "--out" || a.starts_with("--out="))
}

pub fn run(args: &CheckArgs) -> Result<Outcome> {
    let setup = Setup::load(&args.setup)?;
    let write = out_given();
    let out = if write {
        let o = OutDir::create(&args.common.out, args.common.force)?;
        o.ensure_writable(&["check.json"])?;
        Some(o)
    } else {
        None
    };
    let frames = if args.frames.is_empty() {
        vec![stack_path(&setup)?]
    } else {
        args.frames.clone()
    };
    let basis = Basis::from_setup(&setup)?;
    let pb = super::progress(0, "decode", args.common.quiet);
    let items = check_setup(&setup, &basis, &frames, &Thresholds::default(), &|n| {
        pb.set_position(n as u64)
    })?;
    pb.finish_and_clear();
    if let Some(o) = &out {
        o.write_json("check.json", &items)?;
    }
    let fmt = |v: Option<f64>| match v {
        Some(x) if x.abs() >= 1e4 || (x != 0.0 && x.abs() < 1e-3) => format!("{x:.3e}"),
        Some(x) => format!("{x:.3}"),
        None => "-".into(),
    };
    let rows: Vec<Vec<String>> = items
        .iter()
        .map(|i| {
            vec![
                i.channel.clone(),
                i.name.clone(),
                i.status.as_str().to_uppercase(),
                fmt(i.value),
                fmt(i.threshold),
                i.unit.clone(),
            ]
        })
        .collect();
    let mut table = super::table(
        &["channel", "item", "status", "value", "threshold", "unit"],
        &rows,
    );
    table.push('\n');
    for i in items
        .iter()
        .filter(|i| i.status == Status::Warn || i.status == Status::Fail)
    {
        table.push_str(&format!(
            "{} {} ({}): {}\n",
            i.channel,
            i.name,
            i.status.as_str(),
            i.hint
        ));
    }
    let w = worst(&items);
    let count = |s: Status| items.iter().filter(|i| i.status == s).count();
    table.push_str(&format!(
        "{} pass, {} warn, {} fail, {} skipped\n",
        count(Status::Pass),
        count(Status::Warn),
        count(Status::Fail),
        count(Status::Skip)
    ));
    Ok(Outcome {
        table,
        json: json!({
            "status": w,
            "pass": count(Status::Pass),
            "warn": count(Status::Warn),
            "fail": count(Status::Fail),
            "skip": count(Status::Skip),
            "items": items,
        }),
        failed: w == Status::Fail,
    })
}
