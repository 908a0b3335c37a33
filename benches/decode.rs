//! Decode + projection throughput against a bare real-to-complex 2-D FFT of the same frame.
//!
//! 1024^2 and 2048^2 uint16 holograms (one channel covering the frame, carrier (0.25, 0.1),
//! window 0.08 cycles/px), a 256 x 256 decoded grid and two 110-column bases: a random
//! complex one over the whole grid, and the LP modes of a 50 um graded fibre (NA 0.2,
//! 1550 nm, 10 groups = 55 modes, taken twice, the second copy 1 um off centre), on the
//! same grid (1.1 um pitch at 1024^2, 2.2 um at 2048^2: the overlap skips the pixels far
//! outside the core) and on
//! a grid of 0.4 um pitch (the core fills half its width: every pixel counts). The batch runs as in the decoder:
//! a group of PROJECT_FRAMES (32) frames decoded and packed in parallel, then one product
//! per range of modes.
//! Baseline in the same run: realfft rows + rustfft columns of the whole frame (f32).
use criterion::{criterion_group, criterion_main, Criterion, Throughput};
use modegram::decode::{DecodePlan, PlanSpec, RefAmplitude, PROJECT_FRAMES};
use modegram::grid::Alignment;
use modegram::modes::Basis;
use modegram::projection::{field_power, Projector};
use modegram::setup::Setup;
use ndarray::{concatenate, Array2, Array3, Axis};
use num_complex::{Complex32, Complex64};
use rayon::prelude::*;
use std::path::Path;
use std::time::Duration;

const OM4: &str = "version = 1\n[light]\nwavelength_nm = 1550.0\n[camera]\npixel_pitch_um = 5.5\n\
                   [fiber]\nprofile = \"graded\"\ncore_radius_um = 25.0\nna = 0.2\n";

fn frame(n: usize) -> Vec<f32> {
    let mut x: u64 = 7;
    (0..n * n)
        .map(|i| {
            x = x
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            let (c, r) = ((i % n) as f32, (i / n) as f32);
            (20000.0 + 8000.0 * (6.2831855 * (0.25 * c + 0.1 * r)).cos() + (x >> 52) as f32).round()
        })
        .collect()
}

fn plan(n: usize, fibre_pitch_um: f64) -> DecodePlan {
    DecodePlan::build(PlanSpec {
        frame_width: n,
        region: [0, 0, n, n],
        carrier_cycles_per_px: [0.25, 0.1],
        // the 256-bin crop must hold the window: R <= ~0.124 at 1024, ~0.062 at 2048
        window_radius_cycles_per_px: if n <= 1024 { 0.08 } else { 0.06 },
        window_edge: 0.1,
        grid_px: (256, 256),
        fibre_pitch_um,
        wavelength_nm: 1064.0,
        fill_factor: 1.0,
        alignment: Alignment::default(),
        background: vec![0.0; n * n],
        reference: RefAmplitude::Constant(100.0),
    })
}

fn random_basis(p: &DecodePlan, modes: usize) -> Projector {
    let mut x: u64 = 11;
    let mut next = move || {
        x = x
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (x >> 11) as f64 / (1u64 << 53) as f64 - 0.5
    };
    let g = p.grid;
    let scale = 1.0 / (g.len() as f64 * g.pixel_area_um2() / 6.0).sqrt();
    let b = Array3::from_shape_simple_fn((modes, g.ny, g.nx), || {
        Complex64::new(next(), next()) * scale
    });
    Projector::new(b.view(), &g).unwrap()
}

/// The 55 LP modes sampled on the plan's grid, twice (the second copy 1 um off centre).
fn lp_basis(p: &DecodePlan, lp: &Basis) -> Projector {
    let a = lp.sample(&p.grid, &Alignment::default());
    let shifted = Alignment {
        center_um: [1.0, 0.0],
        ..Alignment::default()
    };
    let b = lp.sample(&p.grid, &shifted);
    Projector::from_array(
        concatenate(Axis(0), &[a.view(), b.view()]).unwrap(),
        &p.grid,
    )
    .unwrap()
}

/// Everything one batch needs, allocated once.
struct Batch<'a> {
    frames: Vec<&'a [f32]>,
    fields: Array2<Complex64>,
    packed: Vec<f32>,
    power: Vec<f64>,
    coef: Array2<Complex64>,
}

