//! Alignment of the holography setup: fitting each channel's alignment to decoded fields
//! (`modegram calibrate`), checking the setup item by item (`modegram check`) and watching a
//! folder of frames live (`modegram watch`).
//!
//! - [`optimise`]: derivative-free minimisers (Nelder-Mead, golden section, scans, Hessian).
//! - [`objective`]: captured power of the basis over the fields as a function of alignment.
//! - [`compact`]: the fields resampled onto the smallest grid that holds the modes.
//! - [`fit`]: the per-channel fit on decoded fields, with uncertainties.
//! - [`calibrate`]: decode once, fit every channel, calibration.json and fitted.toml.
//! - [`inspect`]: measure and grade every check item of a setup.
//! - [`measure`]: hologram and field measurements behind the check items.
//! - [`check`]: check items from measured numbers: status, threshold, hint.
//! - [`live`]: per-frame figures for the live view of `modegram watch`.
//! - [`watch`]: folder polling that waits for complete frame files.
//! - [`analytic`]: Hermite-Gauss modes and simulated misaligned fields for tests.
pub mod analytic;
pub mod calibrate;
pub mod check;
pub mod compact;
pub mod fit;
pub mod inspect;
pub mod live;
pub mod measure;
pub mod objective;
pub mod optimise;
pub mod watch;
