//! Off-axis hologram decoding: frames -> complex fields on each channel's decoded grid ->
//! (optionally) mode coefficients.
//!
//! Contract: [`prepare`] builds one [`DecodePlan`] per channel of the setup (carrier given or
//! found automatically, window radius given or automatic, decoded grid, background and
//! reference amplitude), collecting warnings about the separation of the orders; errors name
//! the setup key or the file and frame. [`decode_prepared`] then streams the frames (one
//! batch at a time, never the whole stack; the next batch is read while the current one is
//! decoded), decodes them in parallel over frames with per-thread scratch (each field also
//! packed for its projector), and projects each channel's fields on its sampled basis with
//! one matrix product per batch and range of modes. [`decode_stack`] does both. Signs and normalisation follow
//! docs/conventions.md; the method is described in docs/decoding.md (Takeda, Ina &
//! Kobayashi 1982, JOSA 72, 156; Cuche, Marquet & Depeursinge 2000, Appl. Opt. 39, 4070).
use crate::error::{Error, Result};
use crate::frames::{mean_frame, FrameStack};
use crate::grid::{Alignment, Grid};
use crate::projection::{field_power, Projector};
use crate::setup::Setup;
use ndarray::{s, Array2, Array3, Axis};
use num_complex::Complex64;
use rayon::prelude::*;
use serde::Serialize;
use std::path::PathBuf;

pub mod carrier;
pub mod plan;
mod prepare;
pub mod refine;
pub mod window;

pub use plan::{DecodePlan, PlanSpec, RefAmplitude, Scratch};
pub use prepare::{choose_grid, fibre_bandwidth_cycles_per_px, lowpass_to_grid, prepare};

/// Frames projected together (at most; a multiple of the batch).
pub const PROJECT_FRAMES: usize = 32;

/// What was decided for one channel (written to decode.json).
#[derive(Debug, Clone, Serialize)]
pub struct ChannelPlanInfo {
    pub name: String,
    pub region: [usize; 4],
    pub carrier_cycles_per_px: [f64; 2],
    /// "auto" (found in the frames), "auto, basis-refined", "setup" or "calibrated".
    pub carrier_source: String,
    /// Sideband power over the noise floor of the mean power spectrum (auto carrier only).
    pub carrier_contrast: Option<f64>,
    /// One-sigma uncertainty of the automatic carrier, per axis, cycles/px.
    pub carrier_uncertainty_cycles_per_px: Option<[f64; 2]>,
    /// Centre of the mean sideband power before any basis refinement, cycles/px.
    pub carrier_centroid_cycles_per_px: Option<[f64; 2]>,
    /// Shift of the carrier by the basis refinement, in FFT bins of the region.
    pub carrier_basis_shift_bins: Option<f64>,
    /// Which order is decoded: "fx > 0 (default)" or "fx < 0 (conjugate)".
    pub carrier_side: String,
    pub fringe_period_px: f64,
    pub window_radius_cycles_per_px: f64,
    /// Expected fibre output bandwidth NA / (M lambda) * pixel pitch, when NA is known.
    pub fibre_bandwidth_cycles_per_px: Option<f64>,
    /// Distance from the window edge to the DC term's edge (negative: overlap).
    pub separation_margin_cycles_per_px: f64,
    pub pitch_um: f64,
    pub nx: usize,
    pub ny: usize,
    pub origin_um: [f64; 2],
    /// Mean reference amplitude |R| (sqrt counts) the field was divided by.
    pub reference_amplitude: f64,
    /// "reference frame, pointwise", "reference frame, mean" or "estimated from holograms".
    pub reference_source: String,
    pub alignment: Alignment,
}

impl ChannelPlanInfo {
    pub fn grid(&self) -> Grid {
        Grid {
            nx: self.nx,
            ny: self.ny,
            pitch_um: self.pitch_um,
            origin_um: self.origin_um,
        }
    }
}

/// Options of a decode run.
#[derive(Debug, Clone, Default)]
pub struct DecodeOptions {
    /// Keep every decoded field (memory: frames x pixels x 16 bytes per channel).
    pub keep_fields: bool,
    /// Overlap of the sideband with the DC order is an error (also `decode.strict`).
    pub strict: bool,
    /// Per-channel alignment replacing the setup's (e.g. zero tilt and defocus for a
    /// calibrator that fits them on the fields).
    pub alignments: Option<Vec<Alignment>>,
    /// Frames decoded per batch (0: four per thread).
    pub batch_frames: usize,
    /// Per-channel carriers (cycles/px) replacing the setup's or the automatic search
    /// (e.g. the carrier with a fitted tilt folded in); `None` entries keep the setup's.
    pub carriers: Option<Vec<Option<[f64; 2]>>>,
}

