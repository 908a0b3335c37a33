//! Matrix stage on the size of a 50 um graded-index fibre at 1550 nm (10 groups, 55 modes,
//! shared/REFERENCES.md), 2 input polarisations x 2 output channels: a 231-frame launch
//! sequence (repeats 2, a reference every 11 inputs) -> 110 x 110 matrix.
//!
//! Measured: assembly with drift tracking; assembly + drift + full analysis; inversion of
//! 10 targets; the baseline in the same run is a bare nalgebra SVD (vectors and values) of the
//! same matrix, which the analysis (values) and inversion (vectors) each need once. Also the
//! random transfer matrix generator of the simulator at this size.
use criterion::{criterion_group, criterion_main, Criterion};
use modegram::matrix::linalg::to_dmatrix;
use modegram::matrix::*;
use ndarray::{Array2, Array3};
use num_complex::Complex64;
use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};
use std::hint::black_box;
use std::time::Duration;

fn groups() -> Vec<u32> {
    (1..=10u32)
        .flat_map(|g| std::iter::repeat_n(g, g as usize))
        .collect()
}

fn sequence(truth: &Array2<Complex64>, layout: &LaunchLayout) -> Array3<Complex64> {
    let n_modes = layout.n_modes;
    let mut rng = rand::rngs::StdRng::seed_from_u64(2);
    let n = layout.expected_frames();
    let mut c = Array3::<Complex64>::zeros((n, 2, n_modes));
    let mut theta = 0.0;
    for f in 0..n {
        let step: f64 = StandardNormal.sample(&mut rng);
        theta += 0.05 + 0.01 * step;
        let col = match layout.role(f).unwrap() {
            FrameRole::Input { pol, mode, .. } => pol * n_modes + mode,
            FrameRole::Reference { .. } => layout.reference_input,
        };
        let ph = Complex64::from_polar(1.0, theta);
        for ch in 0..2 {
            for m in 0..n_modes {
                let x: f64 = StandardNormal.sample(&mut rng);
                let y: f64 = StandardNormal.sample(&mut rng);
                c[(f, ch, m)] =
                    truth[(ch * n_modes + m, col)] * ph * 300.0 + Complex64::new(x, y) * 0.3;
            }
        }
    }
    c
}

fn bench(cr: &mut Criterion) {
    let g = groups();
    let truth = random_transfer(&g, 2, 2, 5.0, -25.0, PolMixing::Full, 1).unwrap();
    let layout = LaunchLayout::from_counts(2, 55, 2, 11, 0).unwrap();
    assert_eq!(layout.expected_frames(), 231);
    let coeffs = sequence(&truth, &layout);
    let asm = assemble(coeffs.view(), &layout, DriftPolicy::Require).unwrap();
    let targets = Array2::from_shape_fn((10, 110), |(t, i)| {
        Complex64::new(((t * 7 + i) % 5) as f64, (i % 3) as f64)
    });

    let mut grp = cr.benchmark_group("matrix_110x110");
    grp.bench_function("baseline_nalgebra_svd", |b| {
        b.iter(|| black_box(to_dmatrix(&asm.matrix).svd(true, true)))
    });
    grp.bench_function("assemble_with_drift", |b| {
        b.iter(|| black_box(assemble(coeffs.view(), &layout, DriftPolicy::Require).unwrap()))
    });
    grp.bench_function("assemble_drift_analyse", |b| {
        b.iter(|| {
            let a = assemble(coeffs.view(), &layout, DriftPolicy::Require).unwrap();
            black_box(analyse(&a, &AnalysisOptions::new(&g)).unwrap())
        })
    });
    grp.bench_function("invert_10_targets", |b| {
        b.iter(|| {
            black_box(invert_targets(&asm.matrix, &targets, Regularization::Default).unwrap())
        })
    });
    grp.bench_function("random_transfer", |b| {
        b.iter(|| black_box(random_transfer(&g, 2, 2, 5.0, -25.0, PolMixing::Full, 1).unwrap()))
    });
    grp.finish();
}

/// The bundled demo from frames to summary (decode + projection + assembly + drift + analysis)
/// against its decode alone, in the same run.
fn demo(cr: &mut Criterion) {
    let path = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).join("frames-demo/setup.toml");
    let setup = modegram::setup::Setup::load(&path).expect("demo setup");
    let basis = modegram::modes::Basis::from_setup(&setup).expect("demo basis");
    let mut grp = cr.benchmark_group("demo_sequence");
    grp.bench_function("baseline_decode_only", |b| {
        b.iter(|| {
            black_box(
                modegram::pipeline::decode_sequence(&setup, &basis, None, None, false, &|_| {})
                    .unwrap(),
            )
        })
    });
    grp.bench_function("decode_to_summary", |b| {
        b.iter(|| {
            let d = modegram::pipeline::decode_sequence(&setup, &basis, None, None, false, &|_| {})
                .unwrap();
            black_box(modegram::pipeline::analyse_sequence(&setup, &basis, &d).unwrap())
        })
    });
    grp.finish();
}

criterion_group! {
    name = benches;
    config = Criterion::default()
        .sample_size(10)
        .warm_up_time(Duration::from_millis(500))
        .measurement_time(Duration::from_secs(2));
    targets = bench, demo
}
criterion_main!(benches);
