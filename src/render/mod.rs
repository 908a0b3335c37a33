//! Pictures and the report.
pub mod colour;