/// Plans and what was decided for them.
pub struct Prepared {
    pub plans: Vec<DecodePlan>,
    pub channels: Vec<ChannelPlanInfo>,
    pub warnings: Vec<String>,
    /// Saturation level in counts (None: float frames without camera.saturation_counts).
    pub saturation_counts: Option<f64>,
    /// Frame count of the stack when known up front.
    pub frame_count: Option<usize>,
    /// The first frames of the stack (decode.carrier_frames), as read for the carrier search.
    pub carrier_frames: Vec<Vec<f32>>,
}

/// Result of decoding a stack.
#[derive(Debug, Clone)]
pub struct Decoded {
    /// (frames, channels, modes), modes in basis order.
    pub coefficients: Array3<Complex64>,
    /// (frames, channels): sum |c|^2 / field power (0 without a basis).
    pub captured: Array2<f64>,
    /// (frames, channels): pixels of the region at or above the saturation level.
    pub saturated: Array2<usize>,
    /// (frames, channels): sum |E|^2 dA.
    pub field_power: Array2<f64>,
    pub channels: Vec<ChannelPlanInfo>,
    /// Per channel (frames, ny, nx), with `keep_fields`.
    pub fields: Option<Vec<Array3<Complex64>>>,
    pub warnings: Vec<String>,
}

/// Samples the basis of a channel on its decoded grid at its alignment:
/// (modes, ny, nx), each mode with sum |psi|^2 dA = 1.
pub type BasisSampler<'a> = &'a (dyn Fn(&Grid, &Alignment) -> Result<Array3<Complex64>> + Sync);

/// Prepare and decode a stack; see the module header. `progress` is called with the number
/// of frames done.
pub fn decode_stack(
    setup: &Setup,
    basis: Option<BasisSampler>,
    frames: &[PathBuf],
    opts: &DecodeOptions,
    progress: &(dyn Fn(usize) + Sync),
) -> Result<Decoded> {
    let mut prepared = prepare(setup, frames, opts)?;
    let projectors = projectors(&prepared, basis)?;
    refine_auto_carriers(&mut prepared, &projectors);
    decode_prepared(&prepared, &projectors, frames, opts, progress)
}

/// Refine every automatic carrier with the channel's basis ([`refine`]); `projectors` empty:
/// nothing to do. Plans are rebuilt at the refined carriers; a refinement that is refused
/// keeps the centroid and adds a warning.
pub fn refine_auto_carriers(p: &mut Prepared, projectors: &[Projector]) {
    if projectors.len() != p.plans.len() {
        return;
    }
    for (i, q) in projectors.iter().enumerate() {
        if p.channels[i].carrier_source != "auto" {
            continue;
        }
        match refine::refine(&p.plans[i], q, &p.carrier_frames) {
            Ok(r) => {
                // The basis refinement is unbiased only when the setup's alignment is right:
                // with the centre and defocus off, a tilt partly makes up for them and pulls
                // the carrier away from the sideband. A pull beyond what the centre of power
                // can be wrong by is taken as that, and the centre kept.
                let info = &p.channels[i];
                let [_, _, w, h] = info.region;
                let c0 = info.carrier_cycles_per_px;
                let pull = [
                    (r.carrier[0] - c0[0]) * w as f64,
                    (r.carrier[1] - c0[1]) * h as f64,
                ];
                let sc = info
                    .carrier_uncertainty_cycles_per_px
                    .map(|u| [u[0] * w as f64, u[1] * h as f64])
                    .unwrap_or([0.0; 2]);
                let limit = [
                    (3.0 * sc[0]).max(refine::ACCEPT_BINS),
                    (3.0 * sc[1]).max(refine::ACCEPT_BINS),
                ];
                if pull[0].abs() > limit[0] || pull[1].abs() > limit[1] {
                    p.warnings.push(format!(
                        "channel {}: at the setup's alignment the basis pulls the carrier \
                         ({:+.2}, {:+.2}) FFT bins from the sideband's centre of power, more \
                         than that centre can be off ({:.2}, {:.2} bins): the centre of power is \
                         kept; the setup's center_um / defocus_um are probably off (run \
                         `calibrate`, which fits them with the tilt)",
                        info.name, pull[0], pull[1], limit[0], limit[1]
                    ));
                    p.channels[i].carrier_basis_shift_bins = Some(0.0);
                    continue;
                }
                let mut spec = p.plans[i].spec.clone();
                spec.carrier_cycles_per_px = r.carrier;
                p.plans[i] = DecodePlan::build(spec);
                let info = &mut p.channels[i];
                info.carrier_cycles_per_px = r.carrier;
                info.fringe_period_px = 1.0 / r.carrier[0].hypot(r.carrier[1]);
                info.carrier_source = "auto, basis-refined".into();
                info.carrier_basis_shift_bins = Some(r.shift_bins);
                if r.uncertainty.iter().all(|u| u.is_finite()) {
                    info.carrier_uncertainty_cycles_per_px = Some(r.uncertainty);
                }
            }
            Err(refine::NotRefined::TooFar(s)) => p.warnings.push(format!(
                "channel {}: the basis puts the carrier ({:+.2}, {:+.2}) FFT bins from the \
                 sideband's centre, more than {} bins: kept the centre; check the basis \
                 (fibre, magnification, centre) or give `carrier`",
                p.channels[i].name,
                s[0],
                s[1],
                refine::MAX_SHIFT_BINS
            )),
            Err(refine::NotRefined::NoSignal) => {}
        }
    }
}

