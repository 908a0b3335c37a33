//! Decode + projection throughput against a bare real-to-complex 2-D FFT of the same frame.
//!
//! 1024^2 and 2048^2 uint16 holograms (one channel covering the frame, carrier (0.25, 0.1),
//! window 0.08 cycles/px), a 256 x 256 decoded grid and a 110-mode random complex basis.
//! Baseline in the same run: realfft rows + rustfft columns of the whole frame (f32).
use criterion::{criterion_group, criterion_main, Criterion, Throughput};
use modegram::decode::{DecodePlan, PlanSpec, RefAmplitude};
use modegram::grid::Alignment;
use modegram::projection::Projector;
use ndarray::{Array2, Array3};
use num_complex::{Complex32, Complex64};
use rayon::prelude::*;
use std::time::Duration;

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

fn plan(n: usize) -> DecodePlan {
    DecodePlan::build(PlanSpec {
        frame_width: n,
        region: [0, 0, n, n],
        carrier_cycles_per_px: [0.25, 0.1],
        // the 256-bin crop must hold the window: R <= ~0.124 at 1024, ~0.062 at 2048
        window_radius_cycles_per_px: if n <= 1024 { 0.08 } else { 0.06 },
        window_edge: 0.1,
        grid_px: (256, 256),
        fibre_pitch_um: 0.275,
        wavelength_nm: 1064.0,
        fill_factor: 1.0,
        alignment: Alignment::default(),
        background: vec![0.0; n * n],
        reference: RefAmplitude::Constant(100.0),
    })
}

fn basis(p: &DecodePlan, modes: usize) -> Projector {
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

fn bench(c: &mut Criterion) {
    let threads = rayon::current_num_threads();
    for n in [1024usize, 2048] {
        let f = frame(n);
        let p = plan(n);
        let pr = basis(&p, 110);
        let batch = 4 * threads;
        let frames: Vec<Vec<f32>> = (0..batch).map(|_| f.clone()).collect();
        let mut scratch: Vec<_> = (0..threads).map(|_| p.scratch()).collect();
        let mut fields = Array2::<Complex64>::zeros((batch, p.len()));
        let mut coef = Array2::<Complex64>::zeros((batch, 110));
        let per = batch.div_ceil(threads);
        let mut g = c.benchmark_group(format!("decode_{n}"));
        g.sample_size(10)
            .measurement_time(Duration::from_secs(3))
            .warm_up_time(Duration::from_millis(500));
        g.throughput(Throughput::Elements(batch as u64));
        g.bench_function("decode+project batch (frames/s)", |b| {
            b.iter(|| {
                let flat = fields.as_slice_mut().unwrap();
                frames
                    .par_chunks(per)
                    .zip(flat.par_chunks_mut(per * p.len()))
                    .zip(scratch.par_iter_mut())
                    .for_each(|((fr, out), s)| {
                        for (f, o) in fr.iter().zip(out.chunks_mut(p.len())) {
                            p.decode(f, s, o);
                        }
                    });
                coef.axis_chunks_iter_mut(ndarray::Axis(0), per)
                    .into_par_iter()
                    .zip(
                        fields
                            .axis_chunks_iter(ndarray::Axis(0), per)
                            .into_par_iter(),
                    )
                    .for_each(|(c, f)| pr.project_into(f, c));
            })
        });
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
