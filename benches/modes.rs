//! Mode solver and sampling: the 50 um graded fibre (NA 0.2) at 1550 nm, 55 modes, sampled
//! on a 256 x 256 grid. Baseline in the same run: a plain per-pixel evaluation with atan2
//! and cos / sin per pixel, one thread.
use criterion::{criterion_group, criterion_main, Criterion};
use modegram::grid::{Alignment, Grid};
use modegram::modes::Basis;
use modegram::setup::Setup;
use num_complex::Complex64;
use std::hint::black_box;
use std::path::Path;
use std::time::Duration;

const OM4: &str = "version = 1\n[light]\nwavelength_nm = 1550.0\n[camera]\npixel_pitch_um = 5.5\n\
                   [fiber]\nprofile = \"graded\"\ncore_radius_um = 25.0\nna = 0.2\n";

fn naive_sample(b: &Basis, grid: &Grid) -> Vec<Complex64> {
    let mut out = Vec::with_capacity(b.len() * grid.len());
    for (k, m) in b.modes.iter().enumerate() {
        for row in 0..grid.ny {
            for col in 0..grid.nx {
                let (x, y) = (grid.x_um(col), grid.y_um(row));
                let r = x.hypot(y);
                let phi = y.atan2(x);
                let rad = b.radial(k, r).unwrap_or(0.0);
                let l = m.l as f64;
                let az = match m.orientation.as_str() {
                    "sin" => (l * phi).sin(),
                    _ => (l * phi).cos(),
                };
                out.push(Complex64::new(rad * az, 0.0));
            }
        }
    }
    out
}

fn bench(c: &mut Criterion) {
    let setup = Setup::from_toml(OM4, Path::new("om4.toml")).unwrap();
    let basis = Basis::from_setup(&setup).unwrap();
    assert_eq!(basis.len(), 55);
    let grid = Grid::centred(256, 256, 0.4);
    let align = Alignment::default();
    let mut g = c.benchmark_group("modes_om4_1550nm");
    g.sample_size(10)
        .warm_up_time(Duration::from_millis(500))
        .measurement_time(Duration::from_secs(3));
    g.bench_function("solve_55_modes", |b| {
        b.iter(|| Basis::from_setup(black_box(&setup)).unwrap())
    });
    g.bench_function("sample_55x256x256", |b| {
        b.iter(|| basis.sample(black_box(&grid), &align))
    });
    g.bench_function("solve_and_sample", |b| {
        b.iter(|| {
            Basis::from_setup(black_box(&setup))
                .unwrap()
                .sample(&grid, &align)
        })
    });
    g.bench_function("baseline_naive_atan2_sample", |b| {
        b.iter(|| naive_sample(black_box(&basis), &grid))
    });
    g.finish();
}

criterion_group!(benches, bench);
criterion_main!(benches);