/// Sample the basis for every channel at its grid and alignment.
pub fn projectors(p: &Prepared, basis: Option<BasisSampler>) -> Result<Vec<Projector>> {
    let Some(b) = basis else {
        return Ok(Vec::new());
    };
    p.channels
        .iter()
        .map(|c| {
            let g = c.grid();
            Projector::from_array(b(&g, &c.alignment)?, &g)
        })
        .collect()
}

/// Working arrays: `fields` for one batch; the rest for a group of batches projected together.
struct Batch {
    fields: Vec<Array2<Complex64>>,
    /// Per channel the fields packed for its projector, `packed_len()` values per frame.
    packed: Vec<Vec<f32>>,
    coeffs: Vec<Array2<Complex64>>,
    sat: Vec<usize>,
    power: Vec<f64>,
}

/// Decode the frames with prepared plans; `projectors` empty (no basis) or one per channel.
pub fn decode_prepared(
    p: &Prepared,
    projectors: &[Projector],
    frames: &[PathBuf],
    opts: &DecodeOptions,
    progress: &(dyn Fn(usize) + Sync),
) -> Result<Decoded> {
    let nch = p.plans.len();
    if !projectors.is_empty() && projectors.len() != nch {
        return Err(Error::Input(format!(
            "{} projectors for {nch} channels",
            projectors.len()
        )));
    }
    let n_modes = projectors.first().map_or(0, |q| q.n_modes());
    if projectors.iter().any(|q| q.n_modes() != n_modes) {
        return Err(Error::Input("channels' bases differ in mode count".into()));
    }
    let mut stack = FrameStack::open(frames)?;
    let (fw, fh) = (stack.width(), stack.height());
    let threads = rayon::current_num_threads().max(1);
    let batch = if opts.batch_frames > 0 {
        opts.batch_frames
    } else {
        4 * threads
    };
    // Fields are projected in groups of several batches (up to PROJECT_FRAMES frames):
    // each product streams the packed basis once, so larger groups cost less per frame.
    let group = if projectors.is_empty() {
        batch
    } else {
        (PROJECT_FRAMES / batch).max(1) * batch
    };
    let npix: Vec<usize> = p.plans.iter().map(|q| q.len()).collect();
    // Two sets of frame buffers: the next batch is read while the current one is decoded.
    let mut bufs: Vec<Vec<f32>> = (0..batch).map(|_| vec![0f32; fw * fh]).collect();
    let mut next_bufs: Vec<Vec<f32>> = (0..batch).map(|_| vec![0f32; fw * fh]).collect();
    let mut b = Batch {
        fields: npix.iter().map(|&n| Array2::zeros((batch, n))).collect(),
        packed: projectors
            .iter()
            .map(|q| vec![0f32; group * q.packed_len()])
            .collect(),
        coeffs: (0..nch).map(|_| Array2::zeros((group, n_modes))).collect(),
        sat: vec![0; group * nch],
        power: vec![0.0; group * nch],
    };
    let chunks = threads.min(batch);
    let per = batch.div_ceil(chunks);
    let mut scratch: Vec<Vec<Scratch>> = (0..chunks)
        .map(|_| p.plans.iter().map(|q| q.scratch()).collect())
        .collect();
    let cap = p.frame_count.unwrap_or(0);
    let mut coef: Vec<Complex64> = Vec::with_capacity(cap * nch * n_modes);
    let mut sat_all: Vec<usize> = Vec::with_capacity(cap * nch);
    let mut pow_all: Vec<f64> = Vec::with_capacity(cap * nch);
    let mut cap_all: Vec<f64> = Vec::with_capacity(cap * nch);
    let mut kept: Vec<Vec<Complex64>> = vec![Vec::new(); if opts.keep_fields { nch } else { 0 }];
    let mut done = 0usize;
    // frames decoded but not yet projected, at the start of the group's buffers
    let mut pending = 0;
    let mut n = read_batch(&mut stack, &mut bufs)?;
    while n > 0 {
        let project_now = pending + n + batch > group;
        let (next, ()) = rayon::join(
            || read_batch(&mut stack, &mut next_bufs),
            || {
                decode_batch(
                    p,
                    projectors,
                    &bufs[..n],
                    &mut b,
                    &mut scratch,
                    per,
                    fw,
                    pending,
                );
                if project_now {
                    project_group(projectors, &mut b, pending + n, threads);
                }
            },
        );
        let next = next?;
        for (k, f) in kept.iter_mut().zip(&b.fields) {
            k.extend(f.slice(s![..n, ..]).iter());
        }
        pending += n;
        if project_now || next == 0 {
            if !project_now {
                project_group(projectors, &mut b, pending, threads);
            }
            for i in 0..pending {
                for (ch, coeffs) in b.coeffs.iter().enumerate() {
                    let c = coeffs.row(i);
                    let pw = b.power[i * nch + ch];
                    coef.extend(c.iter());
                    sat_all.push(b.sat[i * nch + ch]);
                    pow_all.push(pw);
                    let sum_c2: f64 = c.iter().map(|z| z.norm_sqr()).sum();
                    cap_all.push(if n_modes > 0 && pw > 0.0 {
                        sum_c2 / pw
                    } else {
                        0.0
                    });
                }
            }
            pending = 0;
        }
        done += n;
        progress(done);
        std::mem::swap(&mut bufs, &mut next_bufs);
        n = next;
    }
    let frames_n = done;
    let shape2 = (frames_n, nch);
    let err = |e: ndarray::ShapeError| Error::Input(format!("internal shape error: {e}"));
    let fields = if opts.keep_fields {
        Some(
            kept.into_iter()
                .zip(&p.plans)
                .map(|(v, q)| {
                    let (nx, ny) = q.spec.grid_px;
                    Array3::from_shape_vec((frames_n, ny, nx), v).map_err(err)
                })
                .collect::<Result<Vec<_>>>()?,
        )
    } else {
        None
    };
    Ok(Decoded {
        coefficients: Array3::from_shape_vec((frames_n, nch, n_modes), coef).map_err(err)?,
        captured: Array2::from_shape_vec(shape2, cap_all).map_err(err)?,
        saturated: Array2::from_shape_vec(shape2, sat_all).map_err(err)?,
        field_power: Array2::from_shape_vec(shape2, pow_all).map_err(err)?,
        channels: p.channels.clone(),
        fields,
        warnings: p.warnings.clone(),
    })
}

