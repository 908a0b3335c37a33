//! frames stage (in progress).