/// One group as the decoder runs it: decode, field power and packing per frame on
/// `per`-frame chunks in parallel, then one product per range of modes.
fn run_batch(
    p: &DecodePlan,
    pr: &Projector,
    b: &mut Batch,
    scratch: &mut [modegram::decode::Scratch],
    per: usize,
) {
    let (n, len, plen) = (b.frames.len(), p.len(), pr.packed_len());
    let flat = b.fields.as_slice_mut().unwrap();
    b.frames
        .par_chunks(per)
        .zip(flat.par_chunks_mut(per * len))
        .zip(b.packed.par_chunks_mut(per * plen))
        .zip(b.power.par_chunks_mut(per))
        .zip(scratch.par_iter_mut())
        .for_each(|((((fr, out), pk), pw), s)| {
            for (i, f) in fr.iter().enumerate() {
                let o = &mut out[i * len..(i + 1) * len];
                p.decode(f, s, o);
                pw[i] = field_power(o, &p.grid);
                pr.pack_field(o, &mut pk[i * plen..(i + 1) * plen]);
            }
        });
    let m = pr.n_modes();
    let threads = rayon::current_num_threads();
    let per_m = m.div_ceil(threads);
    let packed = &b.packed;
    b.coef
        .axis_chunks_iter_mut(Axis(1), per_m)
        .into_par_iter()
        .enumerate()
        .for_each(|(j, c)| {
            let m0 = j * per_m;
            pr.project_packed(packed, n, m0..m0 + c.ncols(), c)
        });
}

fn bench(c: &mut Criterion) {
    let threads = rayon::current_num_threads();
    let setup = Setup::from_toml(OM4, Path::new("om4.toml")).unwrap();
    let lp = Basis::from_setup(&setup).unwrap();
    assert_eq!(lp.len(), 55);
    for n in [1024usize, 2048] {
        let f = frame(n);
        let p = plan(n, 0.275);
        // the decoder projects PROJECT_FRAMES frames at a time
        let batch = PROJECT_FRAMES.max(threads);
        let per = batch.div_ceil(threads);
        let mut scratch: Vec<_> = (0..threads).map(|_| p.scratch()).collect();
        let mut g = c.benchmark_group(format!("decode_{n}"));
        g.sample_size(10)
            .measurement_time(Duration::from_secs(3))
            .warm_up_time(Duration::from_millis(500));
        g.throughput(Throughput::Elements(batch as u64));
        // the LP grid: 256 px of 0.4 um, i.e. 0.4 * 256 / n um per camera pixel
        let p_lp = plan(n, 0.4 * 256.0 / n as f64);
        let cases = [
            ("random basis".to_string(), random_basis(&p, 110), &p),
            (
                format!("LP basis, {:.1} um grid", p.grid.pitch_um),
                lp_basis(&p, &lp),
                &p,
            ),
            (
                "LP basis, 0.4 um grid".to_string(),
                lp_basis(&p_lp, &lp),
                &p_lp,
            ),
        ];
        for (name, pr, pl) in &cases {
            eprintln!(
                "decode_{n} {name}: {} of {} pixels in the overlap, real basis: {}",
                pr.active_pixels(),
                pl.len(),
                pr.is_real()
            );
            let mut b = Batch {
                frames: (0..batch).map(|_| f.as_slice()).collect(),
                fields: Array2::zeros((batch, pl.len())),
                packed: vec![0f32; batch * pr.packed_len()],
                power: vec![0.0; batch],
                coef: Array2::zeros((batch, pr.n_modes())),
            };
            g.bench_function(format!("decode+project batch, {name} (frames/s)"), |bn| {
                bn.iter(|| run_batch(pl, pr, &mut b, &mut scratch, per))
            });
            // the projection's share of one thread's work: pack and project the batch's
            // fields (filled by the run above), one thread
            let plen = pr.packed_len();
            g.bench_function(format!("pack+project batch, {name}, one thread"), |bn| {
                bn.iter(|| {
                    for (f, d) in b.fields.outer_iter().zip(b.packed.chunks_exact_mut(plen)) {
                        pr.pack_field(f.as_slice().unwrap(), d);
                    }
                    pr.project_packed(&b.packed, batch, 0..pr.n_modes(), b.coef.view_mut());
                })
            });
        }
        g.throughput(Throughput::Elements(1));
        let mut s = p.scratch();
        let mut out = vec![Complex64::default(); p.len()];
        g.bench_function("decode one frame, one thread", |b| {
            b.iter(|| p.decode(&f, &mut s, &mut out))
        });
        // baseline: bare r2c 2-D FFT (f32) of the whole frame, one thread
        let mut rp = realfft::RealFftPlanner::<f32>::new();
        let r = rp.plan_fft_forward(n);
        let cf = rustfft::FftPlanner::<f32>::new().plan_fft_forward(n);
        let nk = n / 2 + 1;
        let mut row = vec![0f32; n];
        let mut spec = vec![Complex32::default(); nk];
        let mut cols = vec![Complex32::default(); nk * n];
        let mut rs = vec![Complex32::default(); r.get_scratch_len()];
        let mut cs = vec![Complex32::default(); cf.get_inplace_scratch_len()];
        g.bench_function("bare rfft2 one frame, one thread", |b| {
            b.iter(|| {
                for y in 0..n {
                    row.copy_from_slice(&f[y * n..(y + 1) * n]);
                    r.process_with_scratch(&mut row, &mut spec, &mut rs)
                        .unwrap();
                    for k in 0..nk {
                        cols[k * n + y] = spec[k];
                    }
                }
                for k in 0..nk {
                    cf.process_with_scratch(&mut cols[k * n..(k + 1) * n], &mut cs);
                }
            })
        });
        g.finish();
    }
}

criterion_group!(benches, bench);
criterion_main!(benches);