/// Read up to `bufs.len()` frames; the number read.
fn read_batch(stack: &mut FrameStack, bufs: &mut [Vec<f32>]) -> Result<usize> {
    let mut n = 0;
    while n < bufs.len() {
        if stack.read_next(&mut bufs[n])?.is_none() {
            break;
        }
        n += 1;
    }
    Ok(n)
}

/// Project the first `n` packed fields of every channel: one product per (channel, range of
/// modes), so the packed basis is streamed once per group; channels in parallel, their
/// modes split further only when there are fewer channels than threads.
fn project_group(projectors: &[Projector], b: &mut Batch, n: usize, threads: usize) {
    let nch = projectors.len();
    let n_modes = projectors.first().map_or(0, |q| q.n_modes());
    if nch == 0 {
        return;
    }
    let slices = (threads / nch).max(1).min(n_modes.max(1));
    let modes_per = n_modes.div_ceil(slices).max(1);
    let mut jobs = Vec::with_capacity(nch * slices);
    for ((c, pk), q) in b.coeffs.iter_mut().zip(&b.packed).zip(projectors) {
        let mut rest = c.slice_mut(s![..n, ..]);
        let mut k = 0;
        while k < n_modes {
            let take = modes_per.min(n_modes - k);
            let (head, tail) = rest.split_at(Axis(1), take);
            jobs.push((q, pk.as_slice(), k..k + take, head));
            rest = tail;
            k += take;
        }
    }
    jobs.into_par_iter()
        .for_each(|(q, pk, modes, cc)| q.project_packed(pk, n, modes, cc));
}

