#!/bin/sh
# Rebuild every scenario's truth.json and measurements.json from the committed settings
# and seeds with tacit's own simulator, then rebuild tacit so `tacit demo` embeds them.
# Run from anywhere; the result is byte-for-byte the committed files unless the
# settings (or the simulator) changed, which tests/demo.rs checks.
set -eu
cd "$(dirname "$0")/.."
cargo run --release --locked -- demo --regenerate demo-data
cargo build --release --locked
