//! render stage (in progress).
