//! Pictures (PNG) and the self-contained HTML report.
//!
//! Every picture function takes plain arrays and returns an [`image::RgbImage`]; none fails:
//! empty or inconsistent input gives a picture with less drawn on it (no boundary lines
//! when the group list does not fit the matrix, "no data" for an empty field). Write them
//! with [`write_png`]. Each picture's layout is a public `*_geometry` function so callers
//! (and tests) can map data positions to pixels. See docs/pictures.md.
pub mod canvas;
pub mod colour;
pub mod field;
pub mod fourier;
pub mod matrix;
pub mod report;

pub use canvas::{encode_png, write_png, Geometry};
pub use field::{field_geometry, field_picture, gallery_geometry, gallery_picture};
pub use fourier::{fourier_geometry, fourier_picture, frequency_to_px};
pub use matrix::{
    group_power_picture, line_chart, matrix_db_picture, matrix_geometry, matrix_phase_picture,
    singular_values_chart,
};
pub use report::{assemble_report, build_report, Report};
