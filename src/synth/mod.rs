//! synth stage (in progress).
