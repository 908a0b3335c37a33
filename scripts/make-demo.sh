#!/bin/sh
# Regenerate the bundled demo frames-demo/ from frames-demo/scenario.toml (fixed seed).
# Usage: scripts/make-demo.sh   (from anywhere inside the repository)
set -eu
cd "$(dirname "$0")/.."
cargo run --release --quiet -- synth frames-demo/scenario.toml --out frames-demo --force "$@"
du -sh frames-demo
