//! align stage (in progress).
