#!/usr/bin/env bash
# Fit time and peak memory at 256 units × 32 stimuli × 50 trials per stimulus (the issue's
# size): writes a scenario (Poisson, negative binomial and COM-Poisson units in turn),
# simulates, then fits with every family allowed. Usage: tests/bench/fit-256x32.sh.
set -euo pipefail
cd "$(dirname "$0")/../.."
BIN=target/release/auspex
W=$(mktemp -d)
trap 'rm -rf "$W"' EXIT
tests/bench/scenario.sh 256 32 50 256032 > "$W/scenario.toml"
$BIN simulate --scenario "$W/scenario.toml" --out-dir "$W/d" | tail -1
/usr/bin/time -f "fit: %e s wall, %M kB peak resident" $BIN fit --spikes "$W/d/spikes.csv" \
  --trials "$W/d/trials.csv" -o "$W/m.apxm" --quiet 2>&1 | tail -2
