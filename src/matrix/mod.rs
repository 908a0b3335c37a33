//! matrix stage (in progress).
