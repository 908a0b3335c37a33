//! `modegram synth SCENARIO --out DIR`: simulate a launch sequence with ground truth
//! (scenario keys: docs/scenario.md).
use super::{Common, Outcome};
use crate::error::Result;
use crate::export::OutDir;
use crate::synth::{self, Scenario, SetupOptions};
use clap::Args;
use serde_json::json;
use std::path::PathBuf;

#[derive(Debug, Args)]
pub struct SynthArgs {
    /// The scenario file (TOML, docs/scenario.md).
    pub scenario: PathBuf,
    /// Write carrier = "auto" into setup.toml instead of the true carrier.
    #[arg(long)]
    pub auto_carrier: bool,
    /// Write the TRUE alignment into setup.toml instead of the nominal one (zeros, scale 1).
    #[arg(long)]
    pub true_alignment: bool,
    #[command(flatten)]
    pub common: Common,
}

pub fn run(args: &SynthArgs) -> Result<Outcome> {
    let c = &args.common;
    let scn = Scenario::load(&args.scenario)?;
    let names = synth::file_names(&scn);
    // Check before any work; the folder itself is created only when writing.
    let out = OutDir {
        path: c.out.clone(),
        force: c.force,
    };
    out.ensure_writable(&names)?;
    let basis = synth::basis::solve(&scn)?;
    let groups = synth::basis::groups(&basis);
    let sampler = |g: &crate::grid::Grid, a: &crate::grid::Alignment| {
        synth::basis::sample(&basis, g, a)
    };
    let l = &scn.launch;
    let n_frames = crate::matrix::LaunchLayout::from_counts(
        l.polarizations.len(),
        groups.len(),
        l.repeats,
        l.reference_every,
        l.reference_input,
    )
    .map(|x| x.expected_frames())
    .unwrap_or(0);
    let pb = super::progress(n_frames as u64, "frames", c.quiet);
    let sim = synth::simulate(&scn, &groups, &sampler, &|| pb.inc(1))?;
    pb.finish_and_clear();
    if sim.clipped_pixels > 0 {
        super::warn(
            c.quiet,
            &format!(
                "{} pixels clipped at saturation ({} counts) over the launch frames",
                sim.clipped_pixels,
                scn.saturation_counts()
            ),
        );
    }
    let out = OutDir::create(&c.out, c.force)?;
    let opts = SetupOptions {
        auto_carrier: args.auto_carrier,
        true_alignment: args.true_alignment,
    };
    let paths = synth::write_all(&out, &scn, &sim, opts)?;
    let fig = crate::matrix::figures(
        &sim.truth,
        &sim.groups,
        scn.channels.len(),
        scn.launch.polarizations.len(),
        -20.0,
    )?;
    let (h, w) = (scn.sensor.height_px, scn.sensor.width_px);
    let rows = vec![
        vec!["frames".into(), sim.frames.len().to_string()],
        vec!["modes".into(), groups.len().to_string()],
        vec![
            "channels".into(),
            scn.channels
                .iter()
                .map(|c| c.name.as_str())
                .collect::<Vec<_>>()
                .join(", "),
        ],
        vec!["frame size".into(), format!("{w} x {h} px, {}-bit", scn.sensor.bit_depth)],
        vec!["truth IL".into(), format!("{:.3} dB", fig.insertion_loss_db)],
        vec!["truth MDL".into(), format!("{:.3} dB", fig.mode_dependent_loss_db)],
        vec!["clipped pixels".into(), sim.clipped_pixels.to_string()],
        vec![
            "files".into(),
            paths
                .iter()
                .map(|p| p.file_name().unwrap_or_default().to_string_lossy().into_owned())
                .collect::<Vec<_>>()
                .join(", "),
        ],
    ];
    let table = super::table(&["item", "value"], &rows);
    let json = json!({
        "scenario": args.scenario.display().to_string(),
        "out": c.out.display().to_string(),
        "frames": sim.frames.len(),
        "modes": groups.len(),
        "channels": scn.channels.iter().map(|c| c.name.clone()).collect::<Vec<_>>(),
        "width_px": w,
        "height_px": h,
        "bit_depth": scn.sensor.bit_depth,
        "insertion_loss_db": fig.insertion_loss_db,
        "mode_dependent_loss_db": fig.mode_dependent_loss_db,
        "clipped_pixels": sim.clipped_pixels,
        "files": paths.iter().map(|p| p.display().to_string()).collect::<Vec<_>>(),
    });
    Ok(Outcome {
        table,
        json,
        failed: false,
    })
}
