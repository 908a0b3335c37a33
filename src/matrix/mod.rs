//! matrix stage (in progress).
pub mod haar;
