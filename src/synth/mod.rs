//! The simulator behind `modegram synth SCENARIO`: a launch sequence of off-axis holograms
//! with known ground truth.
//!
//! [`scenario`] (the TOML file, docs/scenario.md) -> [`truth`] (device matrix, matrix as
//! launched, seeded streams) -> [`optics`] (per channel, once: camera basis at the TRUE
//! alignment with tilt and defocus, reference beam, pixel-aperture quadrature) -> [`render`]
//! (hologram |S + R e^{i drift}|^2 integrated over the pixel, dark, shot, read noise,
//! quantisation, saturation) -> [`simulate`] (all frames in parallel, deterministic for any
//! thread count) -> [`output`] (TIFF/NPY frames, truth_matrix.npy, truth.json, setup.toml).
//! Physics and signs follow docs/conventions.md.
pub mod basis;
pub mod fft2;
pub mod optics;
pub mod output;
pub mod render;
pub mod scenario;
pub mod simulate;
pub mod truth;

pub use optics::{ChannelOptics, ModeSampler};
pub use output::{file_names, setup_text, write_all, SetupOptions};
pub use scenario::Scenario;
pub use simulate::{simulate, simulate_with_optics, Simulation};
