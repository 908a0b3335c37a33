//! `modegram check` as a library call: measure every check item of every channel from the
//! frames and the setup, then grade them with [`super::check::evaluate`].
//!
//! Contract: [`check_setup`] decodes the frames once without tilt/defocus correction, reads
//! them once more for raw statistics (peak, saturation, the mean power spectrum of the first
//! frames, the mean frame) and returns the items in channel order. Errors name the file,
//! frame or key (frames of the wrong size for the regions are reported by the decoder).
use super::calibrate::{context, decode_raw, RawFields};
use super::check::{evaluate, Context, Item, Measured, Thresholds};
use super::live::dc_distance;
use super::measure::{field_centroid_um, focus_scan, reference_uniformity, sideband_to_dc};
use super::objective::Fft2;
use crate::error::Result;
use crate::frames::{mean_frame, FrameStack};
use crate::grid::{Alignment, Grid};
use crate::modes::Basis;
use crate::setup::Setup;
use ndarray::Array2;
use num_complex::Complex64;
use std::path::PathBuf;

/// Frames whose power spectra are averaged for the sideband / DC energies.
const SPECTRUM_FRAMES: usize = 8;

struct RawStats {
    peak: Vec<f64>,
    saturated: Vec<usize>,
    pixels: Vec<usize>,
    /// Per channel mean |FFT|^2 of the (dark-subtracted) region, (h, w) FFT order.
    power: Vec<Array2<f64>>,
    /// Mean frame (full size) and frame count.
    mean: Vec<f64>,
    width: usize,
    full_scale: Option<f64>,
}

/// Raw statistics; the power spectra are taken over the disc `discs[c]` = (cx, cy, r) in
/// region pixels (the signal area), so the fringe visibility is that of the signal area.
fn raw_stats(
    setup: &Setup,
    frames: &[PathBuf],
    dark: Option<&[f64]>,
    discs: &[(f64, f64, f64)],
) -> Result<RawStats> {
    let mut stack = FrameStack::open(frames)?;
    let (fw, fh) = (stack.width(), stack.height());
    let full_scale = setup.camera.saturation_counts.or(stack.kind().max_counts());
    let nch = setup.channels.len();
    let mut st = RawStats {
        peak: vec![f64::NEG_INFINITY; nch],
        saturated: vec![0; nch],
        pixels: vec![0; nch],
        power: setup
            .channels
            .iter()
            .map(|c| Array2::zeros((c.region[3], c.region[2])))
            .collect(),
        mean: vec![0.0; fw * fh],
        width: fw,
        full_scale,
    };
    let ffts: Vec<Fft2> = setup
        .channels
        .iter()
        .map(|c| Fft2::new(c.region[3], c.region[2]))
        .collect();
    let mut buf = vec![0f32; fw * fh];
    let mut n = 0usize;
    while stack.read_next(&mut buf)?.is_some() {
        for (m, &v) in st.mean.iter_mut().zip(&buf) {
            *m += v as f64;
        }
        for (c, ch) in setup.channels.iter().enumerate() {
            let [x0, y0, w, h] = ch.region;
            let mut d = Vec::with_capacity(w * h);
            for y in y0..y0 + h {
                for x in x0..x0 + w {
                    let v = buf[y * fw + x] as f64;
                    st.peak[c] = st.peak[c].max(v);
                    if let Some(s) = full_scale {
                        if v >= s {
                            st.saturated[c] += 1;
                        }
                    }
                    let b = dark.map_or(0.0, |d| d[y * fw + x]);
                    let (cx, cy, r) = discs[c];
                    let (dx, dy) = ((x - x0) as f64 - cx, (y - y0) as f64 - cy);
                    let inside = dx * dx + dy * dy <= r * r;
                    d.push(Complex64::new(if inside { v - b } else { 0.0 }, 0.0));
                }
            }
            st.pixels[c] += w * h;
            if n < SPECTRUM_FRAMES {
                let mut s = vec![Complex64::new(0.0, 0.0); ffts[c].scratch_len()];
                ffts[c].forward(&mut d, &mut s);
                for (p, z) in st.power[c].iter_mut().zip(&d) {
                    *p += z.norm_sqr();
                }
            }
        }
        n += 1;
    }
    if n > 0 {
        st.mean.iter_mut().for_each(|m| *m /= n as f64);
    }
    Ok(st)
}

/// Measure and grade every item of every channel.
pub fn check_setup(
    setup: &Setup,
    basis: &Basis,
    frames: &[PathBuf],
    th: &Thresholds,
    progress: &(dyn Fn(usize) + Sync),
) -> Result<Vec<Item>> {
    let raw = decode_raw(setup, frames, progress)?;
    check_decoded(setup, basis, frames, &raw, th)
}

