//! Building the channel plans from a setup: carrier (given or searched), window radius
//! (given or automatic), decoded grid, background and reference amplitude; warnings about
//! fringe sampling and order separation.
//!
//! Reference amplitude without a reference frame (docs/decoding.md): with a = |R|^2
//! (constant over the region) the mean hologram intensity is I0 = <|S|^2> + a and the
//! sideband power P = <|S R*|^2> = <|S|^2> a, so a solves a^2 - I0 a + P = 0; the larger
//! root a = (I0 + sqrt(I0^2 - 4P)) / 2 takes the reference as the stronger beam. The median
//! over the carrier-search frames is used for every frame, so frames stay comparable.
use super::{
    background_file, carrier, window, ChannelPlanInfo, DecodeOptions, DecodePlan, PlanSpec,
    Prepared, RefAmplitude,
};
use crate::error::{Error, Result};
use crate::frames::FrameStack;
use crate::setup::{ChannelSpec, Setup};
use num_complex::Complex64;
use rustfft::FftPlanner;
use std::path::PathBuf;

/// Expected fibre output bandwidth on the camera, cycles/px: B = NA / (M lambda) * pitch
/// (REFERENCES.md "Off-axis holography"); None when the setup gives no NA.
pub fn fibre_bandwidth_cycles_per_px(setup: &Setup, ch: &ChannelSpec) -> Option<f64> {
    let (na, _) = setup.na_and_core_index()?;
    Some(na * setup.camera.pixel_pitch_um / (ch.magnification * setup.light.wavelength_nm * 1e-3))
}

fn smooth(n: usize) -> bool {
    let mut n = n;
    for p in [2, 3, 5] {
        while n > 1 && n.is_multiple_of(p) {
            n /= p;
        }
    }
    n == 1
}

/// Decoded grid (nx, ny) for a `w` x `h` region and window radius `radius` (cycles/px):
/// square decoded pixels need nx / w == ny / h; the crop must hold every bin within the
/// radius of the carrier (n >= 2 floor(R n_region + 0.5) + 1 on each axis). Default: the
/// smallest size meeting both, preferring sizes with factors 2, 3, 5 only; `grid_px` sets nx.
pub fn choose_grid(
    w: usize,
    h: usize,
    radius: f64,
    grid_px: Option<usize>,
) -> std::result::Result<(usize, usize), String> {
    let need = |n: usize| 2 * (radius * n as f64 + 0.5).floor() as usize + 1;
    let (need_x, need_y) = (need(w), need(h));
    let fits = |nx: usize| -> Option<usize> {
        if !(nx * h).is_multiple_of(w) {
            return None;
        }
        let ny = nx * h / w;
        (nx >= need_x && ny >= need_y && nx <= w && ny <= h).then_some(ny)
    };
    if let Some(nx) = grid_px {
        return match fits(nx) {
            Some(ny) => Ok((nx, ny)),
            None if !(nx * h).is_multiple_of(w) => Err(format!(
                "{nx} columns give {} rows for the {w}x{h} region: not a whole number \
                 (square decoded pixels need grid_px * height / width whole)",
                nx as f64 * h as f64 / w as f64
            )),
            None => Err(format!(
                "the window (radius {radius:.4} cycles/px) needs at least {need_x} x {need_y} \
                 bins and at most the region's {w} x {h}"
            )),
        };
    }
    let mut first = None;
    for nx in need_x..=w {
        if let Some(ny) = fits(nx) {
            if smooth(nx) && smooth(ny) {
                return Ok((nx, ny));
            }
            first.get_or_insert((nx, ny));
        }
    }
    first.ok_or_else(|| {
        format!(
            "no decoded grid with square pixels fits the {w}x{h} region (width and height \
             share too few factors); use a region whose height / width is a simple ratio"
        )
    })
}