/// Decode `bufs` into the batch's field rows, in parallel over `per`-frame chunks, each chunk
/// with its own scratch (deterministic for any thread count); the packed fields, saturation
/// counts and powers go to the group's slots from `off` on.
#[allow(clippy::too_many_arguments)]
fn decode_batch(
    p: &Prepared,
    projectors: &[Projector],
    bufs: &[Vec<f32>],
    b: &mut Batch,
    scratch: &mut [Vec<Scratch>],
    per: usize,
    fw: usize,
    off: usize,
) {
    let nch = p.plans.len();
    let n = bufs.len();
    // Per chunk: for each channel the mutable rows of that chunk.
    let mut field_chunks: Vec<Vec<&mut [Complex64]>> =
        (0..scratch.len()).map(|_| Vec::new()).collect();
    for f in b.fields.iter_mut() {
        let cols = f.ncols();
        let flat = f.as_slice_mut().expect("batch arrays are contiguous");
        for (c, part) in flat[..n * cols].chunks_mut(per * cols).enumerate() {
            field_chunks[c].push(part);
        }
    }
    let mut packed_chunks: Vec<Vec<&mut [f32]>> = (0..scratch.len()).map(|_| Vec::new()).collect();
    for (pk, q) in b.packed.iter_mut().zip(projectors) {
        let len = q.packed_len();
        for (c, part) in pk[off * len..(off + n) * len]
            .chunks_mut(per * len)
            .enumerate()
        {
            packed_chunks[c].push(part);
        }
    }
    let sat_chunks = b.sat[off * nch..(off + n) * nch].chunks_mut(per * nch);
    let pow_chunks = b.power[off * nch..(off + n) * nch].chunks_mut(per * nch);
    bufs.par_chunks(per)
        .zip(scratch.par_iter_mut())
        .zip(field_chunks.into_par_iter())
        .zip(packed_chunks.into_par_iter())
        .zip(sat_chunks.collect::<Vec<_>>().into_par_iter())
        .zip(pow_chunks.collect::<Vec<_>>().into_par_iter())
        .for_each(|(((((frames, scr), mut outs), mut packs), sat), pow)| {
            for (i, frame) in frames.iter().enumerate() {
                for (ch, plan) in p.plans.iter().enumerate() {
                    let npx = plan.len();
                    let out = &mut outs[ch][i * npx..(i + 1) * npx];
                    plan.decode(frame, &mut scr[ch], out);
                    pow[i * nch + ch] = field_power(out, &plan.grid);
                    if let (Some(q), Some(pk)) = (projectors.get(ch), packs.get_mut(ch)) {
                        let len = q.packed_len();
                        q.pack_field(out, &mut pk[i * len..(i + 1) * len]);
                    }
                    sat[i * nch + ch] = match p.saturation_counts {
                        Some(level) => count_saturated(frame, fw, plan.spec.region, level),
                        None => 0,
                    };
                }
            }
        });
}

/// Pixels of `region` at or above `level`.
pub fn count_saturated(frame: &[f32], fw: usize, region: [usize; 4], level: f64) -> usize {
    let [x0, y0, w, h] = region;
    let level = level as f32;
    (0..h)
        .map(|y| {
            frame[(y0 + y) * fw + x0..][..w]
                .iter()
                .filter(|&&v| v >= level)
                .count()
        })
        .sum()
}

/// Read the mean of a dark or reference file and check its size against the frames.
pub(crate) fn background_file(path: &std::path::Path, fw: usize, fh: usize) -> Result<Vec<f64>> {
    let (v, w, h) = mean_frame(path)?;
    if (w, h) != (fw, fh) {
        return Err(Error::frame(
            path,
            Some(0),
            format!("frame is {w}x{h} pixels, the holograms {fw}x{fh}"),
        ));
    }
    Ok(v)
}
