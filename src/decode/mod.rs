//! decode stage (in progress).