/// Low-pass a region-sized real map (w * h) to the decoded grid (nx * ny): keep the DFT bins
/// of the crop around DC, inverse transform at the cropped size.
pub fn lowpass_to_grid(values: &[f64], w: usize, h: usize, nx: usize, ny: usize) -> Vec<f64> {
    let mut p = FftPlanner::<f64>::new();
    let (fx, fy) = (p.plan_fft_forward(w), p.plan_fft_forward(h));
    let (ix, iy) = (p.plan_fft_inverse(nx), p.plan_fft_inverse(ny));
    let mut a: Vec<Complex64> = values.iter().map(|&v| Complex64::new(v, 0.0)).collect();
    for row in a.chunks_exact_mut(w) {
        fx.process(row);
    }
    let mut col = vec![Complex64::default(); h];
    let mut crop = vec![Complex64::default(); nx * ny];
    for cx in 0..nx {
        let kx = super::plan::crop_offset(cx, nx).rem_euclid(w as i64) as usize;
        for y in 0..h {
            col[y] = a[y * w + kx];
        }
        fy.process(&mut col);
        for cy in 0..ny {
            let ky = super::plan::crop_offset(cy, ny).rem_euclid(h as i64) as usize;
            crop[cy * nx + cx] = col[ky];
        }
    }
    for row in crop.chunks_exact_mut(nx) {
        ix.process(row);
    }
    let mut c2 = vec![Complex64::default(); ny];
    for cx in 0..nx {
        for cy in 0..ny {
            c2[cy] = crop[cy * nx + cx];
        }
        iy.process(&mut c2);
        for cy in 0..ny {
            crop[cy * nx + cx] = c2[cy];
        }
    }
    let norm = 1.0 / (w * h) as f64;
    crop.iter().map(|z| z.re * norm).collect()
}

fn region_of(full: &[f64], fw: usize, r: [usize; 4]) -> Vec<f64> {
    let [x0, y0, w, h] = r;
    (0..h)
        .flat_map(|y| full[(y0 + y) * fw + x0..][..w].iter().copied())
        .collect()
}

/// Which twin the channel takes, as written in decode.json and the tables.
pub fn side_text(conjugate: bool) -> &'static str {
    if conjugate {
        carrier::Side::Conjugate.as_str()
    } else {
        carrier::Side::Default.as_str()
    }
}

/// The error text of a failed automatic carrier search: where it searched, what it found,
/// how to choose.
fn carrier_problem_message(
    name: &str,
    region: [usize; 4],
    s: &carrier::SearchSpec,
    frames: usize,
    p: &carrier::Problem,
) -> String {
    let wher = format!(
        "searched the mean power spectrum of {frames} frame(s) (decode.carrier_frames, spread \
         over the stack) in region {region:?} outside |f| < {} cycles/px (decode.dc_exclusion)",
        s.dc_exclusion
    );
    match p {
        carrier::Problem::Flat => format!(
            "channel {name}: no sideband found: {wher}; the region holds no power after the \
             background subtraction (a dark or reference-only frame in the stack?)"
        ),
        carrier::Problem::NoSideband {
            strongest,
            contrast,
        } => format!(
            "channel {name}: no sideband found: {wher}; the strongest blob, at ({:.4}, {:.4}) \
             cycles/px, holds only {contrast:.2} x the noise floor (need {}): is the \
             reference beam blocked, or the fibre output off the region?",
            strongest[0],
            strongest[1],
            carrier::MIN_CONTRAST
        ),
        carrier::Problem::TwoSidebands {
            first,
            second,
            ratio,
        } => format!(
            "channel {name}: two sidebands of similar strength: at ({:.4}, {:.4}) and \
             ({:.4}, {:.4}) cycles/px (the second {:.0} % of the first; {wher}): two \
             references reach this region; give each channel its `carrier` (and use \
             `conjugate` to take the mirrored order)",
            first[0],
            first[1],
            second[0],
            second[1],
            100.0 * ratio
        ),
    }
}

