//! `modegram modes SETUP --out DIR`: solve and list the mode basis; write modes.json,
//! basis.npy (complex128, (modes, ny, nx)), basis.json (the grid) and gallery.png.
//!
//! Sampling grid: the first `[[channel]]`'s region at the fibre-plane pitch
//! `camera.pixel_pitch_um / magnification`, with that channel's centre, rotation and scale;
//! without a channel, a centred `--grid-px` square grid whose half-width is the radius
//! holding all but 1e-5 of every mode's power, kept between 1.25 and 3 core radii (or
//! `--pitch-um` given).
use super::{warn, Common, Outcome};
use crate::error::{Error, Result};
use crate::export::OutDir;
use crate::grid::{Alignment, Grid};
use crate::modes::{gram, gram_deviation, sampling_warning, Basis};
use crate::render::colour::complex_rgb;
use crate::setup::Setup;
use clap::Args;
use ndarray::Array3;
use num_complex::Complex64;
use serde_json::json;
use std::path::PathBuf;

#[derive(Debug, Args)]
pub struct ModesArgs {
    /// The setup file (TOML).
    pub setup: PathBuf,
    /// Pixels per side of the sampling grid when the setup has no [[channel]] (default 256).
    #[arg(long, default_value_t = 256)]
    pub grid_px: usize,
    /// Fibre-plane pitch of that grid, micrometres (default: from the modes' extent).
    #[arg(long)]
    pub pitch_um: Option<f64>,
    /// Largest gallery tile side in pixels (grids are subsampled to fit; default 96).
    #[arg(long, default_value_t = 96)]
    pub tile_px: usize,
    #[command(flatten)]
    pub common: Common,
}

const OUTPUTS: [&str; 4] = ["modes.json", "basis.npy", "basis.json", "gallery.png"];

/// Largest sampled basis, bytes (4 GB).
const MAX_BASIS_BYTES: f64 = 4e9;

/// Radius (um) holding all but `1e-5` of every mode's power.
fn enclosing_radius_um(basis: &Basis) -> f64 {
    let a = basis.core_radius_um;
    let mut worst: f64 = 0.0;
    for k in 0..basis.len() {
        // integrate the radial power along a line through the mode's azimuthal maximum
        let dr = a / 200.0;
        let rs: Vec<f64> = (0..1200).map(|i| (i as f64 + 0.5) * dr).collect();
        let p: Vec<f64> = rs
            .iter()
            .map(|&r| match basis.radial(k, r) {
                Some(v) => v * v * r,
                None => {
                    let z = basis.eval(k, r, 0.0).norm_sqr() + basis.eval(k, 0.0, r).norm_sqr();
                    z * r
                }
            })
            .collect();
        let total: f64 = p.iter().sum();
        let mut acc = 0.0;
        for (i, v) in p.iter().enumerate() {
            acc += v;
            if acc >= (1.0 - 1e-5) * total {
                worst = worst.max(rs[i]);
                break;
            }
        }
    }
    worst
}

/// The grid and alignment the basis is sampled on.
pub fn sampling_grid(setup: &Setup, basis: &Basis, args: &ModesArgs) -> Result<(Grid, Alignment)> {
    // basis.npy holds modes x ny x nx complex128 values: bound it before allocating.
    let fits = |nx: usize, ny: usize, what: &str| -> Result<()> {
        let bytes = (basis.len() as f64) * (nx as f64) * (ny as f64) * 16.0;
        if bytes > MAX_BASIS_BYTES {
            return Err(Error::Input(format!(
                "{what}: {} modes on {nx} x {ny} px would take {:.1} GB, more than the {:.0} GB \
                 limit; use a smaller grid",
                basis.len(),
                bytes / 1e9,
                MAX_BASIS_BYTES / 1e9
            )));
        }
        Ok(())
    };
    if let Some(ch) = setup.channels.first() {
        let pitch = ch.fibre_pitch_um(&setup.camera);
        fits(
            ch.region[2],
            ch.region[3],
            &format!("channel {} region {:?}", ch.name, ch.region),
        )?;
        return Ok((
            Grid::centred(ch.region[2], ch.region[3], pitch),
            ch.alignment(),
        ));
    }
    fits(
        args.grid_px,
        args.grid_px,
        &format!("--grid-px {}", args.grid_px),
    )?;
    if args.grid_px < 8 {
        return Err(Error::Input(format!(
            "--grid-px {}: must be at least 8",
            args.grid_px
        )));
    }
    let pitch = match args.pitch_um {
        Some(p) if p.is_finite() && p > 0.0 => p,
        Some(p) => {
            return Err(Error::Input(format!(
                "--pitch-um {p}: must be a number > 0"
            )))
        }
        None => {
            let a = basis.core_radius_um;
            let half = enclosing_radius_um(basis).clamp(1.25 * a, 3.0 * a);
            2.0 * half / args.grid_px as f64
        }
    };
    Ok((
        Grid::centred(args.grid_px, args.grid_px, pitch),
        Alignment::default(),
    ))
}

