//! `modegram run SETUP --out DIR`: the whole job. Fit each channel's alignment on the launch
//! sequence, decode every frame with the fitted alignment, assemble and analyse the transfer
//! matrix, check the holography, draw the pictures and write report.html.
//!
//! Every output name is checked before any work starts, so an existing result is never
//! half-replaced; without `--force` nothing is overwritten.
use super::{Common, Outcome};
use crate::align::calibrate::{calibrate, calibration_json, decode_raw, fitted_toml, fold_tilt};
use crate::align::check::{worst, Status, Thresholds};
use crate::align::fit::FitSpec;
use crate::align::inspect::{check_decoded, check_setup};
use crate::error::{Error, Result};
use crate::export::OutDir;
use crate::grid::Alignment;
use crate::matrix::{summary_table, write_matrix_files, MATRIX_FILES};
use crate::modes::Basis;
use crate::pipeline;
use crate::setup::Setup;
use clap::Args;
use std::path::PathBuf;

#[derive(Debug, Args)]
pub struct RunArgs {
    /// The setup file (TOML).
    pub setup: PathBuf,
    /// Use the setup's alignment as it is instead of fitting it first.
    #[arg(long)]
    pub no_calibrate: bool,
    /// Frame shown in the field and Fourier-plane pictures (0-based).
    #[arg(long, default_value_t = 0)]
    pub picture_frame: usize,
    #[command(flatten)]
    pub common: Common,
}

