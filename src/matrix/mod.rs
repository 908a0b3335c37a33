//! The matrix stage: launch layout, drift tracking, assembly of the transfer matrix, its
//! figures of merit, inversion, random test matrices and the result files.
//!
//! Inputs are plain arrays: coefficients (frames, channels, modes) in modes.json order and a
//! group number per mode. See docs/matrix.md.
pub mod analysis;
pub mod assemble;
pub mod drift;
pub mod haar;
pub mod invert;
pub mod launch;
pub mod linalg;
pub mod random;
pub mod sanity;
pub mod summary;
pub mod target;
pub mod write;

pub use analysis::{figures, normalisation, Figures, LossReference, Normalisation};
pub use assemble::{assemble, Assembly, ColumnPhases, DriftPolicy};
pub use drift::{remove_drift, track_drift, DriftTrack};
pub use invert::{invert_targets, InversionReport, InversionResult, Regularization};
pub use launch::{FrameRole, LaunchLayout};
pub use random::{random_transfer, PolMixing};
pub use sanity::sequence_problems;
pub use summary::{analyse, summary_table, Analysis, AnalysisOptions, MatrixSummary};
pub use write::{matrix_csv, write_matrix_files, MATRIX_FILES};