/// Mode tiles side by side, amplitude as brightness and phase as hue.
fn gallery_png(sampled: &Array3<Complex64>, tile_px: usize) -> Result<Vec<u8>> {
    let (n, ny, nx) = sampled.dim();
    let step = (nx.max(ny)).div_ceil(tile_px.max(8)).max(1);
    let tw = nx.div_ceil(step);
    let th = ny.div_ceil(step);
    let cols = ((n as f64).sqrt().ceil() as usize).max(1);
    let rows = n.div_ceil(cols).max(1);
    let gap = 2;
    let w = cols * (tw + gap) + gap;
    let h = rows * (th + gap) + gap;
    let mut img = image::RgbImage::from_pixel(w as u32, h as u32, image::Rgb([255, 255, 255]));
    for k in 0..n {
        let m = sampled.index_axis(ndarray::Axis(0), k);
        let max_abs = m.iter().map(|z| z.norm()).fold(0.0, f64::max);
        let (ox, oy) = (gap + (k % cols) * (tw + gap), gap + (k / cols) * (th + gap));
        for ty in 0..th {
            for tx in 0..tw {
                let z = m[[(ty * step).min(ny - 1), (tx * step).min(nx - 1)]];
                img.put_pixel(
                    (ox + tx) as u32,
                    (oy + ty) as u32,
                    image::Rgb(complex_rgb(z, max_abs)),
                );
            }
        }
    }
    let mut buf = std::io::Cursor::new(Vec::new());
    img.write_to(&mut buf, image::ImageFormat::Png)
        .map_err(|e| Error::Input(format!("gallery.png: cannot encode: {e}")))?;
    Ok(buf.into_inner())
}

pub fn run(args: &ModesArgs) -> Result<Outcome> {
    let c = &args.common;
    let setup = Setup::load(&args.setup)?;
    let out = OutDir::create(&c.out, c.force)?;
    out.ensure_writable(&OUTPUTS)?;
    let basis = Basis::from_setup(&setup)?;
    let (grid, align) = sampling_grid(&setup, &basis, args)?;
    let sampled = basis.sample(&grid, &align);
    let dev = gram_deviation(&gram(&sampled, &grid));
    if let Some(msg) = sampling_warning(dev, &grid, &basis) {
        warn(c.quiet, &msg);
    }
    let modes_json = json!({ "modes": basis.modes });
    out.write_json("modes.json", &modes_json)?;
    out.write_npy("basis.npy", &sampled)?;
    let basis_json = json!({
        "pitch_um": grid.pitch_um,
        "origin_um": grid.origin_um,
        "nx": grid.nx,
        "ny": grid.ny,
        "wavelength_nm": basis.wavelength_nm,
        "kind": basis.kind(),
        "core_radius_um": basis.core_radius_um,
        "v_number": basis.v_number,
        "waist_um": basis.waist_um(),
        "alignment": align,
        "modes": basis.len(),
        "gram_deviation": dev,
        "shape": [basis.len(), grid.ny, grid.nx],
        "normalisation": "sum |psi|^2 * pitch_um^2 = 1 per mode",
    });
    out.write_json("basis.json", &basis_json)?;
    out.write_bytes("gallery.png", &gallery_png(&sampled, args.tile_px)?)?;

    let fmt_opt =
        |x: Option<f64>, p: usize| x.map(|v| format!("{v:.p$}")).unwrap_or_else(|| "-".into());
    let rows: Vec<Vec<String>> = basis
        .modes
        .iter()
        .map(|m| {
            vec![
                m.index.to_string(),
                m.label.clone(),
                m.l.to_string(),
                m.m.to_string(),
                m.orientation.as_str().to_string(),
                m.group.to_string(),
                format!("{:.8}", m.neff),
                fmt_opt(m.b, 6),
                fmt_opt(m.cutoff_v, 6),
                if m.near_cutoff {
                    "yes".into()
                } else {
                    "".into()
                },
            ]
        })
        .collect();
    let mut table = super::table(
        &[
            "index",
            "label",
            "l",
            "m",
            "orient",
            "group",
            "neff",
            "b",
            "cutoff_V",
            "near_cutoff",
        ],
        &rows,
    );
    table.push_str(&format!(
        "{} modes, {} groups, V = {}, grid {}x{} at {:.4} um, max |G - I| = {:.2e}\n",
        basis.len(),
        basis.groups().iter().max().copied().unwrap_or(0),
        fmt_opt(basis.v_number, 4),
        grid.nx,
        grid.ny,
        grid.pitch_um,
        dev
    ));
    let json = json!({
        "modes": basis.modes,
        "n_modes": basis.len(),
        "n_groups": basis.groups().iter().max().copied().unwrap_or(0),
        "v_number": basis.v_number,
        "wavelength_nm": basis.wavelength_nm,
        "grid": { "nx": grid.nx, "ny": grid.ny, "pitch_um": grid.pitch_um, "origin_um": grid.origin_um },
        "gram_deviation": dev,
        "files": OUTPUTS.iter().map(|n| out.file(n).display().to_string()).collect::<Vec<_>>(),
    });
    Ok(Outcome {
        table,
        json,
        failed: false,
    })
}
