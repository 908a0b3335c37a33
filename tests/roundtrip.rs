//! Round trip at the demo's noise level: synth (frames-demo/scenario.toml) -> decode with the
//! true alignment -> matrix assembly with drift tracking -> the ground truth.
//! Tolerances are the project's acceptance figures (common practice, no source): per-mode
//! power error <= 1% of the column power, column fidelity |<t, m>| / (|t| |m|) >= 0.99,
//! MDL within 0.3 dB and IL within 0.1 dB (IL, MDL as in Ho & Kahn 2011, Opt. Express 19,
//! 16612).
use modegram::decode::{decode_stack, DecodeOptions};
use modegram::export::OutDir;
use modegram::grid::{Alignment, Grid};
use modegram::matrix::{assemble, figures, DriftPolicy, LaunchLayout};
use modegram::setup::Setup;
use modegram::synth::{self, Scenario, SetupOptions};
use num_complex::Complex64;
use std::path::Path;

#[test]
fn synth_decode_matrix_recovers_the_truth() {
    let scn = Scenario::load(Path::new("frames-demo/scenario.toml")).unwrap();
    let basis = synth::basis::solve(&scn).unwrap();
    let groups = synth::basis::groups(&basis);
    let sampler = |g: &Grid, a: &Alignment| synth::basis::sample(&basis, g, a);
    let sim = synth::simulate(&scn, &groups, &sampler, &|| {}).unwrap();
    let dir = tempfile::tempdir().unwrap();
    let out = OutDir::create(dir.path(), false).unwrap();
    let opts = SetupOptions {
        auto_carrier: false,
        true_alignment: true,
    };
    synth::write_all(&out, &scn, &sim, opts).unwrap();
    let setup = Setup::load(&dir.path().join("setup.toml")).unwrap();
    let stack = setup.resolve(setup.frames.stack.as_ref().unwrap());
    let d = decode_stack(
        &setup,
        Some(&sampler),
        &[stack],
        &DecodeOptions::default(),
        &|_| {},
    )
    .unwrap();
    let n = groups.len();
    let layout = LaunchLayout::new(&setup.launch, n).unwrap();
    let asm = assemble(d.coefficients.view(), &layout, DriftPolicy::Require).unwrap();
    let scale = 1.0 / setup.launch.power_counts.sqrt();
    let m = asm.matrix.mapv(|z| z * scale);
    let t = &sim.truth;
    // one global phase is arbitrary after drift tracking
    let g: Complex64 = m.iter().zip(t.iter()).map(|(a, b)| a.conj() * b).sum();
    let m = m.mapv(|z| z * g / g.norm());
    let mut worst_power: f64 = 0.0;
    let mut worst_fid: f64 = 1.0;
    for j in 0..t.ncols() {
        let tc = t.column(j);
        let mc = m.column(j);
        let tp: f64 = tc.iter().map(|z| z.norm_sqr()).sum();
        let mp: f64 = mc.iter().map(|z| z.norm_sqr()).sum();
        for i in 0..t.nrows() {
            worst_power = worst_power.max((mc[i].norm_sqr() - tc[i].norm_sqr()).abs() / tp);
        }
        let ip: Complex64 = tc.iter().zip(mc.iter()).map(|(a, b)| a.conj() * b).sum();
        worst_fid = worst_fid.min(ip.norm() / (tp * mp).sqrt());
    }
    let ft = figures(t, &groups, 2, 2, -20.0).unwrap();
    let fm = figures(&m, &groups, 2, 2, -20.0).unwrap();
    eprintln!(
        "worst power error {worst_power:.4}, worst fidelity {worst_fid:.5}, IL {:.3} vs {:.3} dB, \
         MDL {:.3} vs {:.3} dB",
        fm.insertion_loss_db,
        ft.insertion_loss_db,
        fm.mode_dependent_loss_db,
        ft.mode_dependent_loss_db
    );
    assert!(worst_power <= 0.01, "per-mode power error {worst_power}");
    assert!(worst_fid >= 0.99, "column fidelity {worst_fid}");
    assert!((fm.insertion_loss_db - ft.insertion_loss_db).abs() <= 0.1);
    assert!((fm.mode_dependent_loss_db - ft.mode_dependent_loss_db).abs() <= 0.3);
}