/// Build the plans for every channel of `setup` for the frames in `frames`.
pub fn prepare(setup: &Setup, frames: &[PathBuf], opts: &DecodeOptions) -> Result<Prepared> {
    let f = setup.file_name();
    if setup.channels.is_empty() {
        return Err(Error::setup(
            &f,
            "channel",
            "(none)",
            "define at least one [[channel]] with its region",
        ));
    }
    let mut stack = FrameStack::open(frames)?;
    let (fw, fh) = (stack.width(), stack.height());
    let dark = match &setup.frames.dark {
        Some(p) => Some(background_file(&setup.resolve(p), fw, fh)?),
        None => None,
    };
    let reference = match &setup.frames.reference {
        Some(p) => Some(background_file(&setup.resolve(p), fw, fh)?),
        None => None,
    };
    // Frames for the carrier search and the reference-amplitude estimate: spread evenly over
    // the stack when its length is known (the mean over a whole launch sequence is point
    // symmetric for a lossless device, a run of the first launches need not be), else the
    // first ones.
    let want = setup.decode.carrier_frames.max(1);
    let picks: Vec<usize> = match stack.len() {
        Some(n) if n > want => (0..want).map(|k| ((2 * k + 1) * n) / (2 * want)).collect(),
        _ => (0..want).collect(),
    };
    let mut carrier_frames = Vec::new();
    let mut buf = vec![0f32; fw * fh];
    for i in 0..=picks.last().copied().unwrap_or(0) {
        if stack.read_next(&mut buf)?.is_none() {
            break;
        }
        if picks.binary_search(&i).is_ok() {
            carrier_frames.push(buf.clone());
        }
    }
    if carrier_frames.is_empty() {
        return Err(Error::frame(&frames[0], None, "the stack holds no frame"));
    }
    let cf: Vec<&[f32]> = carrier_frames.iter().map(Vec::as_slice).collect();
    let strict = opts.strict || setup.decode.strict;
    let mut warnings = Vec::new();
    let mut plans = Vec::new();
    let mut infos = Vec::new();
    for (i, ch) in setup.channels.iter().enumerate() {
        let key = |k: &str| format!("channel[{i}].{k}");
        let [x0, y0, w, h] = ch.region;
        if x0 + w > fw || y0 + h > fh {
            return Err(Error::setup(
                &f,
                key("region"),
                format!("{:?}", ch.region),
                format!(
                    "reaches beyond the {fw}x{fh} (width x height) frames of {}",
                    frames[0].display()
                ),
            ));
        }
        let bg64: Vec<f64> = match (&reference, &dark) {
            (Some(r), _) => region_of(r, fw, ch.region),
            (None, Some(d)) => region_of(d, fw, ch.region),
            // No dark or reference: subtract the region's mean over the carrier frames (a
            // constant, so only the DC bin changes) to keep the f32 FFT's rounding small.
            (None, None) => {
                let [x0, y0, w, h] = ch.region;
                let mut m = 0.0;
                for fr in &cf {
                    for y in 0..h {
                        m += fr[(y0 + y) * fw + x0..][..w]
                            .iter()
                            .map(|&v| v as f64)
                            .sum::<f64>();
                    }
                }
                vec![m / (cf.len() * w * h) as f64; w * h]
            }
        };
        let background: Vec<f32> = bg64.iter().map(|&v| v as f32).collect();
        // Carrier
        let override_c = opts
            .carriers
            .as_ref()
            .and_then(|v| v.get(i).copied().flatten());
        let mut estimate = None;
        let (c, source) = match (override_c, ch.carrier_cycles_per_px()) {
            (Some(c), _) => (c, "calibrated"),
            (None, Some(c)) => (c, "setup"),
            (None, None) => {
                let spec = carrier::MeanSpectrum::compute(&cf, fw, ch.region, &background);
                let search = carrier::SearchSpec {
                    dc_exclusion: setup.decode.dc_exclusion,
                    conjugate: ch.conjugate,
                    fill_factor: setup.camera.fill_factor,
                    band: fibre_bandwidth_cycles_per_px(setup, ch),
                };
                let e = carrier::estimate(&spec, &search).map_err(|p| {
                    Error::frame(
                        &frames[0],
                        None,
                        carrier_problem_message(&ch.name, ch.region, &search, cf.len(), &p),
                    )
                })?;
                estimate = Some(e);
                (e.carrier, "auto")
            }
        };
        let cabs = c[0].hypot(c[1]);
        let period = 1.0 / cabs;
        if period < 3.0 {
            warnings.push(format!(
                "channel {}: fringe period {period:.2} px is below 3 px per fringe (carrier \
                 ({:.4}, {:.4}) cycles/px): sampling near its limit, expect aliasing losses",
                ch.name, c[0], c[1]
            ));
        }
        let band = fibre_bandwidth_cycles_per_px(setup, ch);
        let auto_r = window::auto_radius(c);
        let radius = ch.window_radius.value().unwrap_or(auto_r);
        let margin = window::separation_margin(c, radius, band);
        if margin < 0.0 || radius > auto_r * (1.0 + 1e-9) {
            let msg = format!(
                "channel {}: the sideband overlaps the DC order: carrier |c| = {cabs:.4} \
                 cycles/px, window radius {radius:.4}, fibre bandwidth {}, DC term to \
                 {:.4}; separation margin {margin:.4} cycles/px (largest clean radius \
                 {auto_r:.4}); tilt the reference more or lower the magnification",
                ch.name,
                band.map_or("unknown".into(), |b| format!("{b:.4}")),
                2.0 * band.unwrap_or(radius),
            );
            if strict {
                return Err(Error::setup(
                    &f,
                    key("window_radius"),
                    format!("{radius:.4}"),
                    format!("{msg} (decode.strict / --strict)"),
                ));
            }
            warnings.push(msg);
        }
        if let Some(b) = band {
            if b > radius {
                warnings.push(format!(
                    "channel {}: the window (radius {radius:.4} cycles/px) cuts the expected \
                     fibre bandwidth {b:.4} cycles/px (NA / (M lambda) * pitch): high-order \
                     modes lose power",
                    ch.name
                ));
            }
        }
        let (nx, ny) = choose_grid(w, h, radius, setup.decode.grid_px).map_err(|r| {
            Error::setup(
                &f,
                "decode.grid_px",
                format!("{:?}", setup.decode.grid_px),
                format!("channel {}: {r}", ch.name),
            )
        })?;
        let alignment = opts
            .alignments
            .as_ref()
            .and_then(|a| a.get(i).copied())
            .unwrap_or_else(|| ch.alignment());
        let fp = ch.fibre_pitch_um(&setup.camera);
        let (ref_amp, ref_source) = match &reference {
            Some(r) => {
                let amp: Vec<f64> = region_of(r, fw, ch.region)
                    .iter()
                    .zip(
                        dark.as_ref()
                            .map(|d| region_of(d, fw, ch.region))
                            .unwrap_or_default()
                            .iter()
                            .chain(std::iter::repeat(&0.0)),
                    )
                    .map(|(&r, &d)| (r - d).max(0.0).sqrt())
                    .collect();
                let mean = amp.iter().sum::<f64>() / amp.len() as f64;
                if mean <= 0.0 {
                    return Err(Error::frame(
                        setup.resolve(setup.frames.reference.as_ref().expect("given")),
                        None,
                        format!("channel {}: the reference frame is not brighter than the dark frame in region {:?}", ch.name, ch.region),
                    ));
                }
                if setup.decode.flatten_reference {
                    let floor = 0.05 * mean;
                    let map = lowpass_to_grid(&amp, w, h, nx, ny)
                        .into_iter()
                        .map(|v| v.max(floor))
                        .collect();
                    (RefAmplitude::Map(map), "reference frame, pointwise")
                } else {
                    (RefAmplitude::Constant(mean), "reference frame, mean")
                }
            }
            None => (RefAmplitude::Constant(1.0), "estimated from holograms"),
        };
        let spec = PlanSpec {
            frame_width: fw,
            region: ch.region,
            carrier_cycles_per_px: c,
            window_radius_cycles_per_px: radius,
            window_edge: setup.decode.window_edge,
            grid_px: (nx, ny),
            fibre_pitch_um: fp,
            wavelength_nm: setup.light.wavelength_nm,
            fill_factor: setup.camera.fill_factor,
            alignment,
            background,
            reference: ref_amp,
        };
        let mut plan = DecodePlan::build(spec);
        if reference.is_none() {
            let a = estimate_reference_power(&plan, &cf, dark.as_deref(), fw);
            if !(a.is_finite() && a > 0.0) {
                return Err(Error::frame(
                    &frames[0],
                    None,
                    format!("channel {}: cannot estimate the reference intensity from the holograms (mean intensity not positive); give frames.reference", ch.name),
                ));
            }
            plan = plan.with_reference(RefAmplitude::Constant(a.sqrt()));
        }
        let mean_ref = match &plan.spec.reference {
            RefAmplitude::Constant(a) => *a,
            RefAmplitude::Map(m) => m.iter().sum::<f64>() / m.len() as f64,
        };
        infos.push(ChannelPlanInfo {
            name: ch.name.clone(),
            region: ch.region,
            carrier_cycles_per_px: c,
            carrier_source: source.into(),
            carrier_contrast: estimate.map(|e| e.contrast),
            carrier_uncertainty_cycles_per_px: estimate.map(|e| e.uncertainty),
            carrier_centroid_cycles_per_px: estimate.map(|e| e.carrier),
            carrier_basis_shift_bins: None,
            carrier_side: side_text(ch.conjugate).into(),
            fringe_period_px: period,
            window_radius_cycles_per_px: radius,
            fibre_bandwidth_cycles_per_px: band,
            separation_margin_cycles_per_px: margin,
            pitch_um: plan.grid.pitch_um,
            nx,
            ny,
            origin_um: plan.grid.origin_um,
            reference_amplitude: mean_ref,
            reference_source: ref_source.into(),
            alignment,
        });
        plans.push(plan);
    }
    let saturation_counts = setup.camera.saturation_counts.or(stack.kind().max_counts());
    Ok(Prepared {
        plans,
        channels: infos,
        warnings,
        saturation_counts,
        frame_count: stack.len(),
        carrier_frames,
    })
}

/// Median over `frames` of the reference intensity a = (I0 + sqrt(I0^2 - 4P)) / 2 (module
/// header), with `plan` built for |R| = 1.
pub fn estimate_reference_power(
    plan: &DecodePlan,
    frames: &[&[f32]],
    dark: Option<&[f64]>,
    fw: usize,
) -> f64 {
    let [x0, y0, w, h] = plan.spec.region;
    let mut s = plan.scratch();
    let mut out = vec![Complex64::default(); plan.len()];
    let npx = (w * h) as f64;
    let mut est: Vec<f64> = frames
        .iter()
        .map(|fr| {
            plan.decode(fr, &mut s, &mut out);
            let p = crate::projection::field_power(&out, &plan.grid) / npx;
            let mut i0 = 0.0;
            for y in 0..h {
                for x in 0..w {
                    let idx = (y0 + y) * fw + x0 + x;
                    i0 += fr[idx] as f64 - dark.map_or(0.0, |d| d[idx]);
                }
            }
            i0 /= npx;
            (i0 + (i0 * i0 - 4.0 * p).max(0.0).sqrt()) / 2.0
        })
        .collect();
    est.sort_by(|a, b| a.total_cmp(b));
    est[est.len() / 2]
}