/// As [`check_setup`], from fields `raw` already decoded from `frames` by
/// [`decode_raw`] (tilt and defocus zeroed; the fields do not depend on the setup's
/// centre, rotation or scale), so a caller that has them does not decode twice.
pub fn check_decoded(
    setup: &Setup,
    basis: &Basis,
    frames: &[PathBuf],
    raw: &RawFields,
    th: &Thresholds,
) -> Result<Vec<Item>> {
    let dark = match &setup.frames.dark {
        Some(p) => Some(mean_frame(&setup.resolve(p))?.0),
        None => None,
    };
    // The signal area of each channel: 1.2 core radii around the expected fibre axis.
    let discs: Vec<(f64, f64, f64)> = setup
        .channels
        .iter()
        .map(|ch| {
            let ppu = ch.magnification * ch.scale / setup.camera.pixel_pitch_um;
            (
                (ch.region[2] / 2) as f64 + ch.center_um[0] * ppu,
                (ch.region[3] / 2) as f64 + ch.center_um[1] * ppu,
                1.2 * basis.core_radius_um * ppu,
            )
        })
        .collect();
    let stats = raw_stats(setup, frames, dark.as_deref(), &discs)?;
    let reference = match &setup.frames.reference {
        Some(p) => Some(mean_frame(&setup.resolve(p))?.0),
        None => None,
    };
    let fctx = context(setup, basis);
    let mut items = Vec::new();
    for (c, ch) in setup.channels.iter().enumerate() {
        let info = &raw.info[c];
        let grid: Grid = raw.grids[c];
        let fields = &raw.fields[c];
        let a = ch.alignment();
        let mag = ch.magnification * ch.scale;
        let px_per_um = mag / setup.camera.pixel_pitch_um;
        let carrier = info.carrier_cycles_per_px;
        let window = info.window_radius_cycles_per_px;
        let band = info.fibre_bandwidth_cycles_per_px.unwrap_or(window);
        let d_dc = dc_distance(carrier);
        let [x0, y0, w, h] = ch.region;
        // Camera position of the fibre axis inside the region, and the core radius in px.
        let cx = (w / 2) as f64 + a.center_um[0] * px_per_um;
        let cy = (h / 2) as f64 + a.center_um[1] * px_per_um;
        let r_px = basis.core_radius_um * px_per_um;
        let region = |full: &[f64]| {
            Array2::from_shape_fn((h, w), |(y, x)| full[(y0 + y) * stats.width + x0 + x])
        };
        let (uniformity, beam_ratio) = match &reference {
            Some(r) => {
                let rr = region(r);
                let rr = match &dark {
                    Some(d) => rr - region(d),
                    None => rr,
                };
                let mean = region(&stats.mean);
                let u = reference_uniformity(rr.view(), cx, cy, r_px);
                let (mut sr, mut ss, mut n) = (0.0, 0.0, 0usize);
                for y in 0..h {
                    for x in 0..w {
                        let (dx, dy) = (x as f64 - cx, y as f64 - cy);
                        if dx * dx + dy * dy <= r_px * r_px {
                            sr += rr[[y, x]];
                            ss += mean[[y, x]]
                                - rr[[y, x]]
                                - dark
                                    .as_ref()
                                    .map_or(0.0, |d| d[(y0 + y) * stats.width + x0 + x]);
                            n += 1;
                        }
                    }
                }
                (u, (n > 0 && ss > 0.0).then(|| sr / ss))
            }
            None => (None, None),
        };
        let sampler = |g: &Grid, al: &Alignment| basis.sample(g, al);
        let n_modes = basis.len();
        let focus = focus_scan(
            fields.view(),
            &grid,
            fctx.wavelength_nm,
            &a,
            sampler,
            4.0 * fctx.depth_of_focus_um(),
            n_modes + 10,
        );
        let (dz, captured) = (focus.defocus_um, focus.captured_at_start);
        let m = Measured {
            carrier_cycles_per_px: Some(carrier),
            window_radius: Some(window),
            bandwidth: Some(band),
            sideband_to_dc: Some(sideband_to_dc(
                stats.power[c].view(),
                carrier,
                window,
                2.0 * band,
            )),
            beam_ratio,
            saturated_fraction: (stats.full_scale.is_some() && stats.pixels[c] > 0)
                .then(|| stats.saturated[c] as f64 / stats.pixels[c] as f64),
            peak_counts: Some(stats.peak[c]),
            full_scale_counts: stats.full_scale,
            reference_uniformity: uniformity,
            centroid_um: field_centroid_um(fields.view(), &grid),
            defocus_um: Some(dz),
            captured: Some(captured),
            dc_distance: Some(d_dc),
        };
        let ctx = Context {
            channel: ch.name.clone(),
            core_radius_um: basis.core_radius_um,
            wavelength_nm: fctx.wavelength_nm,
            na: fctx.na,
            magnification: mag,
            pixel_pitch_um: setup.camera.pixel_pitch_um,
            center_um: a.center_um,
            defocus_um: a.defocus_um,
        };
        let mut it = evaluate(&m, &ctx, th);
        items.append(&mut it);
    }
    Ok(items)
}
