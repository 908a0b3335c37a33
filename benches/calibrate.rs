//! Calibration and watch throughput.
//!
//! - fit: one full per-channel fit (all of centre, scale, tilt, defocus) on 220 pre-decoded
//!   fields of a 128 x 128 grid with a 55-mode LP basis (graded 50 um core, NA 0.2, 10
//!   groups), timed once (a fit takes seconds; criterion would repeat it ten times);
//! - decode pass: the 220 frames of 1024^2 decoded once (the decode plan, rayon over frames);
//! - baseline in the same run: one objective evaluation (basis sampling + tilt/defocus of
//!   the modes + overlaps with the reduced fields);
//! - watch: decode one 1024^2 frame (baseline), plus its live figures, and the figures alone.
use criterion::{Criterion, Throughput};
use modegram::align::analytic::SplitMix;
use modegram::align::compact::{BasisExtent, Compact, Extent, FineFields};
use modegram::align::fit::{fit_channel, FitContext, FitSpec};
use modegram::align::live::LiveChannel;
use modegram::align::objective::{apply_tilt, geometry, Objective, Propagator, Reduced};
use modegram::decode::{DecodePlan, PlanSpec, RefAmplitude};
use modegram::grid::{Alignment, Grid};
use modegram::modes::Basis;
use modegram::setup::Setup;
use ndarray::{Array3, Axis};
use num_complex::Complex64;
use rayon::prelude::*;
use std::path::Path;
use std::time::{Duration, Instant};

const SETUP: &str = r#"
version = 1
[light]
wavelength_nm = 1064.0
[camera]
pixel_pitch_um = 5.5
[fiber]
profile = "graded"
core_radius_um = 25.0
na = 0.2
[basis]
kind = "lp"
groups = 10
"#;

fn fields(basis: &Basis, grid: &Grid, truth: &Alignment, frames: usize) -> Array3<Complex64> {
    let b = basis.sample(grid, &geometry(truth));
    let nm = b.dim().0;
    let prop = Propagator::new(grid, 1064.0);
    let mut scratch = vec![Complex64::new(0.0, 0.0); prop.fft.scratch_len()];
    let mut rng = SplitMix(3);
    let mut out = Array3::zeros((frames, grid.ny, grid.nx));
    for f in 0..frames {
        let mut e = vec![Complex64::new(0.0, 0.0); grid.len()];
        for k in 0..nm {
            let c = Complex64::new(rng.normal(), rng.normal());
            for (o, v) in e.iter_mut().zip(b.index_axis(Axis(0), k).iter()) {
                *o += c * v;
            }
        }
        prop.propagate(&mut e, truth.defocus_um, &mut scratch);
        apply_tilt(&mut e, grid, 1064.0, truth.tilt_mrad, 1.0);
        for z in e.iter_mut() {
            *z += Complex64::new(0.02 * rng.normal(), 0.02 * rng.normal());
        }
        for (o, z) in out.index_axis_mut(Axis(0), f).iter_mut().zip(e) {
            *o = z;
        }
    }
    out
}

fn frame(n: usize, seed: u64) -> Vec<f32> {
    let mut rng = SplitMix(seed);
    (0..n * n)
        .map(|i| {
            let (c, r) = ((i % n) as f64, (i / n) as f64);
            (20000.0
                + 8000.0 * (std::f64::consts::TAU * (0.25 * c + 0.1 * r)).cos()
                + 30.0 * rng.normal())
            .round() as f32
        })
        .collect()
}

fn plan(n: usize) -> DecodePlan {
    DecodePlan::build(PlanSpec {
        frame_width: n,
        region: [0, 0, n, n],
        carrier_cycles_per_px: [0.25, 0.1],
        window_radius_cycles_per_px: 0.06,
        window_edge: 0.1,
        grid_px: (128, 128),
        fibre_pitch_um: 0.1,
        wavelength_nm: 1064.0,
        fill_factor: 1.0,
        alignment: Alignment::default(),
        background: vec![0.0; n * n],
        reference: RefAmplitude::Constant(100.0),
    })
}

