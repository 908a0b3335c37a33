//! Start-up cost of the automatic carrier on one 1024^2 frame, against decoding that frame
//! once in the same run (the baseline): the centre-of-power estimate (mean power spectrum
//! and centroid) and the basis refinement with the 55 LP modes of a 50 um graded fibre
//! (NA 0.2, 1550 nm, 10 groups) on a 256^2 grid of 0.4 um pitch. Target (issue: hands-off
//! decoding): estimate + refinement below 0.1 s on this frame.
use criterion::{criterion_group, criterion_main, Criterion};
use modegram::decode::carrier::{estimate, MeanSpectrum, SearchSpec};
use modegram::decode::refine::refine;
use modegram::decode::{DecodePlan, PlanSpec, RefAmplitude};
use modegram::grid::Alignment;
use modegram::modes::Basis;
use modegram::projection::Projector;
use modegram::setup::Setup;
use num_complex::Complex64;
use std::path::Path;
use std::time::Duration;

const OM4: &str = "version = 1\n[light]\nwavelength_nm = 1550.0\n[camera]\npixel_pitch_um = 5.5\n\
                   [fiber]\nprofile = \"graded\"\ncore_radius_um = 25.0\nna = 0.2\n";
const N: usize = 1024;
const CARRIER: [f64; 2] = [0.25, 0.1];

/// A hologram of a sum of LP modes (random real weights) with a tilted reference.
fn hologram(basis: &Basis, pitch_um: f64) -> Vec<f32> {
    let g = modegram::grid::Grid::centred(N, N, pitch_um);
    let modes = basis.sample(&g, &Alignment::default());
    let mut x: u64 = 5;
    let mut next = move || {
        x = x
            .wrapping_mul(6364136223846793005)
            .wrapping_add(1442695040888963407);
        (x >> 11) as f64 / (1u64 << 53) as f64 - 0.5
    };
    let w: Vec<f64> = (0..basis.len()).map(|_| next()).collect();
    let mut out = vec![0f32; N * N];
    let amp = 60.0 / (pitch_um * pitch_um).sqrt().max(1e-9);
    for (i, o) in out.iter_mut().enumerate() {
        let (c, r) = (i % N, i / N);
        let mut s = Complex64::default();
        for (k, wk) in w.iter().enumerate() {
            s += modes[[k, r, c]] * *wk;
        }
        let s = s * amp;
        let ph = 2.0 * std::f64::consts::PI * (CARRIER[0] * c as f64 + CARRIER[1] * r as f64);
        let rf = Complex64::from_polar(90.0, -ph);
        *o = ((s + rf).norm_sqr() + 5.0 * next()).round() as f32;
    }
    out
}

fn bench(c: &mut Criterion) {
    let setup = Setup::from_toml(OM4, Path::new("bench.toml")).unwrap();
    let basis = Basis::from_setup(&setup).unwrap();
    // 0.1 um per camera pixel: the core spans about 500 px of the 1024.
    let cam_fibre_pitch = 0.1;
    let f = hologram(&basis, cam_fibre_pitch);
    let plan = DecodePlan::build(PlanSpec {
        frame_width: N,
        region: [0, 0, N, N],
        carrier_cycles_per_px: CARRIER,
        window_radius_cycles_per_px: 0.08,
        window_edge: 0.1,
        grid_px: (256, 256),
        fibre_pitch_um: cam_fibre_pitch,
        wavelength_nm: 1550.0,
        fill_factor: 1.0,
        alignment: Alignment::default(),
        background: vec![0.0; N * N],
        reference: RefAmplitude::Constant(90.0),
    });
    let proj =
        Projector::from_array(basis.sample(&plan.grid, &Alignment::default()), &plan.grid).unwrap();
    let search = SearchSpec {
        dc_exclusion: 0.05,
        conjugate: false,
        fill_factor: 1.0,
        band: Some(0.2 / (1.55) * cam_fibre_pitch),
    };
    let frames = vec![f.clone()];
    let mut g = c.benchmark_group("carrier 1024^2");
    g.sample_size(10).measurement_time(Duration::from_secs(6));
    g.bench_function("centre of power (mean spectrum + centroid)", |b| {
        b.iter(|| {
            let s = MeanSpectrum::compute(&[f.as_slice()], N, [0, 0, N, N], &[]);
            estimate(&s, &search).unwrap()
        })
    });
    let ms = MeanSpectrum::compute(&[f.as_slice()], N, [0, 0, N, N], &[]);
    g.bench_function("mean spectrum only", |b| {
        b.iter(|| MeanSpectrum::compute(&[f.as_slice()], N, [0, 0, N, N], &[]))
    });
    g.bench_function("centroid only", |b| {
        b.iter(|| estimate(&ms, &search).unwrap())
    });
    g.bench_function("basis refinement, 55 modes", |b| {
        b.iter(|| refine(&plan, &proj, &frames).ok())
    });
    let mut s = plan.scratch();
    let mut out = vec![Complex64::default(); plan.len()];
    g.bench_function("baseline: decode the frame once", |b| {
        b.iter(|| plan.decode(&f, &mut s, &mut out))
    });
    g.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
