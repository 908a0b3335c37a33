//! Overlap integrals of decoded fields with a sampled basis.
