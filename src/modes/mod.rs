//! modes stage (in progress).
