//! Placeholder until the stage's benchmark lands.
fn main() {}