pub fn run(args: &RunArgs) -> Result<Outcome> {
    let q = args.common.quiet;
    let mut setup = Setup::load(&args.setup)?;
    let text = std::fs::read_to_string(&args.setup).map_err(|e| Error::io(&args.setup, e))?;
    let out = OutDir::create(&args.common.out, args.common.force)?;
    let field_pics: Vec<String> = setup
        .channels
        .iter()
        .flat_map(|c| {
            [
                format!("field_{}.png", c.name),
                format!("fourier_{}.png", c.name),
            ]
        })
        .collect();
    let mut names: Vec<&str> = MATRIX_FILES.to_vec();
    names.extend(pipeline::DECODE_FILES);
    names.extend(pipeline::MATRIX_PICTURES);
    names.extend(field_pics.iter().map(String::as_str));
    names.extend(["check.json", "setup.toml", "report.html", "gallery.png"]);
    // calibration.json and fitted.toml belong to the set either way: without a calibration
    // this run removes an earlier one's (they would describe other results).
    names.extend(["calibration.json", "fitted.toml"]);
    out.ensure_writable(&names)?;

    let basis = Basis::from_setup(&setup)?;
    let stack = pipeline::stack_path(&setup)?;
    let n_total = crate::frames::FrameStack::open(std::slice::from_ref(&stack))?
        .len()
        .unwrap_or(0) as u64;
    // The launch description must match the stack before any fitting.
    pipeline::layout(&setup, &basis, n_total as usize)?;

    // 1. Calibrate.
    let mut calibration = None;
    let mut raw_fields = None;
    let mut carriers = None;
    let mut fit_setup = None;
    if !args.no_calibrate {
        let pb = super::progress(n_total, "calibrate", q);
        let raw = decode_raw(&setup, std::slice::from_ref(&stack), &|n| {
            pb.set_position(n as u64)
        })?;
        pb.finish_and_clear();
        let spec = FitSpec::default();
        let fits = calibrate(&setup, &basis, &raw, None, &spec, &|_, _| {})?;
        let used: Vec<[f64; 2]> = raw.info.iter().map(|i| i.carrier_cycles_per_px).collect();
        raw_fields = Some(raw);
        for (ch, f) in setup.channels.iter().zip(&fits) {
            if !f.converged {
                super::warn(
                    q,
                    &format!(
                        "channel {}: the alignment fit did not converge ({}); its starting values are kept",
                        ch.name, f.message
                    ),
                );
            }
        }
        let decoding = fold_tilt(&setup, &used, &fits);
        let json = calibration_json(&setup, &fits, &decoding, &used, n_total as usize);
        let fitted = fitted_toml(&setup, &text, &decoding)?;
        // The check reads the calibration's fields (decoded with the first carrier): it
        // takes the fitted alignment as fitted, tilt included.
        let mut fs = setup.clone();
        for (ch, f) in fs.channels.iter_mut().zip(&fits) {
            set_alignment(ch, &f.fitted);
        }
        fit_setup = Some(fs);
        for (ch, d) in setup.channels.iter_mut().zip(&decoding) {
            set_alignment(ch, &d.alignment);
        }
        carriers = Some(decoding.iter().map(|d| d.carrier_cycles_per_px).collect());
        calibration = Some((json, fitted));
    }
    let alignments: Vec<Alignment> = setup.channels.iter().map(|c| c.alignment()).collect();

    // 2. Decode with the (fitted) alignment, 3. assemble and analyse.
    let pb = super::progress(n_total, "decode", q);
    let d = pipeline::decode_sequence(
        &setup,
        &basis,
        Some(alignments.clone()),
        carriers.clone(),
        false,
        &|n| pb.set_position(n as u64),
    )?;
    pb.finish_and_clear();
    for w in &d.warnings {
        super::warn(q, w);
    }
    let analysis = pipeline::analyse_sequence(&setup, &basis, &d)?;
    let problems = pipeline::sequence_problems(&setup, &basis, &d)?;
    for w in &problems {
        super::warn(q, w);
    }

    // 4. Check the holography with the fitted alignment.
    // The calibration's fields serve the check too (they do not depend on the alignment).
    let frames = std::slice::from_ref(&stack);
    let items = match &raw_fields {
        Some(raw) => check_decoded(
            fit_setup.as_ref().unwrap_or(&setup),
            &basis,
            frames,
            raw,
            &Thresholds::default(),
        )?,
        None => check_setup(&setup, &basis, frames, &Thresholds::default(), &|_| {})?,
    };
    drop(raw_fields);
    let check_status = worst(&items);

    // 5. Pictures.
    // Pictures decode one frame again: with the carriers the sequence was decoded with.
    let mut pic_setup = setup.clone();
    for (ch, info) in pic_setup.channels.iter_mut().zip(&d.channels) {
        ch.carrier = crate::setup::AutoOr::Value(info.carrier_cycles_per_px);
        ch.carrier_period_px = None;
        ch.carrier_angle_deg = None;
    }
    let mut pictures = pipeline::frame_pictures(&pic_setup, Some(alignments), args.picture_frame)?;
    pictures.extend(pipeline::matrix_pictures(&basis, &analysis));
    let gallery_px = 96;
    let grid = crate::grid::Grid::centred(
        gallery_px,
        gallery_px,
        3.2 * basis.core_radius_um / gallery_px as f64,
    );
    let sampled = basis.sample(&grid, &Alignment::default());
    let labels: Vec<String> = basis.modes.iter().map(|m| m.label.clone()).collect();
    pictures.push((
        "gallery.png".into(),
        crate::render::gallery_picture(&sampled, &labels, 0),
    ));

    // 6. Write everything into a staging folder, then the report that reads it back, then
    // put the whole set in place (an interrupted run leaves the previous set whole).
    let final_out = out;
    let out = final_out.stage()?;
    pipeline::write_decode_files(&out, &basis, &d)?;
    write_matrix_files(&out, &analysis)?;
    out.write_json("check.json", &items)?;
    out.write_text("setup.toml", &text)?;
    if let Some((json, fitted)) = &calibration {
        out.write_json("calibration.json", json)?;
        out.write_text("fitted.toml", fitted)?;
    }
    for (name, img) in &pictures {
        crate::render::write_png(&out, name, img)?;
    }
    // The report names its folder: the final one, not the staging one.
    let esc = |p: &std::path::Path| crate::render::report::escape(&p.display().to_string());
    let name = |p: &std::path::Path| {
        crate::render::report::escape(
            &p.file_name()
                .map(|s| s.to_string_lossy().into_owned())
                .unwrap_or_default(),
        )
    };
    let html = crate::render::build_report(&out.path)?
        .replace(&esc(&out.path), &esc(&final_out.path))
        .replace(&name(&out.path), &name(&final_out.path));
    out.write_text("report.html", &html)?;
    final_out.promote(&out, &names)?;
    let out = final_out;

    let mut table = summary_table(&analysis.summary);
    table.push_str(&format!(
        "\nholography check: {} ({} items; check.json)\nreport: {}\n",
        check_status.as_str(),
        items.len(),
        out.file("report.html").display()
    ));
    let mut json = serde_json::to_value(&analysis.summary).unwrap_or_default();
    if let Some(obj) = json.as_object_mut() {
        obj.insert(
            "check".into(),
            serde_json::to_value(&items).unwrap_or_default(),
        );
        obj.insert(
            "check_status".into(),
            serde_json::Value::String(check_status.as_str().into()),
        );
        if let Some((c, _)) = &calibration {
            obj.insert("calibration".into(), c.clone());
        }
    }
    Ok(Outcome {
        table,
        json,
        failed: check_status == Status::Fail || !problems.is_empty(),
    })
}

fn set_alignment(ch: &mut crate::setup::ChannelSpec, a: &Alignment) {
    ch.center_um = a.center_um;
    ch.rotation_deg = a.rotation_deg;
    ch.scale = a.scale;
    ch.tilt_mrad = a.tilt_mrad;
    ch.defocus_um = a.defocus_um;
}