fn main() {
    let setup = Setup::from_toml(SETUP, Path::new("bench.toml")).unwrap();
    let basis = Basis::from_setup(&setup).unwrap();
    let grid = Grid::centred(128, 128, 0.8);
    let truth = Alignment {
        center_um: [4.0, -3.0],
        rotation_deg: 0.0,
        scale: 1.02,
        tilt_mrad: [3.0, -2.0],
        defocus_um: 20.0,
    };
    let f = fields(&basis, &grid, &truth, 220);
    let ctx = FitContext {
        wavelength_nm: 1064.0,
        core_radius_um: 25.0,
        na: 0.2,
    };
    let sampler = |g: &Grid, a: &Alignment| basis.sample(g, a);
    let t0 = Instant::now();
    let fit = fit_channel(
        f.view(),
        &grid,
        &ctx,
        &Alignment::default(),
        sampler,
        &FitSpec::default(),
        &|_| {},
    );
    let t_fit = t0.elapsed().as_secs_f64();
    println!(
        "fit: 220 frames, {} modes, 128^2 grid: {t_fit:.2} s, {} evaluations, converged {}, centre {:?} (truth {:?}), defocus {:.2} (truth {:.1}), captured {:.4} -> {:.4}, threads {}",
        basis.len(),
        fit.iterations,
        fit.converged,
        fit.fitted.center_um,
        truth.center_um,
        fit.fitted.defocus_um,
        truth.defocus_um,
        fit.captured_before,
        fit.captured_after,
        rayon::current_num_threads()
    );

    let n = 1024;
    let p = plan(n);
    let frames: Vec<Vec<f32>> = (0..8).map(|s| frame(n, s)).collect();
    let t0 = Instant::now();
    (0..220usize).into_par_iter().for_each_init(
        || (p.scratch(), vec![Complex64::new(0.0, 0.0); p.len()]),
        |(s, out), i| p.decode(&frames[i % 8], s, out),
    );
    println!(
        "decode pass: 220 frames of 1024^2: {:.2} s",
        t0.elapsed().as_secs_f64()
    );
    println!(
        "calibrate total (one decode pass + fit): {:.2} s",
        t_fit + t0.elapsed().as_secs_f64()
    );

    let mut c = Criterion::default()
        .sample_size(10)
        .warm_up_time(Duration::from_millis(500))
        .measurement_time(Duration::from_secs(3))
        .configure_from_args();
    // the fitting grid of the fit's last stage (tail 1e-5, one depth of focus of room)
    let fine = FineFields::new(f.view(), &grid);
    let bext = BasisExtent::new(
        basis.sample(&grid, &Alignment::default()).view(),
        &grid,
        [0.0, 0.0],
    );
    let ext = Extent {
        wavelength_nm: 1064.0,
        center_um: None,
        around: vec![Alignment::default()],
        center_margin_um: 2.5,
        defocus_margin_um: 1.064 / 0.04,
        tail: 1e-5,
        tilt_margin_cycles_per_um: 0.0,
    };
    let compact = Compact::new(&fine, &bext, &ext);
    let cg = compact.grid;
    println!(
        "compact grid: {} x {} at {:.3} um (decoding grid 128 x 128 at 0.8 um), band {:.3} cycles/um for a basis band of {:.3}",
        cg.nx, cg.ny, cg.pitch_um, compact.band_cycles_per_um, compact.mode_band_cycles_per_um
    );
    let red = Reduced::new(compact.fields.view(), &cg, 1064.0, basis.len() + 10);
    let obj = Objective::new(&red, sampler);
    let mut g = c.benchmark_group("calibrate");
    let mut k = 0.0;
    g.bench_function("objective evaluation (baseline)", |b| {
        b.iter(|| {
            k += 1e-3;
            obj.captured(&Alignment {
                center_um: [k, 0.0],
                defocus_um: 5.0,
                tilt_mrad: [1.0, 0.0],
                ..Default::default()
            })
        })
    });
    g.bench_function("objective, tilt and defocus only", |b| {
        b.iter(|| {
            k += 1e-3;
            obj.captured(&Alignment {
                defocus_um: 5.0 + k,
                tilt_mrad: [1.0, 0.0],
                ..Default::default()
            })
        })
    });
    g.bench_function("sample basis on the compact grid", |b| {
        b.iter(|| basis.sample(&cg, &Alignment::default()))
    });
    g.bench_function("compact 220 fields", |b| {
        b.iter(|| Compact::new(&fine, &bext, &ext))
    });
    g.bench_function("reduce 220 frames to principal components", |b| {
        b.iter(|| Reduced::new(compact.fields.view(), &cg, 1064.0, basis.len() + 10))
    });
    g.finish();

    let g2 = p.grid;
    let mut live = LiveChannel::new(
        g2,
        1064.0,
        Alignment::default(),
        basis.sample(&g2, &Alignment::default()),
        [0.25, 0.1],
        0.06,
        0.05,
        0.1,
        25.0,
        100.0,
    );
    let mut s = p.scratch();
    let mut out = vec![Complex64::new(0.0, 0.0); p.len()];
    let mut g = c.benchmark_group("watch");
    g.throughput(Throughput::Elements(1));
    g.bench_function("decode 1024^2 frame (baseline)", |b| {
        b.iter(|| p.decode(&frames[0], &mut s, &mut out))
    });
    g.bench_function("decode 1024^2 frame + live figures", |b| {
        b.iter(|| {
            p.decode(&frames[1], &mut s, &mut out);
            live.measure(&out, 0.0)
        })
    });
    p.decode(&frames[1], &mut s, &mut out);
    println!(
        "live: {}^2 grid, {} modes, spectral support (bins, rings) {:?}",
        g2.nx,
        basis.len(),
        live.support()
    );
    g.bench_function("live figures of one decoded frame", |b| {
        b.iter(|| live.measure(&out, 0.0))
    });
    g.finish();
    c.final_summary();
}
